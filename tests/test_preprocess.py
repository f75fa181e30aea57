"""Preprocessing against outside references."""

import numpy as np
import pytest
from scipy.signal import savgol_coeffs

from mapkit import MapkitError
from mapkit.preprocess import (air_to_vacuum, als_baseline, bad_pixel_mask, normalise, savgol,
                               shift_to_wavelength, spectral_spike_mask, vacuum_to_air,
                               wavelength_to_shift)
from mapkit.preprocess.baseline import solve_pentadiagonal


# --- Savitzky-Golay: Savitzky & Golay 1964, Anal. Chem. 36:1627, tables as corrected by
# Steinier, Termonia & Deltour 1972, Anal. Chem. 44:1906
@pytest.mark.parametrize("window, table, norm", [
    (5, [-3, 12, 17, 12, -3], 35),
    (7, [-2, 3, 6, 7, 6, 3, -2], 21),
    (9, [-21, 14, 39, 54, 59, 54, 39, 14, -21], 231),
])
def test_savgol_smoothing_matches_published_tables(window, table, norm):
    impulse = np.zeros((1, 3 * window))
    impulse[0, 3 * window // 2] = 1.0
    response = savgol(impulse, window=window, order=2)[0]
    centre = 3 * window // 2
    got = response[centre - window // 2:centre + window // 2 + 1][::-1] * norm
    np.testing.assert_allclose(got, table, atol=1e-9)


def test_savgol_first_derivative_matches_table():
    # 5-point first derivative (-2, -1, 0, 1, 2)/10 (Savitzky & Golay 1964)
    ramp = np.arange(20.0)[None] ** 1
    np.testing.assert_allclose(savgol(ramp, window=5, order=2, deriv=1)[0, 5:15], 1.0)
    np.testing.assert_allclose(savgol_coeffs(5, 2, deriv=1, use="dot") * 10, [-2, -1, 0, 1, 2],
                               atol=1e-12)


# --- ALS baseline: Eilers & Boelens 2005; cross-checked with pybaselines (Erb, pybaselines)
def test_als_matches_pybaselines(cleaned, sample_map):
    pytest.importorskip("pybaselines")
    from pybaselines import Baseline

    spectra = np.asarray(cleaned["despiked"].intensity, float).reshape(-1, 600)[::97][:24]
    fitter = Baseline(sample_map.raman_shift)
    for lam, p in ((1e5, 0.01), (1e7, 0.001)):
        ours = als_baseline(spectra, lam=lam, p=p)
        ref = np.array([fitter.asls(s, lam=lam, p=p)[0] for s in spectra])
        rel = np.max(np.abs(ours - ref), axis=1) / np.max(np.abs(ref), axis=1)
        assert rel.max() < 1e-6, rel.max()


def test_als_float32_input_is_solved_in_float64():
    x = np.linspace(0, 1, 500)
    y = (1000 + 300 * x + 50 * np.exp(-((x - 0.5) / 0.01) ** 2)).astype(np.float32)
    b32 = als_baseline(y[None], lam=1e7, p=0.001)
    b64 = als_baseline(y.astype(float)[None], lam=1e7, p=0.001)
    assert b32.dtype == np.float64 and np.all(np.isfinite(b32))
    np.testing.assert_allclose(b32, b64, rtol=1e-6)


def test_second_order_penalty_leaves_a_straight_line():
    # Eilers 2003, Anal. Chem. 75:3631: a 2nd-order difference penalty does not bend a line
    line = 5.0 + 0.3 * np.arange(300.0)
    np.testing.assert_allclose(als_baseline(line[None], lam=1e5, p=0.5)[0], line, rtol=1e-9)


def test_pentadiagonal_solver_matches_dense_solve():
    rng = np.random.default_rng(3)
    n = 40
    w = rng.uniform(0.01, 1, (3, n))
    from mapkit.preprocess.baseline import _penalty_diagonals
    d0, d1, d2 = _penalty_diagonals(n, 50.0)
    rhs = rng.normal(size=(3, n))
    x = solve_pentadiagonal(w + d0, np.broadcast_to(d1, (3, n - 1)), np.broadcast_to(d2, (3, n - 2)), rhs)
    for k in range(3):
        A = np.diag(w[k] + d0) + np.diag(d1, 1) + np.diag(d1, -1) + np.diag(d2, 2) + np.diag(d2, -2)
        np.testing.assert_allclose(x[k], np.linalg.solve(A, rhs[k]), rtol=1e-8)


def test_als_rejects_bad_parameters():
    with pytest.raises(MapkitError, match="p = 2"):
        als_baseline(np.ones(10), p=2)


# --- spikes on the sample map, whose spikes are known
def test_spatial_spike_removal_on_sample(cleaned, truth, sample_map):
    spikes = cleaned["spikes"]
    mask = cleaned["flagged"].mask
    added = np.zeros(sample_map.shape)
    added[tuple(truth["spike_index"].T)] = truth["spike_added"]
    cube = np.asarray(cleaned["flagged"].intensity, float)
    # a spike channel counts when the spike adds more than 5 Poisson sd (weaker ones are noise)
    significant = (added > 5 * np.sqrt(np.maximum(cube - added, 1))) & ~mask[..., None]
    recall = (spikes & significant).sum() / significant.sum()
    assert significant.sum() > 50
    assert recall >= 0.995, recall
    clean = ~(added > 0).any(axis=-1) & ~mask
    touched = spikes.any(axis=-1)[clean].mean()
    assert touched <= 0.005, touched


def test_narrow_real_band_is_not_altered(cleaned, truth):
    """The calcite 1086 band is ~1.3 channels wide: spike removal must leave it alone."""
    k = int(np.argmin(np.abs(truth["raman_shift"] - 1086)))
    w = truth["mass_fraction"][1]
    calcite_px = (w > 0.5) & ~cleaned["flagged"].mask
    touched = cleaned["spikes"][calcite_px][:, k - 2:k + 3].any(axis=-1)
    spike_px = np.zeros_like(calcite_px)
    spike_px[tuple(truth["spike_index"][:, :2].T)] = True
    assert touched[~spike_px[calcite_px]].sum() == 0
    # …whereas a spectral-only test does clip such a narrow band in many spectra
    flat = np.asarray(cleaned["flagged"].intensity, float)[calcite_px]
    spectral = spectral_spike_mask(flat, threshold=3.5)
    assert spectral[:, k - 1:k + 2].any(axis=-1).mean() > 0.1


def test_bad_pixels_found(cleaned, truth):
    assert cleaned["report"] == {"nonfinite": 0, "dead": 2, "saturated": 1}
    np.testing.assert_array_equal(cleaned["flagged"].mask, truth["bad_pixels"])


def test_bad_pixel_kinds():
    b = np.ones((4, 10))
    b[0, 3] = np.nan
    b[1] = 0.0
    b[2, 2:6] = 100.0
    flags = bad_pixel_mask(b * np.arange(1, 11))
    assert flags["nonfinite"].tolist() == [True, False, False, False]
    assert flags["dead"].tolist() == [False, True, False, False]


def test_normalise_methods():
    b = np.array([[1.0, 2.0, 3.0], [0.0, 0.0, 0.0]])
    np.testing.assert_allclose(np.linalg.norm(normalise(b, method="vector")[0]), 1)
    np.testing.assert_allclose(normalise(b, method="max")[0].max(), 1)
    snv = normalise(b, method="snv")[0]
    assert abs(snv.mean()) < 1e-12 and snv.std() == pytest.approx(1)
    np.testing.assert_allclose(np.trapezoid(normalise(b, [0, 1, 2.0], method="area")[0], [0, 1, 2]), 1)
    assert np.all(normalise(b, method="vector")[1] == 0)
    with pytest.raises(MapkitError, match="unknown normalisation"):
        normalise(b, method="median")


# --- axis conversions: values computed from Δν̃ = 1e7/λ0 − 1e7/λ (vacuum), see REFERENCE_VALUES
def test_shift_wavelength_conversions():
    assert shift_to_wavelength(520.7, 532.0) == pytest.approx(547.157, abs=5e-4)   # Si Stokes
    assert shift_to_wavelength(-520.7, 532.0) == pytest.approx(517.660, abs=5e-4)  # anti-Stokes
    assert shift_to_wavelength(1001.4, 785.0) == pytest.approx(851.974, abs=5e-4)  # polystyrene
    assert wavelength_to_shift(shift_to_wavelength(1602.3, 633.0), 633.0) == pytest.approx(1602.3)
    with pytest.raises(MapkitError, match="laser"):
        shift_to_wavelength(100, None)


def test_air_vacuum_birch_downs():
    # Birch & Downs 1994, Metrologia 31:315 (formula as in Morton 2000, ApJS 130:403)
    assert air_to_vacuum(632.816) == pytest.approx(632.991, abs=1e-3)
    assert vacuum_to_air(632.991) == pytest.approx(632.816, abs=1e-3)
    # Ne I 640.2248 nm in air (NIST ASD) → 15615.20 cm⁻¹ absolute
    assert 1e7 / air_to_vacuum(640.2248) == pytest.approx(15615.20, abs=0.01)
