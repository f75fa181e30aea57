"""Preprocessing against outside references."""

import numpy as np
import pytest

from mapkit import MapkitError
from mapkit.preprocess import (air_to_vacuum, als_baseline, bad_pixel_mask, normalise, savgol,
                               shift_to_wavelength, spectral_spike_mask, vacuum_to_air,
                               wavelength_to_shift)
from mapkit.preprocess._banded import (LANES, TASK_SPECTRA, penalty_diagonals,
                                       solve_pentadiagonal, weighted_whittaker)


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
    # 5-point quadratic first derivative (-2, -1, 0, 1, 2)/10 (Savitzky & Golay 1964,
    # Anal. Chem. 36:1627): the impulse response of our filter, not scipy's coefficients
    impulse = np.zeros((1, 15))
    impulse[0, 7] = 1.0
    response = savgol(impulse, window=5, order=2, deriv=1)[0]
    np.testing.assert_allclose(response[5:10][::-1] * 10, [-2, -1, 0, 1, 2], atol=1e-9)
    ramp = np.arange(20.0)[None] * 0.5      # slope 0.5 per channel, unit channel spacing
    np.testing.assert_allclose(savgol(ramp, window=5, order=2, deriv=1)[0], 0.5, atol=1e-9)


# --- baselines, cross-checked with pybaselines (D. Erb, "pybaselines", a general-purpose
# baseline library): asls = Eilers & Boelens 2005, arpls = Baek et al. 2015, airpls =
# Zhang et al. 2010, modpoly = Lieber & Mahadevan-Jansen 2003, mor = Perez-Pueyo 2010
BASELINE_CASES = [
    ("als", dict(lam=1e5, p=0.01), "asls", dict(lam=1e5, p=0.01)),
    ("als", dict(lam=1e7, p=0.001), "asls", dict(lam=1e7, p=0.001)),
    ("arpls", dict(lam=1e5), "arpls", dict(lam=1e5)),
    ("airpls", dict(lam=1e6), "airpls", dict(lam=1e6)),
    ("modpoly", dict(order=3), "modpoly", dict(poly_order=3)),
    ("rolling", dict(half_window=30), "mor", dict(half_window=30)),
]


@pytest.mark.parametrize("ours, kw, theirs, their_kw", BASELINE_CASES,
                         ids=[f"{c[0]}-{i}" for i, c in enumerate(BASELINE_CASES)])
def test_baselines_match_pybaselines(cleaned, sample_map, ours, kw, theirs, their_kw):
    from pybaselines import Baseline

    from mapkit.preprocess.baseline import METHODS

    spectra = np.asarray(cleaned["despiked"].intensity, float).reshape(-1, 600)
    spectra = spectra[np.ptp(spectra, axis=1) > 0][::97][:24]
    fitter = Baseline(sample_map.raman_shift)
    mine = METHODS[ours](spectra, sample_map.raman_shift, **kw)
    ref = np.array([getattr(fitter, theirs)(s, **their_kw)[0] for s in spectra])
    rel = np.max(np.abs(mine - ref), axis=1) / np.max(np.abs(ref), axis=1)
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
    d0, d1, d2 = penalty_diagonals(n, 50.0)
    rhs = rng.normal(size=(3, n))
    x = solve_pentadiagonal(w + d0, np.broadcast_to(d1, (3, n - 1)), np.broadcast_to(d2, (3, n - 2)), rhs)
    for k in range(3):
        A = np.diag(w[k] + d0) + np.diag(d1, 1) + np.diag(d1, -1) + np.diag(d2, 2) + np.diag(d2, -2)
        np.testing.assert_allclose(x[k], np.linalg.solve(A, rhs[k]), rtol=1e-8)


def test_compiled_and_numpy_solvers_agree():
    rng = np.random.default_rng(4)
    w = rng.uniform(0, 1, (7, 300))
    y = rng.normal(size=(7, 300)).cumsum(axis=1)
    a = weighted_whittaker(w, y, 1e4, engine="numba")
    b = weighted_whittaker(w, y, 1e4, engine="numpy")
    np.testing.assert_allclose(a, b, rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(als_baseline(y, lam=1e4, engine="numba"),
                               als_baseline(y, lam=1e4, engine="numpy"), rtol=1e-9, atol=1e-9)


def test_vectorised_exp_of_the_compiled_weights_matches_numpy():
    # the arPLS/airPLS weights use a hand-written exp that vectorises (Cody & Waite 1980
    # range reduction, Taylor polynomial): within 2 ulp of numpy's exp and of the C
    # library's (math.exp), two independent references, over the range the weights use
    # (1 ulp measured against numpy here), and exact at 0
    import numba

    from mapkit.preprocess._banded import _exp_lanes

    @numba.njit
    def run(T):
        E = np.empty_like(T)
        _exp_lanes(T, E, np.empty(T.shape, np.int64))
        return E

    rng = np.random.default_rng(5)
    T = np.concatenate([rng.uniform(-700, 708, 64_000), rng.uniform(-1, 1, 64_000),
                        np.linspace(-40, 40, 64_000), [0.0] * 32]).reshape(-1, 32)
    E, ref = run(T), np.exp(T)
    assert np.max(np.abs(E - ref) / ref) <= 2 * np.finfo(float).eps
    import math

    sub = T.ravel()[::97]
    libm = np.array([math.exp(t) for t in sub])
    assert np.max(np.abs(E.ravel()[::97] - libm) / libm) <= 2 * np.finfo(float).eps
    assert np.all(E[-1] == 1.0)
    # outside the range the value is that of the range's end (callers decide there)
    assert run(np.full((1, 32), 750.0))[0, 0] == run(np.full((1, 32), 708.0))[0, 0]


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


def _grain_scene(seed):
    """Two invented phases with different bands meeting along a wavy boundary and around
    a disc, Poisson counts, and 40 spikes of 10-40 noise units on boundary pixels."""
    rng = np.random.default_rng(seed)
    ny, nx, n = 40, 40, 400
    ch = np.arange(n)
    lor = lambda c, w: 1 / (1 + ((ch - c) / w) ** 2)  # noqa: E731
    a = 200 + 1500 * lor(120, 3) + 600 * lor(260, 4)
    b = 150 + 1200 * lor(190, 3) + 900 * lor(330, 5)
    yy, xx = np.mgrid[:ny, :nx]
    grain = (xx + 4 * np.sin(yy / 3.0) > nx / 2) | ((yy - 10) ** 2 + (xx - 10) ** 2 < 36)
    mu = np.where(grain[..., None], b, a)
    edge = np.zeros_like(grain)
    for dy in (-1, 0, 1):
        for dx in (-1, 0, 1):
            edge |= np.roll(np.roll(grain, dy, 0), dx, 1) != grain
    edge[[0, -1]] = False
    edge[:, [0, -1]] = False
    cube = rng.poisson(mu).astype(float)
    ey, ex = np.nonzero(edge)
    spikes = np.zeros(cube.shape, bool)
    for i in rng.choice(ey.size, 40, replace=False):
        c = rng.integers(5, n - 5)
        spikes[ey[i], ex[i], c] = True
        cube[ey[i], ex[i], c] += rng.uniform(10, 40) * np.sqrt(mu[ey[i], ex[i], c])
    return cube, spikes, edge, mu


@pytest.mark.parametrize("seed", [0, 1, 5])
def test_spikes_on_grain_boundaries(seed):
    """Boundary pixels see neighbours of another phase: the per-pixel noise gain is
    estimated from pixel-minus-neighbour residuals that carry that real contrast, and the
    brightest neighbour may hold a band the pixel lacks. Ground truth is the invented
    scene above; the method is the comparison with spatial neighbours (common practice)."""
    from mapkit.preprocess.spikes import _neighbours, spatial_spike_mask

    cube, spikes, edge, mu = _grain_scene(seed)
    nomask = np.zeros(cube.shape[:2], bool)
    for engine in ("numba", "numpy"):
        flags, _ = spatial_spike_mask(cube, nomask, engine=engine)
        # the real contrast at the boundary is never taken for a spike (measured: no
        # clean pixel touched over seeds 0-7)
        assert not flags.any(axis=-1)[~spikes.any(axis=-1)].any()
        # a spike that stands 15 noise units above even the brightest neighbour is found,
        # whatever the boundary does to the gain (measured 0.97-1.00 over seeds 0-7)
        top = np.fmax.reduce(_neighbours(cube, nomask), axis=0)
        clear = spikes & (cube - top >= 15 * np.sqrt(mu))
        assert clear.sum() >= 15
        assert (flags & clear).sum() / clear.sum() >= 0.95
        # a spike hidden under the other phase's band is missed: all boundary spikes of
        # 10-40 noise units measured recall 0.68-0.88 over seeds 0-7 (a known limit)
        assert (flags & spikes).sum() / spikes.sum() >= 0.6


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


def test_bad_pixel_kinds_chunkwise_as_whole_map():
    # the chunk-wise mask reads each chunk once and takes the map's ceiling from the chunks'
    # tops: the same flags as the whole map (common practice: clipping shows as a flat top
    # at the detector's ceiling, so a flat top below the map's ceiling is not saturation)
    import dask.array as da
    from dataclasses import replace

    from mapkit import RamanMap
    from mapkit.preprocess.registry import run_step

    rng = np.random.default_rng(2)
    cube = rng.poisson(200.0, (6, 8, 50)).astype(np.float64)
    cube[0, 1, 7] = np.nan                     # non-finite
    cube[5, 6] = 17.0                          # dead (constant)
    cube[1, 1, 10:14] = 65535.0                # clipped at the map's ceiling (first chunk)
    cube[4, 7, 20:25] = 900.0                  # a flat top below the ceiling (last chunk)
    m = RamanMap(cube, raman_shift=np.linspace(200, 1800, 50), x=np.arange(8.0),
                 y=np.arange(6.0))
    whole, extra = run_step(m, "mask_bad_pixels", {})
    lazy = replace(m, intensity=da.from_array(cube, chunks=(3, 4, 50)))
    chunked, extra_c = run_step(lazy, "mask_bad_pixels", {})
    assert extra["report"] == extra_c["report"] == {"nonfinite": 1, "dead": 1, "saturated": 1}
    expected = np.zeros((6, 8), bool)
    expected[0, 1] = expected[5, 6] = expected[1, 1] = True
    np.testing.assert_array_equal(whole.mask, expected)
    np.testing.assert_array_equal(chunked.mask, expected)
    # a given detector ceiling flags every spectrum reaching it, chunk-wise as whole
    _, given = run_step(m, "mask_bad_pixels", {"saturation": 900.0})
    _, given_c = run_step(lazy, "mask_bad_pixels", {"saturation": 900.0})
    assert given["report"] == given_c["report"] and given["report"]["saturated"] == 2


def test_normalise_methods():
    # definitions: vector = unit L2 norm, max = unit maximum (common practice); SNV = zero
    # mean, unit sd per spectrum (Barnes, Dhanoa & Lister 1989, Appl. Spectrosc. 43:772);
    # area = unit trapezoid integral, checked with numpy.trapezoid
    b = np.array([[1.0, 2.0, 3.0], [0.0, 0.0, 0.0]])
    np.testing.assert_allclose(np.linalg.norm(normalise(b, method="vector")[0]), 1)
    np.testing.assert_allclose(normalise(b, method="max")[0].max(), 1)
    snv = normalise(b, method="snv")[0]
    assert abs(snv.mean()) < 1e-12 and snv.std() == pytest.approx(1)
    np.testing.assert_allclose(np.trapezoid(normalise(b, [0, 1, 2.0], method="area")[0], [0, 1, 2]), 1)
    assert np.all(normalise(b, method="vector")[1] == 0)
    with pytest.raises(MapkitError, match="unknown normalisation"):
        normalise(b, method="median")


# --- axis conversions: values computed by hand from Δν̃ = 1e7/λ0 − 1e7/λ (vacuum)
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


def test_whittaker_smoother_properties():
    # Eilers 2003: λ → 0 returns the data; a 2nd-order penalty leaves a straight line
    from mapkit.preprocess.smooth import whittaker_smooth

    rng = np.random.default_rng(2)
    y = rng.normal(size=(3, 80))
    np.testing.assert_allclose(whittaker_smooth(y, lam=1e-9), y, atol=1e-6)
    line = np.tile(np.linspace(-2, 7, 80), (2, 1))
    np.testing.assert_allclose(whittaker_smooth(line, lam=1e4), line, rtol=1e-8, atol=1e-8)
    assert np.std(np.diff(whittaker_smooth(y, lam=100.0), axis=1)) < np.std(np.diff(y, axis=1))


def test_msc_and_emsc_recover_the_reference():
    # by the model's definition (Geladi et al. 1985; Martens & Stark 1991): spectra that are
    # the reference scaled and offset (MSC) or plus a polynomial (EMSC) come back as it
    from mapkit.preprocess.normalise import emsc, msc

    s = np.linspace(400, 1800, 300)
    ref = 1 / (1 + ((s - 1000) / 8) ** 2) + 0.5 / (1 + ((s - 1400) / 12) ** 2)
    t = (s - s.mean()) / np.ptp(s)
    block = np.stack([2.0 * ref + 0.3, 0.7 * ref - 0.1])
    np.testing.assert_allclose(msc(block, ref), np.tile(ref, (2, 1)), atol=1e-10)
    curved = np.stack([1.5 * ref + 0.2 + 0.4 * t - 0.3 * t ** 2, 0.8 * ref - 0.5 * t])
    np.testing.assert_allclose(emsc(curved, ref, order=2, shift=s), np.tile(ref, (2, 1)),
                               atol=1e-10)


def test_resample_and_bin():
    # linear interpolation is exact on a straight line (3 s + 1 by hand); binning is the
    # mean of the unmasked pixels of each tile (common practice), checked against numpy
    from mapkit.preprocess.axis import bin_cube, resample

    src = np.linspace(100, 200, 11)
    y = 3 * src[None] + 1
    np.testing.assert_allclose(resample(y, src, [105.0, 150.0, 199.0]), [[316, 451, 598]])
    with pytest.raises(MapkitError, match="outside"):
        resample(y, src, [90.0, 150.0])
    cube = np.arange(4 * 5 * 2, dtype=float).reshape(4, 5, 2)
    mask = np.zeros((4, 5), bool)
    mask[0, 0] = True
    out, omask, dropped = bin_cube(cube, mask, 2)
    assert out.shape == (2, 2, 2) and dropped == (0, 1)
    np.testing.assert_allclose(out[0, 0], cube[[0, 1, 1], [1, 0, 1]].mean(axis=0))
    assert not omask.any()


def test_spectral_despike_replaces_a_spike():
    # Whitaker & Hayes 2018, Chemom. Intell. Lab. Syst. 179:82: modified z-scores of the
    # first differences (Iglewicz & Hoaglin 1993 cut-off 3.5), replaced by interpolation
    from mapkit.preprocess.spikes import interpolate_flagged

    rng = np.random.default_rng(0)
    y = 100 + rng.normal(0, 3, (1, 200))
    y[0, 120] += 2000
    flags = spectral_spike_mask(y, threshold=3.5)
    assert flags[0, 120]
    fixed = interpolate_flagged(y, flags)
    assert abs(fixed[0, 120] - 100) < 15


def test_snr_of_a_known_spectrum():
    # white noise of known sd 2: first differences have variance 2 sd^2 and 1.4826 MAD
    # estimates a normal sd (Rousseeuw & Croux 1993, JASA 88:1273); SNR = (max - median)/sd
    # = 100/2 by construction of the test spectrum
    from mapkit.preprocess.quality import noise_sd, snr

    rng = np.random.default_rng(1)
    y = 50 + rng.normal(0, 2.0, (200, 1000))
    y[:, 500] += 100
    assert np.median(noise_sd(y)) == pytest.approx(2.0, rel=0.05)
    assert np.median(snr(y)) == pytest.approx(50, rel=0.1)


@pytest.mark.parametrize("n", [2, 3, 4, 33, 1023, 1024])
def test_compiled_noise_and_snr_equal_numpy_medians(n):
    # reference: numpy.median (the middle value, or the mean of the two middle values for
    # an even count), composed as the formula of noise_sd / snr; the compiled kernel must
    # give the same float64 numbers, on ties (integer counts, constant runs), heavy tails,
    # NaN / inf rows and every leading shape
    from mapkit.preprocess.quality import noise_sd, snr

    rng = np.random.default_rng(n)
    blocks = [rng.normal(size=(70, n)),
              rng.poisson(3.0, (70, n)).astype(float),                # many ties
              np.round(rng.standard_cauchy((70, n)), 1),              # heavy tails, ties
              np.repeat(rng.normal(size=(70, 1)), n, axis=1),         # constant: noise 0
              rng.integers(0, 2, (70, n)) * 1e300 - 5e299]             # huge spread
    odd = rng.normal(size=(70, n))
    odd[3, n // 2] = np.nan
    odd[5, 0] = np.inf
    odd[6, -1] = -np.inf
    blocks.append(odd)
    for y in blocks:
        d = np.diff(y, axis=-1)
        with np.errstate(invalid="ignore"):
            sd_ref = 1.4826 * np.median(np.abs(d - np.median(d, axis=-1, keepdims=True)),
                                        axis=-1) / np.sqrt(2)
            sig = y.max(axis=-1) - np.median(y, axis=-1)
            snr_ref = np.zeros_like(sig)
            np.divide(sig, sd_ref, out=snr_ref, where=sd_ref > 0)
            for engine in ("numba", "numpy"):
                np.testing.assert_array_equal(noise_sd(y, engine=engine), sd_ref)
                np.testing.assert_array_equal(snr(y, engine=engine), snr_ref)
            cube = y.reshape(7, 10, n)
            np.testing.assert_array_equal(snr(cube, engine="numba"), snr_ref.reshape(7, 10))
            np.testing.assert_array_equal(noise_sd(y[1], engine="numba"), sd_ref[1])
    # float32 spectra are read as they are: the numbers of their float64 copy, either engine
    # (IEEE 754: every binary32 value is a binary64 value, so the widening is exact, from
    # memory; reading it converted changes nothing; the reference is the float64 path above)
    y32 = (rng.poisson(40.0, (70, n)) + rng.normal(size=(70, n))).astype(np.float32)
    y32[2, 0] = np.nan
    for engine in ("numba", "numpy"):
        np.testing.assert_array_equal(snr(y32, engine=engine), snr(y32.astype(float)))
        np.testing.assert_array_equal(noise_sd(y32, engine=engine),
                                      noise_sd(y32.astype(float)))


# --- shift-axis calibration: ASTM E1840 polystyrene positions (from memory; see
# mapkit/preprocess/axis_calibration.py) and a known, invented axis distortion
def test_axis_calibration_recovers_a_known_distortion():
    from mapkit.preprocess.axis_calibration import REFERENCE_SHIFTS, calibrate_axis

    true_positions = np.array(REFERENCE_SHIFTS["polystyrene"])
    reported = np.linspace(500.0, 3200.0, 2048)           # what the instrument claims
    u = (reported - 1500) / 1000
    truth = reported + 2.5 - 1.8 * u + 0.9 * u ** 2         # what the channels really are
    rng = np.random.default_rng(3)
    heights = rng.uniform(300, 1500, true_positions.size)
    spectrum = 200 + sum(h * 4.0 ** 2 / ((truth - p) ** 2 + 4.0 ** 2)
                         for h, p in zip(heights, true_positions))
    spectrum = rng.poisson(spectrum).astype(float)
    cal = calibrate_axis(reported, spectrum, "polystyrene", order=2, window=12)
    assert len(cal.reference) >= 9
    assert np.max(np.abs(cal.apply(reported) - truth)) <= 0.3
    assert cal.rms < 0.3
    assert 'name = "correct_axis"' in cal.recipe_step()


def test_axis_calibration_needs_enough_bands():
    from mapkit.preprocess.axis_calibration import calibrate_axis

    s = np.linspace(900, 1100, 300)
    with pytest.raises(MapkitError, match="bands"):
        calibrate_axis(s, np.ones_like(s), "polystyrene", order=2)


def test_compiled_and_numpy_spike_tests_agree(cleaned):
    from mapkit.preprocess.spikes import spatial_spike_mask

    cube = np.asarray(cleaned["flagged"].intensity, float)
    mask = cleaned["flagged"].mask
    fa, ra = spatial_spike_mask(cube, mask, engine="numba")
    fb, rb = spatial_spike_mask(cube, mask, engine="numpy")
    np.testing.assert_array_equal(fa, fb)
    np.testing.assert_allclose(ra[fa], rb[fb], rtol=1e-12)


def test_spike_removal_engines_and_dtypes_agree(cleaned):
    # the compiled path reads float32 as it is and writes the replacements into a float32
    # copy; it must give the numpy engine's flags and values, whatever the input dtype
    from mapkit.preprocess.spikes import remove_spatial_spikes

    m = cleaned["flagged"]
    raw = np.asarray(m.intensity)
    want, want_flags = remove_spatial_spikes(raw.astype(float), m.mask, engine="numpy")
    assert want_flags.sum() > 0
    for dtype in (np.float32, np.float64):
        got, flags = remove_spatial_spikes(raw.astype(dtype), m.mask, engine="numba")
        assert got.dtype == np.float32
        np.testing.assert_array_equal(flags, want_flags)
        np.testing.assert_allclose(got, want, rtol=1e-6)
    assert remove_spatial_spikes(raw.astype(np.int32), m.mask)[0].dtype == np.float32
    assert np.array_equal(np.asarray(m.intensity), raw)        # input untouched
    # into a given array (the chunk-wise step writes a view of its output block)
    for engine in ("numba", "numpy"):
        both = np.full(raw.shape[:-1] + (2 * raw.shape[-1],), -1.0, np.float32)
        got, flags = remove_spatial_spikes(raw.astype(np.float32), m.mask, engine=engine,
                                           out=both[..., :raw.shape[-1]])
        np.testing.assert_array_equal(flags, want_flags)
        np.testing.assert_allclose(both[..., :raw.shape[-1]], want, rtol=1e-6)
        assert np.all(both[..., raw.shape[-1]:] == -1.0)


def test_reweighted_baselines_read_float32_as_their_float64_copy():
    # the compiled ALS/arPLS/airPLS loops read float32 spectra without a float64 copy: the
    # baselines must be bit-identical to those of the float64 copy (IEEE 754: the widening
    # is exact, from memory; the float64 path is checked against pybaselines above)
    from mapkit.preprocess.baseline import METHODS, READS_FLOAT32

    rng = np.random.default_rng(8)
    ch = np.arange(300)
    y = (200 + 0.3 * ch + 80 * np.exp(-((ch - 150) / 6.0) ** 2)
         + rng.normal(0, 3, (40, 300))).astype(np.float32)
    for name in READS_FLOAT32:
        info32, info64 = {}, {}
        a = METHODS[name](y, lam=1e5, info=info32)
        b = METHODS[name](y.astype(float), lam=1e5, info=info64)
        assert a.dtype == np.float64
        np.testing.assert_array_equal(a, b, err_msg=name)
        np.testing.assert_array_equal(info32["converged"], info64["converged"])


def test_sorting_network_sorts_every_input():
    # zero-one principle (Knuth, TAOCP vol. 3, 5.3.4, exercise 5.3.4-1): a comparator
    # network that sorts all 2^8 inputs of zeros and ones sorts every input of 8 values
    from mapkit.preprocess._spikes_kernel import NETWORK8

    for bits in range(256):
        v = [(bits >> i) & 1 for i in range(8)]
        for a, b in NETWORK8:
            v[a], v[b] = min(v[a], v[b]), max(v[a], v[b])
        assert v == sorted(v)


def test_kernel_median_matches_numpy():
    # reference: numpy.median (mean of the two middle values for an even count)
    from mapkit.preprocess._spikes_kernel import _median_inplace

    rng = np.random.default_rng(7)
    for t in range(500):
        n = int(rng.integers(1, 300))
        v = rng.integers(0, 5, n).astype(float) if t % 2 else rng.normal(size=n)
        assert _median_inplace(v.copy()) == np.median(v)


@pytest.mark.parametrize("rows", [1, LANES - 1, LANES, LANES + 1, 2 * LANES + 1])
def test_compiled_solvers_handle_partial_lane_blocks(rows):
    # the compiled solvers work on blocks of LANES spectra; a short last block must give
    # each spectrum exactly what the numpy recurrence gives it
    rng = np.random.default_rng(rows)
    y = rng.normal(size=(rows, 120)).cumsum(axis=1) + 50 * np.exp(-((np.arange(120) - 60) / 3) ** 2)
    w = rng.uniform(0, 1, y.shape)
    np.testing.assert_allclose(weighted_whittaker(w, y, 1e3, engine="numba"),
                               weighted_whittaker(w, y, 1e3, engine="numpy"), rtol=1e-9, atol=1e-9)
    from mapkit.preprocess.baseline import airpls_baseline, arpls_baseline

    # the whole reweighting loop is compiled for ALS, arPLS and airPLS: same baselines and
    # convergence flags as the numpy loop (sums run in another order: 1e-8 relative)
    for f in (als_baseline, arpls_baseline, airpls_baseline):
        info_a, info_b = {}, {}
        a = f(y, lam=1e3, engine="numba", info=info_a, max_iter=8)
        b = f(y, lam=1e3, engine="numpy", info=info_b, max_iter=8)
        np.testing.assert_allclose(a, b, rtol=1e-8, atol=1e-8 * np.abs(b).max(), err_msg=f.__name__)
        np.testing.assert_array_equal(info_a["converged"], info_b["converged"])


def test_compiled_reweighting_gives_each_spectrum_its_own_result():
    # the compiled loop refills a lane with the next spectrum as soon as its spectrum stops,
    # so spectra share lanes at different iterations; each result must be exactly what the
    # spectrum gets alone, and agree with the numpy loop (as above), over several parallel
    # tasks of spectra (reference: the numpy recurrence; pybaselines checks it above)
    from mapkit.preprocess.baseline import airpls_baseline, arpls_baseline

    rng = np.random.default_rng(11)
    n = 200
    ch = np.arange(n)
    rows = 2 * TASK_SPECTRA + 88   # > 2 tasks of spectra; convergence after 2 to 30+ solves
    y = (rng.normal(size=(rows, 1)) * 0.02 * ch + rng.uniform(0, 30, (rows, 1))
         * np.exp(-((ch - rng.uniform(40, 160, (rows, 1))) / 5.0) ** 2)
         + rng.normal(0, rng.uniform(0.1, 3, (rows, 1)), (rows, n)))
    mixed = 0
    for f in (als_baseline, arpls_baseline, airpls_baseline):
        for max_iter in (4, 30):
            info = {}
            batch = f(y, lam=1e3, engine="numba", info=info, max_iter=max_iter)
            mixed += 0 < info["converged"].sum() < rows    # lanes stopping at different solves
            for k in range(0, rows, 37):
                one_info = {}
                one = f(y[k:k + 1], lam=1e3, engine="numba", info=one_info, max_iter=max_iter)
                np.testing.assert_array_equal(one[0], batch[k], err_msg=f"{f.__name__} row {k}")
                assert one_info["converged"][0] == info["converged"][k]
            ref_info = {}
            ref = f(y, lam=1e3, engine="numpy", info=ref_info, max_iter=max_iter)
            np.testing.assert_allclose(batch, ref, rtol=1e-8, atol=1e-8 * np.abs(ref).max(),
                                       err_msg=f.__name__)
            np.testing.assert_array_equal(info["converged"], ref_info["converged"])
    assert mixed >= 2


def test_lazy_despike_flags_match_in_memory(sample_map_path):
    # the chunk-wise spike flags are their own Dask graph (one-pixel halo per chunk); they
    # must equal the flags of the whole map in memory, as must the cleaned cube
    from mapkit.preprocess.recipe import Recipe
    from mapkit.read import open_map

    recipe = Recipe.from_text('[[step]]\nname = "mask_bad_pixels"\n[[step]]\nname = "despike"\n')
    lazy = open_map(sample_map_path)
    assert lazy.is_lazy and lazy.intensity.numblocks[0] > 1
    clean_lazy, extras_lazy = recipe.apply(lazy)
    clean_mem, extras_mem = recipe.apply(lazy.load())
    flags = np.asarray(extras_lazy["despike"]["spikes"].compute())
    assert flags.sum() > 0
    np.testing.assert_array_equal(flags, extras_mem["despike"]["spikes"])
    np.testing.assert_array_equal(np.asarray(clean_lazy.intensity), clean_mem.intensity)
