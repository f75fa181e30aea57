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
    y, centres = poisson_map()
    fit = fit_peaks(y, S, 490, 550, shape="lorentzian")
    assert fit["converged"].all()
    rmse = np.sqrt(np.mean((fit["theta"][:, 1] - centres) ** 2))
    bound = np.sqrt(np.mean(cramer_rao_centre(centres)))
    assert rmse <= 1.1 * bound, (rmse, bound)
    # the reported standard errors describe the real scatter
    assert np.median(fit["stderr"][:, 1]) == pytest.approx(rmse, rel=0.15)


def test_agrees_with_scipy_curve_fit():
    from scipy.optimize import curve_fit

    y, _ = poisson_map(n=20, seed=4)
    fit = fit_peaks(y, S, 490, 550, weights="uniform")
    sel = (S >= 490) & (S <= 550)
    f = lambda x, h, c, w, a, b: h / (1 + (2 * (x - c) / w) ** 2) + a + b * (x - 520)  # noqa: E731
    for i in range(20):
        p, cov = curve_fit(f, S[sel], y[i, sel], p0=[400, 519, 5, 90, 0])
        np.testing.assert_allclose(fit["theta"][i, :3], p[:3], rtol=1e-5)
        np.testing.assert_allclose(fit["stderr"][i, 1], np.sqrt(cov[1, 1]), rtol=1e-3)


@pytest.mark.parametrize("shape", ["lorentzian", "gaussian", "pseudo_voigt"])
def test_compiled_and_numpy_paths_agree(shape):
    pytest.importorskip("numba")
    y, _ = poisson_map(n=50, seed=2)
    a = fit_peaks(y, S, 490, 550, shape=shape, engine="numba")
    b = fit_peaks(y, S, 490, 550, shape=shape, engine="numpy")
    np.testing.assert_allclose(a["theta"], b["theta"], rtol=1e-8, atol=1e-8)
    np.testing.assert_array_equal(a["converged"], b["converged"])


def test_gaussian_and_pseudo_voigt_recover_their_parameters():
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
    # De Wolf 1996 (from memory): -2.3 1/cm per GPa uniaxial, -4.6 biaxial; tensile shifts down
    assert silicon_stress(520.7 - 4.6, mode="biaxial") == pytest.approx(1.0)
    assert silicon_stress(520.7 + 2.3) == pytest.approx(-1.0)
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
