"""Straight-line calibration with the statistics an analytical lab reports."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
from scipy import stats
from sklearn.base import BaseEstimator, RegressorMixin

from ..errors import MapkitError


class LinearCalibration(RegressorMixin, BaseEstimator):
    """Ordinary least-squares line y = a + b·x from standards, and inverse prediction.

    Statistics follow the usual treatment of analytical calibration (Miller &
    Miller, *Statistics and Chemometrics for Analytical Chemistry*): residual
    standard deviation s_y/x with n − 2 degrees of freedom, and the standard
    error of a concentration read back from m replicate responses y₀::

        s_x0 = (s_y/x / b) · √(1/m + 1/n + (y₀ − ȳ)² / (b² Σ(xᵢ − x̄)²))

    Detection and quantitation limits follow ICH Q2(R2) (2023) with σ = s_y/x
    and S = b: LOD = 3.3σ/S, LOQ = 10σ/S.

    Attributes
    ----------
    slope_, intercept_, r_, s_yx_, lod_, loq_ : float
    x_range_ : (float, float)
        Lowest and highest standard.

    Examples
    --------
    >>> cal = LinearCalibration().fit([0, 1, 2, 3], [1.0, 3.1, 4.9, 7.0])
    >>> round(cal.slope_, 3), round(cal.intercept_, 3)
    (1.98, 1.03)
    """

    def __init__(self, analyte: str = "analyte", unit: str = "% w/w"):
        self.analyte = analyte
        self.unit = unit

    def fit(self, x, y):
        x = np.asarray(x, float).ravel()
        y = np.asarray(y, float).ravel()
        if x.size != y.size:
            raise MapkitError(f"{x.size} concentrations but {y.size} responses",
                              field="standards", fix="give one response per standard")
        if not (np.all(np.isfinite(x)) and np.all(np.isfinite(y))):
            raise MapkitError("a concentration or response is missing or not finite",
                              field="standards", fix="remove or repeat that standard")
        if np.unique(x).size < 3:
            raise MapkitError(f"only {np.unique(x).size} distinct concentration levels",
                              field="standards",
                              fix="measure at least three levels (ICH Q2(R2) asks for five)")
        n = x.size
        xm, ym = x.mean(), y.mean()
        sxx = float(((x - xm) ** 2).sum())
        b = float(((x - xm) * (y - ym)).sum() / sxx)
        a = float(ym - b * xm)
        resid = y - (a + b * x)
        s_yx = float(np.sqrt((resid ** 2).sum() / (n - 2)))
        if not np.isfinite(b) or abs(b) <= 1e-12 * max(abs(ym), 1.0) or (
                s_yx > 0 and abs(b) * np.sqrt(sxx) < 2 * s_yx):
            raise MapkitError(f"the response does not change with concentration (slope {b:.3g})",
                              field="standards",
                              fix="check that the response band belongs to the analyte")
        syy = float(((y - ym) ** 2).sum())
        self.slope_, self.intercept_ = b, a
        self.r_ = float(b * np.sqrt(sxx / syy)) if syy > 0 else 1.0
        self.s_yx_ = s_yx
        self.n_ = n
        self.x_mean_, self.y_mean_, self.sxx_ = float(xm), float(ym), sxx
        self.residuals_ = resid
        self.x_, self.y_ = x, y
        self.lod_ = 3.3 * s_yx / abs(b)
        self.loq_ = 10.0 * s_yx / abs(b)
        self.x_range_ = (float(x.min()), float(x.max()))
        self.t95_ = float(stats.t.ppf(0.975, n - 2))
        return self

    def predict(self, x):
        """Expected response at concentration ``x``."""
        return self.intercept_ + self.slope_ * np.asarray(x, float)

    def inverse(self, y0, m: int = 1):
        """Concentration x₀ and its standard error s_x0 from the mean of ``m`` responses ``y0``."""
        y0 = np.asarray(y0, float)
        x0 = (y0 - self.intercept_) / self.slope_
        s_x0 = (self.s_yx_ / abs(self.slope_)) * np.sqrt(
            1.0 / m + 1.0 / self.n_ + (y0 - self.y_mean_) ** 2 / (self.slope_ ** 2 * self.sxx_))
        return x0, s_x0

    def summary(self) -> dict:
        return {"analyte": self.analyte, "unit": self.unit, "slope": self.slope_,
                "intercept": self.intercept_, "r": self.r_, "s_yx": self.s_yx_, "n": self.n_,
                "lod": self.lod_, "loq": self.loq_, "range": list(self.x_range_),
                "x_mean": self.x_mean_, "y_mean": self.y_mean_, "sxx": self.sxx_,
                "t95": self.t95_}

    def save(self, path) -> Path:
        """Write the calibration as JSON (atomically) so it can be applied to other maps."""
        from ..core.provenance import library_versions
        from ..export.atomic import atomic_path

        with atomic_path(path, overwrite=True) as tmp:
            tmp.write_text(json.dumps({"kind": "mapkit linear calibration", **self.summary(),
                                       "x": self.x_.tolist(), "y": self.y_.tolist(),
                                       "versions": library_versions()}, indent=2))
        return Path(path)

    @classmethod
    def load(cls, path) -> "LinearCalibration":
        path = Path(path)
        try:
            d = json.loads(path.read_text())
            if d.get("kind") != "mapkit linear calibration":
                raise KeyError("kind")
            return cls(d["analyte"], d["unit"]).fit(d["x"], d["y"])
        except (OSError, ValueError, KeyError) as exc:
            raise MapkitError(f"not a mapkit calibration file ({exc})", file=path,
                              fix="save one with 'mapkit calibrate'") from None
