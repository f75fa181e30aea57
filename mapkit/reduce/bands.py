"""Band images: integrals over a shift range with a local linear baseline."""

from __future__ import annotations

import numpy as np

from ..core.ramanmap import RamanMap
from ..core.result import Field, Result
from ..preprocess.axis import crop_indices
from ._common import image_axes


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
    return np.trapezoid(y, s, axis=-1)


def band_image(m: RamanMap, lo: float, hi: float, *, name: str | None = None,
               local_baseline: bool = True) -> Result:
    """A band-integral image of the map over ``lo``-``hi`` cm⁻¹; masked pixels are NaN."""
    cube = np.asarray(m.load().intensity, dtype=np.float64)
    img = band_integral(cube, m.raman_shift, lo, hi, local_baseline=local_baseline)
    img[m.mask] = np.nan
    name = name or f"band_{lo:g}_{hi:g}"
    fld = Field("band_integral", img, image_axes(m), "counts*1/cm",
                long_name=f"integral {lo:g}-{hi:g} 1/cm")
    return Result(name, "band_integral", {"lo": lo, "hi": hi, "local_baseline": local_baseline},
                  {"image": fld})
