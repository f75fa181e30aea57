"""Peak-fit maps: Lorentzian, Gaussian or pseudo-Voigt bands fitted at every pixel at once.

The fit is a Levenberg–Marquardt iteration vectorised across pixels: every pixel has its
own parameters, damping and convergence, but each iteration is a handful of array
operations over the whole block instead of one optimiser call per pixel. With
``weights="poisson"`` the residuals are weighted by 1/μ (the model's expected counts,
iteratively re-weighted), which is the maximum-likelihood fit for shot noise and reaches
the Cramér–Rao bound (tests/test_peakfit.py).
"""

from __future__ import annotations

import numpy as np

from ..core.ramanmap import RamanMap
from ..core.result import Field, Result
from ..errors import MapkitError
from ..preprocess.axis import crop_indices
from ._common import image_axes

SHAPES = ("lorentzian", "gaussian", "pseudo_voigt")
_LN2 = np.log(2.0)
#: parameters of one peak, in order, followed by the two background terms
PEAK_PARAMS = {"lorentzian": ("height", "centre", "fwhm"), "gaussian": ("height", "centre", "fwhm"),
               "pseudo_voigt": ("height", "centre", "fwhm", "eta")}


def _profiles(s, h, c, w):
    """Lorentzian and Gaussian of height h, centre c, FWHM w; s (N,), params (P,)."""
    u = 2.0 * (s[None, :] - c[:, None]) / w[:, None]
    lor = 1.0 / (1.0 + u * u)
    gau = np.exp(-_LN2 * u * u)
    return u, lor, gau


def model_and_jacobian(theta, s, shape: str, n_peaks: int, centre_of_window: float):
    """Model μ (P, N) and Jacobian ∂μ/∂θ (P, N, K) for parameters θ (P, K)."""
    per = len(PEAK_PARAMS[shape])
    P, N = theta.shape[0], s.size
    mu = np.zeros((P, N))
    J = np.zeros((P, N, theta.shape[1]))
    for k in range(n_peaks):
        o = k * per
        h, c, w = theta[:, o], theta[:, o + 1], theta[:, o + 2]
        u, lor, gau = _profiles(s, h, c, w)
        hh, ww = h[:, None], w[:, None]
        if shape == "lorentzian":
            f, dfdu = lor, -2.0 * u * lor * lor
        elif shape == "gaussian":
            f, dfdu = gau, -2.0 * _LN2 * u * gau
        else:
            eta = theta[:, o + 3][:, None]
            f = eta * lor + (1 - eta) * gau
            dfdu = eta * (-2.0 * u * lor * lor) + (1 - eta) * (-2.0 * _LN2 * u * gau)
            J[:, :, o + 3] = hh * (lor - gau)
        mu += hh * f
        J[:, :, o] = f
        J[:, :, o + 1] = hh * dfdu * (-2.0 / ww)
        J[:, :, o + 2] = hh * dfdu * (-u / ww)
    x = s - centre_of_window
    mu += theta[:, -2][:, None] + theta[:, -1][:, None] * x[None, :]
    J[:, :, -2] = 1.0
    J[:, :, -1] = x[None, :]
    return mu, J


def peak_area(shape, h, w, eta=None):
    """Integrated area of a peak of height h and FWHM w."""
    lor = np.pi / 2 * h * w
    gau = h * w * np.sqrt(np.pi / (4 * _LN2))
    if shape == "lorentzian":
        return lor
    if shape == "gaussian":
        return gau
    return eta * lor + (1 - eta) * gau


def _start_step(s):
    return float(np.median(np.abs(np.diff(s))))


def _initial(s, y, shape, n_peaks, centres, mid):
    """Start values (numpy twin of the kernel's ``initial``): a line through the end
    channels, then per peak the tallest residual (or the given centre), its height and
    the width of the channels above half of it; a found centre is refined to the vertex of
    the parabola through its channel and the two neighbours."""
    P = y.shape[0]
    per = len(PEAK_PARAMS[shape])
    theta = np.zeros((P, per * n_peaks + 2))
    slope = (y[:, -1] - y[:, 0]) / (s[-1] - s[0])
    offset = 0.5 * (y[:, 0] + y[:, -1]) + slope * (mid - 0.5 * (s[0] + s[-1]))
    resid = y - (offset[:, None] + slope[:, None] * (s - mid)[None, :])
    step = _start_step(s)
    if centres is None:
        centres = [None] * n_peaks
    for k in range(n_peaks):
        o = k * per
        if centres[k] is None:
            i = np.argmax(resid, axis=1)
            # the vertex of the parabola through the tallest residual and its neighbours
            # (within half a channel): about 0.3 fewer iterations per pixel
            j = np.clip(i, 1, s.size - 2)
            rows = np.arange(P)
            rm, r0, rp = resid[rows, j - 1], resid[rows, j], resid[rows, j + 1]
            den = rm - 2.0 * r0 + rp
            inner = (i == j) & (den < 0)
            frac = np.where(inner, np.clip(0.5 * (rm - rp) / np.where(inner, den, -1.0),
                                           -0.5, 0.5), 0.0)
            c0 = s[i] + frac * (0.5 * (s[j + 1] - s[j - 1]))
        else:
            c0 = np.full(P, float(centres[k]))
            i = np.abs(s[None, :] - c0[:, None]).argmin(axis=1)
        h0 = np.maximum(resid[np.arange(P), i], 1e-6)
        above = resid > 0.5 * h0[:, None]
        w0 = np.maximum(above.sum(axis=1) * step, 2 * step) / max(n_peaks, 1)
        theta[:, o], theta[:, o + 1], theta[:, o + 2] = h0, c0, w0
        if shape == "pseudo_voigt":
            theta[:, o + 3] = 0.5
        if centres[k] is None and n_peaks > 1:   # remove this peak before looking for the next
            u = 2 * (s[None, :] - c0[:, None]) / w0[:, None]
            resid = resid - h0[:, None] / (1 + u * u)
    theta[:, -2], theta[:, -1] = offset, slope
    return theta


def fit_peaks(block, shift, lo: float, hi: float, *, shape: str = "lorentzian", n_peaks: int = 1,
              centres=None, weights: str = "auto", max_iter: int = 200, tol: float = 1e-7,
              engine: str = "auto", covariance: str = "auto"):
    """Fit ``n_peaks`` peaks plus a straight background in ``lo``-``hi`` cm⁻¹ to every spectrum.

    Parameters
    ----------
    block : array (n_spectra, n_shift)
    shift : array (n_shift,)
    shape : {"lorentzian", "gaussian", "pseudo_voigt"}
    centres : list of float, optional
        Starting centres (cm⁻¹), one per peak; by default the tallest residual maxima.
    weights : {"auto", "poisson", "uniform"}
        ``"poisson"`` fits by maximum likelihood for counts (Fisher scoring, weights 1/μ);
        ``"uniform"`` by least squares. ``"auto"`` picks Poisson when every value in the
        window is non-negative (raw counts) and least squares otherwise (e.g. after
        baseline subtraction).
    covariance : {"auto", "model", "sandwich"}
        How the standard errors are computed. ``"model"``: inverse information matrix
        times the reduced chi-square (right when the weights describe the noise, as for
        the Poisson fit of raw counts). ``"sandwich"``: the heteroscedasticity-consistent
        (White 1980; HC2 leverage correction) covariance, right for a least-squares fit whose channels carry
        unequal noise, such as shot noise left after baseline subtraction, where the
        model covariance reads too small (0.75 of the real scatter on the shot-noise map
        of tests/test_peakfit.py, which asserts < 0.8; the sandwich 0.99). ``"auto"``: model for Poisson fits,
        sandwich for least squares.

    Returns
    -------
    dict of arrays, one value per spectrum: ``theta`` (n, K) parameters, ``stderr`` (n, K),
    ``cov`` (n, K, K) their covariance, ``chi2_reduced``, ``r2``, ``status`` (int8, see
    :data:`STATUS_NAMES`: 0 converged, 1 iteration limit, 2 stalled, 3 centre outside the
    window, 4 singular information), ``converged`` (``status == 0``), ``n_iter``, plus
    ``names`` (K,) and ``covariance`` (the kind used).

    Examples
    --------
    >>> s = np.linspace(500, 540, 81)
    >>> y = 100 + 1000 / (1 + ((s - 520.3) / 2.0) ** 2)
    >>> fit = fit_peaks(y[None], s, 505, 535, weights="uniform")
    >>> round(float(fit["theta"][0, 1]), 3), bool(fit["converged"][0])
    (520.3, True)
    """
    if shape not in SHAPES:
        raise MapkitError(f"unknown peak shape {shape!r}", field="shape",
                          fix=f"use one of {', '.join(SHAPES)}")
    if n_peaks < 1 or (centres is not None and len(centres) != n_peaks):
        raise MapkitError("give one starting centre per peak", field="centres",
                          fix=f"list {n_peaks} centres or none")
    if weights not in ("poisson", "uniform", "auto"):
        raise MapkitError(f"unknown weighting {weights!r}", field="weights",
                          fix="use poisson, uniform or auto")
    idx = crop_indices(shift, lo, hi)
    if idx[-1] - idx[0] + 1 == idx.size:        # a run of channels: a view, not a copy
        idx = slice(int(idx[0]), int(idx[-1]) + 1)
    s = np.asarray(shift, float)[idx]
    y = np.atleast_2d(np.asarray(block, float))[:, idx]
    if s[0] > s[-1]:
        s, y = s[::-1], y[:, ::-1]
    if weights == "auto":  # shot-noise weights only make sense on raw, non-negative counts
        weights = "poisson" if np.nanmin(y) >= 0 else "uniform"
    per = len(PEAK_PARAMS[shape])
    K = per * n_peaks + 2
    if s.size <= K:
        raise MapkitError(f"{s.size} channels in {lo:g}-{hi:g} 1/cm cannot fit {K} parameters",
                          field="range", fix="widen the window or fit fewer peaks")
    mid = 0.5 * (s[0] + s[-1])
    step = float(np.median(np.diff(s)))
    P = y.shape[0]
    from ._peakfit_kernel import HAVE_NUMBA, SHAPE_CODES

    if engine == "numba" or (engine == "auto" and HAVE_NUMBA):
        from ._peakfit_kernel import initial, lm_fit

        y, s = np.ascontiguousarray(y), np.ascontiguousarray(s)
        given = [c is not None for c in (centres or [None] * n_peaks)]
        theta = np.zeros((P, K))
        initial(s, y, SHAPE_CODES[shape], n_peaks,
                np.array([c if g else 0.0 for c, g in zip(centres or [0.0] * n_peaks, given)],
                         float), np.array(given), mid, _start_step(s), theta)
        theta, cost, n_iter, status, A, ssr, ok, inv = lm_fit(
            y, s, theta, SHAPE_CODES[shape], n_peaks, mid, weights == "poisson", max_iter,
            tol, step, POISSON_FLOOR, RCOND)
        return _finish(theta, cost, n_iter, status, A, y, ssr, s, shape, n_peaks, per, K,
                       _covariance_kind(covariance, weights == "poisson"), mid,
                       inverse=(ok, inv))
    theta = _initial(s, y, shape, n_peaks, centres, mid)

    lam = np.full(P, 1e-3)
    active = np.ones(P, bool)
    stalled = np.zeros(P, bool)
    n_iter = np.zeros(P, int)

    poisson = weights == "poisson"

    def weights_for(mu):
        return 1.0 / np.maximum(mu, POISSON_FLOOR) if poisson else np.ones_like(mu)

    def objective(yy, mu):
        """Poisson deviance (maximum likelihood) or the sum of squares, per spectrum."""
        if not poisson:
            return np.sum((yy - mu) ** 2, axis=1)
        m_ = np.maximum(mu, POISSON_FLOOR)
        with np.errstate(divide="ignore", invalid="ignore"):
            term = np.where(yy > 0, yy * np.log(yy / m_), 0.0)
        return 2 * np.sum(m_ - yy + term, axis=1)

    def clamp(t):
        for k in range(n_peaks):
            o = k * per
            t[:, o + 2] = np.clip(t[:, o + 2], 0.25 * step, 4 * (s[-1] - s[0]))
            t[:, o + 1] = np.clip(t[:, o + 1], s[0] - 0.5 * (s[-1] - s[0]), s[-1] + 0.5 * (s[-1] - s[0]))
            if shape == "pseudo_voigt":
                t[:, o + 3] = np.clip(t[:, o + 3], 0.0, 1.0)
        return t

    mu, J = model_and_jacobian(theta, s, shape, n_peaks, mid)
    W = weights_for(mu)
    cost = objective(y, mu)
    for _ in range(max_iter):
        a = np.flatnonzero(active)
        if a.size == 0:
            break
        A, g = _normal_equations(J[a], W[a], y[a] - mu[a])
        diag = np.einsum("pkk->pk", A)
        A_damped = A + (lam[a][:, None] * np.maximum(diag, 1e-12))[:, :, None] * np.eye(K)
        _hold_bounds(A_damped, g, theta[a], shape, n_peaks, s[0], s[-1], step)
        n_iter[a] += 1
        delta, solved = _cholesky_solve(A_damped, g)
        # a step whose damped system is not positive definite is a rejected step, as in
        # the compiled kernel
        trial = clamp(theta[a] + np.where(solved[:, None], delta, 0.0))
        mu_t, J_t = model_and_jacobian(trial, s, shape, n_peaks, mid)
        W_t = weights_for(mu_t)
        cost_t = objective(y[a], mu_t)
        better = solved & np.isfinite(cost_t) & (cost_t <= cost[a])
        acc = a[better]
        rel = np.abs(cost[acc] - cost_t[better]) / np.maximum(cost[acc], 1e-300)
        theta[acc], mu[acc], J[acc], W[acc], cost[acc] = (trial[better], mu_t[better],
                                                          J_t[better], W_t[better], cost_t[better])
        lam[acc] = np.maximum(lam[acc] / 3.0, 1e-12)
        rej = a[~better]
        lam[rej] *= 4.0
        done = np.zeros(P, bool)
        done[acc[rel < tol]] = True
        stop = rej[lam[rej] > 1e12]
        done[stop] = True
        stalled[stop] = True
        active &= ~done
    A, g = _normal_equations(J, W, y - mu)
    _hold_bounds(A, g, theta, shape, n_peaks, s[0], s[-1], step)
    # damping that ran away after rejected steps is convergence only where the remaining
    # Gauss-Newton (Fisher-scoring) step would not lower the objective measurably
    stalled &= ~_at_optimum(A, g, objective(y, mu), np.sum(W * y * y, axis=1), tol)
    A = np.einsum("pnk,pn,pnl->pkl", J, W, J)
    ssr = np.sum((y - mu) ** 2, axis=1)
    cost = np.sum(W * (y - mu) ** 2, axis=1)      # Pearson chi-square at the optimum
    status = np.where(active, ITERATION_LIMIT, np.where(stalled, STALLED, CONVERGED))
    return _finish(theta, cost, n_iter, status, A, y, ssr, s, shape, n_peaks, per, K,
                   _covariance_kind(covariance, poisson), mid)


#: Poisson weights 1/max(μ, floor) and the deviance with max(μ, floor): one floor (counts)
#: in both engines, so the step and the objective it is judged by belong to the same fit.
#: A millionth of a count guards the logarithm and the weights without changing the
#: likelihood of any model that predicts counts (a floor of 1 made the deviance flat
#: where the background is below one count, and such fits stalled)
POISSON_FLOOR = 1e-6
#: fit states (the ``status`` entry and the map's ``fit_status`` field)
CONVERGED, ITERATION_LIMIT, STALLED, CENTRE_OUTSIDE, SINGULAR = 0, 1, 2, 3, 4
STATUS_NAMES = {CONVERGED: "converged", ITERATION_LIMIT: "iteration limit",
                STALLED: "stalled (damping limit away from an optimum)",
                CENTRE_OUTSIDE: "centre outside the window",
                SINGULAR: "information matrix not invertible"}


def _normal_equations(J, W, r):
    """A = JᵀWJ (P, K, K) and g = JᵀWr (P, K)."""
    JtW = (J * W[:, :, None]).transpose(0, 2, 1)
    return JtW @ J, (JtW @ r[:, :, None])[..., 0]


def _hold_bounds(A, g, theta, shape, n_peaks, s0, s1, step):
    """A parameter at a bound of the clamp that the step pushes against stays there (in
    place on A and g): η at 0 or 1, the FWHM at a quarter channel or four windows, the
    centre half a window outside. Without it a fit of a pixel holding no band (noise
    only) crept along the clamped width for tens of iterations."""
    per = len(PEAK_PARAMS[shape])
    span = s1 - s0
    for k in range(n_peaks):
        o = k * per
        for e in range(o + 1, o + per):
            lo, hi = ((s0 - 0.5 * span, s1 + 0.5 * span) if e == o + 1 else
                      (0.25 * step, 4 * span) if e == o + 2 else (0.0, 1.0))
            held = ((theta[:, e] >= hi) & (g[:, e] > 0)) | ((theta[:, e] <= lo) & (g[:, e] < 0))
            A[held, e, :] = 0.0
            A[held, :, e] = 0.0
            A[held, e, e] = 1.0
            g[held, e] = 0.0


def _cholesky_solve(A, g):
    """Solve A x = g for every pixel by Cholesky, in the compiled kernel's operation order.

    Returns (x, ok): ``ok`` is False where A is not positive definite (x is then 0).
    """
    P, K = g.shape
    L = np.zeros((P, K, K))
    ok = np.ones(P, bool)
    for i in range(K):
        for j in range(i + 1):
            v = A[:, i, j].copy()
            for k in range(j):
                v -= L[:, i, k] * L[:, j, k]
            if i == j:
                ok &= v > 0
                L[:, i, i] = np.sqrt(np.where(v > 0, v, 1.0))
            else:
                L[:, i, j] = v / L[:, j, j]
    x = np.zeros((P, K))
    for i in range(K):
        v = g[:, i].copy()
        for k in range(i):
            v -= L[:, i, k] * x[:, k]
        x[:, i] = v / L[:, i, i]
    for i in range(K - 1, -1, -1):
        v = x[:, i].copy()
        for k in range(i + 1, K):
            v -= L[:, k, i] * x[:, k]
        x[:, i] = v / L[:, i, i]
    return np.where(ok[:, None], x, 0.0), ok


def _at_optimum(A, g, cost, scale, tol):
    """True where the predicted decrease gᵀA⁻¹g of a full Gauss-Newton step is below
    ``tol`` of the objective (or of 1e-14 Σwy², for fits that are exact to rounding)."""
    x, ok = _cholesky_solve(A, g)
    pred = np.einsum("pk,pk->p", g, x)
    return ok & (pred <= tol * np.maximum(cost, 1e-14 * scale))


def _covariance_kind(covariance, poisson):
    if covariance not in ("auto", "model", "sandwich"):
        raise MapkitError(f"unknown covariance {covariance!r}", field="covariance",
                          fix="use auto, model or sandwich")
    if covariance == "auto":
        return "model" if poisson else "sandwich"
    return covariance


#: smallest pivot of the unit-diagonal information matrix that counts as invertible
RCOND = 1e-12


def _information_inverse(A, rcond=RCOND):
    """Inverse of every information matrix A (P, K, K) and where it exists (P,).

    A is scaled to unit diagonal and factorised by Cholesky; it counts as invertible
    where every pivot of the scaled matrix exceeds ``rcond`` (a nearly singular matrix
    has pivots at rounding level, of either sign, which no threshold on a determinant
    tells apart alike in the two engines). The inverse comes from the factor (about 15
    vectorised operations per entry, in place of ``numpy.linalg`` calls on P small
    matrices).
    """
    P, K, _ = A.shape
    d = np.sqrt(np.abs(np.einsum("pkk->pk", A)))
    ok = np.isfinite(A).all(axis=(1, 2)) & (d > 0).all(axis=1)
    d = np.where(ok[:, None], d, 1.0)
    C = np.where(ok[:, None, None], A, np.eye(K)) / (d[:, :, None] * d[:, None, :])
    L = np.zeros((P, K, K))
    for i in range(K):
        for j in range(i + 1):
            v = C[:, i, j] - np.einsum("pk,pk->p", L[:, i, :j], L[:, j, :j])
            if i == j:
                ok &= v > rcond
                L[:, i, i] = np.sqrt(np.where(v > rcond, v, 1.0))
            else:
                L[:, i, j] = v / L[:, j, j]
    Linv = np.zeros((P, K, K))
    for i in range(K):
        Linv[:, i, i] = 1.0 / L[:, i, i]
        for j in range(i):
            Linv[:, i, j] = -np.einsum("pk,pk->p", L[:, i, j:i], Linv[:, j:i, j]) / L[:, i, i]
    inv = np.einsum("pki,pkj->pij", Linv, Linv) / (d[:, :, None] * d[:, None, :])
    return ok, inv


def _finish(theta, cost, n_iter, status, A, y, ssr, s, shape, n_peaks, per, K,
            covariance="model", mid=None, inverse=None):
    """Standard errors, fit quality and fit states from the final state; ``inverse``:
    (ok, inverse) of the information matrices when the kernel computed them."""
    P = theta.shape[0]
    N = s.size
    dof = N - K
    chi2 = cost / dof
    cov = np.full((P, K, K), np.nan)
    ok, inv_all = _information_inverse(A) if inverse is None else inverse
    inv = inv_all[ok]
    if covariance == "sandwich":
        # least squares on data whose noise differs from channel to channel (shot noise
        # after a baseline was subtracted): the heteroscedasticity-consistent covariance
        # A⁻¹ (Σᵢ rᵢ²/(1 − hᵢᵢ) JᵢJᵢᵀ) A⁻¹ with the leverages hᵢᵢ = Jᵢᵀ A⁻¹ Jᵢ (White 1980,
        # Econometrica 48:817; the leverage correction is HC2 of MacKinnon & White 1985,
        # J. Econometrics 29:305, unbiased when the noise happens to be equal)
        mu, J = model_and_jacobian(theta[ok], s, shape, n_peaks, mid)
        lev = np.clip(np.einsum("pnk,pkl,pnl->pn", J, inv, J), 0.0, 1.0 - 1e-9)
        meat = np.einsum("pnk,pn,pnl->pkl", J, (y[ok] - mu) ** 2 / (1.0 - lev), J)
        cov[ok] = inv @ meat @ inv
    else:
        # inverse information scaled by the reduced chi-square
        cov[ok] = inv * chi2[ok, None, None]
    stderr = np.sqrt(np.clip(np.einsum("pkk->pk", cov), 0, None))
    ss_tot = np.sum((y - y.mean(axis=1, keepdims=True)) ** 2, axis=1)
    r2 = 1 - ssr / np.maximum(ss_tot, 1e-300)
    inside = np.ones(P, bool)
    for k in range(n_peaks):
        inside &= (theta[:, k * per + 1] >= s[0]) & (theta[:, k * per + 1] <= s[-1])
    status = np.asarray(status, np.int8).copy()
    status[(status == CONVERGED) & ~inside] = CENTRE_OUTSIDE
    status[(status == CONVERGED) & ~ok] = SINGULAR
    names = [f"{p}_{k + 1}" if n_peaks > 1 else p for k in range(n_peaks)
             for p in PEAK_PARAMS[shape]] + ["background", "background_slope"]
    return {"theta": theta, "stderr": stderr, "cov": cov, "chi2_reduced": chi2, "r2": r2,
            "converged": status == CONVERGED, "status": status, "n_iter": n_iter,
            "covariance": covariance, "names": names}


#: bits of the peak-fit ``valid`` map's complement, the ``rejected`` bit field
NOT_CONVERGED, NO_BAND, LEFT_WINDOW = 1, 2, 4
REJECT_MEANING = {NOT_CONVERGED: "fit not converged", NO_BAND: "band not significant",
                  LEFT_WINDOW: "centre outside the window"}


def reject_fits(fit, lo: float, hi: float, shape: str, n_peaks: int,
                min_significance: float = 3.0):
    """Bit field (n,) of the reasons a pixel's fit is not to be reported (0 = keep).

    ``NOT_CONVERGED`` (1): the fit's own flag; ``NO_BAND`` (2): some peak's height is not
    above ``min_significance`` standard errors (or its error is undefined), so the pixel
    holds no band to measure; ``LEFT_WINDOW`` (4): some centre lies outside ``lo``-``hi``.
    Such pixels keep centres far from the band (a fit chasing noise), which would set a
    figure's colour scale and the medians.

    Examples
    --------
    >>> fit = {"theta": np.array([[50., 520., 4., 1., 0.], [2., 600., 4., 1., 0.]]),
    ...        "stderr": np.array([[5., .1, .2, .1, .1], [3., 9., 9., 9., 9.]]),
    ...        "converged": np.array([True, True])}
    >>> reject_fits(fit, 500, 540, "lorentzian", 1).tolist()
    [0, 6]
    """
    per = len(PEAK_PARAMS[shape])
    theta, err = np.asarray(fit["theta"]), np.asarray(fit["stderr"])
    out = np.where(np.asarray(fit["converged"], bool), 0, NOT_CONVERGED).astype(np.uint8)
    lo, hi = sorted((lo, hi))
    for k in range(n_peaks):
        h, eh, c = theta[:, k * per], err[:, k * per], theta[:, k * per + 1]
        with np.errstate(invalid="ignore", divide="ignore"):
            weak = ~(np.isfinite(eh) & (h > min_significance * eh))
        out[weak] |= NO_BAND
        out[~((c >= lo) & (c <= hi))] |= LEFT_WINDOW
    return out


def peak_fit_map(m: RamanMap, lo: float, hi: float, *, shape: str = "lorentzian",
                 n_peaks: int = 1, centres=None, weights: str = "auto",
                 name: str = "peakfit", block: int = 4096, covariance: str = "auto",
                 min_significance: float = 3.0) -> Result:
    """Maps of centre, FWHM, height and area (with standard errors) and the fit quality.

    Fields: for each peak ``centre``, ``fwhm``, ``height``, ``area`` (signal with
    ``*_errors``), and ``chi2_reduced``, ``r2``, ``converged`` (0/1 quality mask:
    a pixel whose fit did not converge, or whose centre left the window, reads 0) and
    ``fit_status`` (why: the codes of :data:`STATUS_NAMES`). ``covariance`` as in
    :func:`fit_peaks`.
    Pixels without a significant band (height ≤ ``min_significance`` standard errors),
    with a centre outside the window or without convergence are NaN in the peak maps
    and their errors (see :func:`reject_fits`); ``rejected`` records why (bit field:
    1 not converged, 2 band not significant, 4 centre outside the window) and the
    summary counts them, so medians and colour scales describe real bands only.
    """
    spatial = m.shape[:-1]
    # only the fit window is read: on a lazy map, chunk by chunk, so a cube larger than
    # memory is fitted with the window's channels alone in memory
    idx = crop_indices(m.raman_shift, lo, hi)
    sel = slice(int(idx[0]), int(idx[-1]) + 1)
    window = m.intensity[..., sel]
    window = window.compute() if m.is_lazy else window
    shift = m.raman_shift[sel]
    flat = np.asarray(window, np.float32).reshape(-1, shift.size)
    good = np.flatnonzero(~m.mask.ravel())
    if good.size == 0:
        raise MapkitError("every pixel is masked; nothing to fit", file=m.source, field="mask",
                          fix="check the map's bad-pixel mask")
    every = good.size == flat.shape[0]          # nothing masked: blocks are views
    parts = [fit_peaks(flat[i:i + block] if every else flat[good[i:i + block]], shift, lo, hi,
                       shape=shape, n_peaks=n_peaks, centres=centres, weights=weights,
                       covariance=covariance)
             for i in range(0, good.size, block)]
    fit = {k: (np.concatenate([p[k] for p in parts]) if k not in ("names", "covariance")
               else parts[0][k]) for k in parts[0]}
    per = len(PEAK_PARAMS[shape])

    def image(values, fill=np.nan):
        out = np.full(m.n_pixels, fill, dtype=float)
        out[good] = values
        return out.reshape(spatial)

    axes = image_axes(m)
    fields = {}
    rejected = reject_fits(fit, lo, hi, shape, n_peaks, min_significance)
    keep = rejected == 0
    for k in range(n_peaks):
        o = k * per
        tag = f"_{k + 1}" if n_peaks > 1 else ""
        h, c, w = fit["theta"][:, o], fit["theta"][:, o + 1], fit["theta"][:, o + 2]
        eh, ec, ew = fit["stderr"][:, o], fit["stderr"][:, o + 1], fit["stderr"][:, o + 2]
        eta = fit["theta"][:, o + 3] if shape == "pseudo_voigt" else None
        area = peak_area(shape, h, w, eta)
        # area error by the delta method on (h, w[, eta]) with their covariance
        grad = np.zeros((h.size, fit["theta"].shape[1]))
        grad[:, o] = area / np.where(h == 0, 1, h)
        grad[:, o + 2] = area / np.where(w == 0, 1, w)
        if shape == "pseudo_voigt":
            grad[:, o + 3] = peak_area("lorentzian", h, w) - peak_area("gaussian", h, w)
        var = np.einsum("pk,pkl,pl->p", grad, fit["cov"], grad)
        earea = np.sqrt(np.clip(var, 0, None))
        for key, val, err, units in (("centre", c, ec, "1/cm"), ("fwhm", w, ew, "1/cm"),
                                     ("height", h, eh, "counts"),
                                     ("area", area, earea, "counts*1/cm")):
            fields[f"{key}{tag}"] = Field(key, image(np.where(keep, val, np.nan)), axes,
                                          units, errors=image(np.where(keep, err, np.nan)),
                                          long_name=f"peak {key}{tag} ({shape})")
        if shape == "pseudo_voigt":
            fields[f"eta{tag}"] = Field("eta", image(np.where(keep, eta, np.nan)), axes, "",
                                        long_name="Lorentzian fraction")
    fields["chi2_reduced"] = Field("chi2_reduced", image(fit["chi2_reduced"]), axes, "",
                                   long_name="reduced chi-square")
    fields["r2"] = Field("r2", image(fit["r2"]), axes, "", long_name="coefficient of determination")
    conv = image(fit["converged"].astype(float), fill=0).astype(np.uint8)
    fields["converged"] = Field("converged", conv, axes, "", long_name="1 = fit converged")
    state = image(fit["status"].astype(float), fill=255).astype(np.uint8)
    fields["fit_status"] = Field("fit_status", state, axes, "", long_name="; ".join(
        f"{k} = {v}" for k, v in STATUS_NAMES.items()) + "; 255 = masked")
    fields["rejected"] = Field("rejected", image(rejected, fill=0).astype(np.uint8), axes, "",
                               long_name="why a pixel is not reported (bits)")
    summary = {"pixels": int(good.size), "not_converged": int((~fit["converged"]).sum()),
               **{key: int((fit["status"] == k).sum()) for k, key in
                  ((ITERATION_LIMIT, "iteration_limit"), (STALLED, "stalled"),
                   (CENTRE_OUTSIDE, "centre_outside"), (SINGULAR, "singular"))},
               "median_iterations": float(np.median(fit["n_iter"])),
               "covariance": fit["covariance"],
               "reported": int(keep.sum()),
               "no_band": int(((rejected & NO_BAND) > 0).sum()),
               "left_window": int(((rejected & LEFT_WINDOW) > 0).sum()),
               "min_significance": float(min_significance)}
    return Result(name, f"peak_fit_{shape}", {"lo": lo, "hi": hi, "shape": shape,
                                               "n_peaks": n_peaks, "centres": centres,
                                               "weights": weights,
                                               "covariance": fit["covariance"],
                                               "min_significance": min_significance},
                  fields, summary)


#: Raman shift of the silicon phonon per unit stress, cm⁻¹/GPa: uniaxial ≈ −2.3 (σ =
#: −434 MPa·Δω), equibiaxial ≈ −4.6 (σ = −217 MPa·Δω); tensile stress shifts the band
#: down. De Wolf 1996, Semicond. Sci. Technol. 11:139 (coefficients from memory).
SILICON_SHIFT_PER_GPA = {"uniaxial": -2.3, "biaxial": -4.6}


def silicon_stress(centre, *, reference: float = 520.7, mode: str = "uniaxial"):
    """Stress in GPa from the silicon band centre (cm⁻¹); tensile positive.

    ``reference`` is the unstrained position measured on the same instrument (520.7 is
    the usual lab value; Itoh & Shirono 2020 give 520.45 ± 0.28 cm⁻¹).

    Examples
    --------
    >>> round(float(silicon_stress(520.7 - 2.3)), 6)
    1.0
    """
    if mode not in SILICON_SHIFT_PER_GPA:
        raise MapkitError(f"unknown stress mode {mode!r}", field="mode",
                          fix="use uniaxial or biaxial")
    return (np.asarray(centre, float) - reference) / SILICON_SHIFT_PER_GPA[mode]


def stress_result(fit: Result, *, reference: float = 520.7, mode: str = "uniaxial",
                  name: str = "silicon_stress") -> Result:
    """Stress map (GPa, with uncertainty) from a peak-fit result of the silicon band."""
    c = fit.fields["centre"]
    k = abs(SILICON_SHIFT_PER_GPA[mode])
    stress = silicon_stress(c.data, reference=reference, mode=mode)
    err = None if c.errors is None else c.errors / k
    return Result(name, "silicon_stress", {"reference": reference, "mode": mode,
                                           "shift_per_GPa": SILICON_SHIFT_PER_GPA[mode],
                                           "source": "De Wolf 1996, Semicond. Sci. Technol. "
                                                     "11:139 (from memory)"},
                  {"stress": Field("stress", stress, c.axes, "GPa", errors=err,
                                   long_name=f"{mode} stress (tensile positive)")})
