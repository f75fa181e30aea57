"""Map-level preprocessing steps: each wraps a block function and records provenance."""

from __future__ import annotations

import numpy as np

from ..core.provenance import Step
from ..core.ramanmap import RamanMap
from ..errors import MapkitError
from .baseline import als_baseline
from .normalise import normalise
from .quality import bad_pixel_mask
from .spikes import spatial_spike_mask


def _cube(m: RamanMap) -> np.ndarray:
    return np.asarray(m.load().intensity, dtype=np.float64)


def flag_bad_pixels(m: RamanMap, *, saturation: float | None = None,
                    max_fraction: float = 0.5) -> tuple[RamanMap, dict]:
    """Mask non-finite, dead and saturated pixels; zero their values so no NaN travels on.

    Returns the new map and a report ``{"nonfinite": n, "dead": n, "saturated": n}``.
    More than ``max_fraction`` of the map bad is an error, not a result.
    """
    cube = _cube(m)
    ny, nx, ns = cube.shape
    flags = bad_pixel_mask(cube.reshape(-1, ns), saturation=saturation)
    bad = np.zeros(ny * nx, bool)
    for v in flags.values():
        bad |= v
    bad = bad.reshape(ny, nx) | m.mask
    report = {k: int(v.sum()) for k, v in flags.items()}
    if bad.mean() > max_fraction:
        raise MapkitError(f"{bad.sum()} of {bad.size} pixels are non-finite, dead or saturated "
                          f"({report})", file=m.source, field="intensity",
                          fix="check the export; NaN/Inf or constant spectra cannot be analysed")
    clean = np.where(bad[..., None] | ~np.isfinite(cube), 0.0, cube).astype(np.float32)
    step = Step("flag_bad_pixels", {"saturation": saturation, **report})
    return m.derive(clean, step, mask=bad), report


def remove_spikes(m: RamanMap, *, threshold: float = 8.0, grow: float = 3.0):
    """Replace cosmic-ray spikes by the scaled median of the spatial neighbours.

    Returns the cleaned map and the boolean spike mask (ny, nx, n_shift).
    """
    cube = _cube(m)
    spikes, replacement = spatial_spike_mask(cube, m.mask, threshold=threshold, grow=grow)
    out = np.where(spikes, replacement, cube).astype(np.float32)
    step = Step("remove_spikes", {"method": "spatial_neighbours", "threshold": threshold,
                                  "grow": grow, "channels_replaced": int(spikes.sum()),
                                  "spectra_touched": int(spikes.any(axis=-1).sum())})
    return m.derive(out, step), spikes


def remove_baseline(m: RamanMap, *, lam: float = 1e5, p: float = 0.01, block: int = 4096):
    """Subtract an asymmetric least squares baseline from every good pixel.

    Returns the corrected map and the baselines (ny, nx, n_shift), float32.
    """
    cube = _cube(m)
    ny, nx, ns = cube.shape
    flat = cube.reshape(-1, ns)
    base = np.zeros_like(flat)
    good = np.flatnonzero(~m.mask.ravel())
    for start in range(0, good.size, block):
        idx = good[start:start + block]
        base[idx] = als_baseline(flat[idx], lam=lam, p=p)
    base = base.reshape(cube.shape)
    step = Step("remove_baseline", {"method": "als", "lam": lam, "p": p})
    return m.derive((cube - base).astype(np.float32), step), base.astype(np.float32)


def normalise_map(m: RamanMap, *, method: str = "vector"):
    """Normalise every spectrum; masked pixels stay zero."""
    cube = _cube(m)
    ny, nx, ns = cube.shape
    out = normalise(cube.reshape(-1, ns), m.raman_shift, method=method).reshape(cube.shape)
    out[m.mask] = 0.0
    return m.derive(out.astype(np.float32), Step("normalise", {"method": method}))
