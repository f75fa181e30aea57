"""Segmentation of the map into spectral classes, guidance for their number, domains."""

from __future__ import annotations

import numpy as np
from sklearn.base import BaseEstimator, ClusterMixin
from sklearn.utils.metaestimators import available_if
from sklearn.utils.validation import check_is_fitted

from ..core.ramanmap import RamanMap
from ..core.result import Axis, Field, Result
from ..errors import DataError, MapkitError
from ._common import (check_components, good_spectra, image_axes, rows_out, shift_axis,
                      spectra_in, to_images)

METHODS = ("kmeans", "minibatch", "ward")
#: Ward clustering needs O(n²) memory; above this many pixels it is fitted on a random
#: sample and the other pixels join the class with the nearest centre.
WARD_MAX_PIXELS = 15000


def _scores(m: RamanMap, n_pca: int, smooth: float, random_state: int, *, spectra=None):
    """PCA scores of the good pixels, optionally smoothed spatially (Gaussian, σ in pixels).

    ``spectra`` = (X, good, map or None) from :func:`spectra_in` replaces reading ``m``;
    returns (X, good, scores, the fitted PCA)."""
    from sklearn.decomposition import PCA

    X, good = good_spectra(m, what="classification") if spectra is None else spectra[:2]
    if spectra is not None:
        m = spectra[2]
    n_pca = max(1, min(n_pca, X.shape[0], X.shape[1]))
    pca = PCA(n_components=n_pca, random_state=random_state).fit(X)
    return X, good, _smoothed(m, pca.transform(X), good, smooth), pca


def _smoothed(m: RamanMap | None, S, good, smooth: float):
    """Scores smoothed over the map's grid (Gaussian, σ in pixels; masked pixels carry no
    weight); unchanged when ``smooth`` is 0."""
    from scipy.ndimage import gaussian_filter

    if smooth > 0:
        if m is None:
            raise DataError("spatial smoothing needs the map's grid, not spectra as rows",
                            field="smooth", fix="pass the RamanMap or use smooth=0")
        weight = (~m.mask).astype(float)
        wsm = gaussian_filter(weight, smooth, mode="nearest")
        imgs = to_images(m, S, good, fill=0.0)
        S = np.stack([(gaussian_filter(img, smooth, mode="nearest") /
                       np.maximum(wsm, 1e-12)).ravel()[good] for img in imgs], axis=1)
    return S


def _cluster(S, n, method, random_state, n_init, *, model=False):
    """Cluster labels of the score rows ``S``; with ``model`` also the fitted k-means
    (None for Ward) and the class centres in score space."""
    from sklearn.cluster import AgglomerativeClustering, KMeans, MiniBatchKMeans

    if method in ("kmeans", "minibatch"):
        km = (KMeans(n_clusters=n, n_init=n_init, random_state=random_state)
              if method == "kmeans" else
              MiniBatchKMeans(n_clusters=n, n_init=n_init, random_state=random_state,
                              batch_size=2048)).fit(S)
        return (km.labels_, km, km.cluster_centers_) if model else km.labels_
    rng = np.random.default_rng(random_state)
    sample = (np.sort(rng.choice(S.shape[0], WARD_MAX_PIXELS, replace=False))
              if S.shape[0] > WARD_MAX_PIXELS else np.arange(S.shape[0]))
    lab = AgglomerativeClustering(n_clusters=n, linkage="ward").fit_predict(S[sample])
    centres = np.stack([S[sample][lab == k].mean(axis=0) for k in range(n)])
    if sample.size < S.shape[0]:
        lab = _nearest(S, centres)
    return (lab, None, centres) if model else lab


def _nearest(S, centres):
    """Index of the nearest centre (Euclidean) for each row of ``S``."""
    return np.argmin(((S[:, None, :] - centres[None]) ** 2).sum(axis=-1), axis=1)


class _ClassMap(ClusterMixin, BaseEstimator):
    """What every class map shares: labels, class spectra, areas, domains, the result."""

    def _store(self, m: RamanMap | None, X, good, lab):
        n = self.n_classes
        self.labels_ = (np.asarray(lab, dtype=np.intp) if m is None else
                        to_images(m, lab[:, None], good, fill=-1)[0].astype(np.int16))
        # a class no pixel falls into keeps NaN spectra and a zero area (not an error)
        self.class_mean_ = np.full((n, X.shape[1]), np.nan)
        self.class_sd_ = np.full((n, X.shape[1]), np.nan)
        for k in range(n):
            if np.any(lab == k):
                self.class_mean_[k] = X[lab == k].mean(axis=0)
                self.class_sd_[k] = X[lab == k].std(axis=0)
        self.area_fraction_ = np.bincount(lab, minlength=n)[:n] / lab.size
        self.pixel_size_ = None if m is None else m.pixel_size
        self.spacing_ = None if m is None else m.spacing
        return self

    def fit_predict(self, m, y=None, **kwargs):
        """Fit and return ``labels_``: an image (ny, nx), -1 where masked, or one label
        per row for spectra as rows."""
        return self.fit(m, y, **kwargs).labels_

    def result(self, m: RamanMap, name: str | None = None) -> Result:
        cell = float(np.prod(m.spacing))     # µm² per pixel, µm³ per voxel of a volume
        unit = "volume_um3" if len(m.spacing) == 3 else "area_um2"
        cls = Axis("class", np.array([f"class {k + 1}" for k in range(self.n_classes)]))
        labels = Field("labels", self.labels_, image_axes(m), "",
                       long_name="class index (0-based, -1 masked)")
        spectra = Field("mean_spectrum", self.class_mean_, (cls, shift_axis(m)), "a.u.",
                        errors=self.class_sd_, long_name="class mean spectrum (errors: sd)")
        n_good = int((self.labels_ >= 0).sum())
        domains = class_domains(self.labels_, m.spacing, n_classes=self.n_classes)
        areas = {f"class {k + 1}": {"fraction_pct": float(100 * f),
                                    unit: float(f * n_good * cell),
                                    **domains[k]["summary"]}
                 for k, f in enumerate(self.area_fraction_)}
        domain_img = np.full(self.labels_.shape, -1, np.int32)
        offset = 0
        for k in range(self.n_classes):
            lab = domains[k]["labels"]
            domain_img[lab > 0] = lab[lab > 0] - 1 + offset
            offset += domains[k]["summary"]["domains"]
        return Result(name or self.method, self.method, self.get_params(),
                      {"labels": labels, "class_spectra": spectra,
                       "domains": Field("domain", domain_img, image_axes(m), "",
                                        long_name="connected domain index (-1 masked)")},
                      {"areas": areas})


class KMeansClasses(_ClassMap):
    """Spectral classes of the map, clustered on the leading PCA scores of its spectra.

    Parameters
    ----------
    n_classes : int
    method : {"kmeans", "minibatch", "ward"}
        k-means, mini-batch k-means (large maps) or hierarchical clustering with Ward
        linkage (fitted on at most 15 000 pixels; the rest join the nearest class centre).
    n_pca : int
        Principal components kept before clustering (noise reduction).
    smooth : float
        Spatial Gaussian smoothing of the scores before clustering, σ in pixels (0: none;
        needs a map, not spectra as rows).
    random_state, n_init

    Attributes
    ----------
    labels_ : int array (ny, nx) or (n_spectra,)
        Class of each pixel, -1 where masked (int16 image for a map; one label per row
        for spectra as rows); classes are numbered by size, largest first.
    pca_ : sklearn.decomposition.PCA
        The principal components the spectra are clustered on.
    centres_ : array (n_classes, n_pca)
        Class centres in the PCA scores (class k is row k).
    class_mean_, class_sd_ : arrays (n_classes, n_shift)
        Mean ± sd spectrum of each class.
    area_fraction_ : array (n_classes,)
        Share of the good pixels in each class.

    Notes
    -----
    Takes a :class:`RamanMap` or spectra as rows (n_spectra, n_shift). ``predict`` puts
    new spectra in the class of the nearest centre in the fitted PCA scores (the
    k-means rule): row by row, so a map predicted block by block gets the same labels as
    at once (without ``smooth``, which looks at neighbouring pixels). On the fitted
    spectra it returns ``labels_`` for k-means and mini-batch k-means; for Ward, whose
    classes come from the merge tree, the nearest centre may differ at class borders.
    ``partial_fit`` (``method="minibatch"`` only) refines the centres block by block
    (scikit-learn's ``MiniBatchKMeans.partial_fit``) on the PCA fitted on the first
    block; classes are then numbered as the centres were found, not by size.

    Examples
    --------
    On spectra as rows:

    >>> X = np.eye(3)[[2, 0, 0, 2, 0, 0, 2, 0]] + 0.01 * np.arange(8)[:, None]
    >>> KMeansClasses(n_classes=2, n_pca=2).fit_predict(X).tolist()   # largest class is 0
    [1, 0, 0, 1, 0, 0, 1, 0]

    On a map:

    >>> a = np.zeros((4, 6, 3)); a[:, 3:, 0] = 1; a[:, :3, 2] = 1
    >>> m = RamanMap(a, raman_shift=[1., 2., 3.], x=np.arange(6.), y=np.arange(4.))
    >>> KMeansClasses(n_classes=2, n_pca=2).fit(m).area_fraction_.tolist()
    [0.5, 0.5]
    """

    def __init__(self, n_classes: int = 4, method: str = "kmeans", n_pca: int = 8,
                 smooth: float = 0.0, random_state: int = 0, n_init: int = 10):
        self.n_classes = n_classes
        self.method = method
        self.n_pca = n_pca
        self.smooth = smooth
        self.random_state = random_state
        self.n_init = n_init

    def _check_method(self):
        if self.method not in METHODS:
            raise MapkitError(f"unknown classification method {self.method!r}", field="method",
                              fix=f"use one of {', '.join(METHODS)}")

    def fit(self, m, y=None):
        """Fit on a map's unmasked spectra or on spectra as rows (n_spectra, n_shift)."""
        self._check_method()
        spectra = spectra_in(self, m, what="classification", reset=True)
        X, good, S, pca = _scores(None, self.n_pca, self.smooth, self.random_state,
                                  spectra=spectra)
        mp = spectra[2]
        check_components(self.n_classes, X.shape[1] if mp is None else mp, X.shape[0],
                         name="n_classes")
        raw, model, centres = _cluster(S, self.n_classes, self.method, self.random_state,
                                       self.n_init, model=True)
        # number classes by size (largest first) so labels are stable and readable
        order = np.argsort(-np.bincount(raw, minlength=self.n_classes), kind="stable")
        relabel = np.empty_like(order)
        relabel[order] = np.arange(self.n_classes)
        self.pca_, self.model_, self._relabel = pca, model, relabel
        self.centres_ = centres[order]
        return self._store(mp, X, good, relabel[raw])

    @available_if(lambda self: self.method == "minibatch")
    def partial_fit(self, m, y=None):
        """Refine mini-batch k-means centres with one block (``method="minibatch"``).

        The first call fits the PCA on its block and starts the centres; ``labels_``,
        class spectra and areas describe the latest block.
        """
        from sklearn.cluster import MiniBatchKMeans

        self._check_method()
        if self.method != "minibatch":
            raise MapkitError(f"partial_fit needs method='minibatch', not {self.method!r}",
                              field="method", fix="use minibatch, or fit on a sample")
        first = not isinstance(getattr(self, "model_", None), MiniBatchKMeans)
        spectra = spectra_in(self, m, what="classification", reset=first)
        X, good, mp = spectra
        if first:
            check_components(self.n_classes, X.shape[1] if mp is None else mp, X.shape[0],
                             name="n_classes")
            _, _, S, self.pca_ = _scores(None, self.n_pca, 0.0, self.random_state,
                                         spectra=spectra)
            self.model_ = MiniBatchKMeans(n_clusters=self.n_classes, n_init=self.n_init,
                                          random_state=self.random_state, batch_size=2048)
            self._relabel = np.arange(self.n_classes)
        else:
            S = self.pca_.transform(X)
        S = _smoothed(mp, S, good, self.smooth) if self.smooth > 0 else S
        self.model_.partial_fit(S)
        inverse = np.argsort(self._relabel)
        self.centres_ = self.model_.cluster_centers_[inverse]
        return self._store(mp, X, good, self._relabel[self.model_.predict(S)])

    def predict(self, m) -> np.ndarray:
        """Class of each spectrum: the nearest class centre in the fitted PCA scores.

        Returns an int16 image (ny, nx) with -1 where masked for a map, or one label per
        row (n_spectra,) for spectra as rows.
        """
        check_is_fitted(self, "centres_")
        X, good, mp = spectra_in(self, m, what="classification", reset=False)
        S = _smoothed(mp, self.pca_.transform(X), good, self.smooth)
        if self.model_ is not None:
            lab = self._relabel[self.model_.predict(S)]
        else:
            lab = _nearest(S, self.centres_)
        if mp is None:
            return lab.astype(np.intp)
        return to_images(mp, lab[:, None], good, fill=-1)[0].astype(np.int16)


class DominantClasses(_ClassMap):
    """Classes that follow the dominant component: each pixel joins the component with
    the largest abundance, with a spatial prior that neighbours tend to share a class.

    Component images from a factorisation (NMF, MCR-ALS) or from unmixing carry an
    arbitrary scale per component, so each image is first divided by a pure level, and
    the images then read as shares of the pure materials:

    - ``scale="purest"`` (default): the ``n_purest``-th largest value of the image over
      the map (robust to a single outlier and valid for a phase of a few pixels). It
      assumes that every component is close to pure somewhere on the map (grains,
      domains, particles); on continuous mixtures without pure pixels the levels are
      underestimated by a different amount per component.
    - ``scale="closure"``: volume fractions sum to one, so the non-negative weights ``w``
      with ``Σ_k w_k·image_k ≈ 1`` over the map (NNLS) give the pure levels ``1/w_k``. It
      needs no pure pixel, but a collection efficiency that varies across the map
      (focus, surface relief) and happens to follow the composition biases it. Used only
      when the fit holds (relative RMS residual at most ``closure_tol`` and every weight
      positive); otherwise the purest level is used (``scale_source_`` says which).

    The class of each pixel is then its largest share, refined by iterated conditional
    modes on a Potts prior (Besag 1986, J. R. Stat. Soc. B 48:259): each pixel takes the
    class ``k`` that maximises ``share_k / σ + neighbour_weight · n_k``, where ``n_k`` is
    the number of its edge neighbours in class ``k`` and ``σ`` the noise of the shares
    (robust sd of their local second differences), updated in two interleaved halves of
    the grid until no pixel changes. Noise flips where two shares are close (boundaries,
    mixtures) are removed, while a small spot whose share stands far above the noise
    (a minor phase of one or two pixels) is kept. Spectra passed as rows have no grid:
    their class is the largest share.

    Measured on the scene family (6 kinds × seeds 0-2, the default command line's
    background-MCR images after their rotation; a measurement, 2026-12-02, 2-core x86_64
    VM, tables in benchmarks/RESULTS.md), adjusted Rand index against the largest fraction:

    =====================================  ==========  =========  ===========
    rule                                   median all  worst all  worst core
    =====================================  ==========  =========  ===========
    purest level, per pixel                0.893       0.362      0.345
    purest level, ``neighbour_weight=1``   0.916       0.676      0.704
    closure, per pixel                     0.941       0.720      0.803
    closure, ``neighbour_weight=1``        0.940       0.756      0.958
    =====================================  ==========  =========  ===========

    The default is the purest level with ``neighbour_weight=1``. The closure scale is
    better on 13 of those 18 maps but worse on 3 (a continuous gradient by 0.10), and on
    maps built differently (6 held-out maps) it was worse on 2 of them, by up to 0.34 (a
    low-count blend of gradients).

    Parameters
    ----------
    n_classes : int
        Number of component images (one class per component).
    n_purest : int
        Which largest value of each image is taken as its pure level (``scale="purest"``,
        and the fallback of ``"closure"``).
    scale : {"purest", "closure"}
        How each image's pure level is found (see above).
    closure_tol : float
        Largest relative RMS residual of the closure fit for it to be used.
    neighbour_weight : float
        Weight of one edge neighbour in the same class, in units of the shares' noise;
        0 gives the per-pixel largest share (no spatial prior).
    max_iter : int
        Most sweeps of iterated conditional modes.

    Attributes
    ----------
    labels_ : int array (ny, nx) or (n_spectra,)
        Class of each pixel (the index of its dominant component), -1 where masked.
    class_mean_, class_sd_ : arrays (n_classes, n_shift)
        Mean ± sd spectrum of each class (NaN for a class no pixel falls into).
    area_fraction_ : array (n_classes,)
    shares_ : array (n_classes, ny, nx) or (n_spectra, n_classes)
        The normalised abundances the classes were taken from.
    level_ : array (n_classes,)
        The pure level each image was divided by.
    scale_source_ : str
        ``"purest"`` or ``"closure"``: where ``level_`` came from.
    closure_residual_ : float
        Relative RMS residual of the closure fit (NaN with ``scale="purest"``).
    share_noise_ : float
        The noise σ of the shares the spatial prior is weighed against (NaN without one).
    n_iter_ : int
        Sweeps of iterated conditional modes run (0 without a spatial prior).
    mixing_at_purest_ : array (n_classes,)
        For each component, the other components' part of the shares at its own
        ``n_purest`` purest pixels: near 0 where the component is pure somewhere, large where
        it never is. Above :data:`NEVER_PURE` its pure level is likely underestimated and
        its class area overstated (:meth:`never_pure` lists them). On the truth images of
        the scene family (a measurement, 2026-12-02): grains and overlapping bands
        0.00-0.01, broad bands 0.00-0.15, the low-count cell 0.00-0.30, the minor phase
        0.12-0.32, gradients 0.18-0.38; a binder at 15-40 % in every pixel about 0.4.

    Notes
    -----
    Not a scikit-learn clusterer in the usual sense: the classes come from component
    weights passed to ``fit``, not from the spectra alone, so it is left out of
    scikit-learn's estimator checks (tests/test_estimator_checks.py).

    Examples
    --------
    >>> a = np.zeros((2, 3, 4)); a[:, :2, 0] = 1; a[:, 2:, 1] = 3
    >>> m = RamanMap(a, raman_shift=[1., 2., 3., 4.], x=np.arange(3.), y=np.arange(2.))
    >>> images = np.stack([a[..., 0], a[..., 1] / 3])
    >>> DominantClasses(n_classes=2).fit(m, images).labels_.tolist()
    [[0, 0, 1], [0, 0, 1]]

    On spectra as rows, with one row of weights per spectrum:

    >>> X, W = a.reshape(6, 4), images.reshape(2, 6).T
    >>> DominantClasses(n_classes=2).fit(X, W).labels_.tolist()
    [0, 0, 1, 0, 0, 1]
    """

    method = "dominant"

    def __init__(self, n_classes: int = 4, n_purest: int = 3, scale: str = "purest",
                 closure_tol: float = 0.25, neighbour_weight: float = 1.0,
                 max_iter: int = 20):
        self.n_classes = n_classes
        self.n_purest = n_purest
        self.scale = scale
        self.closure_tol = closure_tol
        self.neighbour_weight = neighbour_weight
        self.max_iter = max_iter

    def fit(self, m, images=None):
        """Classes of a map from its component images (n_classes, ny, nx), or of spectra
        as rows (n_spectra, n_shift) from their weights (n_spectra, n_classes), the
        layout the estimators' ``transform`` returns for rows."""
        if images is None:
            raise MapkitError("dominant-component classes need component images",
                              field="images", fix="pass the images of a factorisation or "
                                                  "unmixing of this map")
        images = np.asarray(images, float)
        X, good, mp = spectra_in(self, m, what="classification", reset=True)
        if mp is None:
            if images.shape != (X.shape[0], self.n_classes):
                raise DataError(f"component weights have shape {images.shape}, expected "
                                f"{(X.shape[0], self.n_classes)}", field="images",
                                fix="give one row of weights per spectrum, one column per class")
            A = np.nan_to_num(images.T)
        else:
            if images.shape != (self.n_classes, *mp.shape[:-1]):
                raise MapkitError(f"component images have shape {images.shape}, expected "
                                  f"{(self.n_classes, *mp.shape[:-1])}", field="images",
                                  fix="give one image per class on the map's grid")
            A = np.nan_to_num(images.reshape(self.n_classes, -1)[:, good])
        shares = self._shares(A)
        self.shares_ = rows_out(shares.T, good, mp)
        lab = self.labels_of(shares, good, None if mp is None else mp.shape[:-1])
        return self._store(mp, X, good, lab)

    def shares_of(self, images, good):
        """Each component image over its pure level, at the ``good`` pixels (flat mask):
        (n_classes, n_good); :meth:`labels_of` turns them into classes."""
        return self._shares(np.nan_to_num(
            np.asarray(images, float).reshape(self.n_classes, -1)[:, good]))

    def labels_of(self, shares, good, grid=None):
        """Class of each ``good`` pixel (n_good,) from its ``shares`` (n_classes, n_good):
        the largest share, refined by the spatial prior on the map's ``grid`` (its
        spatial shape; None for rows: no prior). ``good`` is a flat boolean mask or the
        sorted flat indices of the good pixels."""
        self.n_iter_, self.share_noise_ = 0, float("nan")
        lab = np.argmax(shares, axis=0) if shares.shape[1] else np.zeros(0, np.intp)
        if grid is None or self.neighbour_weight <= 0 or shares.shape[1] == 0:
            return lab
        grid = tuple(grid)
        good = np.asarray(good)
        if good.dtype != bool:     # sorted flat indices of the good pixels
            flat = np.zeros(int(np.prod(grid)), bool)
            flat[good] = True
            good = flat
        good = good.reshape(grid)
        sigma = _share_noise(shares, good)
        self.share_noise_ = sigma
        if not sigma > 0:          # noise-free shares: the largest one is certain
            return lab
        k = shares.shape[0]
        unary = np.zeros((k, *grid))
        unary[:, good] = shares / sigma
        L = np.full(grid, -1, np.intp)
        L[good] = lab
        half = np.indices(grid).sum(axis=0) % 2 == 0
        for it in range(1, max(1, int(self.max_iter)) + 1):
            changed = 0
            for part in (half, ~half):
                best = np.argmax(unary + self.neighbour_weight * _neighbour_counts(L, k), axis=0)
                upd = part & good & (best != L)
                L[upd] = best[upd]
                changed += int(upd.sum())
            self.n_iter_ = it
            if not changed:
                break
        return L[good]

    def _shares(self, A):
        if self.scale not in ("purest", "closure"):
            raise MapkitError(f"unknown pure-level rule {self.scale!r}", field="scale",
                              fix="use purest or closure")
        level = np.sort(A, axis=1)[:, -min(max(1, self.n_purest), A.shape[1])] if A.shape[1] \
            else np.ones(A.shape[0])
        level = np.where(level > 0, level, 1.0)
        self.scale_source_, self.closure_residual_ = "purest", float("nan")
        if self.scale == "closure" and A.shape[1] >= A.shape[0]:
            from scipy.optimize import nnls

            w, rnorm = nnls(A.T, np.ones(A.shape[1]))
            self.closure_residual_ = float(rnorm / np.sqrt(A.shape[1]))
            if np.all(w > 0) and self.closure_residual_ <= self.closure_tol:
                level, self.scale_source_ = 1.0 / w, "closure"
        self.level_ = level
        shares = A / level[:, None]
        self.mixing_at_purest_ = _mixing_at_purest(shares, self.n_purest)
        return shares

    def never_pure(self) -> list[int]:
        """The components never close to pure on the map they were fitted on: at their
        purest pixels the other components still hold more than :data:`NEVER_PURE` of the
        shares, so their class areas are likely overstated."""
        return [int(k) for k in np.flatnonzero(self.mixing_at_purest_ > NEVER_PURE)]


#: the other components' part of the shares at a component's purest pixels above which
#: it is taken as never close to pure (about 70 % at most in any pixel; see
#: ``DominantClasses.mixing_at_purest_``)
NEVER_PURE = 0.3


def _mixing_at_purest(shares, n_purest):
    """Per component, the mean part of the other components in the (clipped) shares of
    its ``n_purest`` largest pixels."""
    k, n = shares.shape
    out = np.full(k, np.nan)
    if n == 0:
        return out
    top = min(max(1, int(n_purest)), n)
    idx = np.argpartition(-shares, top - 1, axis=1)[:, :top]
    for c in range(k):
        s = np.clip(shares[:, idx[c]], 0.0, None)
        tot = s.sum(axis=0)
        part = np.divide(tot - s[c], tot, out=np.zeros_like(tot), where=tot > 0)
        out[c] = float(part.mean())
    return out


def _share_noise(shares, good):
    """Noise sd of share images: the median over components of the robust sd (MAD) of
    the second differences ``s_i − (s_{i−1} + s_{i+1})/2`` along every grid axis of
    length ≥ 3, between good pixels (white noise: sd·√1.5)."""
    grid = good.shape
    sds = []
    for s in shares:
        img = np.full(grid, np.nan)
        img[good] = s
        parts = []
        for ax in range(img.ndim):
            if grid[ax] < 3:
                continue
            cut = [slice(None)] * img.ndim

            def at(sl, ax=ax):
                c = list(cut)
                c[ax] = sl
                return img[tuple(c)]
            d = at(slice(1, -1)) - 0.5 * (at(slice(None, -2)) + at(slice(2, None)))
            parts.append(d[np.isfinite(d)])
        d = np.concatenate(parts) if parts else np.zeros(0)
        if d.size:
            sds.append(1.4826 * np.median(np.abs(d - np.median(d))) / np.sqrt(1.5))
    return float(np.median(sds)) if sds else 0.0


def _neighbour_counts(L, k):
    """For each class (k, *grid): how many edge neighbours of each pixel are in it
    (masked pixels, label -1, count for none)."""
    onehot = np.stack([L == j for j in range(k)]).astype(float)
    counts = np.zeros_like(onehot)
    for ax in range(1, onehot.ndim):
        if onehot.shape[ax] < 2:
            continue
        hi = [slice(None)] * onehot.ndim
        lo = list(hi)
        hi[ax], lo[ax] = slice(1, None), slice(None, -1)
        counts[tuple(lo)] += onehot[tuple(hi)]
        counts[tuple(hi)] += onehot[tuple(lo)]
    return counts


def class_domains(labels, pixel_size, *, connectivity: int = 1, n_classes: int | None = None):
    """Connected domains of each class and their sizes.

    Returns, for each class k, ``{"labels": int image (0 = not in a domain of k),
    "area_um2": array, "ecd_um": array, "summary": {...}}``. The equivalent circular
    diameter is ECD = 2·√(A/π). ``connectivity`` 1 joins edge neighbours, 2 also
    diagonal ones (3, in a volume, corner ones too).

    A 3-D label volume ``(nz, ny, nx)`` with ``pixel_size = (dz, dy, dx)`` gives domains
    in 3-D: ``"volume_um3"`` and the equivalent spherical diameter ``"esd_um"``,
    ESD = 2·(3V/(4π))^(1/3), in place of area and ECD (summary keys ``esd_*``).

    Examples
    --------
    >>> lab = np.array([[0, 0, 1], [0, 1, 1], [1, 1, 0]])
    >>> d = class_domains(lab, (1.0, 1.0))
    >>> d[0]["summary"]["domains"], d[1]["summary"]["domains"]
    (2, 1)
    """
    from scipy.ndimage import generate_binary_structure, label

    labels = np.asarray(labels)
    cell = float(np.prod(pixel_size))
    if len(pixel_size) != labels.ndim:
        raise ValueError(f"pixel_size {pixel_size} does not match labels of rank {labels.ndim}")
    three_d = labels.ndim == 3
    structure = generate_binary_structure(labels.ndim, min(connectivity, labels.ndim))
    out = []
    if n_classes is None:
        n_classes = int(labels.max()) + 1 if labels.size else 0
    for k in range(n_classes):
        lab, n = label(labels == k, structure=structure)
        counts = np.bincount(lab.ravel(), minlength=n + 1)[1:]
        size = counts * cell
        if three_d:
            d, tag, big = 2 * np.cbrt(3 * size / (4 * np.pi)), "esd", "largest_domain_um3"
        else:
            d, tag, big = 2 * np.sqrt(size / np.pi), "ecd", "largest_domain_um2"
        summary = {"domains": int(n)}
        if n:
            summary.update({f"{tag}_median_um": float(np.median(d)),
                            f"{tag}_mean_um": float(np.mean(d)),
                            f"{tag}_p90_um": float(np.percentile(d, 90)),
                            big: float(size.max())})
        if three_d:
            out.append({"labels": lab, "volume_um3": size, "esd_um": d, "summary": summary})
        else:
            out.append({"labels": lab, "area_um2": size, "ecd_um": d, "summary": summary})
    return out


def class_number_guidance(m: RamanMap, k_values=range(2, 9), *, n_pca: int = 8,
                          random_state: int = 0, sample: int = 5000) -> list[dict]:
    """Scores that help choose the number of classes, for each k in ``k_values``.

    k-means inertia (look for the elbow), mean silhouette (Rousseeuw 1987; higher is
    better) and the Davies–Bouldin index (Davies & Bouldin 1979; lower is better), both
    from scikit-learn, computed on at most ``sample`` pixels.
    """
    from sklearn.cluster import KMeans
    from sklearn.metrics import davies_bouldin_score, silhouette_score

    X, good, S, _ = _scores(m, n_pca, 0.0, random_state)
    rng = np.random.default_rng(random_state)
    idx = rng.choice(S.shape[0], min(sample, S.shape[0]), replace=False)
    rows = []
    for k in k_values:
        if k >= S.shape[0]:
            break
        km = KMeans(n_clusters=k, n_init=10, random_state=random_state).fit(S)
        lab = km.labels_[idx]
        if np.unique(lab).size < 2:
            continue
        rows.append({"k": int(k), "inertia": float(km.inertia_),
                     "silhouette": float(silhouette_score(S[idx], lab)),
                     "davies_bouldin": float(davies_bouldin_score(S[idx], lab))})
    return rows
