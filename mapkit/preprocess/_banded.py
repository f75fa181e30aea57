"""Batched solves of the penalised least-squares systems behind Whittaker-type baselines.

Every spectrum of a block needs (W + λ DᵀD) z = W y with its own weights W and the same
second-difference penalty D: a symmetric positive-definite pentadiagonal system. The
compiled kernel factorises the systems (LDLᵀ) of LANES spectra side by side (vector
units), blocks of them in parallel, and releases the GIL; the whole reweighting loop of
ALS, arPLS and airPLS runs compiled (weights computed lane by lane as baseline.py's numpy
versions compute them, the exponentials to 1 ulp). The numpy fallback runs the same recurrence
along the channel axis, vectorised across spectra, when numba is unavailable. Measured on a
2-core VM on 2026-12-02 (benchmarks/RESULTS.md): the compiled ALS is 34.7x a per-spectrum
pybaselines loop, one thread against one (45-60x on 2 threads against one), the numpy one
~1.1x, which is why the extra dependency is worth it.
"""

from __future__ import annotations

import numpy as np

try:  # numba is optional at run time; results are identical either way (tests compare them)
    import numba

    HAVE_NUMBA = True
except ImportError:  # pragma: no cover - exercised only where numba is missing
    HAVE_NUMBA = False


def penalty_diagonals(n: int, lam: float):
    """Diagonals (main, first, second super-diagonal) of λ·DᵀD for the 2nd-difference D."""
    if n < 3:
        raise ValueError("a second-difference penalty needs at least 3 channels")
    d0 = np.full(n, 6.0)
    d0[[0, -1]] = 1.0
    d0[[1, -2]] = 5.0
    d1 = np.full(n - 1, -4.0)
    d1[[0, -1]] = -2.0
    d2 = np.ones(n - 2)
    if n == 3:
        d0[:] = (1.0, 4.0, 1.0)
        d1[:] = -2.0
    return lam * d0, lam * d1, lam * d2


def solve_pentadiagonal(a, b, c, rhs):
    """Solve symmetric positive-definite pentadiagonal systems, one per row (numpy).

    ``a`` (m, n) is the main diagonal, ``b`` (m, n-1) and ``c`` (m, n-2) the first and
    second super-diagonals, ``rhs`` (m, n).
    """
    m, n = rhs.shape
    d = np.empty((m, n))
    l1 = np.zeros((m, n))
    l2 = np.zeros((m, n))
    d[:, 0] = a[:, 0]
    l1[:, 1] = b[:, 0] / d[:, 0]
    d[:, 1] = a[:, 1] - l1[:, 1] ** 2 * d[:, 0]
    for i in range(2, n):
        l2[:, i] = c[:, i - 2] / d[:, i - 2]
        l1[:, i] = (b[:, i - 1] - l2[:, i] * l1[:, i - 1] * d[:, i - 2]) / d[:, i - 1]
        d[:, i] = a[:, i] - l1[:, i] ** 2 * d[:, i - 1] - l2[:, i] ** 2 * d[:, i - 2]
    z = np.empty((m, n))
    z[:, 0] = rhs[:, 0]
    z[:, 1] = rhs[:, 1] - l1[:, 1] * z[:, 0]
    for i in range(2, n):
        z[:, i] = rhs[:, i] - l1[:, i] * z[:, i - 1] - l2[:, i] * z[:, i - 2]
    z /= d
    x = np.empty((m, n))
    x[:, n - 1] = z[:, n - 1]
    x[:, n - 2] = z[:, n - 2] - l1[:, n - 1] * x[:, n - 1]
    for i in range(n - 3, -1, -1):
        x[:, i] = z[:, i] - l1[:, i + 1] * x[:, i + 1] - l2[:, i + 2] * x[:, i + 2]
    return x


def _weighted_numpy(w, y, d0, d1, d2):
    m, n = y.shape
    return solve_pentadiagonal(w + d0, np.broadcast_to(d1, (m, n - 1)),
                               np.broadcast_to(d2, (m, n - 2)), w * y)


#: weighting schemes of the compiled reweighting loop
ALS, ARPLS, AIRPLS = 0, 1, 2
EPS = np.finfo(np.float64).eps


#: spectra solved side by side by the compiled kernels. The LDLᵀ recurrence is sequential
#: along the channels, so one spectrum at a time is bound by the latency of its divisions;
#: interleaving spectra ((n, LANES) blocks) lets the CPU's vector units run them together.
#: Each lane does exactly the scalar arithmetic, so results are bit-identical to one spectrum
#: at a time (tested). 16 lanes were 3.3x faster than one at a time for ALS on 1024
#: channels; with the arPLS/airPLS weights vectorised (`_exp_lanes`), 32 lanes run an arPLS
#: iteration 2.1-2.3x faster than 16 did with the scalar exp, ALS and airPLS within the
#: run-to-run spread (1 thread, 1024 channels; benchmarks/RESULTS.md, "Vectorised arPLS weights")
LANES = 32

#: spectra one parallel task of the reweighting loop works through (its lanes refilled as
#: spectra finish); not tied to LANES, so a 4096-spectrum block still makes 16 tasks
TASK_SPECTRA = 256

if HAVE_NUMBA:
    # inlined into the callers, whose freshly allocated blocks LLVM then knows not to
    # alias: that is what lets it vectorise the lane loops (2x slower as a call)
    @numba.njit(cache=True, nogil=True, inline="always")
    def _solve_lanes(W, Y, d0, d1, d2, l1, l2, q, Z, dm2, dm1, zm2, zm1):  # pragma: no cover
        # (W + DᵀD) z = W y for the LANES columns of the (n, LANES) blocks: one pass
        # factorises (LDLᵀ) and substitutes forward, a second substitutes back
        n = Y.shape[0]
        for j in range(LANES):
            dm2[j] = W[0, j] + d0[0]
            zm2[j] = W[0, j] * Y[0, j]
            q[0, j] = zm2[j] / dm2[j]
            l1[1, j] = d1[0] / dm2[j]
            dm1[j] = W[1, j] + d0[1] - l1[1, j] * l1[1, j] * dm2[j]
            zm1[j] = W[1, j] * Y[1, j] - l1[1, j] * zm2[j]
            q[1, j] = zm1[j] / dm1[j]
        for i in range(2, n):
            c2 = d2[i - 2]
            c1 = d1[i - 1]
            c0 = d0[i]
            for j in range(LANES):
                a2 = c2 / dm2[j]
                a1 = (c1 - a2 * l1[i - 1, j] * dm2[j]) / dm1[j]
                di = W[i, j] + c0 - a1 * a1 * dm1[j] - a2 * a2 * dm2[j]
                zi = W[i, j] * Y[i, j] - a1 * zm1[j] - a2 * zm2[j]
                l1[i, j] = a1
                l2[i, j] = a2
                q[i, j] = zi / di
                dm2[j] = dm1[j]
                dm1[j] = di
                zm2[j] = zm1[j]
                zm1[j] = zi
        for j in range(LANES):
            Z[n - 1, j] = q[n - 1, j]
            Z[n - 2, j] = q[n - 2, j] - l1[n - 1, j] * Z[n - 1, j]
        for i in range(n - 3, -1, -1):
            for j in range(LANES):
                Z[i, j] = q[i, j] - l1[i + 1, j] * Z[i + 1, j] - l2[i + 2, j] * Z[i + 2, j]

    @numba.njit(cache=True, nogil=True, inline="always")
    def _lane_scratch(n):  # pragma: no cover - compiled
        # a block's right-hand sides, solution, factors and running terms (fresh per block)
        return (np.empty((n, LANES)), np.empty((n, LANES)), np.empty((n, LANES)),
                np.empty((n, LANES)), np.empty((n, LANES)), np.empty(LANES), np.empty(LANES),
                np.empty(LANES), np.empty(LANES))

    @numba.njit(cache=True, nogil=True, inline="always")
    def _load_lanes(src, s0, dst):  # pragma: no cover - compiled
        # rows s0.. of src into the columns of dst; a short last block repeats its last row
        m, n = src.shape
        for j in range(LANES):
            k = min(s0 + j, m - 1)
            for i in range(n):
                dst[i, j] = src[k, i]

    @numba.njit(parallel=True, cache=True, nogil=True)
    def _weighted_numba(w, y, d0, d1, d2):  # pragma: no cover - compiled
        m, n = y.shape
        out = np.empty((m, n))
        for b in numba.prange((m + LANES - 1) // LANES):
            s0 = b * LANES
            W = np.empty((n, LANES))
            Y, Z, l1, l2, q, dm2, dm1, zm2, zm1 = _lane_scratch(n)
            _load_lanes(w, s0, W)
            _load_lanes(y, s0, Y)
            _solve_lanes(W, Y, d0, d1, d2, l1, l2, q, Z, dm2, dm1, zm2, zm1)
            for j in range(min(LANES, m - s0)):
                for i in range(n):
                    out[s0 + j, i] = Z[i, j]
        return out

    # exp(t) = 2^k · exp(r), k = round(t / ln 2), r = t - k ln 2 with ln 2 split in a high
    # part exact in k·ln2_hi and a low part (Cody & Waite 1980, "Software Manual for the
    # Elementary Functions"; the split constants are those of fdlibm's e_exp.c, from
    # memory), exp(r) on |r| <= ln2 / 2 by its Taylor series to r^13 (truncation < 1e-17
    # relative), 2^k added to the exponent bits. Written by hand because the compiled loops
    # call libm's scalar exp once per channel and iteration (no vector math library with
    # this numba build): 1 ulp from numpy's exp at most (tests/test_preprocess.py), and it
    # vectorises.
    @numba.njit(cache=True, nogil=True, inline="always")
    def _exp_lanes(T, E, K):  # pragma: no cover - compiled
        # E = exp(T) where -700 <= T <= 708 (T clamped to that range; K: scratch)
        n, lanes = T.shape
        for i in range(n):
            for j in range(lanes):
                t = min(max(T[i, j], -700.0), 708.0)
                kf = np.floor(t * 1.4426950408889634 + 0.5)
                r = (t - kf * 6.93147180369123816490e-01) - kf * 1.90821492927058770002e-10
                pz = 1.0 / 6227020800.0
                pz = pz * r + 1.0 / 479001600.0
                pz = pz * r + 1.0 / 39916800.0
                pz = pz * r + 1.0 / 3628800.0
                pz = pz * r + 1.0 / 362880.0
                pz = pz * r + 1.0 / 40320.0
                pz = pz * r + 1.0 / 5040.0
                pz = pz * r + 1.0 / 720.0
                pz = pz * r + 1.0 / 120.0
                pz = pz * r + 1.0 / 24.0
                pz = pz * r + 1.0 / 6.0
                pz = pz * r + 0.5
                pz = pz * r + 1.0
                pz = pz * r + 1.0
                E[i, j] = pz
                K[i, j] = np.int64(kf) << 52   # 2^k: k added to the exponent field
        bits = E.view(np.int64)
        for i in range(n):
            for j in range(lanes):
                bits[i, j] += K[i, j]

    @numba.njit(cache=True, nogil=True, inline="always")
    def _new_weights(kind, its, p, Y, Z, W, q, E, T, K, change, stop, y_l1):  # pragma: no cover
        # the next weights into q, each lane's convergence measure and early stop, as
        # baseline.py's numpy versions compute them, exponentials to 1 ulp (tests compare
        # the two engines); its:
        # each lane's iteration count (lanes hold spectra that started at different times)
        n, lanes = Y.shape
        num = np.zeros(lanes)
        den = np.zeros(lanes)
        if kind == ALS:
            for i in range(n):
                for j in range(lanes):
                    new = p if Y[i, j] > Z[i, j] else 1.0 - p
                    num[j] += (new - W[i, j]) ** 2
                    den[j] += W[i, j] * W[i, j]
                    q[i, j] = new
            for j in range(lanes):
                change[j] = np.sqrt(num[j]) / max(np.sqrt(den[j]), EPS)
                stop[j] = False
            return
        cnt = np.zeros(lanes)
        tot = np.zeros(lanes)
        for i in range(n):
            for j in range(lanes):
                r = Y[i, j] - Z[i, j]
                neg = r < 0
                cnt[j] += 1.0 if neg else 0.0
                tot[j] += r if neg else 0.0
        for j in range(lanes):
            stop[j] = cnt[j] < 2
        if kind == ARPLS:   # logistic in the residual, scaled by the negative residuals
            mean = tot / np.maximum(cnt, 1.0)
            sd = np.zeros(lanes)
            for i in range(n):
                for j in range(lanes):
                    r = Y[i, j] - Z[i, j]
                    sd[j] += (r - mean[j]) ** 2 if r < 0 else 0.0
            scale = np.empty(lanes)
            shift = np.empty(lanes)
            for j in range(lanes):
                sd[j] = np.sqrt(sd[j] / max(cnt[j] - 1.0, 1.0))
                if sd[j] == 0:
                    sd[j] = EPS
                scale[j] = 2 / sd[j]
                shift[j] = 2 * sd[j] - mean[j]
            # weight 1 / (1 + exp(-x)), x = -(2 / sd)((y - z) - (2 sd - mean)) (scipy.special.
            # expit's formula), -x formed exactly as x then negated. exp(-x) < 2⁻⁵³ where
            # -x < -40, so 1 + exp(-x) rounds to 1: weight 1.0; above 708 the weight is
            # below 1e-307 and taken as 0.0 (numpy's exp overflows to inf from 709.79 on,
            # which gives 0.0 there too)
            for i in range(n):
                for j in range(lanes):
                    T[i, j] = scale[j] * ((Y[i, j] - Z[i, j]) - shift[j])
            _exp_lanes(T, E, K)
            for i in range(n):
                for j in range(lanes):
                    t = T[i, j]
                    new = 1.0 if t < -40.0 else (0.0 if t > 708.0 else 1.0 / (1.0 + E[i, j]))
                    num[j] += (new - W[i, j]) ** 2
                    den[j] += W[i, j] * W[i, j]
                    q[i, j] = new
            for j in range(lanes):
                change[j] = np.sqrt(num[j]) / max(np.sqrt(den[j]), EPS)
            return
        # airPLS: exp(t·|r|/|Σr⁻|) below the baseline, 0 above; converged when |Σr⁻| is
        # below tol·Σ|y| (so the measure handed back is |Σr⁻| / Σ|y|)
        tt = np.empty(lanes)
        for j in range(lanes):
            tt[j] = min(its[j], 50)
            change[j] = abs(tot[j]) / y_l1[j] if y_l1[j] > 0 else 0.0
            if tot[j] == 0:
                tot[j] = -1.0
        for i in range(n):
            for j in range(lanes):
                T[i, j] = (tt[j] / tot[j]) * (Y[i, j] - Z[i, j])
        _exp_lanes(T, E, K)
        for i in range(n):
            for j in range(lanes):
                q[i, j] = E[i, j] if Y[i, j] - Z[i, j] < 0 else 0.0

    @numba.njit(cache=True, nogil=True, inline="always")
    def _start_lane(y, k, j, Y, W, y_l1):  # pragma: no cover - compiled
        # spectrum k of y into lane j, its weights at 1
        n = Y.shape[0]
        s = 0.0
        for i in range(n):
            Y[i, j] = y[k, i]
            W[i, j] = 1.0
            s += abs(y[k, i])
        y_l1[j] = s

    @numba.njit(parallel=True, cache=True, nogil=True)
    def _reweighted_numba(y, d0, d1, d2, kind, p, max_iter, tol):  # pragma: no cover
        # the whole reweighting loop per task of spectra: no array traffic between
        # iterations. A lane whose spectrum stops (converged or at the iteration limit)
        # stores that iteration's result and takes the task's next spectrum, so lanes do
        # not idle while the slowest of LANES converges; every lane does its own spectrum's
        # arithmetic only, so each result is what that spectrum alone would get
        m, n = y.shape
        out = np.empty((m, n))
        converged = np.zeros(m, np.bool_)
        for b in numba.prange((m + TASK_SPECTRA - 1) // TASK_SPECTRA):
            s0 = b * TASK_SPECTRA
            s1 = min(m, s0 + TASK_SPECTRA)
            W = np.empty((n, LANES))
            Y, Z, l1, l2, q, dm2, dm1, zm2, zm1 = _lane_scratch(n)
            E = np.empty((n, LANES))
            T = np.empty((n, LANES))
            K = np.empty((n, LANES), np.int64)
            change = np.empty(LANES)
            stop = np.zeros(LANES, np.bool_)
            y_l1 = np.zeros(LANES)
            its = np.zeros(LANES, np.int64)
            held = np.full(LANES, -1, np.int64)     # the spectrum in each lane; -1: idle
            nxt = s0
            for j in range(LANES):   # idle lanes run on a copy of the first spectrum
                _start_lane(y, min(nxt, s1 - 1), j, Y, W, y_l1)
                if nxt < s1:
                    held[j] = nxt
                    nxt += 1
            active = min(LANES, s1 - s0)
            while active > 0:
                for j in range(LANES):
                    its[j] += 1
                _solve_lanes(W, Y, d0, d1, d2, l1, l2, q, Z, dm2, dm1, zm2, zm1)
                _new_weights(kind, its, p, Y, Z, W, q, E, T, K, change, stop, y_l1)
                for j in range(LANES):
                    k = held[j]
                    if k < 0:
                        continue
                    finished = stop[j] or change[j] < tol
                    if finished or its[j] == max_iter + 1:
                        converged[k] = finished
                        for i in range(n):
                            out[k, i] = Z[i, j]
                        if nxt < s1:     # (its weights at 1 in q, copied to W below)
                            _start_lane(y, nxt, j, Y, q, y_l1)
                            held[j] = nxt
                            its[j] = 0
                            nxt += 1
                        else:
                            held[j] = -1
                            active -= 1
                W[:, :] = q
        return out, converged


def reweighted_solve(y, lam: float, kind: int, *, p: float = 0.01, max_iter: int = 50,
                     tol: float = 1e-3):
    """Compiled ALS/arPLS/airPLS (``kind``) on every row of ``y``: (baselines, converged
    flags), or None without numba."""
    if not HAVE_NUMBA:
        return None
    d0, d1, d2 = penalty_diagonals(y.shape[1], lam)
    y = np.ascontiguousarray(y)
    if y.dtype != np.float32:     # float32 is read as it is: each value converted exactly
        y = y.astype(np.float64, copy=False)
    return _reweighted_numba(y, d0, d1, d2, int(kind), float(p), int(max_iter), float(tol))


def weighted_whittaker(w, y, lam: float, *, engine: str = "auto"):
    """z minimising Σ wᵢ(yᵢ − zᵢ)² + λ Σ(Δ²zᵢ)² for every row of ``y`` (float64).

    ``engine`` is ``"numba"``, ``"numpy"`` or ``"auto"`` (numba when installed).
    """
    y = np.ascontiguousarray(y, dtype=np.float64)
    w = np.ascontiguousarray(np.broadcast_to(w, y.shape), dtype=np.float64)
    d0, d1, d2 = penalty_diagonals(y.shape[1], lam)
    if engine == "numba" or (engine == "auto" and HAVE_NUMBA):
        if not HAVE_NUMBA:
            raise RuntimeError("numba is not installed")
        return _weighted_numba(w, y, d0, d1, d2)
    return _weighted_numpy(w, y, d0, d1, d2)
