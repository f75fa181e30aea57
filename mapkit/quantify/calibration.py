"""Calibration models with the statistics an analytical lab reports.

Univariate: a straight line or a quadratic of the response against the known content of
standards, by ordinary or weighted least squares, read back (inverse prediction) with its
standard error. Multivariate: partial least squares on whole spectra, with the number of
latent variables chosen by cross-validation (in :mod:`mapkit.quantify.pls`).
"""

from __future__ import annotations

import numpy as np
from scipy import stats
from sklearn.base import BaseEstimator, RegressorMixin
from sklearn.utils.validation import check_is_fitted, column_or_1d, validate_data

from ..errors import DataError, MapkitError

WEIGHTINGS = ("none", "replicates")


class PolynomialCalibration(RegressorMixin, BaseEstimator):
    """Response y = b₀ + b₁x (+ b₂x²) fitted to standards, and inverse prediction.

    The statistics follow the usual treatment of analytical calibration (Miller & Miller,
    *Statistics and Chemometrics for Analytical Chemistry*): residual standard deviation
    s_y/x with n − p degrees of freedom, and the standard error of a content read back
    from the mean y₀ of m responses by the delta method,

        s_x0² = (s²/(m·w(x₀)) + gᵀ Cov(b) g) / f′(x₀)²,   g = (1, x₀[, x₀²]),

    which for a straight unweighted line is the textbook
    s_x0 = (s_y/x / b)·√(1/m + 1/n + (y₀ − ȳ)²/(b² Σ(xᵢ − x̄)²)).
    Detection and quantitation limits follow ICH Q2(R2) (2023) with σ = the response
    standard deviation at zero content and S = the slope there: LOD = 3.3σ/S, LOQ = 10σ/S.

    Parameters
    ----------
    degree : {1, 2}
    weighting : {"none", "replicates"}
        ``"replicates"``: weighted least squares with weights 1/σ²(x), where σ²(x) is a
        straight line fitted to the variances of replicate responses at each level
        (heteroscedastic responses, e.g. shot noise growing with content).
    analyte, unit : str

    Attributes
    ----------
    coef_ : array (degree + 1,)
        b₀, b₁[, b₂].
    slope_, intercept_, r_, r2_, s_yx_, lod_, loq_ : float
        ``r_`` and ``r2_`` are weighted like the fit (``weighting="replicates"``).
    x_range_ : (float, float)
        Lowest and highest standard: results outside are flagged.
    residuals_ : array
    lack_of_fit_ : dict or None
        Lack-of-fit F-test when some levels were measured more than once and there are
        more levels than coefficients (Draper & Smith 1998, *Applied Regression Analysis*,
        3rd ed., §2.1; ISO 8466-1:2021): the residual sum of squares is split into pure
        error (replicates about their level's mean, n − L degrees of freedom) and lack of
        fit (level means about the curve, L − p), F = MS_lof / MS_pe. Keys ``F``,
        ``df_lof``, ``df_pe``, ``p`` and ``suggestion`` (set when p < 0.05: the quadratic
        model for a straight line, a narrower range for a quadratic). None without
        replicates.
    n_features_in_ : int
        Always 1: one content per standard.

    Notes
    -----
    In scikit-learn's terms the content is the one feature and the response the target:
    ``fit(x, y)`` and ``predict(x)`` take the contents as a 1-D sequence (the usual
    form) or as one column of a 2-D array (pipelines, cross-validation); ``inverse``
    reads contents back from responses. A 1-D ``x`` is contents, not one spectrum (the
    one place where mapkit departs from scikit-learn's rule that X is 2-D).

    Examples
    --------
    >>> x = np.array([0, 1, 2, 3, 4, 5.])
    >>> cal = PolynomialCalibration().fit(x.reshape(-1, 1), 2.0 + 0.5 * x)
    >>> cal.predict([[2.0], [4.0]]).round(6).tolist()
    [3.0, 4.0]
    """

    def __init__(self, degree: int = 1, weighting: str = "none", analyte: str = "analyte",
                 unit: str = "% w/w"):
        self.degree = degree
        self.weighting = weighting
        self.analyte = analyte
        self.unit = unit

    # -- fitting ------------------------------------------------------------------------
    def _variance_function(self, x, y):
        """Per-point weights from replicate variances (1 for unweighted fits)."""
        if self.weighting == "none":
            self.var_coef_ = None
            return np.ones_like(x)
        levels = np.unique(x)
        var = np.array([np.var(y[x == lv], ddof=1) if (x == lv).sum() > 1 else np.nan
                        for lv in levels])
        ok = np.isfinite(var)
        if ok.sum() < 2:
            raise MapkitError("weighting by replicates needs at least two levels measured more "
                              "than once", field="weighting", fix="add replicates or use none")
        coef = np.polyfit(levels[ok], var[ok], 1)
        floor = max(np.min(var[ok][var[ok] > 0]) if np.any(var[ok] > 0) else 1e-12, 1e-300)
        self.var_coef_ = coef
        self.var_floor_ = float(floor)
        return 1.0 / self._variance_at(x)

    def _variance_at(self, x):
        if self.var_coef_ is None:
            return np.ones_like(np.asarray(x, float))
        return np.maximum(np.polyval(self.var_coef_, np.asarray(x, float)), self.var_floor_)

    def _contents(self, x, *, reset: bool) -> np.ndarray:
        """Contents as a 1-D float array, from a 1-D sequence or a one-column 2-D array."""
        ndim = x.ndim if hasattr(x, "ndim") else np.asarray(x).ndim
        if ndim != 2:
            if reset:
                self.n_features_in_ = 1
            return np.asarray(x, float).ravel() if reset else np.asarray(x, float)
        X = validate_data(self, x, reset=reset, dtype=np.float64)
        if X.shape[1] != 1:
            raise DataError(f"a calibration has one content per standard, but X has "
                            f"{X.shape[1]} feature(s) (columns)", field="standards",
                            fix="pass the contents as a 1-D list or one column")
        return X[:, 0]

    def fit(self, x, y):
        """Fit the response ``y`` against the contents ``x`` of the standards."""
        if y is None:
            raise DataError(f"{type(self).__name__} requires y to be passed, but the target y "
                            "is None", field="standards", fix="give one response per standard")
        x = self._contents(x, reset=True)
        y = column_or_1d(y, dtype=np.float64, warn=True) if np.ndim(y) == 2 else \
            np.asarray(y, float).ravel()
        if self.degree not in (1, 2):
            raise MapkitError(f"degree {self.degree} is not 1 (linear) or 2 (quadratic)",
                              field="model", fix="use linear or quadratic")
        if self.weighting not in WEIGHTINGS:
            raise MapkitError(f"unknown weighting {self.weighting!r}", field="weighting",
                              fix=f"use one of {', '.join(WEIGHTINGS)}")
        if x.size != y.size:
            raise DataError(f"{x.size} concentrations but {y.size} responses",
                            field="standards", fix="give one response per standard")
        if not (np.all(np.isfinite(x)) and np.all(np.isfinite(y))):
            raise DataError("a concentration or response is missing or not finite",
                            field="standards", fix="remove or repeat that standard")
        n_levels = np.unique(x).size
        if n_levels < 3 or n_levels < self.degree + 2:
            raise DataError(f"only {n_levels} distinct concentration levels for a degree-"
                            f"{self.degree} model ({x.size} sample(s))", field="standards",
                            fix="measure at least three levels (ICH Q2(R2) asks for five)")
        p = self.degree + 1
        n = x.size
        w = self._variance_function(x, y)
        X = np.vander(x, p, increasing=True)
        XtW = X.T * w
        XtWX = XtW @ X
        try:
            beta = np.linalg.solve(XtWX, XtW @ y)
        except np.linalg.LinAlgError:
            raise DataError("the calibration design is singular", field="standards",
                            fix="use standards at distinct concentrations") from None
        resid = y - X @ beta
        s2 = float(np.sum(w * resid ** 2) / (n - p))
        self.coef_ = beta
        self.cov_ = s2 * np.linalg.inv(XtWX)
        self.s2_ = s2
        self.n_ = n
        self.dof_ = n - p
        self.x_, self.y_, self.w_ = x, y, w
        self.residuals_ = resid
        self.x_range_ = (float(x.min()), float(x.max()))
        self.t95_ = float(stats.t.ppf(0.975, n - p))
        slope0 = self.derivative(0.0)
        # a response that barely changes over the calibrated range is no calibration
        change = abs(self.predict(x.max()) - self.predict(x.min()))
        if not np.isfinite(change) or change < 2 * np.sqrt(s2 / w.mean()) or change == 0:
            raise DataError(f"the response does not change with concentration (slope "
                            f"{beta[1]:.3g})", field="standards",
                            fix="check that the response band belongs to the analyte")
        ss_tot = float(np.sum(w * (y - np.average(y, weights=w)) ** 2))
        self.r2_ = 1 - float(np.sum(w * resid ** 2)) / ss_tot if ss_tot > 0 else 1.0
        # r is the (weighted, when weights are used) correlation of the fit: for a line,
        # sign(b1)·sqrt(R²_w), which is the weighted Pearson correlation of x and y
        root = float(np.sqrt(max(self.r2_, 0)))
        self.r_ = float(np.copysign(root, beta[1])) if self.degree == 1 else root
        self.intercept_ = float(beta[0])
        self.slope_ = float(beta[1])
        self.s_yx_ = float(np.sqrt(s2))
        sigma0 = float(np.sqrt(s2 * self._variance_at(0.0)))
        self.sigma_blank_ = sigma0
        self.lod_ = 3.3 * sigma0 / abs(slope0)
        self.loq_ = 10.0 * sigma0 / abs(slope0)
        self.x_mean_ = float(np.average(x))
        self.y_mean_ = float(np.average(y))
        self.sxx_ = float(np.sum((x - x.mean()) ** 2))
        self.lack_of_fit_ = lack_of_fit_test(x, y, resid, w, p, degree=self.degree)
        return self

    # -- using ----------------------------------------------------------------------------
    def predict(self, x):
        """Expected response at content ``x`` (a number, a sequence, or one column: (n,))."""
        check_is_fitted(self, "coef_")
        return np.polynomial.polynomial.polyval(self._contents(x, reset=False), self.coef_)

    def derivative(self, x):
        return np.polynomial.polynomial.polyval(np.asarray(x, float),
                                                np.polynomial.polynomial.polyder(self.coef_))

    def _solve(self, y0):
        b = self.coef_
        if self.degree == 1:
            return (y0 - b[0]) / b[1]
        # quadratic: the root on the branch that passes through the calibrated range
        a2, a1, a0 = b[2], b[1], b[0] - y0
        disc = a1 * a1 - 4 * a2 * a0
        sq = np.sqrt(np.where(disc >= 0, disc, np.nan))
        r1 = (-a1 + sq) / (2 * a2)
        r2 = (-a1 - sq) / (2 * a2)
        mid = 0.5 * sum(self.x_range_)
        pick_r1 = np.abs(r1 - mid) <= np.abs(r2 - mid)
        return np.where(np.isnan(r1), r2, np.where(np.isnan(r2), r1, np.where(pick_r1, r1, r2)))

    def inverse(self, y0, m: int = 1):
        """Content x₀ and its standard error s_x0 from the mean of ``m`` responses ``y0``."""
        y0 = np.asarray(y0, float)
        x0 = self._solve(y0)
        g = np.stack([np.ones_like(x0), x0, x0 ** 2][: self.degree + 1])
        var_pred = np.einsum("i...,ij,j...->...", g, self.cov_, g)
        var_y0 = self.s2_ * self._variance_at(x0) / m
        s_x0 = np.sqrt(var_y0 + var_pred) / np.abs(self.derivative(x0))
        return x0, s_x0

    def summary(self) -> dict:
        return {"analyte": self.analyte, "unit": self.unit, "model": "linear" if self.degree == 1
                else "quadratic", "weighting": self.weighting, "coefficients":
                [float(c) for c in self.coef_], "slope": self.slope_, "intercept": self.intercept_,
                "r": self.r_, "r2": self.r2_, "s_yx": self.s_yx_, "n": self.n_, "lod": self.lod_,
                "loq": self.loq_, "range": list(self.x_range_), "t95": self.t95_,
                "residuals": [float(r) for r in self.residuals_],
                "lack_of_fit": getattr(self, "lack_of_fit_", None)}

    def to_dict(self) -> dict:
        return {"kind": "polynomial", "degree": self.degree, "weighting": self.weighting,
                "analyte": self.analyte, "unit": self.unit, "x": self.x_.tolist(),
                "y": self.y_.tolist()}

    @classmethod
    def from_dict(cls, d: dict) -> "PolynomialCalibration":
        return cls(d["degree"], d["weighting"], d["analyte"], d["unit"]).fit(d["x"], d["y"])


#: significance level of the lack-of-fit test
LACK_OF_FIT_ALPHA = 0.05


def lack_of_fit_test(x, y, resid, w, p: int, *, degree: int = 1):
    """Lack-of-fit F-test of a fitted curve against replicate standards (None without them).

    ``resid`` are the fit's residuals, ``w`` its weights and ``p`` its number of
    coefficients. Pure error is the (weighted) scatter of replicates about the mean of
    their level; the rest of the residual sum of squares is lack of fit (Draper & Smith
    1998, §2.1). Returns ``{"F", "df_lof", "df_pe", "p", "alpha", "suggestion"}``.
    """
    x = np.asarray(x, float)
    levels, inverse = np.unique(x, return_inverse=True)
    n, n_levels = x.size, levels.size
    df_pe, df_lof = n - n_levels, n_levels - p
    if df_pe < 1 or df_lof < 1:
        return None
    y = np.asarray(y, float)
    w = np.asarray(w, float)
    wsum = np.bincount(inverse, w)
    means = np.bincount(inverse, w * y) / wsum
    ss_pe = float(np.sum(w * (y - means[inverse]) ** 2))
    ss_res = float(np.sum(w * np.asarray(resid, float) ** 2))
    ss_lof = max(ss_res - ss_pe, 0.0)
    if ss_pe <= 0:
        return None  # identical replicates: no pure error to test against
    F = (ss_lof / df_lof) / (ss_pe / df_pe)
    pval = float(stats.f.sf(F, df_lof, df_pe))
    suggestion = None
    if pval < LACK_OF_FIT_ALPHA:
        suggestion = ("the straight line misses the curvature of the standards: try the "
                      "quadratic model" if degree == 1 else
                      "the quadratic misses the shape of the standards: narrow the "
                      "calibrated range or check the response")
    return {"F": float(F), "df_lof": int(df_lof), "df_pe": int(df_pe), "p": pval,
            "alpha": LACK_OF_FIT_ALPHA, "suggestion": suggestion}


def describe_lack_of_fit(lof) -> str:
    """One line for the lack-of-fit test (or why there is none)."""
    if lof is None:
        return "lack of fit: not tested (needs replicate standards at more levels than coefficients)"
    text = (f"lack of fit F({lof['df_lof']}, {lof['df_pe']}) = {lof['F']:.3g}, p = {lof['p']:.3g} "
            "(pure error from replicates; Draper & Smith 1998)")
    return text + (f": {lof['suggestion']}" if lof["suggestion"] else ": no evidence of lack of fit")


class LinearCalibration(PolynomialCalibration):
    """Ordinary least-squares straight line (``PolynomialCalibration`` with degree 1).

    Examples
    --------
    >>> cal = LinearCalibration().fit([0, 1, 2, 3], [1.0, 3.1, 4.9, 7.0])
    >>> round(cal.slope_, 3), round(cal.intercept_, 3)
    (1.98, 1.03)
    """

    def __init__(self, analyte: str = "analyte", unit: str = "% w/w", weighting: str = "none"):
        super().__init__(1, weighting, analyte, unit)

    def get_params(self, deep=True):
        return {"analyte": self.analyte, "unit": self.unit, "weighting": self.weighting}
