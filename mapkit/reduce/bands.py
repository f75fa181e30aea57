"""Band images: integral, height, centroid and ratio over a shift range."""

from __future__ import annotations

import numpy as np

from ..core.ramanmap import RamanMap
from ..core.result import Field, Result
from ..preprocess.axis import crop_indices
from ._common import image_axes

MEASURES = ("area", "height", "centroid")


def _window(block, shift, lo, hi, local_baseline):
    block = np.asarray(block, dtype=np.float64)
    shift = np.asarray(shift, dtype=np.float64)
    idx = crop_indices(shift, lo, hi)
    s = shift[idx]
    y = block[..., idx]
    if s[0] > s[-1]:
        s, y = s[::-1], y[..., ::-1]
    if local_baseline and s.size > 1:
        frac = (s - s[0]) / (s[-1] - s[0])
        y = y - (y[..., :1] + (y[..., -1:] - y[..., :1]) * frac)
    return s, y


def band_integral(block, shift, lo: float, hi: float, *, local_baseline: bool = True):
    """Integrated intensity of a band between ``lo`` and ``hi`` cm⁻¹ for each spectrum.

    With ``local_baseline`` a straight line through the first and last channel
    of the range is subtracted first, so a sloping background under the band
    does not count. The result is in (intensity units)·cm⁻¹ and does not depend
    on the direction of the shift axis.

    Examples
    --------
    >>> s = np.linspace(0, 10, 11)
    >>> y = 2 + 0.5 * s                      # a pure slope: no band
    >>> float(np.round(band_integral(y, s, 2, 8)[()], 12))
    0.0
    >>> tri = np.array([0, 0, 1, 2, 1, 0, 0.])
    >>> float(band_integral(tri, np.arange(7.), 1, 5)[()])
    4.0
    """
    s, y = _window(block, shift, lo, hi, local_baseline)
    return np.trapezoid(y, s, axis=-1)


def band_height(block, shift, lo: float, hi: float, *, local_baseline: bool = True):
    """Largest intensity in the range above the local linear baseline.

    Examples
    --------
    >>> float(band_height(np.array([1, 1, 4, 1, 1.]), np.arange(5.), 0, 4)[()])
    3.0
    """
    _, y = _window(block, shift, lo, hi, local_baseline)
    return y.max(axis=-1)


def band_centroid(block, shift, lo: float, hi: float, *, local_baseline: bool = True):
    """Intensity-weighted mean shift (cm⁻¹) in the range; NaN where the band has no area.

    Negative intensities (noise below the local baseline) are clipped to zero so they do
    not drag the centroid outside the range.

    Examples
    --------
    >>> float(band_centroid(np.array([0, 1, 2, 1, 0.]), np.array([10., 11, 12, 13, 14]), 10, 14)[()])
    12.0
    """
    s, y = _window(block, shift, lo, hi, local_baseline)
    y = np.clip(y, 0, None)
    total = y.sum(axis=-1)
    out = np.full(total.shape, np.nan)
    np.divide((y * s).sum(axis=-1), total, out=out, where=total > 0)
    return out


def _measure(m: RamanMap, lo, hi, measure, local_baseline):
    func = {"area": band_integral, "height": band_height, "centroid": band_centroid}[measure]
    crop_indices(m.raman_shift, lo, hi)   # fail before reading if the band is outside
    shift = m.raman_shift
    if m.is_lazy:  # chunk by chunk: a band image of a cube larger than memory
        last = m.intensity.ndim - 1     # the shift axis (2; 3 for a volume)
        data = m.intensity.rechunk({last: -1})
        img = data.map_blocks(lambda b: func(np.asarray(b, np.float64), shift, lo, hi,
                                             local_baseline=local_baseline),
                              drop_axis=last, dtype=np.float64).compute()
    else:
        img = func(np.asarray(m.intensity, dtype=np.float64), shift, lo, hi,
                   local_baseline=local_baseline)
    img = np.array(img, dtype=np.float64)
    img[m.mask] = np.nan
    return img


def band_image(m: RamanMap, lo: float, hi: float, *, name: str | None = None,
               measure: str = "area", local_baseline: bool = True) -> Result:
    """A band image (``measure`` area, height or centroid) over ``lo``-``hi`` cm⁻¹; masked pixels NaN."""
    if measure not in MEASURES:
        from ..errors import MapkitError

        raise MapkitError(f"unknown band measure {measure!r}", field="measure",
                          fix=f"use one of {', '.join(MEASURES)}")
    img = _measure(m, lo, hi, measure, local_baseline)
    units = {"area": "counts*1/cm", "height": "counts", "centroid": "1/cm"}[measure]
    signal = {"area": "band_integral", "height": "band_height", "centroid": "band_centroid"}[measure]
    name = name or f"band_{lo:g}_{hi:g}"
    fld = Field(signal, img, image_axes(m), units,
                long_name=f"{measure} {lo:g}-{hi:g} 1/cm")
    return Result(name, f"band_{measure}", {"lo": lo, "hi": hi, "measure": measure,
                                            "local_baseline": local_baseline}, {"image": fld})


def band_ratio_image(m: RamanMap, numerator, denominator, *, name: str = "ratio",
                     measure: str = "area", min_snr: float = 3.0) -> Result:
    """Ratio of two band measures, masked (NaN) where the denominator is below noise.

    The denominator counts as noise when it is smaller than ``min_snr`` times its own
    noise level, estimated from the spread of the band measure in a band-free way: the
    standard deviation of the spectrum's first differences (× √2, see
    :func:`mapkit.preprocess.quality.noise_sd`) integrated over the band width.
    """
    from ..preprocess.quality import noise_sd

    lo_n, hi_n = numerator
    lo_d, hi_d = denominator
    num = _measure(m, lo_n, hi_n, measure, True)
    den = _measure(m, lo_d, hi_d, measure, True)
    ns = m.shape[-1]
    sd = noise_sd(np.asarray(m.load().intensity, float).reshape(-1, ns)).reshape(m.shape[:-1])
    if measure == "area":
        idx = crop_indices(m.raman_shift, lo_d, hi_d)
        step = float(np.median(np.abs(np.diff(m.raman_shift))))
        sd = sd * step * np.sqrt(idx.size)
    ok = np.isfinite(den) & (np.abs(den) > min_snr * sd)
    ratio = np.full(num.shape, np.nan)
    np.divide(num, den, out=ratio, where=ok)
    fld = Field("band_ratio", ratio, image_axes(m), "",
                long_name=f"{measure} {lo_n:g}-{hi_n:g} / {lo_d:g}-{hi_d:g}")
    return Result(name, "band_ratio", {"numerator": list(numerator),
                                       "denominator": list(denominator), "measure": measure,
                                       "min_snr": min_snr}, {"image": fld},
                  {"masked_low_denominator": int((~ok & ~m.mask).sum())})
