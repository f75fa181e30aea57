"""The mean image of a large map: an estimate from a sample of its tiles at once, then exact.

Reference for the exact image: numpy's mean over the shift axis in float64 (Harris et al.
2020, "Array programming with NumPy", Nature 585:357-362).
"""

from __future__ import annotations

import dask.array as da
import numpy as np
import pytest

from mapkit import RamanMap
from mapkit.core.overview import mean_image_steps


def _lazy(cube, tile=(16, 16)):
    """A lazy map over ``cube`` in tiles of whole spectra, recording which tiles are read."""
    reads = []

    def read(block_info=None):
        loc = block_info[None]["array-location"]
        reads.append((loc[0][0] // tile[0], loc[1][0] // tile[1]))
        return cube[tuple(slice(a, b) for a, b in loc)]

    chunks = da.core.normalize_chunks((tile[0], tile[1], cube.shape[2]), cube.shape)
    arr = da.map_blocks(read, chunks=chunks, dtype=cube.dtype,
                        meta=np.empty((0, 0, 0), cube.dtype))
    m = RamanMap(arr, raman_shift=np.linspace(100, 1800, cube.shape[2]),
                 x=np.arange(cube.shape[1], dtype=float), y=np.arange(cube.shape[0], dtype=float))
    return m, reads


@pytest.fixture(scope="module")
def cube(sample_map):
    return np.asarray(sample_map.intensity, np.float32)   # 48 x 64 x 600: 3 x 4 tiles


def test_last_step_is_the_exact_mean_and_steps_only_improve(cube):
    m, _ = _lazy(cube)
    exact = cube.astype(np.float64).mean(axis=-1)
    tile_bytes = 16 * 16 * cube.shape[2] * 4
    steps = list(mean_image_steps(m, sample_bytes=2 * tile_bytes, band_bytes=tile_bytes))
    assert [s.done for s in steps] == [0, 1, 2, 3]          # estimate, then 3 bands of rows
    assert [s.exact for s in steps] == [False, False, False, True]
    np.testing.assert_allclose(steps[-1].image, exact, rtol=1e-6)
    assert steps[-1].image.dtype == np.float32 and steps[-1].image.shape == exact.shape
    # each step: the bands done are exact, the rest is still the estimate
    for s in steps[:-1]:
        rows = 16 * s.done
        np.testing.assert_allclose(s.image[:rows], exact[:rows], rtol=1e-6)
        np.testing.assert_array_equal(s.image[rows:], steps[0].image[rows:])
    errors = [np.abs(s.image - exact).mean() for s in steps]
    assert all(b <= a for a, b in zip(errors, errors[1:])) and errors[-1] < 1e-3 * exact.mean()


def test_estimate_reads_a_strided_sample_of_tiles(cube):
    m, reads = _lazy(cube)
    total = cube.nbytes
    tile_bytes = 16 * 16 * cube.shape[2] * 4
    steps = mean_image_steps(m, sample_bytes=total // 4)   # about a quarter: every 2nd tile
    first = next(steps)
    assert sorted(set(reads)) == [(0, 0), (0, 2), (2, 0), (2, 2)]
    assert len(reads) * tile_bytes <= total // 2
    assert first.sampled == pytest.approx(4 / 12)
    # every pixel shows the mean of the sampled tile nearest to its own tile
    exact = cube.astype(np.float64).mean(axis=-1)
    tile_mean = {(i, j): exact[16 * i:16 * i + 16, 16 * j:16 * j + 16].mean()
                 for i in (0, 2) for j in (0, 2)}
    nearest = {0: 0, 1: 0, 2: 2, 3: 2}   # tile index -> sampled one (rounding 0.5 to even)
    for i in range(3):
        for j in range(4):
            block = first.image[16 * i:16 * i + 16, 16 * j:16 * j + 16]
            np.testing.assert_allclose(block, tile_mean[(nearest[i], nearest[j])], rtol=1e-5)
    reads.clear()
    list(steps)
    assert sorted(set(reads)) == [(i, j) for i in range(3) for j in range(4)]


def test_small_or_in_memory_map_is_exact_at_once(cube, sample_map):
    steps = list(mean_image_steps(sample_map))          # in memory
    assert len(steps) == 1 and steps[0].exact
    np.testing.assert_allclose(steps[0].image, cube.astype(np.float64).mean(axis=-1), rtol=1e-6)
    m, reads = _lazy(cube)
    steps = list(mean_image_steps(m))                   # 7 MB: under the default sample size
    assert len(steps) == 1 and steps[0].exact and len(reads) == 12


def test_non_finite_pixels_stay_in_the_exact_image_only_where_they_are(cube):
    bad = cube.copy()
    bad[3, 5, :] = np.nan
    m, _ = _lazy(bad)
    steps = list(mean_image_steps(m, sample_bytes=bad.nbytes // 4))
    assert np.isfinite(steps[0].image).all()            # one bad pixel does not blank a tile
    assert np.isnan(steps[-1].image[3, 5]) and np.isfinite(steps[-1].image).sum() == 48 * 64 - 1
