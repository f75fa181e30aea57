"""Baseline (fluorescence background) estimation, solved for a block of spectra at once.

Every function takes a block ``(n_spectra, n_shift)`` (or one spectrum) and returns the
baseline in float64 with the same shape. The Whittaker-type methods (ALS, arPLS, airPLS)
share one batched penalised solve (:mod:`mapkit.preprocess._banded`); each follows the
stopping rule of the pybaselines implementation of the same method, so the two agree to
rounding (tests/test_preprocess.py).
"""

from __future__ import annotations

import numpy as np
from scipy.ndimage import grey_dilation, grey_erosion, grey_opening
from scipy.special import expit

from ..errors import MapkitError
from ._banded import AIRPLS, ALS, ARPLS, reweighted_solve, weighted_whittaker

_EPS = np.finfo(float).eps


def _prepare(block, keep_float32=False):
    # float64, or a float32 block as it is where the compiled loop reads it (converting
    # each value exactly as the float64 copy would)
    y = np.asarray(block)
    if not (keep_float32 and y.dtype == np.float32):
        y = y.astype(np.float64, copy=False)
    single = y.ndim == 1
    y = np.atleast_2d(y)
    if y.shape[-1] < 3:
        raise MapkitError(f"a baseline needs at least 3 channels, the spectra have {y.shape[-1]}",
                          field="raman_shift", fix="do not crop the spectra so narrowly")
    return y, single


def _check_lam(lam):
    if not lam > 0:
        raise MapkitError(f"lam = {lam} must be positive", field="lam", fix="use 1e2-1e9")


def _relative_change(old, new):
    return np.linalg.norm(new - old, axis=1) / np.maximum(np.linalg.norm(old, axis=1), _EPS)


def _report(info, converged=None, *, m=None, active=None):
    """Fill ``info["converged"]`` (one flag per spectrum) when the caller asked for it:
    given directly, or as all spectra but the still-``active`` ones of ``m``."""
    if info is None:
        return
    if converged is None:
        converged = np.ones(m, bool)
        converged[active] = False
    info["converged"] = np.asarray(converged, bool)


def _compiled(y, lam, kind, engine, info, **params):
    """The baselines from the compiled loop, or None where the numpy loop must run."""
    if engine not in ("auto", "numba"):
        return None
    solved = reweighted_solve(y, lam, kind, **params)
    if solved is None:
        if engine == "numba":
            raise RuntimeError("numba is not installed")
        return None
    _report(info, solved[1])
    return solved[0]


def _reweighted(y, lam, weigh, max_iter, tol, engine, info=None):
    """Iterate solve → new weights on the still-active spectra until each one converges.

    ``weigh(y, z, w, iteration)`` returns (new_w, change, stop_now) per active row; a row
    leaves the active set when ``change < tol`` (keeping the weights that produced its
    final baseline, as pybaselines does) or when ``stop_now`` says the update is unusable.
    """
    m, n = y.shape
    w = np.ones((m, n))
    z = np.empty((m, n))
    active = np.arange(m)
    for it in range(1, max_iter + 2):
        za = weighted_whittaker(w[active], y[active], lam, engine=engine)
        z[active] = za
        new_w, change, stop = weigh(y[active], za, w[active], it)
        done = stop | (change < tol)
        keep = ~done
        w[active[keep]] = new_w[keep]
        active = active[keep]
        if active.size == 0:
            break
    _report(info, m=m, active=active)
    return z


def als_baseline(block, shift=None, *, lam: float = 1e5, p: float = 0.01, max_iter: int = 50,
                 tol: float = 1e-3, engine: str = "auto", info: dict | None = None):
    """Asymmetric least squares baseline (Eilers & Boelens 2005).

    Minimises Σ wᵢ(yᵢ − zᵢ)² + λ Σ(Δ²zᵢ)² with wᵢ = p where the spectrum lies above the
    baseline and 1 − p below, re-weighting until the relative change of the weights is
    below ``tol``. Solved in float64 whatever the input dtype: float32 weights next to
    λ ≥ 1e5 break the factorisation.

    Parameters
    ----------
    block : array (n_spectra, n_shift) or (n_shift,)
    shift : ignored (the penalty acts on channel index, as in the paper)
    lam : float
        Smoothness, 1e2–1e9.
    p : float
        Asymmetry, 0 < p < 1 (typically 0.001–0.1).

    Examples
    --------
    >>> x = np.linspace(0, 1, 200)
    >>> line = 3 + 2 * x
    >>> bool(np.allclose(als_baseline(line, lam=1e6, p=0.01), line))
    True
    """
    if not 0 < p < 1:
        raise MapkitError(f"p = {p} is outside (0, 1)", field="p", fix="use 0.001-0.1")
    _check_lam(lam)
    y, single = _prepare(block, keep_float32=True)
    solved = _compiled(y, lam, ALS, engine, info, p=p, max_iter=max_iter, tol=tol)
    if solved is not None:
        return solved[0] if single else solved
    y = y.astype(np.float64, copy=False)

    def weigh(ya, za, wa, it):
        new = np.where(ya > za, p, 1 - p)
        return new, _relative_change(wa, new), np.zeros(len(ya), bool)

    z = _reweighted(y, lam, weigh, max_iter, tol, engine, info)
    return z[0] if single else z


def arpls_baseline(block, shift=None, *, lam: float = 1e5, max_iter: int = 50,
                   tol: float = 1e-3, engine: str = "auto", info: dict | None = None):
    """Asymmetrically reweighted penalised least squares (arPLS; Baek et al. 2015, Analyst 140:250).

    Weights follow a logistic function of the residual scaled by the mean and standard
    deviation of the negative residuals, so noise around the baseline keeps weight and
    peaks lose it.

    Examples
    --------
    >>> x = np.linspace(0, 1, 300)
    >>> y = 10 + 5 * x + 40 * np.exp(-((x - 0.5) / 0.02) ** 2)
    >>> z = arpls_baseline(y, lam=1e5)
    >>> bool(abs(z[150] - 12.5) < 1.0)
    True
    """
    _check_lam(lam)
    y, single = _prepare(block, keep_float32=True)
    solved = _compiled(y, lam, ARPLS, engine, info, max_iter=max_iter, tol=tol)
    if solved is not None:
        return solved[0] if single else solved
    y = y.astype(np.float64, copy=False)

    def weigh(ya, za, wa, it):
        r = ya - za
        neg = r < 0
        count = neg.sum(axis=1)
        stop = count < 2
        rn = np.where(neg, r, 0.0)
        mean = rn.sum(axis=1) / np.maximum(count, 1)
        var = (np.where(neg, r - mean[:, None], 0.0) ** 2).sum(axis=1) / np.maximum(count - 1, 1)
        std = np.sqrt(var)
        std = np.where(std == 0, _EPS, std)
        new = expit(-(2 / std[:, None]) * (r - (2 * std - mean)[:, None]))
        return new, _relative_change(wa, new), stop

    z = _reweighted(y, lam, weigh, max_iter, tol, engine, info)
    return z[0] if single else z


def airpls_baseline(block, shift=None, *, lam: float = 1e6, max_iter: int = 50,
                    tol: float = 1e-3, engine: str = "auto", info: dict | None = None):
    """Adaptive iteratively reweighted penalised least squares (airPLS; Zhang, Chen & Liang 2010).

    Points above the baseline get weight 0; points below get exp(t·|r|/|Σr⁻|) at
    iteration t (capped at 50), and iteration stops when |Σr⁻| < tol·Σ|y|.
    """
    _check_lam(lam)
    y, single = _prepare(block, keep_float32=True)
    solved = _compiled(y, lam, AIRPLS, engine, info, max_iter=max_iter, tol=tol)
    if solved is not None:
        return solved[0] if single else solved
    y = y.astype(np.float64, copy=False)
    y_l1 = np.abs(y).sum(axis=1)
    log_max = np.log(np.finfo(float).max)
    z = np.empty_like(y)
    w = np.ones_like(y)
    active = np.arange(y.shape[0])
    for it in range(1, max_iter + 2):
        za = weighted_whittaker(w[active], y[active], lam, engine=engine)
        z[active] = za
        r = y[active] - za
        neg = r < 0
        l1 = np.where(neg, r, 0.0).sum(axis=1)          # ≤ 0
        safe = np.where(l1 == 0, -1.0, l1)
        inner = np.clip((min(it, 50) / safe)[:, None] * r, 0, log_max - np.spacing(log_max))
        new_w = np.where(neg, np.exp(inner), 0.0)
        rel = np.divide(np.abs(l1), y_l1[active], out=np.zeros_like(l1), where=y_l1[active] > 0)
        done = (neg.sum(axis=1) < 2) | (rel < tol)
        w[active[~done]] = new_w[~done]
        active = active[~done]
        if active.size == 0:
            break
    _report(info, m=y.shape[0], active=active)
    return z[0] if single else z


def modpoly_baseline(block, shift=None, *, order: int = 2, max_iter: int = 250,
                     tol: float = 1e-3, info: dict | None = None):
    """Modified polynomial baseline (Lieber & Mahadevan-Jansen 2003, Appl. Spectrosc. 57:1363).

    Fits a polynomial, clips the spectrum to it from above, and refits until the baseline
    changes by less than ``tol`` (relative). Polynomials live on the shift axis mapped to
    [-1, 1] (the channel index when ``shift`` is None).
    """
    y, single = _prepare(block)
    if not (0 <= order <= 20):
        raise MapkitError(f"order = {order} is outside 0-20", field="order", fix="use 1-6")
    x = np.arange(y.shape[1], dtype=float) if shift is None else np.asarray(shift, float)
    t = 2 * (x - x.min()) / (x.max() - x.min()) - 1
    V = np.polynomial.polynomial.polyvander(t, order)
    pinv = np.linalg.pinv(V)
    base = (pinv @ y.T).T @ V.T
    work = y.copy()
    active = np.arange(y.shape[0])
    for _ in range(max_iter):
        old = base[active]
        work[active] = np.minimum(work[active], old)
        new = (pinv @ work[active].T).T @ V.T
        base[active] = new
        active = active[_relative_change(old, new) >= tol]
        if active.size == 0:
            break
    _report(info, m=y.shape[0], active=active)
    return base[0] if single else base


def rolling_baseline(block, shift=None, *, half_window: int = 25, info: dict | None = None):
    """Morphological baseline (Perez-Pueyo et al. 2010, Appl. Spectrosc. 64:595).

    A grey opening with a flat window of 2·half_window + 1 channels, then the pointwise
    minimum of the opening and the mean of its dilation and erosion, which smooths the
    opening's steps. Choose the window wider than the widest band.
    """
    y, single = _prepare(block)
    if not (1 <= half_window < y.shape[1] // 2):
        raise MapkitError(f"half_window = {half_window} must be 1 to {y.shape[1] // 2 - 1}",
                          field="half_window", fix="use a window wider than the widest band")
    size = (1, 2 * half_window + 1)
    opening = grey_opening(y, size=size)
    avg = 0.5 * (grey_dilation(opening, size=size) + grey_erosion(opening, size=size))
    base = np.minimum(opening, avg)
    _report(info, np.ones(y.shape[0], bool))   # not iterative: always converged
    return base[0] if single else base


#: the methods whose compiled loop takes float32 spectra without a float64 copy
READS_FLOAT32 = ("als", "arpls", "airpls")

METHODS = {"als": als_baseline, "arpls": arpls_baseline, "airpls": airpls_baseline,
           "modpoly": modpoly_baseline, "rolling": rolling_baseline}
