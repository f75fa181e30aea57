"""Detection of pixels that must not enter any decomposition."""

from __future__ import annotations

import numpy as np


def bad_pixel_mask(block, *, saturation: float | None = None,
                   ceiling: float | None = None) -> dict[str, np.ndarray]:
    """Flag non-finite, dead and saturated spectra in a block ``(n_pixels, n_shift)``.

    Returns boolean vectors ``nonfinite``, ``dead`` (constant spectrum: a dead
    or blocked detector row) and ``saturated`` (channels at the detector's
    ceiling). Without ``saturation``, the ceiling is the block's
    maximum when three or more channels sit exactly on it: a flat top is how clipping shows.
    """
    return bad_pixels_from_tops(pixel_tops(block), saturation=saturation, ceiling=ceiling)


def pixel_tops(block) -> dict[str, np.ndarray]:
    """What :func:`bad_pixel_mask` needs of each spectrum, in one pass over a block:
    ``nonfinite``, ``dead`` (constant), ``top`` (the largest value, non-finite values read
    as 0) and ``at_top`` (how many channels equal it). A map's flags then follow from the
    tops of its chunks and the map's ceiling, the largest ``top``, without a second pass."""
    b = np.asarray(block)
    finite = np.isfinite(b)
    nonfinite = ~np.all(finite, axis=-1)
    safe = b if not nonfinite.any() else np.where(finite, b, 0.0)
    top = safe.max(axis=-1) if b.shape[-1] else np.zeros(b.shape[:-1])
    dead = (top == safe.min(axis=-1)) if b.shape[-1] else np.ones(b.shape[:-1], bool)
    at_top = (safe == top[..., None]).sum(axis=-1)
    return {"nonfinite": nonfinite, "dead": dead, "top": top, "at_top": at_top}


def bad_pixels_from_tops(tops, *, saturation: float | None = None,
                         ceiling: float | None = None) -> dict[str, np.ndarray]:
    """:func:`bad_pixel_mask`'s flags from :func:`pixel_tops` (``ceiling``: the map's,
    when the tops are those of one chunk)."""
    nonfinite, dead, top = tops["nonfinite"], tops["dead"], tops["top"]
    if saturation is None:
        # the ceiling of the whole map when known (chunk-wise use), else of this block
        c = ceiling if ceiling is not None else (float(top.max()) if top.size else 0.0)
        saturated = (top == c) & (tops["at_top"] >= 3) & (c > 0)
    else:
        saturated = top >= saturation
    return {"nonfinite": nonfinite, "dead": dead & ~nonfinite, "saturated": saturated & ~dead}


def _stats(block, with_signal: bool, engine: str):
    """(mad of the first differences, maximum, median) per spectrum from the compiled
    kernel, flattened over the leading axes; None where numpy is to do it."""
    from ._quality_kernel import HAVE_NUMBA

    if engine not in ("auto", "numba", "numpy"):
        raise ValueError(f"engine must be 'auto', 'numba' or 'numpy', not {engine!r}")
    if engine == "numba" and not HAVE_NUMBA:
        raise RuntimeError("numba is not installed")
    b = np.asarray(block)
    if b.dtype != np.float32:     # the kernel reads float32 as it is (converting exactly)
        b = b.astype(np.float64, copy=False)
    if engine == "numpy" or not HAVE_NUMBA or b.ndim == 0 or b.shape[-1] < 2 or b.size == 0:
        return None
    from ._quality_kernel import spectrum_stats

    flat = np.ascontiguousarray(b.reshape(-1, b.shape[-1]))
    mad, top, med, finite = spectrum_stats(flat, with_signal)
    if not finite.all():          # NaN and inf propagate as numpy propagates them
        bad = ~finite
        rows = flat[bad].astype(np.float64)
        mad[bad] = _mad_numpy(rows)
        top[bad] = rows.max(axis=-1)
        med[bad] = np.median(rows, axis=-1)
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
    stats = _stats(block, True, engine)
    if stats is None:
        b = np.asarray(block, dtype=np.float64)
        signal = b.max(axis=-1) - np.median(b, axis=-1)
        sd = noise_sd(b, engine="numpy")
    else:
        mad, top, med = stats
        signal = top - med
        sd = 1.4826 * mad / np.sqrt(2)
    out = np.zeros_like(signal)
    np.divide(signal, sd, out=out, where=sd > 0)
    return out
