"""Spectra summarised over a region of the map."""

from __future__ import annotations

import numpy as np

from ..core.ramanmap import RamanMap
from ..errors import MapkitError


def region_spectrum(m: RamanMap, region) -> tuple[np.ndarray, np.ndarray, int]:
    """Mean and standard deviation spectrum of the unmasked pixels in ``region`` (ny, nx).

    Returns (mean, sd, number of pixels). Only the selected pixels are read.

    Examples
    --------
    >>> m = RamanMap(np.arange(8.).reshape(2, 2, 2), raman_shift=[1., 2.], x=[0., 1.], y=[0., 1.])
    >>> mean, sd, n = region_spectrum(m, np.array([[True, False], [True, False]]))
    >>> mean.tolist(), n
    ([2.0, 3.0], 2)
    """
    region = np.asarray(region, bool) & ~m.mask
    if region.shape != m.mask.shape:
        raise MapkitError(f"region shape {region.shape} does not match the map {m.mask.shape}",
                          field="region", fix="draw the region on this map")
    iy, ix = np.nonzero(region)
    if iy.size == 0:
        raise MapkitError("the region holds no unmasked pixel", field="region",
                          fix="draw it over the map")
    if m.is_lazy:
        spectra = np.stack([m.spectrum(a, b) for a, b in zip(iy, ix)]).astype(float)
    else:
        spectra = np.asarray(m.intensity, float)[iy, ix]
    sd = spectra.std(axis=0, ddof=1) if iy.size > 1 else np.zeros(spectra.shape[1])
    return spectra.mean(axis=0), sd, int(iy.size)
