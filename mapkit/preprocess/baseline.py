"""Baseline (fluorescence background) estimation, solved for a block of spectra at once."""

from __future__ import annotations

import numpy as np

from ..errors import MapkitError


def _penalty_diagonals(n: int, lam: float):
    """Diagonals (main, first, second) of λ·DᵀD for the 2nd-difference matrix D."""
    d0 = np.full(n, 6.0)
    d0[[0, -1]] = 1.0
    if n > 2:
        d0[[1, -2]] = 5.0
    d1 = np.full(n - 1, -4.0)
    d1[[0, -1]] = -2.0
    d2 = np.ones(n - 2)
    if n == 3:
        d0[:] = (1.0, 4.0, 1.0)
        d1[:] = -2.0
    return lam * d0, lam * d1, lam * d2


def solve_pentadiagonal(a, b, c, rhs):
    """Solve symmetric positive-definite pentadiagonal systems, one per row.

    ``a`` (m, n) is the main diagonal, ``b`` (m, n-1) and ``c`` (m, n-2) the
    first and second super-diagonals, ``rhs`` (m, n). An LDLᵀ factorisation
    runs along the channel axis while every operation is vectorised across the
    m spectra; scipy's banded solvers would need a Python loop per spectrum and
    hold the GIL (measured in benchmarks/bench_baseline.py).
    """
    m, n = rhs.shape
    d = np.empty((m, n))
    l1 = np.zeros((m, n))
    l2 = np.zeros((m, n))
    d[:, 0] = a[:, 0]
    if n > 1:
        l1[:, 1] = b[:, 0] / d[:, 0]
        d[:, 1] = a[:, 1] - l1[:, 1] ** 2 * d[:, 0]
    for i in range(2, n):
        l2[:, i] = c[:, i - 2] / d[:, i - 2]
        l1[:, i] = (b[:, i - 1] - l2[:, i] * l1[:, i - 1] * d[:, i - 2]) / d[:, i - 1]
        d[:, i] = a[:, i] - l1[:, i] ** 2 * d[:, i - 1] - l2[:, i] ** 2 * d[:, i - 2]
    z = np.empty((m, n))
    z[:, 0] = rhs[:, 0]
    if n > 1:
        z[:, 1] = rhs[:, 1] - l1[:, 1] * z[:, 0]
    for i in range(2, n):
        z[:, i] = rhs[:, i] - l1[:, i] * z[:, i - 1] - l2[:, i] * z[:, i - 2]
    z /= d
    x = np.empty((m, n))
    x[:, n - 1] = z[:, n - 1]
    if n > 1:
        x[:, n - 2] = z[:, n - 2] - l1[:, n - 1] * x[:, n - 1]
    for i in range(n - 3, -1, -1):
        x[:, i] = z[:, i] - l1[:, i + 1] * x[:, i + 1] - l2[:, i + 2] * x[:, i + 2]
    return x


def als_baseline(block, shift=None, *, lam: float = 1e5, p: float = 0.01,
                 max_iter: int = 50, tol: float = 1e-3):
    """Asymmetric least squares baseline of every spectrum in ``block``.

    Eilers & Boelens (2005), "Baseline correction with asymmetric least squares
    smoothing": minimise Σ wᵢ(yᵢ − zᵢ)² + λ Σ (Δ²zᵢ)² with wᵢ = p where the
    spectrum lies above the baseline and 1 − p below, re-weighting until the
    weights stop changing (relative change < ``tol``, the stopping rule of
    pybaselines' ``asls``, so the two agree). Solved in float64 whatever the
    input dtype: float32 weights beside λ ≥ 1e5 break the factorisation.

    Parameters
    ----------
    block : array (n_spectra, n_shift) or (n_shift,)
    shift : ignored (the penalty is on channel index, as in the paper)
    lam : float
        Smoothness, 1e2–1e9.
    p : float
        Asymmetry, 0 < p < 1 (typically 0.001–0.1).

    Returns
    -------
    baseline : float64 array, same shape as ``block``

    Examples
    --------
    >>> x = np.linspace(0, 1, 200)
    >>> line = 3 + 2 * x
    >>> bool(np.allclose(als_baseline(line, lam=1e6, p=0.01), line))
    True
    """
    if not 0 < p < 1:
        raise MapkitError(f"p = {p} is outside (0, 1)", field="p", fix="use 0.001-0.1")
    if not lam > 0:
        raise MapkitError(f"lam = {lam} must be positive", field="lam", fix="use 1e2-1e9")
    y = np.asarray(block, dtype=np.float64)
    single = y.ndim == 1
    y = np.atleast_2d(y)
    m, n = y.shape
    if n < 3:
        return np.array(y if not single else y[0])
    p0, p1, p2 = _penalty_diagonals(n, lam)
    w = np.ones((m, n))
    z = np.empty((m, n))
    active = np.arange(m)
    for _ in range(max_iter + 1):
        wa = w[active]
        za = solve_pentadiagonal(wa + p0, np.broadcast_to(p1, (active.size, n - 1)),
                                 np.broadcast_to(p2, (active.size, n - 2)), wa * y[active])
        z[active] = za
        new_w = np.where(y[active] > za, p, 1 - p)
        change = np.linalg.norm(new_w - wa, axis=1) / np.maximum(np.linalg.norm(wa, axis=1),
                                                                 np.finfo(float).eps)
        w[active] = new_w
        active = active[change >= tol]
        if active.size == 0:
            break
    return z[0] if single else z
