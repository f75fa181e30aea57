"""Compiled Levenberg–Marquardt for peak-fit maps: one small fit per pixel, pixels in parallel.

The numpy version in :mod:`mapkit.reduce.peakfit` runs the same algorithm vectorised
across pixels; this kernel avoids its array traffic. Each trial step is one pass over the
channels that gives the objective and the normal equations together (no stored
Jacobian); the passes are written as loops the compiler turns into vector code (the
numpy error model, so a division carries no zero-division branch; a vectorised
logarithm; sums it may reorder). Start values and the inverse information matrices are
computed here too, each the twin of a numpy function in :mod:`mapkit.reduce.peakfit`.
Parameters agree with the numpy path within 1e-8 relative, and fit states and iteration
counts are identical (tests/test_peakfit.py); on pixels holding only noise the states
agree, and rounding may move the last step along a flat valley (iterations identical on
at least 95 % of the pixels, parameters within a thousandth of their errors). Measured as a user meets it (open, fit,
images; 4800 pixels, 160 channels) 47x a per-pixel ``scipy.optimize.curve_fit`` loop in
CPU time, one thread against one, on 2026-12-02 on a 2-core VM
(benchmarks/bench_peakfit.py, benchmarks/RESULTS.md).
"""

from __future__ import annotations

import numpy as np

try:
    import numba

    HAVE_NUMBA = True
except ImportError:  # pragma: no cover
    HAVE_NUMBA = False

SHAPE_CODES = {"lorentzian": 0, "gaussian": 1, "pseudo_voigt": 2}

if HAVE_NUMBA:
    LN2 = np.log(2.0)

    _SQRT2 = np.sqrt(2.0)
    _LN2_HI = 6.93147180369123816490e-01     # ln 2 split so that e·ln2 is exact in the
    _LN2_LO = 1.90821492927058770002e-10     # high part (the usual libm splitting)
    _MANTISSA = np.int64(0x000FFFFFFFFFFFFF)
    _ONE = np.int64(0x3FF0000000000000)

    @numba.njit(cache=True, nogil=True, error_model="numpy")
    def _log_rows(q, out, ibuf, ebuf):  # pragma: no cover - compiled
        # natural logarithm of the positive normal numbers q, in loops the compiler turns
        # into vector code (numba's np.log is a scalar library call, half of a Poisson
        # pass): q = 2^e·x with x in [√½, √2), ln x = 2 atanh z = 2(z + z³/3 + …),
        # z = (x − 1)/(x + 1), |z| ≤ 0.172, eleven terms: within 2 ulp of np.log
        bits = q.view(np.int64)
        xb = ibuf.view(np.int64)
        for i in range(q.size):
            b = bits[i]
            ebuf[i] = np.float64(((b >> 52) & 0x7FF) - 1023)
            xb[i] = (b & _MANTISSA) | _ONE
        for i in range(q.size):
            x = ibuf[i]
            e = ebuf[i]
            big = x > _SQRT2
            x = 0.5 * x if big else x
            e = e + 1.0 if big else e
            z = (x - 1.0) / (x + 1.0)
            z2 = z * z
            p = 1.0 / 23.0
            p = p * z2 + 1.0 / 21.0
            p = p * z2 + 1.0 / 19.0
            p = p * z2 + 1.0 / 17.0
            p = p * z2 + 1.0 / 15.0
            p = p * z2 + 1.0 / 13.0
            p = p * z2 + 1.0 / 11.0
            p = p * z2 + 1.0 / 9.0
            p = p * z2 + 1.0 / 7.0
            p = p * z2 + 1.0 / 5.0
            p = p * z2 + 1.0 / 3.0
            out[i] = e * _LN2_HI + (2.0 * z * z2 * p + (e * _LN2_LO + 2.0 * z))

    @numba.njit(cache=True, nogil=True, error_model="numpy", fastmath={"reassoc"})
    def _pass1(y, s, t, shape, mid, poisson, floor, A, g, buf):  # pragma: no cover
        # one Lorentzian or Gaussian plus a line (K = 5), the common map fit: model,
        # objective, Pearson chi-square, SSR, Σwy² and the normal equations A = JᵀWJ,
        # g = JᵀW(y − μ), in three loops over the channels that compile to vector code
        # (elementwise model; logarithms; sums, whose order the compiler may change)
        h = t[0]
        c = t[1]
        wd = t[2]
        bg = t[3]
        sl = t[4]
        N = s.size
        fb, mb, qb, j1b, j2b, lb, ib, eb = (buf[0], buf[1], buf[2], buf[3], buf[4],
                                            buf[5], buf[6], buf[7])
        tiny = 0
        # one loop per line shape, written out twice on purpose: a branch inside the loop
        # keeps LLVM from vectorising it
        if shape == 0:
            for i in range(N):
                u = 2.0 * (s[i] - c) / wd
                f = 1.0 / (1.0 + u * u)
                dfdu = -2.0 * u * f * f
                mu = bg + sl * (s[i] - mid)
                mu += h * f
                fb[i] = f
                mb[i] = mu
                j1b[i] = h * dfdu * (-2.0 / wd)
                j2b[i] = h * dfdu * (-u / wd)
                q = y[i] / max(mu, floor)
                qb[i] = q
                tiny += 1 if (y[i] > 0 and q < 2.3e-308) else 0
        else:
            for i in range(N):
                u = 2.0 * (s[i] - c) / wd
                f = np.exp(-LN2 * u * u)
                dfdu = -2.0 * LN2 * u * f
                mu = bg + sl * (s[i] - mid)
                mu += h * f
                fb[i] = f
                mb[i] = mu
                j1b[i] = h * dfdu * (-2.0 / wd)
                j2b[i] = h * dfdu * (-u / wd)
                q = y[i] / max(mu, floor)
                qb[i] = q
                tiny += 1 if (y[i] > 0 and q < 2.3e-308) else 0
        if poisson:
            _log_rows(qb, lb, ib, eb)
            if tiny:                       # subnormal ratios: the library logarithm
                for i in range(N):
                    if y[i] > 0 and qb[i] < 2.3e-308:
                        lb[i] = np.log(qb[i])
        cost = 0.0
        chi2 = 0.0
        ssr = 0.0
        wyy = 0.0
        a00 = a01 = a02 = a03 = a04 = 0.0
        a11 = a12 = a13 = a14 = 0.0
        a22 = a23 = a24 = 0.0
        a33 = a34 = a44 = 0.0
        g0 = g1 = g2 = g3 = g4 = 0.0
        for i in range(N):
            x = s[i] - mid
            yi = y[i]
            mu = mb[i]
            if poisson:
                m = max(mu, floor)
                w = 1.0 / m
                cost += 2.0 * (m - yi) + (2.0 * yi * lb[i] if yi > 0 else 0.0)
            else:
                w = 1.0
                cost += (yi - mu) * (yi - mu)
            j0 = fb[i]
            j1 = j1b[i]
            j2 = j2b[i]
            r0 = yi - mu
            ssr += r0 * r0
            chi2 += w * r0 * r0
            wyy += w * yi * yi
            r = w * r0
            g0 += j0 * r
            g1 += j1 * r
            g2 += j2 * r
            g3 += r
            g4 += x * r
            w0 = w * j0
            w1 = w * j1
            w2 = w * j2
            a00 += w0 * j0
            a01 += w0 * j1
            a02 += w0 * j2
            a03 += w0
            a04 += w0 * x
            a11 += w1 * j1
            a12 += w1 * j2
            a13 += w1
            a14 += w1 * x
            a22 += w2 * j2
            a23 += w2
            a24 += w2 * x
            a33 += w
            a34 += w * x
            a44 += w * x * x
        A[0, 0] = a00
        A[0, 1] = A[1, 0] = a01
        A[0, 2] = A[2, 0] = a02
        A[0, 3] = A[3, 0] = a03
        A[0, 4] = A[4, 0] = a04
        A[1, 1] = a11
        A[1, 2] = A[2, 1] = a12
        A[1, 3] = A[3, 1] = a13
        A[1, 4] = A[4, 1] = a14
        A[2, 2] = a22
        A[2, 3] = A[3, 2] = a23
        A[2, 4] = A[4, 2] = a24
        A[3, 3] = a33
        A[3, 4] = A[4, 3] = a34
        A[4, 4] = a44
        g[0] = g0
        g[1] = g1
        g[2] = g2
        g[3] = g3
        g[4] = g4
        return cost, chi2, ssr, wyy

    @numba.njit(cache=True, nogil=True, error_model="numpy", fastmath={"reassoc"})
    def _pass(y, s, t, shape, n_peaks, mid, poisson, floor, A, g, buf,
              jb):  # pragma: no cover - compiled
        # any shape and number of peaks: as _pass1, with the Jacobian in rows jb (K, N)
        # and the normal equations as K(K+3)/2 dot products over the channels
        per = 4 if shape == 2 else 3
        K = t.size
        N = s.size
        wb, mb, qb, rb, lb, ib, eb = buf[0], buf[1], buf[2], buf[3], buf[5], buf[6], buf[7]
        for i in range(N):
            x = s[i] - mid
            mb[i] = t[K - 2] + t[K - 1] * x
            jb[K - 2, i] = 1.0
            jb[K - 1, i] = x
        for k in range(n_peaks):
            o = k * per
            h = t[o]
            c = t[o + 1]
            w = t[o + 2]
            if shape == 0:
                for i in range(N):
                    u = 2.0 * (s[i] - c) / w
                    f = 1.0 / (1.0 + u * u)
                    dfdu = -2.0 * u * f * f
                    mb[i] += h * f
                    jb[o, i] = f
                    jb[o + 1, i] = h * dfdu * (-2.0 / w)
                    jb[o + 2, i] = h * dfdu * (-u / w)
            elif shape == 1:
                for i in range(N):
                    u = 2.0 * (s[i] - c) / w
                    f = np.exp(-LN2 * u * u)
                    dfdu = -2.0 * LN2 * u * f
                    mb[i] += h * f
                    jb[o, i] = f
                    jb[o + 1, i] = h * dfdu * (-2.0 / w)
                    jb[o + 2, i] = h * dfdu * (-u / w)
            else:
                eta = t[o + 3]
                for i in range(N):
                    u = 2.0 * (s[i] - c) / w
                    lor = 1.0 / (1.0 + u * u)
                    dl = -2.0 * u * lor * lor
                    gau = np.exp(-LN2 * u * u)
                    dg = -2.0 * LN2 * u * gau
                    f = eta * lor + (1 - eta) * gau
                    dfdu = eta * dl + (1 - eta) * dg
                    jb[o + 3, i] = h * (lor - gau)
                    mb[i] += h * f
                    jb[o, i] = f
                    jb[o + 1, i] = h * dfdu * (-2.0 / w)
                    jb[o + 2, i] = h * dfdu * (-u / w)
        tiny = 0
        for i in range(N):
            q = y[i] / max(mb[i], floor)
            qb[i] = q
            tiny += 1 if (y[i] > 0 and q < 2.3e-308) else 0
        if poisson:
            _log_rows(qb, lb, ib, eb)
            if tiny:
                for i in range(N):
                    if y[i] > 0 and qb[i] < 2.3e-308:
                        lb[i] = np.log(qb[i])
        cost = 0.0
        chi2 = 0.0
        ssr = 0.0
        wyy = 0.0
        for i in range(N):
            yi = y[i]
            mu = mb[i]
            if poisson:
                m = max(mu, floor)
                wi = 1.0 / m
                cost += 2.0 * (m - yi) + (2.0 * yi * lb[i] if yi > 0 else 0.0)
            else:
                wi = 1.0
                cost += (yi - mu) * (yi - mu)
            r0 = yi - mu
            ssr += r0 * r0
            chi2 += wi * r0 * r0
            wyy += wi * yi * yi
            wb[i] = wi
            rb[i] = wi * r0
        for a in range(K):
            v = 0.0
            for i in range(N):
                v += jb[a, i] * rb[i]
            g[a] = v
            for b in range(a, K):
                v = 0.0
                for i in range(N):
                    v += (wb[i] * jb[a, i]) * jb[b, i]
                A[a, b] = v
                A[b, a] = v
        return cost, chi2, ssr, wyy

    @numba.njit(cache=True, nogil=True, error_model="numpy")
    def _evaluate(y, s, t, shape, n_peaks, mid, poisson, floor, A, g, jrow,
                  buf):  # pragma: no cover - compiled
        if n_peaks == 1 and shape != 2:
            return _pass1(y, s, t, shape, mid, poisson, floor, A, g, buf)
        return _pass(y, s, t, shape, n_peaks, mid, poisson, floor, A, g, buf, jrow)

    @numba.njit(cache=True, nogil=True, error_model="numpy")
    def _clamp(t, shape, n_peaks, s0, s1, step):  # pragma: no cover - compiled
        per = 4 if shape == 2 else 3
        span = s1 - s0
        for k in range(n_peaks):
            o = k * per
            t[o + 2] = min(max(t[o + 2], 0.25 * step), 4 * span)
            t[o + 1] = min(max(t[o + 1], s0 - 0.5 * span), s1 + 0.5 * span)
            if shape == 2:
                t[o + 3] = min(max(t[o + 3], 0.0), 1.0)

    @numba.njit(cache=True, nogil=True, error_model="numpy")
    def _solve_spd(A, g, x, L):  # pragma: no cover - compiled
        # Cholesky solve of a small symmetric positive-definite system, no allocation;
        # returns False when A is not positive definite
        K = g.size
        for i in range(K):
            for j in range(i + 1):
                v = A[i, j]
                for k in range(j):
                    v -= L[i, k] * L[j, k]
                if i == j:
                    if v <= 0.0:
                        return False
                    L[i, i] = np.sqrt(v)
                else:
                    L[i, j] = v / L[j, j]
        for i in range(K):
            v = g[i]
            for k in range(i):
                v -= L[i, k] * x[k]
            x[i] = v / L[i, i]
        for i in range(K - 1, -1, -1):
            v = x[i]
            for k in range(i + 1, K):
                v -= L[k, i] * x[k]
            x[i] = v / L[i, i]
        return True

    @numba.njit(cache=True, nogil=True, error_model="numpy", inline="always")
    def _hold(t, A, g, shape, n_peaks, s0, s1, step):  # pragma: no cover - compiled
        # a parameter at a bound of _clamp that the step pushes against stays there
        # (peakfit._hold_bounds)
        per = 4 if shape == 2 else 3
        span = s1 - s0
        K = g.size
        for k in range(n_peaks):
            o = k * per
            for e in range(o + 1, o + per):
                if e == o + 1:
                    lo, hi = s0 - 0.5 * span, s1 + 0.5 * span
                elif e == o + 2:
                    lo, hi = 0.25 * step, 4 * span
                else:
                    lo, hi = 0.0, 1.0
                if (t[e] >= hi and g[e] > 0) or (t[e] <= lo and g[e] < 0):
                    for b in range(K):
                        A[e, b] = 0.0
                        A[b, e] = 0.0
                    A[e, e] = 1.0
                    g[e] = 0.0

    @numba.njit(cache=True, nogil=True, error_model="numpy")
    def _fit_one(y, s, t, shape, n_peaks, mid, poisson, max_iter, tol, step, floor, A, At,
                 Ad, g, gt, gd, L, delta, trial, jrow, buf):  # pragma: no cover
        """One pixel, in place on t and A (the information matrix at the result); returns
        (iterations, status, Pearson chi-square, SSR)."""
        K = t.size
        cost, chi2, ssr, wyy = _evaluate(y, s, t, shape, n_peaks, mid, poisson, floor, A, g,
                                         jrow, buf)
        lam = 1e-3
        stalled = False
        status = 1
        n_iter = 0
        for it in range(max_iter):
            Ad[:, :] = A
            gd[:] = g
            for a in range(K):
                Ad[a, a] += lam * max(A[a, a], 1e-12)
            _hold(t, Ad, gd, shape, n_peaks, s[0], s[-1], step)
            n_iter = it + 1
            accepted = False
            rel = 1.0
            # a damped system that is not positive definite is a rejected step; the
            # trial's objective and normal equations come from one pass, kept if accepted
            if _solve_spd(Ad, gd, delta, L):
                for a in range(K):
                    trial[a] = t[a] + delta[a]
                _clamp(trial, shape, n_peaks, s[0], s[-1], step)
                cost_t, chi2_t, ssr_t, wyy_t = _evaluate(y, s, trial, shape, n_peaks, mid,
                                                         poisson, floor, At, gt, jrow, buf)
                if np.isfinite(cost_t) and cost_t <= cost:
                    accepted = True
                    rel = abs(cost - cost_t) / max(cost, 1e-300)
                    t[:] = trial
                    A[:, :] = At
                    g[:] = gt
                    cost, chi2, ssr, wyy = cost_t, chi2_t, ssr_t, wyy_t
            if accepted:
                lam = max(lam / 3.0, 1e-12)
                if rel < tol:
                    status = 0
                    break
            else:
                lam *= 4.0
                if lam > 1e12:
                    stalled = True
                    break
        if stalled:
            # converged only if a full Gauss-Newton step would not lower the objective
            # measurably (peakfit._at_optimum)
            Ad[:, :] = A
            gd[:] = g
            _hold(t, Ad, gd, shape, n_peaks, s[0], s[-1], step)
            status = 2
            if _solve_spd(Ad, gd, delta, L):
                pred = 0.0
                for a in range(K):
                    pred += gd[a] * delta[a]
                if pred <= tol * max(cost, 1e-14 * wyy):
                    status = 0
        return n_iter, status, chi2, ssr

    @numba.njit(cache=True, nogil=True, error_model="numpy")
    def _information_inverse(A, inv, L, Linv, d, rcond):  # pragma: no cover - compiled
        # peakfit._information_inverse for one pixel: Cholesky of A scaled to unit
        # diagonal, invertible where every pivot exceeds rcond; inv = D⁻¹ L⁻ᵀ L⁻¹ D⁻¹
        K = d.size
        for a in range(K):
            if not np.isfinite(A[a, a]) or A[a, a] == 0.0:
                return False
            d[a] = np.sqrt(abs(A[a, a]))
        for a in range(K):
            for b in range(K):
                if not np.isfinite(A[a, b]):
                    return False
        for i in range(K):
            for j in range(i + 1):
                v = A[i, j] / (d[i] * d[j])
                for k in range(j):
                    v -= L[i, k] * L[j, k]
                if i == j:
                    if not v > rcond:
                        return False
                    L[i, i] = np.sqrt(v)
                else:
                    L[i, j] = v / L[j, j]
        for i in range(K):
            Linv[i, i] = 1.0 / L[i, i]
            for j in range(i):
                v = 0.0
                for k in range(j, i):
                    v += L[i, k] * Linv[k, j]
                Linv[i, j] = -v / L[i, i]
            for j in range(i + 1, K):
                Linv[i, j] = 0.0
        for a in range(K):
            for b in range(K):
                v = 0.0
                for k in range(K):
                    v += Linv[k, a] * Linv[k, b]
                inv[a, b] = v / (d[a] * d[b])
        return True

    @numba.njit(cache=True, nogil=True, error_model="numpy")
    def initial(s, y, shape, n_peaks, centres, given, mid, step, theta):  # pragma: no cover
        """peakfit._initial, pixel by pixel: the same operations, the same start values."""
        P, N = y.shape
        per = 4 if shape == 2 else 3
        resid = np.empty(N)
        for p in range(P):
            slope = (y[p, N - 1] - y[p, 0]) / (s[N - 1] - s[0])
            offset = 0.5 * (y[p, 0] + y[p, N - 1]) + slope * (mid - 0.5 * (s[0] + s[N - 1]))
            for i in range(N):
                resid[i] = y[p, i] - (offset + slope * (s[i] - mid))
            for k in range(n_peaks):
                o = k * per
                if given[k]:
                    c0 = centres[k]
                    best = 0
                    bd = np.inf
                    for i in range(N):
                        dd = abs(s[i] - c0)
                        if dd < bd:          # argmin: the first of equal distances
                            bd = dd
                            best = i
                else:
                    best = 0
                    for i in range(N):       # argmax: the first maximum, or the first NaN
                        if np.isnan(resid[i]):
                            best = i
                            break
                        if resid[i] > resid[best]:
                            best = i
                    c0 = s[best]
                    if 1 <= best <= N - 2:   # the parabola's vertex, as in _initial
                        rm = resid[best - 1]
                        rp = resid[best + 1]
                        den = rm - 2.0 * resid[best] + rp
                        if den < 0:
                            frac = min(max(0.5 * (rm - rp) / den, -0.5), 0.5)
                            c0 = c0 + frac * (0.5 * (s[best + 1] - s[best - 1]))
                r = resid[best]
                h0 = r if (r > 1e-6 or np.isnan(r)) else 1e-6
                count = 0
                for i in range(N):
                    if resid[i] > 0.5 * h0:
                        count += 1
                w0 = max(count * step, 2 * step) / max(n_peaks, 1)
                theta[p, o] = h0
                theta[p, o + 1] = c0
                theta[p, o + 2] = w0
                if shape == 2:
                    theta[p, o + 3] = 0.5
                if not given[k] and n_peaks > 1:
                    for i in range(N):
                        u = 2 * (s[i] - c0) / w0
                        resid[i] = resid[i] - h0 / (1 + u * u)
            theta[p, per * n_peaks] = offset
            theta[p, per * n_peaks + 1] = slope

    @numba.njit(parallel=True, cache=True, nogil=True, error_model="numpy")
    def lm_fit(y, s, theta0, shape, n_peaks, mid, poisson, max_iter, tol, step,
               floor, rcond):  # pragma: no cover
        """Returns theta, Pearson chi-square, iterations, status (0 converged, 1 iteration
        limit, 2 stalled: the codes of peakfit.STATUS_NAMES), information matrix, SSR,
        and where the information matrix is invertible with its inverse
        (peakfit._information_inverse).

        Pixels go to the threads in runs of 64, each run with its own scratch arrays
        (allocating them per pixel cost about as much as a 5-parameter iteration)."""
        P, N = y.shape
        K = theta0.shape[1]
        theta = theta0.copy()
        cost_out = np.empty(P)
        n_iter = np.zeros(P, np.int64)
        status = np.ones(P, np.int8)
        info = np.empty((P, K, K))
        inv = np.full((P, K, K), np.nan)
        ok = np.zeros(P, np.bool_)
        ssr = np.empty(P)
        run = 64
        for r in numba.prange((P + run - 1) // run):
            At = np.empty((K, K))
            Ad = np.empty((K, K))
            L = np.zeros((K, K))
            g = np.empty(K)
            gt = np.empty(K)
            gd = np.empty(K)
            delta = np.empty(K)
            trial = np.empty(K)
            jrow = np.empty((K, N))
            buf = np.empty((8, N))
            Linv = np.empty((K, K))
            for p in range(r * run, min(P, (r + 1) * run)):
                ni, st, chi2, v = _fit_one(y[p], s, theta[p], shape, n_peaks, mid, poisson,
                                           max_iter, tol, step, floor, info[p], At, Ad, g,
                                           gt, gd, L, delta, trial, jrow, buf)
                n_iter[p] = ni
                status[p] = st
                cost_out[p] = chi2          # Pearson chi-square at the optimum
                ssr[p] = v
                ok[p] = _information_inverse(info[p], inv[p], L, Linv, delta, rcond)
        return theta, cost_out, n_iter, status, info, ssr, ok, inv
