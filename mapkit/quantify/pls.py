"""Partial least squares calibration on whole spectra, latent variables chosen by cross-validation."""

from __future__ import annotations

import numpy as np
from sklearn.base import BaseEstimator, RegressorMixin
from sklearn.utils.validation import check_is_fitted, validate_data

from ..errors import DataError, MapkitError


class PLSCalibration(RegressorMixin, BaseEstimator):
    """PLS regression of content on spectra (scikit-learn's PLSRegression underneath).

    The number of latent variables is the one with the lowest root-mean-square error of
    cross-validation (RMSECV), with folds that keep the replicates of one standard
    together (``groups``), so a standard is never predicted from its own replicates.
    Per-pixel uncertainty is reported as RMSECV (an approximation: PLS has no closed-form
    inverse-prediction error); LOD and LOQ as 3.3 and 10 × RMSECV.

    Attributes
    ----------
    n_components_ : int
    rmsecv_ : array (max_components,)
        RMSECV for 1 … max_components latent variables.
    rmsec_, r2_ : float
        Fit on all standards with the chosen number.
    n_features_in_ : int
        Channels of the standards' spectra.

    Notes
    -----
    ``fit(X, y, groups=None)`` takes the standards' spectra as rows (n_standards,
    n_shift) and their contents; ``predict`` takes spectra as rows, for instance a map's
    spectra block by block (row by row, so blocks give the same contents as at once).

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> c = np.repeat(np.arange(6.), 2)
    >>> X = np.outer(c, np.hanning(40)) + 1.0 + rng.normal(0, 0.01, (12, 40))
    >>> pls = PLSCalibration(max_components=3).fit(X, c, groups=c)
    >>> bool(np.abs(pls.predict(X) - c).max() < 0.05)
    True
    """

    def __init__(self, max_components: int = 8, analyte: str = "analyte", unit: str = "% w/w",
                 n_splits: int = 7):
        self.max_components = max_components
        self.analyte = analyte
        self.unit = unit
        self.n_splits = n_splits

    def fit(self, X, y, groups=None):
        from sklearn.cross_decomposition import PLSRegression
        from sklearn.model_selection import GroupKFold, cross_val_predict

        if y is None:
            raise DataError("PLSCalibration requires y to be passed, but the target y is None",
                            field="standards", fix="give one concentration per spectrum")
        n_x, n_y = (v.shape[0] if hasattr(v, "shape") else np.asarray(v).shape[0]
                    for v in (X, y))
        if n_x != n_y:
            raise DataError(f"{n_x} spectra but {n_y} concentrations",
                            field="standards", fix="give one concentration per spectrum")
        X, y = validate_data(self, X, y, dtype=np.float64, y_numeric=True)
        groups = np.arange(y.size) if groups is None else np.asarray(groups)
        n_groups = np.unique(groups).size
        if n_groups < 3:
            raise DataError(f"only {n_groups} standards ({y.size} sample(s))", field="standards",
                            fix="measure at least three (ICH Q2(R2) asks for five levels)")
        if np.ptp(y) == 0:
            raise DataError("every standard has the same concentration", field="standards",
                            fix="span the working range")
        kmax = int(min(self.max_components, n_groups - 1, X.shape[1]))
        folds = GroupKFold(n_splits=min(self.n_splits, n_groups))
        rmsecv = []
        for k in range(1, kmax + 1):
            pred = cross_val_predict(PLSRegression(n_components=k, scale=False), X, y,
                                     groups=groups, cv=folds).ravel()
            rmsecv.append(float(np.sqrt(np.mean((pred - y) ** 2))))
        self.rmsecv_ = np.array(rmsecv)
        self.n_components_ = int(np.argmin(self.rmsecv_)) + 1
        self.model_ = PLSRegression(n_components=self.n_components_, scale=False).fit(X, y)
        fitted = self.model_.predict(X).ravel()
        self.rmsec_ = float(np.sqrt(np.mean((fitted - y) ** 2)))
        ss = float(np.sum((y - y.mean()) ** 2))
        self.r2_ = 1 - float(np.sum((fitted - y) ** 2)) / ss
        self.residuals_ = y - fitted
        self.x_, self.y_, self.groups_ = X, y, groups
        self.x_range_ = (float(y.min()), float(y.max()))
        err = float(self.rmsecv_[self.n_components_ - 1])
        self.lod_, self.loq_ = 3.3 * err, 10 * err
        self.t95_ = 1.96
        return self

    def predict(self, X):
        """Content of each spectrum (row of ``X``)."""
        check_is_fitted(self)
        return self.model_.predict(validate_data(self, X, reset=False, dtype=np.float64)).ravel()

    def inverse(self, X, m: int = 1):
        """Content and its (approximate) standard uncertainty for each spectrum (row of X)."""
        x0 = self.predict(X)
        return x0, np.full_like(x0, self.rmsecv_[self.n_components_ - 1] / np.sqrt(m))

    def summary(self) -> dict:
        return {"analyte": self.analyte, "unit": self.unit, "model": "pls",
                "n_components": self.n_components_, "rmsecv": self.rmsecv_.tolist(),
                "rmsec": self.rmsec_, "r2": self.r2_, "lod": self.lod_, "loq": self.loq_,
                "range": list(self.x_range_), "n": int(self.y_.size),
                "residuals": self.residuals_.tolist()}

    def to_dict(self) -> dict:
        return {"kind": "pls", "max_components": self.max_components, "analyte": self.analyte,
                "unit": self.unit, "n_splits": self.n_splits, "X": self.x_.tolist(),
                "y": self.y_.tolist(), "groups": [str(g) for g in self.groups_]}

    @classmethod
    def from_dict(cls, d: dict) -> "PLSCalibration":
        return cls(d["max_components"], d["analyte"], d["unit"], d["n_splits"]).fit(
            np.array(d["X"]), np.array(d["y"]), np.array(d["groups"]))
