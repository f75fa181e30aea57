"""Least-squares unmixing of every pixel against known reference spectra."""

from __future__ import annotations

import warnings

import numpy as np
from sklearn.base import BaseEstimator, TransformerMixin
from sklearn.utils.validation import check_is_fitted

from ..core.ramanmap import RamanMap
from ..core.result import Axis, Field, Result
from ..errors import DataError, MapkitError
from ._common import float64_tags, good_spectra, image_axes, rows_out, shift_axis, spectra_in, \
    to_images


def nnls_batch(A, Y, *, max_sweeps: int = 2000, tol: float = 1e-10,
               return_converged: bool = False):
    """Non-negative least squares min ‖A x − y‖, x ≥ 0, for many right-hand sides at once.

    Sequential coordinate descent on the normal equations (Franc, Hlaváč &
    Navara 2005), vectorised across the columns of ``Y``: with few
    references (k ≲ 20) one Gram matrix serves every pixel, which is much
    faster than one :func:`scipy.optimize.nnls` call per pixel and reaches
    the same optimum (the problem is convex).

    Parameters
    ----------
    A : array (n, k)
    Y : array (n, m)
    return_converged : bool
        Also return, per column, whether the sweeps met ``tol`` before ``max_sweeps``.

    Returns
    -------
    X : array (k, m)
    converged : bool array (m,), only with ``return_converged``
        False where the loop stopped at its sweep limit without meeting ``tol``.

    Examples
    --------
    >>> A = np.array([[1., 0.], [0., 1.], [1., 1.]])
    >>> nnls_batch(A, np.array([[1.], [-1.], [0.]])).round(6).ravel().tolist()
    [0.5, 0.0]
    """
    A = np.asarray(A, float)
    Y = np.asarray(Y, float)
    return nnls_gram(A.T @ A, A.T @ Y, max_sweeps=max_sweeps, tol=tol,
                     return_converged=return_converged)


def nnls_gram(G, H, *, max_sweeps: int = 2000, tol: float = 1e-10,
              return_converged: bool = False):
    """The coordinate descent of :func:`nnls_batch` on normal equations: ``G`` (k, k) shared
    by every column of ``H`` (k, m), or one Gram matrix per column, ``G`` (m, k, k) (a
    weighted fit, whose weights differ from pixel to pixel)."""
    G = np.asarray(G, float)
    H = np.asarray(H, float)
    per_column = G.ndim == 3
    k, m = H.shape
    diag = np.einsum("mkk->km", G) if per_column else np.diag(G)[:, None]
    if np.any(diag <= 0):
        raise DataError("a reference spectrum is zero over the map's range", field="references",
                        fix="check that every reference covers the map's shift axis")
    X = np.zeros((k, m))
    scale = np.maximum(np.abs(H).max(axis=0), 1e-300)
    converged = np.zeros(m, bool)
    for _ in range(max_sweeps):
        change = np.zeros(m)
        for j in range(k):
            grad = H[j] - (np.einsum("mk,km->m", G[:, j, :], X) if per_column else G[j] @ X)
            new = np.maximum(0.0, X[j] + grad / diag[j])
            change = np.maximum(change, np.abs(new - X[j]) * diag[j])
            X[j] = new
        converged = change <= tol * scale
        if np.all(converged):
            break
    return (X, converged) if return_converged else X


def _project_simplex(V):
    """Euclidean projection of each column of V onto the probability simplex
    (Duchi, Shalev-Shwartz, Singer & Chandra 2008, ICML, algorithm 1)."""
    k = V.shape[0]
    U = -np.sort(-V, axis=0)
    css = np.cumsum(U, axis=0) - 1.0
    idx = np.arange(1, k + 1)[:, None]
    cond = U - css / idx > 0
    rho = k - 1 - np.argmax(cond[::-1], axis=0)
    theta = css[rho, np.arange(V.shape[1])] / (rho + 1)
    return np.maximum(V - theta, 0.0)


def simplex_ls_batch(A, Y, *, max_iter: int = 5000, tol: float = 1e-12,
                     return_converged: bool = False):
    """min ‖A x − y‖ with x ≥ 0 and Σx = 1, for every column of ``Y`` (FISTA on the Gram form).

    Accelerated projected gradient (Beck & Teboulle 2009) with the simplex projection of
    Duchi et al. 2008; the problem is convex, so it converges to the same optimum as any
    constrained solver (tests compare with scipy's SLSQP). With ``return_converged`` it
    also returns a bool per column: False where the last step still moved the abundances
    by more than ``tol`` when ``max_iter`` was reached.
    """
    A = np.asarray(A, float)
    Y = np.asarray(Y, float)
    G = A.T @ A
    H = A.T @ Y
    step = 1.0 / max(np.linalg.eigvalsh(G).max(), 1e-300)
    k, m = G.shape[0], Y.shape[1]
    X = np.full((k, m), 1.0 / k)
    Z, t = X.copy(), 1.0
    converged = np.zeros(m, bool)
    for _ in range(max_iter):
        X_new = _project_simplex(Z - step * (G @ Z - H))
        t_new = 0.5 * (1 + np.sqrt(1 + 4 * t * t))
        Z = X_new + ((t - 1) / t_new) * (X_new - X)
        converged = np.max(np.abs(X_new - X), axis=0) <= tol
        X, t = X_new, t_new
        if np.all(converged):
            break
    return (X, converged) if return_converged else X


def unmix_spectra(R, X, shift, baseline_order: int | None = None, *, sum_to_one: bool = False,
                  tol: float = 1e-10, return_converged: bool = False, residual: bool = True):
    """Non-negative abundances of the rows of ``R`` (k, n) in each spectrum of ``X`` (m, n).

    Polynomial baseline terms of ``baseline_order`` (None: none) are fitted jointly and
    without sign constraint, by projecting data and references onto the orthogonal
    complement of the polynomials. ``sum_to_one`` adds the fully constrained
    least-squares condition Σa = 1 (FCLS, Heinz & Chang 2001, IEEE TGRS 39:529), solved
    exactly on the simplex with the scale fixed at 1: right only when spectra and
    references share one intensity scale (e.g. both area-normalised); for counts use
    ``ReferenceUnmixing(method="fcls")``, which fits the scale. ``tol`` is the NNLS stopping
    tolerance (relative; 1e-6 is about 3x faster and changes abundances by ~1e-8 relative,
    measured on the bundled sample map). Returns (abundances (k, m), residual RMS (m,)),
    and with ``return_converged`` also a flag per spectrum: False where the solver stopped
    at its iteration limit. ``residual=False``: the residual RMS is not computed (None in
    its place), and the projected spectra are not formed.
    """
    R = np.asarray(R, float)
    X = np.asarray(X, float)
    # spectra stay as rows (m, n) throughout: products with the transposed cube cost
    # several times more than the same products row-major
    if baseline_order is None:
        Rp, Xp = R.T, X
    else:
        Q = polynomial_basis(shift, baseline_order)
        Rp = R.T - Q @ (Q.T @ R.T)
        if residual:
            Xp = (X @ Q) @ Q.T
            np.subtract(X, Xp, out=Xp)   # X - (X Q) Qᵀ (one (m, n) array, not two)
        else:   # the projected references are orthogonal to the polynomials: R_p'X_p = R_p'X
            Xp = X
    if sum_to_one:
        A, converged = simplex_ls_batch(Rp, Xp.T, return_converged=True)
    else:
        A, converged = nnls_gram(Rp.T @ Rp, np.ascontiguousarray((Xp @ Rp).T), tol=tol,
                                 return_converged=True)
    if not residual:
        return (A, None, converged) if return_converged else (A, None)
    r = A.T @ Rp.T
    rms = np.sqrt(np.mean(np.square(np.subtract(Xp, r, out=r), out=r), axis=1))
    return (A, rms, converged) if return_converged else (A, rms)


#: Spectra per block of the weighted fit (its projections are per pixel: n x terms each).
WEIGHTED_BLOCK = 1024


def unmix_spectra_poisson(R, X, shift, baseline_order: int | None = None, *,
                          tol: float = 1e-10):
    """:func:`unmix_spectra` weighted for shot noise: each channel by 1/variance, the
    variance taken as the unweighted fit's counts (at least 1 count²).

    Weighted least squares with the variance of Poisson counts (iteratively reweighted
    least squares, one reweighting: McCullagh & Nelder 1989, Generalized Linear Models,
    ch. 2), so channels under strong fluorescence, which carry more shot noise, count
    less. The polynomial terms stay free; they are eliminated per pixel by projecting onto
    the weighted complement of the polynomials. Assumes the spectra are in counts (for
    scaled data the weights reduce to equal ones where every value is below 1). Returns
    (abundances (k, m), residual RMS in counts (m,), converged flags (m,)).

    Examples
    --------
    >>> s = np.linspace(0, 1, 200)
    >>> R = np.stack([np.exp(-0.5 * ((s - c) / 0.02) ** 2) for c in (0.3, 0.6)]) * 50
    >>> rng = np.random.default_rng(0)
    >>> X = rng.poisson([2.0, 1.0] @ R + 400 + 300 * s, (30, 200)).astype(float)
    >>> A, rms, ok = unmix_spectra_poisson(R, X, s, 1)
    >>> bool(np.all(np.abs(A.mean(axis=1) - [2.0, 1.0]) < 0.1)), bool(ok.all())
    (True, True)
    """
    R = np.asarray(R, float)
    X = np.asarray(X, float)
    n = X.shape[1]
    Q = (np.zeros((n, 0)) if baseline_order is None
         else polynomial_basis(shift, baseline_order))
    # the unweighted fit of :func:`unmix_spectra` (its abundances only): the projected
    # references are orthogonal to the polynomials, so R_p'X_p = R_p'X without projecting X
    Rp = R.T - Q @ (Q.T @ R.T)
    A0 = nnls_gram(Rp.T @ Rp, np.ascontiguousarray((X @ Rp).T), tol=1e-6)
    k, p = R.shape[0], Q.shape[1]
    # the per-pixel weighted sums R'WR, R'WQ, Q'WQ as one product of the weights with the
    # channel-wise products of the basis vectors: the normal equations
    # of the weighted fit, with the polynomials eliminated by their Schur complement
    B = np.concatenate([R.T, Q], axis=1)                                # (n, k + p)
    # (each sum once: the matrices are symmetric, so only their upper triangles)
    iu = np.triu_indices(k + p)
    BB = np.ascontiguousarray(B[:, iu[0]] * B[:, iu[1]])                # (n, (k+p)(k+p+1)/2)
    A = np.zeros((k, X.shape[0]))
    rms = np.zeros(X.shape[0])
    converged = np.zeros(X.shape[0], bool)
    # the same products as written out plainly, into three scratch arrays reused by every
    # block instead of about ten fresh (b, n) arrays (with the upper triangles: 0.24-0.33
    # against 0.33-0.44 CPU s per 16 000 spectra, 1 thread, 2026-12-02, benchmarks/RESULTS.md)
    A0t = np.ascontiguousarray(A0.T)                                   # (m, k)
    Qt = np.ascontiguousarray(Q.T)
    b0 = min(WEIGHTED_BLOCK, X.shape[0])
    raman_, w_, t_ = (np.empty((b0, n)) for _ in range(3))
    for start in range(0, X.shape[0], WEIGHTED_BLOCK):
        sl = slice(start, start + WEIGHTED_BLOCK)
        Xb = X[sl]
        b = Xb.shape[0]
        raman, w, t = raman_[:b], w_[:b], t_[:b]
        np.matmul(A0t[sl], R, out=raman)
        np.subtract(Xb, raman, out=t)
        np.matmul(t @ Q, Qt, out=w)
        np.add(raman, w, out=w)                                         # mu
        np.maximum(w, 1.0, out=w)
        np.divide(1.0, w, out=w)                                        # (b, n)
        M = np.empty((b, k + p, k + p))                                 # B'WB per pixel
        M[:, iu[0], iu[1]] = M[:, iu[1], iu[0]] = w @ BB
        h = np.multiply(w, Xb, out=t) @ B                               # B'WX (b, k + p)
        G, H = M[:, :k, :k], h[:, :k]
        if p:
            T = np.linalg.solve(M[:, k:, k:], np.concatenate(
                [M[:, k:, :k], h[:, k:, None]], axis=2))                # (Q'WQ)⁻¹[Q'WR, Q'WX]
            G = G - M[:, :k, k:] @ T[:, :, :k]
            H = H - (M[:, :k, k:] @ T[:, :, k:])[:, :, 0]
        Ab, ok = nnls_gram(G, H.T, tol=tol, return_converged=True)
        A[:, sl], converged[sl] = Ab, ok
        r = np.subtract(Xb, np.matmul(np.ascontiguousarray(Ab.T), R, out=raman), out=raman)
        if p:                                                           # residual before the
            c = np.linalg.solve(M[:, k:, k:],                           # weighted baseline
                                (np.multiply(w, r, out=t) @ Q)[:, :, None])[:, :, 0]
            r = np.subtract(r, np.matmul(c, Qt, out=t), out=r)
        rms[sl] = np.sqrt(np.mean(np.square(r, out=t), axis=1))
    return A, rms, converged


def unmixing_statistics(result) -> dict:
    """What an unmixing result says in numbers, over its fitted pixels: per reference the
    mean, median and 95th percentile of the abundance and the percentage of pixels where it
    is above 0 (with noise, NNLS leaves small positive values where a reference is absent); the median residual RMS (counts) and the pixels fitted. For the
    summary of a whole map (after the blocks are joined) and the report alike.

    Examples
    --------
    >>> from mapkit.core.result import Axis, Field, Result
    >>> ax = (Axis("component", np.array(["a"])), Axis("y", np.arange(1.)),
    ...       Axis("x", np.arange(4.)))
    >>> r = Result("unmixing", "nnls_unmixing", {}, {
    ...     "abundance": Field("abundance", np.array([[[0.0, 1.0, 3.0, np.nan]]]), ax),
    ...     "residual": Field("residual_rms", np.array([[2.0, 4.0, 6.0, np.nan]]), ax[1:])})
    >>> s = unmixing_statistics(r)
    >>> a = s["references"]["a"]
    >>> a["median"], round(a["positive_pct"], 1), s["residual_rms_median"]
    (1.0, 66.7, 4.0)
    """
    data = np.asarray(result.fields["abundance"].data, float)
    names = [str(n) for n in result.fields["abundance"].axes[0].values]
    good = np.all(np.isfinite(data), axis=0)
    refs = {}
    for k, name in enumerate(names):
        v = data[k][good]
        refs[name] = ({"mean": float(v.mean()), "median": float(np.median(v)),
                       "p95": float(np.percentile(v, 95)),
                       "positive_pct": 100.0 * float((v > 0).mean())} if v.size else
                      {"mean": None, "median": None, "p95": None, "positive_pct": None})
    rms = np.asarray(result.fields["residual"].data, float)
    rms = rms[np.isfinite(rms)]
    return {"pixels_fitted": int(good.sum()), "references": refs,
            "residual_rms_median": float(np.median(rms)) if rms.size else None}


def check_baseline_order(order):
    """A polynomial baseline order as the fits take it: None, "auto" or a whole number ≥ 0."""
    if order is None or order == "auto":
        return order
    if isinstance(order, (int, np.integer)) and not isinstance(order, bool) and order >= 0:
        return int(order)
    raise MapkitError(f"baseline order {order!r} is not auto, none or a whole number >= 0",
                      field="baseline_order", fix="give an order such as 5, none or auto")


def baseline_terms(order) -> int:
    """Polynomial terms an order adds to a fit (at least one for "auto")."""
    order = check_baseline_order(order)
    return 0 if order is None else 1 if order == "auto" else order + 1


#: Largest polynomial baseline order the automatic choice considers.
MAX_AUTO_ORDER = 16


def choose_baseline_order(R, X, shift, *, max_order: int = MAX_AUTO_ORDER, sample: int = 1000,
                          random_state: int = 0) -> int:
    """Polynomial baseline order for unmixing, chosen by the data.

    Each order 0..``max_order`` is fitted jointly with the references ``R`` (k, n) to a
    random sample of at most ``sample`` spectra of ``X`` (m, n); the order with the lowest
    Bayesian information criterion (Schwarz 1978, Ann. Stat. 6:461), summed over the
    spectra, wins: BIC = n ln(RSS/n) + (k + order + 1) ln n per spectrum. Too few terms
    leave fluorescence in the residual; too many start to absorb the wings of broad bands
    and inflate the abundance variance, which the penalty weighs against.

    Examples
    --------
    >>> s = np.linspace(0, 1, 300)
    >>> R = np.exp(-0.5 * ((s - 0.5) / 0.01) ** 2)[None]
    >>> rng = np.random.default_rng(0)
    >>> bg = np.polynomial.legendre.legval(2 * s - 1, [5, 2, -3, 1])   # a cubic
    >>> X = rng.uniform(1, 2, (50, 1)) * R + bg + rng.normal(0, 0.05, (50, 300))
    >>> choose_baseline_order(R, X, s)
    3
    """
    R = np.asarray(R, float)
    X = np.asarray(X, float)
    n = X.shape[1]
    # keep at least four channels per fitted term
    max_order = int(max(0, min(max_order, n // 4 - R.shape[0] - 1)))
    rng = np.random.default_rng(random_state)
    if X.shape[0] > sample:
        X = X[np.sort(rng.choice(X.shape[0], sample, replace=False))]
    best, best_bic = 0, np.inf
    for order in range(max_order + 1):
        _, rms = unmix_spectra(R, X, shift, order, tol=1e-6)
        rss = np.maximum(rms ** 2 * n, 1e-300)
        bic = float(np.sum(n * np.log(rss / n)) + X.shape[0] * (R.shape[0] + order + 1)
                    * np.log(n))
        if bic < best_bic:
            best, best_bic = order, bic
    return best


def polynomial_basis(shift, order: int) -> np.ndarray:
    """Orthonormal basis (n, order+1) of polynomials on the shift axis (Legendre, QR'd)."""
    s = np.asarray(shift, float)
    t = 2 * (s - s.min()) / max(np.ptp(s), 1e-12) - 1
    V = np.polynomial.legendre.legvander(t, order)
    q, _ = np.linalg.qr(V)
    return q


#: |r| above which two references (after the baseline projection) are reported as collinear
COLLINEAR_R = 0.98


def collinear_pairs(R, shift, baseline_order: int | None, threshold: float = COLLINEAR_R):
    """Pairs of rows of ``R`` whose correlation after the baseline projection exceeds
    ``threshold`` in absolute value: ``[(i, j, r), ...]``.

    The baseline terms of the unmixing (polynomials up to ``baseline_order``, or just a
    constant when None) are projected out first, so two references that differ only by
    an offset or a slope count as the same spectrum, as they do for the fit.

    Examples
    --------
    >>> s = np.linspace(0, 1, 50)
    >>> R = np.stack([np.exp(-(s - .3) ** 2 / .01), 2 * np.exp(-(s - .3) ** 2 / .01) + s,
    ...               np.exp(-(s - .7) ** 2 / .01)])
    >>> [(i, j, round(r, 6)) for i, j, r in collinear_pairs(R, s, 1)]
    [(0, 1, 1.0)]
    """
    Q = polynomial_basis(shift, 0 if baseline_order is None else baseline_order)
    P = np.asarray(R, float).T
    P = P - Q @ (Q.T @ P)
    norm = np.linalg.norm(P, axis=0)
    C = (P.T @ P) / np.maximum(np.outer(norm, norm), 1e-300)
    k = C.shape[0]
    return [(i, j, float(C[i, j])) for i in range(k) for j in range(i + 1, k)
            if abs(C[i, j]) > threshold]


class ReferenceUnmixing(TransformerMixin, BaseEstimator):
    """Abundances of known reference spectra in every pixel, with an optional polynomial baseline.

    The model is y = Σ aᵢ rᵢ + Σ cⱼ pⱼ with aᵢ ≥ 0 (non-negative least
    squares, Lawson & Hanson 1974) and free polynomial terms pⱼ of order
    ``baseline_order``, so fluorescence is fitted jointly with the references
    instead of being subtracted first. The polynomial part is eliminated
    exactly by projecting data and references onto its orthogonal complement.
    Fit it on spectra that still carry their background (despiked counts): a baseline
    removed beforehand eats the wings of broad bands, and the joint fit then has nothing
    left to correct (measured on the scene family: benchmarks/RESULTS.md).

    With ``method="fcls"`` the abundances are shares that sum to one (fully constrained
    least squares, Heinz & Chang 2001) times a free scale per pixel,
    y = s Σ aᵢ rᵢ + baseline with aᵢ ≥ 0, Σaᵢ = 1, s ≥ 0. Raw counts and references on
    any intensity scale then give the right shares: the classical FCLS with s fixed at 1
    is only right when spectra and references share one scale, and on counts it forced
    the shares far off. Since every non-negative vector is a scale times a point of the
    simplex, the optimum is the NNLS solution z with a = z / Σz and s = Σz (exact, not
    an approximation); ``scale`` is written as its own image. The shares are in units of
    the references as given (a reference scaled ×2 halves its share).

    References that are (nearly) collinear after the baseline projection cannot be told
    apart: ``fit`` warns with each pair whose correlation exceeds ``COLLINEAR_R`` (0.98).

    ``fit`` and ``transform`` take a :class:`RamanMap` or spectra as rows
    (n_spectra, n_shift). For rows the shift axis is ``fit(X, raman_shift=...)``, by
    default the references' own axis when they all share one with as many values as
    ``X`` has columns; ``transform`` then returns the abundances (n_spectra, k) alone
    (a map gets the abundance images and the residual RMS image). Every spectrum is
    unmixed on its own, so a map unmixed block by block gives the same numbers as at once.

    Parameters
    ----------
    references : list of mapkit.read.Spectrum
    baseline_order : int, None or "auto"
        Polynomial order of the baseline terms; None for none; "auto" (default) chooses
        it on the fitted map by the information criterion of
        :func:`choose_baseline_order`.
    method : {"nnls", "fcls"}
    weights : {"poisson", "none"}
        "poisson" (default) weights every channel by the inverse of its shot-noise
        variance (:func:`unmix_spectra_poisson`; spectra in counts); "none" is ordinary
        least squares. On the scene family the weights lowered the error against the
        noise floor on 17 of 18 maps (median 1.065 to 1.04; benchmarks/RESULTS.md).

    Attributes
    ----------
    baseline_order_ : int or None
        The order used (the chosen one with "auto").
    names_ : list of str
    references_ : array (k, n_shift)
        References on the map's axis.
    resampled_ : bool
        True when the references were interpolated onto the map's axis.
    collinear_ : list of (str, str, float)
        Reference pairs with |r| > ``COLLINEAR_R`` after the baseline projection.

    Examples
    --------
    >>> from mapkit.read import Spectrum
    >>> s = np.linspace(400, 1600, 200)
    >>> refs = [Spectrum(n, s, np.exp(-0.5 * ((s - c) / 15) ** 2))
    ...         for c, n in ((800, "a"), (1200, "b"))]
    >>> X = np.array([[1, 0], [0.3, 0.7]]) @ np.stack([r.intensity for r in refs]) + 5.0
    >>> un = ReferenceUnmixing(refs, baseline_order=0, weights="none").fit(X)
    >>> un.transform(X).round(6).tolist()
    [[1.0, 0.0], [0.3, 0.7]]
    """

    def __init__(self, references=(), baseline_order: int | str | None = "auto",
                 method: str = "nnls", weights: str = "poisson"):
        self.references = references
        self.baseline_order = baseline_order
        self.method = method
        self.weights = weights

    def __sklearn_tags__(self):
        return float64_tags(super().__sklearn_tags__())

    def _axis(self, refs, mp, n_shift, raman_shift):
        """The spectra's shift axis: the map's, the one given, or the references' own."""
        if mp is not None:
            return mp.raman_shift
        if raman_shift is not None:
            from ._common import axis_of

            return axis_of(None, n_shift, raman_shift)
        own = refs[0].raman_shift
        if own.size == n_shift and all(r.raman_shift.shape == own.shape and
                                       np.allclose(r.raman_shift, own) for r in refs):
            return np.asarray(own, float)
        raise DataError(f"spectra as rows with {n_shift} channels and references on other "
                        "axes: the shift axis is unknown", field="raman_shift",
                        fix="pass fit(X, raman_shift=...) or unmix a RamanMap")

    def fit(self, m, y=None, raman_shift=None):
        """Put the references on the axis of a map, or of spectra as rows (``raman_shift``)."""
        if self.method not in ("nnls", "fcls"):
            raise MapkitError(f"unknown unmixing method {self.method!r}", field="method",
                              fix="use nnls or fcls")
        if self.weights not in ("poisson", "none"):
            raise MapkitError(f"unknown unmixing weights {self.weights!r}", field="weights",
                              fix="use poisson (spectra in counts) or none")
        refs = list(self.references)
        if not refs:
            raise MapkitError("no reference spectra given", field="references",
                              fix="pass a library folder with --library")
        names = [r.name for r in refs]
        if len(set(names)) != len(names):
            raise MapkitError("two references share a name", field="references",
                              fix="give every reference a unique name")
        order = check_baseline_order(self.baseline_order)
        if isinstance(m, RamanMap):   # the spectra are read only if the order is chosen
            X, mp, n_shift = None, m, m.shape[-1]
            self.n_features_in_ = n_shift
        else:
            X, _, mp = spectra_in(self, m, what="unmixing", reset=True)
            n_shift = X.shape[1]
        shift = self._axis(refs, mp, n_shift, raman_shift)
        if len(refs) + baseline_terms(order) >= n_shift:
            raise DataError(f"{len(refs)} references and the baseline terms need more channels "
                            f"than the map's {n_shift}", file=getattr(mp, "source", None),
                            field="references", fix="use fewer references or a lower "
                                                    "baseline order")
        R = np.stack([r.on_axis(shift) for r in refs])
        self.resampled_ = any(r.raman_shift.shape != shift.shape
                              or not np.allclose(r.raman_shift, shift) for r in refs)
        if self.resampled_:
            warnings.warn("reference spectra were interpolated onto the map's shift axis",
                          stacklevel=2)
        if order == "auto":
            if X is None:
                X, _ = good_spectra(m, what="unmixing")
            order = choose_baseline_order(R, X, shift)
            if order >= MAX_AUTO_ORDER:
                warnings.warn(f"the chosen baseline order reached the largest considered "
                              f"({MAX_AUTO_ORDER}): the background may need a cleaning "
                              "baseline step or a narrower shift range", stacklevel=2)
        self.baseline_order_ = order
        self.collinear_ = [(names[i], names[j], r) for i, j, r in
                           collinear_pairs(R, shift, self.baseline_order_)]
        for a, b, r in self.collinear_:
            warnings.warn(f"references {a!r} and {b!r} are nearly collinear (r = {r:.4f} after "
                          "the baseline terms): their abundances cannot be told apart; drop "
                          "or merge one of them", stacklevel=2)
        if self.method == "fcls":
            warnings.warn("fcls: abundances are shares summing to 1 in each pixel; the fitted "
                          "total (counts per unit reference) is the 'scale' image", stacklevel=2)
        self.names_ = names
        self.references_ = R
        self.raman_shift_ = np.array(shift, dtype=float)
        return self

    def transform(self, m):
        """Abundance images (k, ny, nx) and the residual RMS image (ny, nx) of a map
        (masked pixels NaN), or the abundances (n_spectra, k) of spectra as rows.

        For ``method="fcls"`` the abundances are shares (sum 1 per pixel; NaN where nothing
        of any reference is found) and the result's ``scale`` field holds the fitted totals.
        """
        abundance, rms, _, _ = self._unmix(m)
        return abundance if not isinstance(m, RamanMap) else (abundance, rms)

    def _unmix(self, m):
        check_is_fitted(self)
        if isinstance(m, RamanMap) and (m.shape[-1] != self.raman_shift_.size or
                                        not np.allclose(m.raman_shift, self.raman_shift_)):
            raise MapkitError("the map's shift axis differs from the one the model was fitted on",
                              file=m.source, field="raman_shift", fix="fit on this map")
        X, good, mp = spectra_in(self, m, what="unmixing", reset=False)
        shift = self.raman_shift_ if mp is None else mp.raman_shift
        # fcls with a free scale: the NNLS optimum z gives shares z / sum(z) exactly
        if self.weights == "poisson":
            A, rms, converged = unmix_spectra_poisson(self.references_, X, shift,
                                                      self.baseline_order_)
        else:
            A, rms, converged = unmix_spectra(self.references_, X, shift,
                                              self.baseline_order_, return_converged=True)
        if mp is None:
            converged = np.asarray(converged, bool)
        else:
            converged = to_images(mp, converged[:, None], good, fill=True)[0].astype(bool)
        scale = None
        if self.method == "fcls":
            total = A.sum(axis=0)
            with np.errstate(invalid="ignore", divide="ignore"):
                A = np.where(total > 0, A / total, np.nan)
            scale = total if mp is None else to_images(mp, total[:, None], good)[0]
        rms = rms if mp is None else to_images(mp, rms[:, None], good)[0]
        return rows_out(A.T, good, mp), rms, scale, converged

    def result(self, m: RamanMap, name: str = "unmixing") -> Result:
        abundance, rms, scale, converged = self._unmix(m)
        comp = Axis("component", np.array(self.names_))
        fcls = self.method == "fcls"
        fields = {"abundance": Field("abundance", abundance, (comp, *image_axes(m)),
                                     "share" if fcls else "reference units",
                                     long_name="share of each reference (sum 1)" if fcls
                                     else "abundance (1 = the reference as stored)"),
                  "residual": Field("residual_rms", rms, image_axes(m), "counts",
                                    long_name="RMS of the fit residual"),
                  "references": Field("reference", self.references_,
                                      (comp, shift_axis(m)), "a.u.",
                                      long_name="reference spectrum on the map axis")}
        fields["converged"] = Field("converged", converged.astype(np.uint8),
                                    image_axes(m), "", long_name="1 = the non-negative least "
                                    "squares converged (0: stopped at its iteration limit)")
        if fcls:
            fields["scale"] = Field("scale", scale, image_axes(m), "reference units",
                                    long_name="fitted total of the references (shares × scale "
                                              "= abundances)")
        summary = {"not_converged": int((~converged & ~m.mask).sum())}
        if self.collinear_:
            summary["collinear_references"] = [{"pair": [a, b], "r": r}
                                               for a, b, r in self.collinear_]
        return Result(name, f"{self.method}_unmixing",
                      {"references": self.names_, "baseline_order": self.baseline_order_,
                       "baseline_order_requested": self.baseline_order,
                       "method": self.method, "weights": self.weights,
                       "resampled": self.resampled_},
                      fields, summary)
