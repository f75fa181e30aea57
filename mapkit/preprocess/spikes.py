"""Cosmic-ray spike detection.

Two tests: :func:`spectral_spike_mask` for a lone spectrum (Whitaker & Hayes
2018), and :func:`spatial_spike_mask` for maps, which compares each pixel with
its spatial neighbours at the same shift. A spike is a single-pixel event, so
a real band (present in neighbouring pixels too) is not mistaken for one, even
when it is only one or two channels wide; a purely spectral test cannot tell a
sharp band from a spike and clips it.
"""

from __future__ import annotations

import warnings

import numpy as np


def modified_z_scores(block):
    """Modified z-score of the first difference along the shift axis.

    z = 0.6745 (Δx − median(Δx)) / MAD (Iglewicz & Hoaglin 1993, as applied to
    spectra by Whitaker & Hayes 2018, Chemom. Intell. Lab. Syst. 179:82).
    Returned with the same shape as ``block``; the first channel gets 0.
    """
    b = np.atleast_2d(np.asarray(block, dtype=np.float64))
    d = np.diff(b, axis=-1)
    med = np.median(d, axis=-1, keepdims=True)
    mad = np.median(np.abs(d - med), axis=-1, keepdims=True)
    z = np.zeros_like(b)
    np.divide(0.6745 * (d - med), mad, out=z[:, 1:], where=mad > 0)
    return z


def spectral_spike_mask(block, *, threshold: float = 6.0, width: int = 2):
    """Spike channels in each spectrum from the modified z-score of its first difference.

    A jump between two channels whose |z| exceeds ``threshold`` flags both channels,
    widened by ``width`` channels on each side to cover the spike's flanks (Whitaker &
    Hayes 2018). The test is symmetric, so a reversed axis flags the mirrored channels.
    Use it for single spectra; for maps prefer :func:`spatial_spike_mask`.
    """
    b = np.atleast_2d(np.asarray(block, dtype=np.float64))
    jumps = np.abs(modified_z_scores(b)[:, 1:]) > threshold       # between i and i+1
    flagged = np.zeros(b.shape, bool)
    flagged[:, :-1] |= jumps
    flagged[:, 1:] |= jumps
    out = flagged.copy()
    for k in range(1, width + 1):
        out[:, :-k] |= flagged[:, k:]
        out[:, k:] |= flagged[:, :-k]
    return out.reshape(np.shape(block))


def _neighbours(cube, mask):
    """The spatial neighbours of every pixel, shape (8, ny, nx, n) for a map (26, nz, ny,
    nx, n for a volume); NaN off the map or masked, so an edge pixel, a line scan or a
    depth section uses the neighbours that exist along each axis."""
    import itertools

    spatial = cube.shape[:-1]
    padded = np.full(tuple(s + 2 for s in spatial) + cube.shape[-1:], np.nan)
    padded[(slice(1, -1),) * len(spatial)] = np.where(mask[..., None], np.nan, cube)
    offsets = [o for o in itertools.product((-1, 0, 1), repeat=len(spatial)) if any(o)]
    return np.stack([padded[tuple(slice(1 + d, 1 + d + s) for d, s in zip(o, spatial))]
                     for o in offsets])


#: channel stride of the per-pixel level and noise-gain estimates (shared with the kernel)
GAIN_STRIDE = 8


def sampled_channels(n: int, stride: int = GAIN_STRIDE) -> np.ndarray:
    """Every ``stride``-th channel counted from both ends: the same set on a reversed axis.

    Examples
    --------
    >>> sampled_channels(10, 4).tolist()
    [0, 1, 4, 5, 8, 9]
    """
    c = np.arange(n)
    return c[(c % stride == 0) | ((n - 1 - c) % stride == 0)]


def _nanmedian_first(a):
    """Median over axis 0 ignoring NaN, for the short neighbour axis (much faster than
    np.nanmedian here: one sort of 8 values per element instead of a generic reduction)."""
    s = np.sort(np.moveaxis(a, 0, -1), axis=-1)          # NaN sort last
    k = np.sum(~np.isnan(s), axis=-1)
    lo = np.maximum((k - 1) // 2, 0)[..., None]
    hi = np.maximum(k // 2, 0)[..., None]
    med = 0.5 * (np.take_along_axis(s, lo, -1)[..., 0] + np.take_along_axis(s, hi, -1)[..., 0])
    return np.where(k > 0, med, np.nan)


def spatial_spike_mask(cube, mask=None, *, threshold: float = 8.0, grow: float = 3.0,
                       engine: str = "auto"):
    """Spike channels of a map cube ``(ny, nx, n_shift)`` found against spatial neighbours.

    For each pixel the neighbours are scaled to its overall level (ratio of
    median intensities), and a channel is a spike where it exceeds the highest
    scaled neighbour by more than ``threshold`` noise units. Only positive
    outliers count: cosmic rays add charge, never remove it. The noise unit is
    Poisson-like, √(neighbour median + 1), times a gain estimated robustly for
    each pixel from all its channels. Each detected spike is grown to adjacent channels that
    still exceed the neighbour median by ``grow`` noise units (spike flanks).

    Returns
    -------
    spikes : bool array (ny, nx, n_shift)
    replacement : float64 array (ny, nx, n_shift)
        Where ``spikes`` is True, the scaled neighbour median: the value the spike channel
        is replaced by (elsewhere the values are unspecified).
    """
    cube = np.asarray(cube, dtype=np.float64)
    n = cube.shape[-1]
    mask = np.zeros(cube.shape[:-1], bool) if mask is None else np.asarray(mask, bool)
    from ._spikes_kernel import HAVE_NUMBA

    if cube.ndim == 3 and (engine == "numba" or (engine == "auto" and HAVE_NUMBA)):
        from ._spikes_kernel import spatial_spikes

        return spatial_spikes(np.ascontiguousarray(cube), np.ascontiguousarray(mask),
                              float(threshold), float(grow), sampled_channels(n))
    nb = _neighbours(cube, mask)
    level = np.median(cube[..., sampled_channels(n)], axis=-1)  # (ny, nx): overall level
    nb_level = _neighbours(level[..., None], mask)[..., 0]  # (8, ny, nx), NaN off the map
    with warnings.catch_warnings():  # all-NaN neighbours (edges, masked) are handled below
        warnings.simplefilter("ignore", RuntimeWarning)
        return _spatial(cube, mask, nb, level, nb_level, threshold, grow)


def remove_spatial_spikes(cube, mask=None, *, threshold: float = 8.0, grow: float = 3.0,
                          engine: str = "auto", out=None):
    """Replace the spikes :func:`spatial_spike_mask` finds by the scaled neighbour median.

    Returns ``(cleaned, spikes)``: a float32 cube and the boolean spike mask. The compiled
    engine reads float32 or float64 input as it is (every comparison is made in float64
    either way) and writes the replacements straight into the float32 copy. ``out``: a
    float32 array of the cube's shape (a view is fine) to hold the cleaned cube.

    Examples
    --------
    >>> cube = np.full((3, 3, 40), 100.0)
    >>> cube[1, 1, 20] = 900.0
    >>> cleaned, spikes = remove_spatial_spikes(cube)
    >>> int(spikes.sum()), float(cleaned[1, 1, 20])
    (1, 100.0)
    """
    from ._spikes_kernel import HAVE_NUMBA

    shape = np.shape(cube)
    n = shape[-1]
    mask = np.zeros(shape[:-1], bool) if mask is None else np.ascontiguousarray(mask, bool)
    if len(shape) == 3 and (engine == "numba" or (engine == "auto" and HAVE_NUMBA)):
        from ._spikes_kernel import sampled_levels, spatial_spikes_into

        src = np.asarray(cube)
        if src.dtype not in (np.float32, np.float64):
            src = src.astype(np.float64)
        src = np.ascontiguousarray(src)
        idx = sampled_channels(n)
        if out is None:
            cleaned = src.astype(np.float32)
        else:
            if out.shape != src.shape or out.dtype != np.float32:
                raise ValueError(f"out must be float32 of shape {src.shape}, not {out.dtype} "
                                 f"{out.shape}")
            cleaned = out
            cleaned[...] = src
        spikes = np.zeros(src.shape, bool)
        values, level = sampled_levels(src, idx)
        spatial_spikes_into(src, mask, values, level, float(threshold), float(grow), idx,
                            spikes, cleaned)
        return cleaned, spikes
    spikes, replacement = spatial_spike_mask(cube, mask, threshold=threshold, grow=grow,
                                             engine="numpy")
    cleaned = np.where(spikes, replacement, cube).astype(np.float32)
    if out is not None:
        out[...] = cleaned
        cleaned = out
    return cleaned, spikes


def _spatial(cube, mask, nb, level, nb_level, threshold, grow):
    with np.errstate(invalid="ignore", divide="ignore"):
        scale = np.where(nb_level > 0, level[None] / nb_level, 1.0)
    scaled = nb * scale[..., None]
    lonely = np.all(np.isnan(nb_level), axis=0)           # (ny, nx): no usable neighbour
    scaled[:, lonely] = 0.0
    med = _nanmedian_first(scaled)
    top = np.fmax.reduce(scaled, axis=0)
    # Poisson-like noise unit, with a gain estimated per pixel (robust over its channels) so
    # the result for a pixel depends only on its neighbourhood: chunk-wise equals whole-map
    unit = np.sqrt(np.maximum(med, 0.0) + 1.0)
    resid = (cube - med) / unit
    # every 8th channel is plenty for this robust scale and keeps the test fast
    gain = 1.4826 * np.median(np.abs(resid[..., sampled_channels(cube.shape[-1])]), axis=-1,
                              keepdims=True)
    sigma = np.maximum(gain, 1e-12) * unit
    good = ~mask & ~lonely
    spikes = ((cube - top) > threshold * sigma) & good[..., None]
    flank = ((cube - med) > grow * sigma) & good[..., None]
    grown = spikes.copy()
    for _ in range(3):  # spikes rarely span more than a few channels
        step = grown.copy()
        step[..., 1:] |= grown[..., :-1]
        step[..., :-1] |= grown[..., 1:]
        grown = step & flank | spikes
    return grown, med


def interpolate_flagged(block, flags):
    """Replace flagged channels of each spectrum by linear interpolation from unflagged ones."""
    b = np.array(block, dtype=np.float64, ndmin=2)
    f = np.asarray(flags, bool).reshape(b.shape)
    idx = np.arange(b.shape[1])
    for r in np.flatnonzero(f.any(axis=1)):
        ok = ~f[r]
        if ok.sum() >= 2:
            b[r, f[r]] = np.interp(idx[f[r]], idx[ok], b[r, ok])
    return b
