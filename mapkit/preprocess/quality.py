"""Detection of pixels that must not enter any decomposition."""

from __future__ import annotations

import numpy as np


def bad_pixel_mask(block, *, saturation: float | None = None,
                   ceiling: float | None = None) -> dict[str, np.ndarray]:
    """Flag non-finite, dead and saturated spectra in a block ``(n_pixels, n_shift)``.

    Returns boolean vectors ``nonfinite``, ``dead`` (constant spectrum: a dead
    or blocked detector row) and ``saturated`` (channels at channels at the
    detector's ceiling). Without ``saturation``, the ceiling is the block's
    maximum when three or more channels sit exactly on it: a flat top is how clipping shows.
    """
    b = np.asarray(block)
    nonfinite = ~np.all(np.isfinite(b), axis=-1)
    safe = np.where(np.isfinite(b), b, 0.0)
    dead = np.ptp(safe, axis=-1) == 0
    if saturation is None:
        # the ceiling of the whole map when known (chunk-wise use), else of this block
        top = ceiling if ceiling is not None else (float(safe.max()) if safe.size else 0.0)
        at_top = (safe == top).sum(axis=-1)
        saturated = (at_top >= 3) & (top > 0)
    else:
        saturated = (safe >= saturation).any(axis=-1)
    return {"nonfinite": nonfinite, "dead": dead & ~nonfinite, "saturated": saturated & ~dead}


def noise_sd(block):
    """Noise standard deviation of each spectrum from its first differences.

    For white noise the first difference has variance 2σ², and the median absolute
    deviation (× 1.4826) ignores the few large differences at bands and spikes.
    """
    d = np.diff(np.asarray(block, dtype=np.float64), axis=-1)
    mad = np.median(np.abs(d - np.median(d, axis=-1, keepdims=True)), axis=-1)
    return 1.4826 * mad / np.sqrt(2)


def snr(block):
    """Signal-to-noise ratio per spectrum: (maximum − median) / noise sd (0 where noise is 0)."""
    b = np.asarray(block, dtype=np.float64)
    signal = b.max(axis=-1) - np.median(b, axis=-1)
    sd = noise_sd(b)
    out = np.zeros_like(signal)
    np.divide(signal, sd, out=out, where=sd > 0)
    return out
