"""Compiled version of the spatial-neighbour spike test (same arithmetic as the numpy one).

The numpy implementation stacks the 8 neighbours of every pixel and sorts them, which
costs 8 copies of the cube; this kernel visits each pixel once with a few small local
arrays, in parallel over rows. tests/test_preprocess.py checks that both agree.
"""

from __future__ import annotations

import numpy as np

try:
    import numba

    HAVE_NUMBA = True
except ImportError:  # pragma: no cover
    HAVE_NUMBA = False

if HAVE_NUMBA:
    @numba.njit(cache=True, nogil=True)
    def _median_small(v, k):  # pragma: no cover - compiled
        # insertion sort of the first k values, then the middle (mean of two when even)
        for i in range(1, k):
            x = v[i]
            j = i - 1
            while j >= 0 and v[j] > x:
                v[j + 1] = v[j]
                j -= 1
            v[j + 1] = x
        return 0.5 * (v[(k - 1) // 2] + v[k // 2])

    @numba.njit(parallel=True, cache=True, nogil=True)
    def spatial_spikes(cube, mask, level, threshold, grow):  # pragma: no cover - compiled
        ny, nx, n = cube.shape
        flags = np.zeros((ny, nx, n), np.bool_)
        repl = np.zeros((ny, nx, n))
        for iy in numba.prange(ny):
            qy = np.empty(8, np.int64)
            qx = np.empty(8, np.int64)
            scale = np.empty(8)
            vals = np.empty(8)
            med = np.empty(n)
            top = np.empty(n)
            resid = np.empty(n)
            absr = np.empty(n)
            spike = np.zeros(n, np.bool_)
            flank = np.zeros(n, np.bool_)
            for ix in range(nx):
                k = 0
                for dy in range(-1, 2):
                    for dx in range(-1, 2):
                        if dy == 0 and dx == 0:
                            continue
                        y, x = iy + dy, ix + dx
                        if 0 <= y < ny and 0 <= x < nx and not mask[y, x]:
                            qy[k] = y
                            qx[k] = x
                            lv = level[y, x]
                            scale[k] = level[iy, ix] / lv if lv > 0 else 1.0
                            k += 1
                if k == 0:
                    continue          # no usable neighbour: nothing to compare with
                for c in range(n):
                    t = -np.inf
                    for j in range(k):
                        v = cube[qy[j], qx[j], c] * scale[j]
                        vals[j] = v
                        if v > t:
                            t = v
                    m = _median_small(vals, k)
                    med[c] = m
                    top[c] = t
                    resid[c] = (cube[iy, ix, c] - m) / np.sqrt(max(m, 0.0) + 1.0)
                    absr[c] = abs(resid[c])
                    repl[iy, ix, c] = m
                if mask[iy, ix]:
                    continue
                gain = max(1.4826 * np.median(absr), 1e-12)
                for c in range(n):
                    sigma = gain * np.sqrt(max(med[c], 0.0) + 1.0)
                    spike[c] = (cube[iy, ix, c] - top[c]) > threshold * sigma
                    flank[c] = (cube[iy, ix, c] - med[c]) > grow * sigma
                    flags[iy, ix, c] = spike[c]
                for _ in range(3):  # grow into flank channels, as the numpy version does
                    prev = flags[iy, ix].copy()
                    for c in range(n):
                        near = prev[c] or (c > 0 and prev[c - 1]) or (c < n - 1 and prev[c + 1])
                        flags[iy, ix, c] = (near and flank[c]) or spike[c]
        return flags, repl
