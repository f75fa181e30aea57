"""Compiled per-spectrum statistics behind the SNR image (same numbers as quality.py's numpy).

The numpy version sorts partially three times per spectrum (``np.median`` of the spectrum,
of its first differences and of their absolute deviations), in float64, on whole blocks
at once. This kernel visits each spectrum once, on scratch buffers reused across the
spectra of a thread, with the selection-based median of ``_spikes_kernel`` (the value
``np.median`` returns: a middle order statistic, or the mean of the two middle ones), and
runs spectra in parallel. Every value handed back is computed with the same float64
operations as numpy's, so the results are identical (tests/test_preprocess.py compares
them bit for bit); spectra with a non-finite value are left to numpy.
"""

from __future__ import annotations

import numpy as np

try:
    import numba

    HAVE_NUMBA = True
except ImportError:  # pragma: no cover
    HAVE_NUMBA = False

#: spectra per parallel task (each task allocates its scratch once)
ROWS = 64

if HAVE_NUMBA:
    from ._spikes_kernel import _kth_inplace   # the one Hoare selection of the package

    @numba.njit(cache=True, nogil=True, inline="always")
    def _largest_below(v, n, limit, floor):  # pragma: no cover - compiled
        # the largest of v[:n] below limit (floor when none is)
        best = floor
        for i in range(n):
            x = v[i]
            if x < limit and x > best:
                best = x
        return best

    @numba.njit(cache=True, nogil=True, inline="always")
    def _order_stats(v, n, k, lo, hi, buf, lower):  # pragma: no cover - compiled
        # the k-th smallest of v[:n] (finite, minimum lo, maximum hi) and, when lower, the
        # (k-1)-th. The answer is narrowed to a value interval [a, b) by counting passes
        # (branch-free, vectorised), then the few values left in it are selected: the
        # same order statistics np.partition finds, at a fraction of its cost
        c = 0
        for i in range(n):
            c += v[i] < hi
        if k >= c:                          # the maximum itself
            below = hi
            if lower and k - 1 < c:
                below = _largest_below(v, n, hi, lo)
            return below, hi
        a, b, L, U = lo, hi, 0, c           # L = #(v < a) <= k < U = #(v < b)
        for it in range(16):
            if U - L <= 32:
                break
            f = (k - L + 0.5) / (U - L) if it % 2 == 0 else 0.5   # interpolate, bisect
            t = a + (b - a) * f
            if not (a < t < b):
                break
            c = 0
            for i in range(n):
                c += v[i] < t
            if c <= k:
                a, L = t, c
            else:
                b, U = t, c
        m = 0
        for i in range(n):                  # gather [a, b): U - L values
            x = v[i]
            buf[m] = x
            m += (x >= a) & (x < b)
        kth = _kth_inplace(buf, m, k - L)
        below = kth
        if lower:
            if k - L >= 1:
                below = buf[0]
                for i in range(1, k - L):
                    if buf[i] > below:
                        below = buf[i]
            else:                           # the largest value below a
                below = _largest_below(v, n, a, lo)
        return below, kth

    @numba.njit(cache=True, nogil=True, inline="always")
    def _median(v, n, lo, hi, buf):  # pragma: no cover - compiled
        # np.median's value: the middle order statistic, or the mean of the two middle ones
        below, kth = _order_stats(v, n, n // 2, lo, hi, buf, n % 2 == 0)
        if n % 2:
            return kth
        return (below + kth) / 2

    @numba.njit(parallel=True, cache=True, nogil=True)
    def spectrum_stats(b, with_signal):  # pragma: no cover - compiled
        # per row of b (m, n), n >= 2: the median absolute deviation of the first
        # differences; with_signal: also the maximum and the median of the row; finite:
        # False where the row holds a non-finite value (its other outputs are undefined).
        # b may be float32: each row is copied into a float64 scratch row first (exact), so
        # every operation is the float64 one numpy does on the converted block
        m, n = b.shape
        mad = np.empty(m)
        top = np.empty(m)
        med = np.empty(m)
        finite = np.ones(m, np.bool_)
        for t in numba.prange((m + ROWS - 1) // ROWS):
            d = np.empty(n - 1)
            buf = np.empty(n)
            row = np.empty(n)
            for r in range(t * ROWS, min(m, (t + 1) * ROWS)):
                for i in range(n):
                    row[i] = b[r, i]
                lo = row[0]
                hi = row[0]
                bad = 0.0
                for i in range(n):
                    x = row[i]
                    bad += x - x                # NaN when x is NaN or infinite
                    lo = min(lo, x)
                    hi = max(hi, x)
                if bad != 0.0:
                    finite[r] = False
                    continue
                dlo = np.inf
                dhi = -np.inf
                for i in range(n - 1):
                    x = row[i + 1] - row[i]
                    d[i] = x
                    dlo = min(dlo, x)
                    dhi = max(dhi, x)
                md = _median(d, n - 1, dlo, dhi, buf)
                dlo = np.inf
                dhi = -np.inf
                for i in range(n - 1):
                    x = abs(d[i] - md)
                    d[i] = x
                    dlo = min(dlo, x)
                    dhi = max(dhi, x)
                mad[r] = _median(d, n - 1, dlo, dhi, buf)
                if with_signal:
                    med[r] = _median(row, n, lo, hi, buf)
                    top[r] = hi
        return mad, top, med, finite
