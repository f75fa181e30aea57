"""Peak-fit maps against the physical limit (Cramér–Rao bound) and scipy's curve_fit."""

import numpy as np
import pytest

from mapkit import MapkitError, RamanMap
from mapkit.reduce import fit_peaks, peak_fit_map, silicon_stress, stress_result
from mapkit.reduce.peakfit import model_and_jacobian

S = np.arange(480.0, 561.0, 1.0)


def poisson_map(n=1600, h=500.0, w=6.0, bg=100.0, seed=0):
    rng = np.random.default_rng(seed)
    centres = 520.0 + rng.uniform(-2, 2, n)
    mu = bg + h / (1 + (2 * (S[None] - centres[:, None]) / w) ** 2)
    return rng.poisson(mu).astype(float), centres


def cramer_rao_centre(centres, h=500.0, w=6.0, bg=100.0, lo=490, hi=550):
    """Cramér–Rao bound of the centre for Poisson counts: [I(θ)⁻¹]_cc with the Fisher
    information I = Σᵢ (∂μᵢ/∂θ)(∂μᵢ/∂θ)ᵀ / μᵢ (e.g. Kay 1993, Fundamentals of Statistical
    Signal Processing, vol. 1, ch. 3), evaluated at the true parameters."""
    s = S[(S >= lo) & (S <= hi)]
    mid = 0.5 * (s[0] + s[-1])
    theta = np.column_stack([np.full_like(centres, h), centres, np.full_like(centres, w),
                             np.full_like(centres, bg), np.zeros_like(centres)])
    mu, J = model_and_jacobian(theta, s, "lorentzian", 1, mid)
    info = np.einsum("pnk,pn,pnl->pkl", J, 1 / mu, J)
    return np.linalg.inv(info)[:, 1, 1]


def test_centre_precision_reaches_the_cramer_rao_bound():
    y, centres = poisson_map(n=4000)
    fit = fit_peaks(y, S, 490, 550, shape="lorentzian")
    assert fit["converged"].all()
    rmse = np.sqrt(np.mean((fit["theta"][:, 1] - centres) ** 2))
    bound = np.sqrt(np.mean(cramer_rao_centre(centres)))
    # 4000 pixels: the RMSE itself is known to ~1.1 % (1/sqrt(2n)); measured 0.98-1.00
    # over seeds 0-2
    assert rmse <= 1.05 * bound, (rmse, bound)


def test_poisson_fit_beats_least_squares_at_low_counts():
    """At low counts the efficient estimator is the maximum-likelihood one (Kay 1993, ch. 7):
    the Poisson fit stays at the bound, the unweighted fit does not."""
    h, bg = 40.0, 5.0
    y, centres = poisson_map(n=4000, h=h, bg=bg, seed=1)
    bound = np.sqrt(np.mean(cramer_rao_centre(centres, h=h, bg=bg)))
    rmse = {}
    for weights in ("poisson", "uniform"):
        fit = fit_peaks(y, S, 490, 550, weights=weights)
        assert fit["converged"].all()
        rmse[weights] = np.sqrt(np.mean((fit["theta"][:, 1] - centres) ** 2)) / bound
    # measured over seeds 0-2: Poisson 0.997-1.020, unweighted 1.060-1.083 (ratio >= 1.06)
    assert rmse["poisson"] <= 1.05, rmse
    assert rmse["uniform"] >= 1.03 * rmse["poisson"], rmse


@pytest.mark.parametrize("shape", ["lorentzian", "gaussian", "pseudo_voigt"])
def test_analytic_jacobian_matches_finite_differences(shape):
    """The bound and the fit are built from this Jacobian: check it against central
    differences (common practice), two peaks so the cross terms are exercised too."""
    s = np.linspace(490, 550, 61)
    one = [300.0, 512.0, 5.0] + ([0.3] if shape == "pseudo_voigt" else [])
    two = [200.0, 526.0, 7.0] + ([0.6] if shape == "pseudo_voigt" else [])
    theta = np.array([one + two + [40.0, 0.4]])
    _, J = model_and_jacobian(theta, s, shape, 2, 520.0)
    for k in range(theta.shape[1]):
        step = 1e-6 * max(abs(theta[0, k]), 1.0)
        up, down = theta.copy(), theta.copy()
        up[0, k] += step
        down[0, k] -= step
        fd = (model_and_jacobian(up, s, shape, 2, 520.0)[0]
              - model_and_jacobian(down, s, shape, 2, 520.0)[0]) / (2 * step)
        np.testing.assert_allclose(J[0, :, k], fd[0], rtol=1e-6, atol=1e-6 * np.abs(fd).max())


def _baseline_map(n=4000, seed=0):
    """Shot-noise spectra on a curved fluorescence background, and that background."""
    rng = np.random.default_rng(seed)
    centres = 520.0 + rng.uniform(-2, 2, n)
    base = np.tile(100.0 * (1 + 3 * np.exp(-((S - 470) / 60) ** 2)), (n, 1))
    mu = base + 500.0 / (1 + (2 * (S[None] - centres[:, None]) / 6.0) ** 2)
    return rng.poisson(mu).astype(float), base, centres


def test_error_bars_cover_the_scatter_raw_and_after_baseline_subtraction():
    """Reported centre errors match the real scatter over 4000 pixels, on raw counts
    (Poisson fit, model covariance) and after subtracting the background (least squares,
    sandwich covariance: White 1980, Econometrica 48:817; HC2 of MacKinnon & White 1985,
    J. Econometrics 29:305)."""
    y, base, centres = _baseline_map()
    ratios = {}
    for label, data in (("raw", y), ("subtracted", y - base)):
        fit = fit_peaks(data, S, 490, 550)
        assert fit["converged"].all()
        rmse = np.sqrt(np.mean((fit["theta"][:, 1] - centres) ** 2))
        ratios[label] = np.sqrt(np.mean(fit["stderr"][:, 1] ** 2)) / rmse
    assert fit["covariance"] == "sandwich"
    # measured over seeds 0-2: raw 0.97-0.99, subtracted 0.99-1.00
    assert 0.9 <= ratios["raw"] <= 1.1 and 0.9 <= ratios["subtracted"] <= 1.1, ratios
    # the equal-noise covariance on the subtracted data is what this guards against
    fit = fit_peaks(y - base, S, 490, 550, covariance="model")
    rmse = np.sqrt(np.mean((fit["theta"][:, 1] - centres) ** 2))
    assert np.sqrt(np.mean(fit["stderr"][:, 1] ** 2)) / rmse < 0.8


def test_stress_errors_after_baseline_subtraction_cover_the_scatter():
    """The stress map inherits the centre errors: check them through stress_result."""
    y, base, centres = _baseline_map(n=40 * 50, seed=3)
    m = RamanMap((y - base).reshape(40, 50, -1), raman_shift=S, x=np.arange(50.0),
                 y=np.arange(40.0))
    st = stress_result(peak_fit_map(m, 490, 550), reference=520.0)
    true = silicon_stress(centres, reference=520.0).reshape(40, 50)
    rmse = np.sqrt(np.mean((st.fields["stress"].data - true) ** 2))
    assert 0.9 <= np.sqrt(np.mean(st.fields["stress"].errors ** 2)) / rmse <= 1.1


def test_fit_states_mean_what_they_say():
    """A fit that never improves (a missing channel: every trial cost is NaN) stalls and
    is not called converged; one stopped by max_iter says so; an exact noise-free fit
    whose last steps are rejected at rounding level is converged (gradient test). Both
    engines report the same state (common practice: LM termination tests, Moré 1978)."""
    from mapkit.reduce.peakfit import CONVERGED, ITERATION_LIMIT, STALLED

    y, centres = poisson_map(n=40, seed=5)
    y[0, 30] = np.nan
    exact = 100 + 500 / (1 + (2 * (S[None] - centres[:, None]) / 6.0) ** 2)
    for engine in ("numba", "numpy"):
        fit = fit_peaks(y, S, 490, 550, engine=engine)
        assert fit["status"][0] == STALLED and not fit["converged"][0]
        assert (fit["status"][1:] == CONVERGED).all()
        short = fit_peaks(y[1:], S, 490, 550, engine=engine, max_iter=2)
        assert (short["status"] == ITERATION_LIMIT).all() and not short["converged"].any()
        for weights in ("uniform", "poisson"):
            clean = fit_peaks(exact, S, 490, 550, engine=engine, weights=weights)
            assert clean["converged"].all()
            np.testing.assert_allclose(clean["theta"][:, 1], centres, atol=1e-6)


def test_agrees_with_scipy_curve_fit():
    from scipy.optimize import curve_fit

    y, _ = poisson_map(n=20, seed=4)
    # the equal-noise covariance is curve_fit's (absolute_sigma=False)
    fit = fit_peaks(y, S, 490, 550, weights="uniform", covariance="model")
    sel = (S >= 490) & (S <= 550)
    f = lambda x, h, c, w, a, b: h / (1 + (2 * (x - c) / w) ** 2) + a + b * (x - 520)  # noqa: E731
    for i in range(20):
        p, cov = curve_fit(f, S[sel], y[i, sel], p0=[400, 519, 5, 90, 0])
        np.testing.assert_allclose(fit["theta"][i, :3], p[:3], rtol=1e-5)
        np.testing.assert_allclose(fit["stderr"][i, 1], np.sqrt(cov[1, 1]), rtol=1e-3)


@pytest.mark.parametrize("shape", ["lorentzian", "gaussian", "pseudo_voigt"])
@pytest.mark.parametrize("background", [100.0, 0.3])
@pytest.mark.parametrize("weights", ["poisson", "uniform"])
def test_compiled_and_numpy_paths_agree(shape, background, weights):
    # 0.3 counts of background: the Poisson floor is reached in the tails, in both engines
    y, _ = poisson_map(n=50, seed=2, bg=background)
    a = fit_peaks(y, S, 490, 550, shape=shape, engine="numba", weights=weights)
    b = fit_peaks(y, S, 490, 550, shape=shape, engine="numpy", weights=weights)
    np.testing.assert_allclose(a["theta"], b["theta"], rtol=1e-8, atol=1e-8)
    np.testing.assert_array_equal(a["status"], b["status"])
    np.testing.assert_array_equal(a["n_iter"], b["n_iter"])
    for key in ("stderr", "chi2_reduced", "r2"):
        np.testing.assert_allclose(a[key], b[key], rtol=1e-7, atol=1e-12)


@pytest.mark.parametrize("shape", ["lorentzian", "pseudo_voigt"])
@pytest.mark.parametrize("seed", [6, 8])
def test_engines_agree_on_pixels_without_a_band(shape, seed):
    """Noise only: the fits chase single-channel spikes to the width bound, where the
    width is held (both engines alike). The states agree everywhere; along these flat
    valleys rounding can move the last accepted step (measured: 2 of 480 pixels over seeds
    6-9), so iterations must agree on 95 % of the pixels and the parameters within a
    thousandth of their standard errors."""
    from mapkit.reduce.peakfit import SINGULAR

    y, _ = poisson_map(n=60, h=0.0, seed=seed)
    a = fit_peaks(y, S, 490, 550, shape=shape, engine="numba")
    b = fit_peaks(y, S, 490, 550, shape=shape, engine="numpy")
    np.testing.assert_array_equal(a["status"], b["status"])
    assert np.mean(a["n_iter"] == b["n_iter"]) >= 0.95
    # where the information matrix is singular (no standard errors) the parameters along
    # its null direction are set by rounding; elsewhere they agree
    regular = np.isfinite(a["stderr"]).all(axis=1)
    assert regular.sum() >= 30 and not regular[a["status"] == SINGULAR].any()
    gap = np.abs(a["theta"] - b["theta"])[regular]
    assert np.all(gap <= 1e-3 * a["stderr"][regular] + 1e-8 * np.abs(a["theta"][regular]))
    # and none of them is reported as a band (3 standard errors)
    from mapkit.reduce.peakfit import NO_BAND, reject_fits

    assert ((reject_fits(a, 490, 550, shape, 1) & NO_BAND) > 0).mean() > 0.9


def test_compiled_logarithm_matches_numpy():
    """The kernel's vectorised logarithm against numpy's (IEEE 754 double; within 2 ulp,
    common practice for a libm-quality log)."""
    from mapkit.reduce._peakfit_kernel import HAVE_NUMBA

    if not HAVE_NUMBA:
        pytest.skip("no compiled kernel")
    from mapkit.reduce._peakfit_kernel import _log_rows

    rng = np.random.default_rng(0)
    q = np.concatenate([rng.uniform(0.2, 5.0, 5000), 10.0 ** rng.uniform(-300, 300, 5000),
                        1.0 + rng.normal(0, 1e-6, 5000), [1.0, 2.0, 0.5, np.sqrt(2.0)]])
    out, scratch, exps = np.empty_like(q), np.empty_like(q), np.empty_like(q)
    _log_rows(q, out, scratch, exps)
    ref = np.log(q)
    assert np.all(np.abs(out - ref) <= 2 * np.spacing(np.abs(ref)) + 1e-300)


def test_gaussian_and_pseudo_voigt_recover_their_parameters():
    # invented spectra of known parameters; the pseudo-Voigt is the linear mix eta*L +
    # (1 - eta)*G of equal FWHM (Thompson, Cox & Hastings 1987, J. Appl. Cryst. 20:79)
    rng = np.random.default_rng(8)
    u = 2 * (S - 515.0) / 8.0
    g = 800 * np.exp(-np.log(2) * u ** 2)
    lor = 800 / (1 + u ** 2)
    for shape, clean, eta in (("gaussian", g, None), ("pseudo_voigt", 0.3 * lor + 0.7 * g, 0.3)):
        y = rng.poisson(np.tile(clean + 50, (200, 1))).astype(float)
        fit = fit_peaks(y, S, 490, 545, shape=shape)
        assert np.median(fit["theta"][:, 1]) == pytest.approx(515.0, abs=0.05)
        assert np.median(fit["theta"][:, 2]) == pytest.approx(8.0, rel=0.02)
        if eta is not None:
            assert np.median(fit["theta"][:, 3]) == pytest.approx(eta, abs=0.05)


def test_two_overlapping_peaks():
    # two Lorentzians 12 1/cm apart, FWHM 5 and 6 (overlapping flanks), of known centres
    # (invented; the reference is the generating model itself, as in a worked example)
    u1, u2 = 2 * (S - 512) / 5, 2 * (S - 524) / 6
    y = np.tile(60 + 900 / (1 + u1 ** 2) + 500 / (1 + u2 ** 2), (30, 1))
    y = np.random.default_rng(0).poisson(y).astype(float)
    fit = fit_peaks(y, S, 495, 545, n_peaks=2, centres=[511, 525])
    assert np.median(fit["theta"][:, 1]) == pytest.approx(512, abs=0.1)
    assert np.median(fit["theta"][:, 4]) == pytest.approx(524, abs=0.1)


def test_map_fields_and_quality_mask():
    y, centres = poisson_map(n=12 * 10)
    cube = y.reshape(12, 10, -1)
    cube[0, 0] = 100.0                       # a flat spectrum: no band to fit
    m = RamanMap(cube, raman_shift=S, x=np.arange(10.0), y=np.arange(12.0))
    r = peak_fit_map(m, 490, 550)
    for key in ("centre", "fwhm", "height", "area", "chi2_reduced", "r2", "converged"):
        assert key in r.fields
    assert r.fields["centre"].units == "1/cm" and r.fields["centre"].errors is not None
    # area of a Lorentzian = (pi/2) h w
    np.testing.assert_allclose(np.nanmedian(r.fields["area"].data), np.pi / 2 * 500 * 6, rtol=0.03)
    assert np.nanmedian(r.fields["chi2_reduced"].data) == pytest.approx(1.0, abs=0.15)


def test_silicon_stress_coefficient():
    # De Wolf 1996, Semicond. Sci. Technol. 11:139 (from memory) writes the relation as
    # sigma (MPa) = -434 * d_omega (1/cm) for uniaxial and -217 * d_omega for equibiaxial
    # stress: a 1 1/cm downshift is 0.434 GPa tensile (0.217 GPa biaxial)
    assert silicon_stress(520.7 - 1.0) == pytest.approx(0.434, rel=0.01)
    assert silicon_stress(520.7 - 1.0, mode="biaxial") == pytest.approx(0.217, rel=0.01)
    assert silicon_stress(520.7 + 1.0) == pytest.approx(-0.434, rel=0.01)
    y, _ = poisson_map(n=6)
    m = RamanMap(y.reshape(2, 3, -1), raman_shift=S, x=np.arange(3.0), y=np.arange(2.0))
    st = stress_result(peak_fit_map(m, 490, 550), reference=520.0)
    assert st.fields["stress"].units == "GPa" and st.fields["stress"].errors is not None


def test_bad_peak_requests():
    y, _ = poisson_map(n=2)
    with pytest.raises(MapkitError, match="unknown peak shape"):
        fit_peaks(y, S, 490, 550, shape="voigt")
    with pytest.raises(MapkitError, match="one starting centre per peak"):
        fit_peaks(y, S, 490, 550, n_peaks=2, centres=[520])
    with pytest.raises(MapkitError, match="cannot fit"):
        fit_peaks(y, S, 519, 522)


def test_lazy_map_fits_like_in_memory(tmp_path):
    """A map opened lazily is fitted from its window's channels alone, with the same result."""
    from mapkit.export import write_map
    from mapkit.read import open_map

    y, _ = poisson_map(n=8 * 6)
    m = RamanMap(y.reshape(8, 6, -1), raman_shift=S, x=np.arange(6.0), y=np.arange(8.0))
    lazy = open_map(write_map(tmp_path / "m.h5", m))
    assert lazy.is_lazy
    a = peak_fit_map(m, 490, 550).fields["centre"]
    b = peak_fit_map(lazy, 490, 550).fields["centre"]
    np.testing.assert_allclose(b.data, a.data, rtol=1e-9)


def test_compiled_start_values_equal_numpy_start_values():
    """Both engines start from the same values (the kernel's ``initial`` is the twin of
    ``_initial``): one and two peaks, given and found centres, a missing channel."""
    from mapkit.reduce._peakfit_kernel import HAVE_NUMBA

    if not HAVE_NUMBA:
        pytest.skip("no compiled kernel")
    from mapkit.reduce._peakfit_kernel import SHAPE_CODES, initial
    from mapkit.reduce.peakfit import PEAK_PARAMS, _initial, _start_step

    y, _ = poisson_map(n=30, seed=7)
    y[3, 40] = np.nan
    s = S[(S >= 490) & (S <= 550)]
    y = np.ascontiguousarray(y[:, (S >= 490) & (S <= 550)])
    mid = 0.5 * (s[0] + s[-1])
    for shape, n_peaks, centres in (("lorentzian", 1, None), ("gaussian", 1, [519.0]),
                                    ("pseudo_voigt", 2, None), ("lorentzian", 2, [512.0, None])):
        ref = _initial(s, y, shape, n_peaks, centres, mid)
        given = [c is not None for c in (centres or [None] * n_peaks)]
        got = np.zeros((y.shape[0], len(PEAK_PARAMS[shape]) * n_peaks + 2))
        initial(s, y, SHAPE_CODES[shape], n_peaks,
                np.array([c if g else 0.0 for c, g in zip(centres or [0.0] * n_peaks, given)]),
                np.array(given), mid, _start_step(s), got)
        np.testing.assert_array_equal(got, ref)
