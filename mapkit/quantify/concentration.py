"""Concentration maps from unmixing abundances and a calibration."""

from __future__ import annotations

import numpy as np

from ..core.result import Field, Result
from ..errors import MapkitError
from .calibration import LinearCalibration

#: bit flags of the concentration quality map
BELOW_LOD, BELOW_LOQ, OUTSIDE_RANGE, MASKED = 1, 2, 4, 8


def response_fraction(abundance: np.ndarray, names, analyte: str) -> np.ndarray:
    """The analyte's share of the summed reference abundances, per pixel (or spectrum).

    With pure-material references recorded under the same conditions this
    closure ratio estimates the analyte's content independently of focus
    and laser power, which scale all abundances alike.
    """
    names = list(names)
    if analyte not in names:
        raise MapkitError(f"the analyte {analyte!r} is not among the references {names}",
                          field="analyte", fix="name a reference of the library")
    total = np.sum(abundance, axis=0)
    out = np.full(total.shape, np.nan)
    np.divide(abundance[names.index(analyte)], total, out=out, where=total > 0)
    return out


def concentration_map(response: np.ndarray, calibration: LinearCalibration, axes,
                      *, mask=None, name: str = "concentration") -> Result:
    """Concentration, its standard uncertainty and quality flags for every pixel.

    Flags (bits): 1 below LOD, 2 below LOQ, 4 outside the calibrated range,
    8 masked. The uncertainty is s_x0 for a single spectrum (m = 1); the 95 %
    interval is ± t(0.975, n−2)·s_x0.
    """
    x0, s_x0 = calibration.inverse(response)
    flags = np.zeros(response.shape, np.uint8)
    flags[x0 < calibration.lod_] |= BELOW_LOD
    flags[x0 < calibration.loq_] |= BELOW_LOQ
    lo, hi = calibration.x_range_
    flags[(x0 < lo) | (x0 > hi)] |= OUTSIDE_RANGE
    bad = ~np.isfinite(response) if mask is None else (np.asarray(mask) | ~np.isfinite(response))
    flags[bad] |= MASKED
    x0 = np.where(bad, np.nan, x0)
    s_x0 = np.where(bad, np.nan, s_x0)
    unit = calibration.unit
    good = ~bad
    inside = good & ((flags & (BELOW_LOQ | OUTSIDE_RANGE)) == 0)
    vals = x0[good]
    summary = {
        "analyte": calibration.analyte, "unit": unit,
        "mean": float(np.mean(vals)) if vals.size else None,
        "sd": float(np.std(vals, ddof=1)) if vals.size > 1 else None,
        "percentiles": {p: float(np.percentile(vals, p)) for p in (5, 25, 50, 75, 95)}
        if vals.size else {},
        "pixels": int(good.sum()), "below_lod": int((flags[good] & BELOW_LOD > 0).sum()),
        "below_loq": int((flags[good] & BELOW_LOQ > 0).sum()),
        "outside_range": int((flags[good] & OUTSIDE_RANGE > 0).sum()),
        "quantifiable": int(inside.sum()), "calibration": calibration.summary(),
    }
    if summary["mean"]:
        summary["rsd_pct"] = 100 * summary["sd"] / summary["mean"] if summary["sd"] else None
    return Result(name, "linear_calibration", calibration.summary(), {
        "concentration": Field("concentration", x0, tuple(axes), unit, errors=s_x0,
                               long_name=f"{calibration.analyte} content"),
        "flags": Field("flags", flags, tuple(axes), "",
                       long_name="1 below LOD, 2 below LOQ, 4 outside range, 8 masked"),
    }, summary)
