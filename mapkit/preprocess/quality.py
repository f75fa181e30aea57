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


def _stats(block, with_signal: bool, engine: str):
    """(mad of the first differences, maximum, median) per spectrum from the compiled
    kernel, flattened over the leading axes; None where numpy is to do it."""
    from ._quality_kernel import HAVE_NUMBA

    if engine not in ("auto", "numba", "numpy"):
        raise ValueError(f"engine must be 'auto', 'numba' or 'numpy', not {engine!r}")
    if engine == "numba" and not HAVE_NUMBA:
        raise RuntimeError("numba is not installed")
    b = np.asarray(block, dtype=np.float64)
    if engine == "numpy" or not HAVE_NUMBA or b.ndim == 0 or b.shape[-1] < 2 or b.size == 0:
        return None
    from ._quality_kernel import spectrum_stats

    flat = np.ascontiguousarray(b.reshape(-1, b.shape[-1]))
    mad, top, med, finite = spectrum_stats(flat, with_signal)
    if not finite.all():          # NaN and inf propagate as numpy propagates them
        bad = ~finite
        mad[bad] = _mad_numpy(flat[bad])
        top[bad] = flat[bad].max(axis=-1)
        med[bad] = np.median(flat[bad], axis=-1)
    lead = b.shape[:-1]
    return mad.reshape(lead), top.reshape(lead), med.reshape(lead)


def _mad_numpy(b):
    d = np.diff(b, axis=-1)
    return np.median(np.abs(d - np.median(d, axis=-1, keepdims=True)), axis=-1)


def noise_sd(block, *, engine: str = "auto"):
    """Noise standard deviation of each spectrum from its first differences.

    For white noise the first difference has variance 2σ², and the median absolute
    deviation (× 1.4826) ignores the few large differences at bands and spikes.
    ``engine`` is ``"numba"`` (compiled, parallel over spectra), ``"numpy"`` or ``"auto"``
    (numba when installed); both give identical numbers.
    """
    stats = _stats(block, False, engine)
    mad = _mad_numpy(np.asarray(block, dtype=np.float64)) if stats is None else stats[0]
    return 1.4826 * mad / np.sqrt(2)


def snr(block, *, engine: str = "auto"):
    """Signal-to-noise ratio per spectrum: (maximum − median) / noise sd (0 where noise is 0).

    ``engine`` as in :func:`noise_sd`.
    """
    b = np.asarray(block, dtype=np.float64)
    stats = _stats(b, True, engine)
    if stats is None:
        signal = b.max(axis=-1) - np.median(b, axis=-1)
        sd = noise_sd(b, engine="numpy")
    else:
        mad, top, med = stats
        signal = top - med
        sd = 1.4826 * mad / np.sqrt(2)
    out = np.zeros_like(signal)
    np.divide(signal, sd, out=out, where=sd > 0)
    return out
