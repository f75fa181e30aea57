"""Compiled version of the spatial-neighbour spike test (same decisions as the numpy one).

The numpy implementation stacks the 8 neighbours of every pixel and sorts them at every
channel. This kernel visits each pixel once and works out only what can change the
answer: the noise gain from every 8th channel counted from both ends (as numpy does); the largest
scaled neighbour at every channel in one vectorisable pass; since a spike must exceed it
by more than threshold x gain, the neighbour median is computed only for the rare
candidates and for the few channels next to a spike (flanks).
tests/test_preprocess.py checks that both engines flag the same channels.
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

    @numba.njit(cache=True, nogil=True)
    def _med_top(cube, qy, qx, scale, k, c, vals):  # pragma: no cover - compiled
        t = -np.inf
        for j in range(k):
            v = cube[qy[j], qx[j], c] * scale[j]
            vals[j] = v
            if v > t:
                t = v
        return _median_small(vals, k), t

    @numba.njit(parallel=True, cache=True, nogil=True)
    def spatial_spikes(cube, mask, level, threshold, grow, sampled):  # pragma: no cover
        ny, nx, n = cube.shape
        flags = np.zeros((ny, nx, n), np.bool_)
        repl = np.empty((ny, nx, n))
        for iy in numba.prange(ny):
            qy = np.empty(8, np.int64)
            qx = np.empty(8, np.int64)
            scale = np.empty(8)
            vals = np.empty(8)
            absr = np.empty(sampled.size)
            spike = np.zeros(n, np.bool_)
            near = np.zeros(n, np.bool_)
            top = np.empty(n)
            for ix in range(nx):
                if mask[iy, ix]:
                    continue
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
                # robust noise gain from the sampled channels
                for j in range(sampled.size):
                    c = sampled[j]
                    m, _ = _med_top(cube, qy, qx, scale, k, c, vals)
                    absr[j] = abs((cube[iy, ix, c] - m) / np.sqrt(max(m, 0.0) + 1.0))
                gain = max(1.4826 * np.median(absr), 1e-12)
                any_spike = False
                # the largest scaled neighbour at every channel (a vectorisable pass)
                for c in range(n):
                    top[c] = -np.inf
                for j in range(k):
                    sj = scale[j]
                    row = cube[qy[j], qx[j]]
                    for c in range(n):
                        top[c] = max(top[c], row[c] * sj)
                # sigma >= gain (the noise unit is at least 1), so v - top > threshold * gain
                # is necessary for a spike; only those channels need the neighbour median
                floor = threshold * gain
                own = cube[iy, ix]
                for c in range(n):
                    spike[c] = False
                    v = own[c]
                    if v - top[c] <= floor:
                        continue
                    m, t = _med_top(cube, qy, qx, scale, k, c, vals)
                    sigma = gain * np.sqrt(max(m, 0.0) + 1.0)
                    if (v - t) > threshold * sigma:
                        spike[c] = True
                        any_spike = True
                        flags[iy, ix, c] = True
                        repl[iy, ix, c] = m
                if not any_spike:
                    continue
                for _ in range(3):  # grow into flank channels, as the numpy version does
                    for c in range(n):
                        near[c] = flags[iy, ix, c] or (c > 0 and flags[iy, ix, c - 1]) or \
                            (c < n - 1 and flags[iy, ix, c + 1])
                    for c in range(n):
                        if spike[c] or not near[c] or flags[iy, ix, c]:
                            continue
                        m, _ = _med_top(cube, qy, qx, scale, k, c, vals)
                        sigma = gain * np.sqrt(max(m, 0.0) + 1.0)
                        if (cube[iy, ix, c] - m) > grow * sigma:
                            flags[iy, ix, c] = True
                            repl[iy, ix, c] = m
        return flags, repl
