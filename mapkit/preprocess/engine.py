"""Run a per-spectrum function over a whole map, in memory or chunk-wise on Dask.

A spectral step is a function ``f(block) -> block`` on float64 arrays
``(n_pixels, n_in) -> (n_pixels, n_out)`` that treats every row on its own. The engine
feeds it blocks of good pixels (numpy) or whole Dask chunks (lazy maps, every chunk
holding complete spectra), writes float32, and leaves masked pixels at zero, so the
in-memory and chunk-wise paths give identical results.
"""

from __future__ import annotations

import numpy as np

from ..core.ramanmap import RamanMap

BLOCK_PIXELS = 4096


def map_spectra(m: RamanMap, func, n_out: int | None = None, *, block_pixels: int = BLOCK_PIXELS,
                float32_in: bool = False):
    """Apply ``func`` to every spectrum of ``m``; returns a numpy or Dask cube (float32).

    ``float32_in``: ``func`` takes float32 blocks as they are (it computes in float64 from
    them, so its results are those of the float64 copy); the copy is then not made.
    """
    ny, nx, ns = m.shape
    n_out = ns if n_out is None else n_out
    if m.is_lazy:
        import dask.array as da

        data = m.intensity.rechunk({2: -1})

        def on_chunk(b, bad):
            b = np.asarray(b)
            keep = float32_in and b.dtype == np.float32
            flat = (b if keep else b.astype(np.float64, copy=False)).reshape(-1, b.shape[2])
            out = func(flat).reshape(b.shape[0], b.shape[1], n_out).astype(np.float32,
                                                                         copy=False)
            if np.may_share_memory(out, b):   # never write into the input's chunk
                out = out.copy()
            out[bad[..., 0]] = 0.0            # masked pixels at zero, in place
            return out

        bad = da.from_array(m.mask[..., None], chunks=data.chunks[:2] + ((1,),))
        return data.map_blocks(on_chunk, bad, chunks=data.chunks[:2] + ((n_out,),),
                               dtype=np.float32)
    flat = np.asarray(m.intensity).reshape(-1, ns)
    out = np.zeros((ny * nx, n_out), np.float32)
    good = np.flatnonzero(~m.mask.ravel())
    for start in range(0, good.size, block_pixels):
        idx = good[start:start + block_pixels]
        out[idx] = func(flat[idx].astype(np.float64))
    return out.reshape(ny, nx, n_out)


def good_mean_spectrum(m: RamanMap) -> np.ndarray:
    """Mean spectrum of the unmasked pixels (a reduction; chunk-wise for lazy maps)."""
    good = ~m.mask
    if not good.any():
        return np.zeros(m.shape[-1])
    if m.is_lazy:
        import dask.array as da

        g = da.from_array(good[..., None], chunks=m.intensity.chunks[:2] + ((1,),))
        total = da.where(g, m.intensity.astype(np.float64), 0.0).sum(axis=(0, 1))
        return np.asarray(total.compute()) / good.sum()
    return np.asarray(m.intensity, dtype=np.float64)[good].mean(axis=0)
