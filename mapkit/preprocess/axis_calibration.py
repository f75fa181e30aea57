"""Raman-shift axis calibration against the band positions of a reference material.

Measure a reference material (polystyrene, cyclohexane, …), locate its bands on the
instrument's axis, fit a low-order polynomial from the measured to the tabulated
positions, and apply it to maps with the recipe step ``correct_axis``.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
from scipy.optimize import OptimizeWarning, curve_fit

from ..errors import MapkitError

#: Raman shift standards, cm⁻¹: ASTM E1840-96 (R2022), "Standard Guide for Raman Shift
#: Standards for Spectrometer Calibration" (values recalled from memory; check them
#: against the standard before relying on them), and silicon
#: from Itoh & Shirono 2020, J. Raman Spectrosc. 51:2496 (520.45 cm⁻¹).
REFERENCE_SHIFTS = {
    "polystyrene": (620.9, 795.8, 1001.4, 1031.8, 1155.3, 1450.5, 1583.1, 1602.3, 2852.4,
                    2904.5, 3054.3),
    "cyclohexane": (384.1, 426.3, 801.3, 1028.3, 1157.6, 1266.4, 1444.4, 2664.4, 2852.9,
                    2923.8, 2938.3),
    "naphthalene": (513.8, 763.8, 1021.6, 1147.2, 1382.2, 1464.5, 1576.6, 3056.4),
    "acetaminophen": (651.6, 797.2, 857.9, 1168.5, 1236.8, 1323.9, 1648.4, 3064.6),
    "toluene": (521.7, 786.5, 1003.6, 1030.6, 1211.4, 1605.1, 2920.0, 3052.8),
    "sulfur": (85.1, 153.8, 219.1, 473.2),
    "silicon": (520.45,),
}


def _lorentz_line(x, h, c, g, a, b):
    return h * g ** 2 / ((x - c) ** 2 + g ** 2) + a + b * (x - c)


def locate_band(shift, spectrum, expected: float, window: float = 10.0) -> float:
    """Centre of the band nearest ``expected`` (cm⁻¹), from a Lorentzian + line fit.

    Only channels within ``window`` cm⁻¹ of the expected position are used. Returns NaN
    when the band is absent or the fit does not converge inside the window.
    """
    shift = np.asarray(shift, float)
    y = np.asarray(spectrum, float)
    sel = np.abs(shift - expected) <= window
    if sel.sum() < 5:
        return np.nan
    x, v = shift[sel], y[sel]
    i = int(np.argmax(v))
    base = np.median(np.concatenate([v[:2], v[-2:]]))
    height = v[i] - base
    noise = np.std(np.diff(v)) / np.sqrt(2) + 1e-12
    if height < 5 * noise:
        return np.nan
    step = float(np.median(np.abs(np.diff(x))))
    p0 = (height, x[i], 2 * step, base, 0.0)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", OptimizeWarning)
            popt, _ = curve_fit(_lorentz_line, x, v, p0=p0, maxfev=5000)
    except (RuntimeError, ValueError):
        return np.nan
    c = float(popt[1])
    return c if abs(c - expected) <= window and popt[0] > 0 else np.nan


@dataclass(frozen=True)
class AxisCalibration:
    """Polynomial from measured to true shift, with the fit's residuals."""

    coefficients: tuple          # lowest order first: ν̃ = Σ cₖ ν̃ₘᵏ
    reference: np.ndarray
    measured: np.ndarray
    residuals: np.ndarray        # reference − corrected(measured), cm⁻¹
    material: str

    @property
    def rms(self) -> float:
        return float(np.sqrt(np.mean(self.residuals ** 2)))

    def apply(self, shift):
        return np.polynomial.polynomial.polyval(np.asarray(shift, float), self.coefficients)

    def recipe_step(self) -> str:
        coef = ", ".join(f"{c:.10g}" for c in self.coefficients)
        return (f"# axis calibration on {self.material}: {len(self.reference)} bands, "
                f"RMS residual {self.rms:.3f} 1/cm\n[[step]]\nname = \"correct_axis\"\n"
                f"coefficients = [{coef}]\n")


def calibrate_axis(shift, spectrum, material: str = "polystyrene", *, order: int = 2,
                   window: float = 10.0) -> AxisCalibration:
    """Fit the shift-axis correction from a measured spectrum of a reference material.

    Bands of the standard that lie inside the measured range are located; at least
    ``order + 2`` must be found so the fit has residual degrees of freedom.
    """
    if material not in REFERENCE_SHIFTS:
        raise MapkitError(f"no tabulated bands for {material!r}", field="material",
                          fix=f"use one of {', '.join(REFERENCE_SHIFTS)}")
    shift = np.asarray(shift, float)
    lo, hi = shift.min(), shift.max()
    ref = np.array([p for p in REFERENCE_SHIFTS[material] if lo + window <= p <= hi - window])
    found = np.array([locate_band(shift, spectrum, p, window) for p in ref])
    ok = np.isfinite(found)
    if ok.sum() < order + 2:
        raise MapkitError(f"found {ok.sum()} of the {material} bands in {lo:.0f}-{hi:.0f} 1/cm, "
                          f"a polynomial of order {order} needs {order + 2}", field="spectrum",
                          fix="measure a wider range, lower --order, or widen --window")
    coef = np.polynomial.polynomial.polyfit(found[ok], ref[ok], order)
    resid = ref[ok] - np.polynomial.polynomial.polyval(found[ok], coef)
    return AxisCalibration(tuple(float(c) for c in coef), ref[ok], found[ok], resid, material)
