"""Least-squares unmixing of every pixel against known reference spectra."""

from __future__ import annotations

import warnings

import numpy as np
from sklearn.base import BaseEstimator, TransformerMixin

from ..core.ramanmap import RamanMap
from ..core.result import Axis, Field, Result
from ..errors import MapkitError
from ._common import good_spectra, image_axes, shift_axis, to_images


def nnls_batch(A, Y, *, max_sweeps: int = 2000, tol: float = 1e-10):
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

    Returns
    -------
    X : array (k, m)

    Examples
    --------
    >>> A = np.array([[1., 0.], [0., 1.], [1., 1.]])
    >>> nnls_batch(A, np.array([[1.], [-1.], [0.]])).round(6).ravel().tolist()
    [0.5, 0.0]
    """
    A = np.asarray(A, float)
    Y = np.asarray(Y, float)
    G = A.T @ A
    H = A.T @ Y
    k = G.shape[0]
    diag = np.diag(G).copy()
    if np.any(diag <= 0):
        raise MapkitError("a reference spectrum is zero over the map's range", field="references",
                          fix="check that every reference covers the map's shift axis")
    X = np.zeros((k, Y.shape[1]))
    scale = np.maximum(np.abs(H).max(axis=0), 1e-300)
    for _ in range(max_sweeps):
        change = np.zeros(Y.shape[1])
        for j in range(k):
            grad = H[j] - G[j] @ X
            new = np.maximum(0.0, X[j] + grad / diag[j])
            change = np.maximum(change, np.abs(new - X[j]) * diag[j])
            X[j] = new
        if np.all(change <= tol * scale):
            break
    return X


def polynomial_basis(shift, order: int) -> np.ndarray:
    """Orthonormal basis (n, order+1) of polynomials on the shift axis (Legendre, QR'd)."""
    s = np.asarray(shift, float)
    t = 2 * (s - s.min()) / max(np.ptp(s), 1e-12) - 1
    V = np.polynomial.legendre.legvander(t, order)
    q, _ = np.linalg.qr(V)
    return q


class ReferenceUnmixing(TransformerMixin, BaseEstimator):
    """Abundances of known reference spectra in every pixel, with an optional polynomial baseline.

    The model is y = Σ aᵢ rᵢ + Σ cⱼ pⱼ with aᵢ ≥ 0 (non-negative least
    squares, Lawson & Hanson 1974) and free polynomial terms pⱼ of order
    ``baseline_order``, so fluorescence is fitted jointly with the references
    instead of being subtracted first. The polynomial part is eliminated
    exactly by projecting data and references onto its orthogonal complement.

    Parameters
    ----------
    references : list of mapkit.read.Spectrum
    baseline_order : int or None
        Polynomial order of the baseline terms; None for none.

    Attributes
    ----------
    names_ : list of str
    references_ : array (k, n_shift)
        References on the map's axis.
    resampled_ : bool
        True when the references were interpolated onto the map's axis.
    """

    def __init__(self, references=(), baseline_order: int | None = 5):
        self.references = references
        self.baseline_order = baseline_order

    def fit(self, m: RamanMap, y=None):
        refs = list(self.references)
        if not refs:
            raise MapkitError("no reference spectra given", field="references",
                              fix="pass a library folder with --library")
        names = [r.name for r in refs]
        if len(set(names)) != len(names):
            raise MapkitError("two references share a name", field="references",
                              fix="give every reference a unique name")
        if len(refs) + (0 if self.baseline_order is None else self.baseline_order + 1) >= m.shape[2]:
            raise MapkitError(f"{len(refs)} references and the baseline terms need more channels "
                              f"than the map's {m.shape[2]}", file=m.source, field="references",
                              fix="use fewer references or a lower baseline order")
        R = np.stack([r.on_axis(m.raman_shift) for r in refs])
        self.resampled_ = any(r.raman_shift.shape != m.raman_shift.shape
                              or not np.allclose(r.raman_shift, m.raman_shift) for r in refs)
        if self.resampled_:
            warnings.warn("reference spectra were interpolated onto the map's shift axis",
                          stacklevel=2)
        self.names_ = names
        self.references_ = R
        self.raman_shift_ = m.raman_shift.copy()
        if self.baseline_order is None:
            self.basis_ = np.zeros((m.shape[2], 0))
        else:
            self.basis_ = polynomial_basis(m.raman_shift, self.baseline_order)
        return self

    def _project(self, Z):
        Q = self.basis_
        return Z - Q @ (Q.T @ Z)

    def transform(self, m: RamanMap):
        """Abundance images (k, ny, nx) and the residual RMS image (ny, nx); masked pixels NaN."""
        if m.shape[2] != self.raman_shift_.size or not np.allclose(m.raman_shift, self.raman_shift_):
            raise MapkitError("the map's shift axis differs from the one the model was fitted on",
                              file=m.source, field="raman_shift", fix="fit on this map")
        X, good = good_spectra(m, what="unmixing")
        Rp = self._project(self.references_.T)
        Yp = self._project(X.T)
        A = nnls_batch(Rp, Yp)
        resid = Yp - Rp @ A
        rms = np.sqrt(np.mean(resid ** 2, axis=0))
        return to_images(m, A.T, good), to_images(m, rms[:, None], good)[0]

    def result(self, m: RamanMap, name: str = "unmixing") -> Result:
        abundance, rms = self.transform(m)
        comp = Axis("component", np.array(self.names_))
        return Result(name, "nnls_unmixing",
                      {"references": self.names_, "baseline_order": self.baseline_order,
                       "resampled": self.resampled_},
                      {"abundance": Field("abundance", abundance, (comp, *image_axes(m)),
                                          "reference units",
                                          long_name="abundance of each reference"),
                       "residual": Field("residual_rms", rms, image_axes(m), "counts",
                                         long_name="RMS of the fit residual"),
                       "references": Field("reference", self.references_,
                                           (comp, shift_axis(m)), "a.u.",
                                           long_name="reference spectrum on the map axis")})
