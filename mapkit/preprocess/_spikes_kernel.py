"""Compiled version of the spatial-neighbour spike test (same decisions as the numpy one).

The numpy implementation stacks the 8 neighbours of every pixel and sorts them at every
channel. This kernel visits each pixel once and works out only what can change the
answer: the noise gain from every 8th channel counted from both ends (as numpy does, with a
sorting network across those channels); the largest
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

    # Batcher's odd-even merge network for 8 values (19 compare-exchanges, Knuth TAOCP
    # vol. 3, 5.3.4): branch-free min/max that vectorise across channels, where an insertion
    # sort mispredicts its branches. Sorted values are the same, so the medians are too.
    NETWORK8 = ((0, 1), (2, 3), (4, 5), (6, 7), (0, 2), (1, 3), (4, 6), (5, 7), (1, 2), (5, 6),
                (0, 4), (3, 7), (1, 5), (2, 6), (1, 4), (3, 6), (2, 4), (3, 5), (3, 4))
    _NET = np.array(NETWORK8, np.int64)

    @numba.njit(cache=True, nogil=True, inline="always")
    def _sort8_columns(v, net):  # pragma: no cover - compiled
        for e in range(net.shape[0]):
            a = v[net[e, 0]]
            b = v[net[e, 1]]
            for s in range(v.shape[1]):
                x = a[s]
                y = b[s]
                a[s] = min(x, y)
                b[s] = max(x, y)

    @numba.njit(cache=True, nogil=True, inline="always")
    def _kth_inplace(v, m, k):  # pragma: no cover - compiled
        # the k-th smallest of v[:m] by Hoare partitions (reorders v[:m]; v[:k] <= v[k])
        lo, hi = 0, m - 1
        while lo < hi:
            pivot = v[(lo + hi) // 2]
            i, j = lo, hi
            while i <= j:
                while v[i] < pivot:
                    i += 1
                while v[j] > pivot:
                    j -= 1
                if i <= j:
                    v[i], v[j] = v[j], v[i]
                    i += 1
                    j -= 1
            if k <= j:
                hi = j
            elif k >= i:
                lo = i
            else:
                break
        return v[k]

    @numba.njit(cache=True, nogil=True)
    def _median_inplace(v):  # pragma: no cover - compiled
        # np.median's value (mean of the two middle values when even) by quickselect on a
        # scratch buffer: np.median inside the kernel allocated a copy per call, and those
        # allocations from parallel threads cost 4x the selection itself (measured)
        n = v.size
        half = n // 2
        upper = _kth_inplace(v, n, half)
        if n % 2:
            return upper
        lower = v[0]                      # the largest value left of half
        for i in range(1, half):
            if v[i] > lower:
                lower = v[i]
        return (lower + upper) / 2

    @numba.njit(parallel=True, cache=True, nogil=True)
    def sampled_levels(cube, sampled):  # pragma: no cover - compiled
        """The sampled channels of every pixel, contiguous (float64), and their median."""
        ny, nx, _ = cube.shape
        ns = sampled.size
        values = np.empty((ny, nx, ns))
        level = np.empty((ny, nx))
        for iy in numba.prange(ny):
            buf = np.empty(ns)
            for ix in range(nx):
                for j in range(ns):
                    values[iy, ix, j] = cube[iy, ix, sampled[j]]
                    buf[j] = values[iy, ix, j]
                level[iy, ix] = _median_inplace(buf)
        return values, level

    @numba.njit(parallel=True, cache=True, nogil=True)
    def spatial_spikes_into(cube, mask, values, level, threshold, grow, sampled, flags,
                            out):
        # pragma: no cover - compiled
        """Flag spikes in ``flags`` and write the replacement values into ``out``."""
        ny, nx, n = cube.shape
        ns = sampled.size
        for iy in numba.prange(ny):
            qy = np.empty(8, np.int64)
            qx = np.empty(8, np.int64)
            scale = np.empty(8)
            vals = np.empty(8)
            cols = np.empty((8, ns))
            absr = np.empty(ns)
            spike = np.zeros(n, np.bool_)
            near = np.zeros(n, np.bool_)
            top = np.empty(n)
            bottom = np.empty(n)
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
                if k == 8:            # inside the map: all sampled channels at once
                    for j in range(8):
                        sj = scale[j]
                        row = values[qy[j], qx[j]]
                        cj = cols[j]
                        for t in range(ns):
                            cj[t] = row[t] * sj
                    _sort8_columns(cols, _NET)
                    own = values[iy, ix]
                    for t in range(ns):
                        m = 0.5 * (cols[3, t] + cols[4, t])
                        absr[t] = abs((own[t] - m) / np.sqrt(max(m, 0.0) + 1.0))
                else:
                    for t in range(ns):
                        c = sampled[t]
                        m, _ = _med_top(cube, qy, qx, scale, k, c, vals)
                        absr[t] = abs((cube[iy, ix, c] - m) / np.sqrt(max(m, 0.0) + 1.0))
                gain = max(1.4826 * _median_inplace(absr), 1e-12)
                any_spike = False
                # the largest and smallest scaled neighbour at every channel (vectorisable)
                for c in range(n):
                    top[c] = -np.inf
                    bottom[c] = np.inf
                for j in range(k):
                    sj = scale[j]
                    row = cube[qy[j], qx[j]]
                    for c in range(n):
                        v = row[c] * sj
                        top[c] = max(top[c], v)
                        bottom[c] = min(bottom[c], v)
                # the median lies between them, so sigma >= gain * sqrt(bottom + 1) and
                # v - top > threshold * that is necessary for a spike: only those channels
                # need the neighbour median (the margin covers rounding in the bound)
                floor = threshold * gain * (1.0 - 1e-9)
                own = cube[iy, ix]
                for c in range(n):
                    spike[c] = False
                    v = own[c]
                    if v - top[c] <= floor * np.sqrt(max(bottom[c], 0.0) + 1.0):
                        continue
                    m, t = _med_top(cube, qy, qx, scale, k, c, vals)
                    sigma = gain * np.sqrt(max(m, 0.0) + 1.0)
                    if (v - t) > threshold * sigma:
                        spike[c] = True
                        any_spike = True
                        flags[iy, ix, c] = True
                        out[iy, ix, c] = m
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
                            out[iy, ix, c] = m

    def spatial_spikes(cube, mask, threshold, grow, sampled):
        """(flags, replacement values) for a float64 cube: the interface of the numpy test."""
        flags = np.zeros(cube.shape, np.bool_)
        repl = np.empty(cube.shape)
        values, level = sampled_levels(cube, sampled)
        spatial_spikes_into(cube, mask, values, level, threshold, grow, sampled, flags, repl)
        return flags, repl
