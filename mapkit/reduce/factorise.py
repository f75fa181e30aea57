"""Factorisations of a map into component spectra and images: PCA, NMF, MCR-ALS."""

from __future__ import annotations

import numpy as np
from sklearn.base import BaseEstimator, TransformerMixin
from sklearn.utils.metaestimators import available_if
from sklearn.utils.validation import check_is_fitted

from ..core.ramanmap import RamanMap
from ..core.result import Axis, Field, Result
from ..errors import MapkitError
from ._common import (axis_of, check_baseline_room, check_components, float64_tags,
                      good_spectra, image_axes, rows_out, shift_axis, spectra_in)
from .endmembers import vca
from .unmix import nnls_batch, unmix_spectra, unmix_spectra_poisson


def _component_axis(n, prefix="component"):
    return Axis("component", np.array([f"{prefix} {i + 1}" for i in range(n)]))


class PCAScores(TransformerMixin, BaseEstimator):
    """Principal component analysis of the map's spectra (mean-centred).

    Use the explained variance to choose how many components or classes a map holds.
    Every method takes a :class:`RamanMap` (unmasked pixels; scores come back as images)
    or an array of spectra (n_spectra, n_shift), one per row (scores come back as rows).

    Parameters
    ----------
    n_components : int
    random_state : int
        Passed to scikit-learn (the exact solvers used do not draw random numbers).

    Attributes
    ----------
    components_ : array (n_components, n_shift)
        Loadings on the shift axis.
    explained_variance_ratio_ : array (n_components,)
    mean_ : array (n_shift,)
    n_features_in_ : int
        Channels of the spectra fitted on.

    Notes
    -----
    ``fit`` is the exact PCA of the spectra given. ``partial_fit`` refines an
    incremental PCA (scikit-learn's ``IncrementalPCA``, Ross et al. 2008, Int. J. Comput.
    Vis. 77:125) block by block, for maps that do not fit in memory; its leading
    components approach those of ``fit`` on all blocks but are not identical unless the
    spectra span at most ``n_components`` directions. ``transform`` is row by row, so
    blocks give the same scores as the whole map.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> X = rng.normal(size=(50, 2)) @ rng.normal(size=(2, 30))
    >>> pca = PCAScores(n_components=2).fit(X)
    >>> pca.transform(X).shape
    (50, 2)
    >>> round(float(pca.explained_variance_ratio_.sum()), 6)
    1.0
    """

    def __init__(self, n_components: int = 10, random_state: int = 0):
        self.n_components = n_components
        self.random_state = random_state

    def __sklearn_tags__(self):
        return float64_tags(super().__sklearn_tags__())

    def fit(self, m, y=None):
        """Fit on a map's unmasked spectra or on an array (n_spectra, n_shift)."""
        from sklearn.decomposition import PCA

        X, good, mp = spectra_in(self, m, what="PCA", reset=True)
        check_components(self.n_components, X.shape[1] if mp is None else mp, X.shape[0])
        # exact eigendecomposition of the channel covariance: fast when pixels outnumber
        # channels (the usual map), and no randomised approximation
        solver = "covariance_eigh" if X.shape[0] >= X.shape[1] else "full"
        self.model_ = PCA(n_components=self.n_components, svd_solver=solver,
                          random_state=self.random_state).fit(X)
        self.components_ = self.model_.components_
        self.explained_variance_ratio_ = self.model_.explained_variance_ratio_
        self.mean_ = self.model_.mean_
        return self

    def partial_fit(self, m, y=None):
        """Refine an incremental PCA with one block (a map or an array of spectra).

        The first call (or the first after ``fit``) starts a new model; each block needs
        at least ``n_components`` spectra.
        """
        from sklearn.decomposition import IncrementalPCA

        first = not isinstance(getattr(self, "model_", None), IncrementalPCA)
        X, good, mp = spectra_in(self, m, what="PCA", reset=first)
        check_components(self.n_components, X.shape[1] if mp is None else mp, X.shape[0])
        if first:
            self.model_ = IncrementalPCA(n_components=self.n_components)
        self.model_.partial_fit(X)
        self.components_ = self.model_.components_
        self.explained_variance_ratio_ = self.model_.explained_variance_ratio_
        self.mean_ = self.model_.mean_
        return self

    def transform(self, m) -> np.ndarray:
        """Scores: images (n_components, ny, nx) of a map (NaN where masked) or rows
        (n_spectra, n_components) of an array."""
        check_is_fitted(self)
        X, good, mp = spectra_in(self, m, what="PCA", reset=False)
        return rows_out(self.model_.transform(X), good, mp)

    def result(self, m: RamanMap, name: str = "pca") -> Result:
        comp = _component_axis(self.n_components, "PC")
        return Result(name, "pca", self.get_params(), {
            "scores": Field("score", self.transform(m), (comp, *image_axes(m)), "a.u.",
                            long_name="PCA score"),
            "loadings": Field("loading", self.components_, (comp, shift_axis(m)), "",
                              long_name="PCA loading"),
            "explained_variance": Field("explained_variance_ratio",
                                        self.explained_variance_ratio_, (comp,), "",
                                        long_name="share of variance explained")},
            {"explained_variance_pct": [float(100 * v) for v in self.explained_variance_ratio_],
             "cumulative_pct": [float(100 * v) for v in np.cumsum(self.explained_variance_ratio_)]})


class NMFComponents(TransformerMixin, BaseEstimator):
    """Non-negative matrix factorisation of a map (scikit-learn's NMF or MiniBatchNMF).

    The spectra are factorised as X ≈ W H with W, H ≥ 0 (Lee & Seung 1999), after
    clipping at zero (baseline-corrected spectra dip below it in noise). The component
    images are then obtained by non-negative least squares of the unclipped spectra on
    the component spectra with a constant offset term: clipping biases NMF's own weights
    upward in weak pixels (measured on the sample map: abundance RMSE 0.024 against 0.030).

    Every method takes a :class:`RamanMap` (unmasked pixels; images come back on its
    grid) or an array of spectra (n_spectra, n_shift), one per row (weights come back as
    rows (n_spectra, n_components)). ``transform`` works spectrum by spectrum, so a map
    transformed block by block gives the same weights as the whole map.

    Parameters
    ----------
    n_components : int
    init : {"nndsvda", "vca"}
        NNDSVD-a (scikit-learn) or the purest pixels found by VCA.
    batch_size : int, optional
        Use MiniBatchNMF with this many spectra per batch (large maps); also enables
        ``partial_fit``, which refines the component spectra one block at a time.
    max_iter, random_state
        Passed to scikit-learn; the seed is fixed so runs repeat exactly.
    image_baseline_order : int or None
        Polynomial order of the baseline terms when computing images (None: no terms).
        For array input above order 0 the terms are polynomials of the shift axis
        passed as ``fit(X, raman_shift=...)`` (default: the channel index, the same
        terms as any evenly spaced axis).

    Attributes
    ----------
    components_ : array (n_components, n_shift)
        Component spectra, each scaled to unit maximum.
    fit_images_ : array (n_components, ny, nx) or (n_spectra, n_components)
        Component images of the fitted map (NaN where masked), or weights of the fitted
        rows for array input (not set by ``partial_fit``).
    reconstruction_err_ : float
        Frobenius norm of X − WH on the fitted pixels.
    raman_shift_ : array (n_shift,)
        The shift axis fitted on (the channel index for an array without one).

    Examples
    --------
    On spectra as rows:

    >>> rng = np.random.default_rng(0)
    >>> X = np.abs(rng.normal(size=(20, 2))) @ np.abs(rng.normal(size=(2, 30)))
    >>> NMFComponents(n_components=2).fit_transform(X).shape
    (20, 2)

    On a map:

    >>> rng = np.random.default_rng(0)
    >>> H = np.abs(rng.normal(size=(2, 30)))
    >>> W = np.abs(rng.normal(size=(4 * 5, 2)))
    >>> m = RamanMap((W @ H).reshape(4, 5, 30), raman_shift=np.arange(30.),
    ...              x=np.arange(5.), y=np.arange(4.))
    >>> est = NMFComponents(n_components=2).fit(m)
    >>> est.transform(m).shape
    (2, 4, 5)
    """

    def __init__(self, n_components: int = 4, init: str = "nndsvda", batch_size: int | None = None,
                 max_iter: int = 2000, random_state: int = 0, image_baseline_order: int | None = 0):
        self.n_components = n_components
        self.init = init
        self.batch_size = batch_size
        self.max_iter = max_iter
        self.random_state = random_state
        self.image_baseline_order = image_baseline_order

    def __sklearn_tags__(self):
        return float64_tags(super().__sklearn_tags__())

    def _vca_start(self, Xc) -> dict:
        """Start values (W, H) from pure pixels for ``init="vca"``; none otherwise."""
        if self.init != "vca":
            return {}
        H0 = Xc[vca(Xc, self.n_components, random_state=self.random_state)] + 1e-9
        return {"W": np.clip(nnls_batch(H0.T, Xc.T).T, 1e-9, None), "H": H0}

    def fit(self, m, y=None, raman_shift=None):
        """Fit on a map or on spectra as rows (``raman_shift``: their axis, arrays only)."""
        from sklearn.decomposition import NMF, MiniBatchNMF

        X, good, mp = spectra_in(self, m, what="NMF", reset=True)
        check_components(self.n_components, X.shape[1] if mp is None else mp, X.shape[0])
        self._check_init()
        self._check_room(X.shape[1])
        Xc = np.clip(X, 0, None)
        kw = dict(n_components=self.n_components, max_iter=self.max_iter,
                  random_state=self.random_state, tol=1e-6)
        if self.batch_size:
            model = MiniBatchNMF(batch_size=self.batch_size, init="nndsvda" if self.init == "nndsvda"
                                 else "custom", **kw)
        else:
            model = NMF(init="nndsvda" if self.init == "nndsvda" else "custom", **kw)
        model.fit_transform(Xc, **self._vca_start(Xc))
        self._keep(model, axis_of(mp, X.shape[1], raman_shift))
        self.fit_images_ = self.transform(m)
        return self

    def _check_room(self, n_shift):
        from .unmix import baseline_terms

        check_baseline_room(baseline_terms(self.image_baseline_order), n_shift,
                            "image_baseline_order")

    def _check_init(self):
        if self.init not in ("nndsvda", "vca"):
            raise MapkitError(f"unknown NMF start {self.init!r}", field="init",
                              fix="use nndsvda or vca")

    def _keep(self, model, shift):
        """Learned state from scikit-learn's model: spectra scaled to unit maximum."""
        H = model.components_
        scale = H.max(axis=1, keepdims=True)
        scale[scale == 0] = 1.0
        self.model_ = model
        self.components_ = H / scale
        self.raman_shift_ = np.array(shift, dtype=float)
        self.reconstruction_err_ = float(getattr(model, "reconstruction_err_", np.nan))
        self.n_iter_ = int(getattr(model, "n_iter_", getattr(model, "n_steps_", 0)))

    @available_if(lambda self: bool(self.batch_size))
    def partial_fit(self, m, y=None, raman_shift=None):
        """Refine the component spectra with one block (MiniBatchNMF; needs ``batch_size``).

        The block is a map or spectra as rows; the first call starts the model (from
        NNDSVD-a or VCA on that block). ``fit_images_`` is not set: get weights with
        ``transform``, block by block.
        """
        from sklearn.decomposition import MiniBatchNMF

        model = getattr(self, "model_", None)
        first = not isinstance(model, MiniBatchNMF)
        X, good, mp = spectra_in(self, m, what="NMF", reset=first)
        Xc = np.clip(X, 0, None)
        if first:
            check_components(self.n_components, X.shape[1] if mp is None else mp, X.shape[0])
            self._check_init()
            self._check_room(X.shape[1])
            model = MiniBatchNMF(n_components=self.n_components, batch_size=self.batch_size,
                                 max_iter=self.max_iter, random_state=self.random_state,
                                 tol=1e-6, init="nndsvda" if self.init == "nndsvda"
                                 else "custom")
            model.partial_fit(Xc, **self._vca_start(Xc))
            shift = axis_of(mp, X.shape[1], raman_shift)
        else:
            model.partial_fit(Xc)
            shift = self.raman_shift_
        self._keep(model, shift)
        return self

    def fit_transform(self, m, y=None, raman_shift=None) -> np.ndarray:
        """Fit and return the fitted map's component images (n_components, ny, nx), or
        the rows' weights (n_spectra, n_components) for array input."""
        return self.fit(m, raman_shift=raman_shift).fit_images_

    def transform(self, m) -> np.ndarray:
        """Component images (n_components, ny, nx) of any map on the same axis (masked
        NaN), or weights (n_spectra, n_components) of spectra as rows."""
        check_is_fitted(self)
        X, good, mp = spectra_in(self, m, what="NMF", reset=False)
        shift = self.raman_shift_ if mp is None else mp.raman_shift
        A, _ = unmix_spectra(self.components_, X, shift, self.image_baseline_order,
                             residual=False)
        return rows_out(A.T, good, mp)

    def result(self, m: RamanMap, images=None, name: str = "nmf") -> Result:
        """Component images and spectra as a :class:`Result` for export."""
        comp = _component_axis(self.n_components)
        images = self.transform(m) if images is None else images
        return Result(name, "nmf", self.get_params(), {
            "images": Field("abundance", images, (comp, *image_axes(m)), "a.u.",
                            long_name="NMF component weight"),
            "spectra": Field("spectrum", self.components_, (comp, shift_axis(m)), "a.u.",
                             long_name="NMF component spectrum (unit maximum)")},
            {"reconstruction_error": self.reconstruction_err_, "n_iter": self.n_iter_,
             "converged": self.n_iter_ < self.max_iter})


class MCRALS(TransformerMixin, BaseEstimator):
    """Multivariate curve resolution by alternating least squares (MCR-ALS).

    D ≈ C Sᵀ with non-negative concentrations C and spectra S, solved by alternating
    non-negative least squares (Tauler 1995, Chemom. Intell. Lab. Syst. 30:133; de Juan &
    Tauler 2006, Crit. Rev. Anal. Chem. 36:163).

    Parameters
    ----------
    n_components : int
    init : {"vca", "nmf"} or array (n_components, n_shift)
        Starting spectra: VCA's purest pixels, an NMF solution, or given spectra.
    fixed : dict {index: spectrum}, optional
        Components whose spectrum is known and kept fixed (e.g. a reference).
    closure : bool
        Force each pixel's concentrations to sum to one (closed systems only).
    max_iter, tol
        Stop when the relative change of the lack of fit is below ``tol``.

    Attributes
    ----------
    components_ : array (n_components, n_shift), each with unit maximum
    fit_images_ : array (n_components, ny, nx) or (n_spectra, n_components)
        Concentrations of the fitted map (images, NaN where masked) or rows.
    lack_of_fit_ : float
        100·‖D − C Sᵀ‖ / ‖D‖ in %.
    explained_variance_ : float
        100·(1 − ‖D − C Sᵀ‖² / ‖D‖²) in %.
    n_iter_ : int

    Notes
    -----
    Takes a :class:`RamanMap` or an array of spectra (n_spectra, n_shift), one per row.
    Every sweep uses all spectra at once, so there is no ``partial_fit``; fit on a sample
    of spectra and ``transform`` (pixel by pixel, the same by blocks as at once) the rest.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> S = np.abs(rng.normal(size=(2, 40)))
    >>> C = rng.dirichlet([1, 1], 30); C[:2] = np.eye(2)
    >>> MCRALS(n_components=2).fit(C @ S).transform(C @ S).shape
    (30, 2)
    """

    def __init__(self, n_components: int = 4, init="vca", fixed=None, closure: bool = False,
                 max_iter: int = 200, tol: float = 1e-6, random_state: int = 0):
        self.n_components = n_components
        self.init = init
        self.fixed = fixed
        self.closure = closure
        self.max_iter = max_iter
        self.tol = tol
        self.random_state = random_state

    def _start(self, X):
        if isinstance(self.init, str):
            if self.init == "vca":
                return np.clip(X[vca(X, self.n_components, random_state=self.random_state)],
                               0, None)
            if self.init == "nmf":
                from sklearn.decomposition import NMF

                return NMF(self.n_components, init="nndsvda", random_state=self.random_state,
                           max_iter=500).fit(np.clip(X, 0, None)).components_
            raise MapkitError(f"unknown MCR start {self.init!r}", field="init",
                              fix="use vca, nmf or give starting spectra")
        S = np.asarray(self.init, float)
        if S.shape != (self.n_components, X.shape[1]):
            raise MapkitError(f"starting spectra have shape {S.shape}, expected "
                              f"{(self.n_components, X.shape[1])}", field="init",
                              fix="give one spectrum per component on the map's axis")
        return S.copy()

    def __sklearn_tags__(self):
        return float64_tags(super().__sklearn_tags__())

    def fit(self, m, y=None):
        """Fit on a map's unmasked spectra or on an array (n_spectra, n_shift)."""
        X, good, mp = spectra_in(self, m, what="MCR-ALS", reset=True)
        check_components(self.n_components, X.shape[1] if mp is None else mp, X.shape[0])
        S = self._start(X)
        fixed = dict(self.fixed or {})
        for k, spec in fixed.items():
            S[k] = np.asarray(spec, float)
        norm_d = np.linalg.norm(X) or 1.0
        lof_old = np.inf
        C = self._concentrations(S, X)
        free = np.array([k not in fixed for k in range(self.n_components)])
        for it in range(1, self.max_iter + 1):
            S = nnls_batch(C, X)                              # (k, n_shift)
            for k, spec in fixed.items():
                S[k] = np.asarray(spec, float)
            scale = S.max(axis=1, keepdims=True)
            scale[scale == 0] = 1.0
            S[free] /= scale[free]
            C = self._concentrations(S, X)                   # (n_pix, k)
            resid = np.linalg.norm(X - C @ S)
            lof = 100 * resid / norm_d
            if abs(lof_old - lof) <= self.tol * max(lof, 1e-300):
                break
            lof_old = lof
        self.components_ = S
        self.n_iter_ = it
        self.lack_of_fit_ = float(lof)
        self.explained_variance_ = float(100 * (1 - (resid / norm_d) ** 2))
        self.raman_shift_ = axis_of(mp, X.shape[1]).copy()
        self.fit_images_ = rows_out(C, good, mp)
        return self

    def _concentrations(self, S, X):
        """Non-negative concentrations of spectra X on S, closed to one when asked."""
        C = nnls_batch(S.T, X.T).T
        if self.closure:
            total = C.sum(axis=1, keepdims=True)
            C = np.divide(C, total, out=np.zeros_like(C), where=total > 0)
        return C

    def transform(self, m) -> np.ndarray:
        """Concentration images (n_components, ny, nx) of a map (NaN where masked), or
        rows (n_spectra, n_components) of an array."""
        check_is_fitted(self)
        X, good, mp = spectra_in(self, m, what="MCR-ALS", reset=False)
        return rows_out(self._concentrations(self.components_, X), good, mp)

    def result(self, m: RamanMap, images=None, name: str = "mcr") -> Result:
        comp = _component_axis(self.n_components)
        images = self.transform(m) if images is None else images
        params = {k: v for k, v in self.get_params().items() if k not in ("init", "fixed")}
        params["init"] = self.init if isinstance(self.init, str) else "given spectra"
        params["fixed"] = sorted(self.fixed or {})
        return Result(name, "mcr_als", params, {
            "images": Field("concentration", images, (comp, *image_axes(m)), "a.u.",
                            long_name="MCR-ALS concentration"),
            "spectra": Field("spectrum", self.components_, (comp, shift_axis(m)), "a.u.",
                             long_name="MCR-ALS spectrum")},
            {"lack_of_fit_pct": self.lack_of_fit_, "explained_variance_pct":
             self.explained_variance_, "n_iter": self.n_iter_,
             "converged": self.n_iter_ < self.max_iter})


#: Background order the automatic choice of :class:`BackgroundMCR` resolves spectra with
#: (chosen on the scene family: 10 against the images' own order and 14,
#: benchmarks/RESULTS.md).
SPECTRA_ORDER = 10

#: :meth:`BackgroundMCR.start_from_blocks`: the first pass forms the Gram matrix of every
#: this many spectra (an eighth of the cost of the whole matrix) to start the iteration from
START_GRAM_STRIDE = 8
#: Vectors beyond n_components in the subspace iteration (Halko et al. 2011 suggest 5-10).
START_OVERSAMPLING = 8
#: Relative residual ‖G v − θ v‖ / θ of every leading Ritz pair that ends the iteration.
START_TOLERANCE = 1e-6
#: Passes of the iteration at most (after the first).
START_MAX_PASSES = 4


def least_area_lift(S, Q, tolerance=None):
    """Add to each row of ``S`` the combination of the columns of ``Q`` that makes it
    non-negative with the least area (a linear programme per row, HiGHS via scipy).

    A pixel-wise free polynomial background leaves the polynomial part of a component
    spectrum undetermined by the data; the spectrum that sits on zero between its bands
    (least area while non-negative) is the usual convention for Raman spectra (common
    practice). Rows where the programme fails are clipped at zero instead.

    ``tolerance`` (an array shaped like ``S``, or None) lets each channel dip that far
    below zero before the result is clipped: for a noisy spectrum the constraint then
    binds at the noise's lowest excursions instead of lifting the whole spectrum onto
    them (:func:`_lift_tolerance`).
    """
    from scipy.optimize import linprog

    out = np.clip(S, 0, None)
    cost = Q.sum(axis=0)
    tol = np.zeros_like(S) if tolerance is None else np.asarray(tolerance, np.float64)
    for k, s in enumerate(S):
        res = linprog(cost, A_ub=-Q, b_ub=s + tol[k], bounds=[(None, None)] * Q.shape[1],
                      method="highs")
        if res.status == 0:
            out[k] = np.maximum(s + Q @ res.x, 0.0)
    return out


def _lift_tolerance(C, D, S, z):
    """How far below zero each channel of the least-squares spectra ``S`` (k, n) of
    ``D ≈ C S`` may dip from noise alone: ``z`` standard errors, each from the residual
    variance of its channel over the pixels and the diagonal of (CᵀC)⁻¹ (the usual
    least-squares standard error, common practice)."""
    R = D - C @ S
    dof = max(1, C.shape[0] - C.shape[1])
    var = np.einsum("ij,ij->j", R, R) / dof                 # noise variance per channel
    G = np.linalg.pinv(C.T @ C)
    return z * np.sqrt(np.clip(np.diag(G), 0, None)[:, None] * var[None])


def _check_lift_noise(z, sweeps):
    if isinstance(z, bool) or not isinstance(z, (int, float, np.integer, np.floating)) \
            or not np.isfinite(z) or z < 0:
        raise MapkitError(f"lift_noise must be a number of standard errors >= 0, not {z!r}",
                          field="lift_noise", fix="give 0 (off) or e.g. 2")
    if sweeps not in ("all", "last"):
        raise MapkitError(f"lift_noise_sweeps must be 'all' or 'last', not {sweeps!r}",
                          field="lift_noise_sweeps", fix="give all or last")


def _sweep_tolerance(est, sweep, C, D, S):
    """The lift's noise allowance in sweep ``sweep`` of ``est`` (None: the plain lift)."""
    last = sweep == est.max_iter - 1
    if not est.lift_noise or (est.lift_noise_sweeps == "last" and not last):
        return None
    return _lift_tolerance(C, D, S, est.lift_noise)


#: Largest multiple of another (unit-maximum) spectrum :func:`least_area_rotation` may add
#: to or take from a spectrum: a correction of the factorisation, not a new spectrum.
ROTATION_LIMIT = 0.5

#: Share of a pixel's Raman signal above which :func:`pure_pixel_rotation` counts it as pure,
#: how many such pixels a component needs before its partners are corrected there, and the
#: passes (each finds more pure pixels; chosen on the scene family, benchmarks/RESULTS.md:
#: 0.9 and one pass lost on broad bands, 0.95 and one pass stopped short on overlapping ones).
PURE_SHARE = 0.95
PURE_MIN_PIXELS = 10
PURE_PASSES = 3


def least_area_rotation(S, Q, limit=ROTATION_LIMIT):
    """Each row of ``S`` plus the combination of the other rows (each coefficient within
    ±``limit``) and of the columns of ``Q`` that makes it non-negative with the least area
    (a linear programme per row, HiGHS via scipy).

    Non-negative factors of a map are unique only up to a rotation inside the band of
    feasible solutions (Lawton & Sylvestre 1971, Technometrics 13:617); with a free
    background per pixel the spectra's non-negativity hardly narrows it, and alternating
    least squares drifts inside it (clipped noise in the concentrations favours spectra
    with other components' bands subtracted). Spectra of distinct materials that sit on
    zero between their own bands have the least area: subtracting another spectrum
    leaves dips only a background-wide pedestal can fill, adding one adds its area
    (choosing within the band by an area or entropy criterion: common practice). Strongly
    overlapping bands (a dip hidden in a band's wing) are over-corrected, which
    :func:`pure_pixel_rotation` undoes where pure pixels exist. Rows where the programme
    fails, leaves nothing or takes a coefficient to its limit are kept as they are (at the
    limit a row is nearly a combination of the others: a duplicated component, or one
    fitting noise when there are more components than materials, whose least-area
    rotation jumps with the sample).
    """
    from scipy.optimize import linprog

    S = np.asarray(S, float)
    out = S.copy()
    k = len(S)
    for j in range(k):
        A = np.concatenate([np.delete(S, j, axis=0).T, Q], axis=1)
        bounds = [(-limit, limit)] * (k - 1) + [(None, None)] * Q.shape[1]
        res = linprog(A.sum(axis=0), A_ub=-A, b_ub=S[j], bounds=bounds, method="highs")
        # at the limit the row is close to a combination of the others (a duplicated or
        # noise component): the criterion does not identify it, so it is left alone
        if res.status == 0 and np.all(np.abs(res.x[:k - 1]) < limit * (1 - 1e-6)):
            row = np.maximum(S[j] + A @ res.x, 0.0)
            if row.max() > 0:
                out[j] = row
    return out


def pure_pixel_rotation(S, Xp, Q, share=PURE_SHARE, min_pixels=PURE_MIN_PIXELS,
                        passes=PURE_PASSES):
    """Rotate spectra ``S`` (k, n) so that, in the pixels where one component holds at
    least ``share`` of the Raman signal, the other components' concentrations have median
    zero; ``Xp`` (m, n): the spectra with their polynomial part (columns of ``Q``) removed.

    The concentrations are the unconstrained least-squares ones (their noise is symmetric,
    so the median over pure pixels is unbiased, unlike clipped non-negative ones); the
    share of the signal is concentration times the spectrum's area. Where a material has
    pure pixels, its partners' images must vanish there: the boundary of the feasible
    band on the concentration side (Lawton & Sylvestre 1971, Technometrics 13:617), which
    is the true solution when pure pixels exist. Components with fewer than
    ``min_pixels`` pure pixels are left as they are; each of the ``passes`` finds the pure
    pixels again with the rotated spectra. Returns the rotated spectra, non-negative with
    the least area (:func:`least_area_lift`), unit maximum where rotated.
    """
    S = np.asarray(S, float)
    k = len(S)
    for _ in range(passes):
        Sp = S - (S @ Q) @ Q.T
        C = np.linalg.lstsq(Sp.T, Xp.T, rcond=None)[0].T         # (m, k), unconstrained
        signal = np.clip(C, 0, None) * S.sum(axis=1)
        part = signal / np.maximum(signal.sum(axis=1, keepdims=True), 1e-300)
        E = np.zeros((k, k))
        for j in range(k):
            pure = part[:, j] >= share
            if pure.sum() >= min_pixels:
                E[j] = np.median(C[pure] / C[pure, j:j + 1], axis=0)
                E[j, j] = 0.0
        if not E.any():
            break
        # C'ᵢ = Cᵢ − Σⱼ Eⱼᵢ Cⱼ keeps C S = C' S' with S'ⱼ = Sⱼ + Σᵢ Eⱼᵢ Sᵢ
        S = least_area_lift(S + E @ S, Q)
        scale = S.max(axis=1, keepdims=True)
        S = S / np.where(scale > 0, scale, 1.0)
    return S


class BackgroundMCR(TransformerMixin, BaseEstimator):
    """MCR-ALS on spectra that keep their fluorescence, with a polynomial background per pixel.

    D = C Sᵀ + B Pᵀ with non-negative concentrations C and spectra S, and free polynomial
    background coefficients B on a fixed Legendre basis P (MCR-ALS: Tauler 1995, Chemom.
    Intell. Lab. Syst. 30:133; a background modelled as extra unconstrained terms: de Juan &
    Tauler 2006, Crit. Rev. Anal. Chem. 36:163). Fitting on despiked counts, instead of
    after a baseline subtraction, keeps the wings of broad bands and the weak bands of
    minor phases that a separate baseline step eats.

    The start is the successive projection algorithm (:func:`~mapkit.reduce.endmembers.
    successive_projections`) on the leading principal components of the background-free
    part of the spectra: the purest pixels, which finds minor phases in small spots that
    an NMF of baseline-corrected spectra merges away. The spectra's polynomial part, which
    the data cannot fix, is set by :func:`least_area_lift`.

    After the sweeps the spectra are rotated within the band of feasible solutions, where
    alternating least squares stops short or drifts: to the least area against each other
    (:func:`least_area_rotation`), then so that every component's image vanishes in the
    other components' pure pixels (:func:`pure_pixel_rotation`). On the scene family this
    halved the median abundance error (2.02 → 1.06 times the noise floor; lower on 17 of
    18 maps, benchmarks/RESULTS.md).

    Parameters
    ----------
    n_components : int
    baseline_order : int or "auto"
        Polynomial order of the background. "auto": the spectra are resolved with a rich
        background (order ``SPECTRA_ORDER``, fewer on short axes), since every pixel
        informs them and background left in the data biases them more than extra terms
        cost; the images are then fitted per pixel with the order the data support
        against those spectra (:func:`~mapkit.reduce.unmix.choose_baseline_order`) and
        weighted for shot noise (:func:`~mapkit.reduce.unmix.unmix_spectra_poisson`),
        where every extra term costs precision. On the scene family this raised the worst
        cosine on 14 of 18 maps (lower on 1) over one order chosen for both
        (benchmarks/RESULTS.md). A whole number is used for both.
    max_iter : int
        Alternating least-squares sweeps after the start. More sweeps improve the spectra
        of maps without pure pixels but let abundances drift on maps with them; 25 was the
        best compromise on the scene family (benchmarks/bench_accuracy.py).
    random_state : int
        Seed of the pixel sample the background order is chosen on.
    lift_noise : float
        Noise allowance of the least-area lift, in least-squares standard errors of each
        spectrum channel (:func:`_lift_tolerance`); 0 (the default) lifts every spectrum
        onto its lowest channel. The plain lift raises a noisy spectrum by its noise's
        lowest excursions, a nearly constant offset that costs a weak component most.
    lift_noise_sweeps : "all" or "last"
        Where the allowance applies: in every sweep, or only in the last one (the sweeps
        then follow the plain lift and only the reported spectra are lowered). Measured on
        the scene family with ``lift_noise=2`` (2026-12-02, 2-core VM;
        benchmarks/RESULTS.md): "all" raised the worst cosine of the minor-phase maps from
        0.84-0.96 to 0.98-0.99 and of the gradients from 0.89-0.95 to 0.99 and lowered the
        abundance error on 16 of 18 maps, but cuts deeper into the wings of broad bands
        (worst cosine 0.974-0.978 to 0.962-0.968) and raised the abundance error on two
        overlapping-band maps (2.0 to 2.6 and 3.1x the floor); "last" raised the minor
        phase to 0.92-0.99 and changed abundances and classes little, but lost 0.005 of
        cosine on one broad-band map and 0.09-0.16x the floor of abundance on two
        low-count maps. Neither wins on every kind, so neither is the default.

    Notes
    -----
    Takes a :class:`RamanMap` or an array of spectra (n_spectra, n_shift), one per row;
    for arrays the background polynomials live on the axis given as
    ``fit(X, raman_shift=...)`` (default: the channel index, the same polynomials as any
    evenly spaced axis). The sweeps use all spectra at once (no ``partial_fit``);
    ``transform`` is pixel by pixel, the same by blocks as at once.

    Attributes
    ----------
    components_ : array (n_components, n_shift), unit maximum
    fit_images_ : array (n_components, ny, nx) or (n_spectra, n_components)
    baseline_order_ : int
        Order of the background terms of the images (and of :meth:`transform`).
    spectra_baseline_order_ : int
        Order of the background terms the spectra were resolved with.
    start_pixels_ : array of int
        Flat indices (among the good pixels) of the starting pure pixels (with ``start``:
        the pixels given).
    start_passes_ : int
        Passes over the blocks the last :meth:`start_from_blocks` took (set only by it).
    lack_of_fit_ : float
        100·‖D − C Sᵀ − B Pᵀ‖ / ‖D − B Pᵀ‖ in %.
    noise_lack_of_fit_ : float
        The lack of fit that shot noise alone leaves, for data in counts: the same ratio
        with the Poisson variance (the counts) in the numerator, reduced by the channels
        the fit spends per spectrum (components and background terms). A lack of fit near
        it means the residual is noise; with strong fluorescence both are large.

    Examples
    --------
    >>> s = np.linspace(0, 1, 120)
    >>> S = np.stack([np.exp(-0.5 * ((s - c) / 0.02) ** 2) for c in (0.3, 0.7)])
    >>> rng = np.random.default_rng(0)
    >>> C = rng.dirichlet([1, 1], 60); C[:2] = np.eye(2)
    >>> X = C @ S + 0.5 + 0.3 * s + rng.normal(0, 1e-3, (60, 120))
    >>> m = RamanMap(X.reshape(6, 10, 120), raman_shift=s, x=np.arange(10.), y=np.arange(6.))
    >>> est = BackgroundMCR(n_components=2, baseline_order=1).fit(m)
    >>> bool(np.sort(est.components_ @ S.T / np.linalg.norm(est.components_, axis=1)[:, None]
    ...              / np.linalg.norm(S, axis=1), axis=None)[-2] > 0.99)
    True

    The same spectra as rows, on the same axis, give the same concentrations:

    >>> rows = BackgroundMCR(n_components=2, baseline_order=1).fit(X, raman_shift=s)
    >>> bool(np.allclose(rows.transform(X), est.transform(m).reshape(2, -1).T))
    True
    """

    def __init__(self, n_components: int = 4, baseline_order="auto", max_iter: int = 25,
                 random_state: int = 0, lift_noise: float = 0.0,
                 lift_noise_sweeps: str = "all"):
        self.n_components = n_components
        self.baseline_order = baseline_order
        self.max_iter = max_iter
        self.random_state = random_state
        self.lift_noise = lift_noise
        self.lift_noise_sweeps = lift_noise_sweeps

    def _start(self, X, Q):
        from .endmembers import successive_projections

        Xp = X - (X @ Q) @ Q.T
        # the leading principal directions of the background-free spectra (uncentred: the
        # mixing is linear, not affine, once the background is gone)
        # (the leading eigenvectors of the channel Gram matrix: the subspace of a thin SVD
        # of the spectra, at a small fraction of its cost on tens of thousands of spectra)
        Xs = Xp[:: max(1, Xp.shape[0] // 20000)]
        V = np.linalg.eigh(Xs.T @ Xs)[1][:, ::-1][:, : self.n_components].T
        scores = Xp @ V.T
        idx = successive_projections(scores, self.n_components)
        return least_area_lift(scores[idx] @ V, Q), idx

    def __sklearn_tags__(self):
        return float64_tags(super().__sklearn_tags__())

    def start_from_blocks(self, blocks, raman_shift):
        """The start of :meth:`fit` computed on spectra given block by block, for a fit on a
        sample of them: ``blocks()`` returns a fresh iterable of arrays (n_i, n_shift), one
        per block (called once per pass). Returns ``(spectra, rows)`` for
        ``fit(..., start=...)``: the start spectra and the purest rows (indices into the
        blocks' rows, concatenated). Fitted on a 50 % sample with this start instead of the
        sample's own, the blend map's MCR moved less from the full fit (tests/test_stream.py).

        The leading eigenvectors of the channel Gram matrix of the background-free spectra
        come from a subspace iteration where it converges fast (Halko, Martinsson & Tropp
        2011, SIAM Rev. 53:217, algorithm 4.4 with a Rayleigh-Ritz step, section 5.2): the
        first pass forms the Gram matrix of every ``START_GRAM_STRIDE``-th spectrum; if its
        eigenvalues leave a clear gap below the leading ``n_components`` (the iteration then
        shrinks the error by at least ``START_TOLERANCE ** (1 / START_MAX_PASSES)`` per pass),
        every further pass multiplies its ``n_components + START_OVERSAMPLING`` leading
        eigenvectors by the whole Gram matrix block by block, until every leading Ritz
        pair's residual is below ``START_TOLERANCE`` of its value, and the last pass's
        products are the scores (measured 2026-12-02 on the 128 000 spectra of 1024
        channels of the c128 bench cube: 4 passes instead of 2, about a quarter of the
        operations, the same purest rows, start spectra within 3e-8 of the whole
        matrix's; benchmarks/RESULTS.md). Without that gap (leading components down in
        the noise, where any small change swaps near-tied purest pixels), or if the
        iteration has not converged after ``START_MAX_PASSES`` passes, the whole Gram
        matrix is formed in one pass and every spectrum scored in another. Per spectrum
        and per channel only: the same start for any block size."""
        import scipy.linalg

        from .endmembers import successive_projections
        from .unmix import polynomial_basis

        k = self.n_components
        order = self.baseline_order
        if order == "auto":   # the spectra's order, as in fit
            order = int(max(0, min(SPECTRA_ORDER, len(raman_shift) // 4 - k - 1)))
        Q = polynomial_basis(raman_shift, int(order))
        n = len(raman_shift)
        width = min(n - Q.shape[1] - 1, k + START_OVERSAMPLING)

        def gram(stride):
            G, seen = np.zeros((n, n)), 0
            for X in blocks():   # every stride-th spectrum, counted across blocks
                X = np.asarray(X)
                Xp = np.asarray(X[(-seen) % stride::stride], np.float64)
                seen += len(X)
                Xp = Xp - (Xp @ Q) @ Q.T
                G += Xp.T @ Xp
            return G

        passes, scores = 0, None
        if width >= k:   # (else too few channels beside the polynomials to iterate on)
            theta, Z = scipy.linalg.eigh(gram(START_GRAM_STRIDE),
                                         subset_by_index=[n - width - 1, n - 1])
            passes = 1
        # the Gram matrix's eigenvalue below the subspace against the smallest leading one
        if passes and theta[0] <= START_TOLERANCE ** (1 / START_MAX_PASSES) * max(theta[-k], 0):
            Z = np.linalg.qr(Z[:, 1:] - Q @ (Q.T @ Z[:, 1:]))[0]   # ⟂ polynomials: X Z = Xp Z
            buf = np.empty((0, n))   # one float64 copy of a block, reused
            for passes in range(2, START_MAX_PASSES + 2):
                GZ, Y = np.zeros((n, width)), []
                for X in blocks():
                    X = np.asarray(X)
                    if len(X) > len(buf):
                        buf = np.empty((len(X), n))
                    Xb = buf[:len(X)]
                    Xb[...] = X
                    Y.append(Xb @ Z)
                    GZ += Xb.T @ Y[-1]
                GZ -= Q @ (Q.T @ GZ)                  # Xpᵀ Xp Z
                theta, U = np.linalg.eigh(Z.T @ GZ)   # Rayleigh-Ritz on span(Z)
                theta, U = theta[::-1][:k], U[:, ::-1][:, :k]
                if np.all(np.linalg.norm(GZ @ U - (Z @ U) * theta, axis=0)
                          <= START_TOLERANCE * np.abs(theta)):
                    V, scores = (Z @ U).T, np.concatenate(Y) @ U   # Xp Vᵀ from this pass
                    break
                Z = np.linalg.qr(GZ)[0]
        if scores is None:   # the whole Gram matrix, then every spectrum's scores
            V = np.linalg.eigh(gram(1))[1][:, ::-1][:, :k].T
            scores = np.concatenate([(Xp - (Xp @ Q) @ Q.T) @ V.T for Xp in
                                     (np.asarray(X, np.float64) for X in blocks())])
            passes += 2
        self.start_passes_ = passes
        idx = successive_projections(scores, k)
        return least_area_lift(scores[idx] @ V, Q), idx

    def fit(self, m, y=None, raman_shift=None, start=None):
        """Fit on a map or on spectra as rows (``raman_shift``: their axis, arrays only);
        ``start``: ``(spectra, pixels)`` from :meth:`start_from_blocks` instead of the
        purest pixels of these spectra."""
        from .unmix import (baseline_terms, check_baseline_order, choose_baseline_order,
                            polynomial_basis)

        X, good, mp = spectra_in(self, m, what="MCR-ALS", reset=True)
        check_components(self.n_components, X.shape[1] if mp is None else mp, X.shape[0])
        shift = axis_of(mp, X.shape[1], raman_shift)
        order = check_baseline_order(self.baseline_order)
        if order is None:
            raise MapkitError("background MCR needs background terms", field="baseline_order",
                              fix="give an order (0 for a constant) or auto; for none use MCRALS")
        check_baseline_room(baseline_terms(order), X.shape[1], "baseline_order")
        _check_lift_noise(self.lift_noise, self.lift_noise_sweeps)
        auto = order == "auto"
        if auto:   # keep at least four channels per fitted term, as the order choice does
            order = int(max(0, min(SPECTRA_ORDER, X.shape[1] // 4 - self.n_components - 1)))
        Q = polynomial_basis(shift, int(order))
        if start is None:
            S, idx = self._start(X, Q)
        else:
            S, idx = np.array(start[0], dtype=np.float64), np.asarray(start[1])
        Xp = X - (X @ Q) @ Q.T
        for sweep in range(self.max_iter):
            C = nnls_batch((S - (S @ Q) @ Q.T).T, Xp.T, tol=1e-6).T
            background = (X - C @ S) @ Q                 # polynomial coefficients per pixel
            D = X - background @ Q.T
            S = nnls_batch(C, D, tol=1e-6)
            S = least_area_lift(S, Q, _sweep_tolerance(self, sweep, C, D, S))
            scale = S.max(axis=1, keepdims=True)
            S = S / np.where(scale > 0, scale, 1.0)
        # where the sweeps stop inside the band of feasible solutions: the spectra of least
        # area, then the images that vanish in other components' pure pixels
        # (benchmarks/RESULTS.md, "Background MCR: a rotation after the sweeps")
        S = pure_pixel_rotation(least_area_rotation(S, Q), Xp, Q)
        scale = S.max(axis=1, keepdims=True)
        S = S / np.where(scale > 0, scale, 1.0)
        self.spectra_baseline_order_ = int(order)
        if auto:   # the images: the order these spectra support, shot-noise weights
            order = choose_baseline_order(S, X, shift, random_state=self.random_state)
            check_baseline_room(baseline_terms(order), X.shape[1], "baseline_order")
            Q = polynomial_basis(shift, order)
            Xp = X - (X @ Q) @ Q.T
        Sp = S - (S @ Q) @ Q.T
        self.components_ = S
        self.baseline_order_ = int(order)
        C = self._images(X, shift).T
        self.start_pixels_ = idx
        norm_p = np.linalg.norm(Xp) or 1.0
        self.lack_of_fit_ = float(100 * np.linalg.norm(Xp - C @ Sp) / norm_p)
        # E‖noise‖² of Poisson counts is their sum; the fit absorbs its share of it in the
        # components and background terms it spends per spectrum (common practice: the
        # expected residual sum of squares of a linear fit, sigma²·(n − p))
        n_ch = X.shape[1]
        kept = max(n_ch - Q.shape[1] - S.shape[0], 0) / n_ch
        self.noise_lack_of_fit_ = float(100 * np.sqrt(np.clip(X, 0, None).sum() * kept) / norm_p)
        self.raman_shift_ = np.array(shift, dtype=float)
        self.n_iter_ = self.max_iter
        self.fit_images_ = rows_out(C, good, mp)
        return self

    def fit_transform(self, m, y=None, raman_shift=None) -> np.ndarray:
        return self.fit(m, raman_shift=raman_shift).fit_images_

    def transform(self, m) -> np.ndarray:
        """Concentration images (n_components, ny, nx) of a map on the same axis, or rows
        (n_spectra, n_components) of spectra on the fitted axis."""
        check_is_fitted(self)
        if isinstance(m, RamanMap) and (m.shape[-1] != self.raman_shift_.size or not
                                        np.allclose(m.raman_shift, self.raman_shift_)):
            raise MapkitError("the map's shift axis differs from the one the model was fitted on",
                              file=m.source, field="raman_shift", fix="fit on this map")
        X, good, mp = spectra_in(self, m, what="MCR-ALS", reset=False)
        shift = self.raman_shift_ if mp is None else mp.raman_shift
        return rows_out(self._images(X, shift).T, good, mp)

    def _images(self, X, shift):
        """Concentrations (k, m): with the automatic order weighted for shot noise."""
        if self.baseline_order == "auto":
            return unmix_spectra_poisson(self.components_, X, shift, self.baseline_order_)[0]
        return unmix_spectra(self.components_, X, shift, self.baseline_order_,
                             residual=False)[0]

    def result(self, m: RamanMap, images=None, name: str = "mcr") -> Result:
        comp = _component_axis(self.n_components)
        images = self.fit_images_ if images is None else images
        return Result(name, "mcr_als_background", self.get_params(), {
            "images": Field("concentration", images, (comp, *image_axes(m)), "a.u.",
                            long_name="MCR-ALS concentration (background fitted per pixel)"),
            "spectra": Field("spectrum", self.components_, (comp, shift_axis(m)), "a.u.",
                             long_name="MCR-ALS spectrum (unit maximum)")},
            {"lack_of_fit_pct": self.lack_of_fit_,
             "noise_lack_of_fit_pct": self.noise_lack_of_fit_,
             "baseline_order": self.baseline_order_,
             "spectra_baseline_order": self.spectra_baseline_order_, "n_iter": self.n_iter_})


#: Singular value ÷ noise edge above which a component counts as above the noise.
GUIDANCE_MARGIN = 1.1


#: Singular values the guidance reports by default (the last of them reads the noise level
#: in :func:`choose_n_components`).
GUIDANCE_VALUES = 12


def component_number_guidance(m: RamanMap, max_components: int = GUIDANCE_VALUES, *,
                              baseline_order: int = 10,
                              margin: float = GUIDANCE_MARGIN, n_iter: int = 200) -> dict:
    """How many components of a map in counts stand above the shot noise.

    The despiked counts (background kept) are biwhitened: rows and columns are scaled so
    that the Poisson variance estimate (the counts themselves, at least 1) has unit mean in
    every pixel and every channel (Sinkhorn scaling; Landa, Zhang & Kluger 2022, SIAM J.
    Math. Data Sci. 4:1420, "Biwhitening reveals the rank of a count matrix"). After the
    polynomial background terms (orthonormal, per pixel, on the scaled axis) are projected
    out, pure noise has singular values no larger than √m + √n (m pixels, n channels less
    the background terms: the edge of the Marchenko-Pastur law, Marchenko & Pastur 1967,
    Math. USSR Sb. 1:457); each singular value above ``margin`` times that edge is a
    component the data can resolve. The edge is scaled by the noise level read from the
    ``GUIDANCE_VALUES``-th value (past the components, whatever ``max_components``), so
    that counts read through a detector gain, whose noise sits at 1/√gain of the Poisson
    edge, are counted alike. Diagonal scaling keeps the rank of the signal, so the
    count is that of the Raman components plus any background the polynomials miss
    (too low a ``baseline_order`` shows up as extra components).

    A component confined to a few pixels may carry less energy than the noise edge: it is
    then not counted, and a factorisation with that many components cannot resolve it
    either (measured on the scene family's low-count cell: benchmarks/RESULTS.md).

    Parameters
    ----------
    m : RamanMap
        Despiked map in counts, with its background (e.g. ``Recipe.minimal()``).
    max_components : int
        Singular values reported.
    baseline_order : int
        Polynomial order of the background projected out.
    margin : float
        Ratio to the noise edge a component must exceed.

    Returns
    -------
    dict with ``ratios`` (the leading singular values ÷ the noise edge, descending),
    ``noise_level`` (the ``GUIDANCE_VALUES``-th; 1 when the map has fewer) and ``n_components``
    (how many exceed ``margin`` times ``noise_level``).

    Examples
    --------
    >>> s = np.linspace(0, 1, 200)
    >>> S = np.stack([np.exp(-0.5 * ((s - c) / 0.01) ** 2) for c in (0.3, 0.5, 0.7)]) * 40
    >>> rng = np.random.default_rng(0)
    >>> C = rng.dirichlet([1, 1, 1], 400)
    >>> X = rng.poisson(C @ S + 100 + 50 * s).astype(float)
    >>> m = RamanMap(X.reshape(20, 20, 200), raman_shift=s * 1000, x=np.arange(20.),
    ...              y=np.arange(20.))
    >>> component_number_guidance(m, baseline_order=2)["n_components"]
    3
    """
    from .unmix import check_baseline_order, polynomial_basis

    order = check_baseline_order(baseline_order)
    if not isinstance(order, int):
        raise MapkitError(f"the guidance needs a whole baseline order, not {baseline_order!r}",
                          field="baseline_order", fix="give an order such as 10")
    X, _ = good_spectra(m, what="component guidance")
    n_terms = order + 1
    if X.shape[1] <= n_terms + 1 or X.shape[0] < 2:
        raise MapkitError(f"{X.shape[0]} spectra of {X.shape[1]} channels are too few for "
                          f"{n_terms} background terms", file=m.source, field="baseline_order",
                          fix="use a lower baseline order")
    V = np.maximum(X, 1.0)                      # Poisson variance estimate
    row, col = np.ones(V.shape[0]), np.ones(V.shape[1])
    for _ in range(n_iter):                     # Sinkhorn: unit mean variance per row, column
        row = V.shape[1] / (V @ col)
        col = V.shape[0] / (V.T @ row)
    Y = np.sqrt(row)[:, None] * X * np.sqrt(col)[None]
    Q = np.linalg.qr(np.sqrt(col)[:, None] * polynomial_basis(m.raman_shift, order))[0]
    Y -= (Y @ Q) @ Q.T
    sv = np.linalg.svd(Y, compute_uv=False)
    edge = np.sqrt(Y.shape[0]) + np.sqrt(Y.shape[1] - n_terms)
    ratios = sv[:max_components] / edge
    # the noise level: the GUIDANCE_VALUES-th value, past the components whatever number
    # is reported (1 for pure Poisson counts; a detector gain of g electrons per unit
    # moves it to 1/sqrt(g))
    noise = float(sv[GUIDANCE_VALUES - 1] / edge) if len(sv) >= GUIDANCE_VALUES else 1.0
    return {"ratios": [float(r) for r in ratios],
            "n_components": int(np.sum(ratios > margin * noise)), "noise_level": noise,
            "baseline_order": order, "margin": float(margin)}


#: What ``n_components="auto"`` takes: at least AUTO_MIN and at most AUTO_MAX components
#: above the noise, and AUTO_FALLBACK where the map's noise does not behave like counts.
AUTO_MIN, AUTO_MAX, AUTO_FALLBACK = 2, 10, 4

#: The range of the noise level (12th singular value ÷ Poisson noise edge) for counts:
#: pure Poisson noise puts it just below 1; a detector gain of g electrons per unit at
#: 1/sqrt(g) (0.2: g = 25; 5: g = 0.04) and read noise above it; data scaled away from
#: counts (fractions, normalised spectra) fall outside.
COUNTS_NOISE_RANGE = (0.2, 5.0)


def choose_n_components(m: RamanMap, guidance: dict | None = None,
                        option: str = "--components") -> tuple[int, str]:
    """The number of components a factorisation of ``m`` (despiked, in counts, background
    kept) should have, and a line saying how it was found (``guidance``: the result of
    :func:`component_number_guidance` on ``m`` where it is at hand; ``option``: the
    command-line option the line tells the user to set).

    The count of :func:`component_number_guidance`, whose threshold is ``margin`` times the
    noise level read from its last reported singular value (well past the components: the
    top of the noise's own spectrum), so that a detector gain or read noise neither counts
    as components nor hides them.
    Where the level lies outside ``COUNTS_NOISE_RANGE`` (data scaled away from counts), or
    the map has fewer than ``GUIDANCE_VALUES`` spectra, the map says nothing and
    ``AUTO_FALLBACK`` is returned with a line telling the user to give the number.

    Examples
    --------
    >>> s = np.linspace(0, 1, 300)
    >>> S = np.stack([np.exp(-0.5 * ((s - c) / 0.01) ** 2) for c in (0.2, 0.4, 0.6, 0.8, 0.9)])
    >>> rng = np.random.default_rng(1)
    >>> X = rng.poisson(rng.dirichlet(np.ones(5), 900) @ (60 * S) + 200).astype(float)
    >>> m = RamanMap(X.reshape(30, 30, 300), raman_shift=400 + 1200 * s, x=np.arange(30.),
    ...              y=np.arange(30.))
    >>> choose_n_components(m)[0]
    5
    """
    g = component_number_guidance(m) if guidance is None else guidance
    ratios = np.asarray(g["ratios"])
    if len(ratios) < GUIDANCE_VALUES:   # no value past the components to read the noise from
        return AUTO_FALLBACK, (
            f"components: {AUTO_FALLBACK}, the fixed default: {len(ratios)} spectra are too "
            f"few to tell how many components stand above the noise; give {option} N")
    noise = g["noise_level"]
    lo, hi = COUNTS_NOISE_RANGE
    if not lo <= noise <= hi:
        return AUTO_FALLBACK, (
            f"components: {AUTO_FALLBACK}, the fixed default: the intensities do not look like "
            f"detector counts (their noise is {noise:.2g} times what counts would carry: "
            "scaled or normalised data?), so the map cannot tell how many components stand "
            f"above its noise; give {option} N")
    above = g["n_components"]
    k = int(min(max(above, AUTO_MIN), AUTO_MAX))
    return k, (f"components: {k}, chosen from the data ({above} singular values of the "
               f"biwhitened counts above {g['margin']:g} times the noise edge"
               + (f"; at least {AUTO_MIN}" if above < AUTO_MIN else "")
               + (f"; at most {AUTO_MAX}" if above > AUTO_MAX else "")
               + f"); a component hidden in the noise is not counted: give {option} N "
               "to override")
