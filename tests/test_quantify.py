"""Calibration statistics against a published worked example, and concentration maps."""

import numpy as np
import pytest

from mapkit import MapkitError
from mapkit.core.result import Axis
from mapkit.quantify import LinearCalibration, concentration_map

# Worked calibration set (Miller & Miller, Statistics and Chemometrics for Analytical
# Chemistry, fluorescence example): x = 0..12, y as below. Expected values computed by hand
# from the data with the book's formulas (ch. 5): b = 1.93036,
# a = 1.51786, r = 0.99888, s_y/x = 0.43285; y0 = 2.9 -> x0 = 0.716, s_x0 = 0.265 (m = 1);
# ICH Q2(R2) LOD = 3.3 s_y/x / b = 0.740, LOQ = 10 s_y/x / b = 2.242.
X = [0, 2, 4, 6, 8, 10, 12]
Y = [2.1, 5.0, 9.0, 12.6, 17.3, 21.0, 24.7]


def test_miller_worked_example():
    cal = LinearCalibration().fit(X, Y)
    assert cal.slope_ == pytest.approx(1.93036, abs=1e-3)
    assert cal.intercept_ == pytest.approx(1.51786, abs=1e-3)
    assert cal.r_ == pytest.approx(0.99888, abs=1e-3)
    assert cal.s_yx_ == pytest.approx(0.43285, abs=1e-3)
    x0, s_x0 = cal.inverse(2.9)
    assert x0 == pytest.approx(0.716, abs=1e-3)
    assert s_x0 == pytest.approx(0.265, abs=1e-3)
    assert cal.lod_ == pytest.approx(0.740, abs=1e-3)
    assert cal.loq_ == pytest.approx(2.242, abs=1e-3)


def test_against_scipy_linregress():
    from scipy.stats import linregress

    cal = LinearCalibration().fit(X, Y)
    ref = linregress(X, Y)
    assert cal.slope_ == pytest.approx(ref.slope) and cal.r_ == pytest.approx(ref.rvalue)


@pytest.mark.parametrize("x, y, words", [
    ([1, 2], [1, 2], "distinct concentration levels"),
    ([1, 1, 2, 2], [1, 2, 3, 4], "distinct concentration levels"),
    ([1, 2, 3, 4], [5, 5, 5, 5], "does not change"),
    ([1, 2, np.nan, 4], [1, 2, 3, 4], "not finite"),
])
def test_bad_calibrations(x, y, words):
    with pytest.raises(MapkitError, match=words):
        LinearCalibration().fit(x, y)


def test_concentration_map_flags():
    # ICH Q2(R2) (2023): results below LOQ are not quantitative, below LOD not detected;
    # outside the calibrated range is extrapolation (the worked line above: LOD 0.740,
    # LOQ 2.242, range 0-12)
    cal = LinearCalibration().fit(X, Y)
    resp = np.array([[2.0, 12.6], [40.0, np.nan]])
    x0, s_x0 = cal.inverse(resp)
    axes = (Axis("y", np.arange(2.0), "um"), Axis("x", np.arange(2.0), "um"))
    r = concentration_map(x0, s_x0, cal, axes)
    flags = r.fields["flags"].data
    assert flags[0, 0] & 1 and flags[0, 0] & 2          # below LOD and LOQ
    assert flags[0, 1] == 0                            # inside
    assert flags[1, 0] & 4                             # above the highest standard
    assert flags[1, 1] & 8                             # masked / no response
    assert np.isnan(r.fields["concentration"].data[1, 1])
    assert r.fields["concentration"].errors[0, 1] > 0
    assert r.summary["pixels"] == 3 and r.summary["quantifiable"] == 1


def test_quadratic_and_weighted_fits_match_numpy_polyfit():
    from mapkit.quantify import PolynomialCalibration

    x = np.repeat([0.0, 5, 10, 20, 30, 40], 3)
    rng = np.random.default_rng(3)
    y = 0.1 + 0.02 * x - 1.5e-4 * x ** 2 + rng.normal(0, 0.002 + 0.0002 * x)
    quad = PolynomialCalibration(2).fit(x, y)
    np.testing.assert_allclose(quad.coef_, np.polyfit(x, y, 2)[::-1], rtol=1e-9)
    wls = PolynomialCalibration(1, weighting="replicates").fit(x, y)
    # numpy.polyfit weights multiply the residuals: w = 1/sigma = sqrt(weight)
    np.testing.assert_allclose(wls.coef_, np.polyfit(x, y, 1, w=np.sqrt(wls.w_))[::-1],
                               rtol=1e-9)
    # r is the weighted correlation (numpy's weighted covariance, aweights = the WLS weights)
    c = np.cov(x, y, aweights=wls.w_)
    assert wls.r_ == pytest.approx(c[0, 1] / np.sqrt(c[0, 0] * c[1, 1]), rel=1e-9)
    assert wls.r2_ == pytest.approx(wls.r_ ** 2, rel=1e-9)
    assert wls.r_ != pytest.approx(np.corrcoef(x, y)[0, 1], rel=1e-6)
    # the quadratic reads its own standards back
    x0, s_x0 = quad.inverse(quad.predict(np.array([5.0, 25.0])))
    np.testing.assert_allclose(x0, [5.0, 25.0], atol=1e-9)
    assert np.all(s_x0 > 0)


def test_quadratic_inverse_error_matches_monte_carlo():
    """The delta-method s_x0 agrees with the scatter of repeated calibrations (simulation)."""
    from mapkit.quantify import PolynomialCalibration

    rng = np.random.default_rng(0)
    x = np.repeat([0.0, 10, 20, 30, 40, 50], 3)
    truth = lambda v: 0.05 + 0.03 * v - 2e-4 * v ** 2  # noqa: E731
    x_true, sd = 22.0, 0.01
    estimates, predicted = [], []
    for _ in range(400):
        cal = PolynomialCalibration(2).fit(x, truth(x) + rng.normal(0, sd, x.size))
        x0, s = cal.inverse(truth(x_true) + rng.normal(0, sd))
        estimates.append(float(x0))
        predicted.append(float(s))
    assert np.std(estimates) == pytest.approx(np.median(predicted), rel=0.15)


# --- coverage on the invented blend map, whose true content is known
def test_content_map_covers_truth_within_its_stated_uncertainty(sample_dir):
    import warnings

    from mapkit.preprocess.recipe import Recipe
    from mapkit.quantify import QuantModel, Response
    from mapkit.read import open_map, read_library
    from mapkit.read.calibration_set import read_calibration_set

    lib = read_library(sample_dir / "library")
    recipe = Recipe.from_file(sample_dir / "tablet_recipe.toml")
    response = Response("unmix_fraction", "acetaminophen", references=tuple(r.name for r in lib))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        model = QuantModel.fit(read_calibration_set(sample_dir / "calibration_standards.csv"),
                               response, model="quadratic", library=lib, recipe=recipe)
        clean, _ = recipe.apply(open_map(sample_dir / "blend_map.h5").load())
        r = model.apply(clean, lib)
    truth = np.load(sample_dir / "blend_truth.npz")["acetaminophen_pct"]
    x0 = r.fields["concentration"].data
    half = model.calibration.t95_ * r.fields["concentration"].errors
    coverage = np.mean(np.abs(x0 - truth) <= half)
    assert 0.90 <= coverage <= 0.99, coverage


def test_pls_calibration_matches_sklearn_and_predicts(sample_dir):
    from sklearn.cross_decomposition import PLSRegression

    from mapkit.preprocess.recipe import Recipe
    from mapkit.quantify import PLSCalibration
    from mapkit.quantify.model import _clean
    from mapkit.quantify.response import Response
    from mapkit.read.calibration_set import read_calibration_set

    cs = read_calibration_set(sample_dir / "calibration_standards.csv")
    spectra, shift = _clean(cs.spectra, cs.raman_shift, Recipe.default(), cs.source)
    X = Response("spectrum", "acetaminophen").compute(spectra, shift)
    groups = [n.rsplit("-", 1)[0] for n in cs.names]
    pls = PLSCalibration(max_components=6).fit(X, cs.concentration, groups)
    ref = PLSRegression(n_components=pls.n_components_, scale=False).fit(X, cs.concentration)
    np.testing.assert_allclose(pls.predict(X), ref.predict(X).ravel(), rtol=1e-9)
    assert pls.rmsecv_.size == 6 and pls.r2_ > 0.99


# --- physics: anti-Stokes/Stokes thermometry and the Cancado crystallite size
#: second radiation constant c2 = hc/k = 1.438776877e-2 m K (CODATA 2018: Tiesinga et al.
#: 2021, Rev. Mod. Phys. 93:025010), written out rather than taken from the code
C2 = 1.438776877


def _ratio_by_hand(t, shift, laser, n):
    """I_aS/I_S = [(nu0 + nu)/(nu0 - nu)]^n exp(-c2 nu / T): n = 3 for photon counting,
    n = 4 for energy detection (Malyj & Griffiths 1983, Appl. Spectrosc. 37:315; from memory)."""
    nu0 = 1e7 / laser
    return ((nu0 + shift) / (nu0 - shift)) ** n * np.exp(-C2 * shift / t)


def test_boltzmann_ratio_for_silicon_defaults_to_photon_counting():
    from mapkit.quantify import stokes_antistokes_ratio, temperature_from_ratio

    # worked example by hand: Si 520.7 1/cm, 532 nm, 298.15 K; nu0 = 18796.99 1/cm,
    # frequency factor 1.056981, Boltzmann factor exp(-2.51273) = 0.08105
    # -> 0.09571 with n = 3 (CCD), 0.10116 with n = 4
    assert stokes_antistokes_ratio(298.15, 520.7, 532.0) == pytest.approx(0.09571, abs=2e-5)
    assert stokes_antistokes_ratio(298.15, 520.7, 532.0, exponent=4) == pytest.approx(
        0.10116, abs=2e-5)
    for t in (77.0, 298.15, 600.0):
        for n in (3, 4):
            assert stokes_antistokes_ratio(t, 520.7, 532.0, exponent=n) == pytest.approx(
                _ratio_by_hand(t, 520.7, 532.0, n), rel=1e-7)
            assert temperature_from_ratio(_ratio_by_hand(t, 520.7, 532.0, n), 520.7, 532.0,
                                          exponent=n) == pytest.approx(t, rel=1e-7)
    # the default reads a photon-count ratio right; reading it as energy detection gives
    # 291.7 K for 298.15 K (the bias the default avoids)
    r = _ratio_by_hand(298.15, 520.7, 532.0, 3)
    assert temperature_from_ratio(r, 520.7, 532.0) == pytest.approx(298.15, rel=1e-7)
    assert temperature_from_ratio(r, 520.7, 532.0, exponent=4) == pytest.approx(291.72, abs=0.05)


def test_temperature_map_carries_detector_and_response_caution():
    from mapkit import RamanMap
    from mapkit.quantify import temperature_map

    shift = np.linspace(-700, 700, 1401)
    band = lambda c: 20000 / (1 + ((shift - c) / 2.0) ** 2)  # noqa: E731
    spec = band(520.7) + _ratio_by_hand(350.0, 520.7, 532.0, 3) * band(-520.7)
    m = RamanMap(np.tile(spec, (2, 2, 1)), raman_shift=shift, x=np.arange(2.0),
                 y=np.arange(2.0), laser_wavelength=532.0)
    r = temperature_map(m, 520.7, 12.0)
    assert r.summary["median_K"] == pytest.approx(350.0, abs=1.0)
    assert r.summary["detector"] == "photon counting"
    assert "relative spectral response" in r.summary["caution"]
    with pytest.raises(MapkitError, match="not 3 or 4"):
        temperature_map(m, 520.7, 12.0, exponent=2)


def test_cancado_crystallite_size():
    from mapkit import RamanMap
    from mapkit.quantify import crystallite_size, crystallite_size_map

    # Cancado et al. 2006, Appl. Phys. Lett. 88:163106: L_a = 2.4e-10 lambda^4 / (I_D/I_G)
    # (constant from memory); by hand 2.4e-10 * 532^4 = 19.22 nm, 514.5 nm -> 16.81 nm
    assert crystallite_size(1.0, 532.0) == pytest.approx(19.2, abs=0.05)
    assert crystallite_size(1.0, 514.5) == pytest.approx(16.8, abs=0.05)
    assert crystallite_size(2.0, 532.0) == pytest.approx(19.22 / 2, abs=0.05)
    # pixels outside the relation's range (about 20-500 nm, from memory) are flagged:
    # I_D/I_G = 0.1, 0.5, 2 at 532 nm -> 192, 38, 9.6 nm; only the last is outside
    shift = np.linspace(1100, 1800, 701)
    lor = lambda c: 1 / (1 + ((shift - c) / 1.5) ** 2)  # noqa: E731
    cube = np.stack([1000 * (q * lor(1350) + lor(1580)) for q in (0.1, 0.5, 2.0)])[None]
    m = RamanMap(cube, raman_shift=shift, x=np.arange(3.0), y=np.arange(1.0),
                 laser_wavelength=532.0)
    r = crystallite_size_map(m)
    np.testing.assert_allclose(r.fields["crystallite_size"].data[0], [192.2, 38.4, 9.6],
                               rtol=0.02)
    assert r.fields["outside_validity"].data[0].tolist() == [0, 0, 1]
    assert r.summary["outside_validity"] == 1


def test_region_statistics():
    # values worked by hand on a 4 x 5 ramp; a pixel is inside a polygon when its centre
    # is (common practice); the four centres inside are listed by hand below
    from mapkit.quantify import class_regions, polygon_mask, region_statistics

    values = np.arange(20.0).reshape(4, 5)
    flags = np.zeros((4, 5), np.uint8)
    flags[0, 0] = 8
    labels = (values >= 10).astype(int)
    stats = region_statistics(values, flags, class_regions(labels))
    assert stats["class 1"]["pixels"] == 9 and stats["class 1"]["mean"] == pytest.approx(5.0)
    assert stats["class 2"]["mean"] == pytest.approx(14.5)
    poly = polygon_mask(np.arange(5.0), np.arange(4.0), [(1.5, 0.5), (3.5, 0.5), (3.5, 2.5),
                                                        (1.5, 2.5)])
    # pixel centres (2, 1), (3, 1), (2, 2), (3, 2) hold 7, 8, 12, 13
    assert poly.sum() == 4 and region_statistics(values, flags, {"p": poly})["p"]["mean"] == 10.0
