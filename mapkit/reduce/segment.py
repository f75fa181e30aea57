"""Segmentation of the map into spectral classes."""

from __future__ import annotations

import numpy as np
from sklearn.base import BaseEstimator, ClusterMixin

from ..core.ramanmap import RamanMap
from ..core.result import Axis, Field, Result
from ._common import check_components, good_spectra, image_axes, shift_axis, to_images


class KMeansClasses(ClusterMixin, BaseEstimator):
    """k-means classes of the map's spectra, clustered on their leading PCA scores.

    Parameters
    ----------
    n_classes : int
    n_pca : int
        Number of principal components kept before clustering (noise reduction).
    random_state : int
    n_init : int

    Attributes
    ----------
    labels_ : int array (ny, nx)
        Class of each pixel, -1 where masked.
    class_mean_, class_sd_ : arrays (n_classes, n_shift)
        Mean ± sd spectrum of each class.
    area_fraction_ : array (n_classes,)
        Share of the good pixels in each class.

    Examples
    --------
    >>> a = np.zeros((4, 6, 3)); a[:, 3:, 0] = 1; a[:, :3, 2] = 1
    >>> m = RamanMap(a, raman_shift=[1., 2., 3.], x=np.arange(6.), y=np.arange(4.))
    >>> KMeansClasses(n_classes=2, n_pca=2).fit(m).area_fraction_.tolist()
    [0.5, 0.5]
    """

    def __init__(self, n_classes: int = 4, n_pca: int = 8, random_state: int = 0, n_init: int = 10):
        self.n_classes = n_classes
        self.n_pca = n_pca
        self.random_state = random_state
        self.n_init = n_init

    def fit(self, m: RamanMap, y=None):
        from sklearn.cluster import KMeans
        from sklearn.decomposition import PCA

        X, good = good_spectra(m, what="k-means")
        check_components(self.n_classes, m, X.shape[0], name="n_classes")
        n_pca = max(1, min(self.n_pca, X.shape[0], X.shape[1]))
        scores = PCA(n_components=n_pca, random_state=self.random_state).fit_transform(X)
        km = KMeans(n_clusters=self.n_classes, n_init=self.n_init,
                    random_state=self.random_state).fit(scores)
        raw = km.labels_
        # order classes by size (largest first) so labels are stable and readable
        order = np.argsort(-np.bincount(raw, minlength=self.n_classes), kind="stable")
        relabel = np.empty_like(order)
        relabel[order] = np.arange(self.n_classes)
        lab = relabel[raw]
        self.labels_ = to_images(m, lab[:, None], good, fill=-1)[0].astype(np.int16)
        self.class_mean_ = np.stack([X[lab == k].mean(axis=0) for k in range(self.n_classes)])
        self.class_sd_ = np.stack([X[lab == k].std(axis=0) for k in range(self.n_classes)])
        self.area_fraction_ = np.bincount(lab, minlength=self.n_classes) / lab.size
        self.inertia_ = float(km.inertia_)
        return self

    def fit_predict(self, m: RamanMap, y=None):
        return self.fit(m).labels_

    def result(self, m: RamanMap, name: str = "kmeans") -> Result:
        dy, dx = m.pixel_size
        cls = Axis("class", np.array([f"class {k + 1}" for k in range(self.n_classes)]))
        labels = Field("labels", self.labels_, image_axes(m), "",
                       long_name="class index (0-based, -1 masked)")
        spectra = Field("mean_spectrum", self.class_mean_, (cls, shift_axis(m)), "a.u.",
                        errors=self.class_sd_, long_name="class mean spectrum (errors: sd)")
        n_good = int((self.labels_ >= 0).sum())
        areas = {f"class {k + 1}": {"fraction_pct": float(100 * f),
                                    "area_um2": float(f * n_good * dx * dy)}
                 for k, f in enumerate(self.area_fraction_)}
        return Result(name, "kmeans", self.get_params(),
                      {"labels": labels, "class_spectra": spectra},
                      {"areas": areas, "inertia": self.inertia_})
