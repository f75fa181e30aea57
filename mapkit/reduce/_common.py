"""Helpers shared by the reduction methods: good-pixel spectra in, images out."""

from __future__ import annotations

import numpy as np

from ..core.ramanmap import RamanMap
from ..core.result import Axis
from ..errors import MapkitError


def good_spectra(m: RamanMap, *, what: str) -> tuple[np.ndarray, np.ndarray]:
    """(spectra of unmasked pixels as float64, their flat pixel indices); masked pixels never enter."""
    flat = m.spectra().astype(np.float64)
    good = np.flatnonzero(~m.mask.ravel())
    if good.size == 0:
        raise MapkitError(f"every pixel is masked; {what} has nothing to work on",
                          file=m.source, field="mask", fix="check the map's bad-pixel mask")
    return flat[good], good


def to_images(m: RamanMap, values: np.ndarray, good: np.ndarray, fill=np.nan) -> np.ndarray:
    """Scatter per-good-pixel rows (n_good, k) back into images (k, *spatial shape), fill
    elsewhere: (k, ny, nx) for a map, (k, nz, nx) for a section, (k, nz, ny, nx) for a volume."""
    spatial = m.shape[:-1]
    values = np.asarray(values)
    k = values.shape[1] if values.ndim == 2 else 1
    out = np.full((m.n_pixels, k), fill, dtype=np.result_type(values.dtype, np.asarray(fill).dtype))
    out[good] = values.reshape(good.size, k)
    return out.T.reshape(k, *spatial)


def image_axes(m: RamanMap) -> tuple[Axis, ...]:
    """The spatial axes of the map's images in µm: (y, x), (z, x) or (z, y, x)."""
    return tuple(Axis(name, m.coords(name), "um") for name in m.spatial_dims)


def shift_axis(m: RamanMap) -> Axis:
    return Axis("raman_shift", m.raman_shift, "1/cm")


def check_components(n: int, m: RamanMap, n_good: int, name="n_components"):
    if not isinstance(n, (int, np.integer)) or n < 1:
        raise MapkitError(f"{name} = {n!r} must be a positive integer", field=name,
                          fix="choose 2-10 for a typical map")
    limit = min(m.shape[-1], n_good)
    if n > limit:
        raise MapkitError(f"{name} = {n} exceeds what the map supports ({m.shape[-1]} channels, "
                          f"{n_good} good pixels)", file=m.source, field=name,
                          fix=f"choose at most {limit}")
