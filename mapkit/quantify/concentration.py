"""Concentration maps: content, its uncertainty and quality flags for every pixel."""

from __future__ import annotations

import numpy as np

from ..core.result import Field, Result
from ..errors import MapkitError

#: bit flags of the concentration quality map
BELOW_LOD, BELOW_LOQ, OUTSIDE_RANGE, MASKED = 1, 2, 4, 8
FLAG_MEANING = "1 below LOD, 2 below LOQ, 4 outside the calibrated range, 8 masked or no response"
#: the same, bit by bit (legends of the flags figure)
FLAG_BITS = {BELOW_LOD: "below LOD", BELOW_LOQ: "below LOQ",
             OUTSIDE_RANGE: "outside the calibrated range", MASKED: "masked or no response"}


def response_fraction(abundance: np.ndarray, names, analyte: str) -> np.ndarray:
    """The analyte's share of the summed reference abundances, per pixel (or spectrum).

    With pure-material references recorded under the same conditions this closure ratio
    does not depend on focus or laser power, which scale all abundances alike.
    """
    names = list(names)
    if analyte not in names:
        raise MapkitError(f"the analyte {analyte!r} is not among the references {names}",
                          field="analyte", fix="name a reference of the library")
    total = np.sum(abundance, axis=0)
    out = np.full(total.shape, np.nan)
    np.divide(abundance[names.index(analyte)], total, out=out, where=total > 0)
    return out


def flag_values(x0, calibration, bad):
    """Quality flags (bit field, see FLAG_MEANING) of contents ``x0``."""
    flags = np.zeros(np.shape(x0), np.uint8)
    with np.errstate(invalid="ignore"):
        flags[x0 < calibration.lod_] |= BELOW_LOD
        flags[x0 < calibration.loq_] |= BELOW_LOQ
        lo, hi = calibration.x_range_
        flags[(x0 < lo) | (x0 > hi)] |= OUTSIDE_RANGE
    flags[bad] |= MASKED
    return flags


def summarise(values, flags) -> dict:
    """Mean, sd, RSD, percentiles and flag counts of the unmasked values."""
    good = (flags & MASKED) == 0
    vals = values[good]
    out = {"pixels": int(good.sum()),
           "below_lod": int(((flags & BELOW_LOD) > 0)[good].sum()),
           "below_loq": int(((flags & BELOW_LOQ) > 0)[good].sum()),
           "outside_range": int(((flags & OUTSIDE_RANGE) > 0)[good].sum()),
           "quantifiable": int((good & ((flags & (BELOW_LOQ | OUTSIDE_RANGE)) == 0)).sum())}
    if vals.size:
        mean = float(np.mean(vals))
        sd = float(np.std(vals, ddof=1)) if vals.size > 1 else 0.0
        out.update(mean=mean, sd=sd, rsd_pct=100 * sd / abs(mean) if mean else None,
                   percentiles={p: float(np.percentile(vals, p)) for p in (5, 25, 50, 75, 95)})
        ok = ((flags & (BELOW_LOQ | OUTSIDE_RANGE)) == 0) & good
        if ok.any():
            out["quantifiable_mean"] = float(np.mean(values[ok]))
        counts, edges = np.histogram(vals, bins=20)
        out["histogram"] = {"counts": counts.tolist(), "edges": edges.tolist()}
    return out


def concentration_map(x0, s_x0, calibration, axes, *, mask=None,
                      name: str = "concentration") -> Result:
    """Concentration, its standard uncertainty (errors) and quality flags as a Result.

    ``x0`` and ``s_x0`` are images of the content and its standard uncertainty (e.g. s_x0
    for a single spectrum); the 95 % interval is ± t·s_x0 with the calibration's t.
    """
    x0 = np.asarray(x0, float)
    bad = ~np.isfinite(x0) if mask is None else (np.asarray(mask) | ~np.isfinite(x0))
    flags = flag_values(x0, calibration, bad)
    x0 = np.where(bad, np.nan, x0)
    s_x0 = np.where(bad, np.nan, s_x0)
    summary = {"analyte": calibration.analyte, "unit": calibration.unit,
               **summarise(x0, flags), "calibration": calibration.summary()}
    return Result(name, "calibration", calibration.summary(), {
        "concentration": Field("concentration", x0, tuple(axes), calibration.unit, errors=s_x0,
                               long_name=f"{calibration.analyte} content"),
        "flags": Field("flags", flags, tuple(axes), "", long_name=FLAG_MEANING),
    }, summary)
