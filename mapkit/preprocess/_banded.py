"""Batched solves of the penalised least-squares systems behind Whittaker-type baselines.

Every spectrum of a block needs (W + λ DᵀD) z = W y with its own weights W and the same
second-difference penalty D: a symmetric positive-definite pentadiagonal system. The
compiled kernel factorises each spectrum's system (LDLᵀ) in a scalar loop, spectra in
parallel, and releases the GIL; for ALS the whole reweighting loop runs compiled. The
numpy fallback runs the same recurrence along the channel axis, vectorised across
spectra, when numba is unavailable. Measured on 2 cores (benchmarks/RESULTS.md): the
compiled ALS is ~15x a per-spectrum pybaselines loop, the numpy one ~1.1x, which is why
the extra dependency is worth it.
"""

from __future__ import annotations

import numpy as np

try:  # numba is optional at run time; results are identical either way (tests compare them)
    import numba

    HAVE_NUMBA = True
except ImportError:  # pragma: no cover - exercised only where numba is missing
    HAVE_NUMBA = False


def penalty_diagonals(n: int, lam: float):
    """Diagonals (main, first, second super-diagonal) of λ·DᵀD for the 2nd-difference D."""
    if n < 3:
        raise ValueError("a second-difference penalty needs at least 3 channels")
    d0 = np.full(n, 6.0)
    d0[[0, -1]] = 1.0
    d0[[1, -2]] = 5.0
    d1 = np.full(n - 1, -4.0)
    d1[[0, -1]] = -2.0
    d2 = np.ones(n - 2)
    if n == 3:
        d0[:] = (1.0, 4.0, 1.0)
        d1[:] = -2.0
    return lam * d0, lam * d1, lam * d2


def solve_pentadiagonal(a, b, c, rhs):
    """Solve symmetric positive-definite pentadiagonal systems, one per row (numpy).

    ``a`` (m, n) is the main diagonal, ``b`` (m, n-1) and ``c`` (m, n-2) the first and
    second super-diagonals, ``rhs`` (m, n).
    """
    m, n = rhs.shape
    d = np.empty((m, n))
    l1 = np.zeros((m, n))
    l2 = np.zeros((m, n))
    d[:, 0] = a[:, 0]
    l1[:, 1] = b[:, 0] / d[:, 0]
    d[:, 1] = a[:, 1] - l1[:, 1] ** 2 * d[:, 0]
    for i in range(2, n):
        l2[:, i] = c[:, i - 2] / d[:, i - 2]
        l1[:, i] = (b[:, i - 1] - l2[:, i] * l1[:, i - 1] * d[:, i - 2]) / d[:, i - 1]
        d[:, i] = a[:, i] - l1[:, i] ** 2 * d[:, i - 1] - l2[:, i] ** 2 * d[:, i - 2]
    z = np.empty((m, n))
    z[:, 0] = rhs[:, 0]
    z[:, 1] = rhs[:, 1] - l1[:, 1] * z[:, 0]
    for i in range(2, n):
        z[:, i] = rhs[:, i] - l1[:, i] * z[:, i - 1] - l2[:, i] * z[:, i - 2]
    z /= d
    x = np.empty((m, n))
    x[:, n - 1] = z[:, n - 1]
    x[:, n - 2] = z[:, n - 2] - l1[:, n - 1] * x[:, n - 1]
    for i in range(n - 3, -1, -1):
        x[:, i] = z[:, i] - l1[:, i + 1] * x[:, i + 1] - l2[:, i + 2] * x[:, i + 2]
    return x


def _weighted_numpy(w, y, d0, d1, d2):
    m, n = y.shape
    return solve_pentadiagonal(w + d0, np.broadcast_to(d1, (m, n - 1)),
                               np.broadcast_to(d2, (m, n - 2)), w * y)


if HAVE_NUMBA:
    @numba.njit(cache=True, nogil=True)
    def _solve_one(w, y, d0, d1, d2, l1, l2, q, out):  # pragma: no cover - compiled
        # one pass factorises (LDLᵀ) and substitutes forward; a second substitutes back
        n = y.size
        dm2 = w[0] + d0[0]
        zm2 = w[0] * y[0]
        q[0] = zm2 / dm2
        l1[1] = d1[0] / dm2
        dm1 = w[1] + d0[1] - l1[1] * l1[1] * dm2
        zm1 = w[1] * y[1] - l1[1] * zm2
        q[1] = zm1 / dm1
        for i in range(2, n):
            a2 = d2[i - 2] / dm2
            a1 = (d1[i - 1] - a2 * l1[i - 1] * dm2) / dm1
            di = w[i] + d0[i] - a1 * a1 * dm1 - a2 * a2 * dm2
            zi = w[i] * y[i] - a1 * zm1 - a2 * zm2
            l1[i] = a1
            l2[i] = a2
            q[i] = zi / di
            dm2, dm1 = dm1, di
            zm2, zm1 = zm1, zi
        x1 = q[n - 1]
        x0 = q[n - 2] - l1[n - 1] * x1
        out[n - 1] = x1
        out[n - 2] = x0
        for i in range(n - 3, -1, -1):
            xi = q[i] - l1[i + 1] * x0 - l2[i + 2] * x1
            out[i] = xi
            x1, x0 = x0, xi

    @numba.njit(parallel=True, cache=True, nogil=True)
    def _weighted_numba(w, y, d0, d1, d2):  # pragma: no cover - compiled
        m, n = y.shape
        out = np.empty((m, n))
        for k in numba.prange(m):
            l1 = np.empty(n)
            l2 = np.empty(n)
            q = np.empty(n)
            _solve_one(w[k], y[k], d0, d1, d2, l1, l2, q, out[k])
        return out

    @numba.njit(parallel=True, cache=True, nogil=True)
    def _als_numba(y, d0, d1, d2, p, max_iter, tol):  # pragma: no cover - compiled
        # the whole reweighting loop per spectrum: no array traffic between iterations
        m, n = y.shape
        out = np.empty((m, n))
        converged = np.zeros(m, np.bool_)
        eps = np.finfo(np.float64).eps
        for k in numba.prange(m):
            l1 = np.empty(n)
            l2 = np.empty(n)
            q = np.empty(n)
            w = np.ones(n)
            for _ in range(max_iter + 1):
                _solve_one(w, y[k], d0, d1, d2, l1, l2, q, out[k])
                num = 0.0
                den = 0.0
                for i in range(n):
                    new = p if y[k, i] > out[k, i] else 1.0 - p
                    num += (new - w[i]) ** 2
                    den += w[i] * w[i]
                    q[i] = new
                if np.sqrt(num) / max(np.sqrt(den), eps) < tol:
                    converged[k] = True
                    break
                for i in range(n):
                    w[i] = q[i]
        return out, converged


def als_solve(y, lam: float, p: float, max_iter: int, tol: float):
    """Compiled ALS on every row of ``y``: (baselines, converged flags), or None without numba."""
    if not HAVE_NUMBA:
        return None
    d0, d1, d2 = penalty_diagonals(y.shape[1], lam)
    return _als_numba(np.ascontiguousarray(y, dtype=np.float64), d0, d1, d2, float(p),
                      int(max_iter), float(tol))


def weighted_whittaker(w, y, lam: float, *, engine: str = "auto"):
    """z minimising Σ wᵢ(yᵢ − zᵢ)² + λ Σ(Δ²zᵢ)² for every row of ``y`` (float64).

    ``engine`` is ``"numba"``, ``"numpy"`` or ``"auto"`` (numba when installed).
    """
    y = np.ascontiguousarray(y, dtype=np.float64)
    w = np.ascontiguousarray(np.broadcast_to(w, y.shape), dtype=np.float64)
    d0, d1, d2 = penalty_diagonals(y.shape[1], lam)
    if engine == "numba" or (engine == "auto" and HAVE_NUMBA):
        if not HAVE_NUMBA:
            raise RuntimeError("numba is not installed")
        return _weighted_numba(w, y, d0, d1, d2)
    return _weighted_numpy(w, y, d0, d1, d2)
