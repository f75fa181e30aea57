"""Detection of pixels that must not enter any decomposition."""

from __future__ import annotations

import numpy as np


def bad_pixel_mask(block, *, saturation: float | None = None) -> dict[str, np.ndarray]:
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
        top = float(safe.max()) if safe.size else 0.0
        at_top = (safe == top).sum(axis=-1)
        saturated = (at_top >= 3) & (top > 0)
    else:
        saturated = (safe >= saturation).any(axis=-1)
    return {"nonfinite": nonfinite, "dead": dead & ~nonfinite, "saturated": saturated & ~dead}
