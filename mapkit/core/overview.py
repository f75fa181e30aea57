"""The mean-intensity image of a map, shown at once and made exact as the cube is read.

A lazily opened cube of several GB takes seconds to average. :func:`mean_image_steps`
first yields an estimate from a strided sample of the file's tiles (each tile read whole:
a tile is the smallest piece the file can give), then the same image with one band of rows
after another replaced by its exact mean, and last the exact mean image. The napari plugin
shows each step as it comes; anything else can take the last one.
"""

from __future__ import annotations

import math
import warnings
from typing import Iterator, NamedTuple

import numpy as np

#: bytes read for the first estimate (about 0.1-0.5 s from the page cache, 2 cores)
SAMPLE_BYTES = 128 << 20
#: bytes read per refining step (whole rows of tiles)
BAND_BYTES = 64 << 20


class MeanImageStep(NamedTuple):
    """One step: the image so far, the bands of rows already exact, and how many there are."""

    image: np.ndarray      # (ny, nx) float32
    done: int              # bands of rows exact so far
    total: int             # bands in all; ``done == total``: the exact mean image
    sampled: float         # share of the cube's spectra behind the values not yet exact

    @property
    def exact(self) -> bool:
        return self.done == self.total


def _mean(block) -> np.ndarray:
    block = block.mean(axis=-1)
    return np.asarray(block.compute() if hasattr(block, "compute") else block, np.float32)


def _tiles(m):
    """Row and column extents of the cube's storage tiles (its Dask chunks when lazy)."""
    if m.is_lazy:
        return tuple(m.intensity.chunks[0]), tuple(m.intensity.chunks[1])
    ny, nx = m.shape[:2]
    return (ny,), (nx,)


def mean_image_steps(m, *, sample_bytes: int | None = None,
                     band_bytes: int | None = None) -> Iterator[MeanImageStep]:
    """Yield the mean-over-shift image of map ``m``, first estimated, then exact.

    Parameters
    ----------
    m : RamanMap
        In memory or lazy; for a lazy map the reads follow its Dask chunks (the file's
        tiles of whole spectra).
    sample_bytes : int, optional
        Default :data:`SAMPLE_BYTES`. A cube at most this large (or in memory) is averaged at once: a single, exact
        step. A larger one is first estimated from every s-th tile along y and x, s chosen
        so that about this many bytes are read; each pixel shows the mean of the nearest
        sampled tile (a blocky but faithful overview).
    band_bytes : int, optional
        Bytes of whole rows of tiles read per refining step (default :data:`BAND_BYTES`).

    Yields
    ------
    MeanImageStep
        ``image`` is a new array each time; the last step has ``exact`` true and equals
        ``m.intensity.mean(axis=-1)``.

    Examples
    --------
    >>> import numpy as np, dask.array as da
    >>> from mapkit import RamanMap
    >>> cube = np.arange(8 * 8 * 4, dtype=np.float32).reshape(8, 8, 4)
    >>> lazy = RamanMap(da.from_array(cube, chunks=(2, 2, 4)), raman_shift=np.arange(4.0),
    ...                 x=np.arange(8.0), y=np.arange(8.0))
    >>> steps = list(mean_image_steps(lazy, sample_bytes=64, band_bytes=128))
    >>> [s.done for s in steps], steps[-1].exact
    ([0, 1, 2, 3, 4], True)
    >>> bool(np.array_equal(steps[-1].image, cube.mean(axis=-1)))
    True
    """
    sample_bytes = SAMPLE_BYTES if sample_bytes is None else sample_bytes
    band_bytes = BAND_BYTES if band_bytes is None else band_bytes
    cube = m.intensity
    itemsize = np.dtype(cube.dtype).itemsize
    total_bytes = int(np.prod(m.shape)) * itemsize
    # depth sections and volumes are averaged at once (the tile estimate is per (y, x) plane)
    if not m.is_lazy or total_bytes <= sample_bytes or len(m.shape) != 3:
        yield MeanImageStep(_mean(cube), 1, 1, 1.0)
        return
    ny, nx, ns = m.shape
    ty, tx = _tiles(m)
    row_bytes = nx * ns * itemsize
    # bands of whole tile rows, about band_bytes each
    bands, y0, rows = [], 0, 0
    for k, h in enumerate(ty):
        rows += h
        if rows * row_bytes >= band_bytes or k == len(ty) - 1:
            bands.append((y0, y0 + rows))
            y0, rows = y0 + rows, 0
    stride = max(1, math.ceil(math.sqrt(total_bytes / sample_bytes)))
    image, share = _estimate(cube, ty, tx, stride)
    yield MeanImageStep(image.copy(), 0, len(bands), share)
    for k, (a, b) in enumerate(bands, 1):
        image[a:b] = _mean(cube[a:b])
        yield MeanImageStep(image.copy(), k, len(bands), share)


def _estimate(cube, ty, tx, s):
    """(image, share sampled): every s-th tile along y and x averaged, nearest tile filled."""
    sub = cube.blocks[::s, ::s]
    means = _mean(sub)
    ey = np.cumsum((0,) + ty[::s])
    ex = np.cumsum((0,) + tx[::s])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)   # an all-NaN tile stays NaN
        tile = np.array([[np.nanmean(means[ey[i]:ey[i + 1], ex[j]:ex[j + 1]])
                          for j in range(len(ex) - 1)] for i in range(len(ey) - 1)],
                        np.float32)
    # each pixel takes the sampled tile nearest to its own tile
    row_tile = np.repeat(np.arange(len(ty)), ty)
    col_tile = np.repeat(np.arange(len(tx)), tx)
    ry = np.minimum(np.rint(row_tile / s).astype(int), tile.shape[0] - 1)
    rx = np.minimum(np.rint(col_tile / s).astype(int), tile.shape[1] - 1)
    share = (ey[-1] * ex[-1]) / (sum(ty) * sum(tx))
    return tile[ry][:, rx], float(share)
