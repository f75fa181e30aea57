"""Factorisations of the map into component spectra and images."""

from __future__ import annotations

import numpy as np
from sklearn.base import BaseEstimator, TransformerMixin

from ..core.ramanmap import RamanMap
from ..core.result import Axis, Field, Result
from ._common import check_components, good_spectra, image_axes, shift_axis, to_images


class NMFComponents(TransformerMixin, BaseEstimator):
    """Non-negative matrix factorisation of a map (scikit-learn's NMF underneath).

    Spectra are clipped at zero first (after baseline removal, noise dips
    below it), so the model X ≈ W H with W, H ≥ 0 applies (Lee & Seung 1999).

    Parameters
    ----------
    n_components : int
    max_iter : int
    random_state : int
        Seed of the initialisation; fixed by default so runs repeat exactly.

    Attributes
    ----------
    components_ : array (n_components, n_shift)
        Component spectra, each scaled to unit maximum.
    raman_shift_ : array (n_shift,)
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

    def __init__(self, n_components: int = 4, max_iter: int = 1000, random_state: int = 0,
                 init: str = "nndsvda"):
        self.n_components = n_components
        self.max_iter = max_iter
        self.random_state = random_state
        self.init = init

    def fit(self, m: RamanMap, y=None):
        from sklearn.decomposition import NMF

        X, good = good_spectra(m, what="NMF")
        check_components(self.n_components, m, X.shape[0])
        model = NMF(n_components=self.n_components, init=self.init, max_iter=self.max_iter,
                    random_state=self.random_state)
        W = model.fit_transform(np.clip(X, 0, None))
        H = model.components_
        scale = H.max(axis=1, keepdims=True)
        scale[scale == 0] = 1.0
        self.model_ = model
        self.scale_ = scale[:, 0]
        self.components_ = H / scale
        self.raman_shift_ = m.raman_shift.copy()
        self.reconstruction_err_ = float(model.reconstruction_err_)
        self.n_iter_ = int(model.n_iter_)
        self.fit_images_ = to_images(m, W * self.scale_, good)
        return self

    def fit_transform(self, m: RamanMap, y=None) -> np.ndarray:
        """Fit and return the fitted map's component images (n_components, ny, nx)."""
        return self.fit(m).fit_images_

    def transform(self, m: RamanMap) -> np.ndarray:
        """Component images (n_components, ny, nx) of any map on the same axis; masked pixels NaN."""
        X, good = good_spectra(m, what="NMF")
        return to_images(m, self.model_.transform(np.clip(X, 0, None)) * self.scale_, good)

    def result(self, m: RamanMap, images=None, name: str = "nmf") -> Result:
        """Component images and spectra as a :class:`Result` for export.

        ``images`` defaults to :meth:`transform` of ``m``; pass ``fit_images_``
        to export exactly the images of the fit.
        """
        labels = np.array([f"component {i + 1}" for i in range(self.n_components)])
        comp = Axis("component", labels)
        images = self.transform(m) if images is None else images
        images = Field("abundance", images, (comp, *image_axes(m)), "a.u.",
                       long_name="NMF component weight")
        spectra = Field("spectrum", self.components_, (comp, shift_axis(m)), "a.u.",
                        long_name="NMF component spectrum (unit maximum)")
        return Result(name, "nmf", self.get_params(), {"images": images, "spectra": spectra},
                      {"reconstruction_error": self.reconstruction_err_, "n_iter": self.n_iter_})
