"""Compiled Levenberg–Marquardt for peak-fit maps: one small fit per pixel, pixels in parallel.

The numpy version in :mod:`mapkit.reduce.peakfit` runs the same algorithm vectorised
across pixels; this kernel avoids its array traffic (every iteration copies the
Jacobians of all active pixels). Measured 30x faster than a per-pixel
``scipy.optimize.curve_fit`` loop, one thread against one, on 2026-12-02 on a 2-core VM
(benchmarks/bench_peakfit.py, benchmarks/RESULTS.md). Parameters agree with the numpy
path within 1e-8 relative, and fit states and iteration counts are identical
(tests/test_peakfit.py).
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

    @numba.njit(cache=True, nogil=True)
    def _model(theta, s, shape, n_peaks, mid, mu, J):  # pragma: no cover - compiled
        per = 4 if shape == 2 else 3
        N = s.size
        K = theta.size
        for i in range(N):
            mu[i] = theta[K - 2] + theta[K - 1] * (s[i] - mid)
            J[i, K - 2] = 1.0
            J[i, K - 1] = s[i] - mid
        for k in range(n_peaks):
            o = k * per
            h = theta[o]
            c = theta[o + 1]
            w = theta[o + 2]
            eta = theta[o + 3] if shape == 2 else 0.0
            for i in range(N):
                u = 2.0 * (s[i] - c) / w
                lor = 0.0
                gau = 0.0
                dl = 0.0
                dg = 0.0
                if shape != 1:
                    lor = 1.0 / (1.0 + u * u)
                    dl = -2.0 * u * lor * lor
                if shape != 0:
                    gau = np.exp(-LN2 * u * u)
                    dg = -2.0 * LN2 * u * gau
                if shape == 0:
                    f, dfdu = lor, dl
                elif shape == 1:
                    f, dfdu = gau, dg
                else:
                    f = eta * lor + (1 - eta) * gau
                    dfdu = eta * dl + (1 - eta) * dg
                    J[i, o + 3] = h * (lor - gau)
                mu[i] += h * f
                J[i, o] = f
                J[i, o + 1] = h * dfdu * (-2.0 / w)
                J[i, o + 2] = h * dfdu * (-u / w)

    @numba.njit(cache=True, nogil=True)
    def _clamp(t, shape, n_peaks, s0, s1, step):  # pragma: no cover - compiled
        per = 4 if shape == 2 else 3
        span = s1 - s0
        for k in range(n_peaks):
            o = k * per
            t[o + 2] = min(max(t[o + 2], 0.25 * step), 4 * span)
            t[o + 1] = min(max(t[o + 1], s0 - 0.5 * span), s1 + 0.5 * span)
            if shape == 2:
                t[o + 3] = min(max(t[o + 3], 0.0), 1.0)

    @numba.njit(cache=True, nogil=True)
    def _cost(y, mu, poisson, w, floor):  # pragma: no cover - compiled
        # Poisson: the deviance 2Σ[μ − y + y ln(y/μ)], whose Fisher-scoring step uses
        # weights 1/μ (so the fit is the maximum-likelihood estimate); else least squares.
        # One floor on μ for both (peakfit.POISSON_FLOOR)
        total = 0.0
        for i in range(y.size):
            if poisson:
                m = max(mu[i], floor)
                w[i] = 1.0 / m
                total += 2.0 * (m - y[i])
                if y[i] > 0:
                    total += 2.0 * y[i] * np.log(y[i] / m)
            else:
                w[i] = 1.0
                r = y[i] - mu[i]
                total += r * r
        return total

    @numba.njit(cache=True, nogil=True)
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

    @numba.njit(cache=True, nogil=True, inline="always")
    def _normal(y, mu, J, w, A, g):  # pragma: no cover - compiled
        N, K = J.shape
        A[:, :] = 0.0
        g[:] = 0.0
        for i in range(N):
            r = w[i] * (y[i] - mu[i])
            for a in range(K):
                wa = w[i] * J[i, a]
                g[a] += J[i, a] * r
                for b in range(a, K):
                    A[a, b] += wa * J[i, b]
        for a in range(K):
            for b in range(a):
                A[a, b] = A[b, a]

    @numba.njit(cache=True, nogil=True, inline="always")
    def _hold_eta(t, A, g, n_peaks):  # pragma: no cover - compiled
        # η held at a bound it is pushing against: leave it there
        K = g.size
        for k in range(n_peaks):
            e = k * 4 + 3
            if (t[e] >= 1.0 and g[e] > 0) or (t[e] <= 0.0 and g[e] < 0):
                for b in range(K):
                    A[e, b] = 0.0
                    A[b, e] = 0.0
                A[e, e] = 1.0
                g[e] = 0.0

    @numba.njit(parallel=True, cache=True, nogil=True)
    def lm_fit(y, s, theta0, shape, n_peaks, mid, poisson, max_iter, tol, step,
               floor):  # pragma: no cover
        """Returns theta, Pearson chi-square, iterations, status (0 converged, 1 iteration
        limit, 2 stalled: the codes of peakfit.STATUS_NAMES), information matrix, SSR."""
        P, N = y.shape
        K = theta0.shape[1]
        theta = theta0.copy()
        cost_out = np.empty(P)
        n_iter = np.zeros(P, np.int64)
        status = np.ones(P, np.int8)
        info = np.empty((P, K, K))
        ssr = np.empty(P)
        for p in numba.prange(P):
            t = theta[p].copy()
            mu = np.empty(N)
            J = np.empty((N, K))
            w = np.empty(N)
            mu_t = np.empty(N)
            J_t = np.empty((N, K))
            w_t = np.empty(N)
            A = np.empty((K, K))
            Ad = np.empty((K, K))
            L = np.zeros((K, K))
            g = np.empty(K)
            delta = np.empty(K)
            trial = np.empty(K)
            _model(t, s, shape, n_peaks, mid, mu, J)
            cost = _cost(y[p], mu, poisson, w, floor)
            lam = 1e-3
            stalled = False
            for it in range(max_iter):
                _normal(y[p], mu, J, w, A, g)
                Ad[:, :] = A
                for a in range(K):
                    Ad[a, a] += lam * max(A[a, a], 1e-12)
                if shape == 2:
                    _hold_eta(t, Ad, g, n_peaks)
                n_iter[p] = it + 1
                accepted = False
                rel = 1.0
                # a damped system that is not positive definite is a rejected step
                if _solve_spd(Ad, g, delta, L):
                    for a in range(K):
                        trial[a] = t[a] + delta[a]
                    _clamp(trial, shape, n_peaks, s[0], s[-1], step)
                    _model(trial, s, shape, n_peaks, mid, mu_t, J_t)
                    cost_t = _cost(y[p], mu_t, poisson, w_t, floor)
                    if np.isfinite(cost_t) and cost_t <= cost:
                        accepted = True
                        rel = abs(cost - cost_t) / max(cost, 1e-300)
                        t[:] = trial[:]
                        mu[:] = mu_t
                        J[:, :] = J_t
                        w[:] = w_t
                        cost = cost_t
                if accepted:
                    lam = max(lam / 3.0, 1e-12)
                    if rel < tol:
                        status[p] = 0
                        break
                else:
                    lam *= 4.0
                    if lam > 1e12:
                        stalled = True
                        break
            theta[p] = t
            if stalled:
                # converged only if a full Gauss-Newton step would not lower the
                # objective measurably (peakfit._at_optimum)
                _normal(y[p], mu, J, w, A, g)
                if shape == 2:
                    _hold_eta(t, A, g, n_peaks)
                scale = 0.0
                for i in range(N):
                    scale += w[i] * y[p, i] * y[p, i]
                status[p] = 2
                if _solve_spd(A, g, delta, L):
                    pred = 0.0
                    for a in range(K):
                        pred += g[a] * delta[a]
                    if pred <= tol * max(cost, 1e-14 * scale):
                        status[p] = 0
            v = 0.0
            chi2 = 0.0
            for i in range(N):
                r = y[p, i] - mu[i]
                v += r * r
                chi2 += w[i] * r * r
            ssr[p] = v
            cost_out[p] = chi2          # Pearson chi-square at the optimum
            for a in range(K):
                for b in range(K):
                    v = 0.0
                    for i in range(N):
                        v += w[i] * J[i, a] * J[i, b]
                    info[p, a, b] = v
        return theta, cost_out, n_iter, status, info, ssr
