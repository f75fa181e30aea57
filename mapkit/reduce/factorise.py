"""Factorisations of a map into component spectra and images: PCA, NMF, MCR-ALS."""

from __future__ import annotations

import numpy as np
from sklearn.base import BaseEstimator, TransformerMixin

from ..core.ramanmap import RamanMap
from ..core.result import Axis, Field, Result
from ..errors import MapkitError
from ._common import check_components, good_spectra, image_axes, shift_axis, to_images
from .endmembers import vca
from .unmix import nnls_batch, unmix_spectra


def _component_axis(n, prefix="component"):
    return Axis("component", np.array([f"{prefix} {i + 1}" for i in range(n)]))


class PCAScores(TransformerMixin, BaseEstimator):
    """Principal component analysis of the map's spectra (mean-centred).

    Use the explained variance to choose how many components or classes a map holds.

    Attributes
    ----------
    components_ : array (n_components, n_shift)
        Loadings on the shift axis.
    explained_variance_ratio_ : array (n_components,)
    mean_ : array (n_shift,)
    """

    def __init__(self, n_components: int = 10, random_state: int = 0):
        self.n_components = n_components
        self.random_state = random_state

    def fit(self, m: RamanMap, y=None):
        from sklearn.decomposition import PCA

        X, good = good_spectra(m, what="PCA")
        check_components(self.n_components, m, X.shape[0])
        # exact eigendecomposition of the channel covariance: fast when pixels outnumber
        # channels (the usual map), and no randomised approximation
        solver = "covariance_eigh" if X.shape[0] >= X.shape[1] else "full"
        self.model_ = PCA(n_components=self.n_components, svd_solver=solver,
                          random_state=self.random_state).fit(X)
        self.components_ = self.model_.components_
        self.explained_variance_ratio_ = self.model_.explained_variance_ratio_
        self.mean_ = self.model_.mean_
        return self

    def transform(self, m: RamanMap) -> np.ndarray:
        X, good = good_spectra(m, what="PCA")
        return to_images(m, self.model_.transform(X), good)

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

    Parameters
    ----------
    n_components : int
    init : {"nndsvda", "vca"}
        NNDSVD-a (scikit-learn) or the purest pixels found by VCA.
    batch_size : int, optional
        Use MiniBatchNMF with this many spectra per batch (large maps).
    max_iter, random_state
        Passed to scikit-learn; the seed is fixed so runs repeat exactly.
    image_baseline_order : int or None
        Polynomial order of the baseline terms when computing images (None: no terms).

    Attributes
    ----------
    components_ : array (n_components, n_shift)
        Component spectra, each scaled to unit maximum.
    fit_images_ : array (n_components, ny, nx)
        Component images of the fitted map (NaN where masked).
    reconstruction_err_ : float
        Frobenius norm of X − WH on the fitted pixels.

    Examples
    --------
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

    def fit(self, m: RamanMap, y=None):
        from sklearn.decomposition import NMF, MiniBatchNMF

        X, good = good_spectra(m, what="NMF")
        check_components(self.n_components, m, X.shape[0])
        if self.init not in ("nndsvda", "vca"):
            raise MapkitError(f"unknown NMF start {self.init!r}", field="init",
                              fix="use nndsvda or vca")
        Xc = np.clip(X, 0, None)
        kw = dict(n_components=self.n_components, max_iter=self.max_iter,
                  random_state=self.random_state, tol=1e-6)
        if self.batch_size:
            model = MiniBatchNMF(batch_size=self.batch_size, init="nndsvda" if self.init == "nndsvda"
                                 else "custom", **kw)
        else:
            model = NMF(init="nndsvda" if self.init == "nndsvda" else "custom", **kw)
        if self.init == "vca":
            H0 = Xc[vca(Xc, self.n_components, random_state=self.random_state)] + 1e-9
            W0 = np.clip(nnls_batch(H0.T, Xc.T).T, 1e-9, None)
            model.fit_transform(Xc, W=W0, H=H0)
        else:
            model.fit_transform(Xc)
        H = model.components_
        scale = H.max(axis=1, keepdims=True)
        scale[scale == 0] = 1.0
        self.model_ = model
        self.components_ = H / scale
        self.raman_shift_ = m.raman_shift.copy()
        self.reconstruction_err_ = float(getattr(model, "reconstruction_err_", np.nan))
        self.n_iter_ = int(model.n_iter_)
        self.fit_images_ = self.transform(m)
        return self

    def fit_transform(self, m: RamanMap, y=None) -> np.ndarray:
        """Fit and return the fitted map's component images (n_components, ny, nx)."""
        return self.fit(m).fit_images_

    def transform(self, m: RamanMap) -> np.ndarray:
        """Component images (n_components, ny, nx) of any map on the same axis; masked NaN."""
        X, good = good_spectra(m, what="NMF")
        A, _ = unmix_spectra(self.components_, X, m.raman_shift, self.image_baseline_order)
        return to_images(m, A.T, good)

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
    lack_of_fit_ : float
        100·‖D − C Sᵀ‖ / ‖D‖ in %.
    explained_variance_ : float
        100·(1 − ‖D − C Sᵀ‖² / ‖D‖²) in %.
    n_iter_ : int
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

    def fit(self, m: RamanMap, y=None):
        X, good = good_spectra(m, what="MCR-ALS")
        check_components(self.n_components, m, X.shape[0])
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
        self.raman_shift_ = m.raman_shift.copy()
        self.fit_images_ = to_images(m, C, good)
        return self

    def _concentrations(self, S, X):
        """Non-negative concentrations of spectra X on S, closed to one when asked."""
        C = nnls_batch(S.T, X.T).T
        if self.closure:
            total = C.sum(axis=1, keepdims=True)
            C = np.divide(C, total, out=np.zeros_like(C), where=total > 0)
        return C

    def transform(self, m: RamanMap) -> np.ndarray:
        X, good = good_spectra(m, what="MCR-ALS")
        return to_images(m, self._concentrations(self.components_, X), good)

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


def least_area_lift(S, Q):
    """Add to each row of ``S`` the combination of the columns of ``Q`` that makes it
    non-negative with the least area (a linear programme per row, HiGHS via scipy).

    A pixel-wise free polynomial background leaves the polynomial part of a component
    spectrum undetermined by the data; the spectrum that sits on zero between its bands
    (least area while non-negative) is the usual convention for Raman spectra (common
    practice). Rows where the programme fails are clipped at zero instead.
    """
    from scipy.optimize import linprog

    out = np.clip(S, 0, None)
    cost = Q.sum(axis=0)
    for k, s in enumerate(S):
        res = linprog(cost, A_ub=-Q, b_ub=s, bounds=[(None, None)] * Q.shape[1],
                      method="highs")
        if res.status == 0:
            out[k] = np.maximum(s + Q @ res.x, 0.0)
    return out


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

    Parameters
    ----------
    n_components : int
    baseline_order : int or "auto"
        Polynomial order of the background; "auto" chooses it on the map
        (:func:`~mapkit.reduce.unmix.choose_baseline_order` against provisional spectra).
    max_iter : int
        Alternating least-squares sweeps after the start. More sweeps improve the spectra
        of maps without pure pixels but let abundances drift on maps with them; 25 was the
        best compromise on the scene family (benchmarks/bench_accuracy.py).
    random_state : int
        Seed of the pixel sample the background order is chosen on.

    Attributes
    ----------
    components_ : array (n_components, n_shift), unit maximum
    fit_images_ : array (n_components, ny, nx)
    baseline_order_ : int
    start_pixels_ : array of int
        Flat indices (among the good pixels) of the starting pure pixels.
    lack_of_fit_ : float
        100·‖D − C Sᵀ − B Pᵀ‖ / ‖D − B Pᵀ‖ in %.

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
    """

    def __init__(self, n_components: int = 4, baseline_order="auto", max_iter: int = 25,
                 random_state: int = 0):
        self.n_components = n_components
        self.baseline_order = baseline_order
        self.max_iter = max_iter
        self.random_state = random_state

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

    def fit(self, m: RamanMap, y=None):
        from .unmix import check_baseline_order, choose_baseline_order, polynomial_basis

        X, good = good_spectra(m, what="MCR-ALS")
        check_components(self.n_components, m, X.shape[0])
        order = check_baseline_order(self.baseline_order)
        if order is None:
            raise MapkitError("background MCR needs background terms", field="baseline_order",
                              fix="give an order (0 for a constant) or auto; for none use MCRALS")
        if order == "auto":
            # provisional spectra from a moderate background, then the order they support
            S, _ = self._start(X, polynomial_basis(m.raman_shift, 6))
            order = choose_baseline_order(S, X, m.raman_shift, random_state=self.random_state)
        Q = polynomial_basis(m.raman_shift, int(order))
        S, idx = self._start(X, Q)
        Xp = X - (X @ Q) @ Q.T
        for _ in range(self.max_iter):
            C = nnls_batch((S - (S @ Q) @ Q.T).T, Xp.T, tol=1e-6).T
            background = (X - C @ S) @ Q                 # polynomial coefficients per pixel
            S = least_area_lift(nnls_batch(C, X - background @ Q.T, tol=1e-6), Q)
            scale = S.max(axis=1, keepdims=True)
            S = S / np.where(scale > 0, scale, 1.0)
        Sp = S - (S @ Q) @ Q.T
        C = nnls_batch(Sp.T, Xp.T).T
        self.components_ = S
        self.baseline_order_ = int(order)
        self.start_pixels_ = idx
        self.lack_of_fit_ = float(100 * np.linalg.norm(Xp - C @ Sp) / (np.linalg.norm(Xp) or 1))
        self.raman_shift_ = m.raman_shift.copy()
        self.n_iter_ = self.max_iter
        self.fit_images_ = to_images(m, C, good)
        return self

    def fit_transform(self, m: RamanMap, y=None) -> np.ndarray:
        return self.fit(m).fit_images_

    def transform(self, m: RamanMap) -> np.ndarray:
        """Concentration images (n_components, ny, nx) of a map on the same axis."""
        if m.shape[2] != self.raman_shift_.size or not np.allclose(m.raman_shift,
                                                                    self.raman_shift_):
            raise MapkitError("the map's shift axis differs from the one the model was fitted on",
                              file=m.source, field="raman_shift", fix="fit on this map")
        X, good = good_spectra(m, what="MCR-ALS")
        A, _ = unmix_spectra(self.components_, X, m.raman_shift, self.baseline_order_)
        return to_images(m, A.T, good)

    def result(self, m: RamanMap, images=None, name: str = "mcr") -> Result:
        comp = _component_axis(self.n_components)
        images = self.fit_images_ if images is None else images
        return Result(name, "mcr_als_background", self.get_params(), {
            "images": Field("concentration", images, (comp, *image_axes(m)), "a.u.",
                            long_name="MCR-ALS concentration (background fitted per pixel)"),
            "spectra": Field("spectrum", self.components_, (comp, shift_axis(m)), "a.u.",
                             long_name="MCR-ALS spectrum (unit maximum)")},
            {"lack_of_fit_pct": self.lack_of_fit_, "baseline_order": self.baseline_order_,
             "n_iter": self.n_iter_})
