"""The noise-aware least-area lift of background MCR (``BackgroundMCR(lift_noise=...)``).

The maps here are built in the test from independent random band spectra (Lorentzian
bands at random positions), not from the scene generator, and are scored by the cosine of
each true spectrum with its estimate after the best one-to-one pairing (Hungarian method,
Kuhn 1955, via scipy.optimize.linear_sum_assignment; common practice).
"""

import numpy as np
import pytest
from scipy.ndimage import gaussian_filter
from scipy.optimize import linear_sum_assignment

from mapkit import MapkitError, RamanMap
from mapkit.reduce import BackgroundMCR
from mapkit.reduce.factorise import _lift_tolerance, least_area_lift


def test_lift_tolerance_is_the_least_squares_standard_error():
    # one regressor and an intercept: the standard errors of both coefficients are those
    # of scipy.stats.linregress (the textbook formulas; e.g. Draper & Smith 1998, Applied
    # Regression Analysis, 3rd ed., ch. 1)
    from scipy.stats import linregress

    rng = np.random.default_rng(3)
    x = rng.uniform(0, 10, 40)
    C = np.column_stack([np.ones_like(x), x])
    D = np.column_stack([2 + 0.5 * x + rng.normal(0, s, x.size) for s in (0.1, 1.0, 3.0)])
    S = np.linalg.lstsq(C, D, rcond=None)[0]
    tol = _lift_tolerance(C, D, S, 1.0)
    for j in range(D.shape[1]):
        ref = linregress(x, D[:, j])
        np.testing.assert_allclose([tol[0, j], tol[1, j]], [ref.intercept_stderr, ref.stderr],
                                   rtol=1e-10)
    np.testing.assert_allclose(_lift_tolerance(C, D, S, 2.5), 2.5 * tol)


def test_last_sweep_only_is_every_sweep_when_there_is_one():
    m, _ = _minor_phase_map(1, shape=(10, 12), n=200)
    fits = [BackgroundMCR(n_components=3, max_iter=1, lift_noise=2.0,
                          lift_noise_sweeps=w).fit(m).components_ for w in ("all", "last")]
    np.testing.assert_array_equal(fits[0], fits[1])
    plain = BackgroundMCR(n_components=3, max_iter=1).fit(m).components_
    assert not np.allclose(plain, fits[0], atol=1e-3)


def test_lift_with_a_constant_basis_has_its_closed_form():
    # with a constant as the only free term the linear programme's optimum is where the
    # lowest channel (less its allowance) touches zero: b = -min(s + tol) (an exact
    # consequence of the constraint set; common practice)
    rng = np.random.default_rng(1)
    n = 200
    S = rng.normal(5.0, 1.0, (3, n))
    Q = np.full((n, 1), 1 / np.sqrt(n))
    tol = rng.uniform(0, 0.5, (3, n))
    for t in (None, tol):
        allow = 0 if t is None else t
        want = np.maximum(S - np.min(S + allow, axis=1, keepdims=True), 0)
        np.testing.assert_allclose(least_area_lift(S, Q, t), want, atol=1e-7)


def _band_spectra(rng, shift, k):
    out = []
    for _ in range(k):
        s = np.zeros_like(shift)
        for _ in range(rng.integers(3, 7)):
            c, w = rng.uniform(shift[0] + 30, shift[-1] - 30), rng.uniform(4, 14)
            s += rng.uniform(0.2, 1.0) / (1 + ((shift - c) / w) ** 2)
        out.append(s / s.max())
    return np.array(out)


def _minor_phase_map(seed, shape=(24, 28), n=300, level=60.0):
    """Three majors in smooth domains, a fourth phase in three spots of a few pixels,
    Poisson counts over a smooth background that varies across the map."""
    rng = np.random.default_rng(seed)
    shift = np.linspace(400, 1700, n)
    S = _band_spectra(rng, shift, 4)
    ny, nx = shape
    f = np.stack([gaussian_filter(rng.random(shape), 4) for _ in range(3)])
    f = np.exp(3 * (f - f.mean((1, 2), keepdims=True)) / f.std((1, 2), keepdims=True))
    f /= f.sum(axis=0, keepdims=True)
    yy, xx = np.mgrid[:ny, :nx]
    spot = np.zeros(shape)
    for _ in range(3):
        cy, cx = rng.uniform(3, ny - 3), rng.uniform(3, nx - 3)
        spot = np.maximum(spot, 0.8 * np.clip(2.0 - np.hypot(yy - cy, xx - cx), 0, 1))
    A = np.concatenate([f * (1 - spot), spot[None]])
    u = (shift - shift[0]) / np.ptp(shift)
    shapes = np.stack([np.exp(-u / 0.4), 1 - (u - 0.6) ** 2])
    w = gaussian_filter(rng.random((2,) + shape), 5)
    w /= w.mean(axis=(1, 2), keepdims=True)
    B = level * np.einsum("kyx,kn->yxn", w, shapes) + 20
    X = rng.poisson(level * np.einsum("kyx,kn->yxn", A, S) + B).astype(float)
    m = RamanMap(X, raman_shift=shift, x=np.arange(nx, dtype=float),
                 y=np.arange(ny, dtype=float))
    return m, S


def _paired_cosines(est, true):
    e = est / np.linalg.norm(est, axis=1, keepdims=True)
    t = true / np.linalg.norm(true, axis=1, keepdims=True)
    cos = e @ t.T
    rows, cols = linear_sum_assignment(-cos)
    return cos[rows, cols][np.argsort(cols)]


def test_noise_aware_lift_keeps_the_minor_phase_spectrum():
    # measured over seeds 0-7 (2026-12-02): the minor phase's cosine without the allowance
    # 0.63-0.90, with 2 standard errors 0.86-0.96, higher on 7 of 8 seeds (gain 0.02-0.30;
    # on seeds 0-2: 0.85/0.63/0.90 -> 0.87/0.92/0.94, majors 0.96 or better). On seed 6
    # both lose the minor phase to a duplicated major (0.09 and 0.00): the start's
    # failure, which the allowance does not repair. Bounds leave 0.02.
    # Only in the last sweep ("last"): 0.93/0.72/0.96 on seeds 0-2 (0.87-0.94 on 3-7 but
    # seed 6, 0.05), gain 0.06-0.09, majors 0.955 or better.
    # Re-measured with the rotation after the sweeps (least area, pure pixels; 2026-12-02,
    # seeds 0-2): minor 0.87/0.92/0.94 ("all"), 0.93/0.72/0.96 ("last"); gains
    # 0.02/0.30/0.03 and 0.08/0.09/0.06; the worst major 0.931/0.958/0.965 with "all"
    # (0.922 on seed 3: the allowance lets the rotation trade a little of a major), and
    # 0.968/0.958/0.972 with "last".
    gains, minor_on = {"all": [], "last": []}, {"all": [], "last": []}
    for seed in (0, 1, 2):
        m, S = _minor_phase_map(seed)
        off = _paired_cosines(BackgroundMCR(n_components=4).fit(m).components_, S)
        spectra = {}
        for where in ("all", "last"):
            est = BackgroundMCR(n_components=4, lift_noise=2.0, lift_noise_sweeps=where)
            spectra[where] = est.fit(m).components_
            on = _paired_cosines(spectra[where], S)
            gains[where].append(on[3] - off[3])
            minor_on[where].append(on[3])
            assert on[:3].min() >= (0.91 if where == "all" else 0.935), (seed, where, on)
        # the sweeps before the last follow the plain lift only with "last"
        assert not np.allclose(spectra["all"], spectra["last"], atol=1e-3)
    assert min(minor_on["all"]) >= 0.85, minor_on
    assert min(minor_on["last"]) >= 0.70, minor_on
    assert min(gains["all"]) > 0 and np.mean(gains["all"]) >= 0.08, gains
    assert min(gains["last"]) >= 0.04, gains


@pytest.mark.parametrize("bad", [{"lift_noise": -1.0}, {"lift_noise": float("nan")},
                                 {"lift_noise": "2"}, {"lift_noise": True},
                                 {"lift_noise": 2.0, "lift_noise_sweeps": "first"}])
def test_lift_noise_refuses_what_is_not_a_count_of_standard_errors(bad):
    m, _ = _minor_phase_map(0, shape=(6, 7), n=120)
    with pytest.raises(MapkitError, match=next(iter(bad)) if len(bad) == 1 else "sweeps"):
        BackgroundMCR(n_components=2, **bad).fit(m)
