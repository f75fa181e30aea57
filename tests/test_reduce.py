"""Band images, NMF, k-means and unmixing, against references and the sample's ground truth."""

import numpy as np
import pytest
from scipy.integrate import quad
from scipy.optimize import linear_sum_assignment, nnls
from sklearn.metrics import adjusted_rand_score

from mapkit import MapkitError, RamanMap
from mapkit.read import read_library
from mapkit.reduce import (KMeansClasses, NMFComponents, ReferenceUnmixing, band_image,
                           band_integral, nnls_batch)


def test_band_integral_matches_quadrature():
    # a Lorentzian on a sloping background; the reference is scipy's adaptive quadrature
    lor = lambda s: 500 * 6 ** 2 / ((s - 1000) ** 2 + 6 ** 2)  # noqa: E731
    s = np.linspace(900, 1100, 4001)
    y = lor(s) + 200 + 0.3 * s
    expected = quad(lor, 950, 1050)[0] - (lor(950) + lor(1050)) / 2 * 100
    assert band_integral(y, s, 950, 1050) == pytest.approx(expected, rel=1e-5)
    # direction of the axis does not matter
    assert band_integral(y[::-1], s[::-1], 950, 1050) == pytest.approx(expected, rel=1e-5)


def test_band_outside_axis_is_an_error():
    with pytest.raises(MapkitError, match="no channel"):
        band_integral(np.ones(5), np.arange(5.0), 10, 20)


def test_nnls_batch_matches_scipy():
    # reference: scipy.optimize.nnls (Lawson & Hanson 1974, Solving Least Squares Problems)
    rng = np.random.default_rng(7)
    A = np.abs(rng.normal(size=(60, 5)))
    Y = rng.normal(size=(60, 40)) + A @ np.abs(rng.normal(size=(5, 40)))
    ours = nnls_batch(A, Y)
    ref = np.stack([nnls(A, Y[:, j])[0] for j in range(Y.shape[1])], axis=1)
    np.testing.assert_allclose(ours, ref, atol=1e-6)


def test_nnls_and_simplex_loops_report_their_iteration_limit():
    """Iterative solvers stopped by their iteration limit say so per pixel (common
    practice, as for the baselines); with enough iterations they match scipy's nnls."""
    from mapkit.reduce.unmix import simplex_ls_batch

    rng = np.random.default_rng(7)
    A = np.abs(rng.normal(size=(60, 5)))
    Y = A @ np.abs(rng.normal(size=(5, 40)))
    X, ok = nnls_batch(A, Y, return_converged=True)
    ref = np.stack([nnls(A, Y[:, j])[0] for j in range(Y.shape[1])], axis=1)
    assert ok.all()
    np.testing.assert_allclose(X, ref, atol=1e-6)
    # two nearly collinear references: coordinate descent crawls, 2000 sweeps are not
    # enough, and every pixel left far from scipy's optimum must be flagged
    A[:, 1] = A[:, 0] + 0.05 * A[:, 1]
    Y = A @ np.abs(rng.normal(size=(5, 40)))
    X, ok = nnls_batch(A, Y, return_converged=True)
    ref = np.stack([nnls(A, Y[:, j])[0] for j in range(Y.shape[1])], axis=1)
    wrong = np.abs(X - ref).max(axis=0) > 1e-4
    assert wrong.any() and not ok[wrong].any()
    fractions = Y / Y.sum(axis=0)
    _, ok = simplex_ls_batch(A, fractions, return_converged=True)
    assert ok.all()
    _, ok = simplex_ls_batch(A, fractions, max_iter=3, return_converged=True)
    assert not ok.any()


def _match(est, true):
    """Best one-to-one pairing of estimated and true components by cosine similarity."""
    e = est / np.linalg.norm(est, axis=1, keepdims=True)
    t = true / np.linalg.norm(true, axis=1, keepdims=True)
    cos = e @ t.T
    rows, cols = linear_sum_assignment(-cos)
    return rows, cols, cos[rows, cols]


def _fractions(components, images, truth):
    """Mass-fraction estimates after matching components to the true pure spectra.

    Each component spectrum is scaled to its matched pure spectrum (least squares), its
    image by the inverse, and the images are closed to sum to one per pixel.
    """
    P = truth["pure_spectra"].astype(float)
    rows, cols, _ = _match(components, P)
    est = np.zeros_like(truth["mass_fraction"], dtype=float)
    for i, j in zip(rows, cols):
        scale = (components[i] @ P[j]) / (components[i] @ components[i])
        est[j] = images[i] / scale
    return est / est.sum(axis=0)


# Accuracy targets of the reduction work, on the sample map's ground truth (invented data):
# component spectra cosine >= 0.98, abundance RMSE <= 0.03, class ARI >= 0.97, unmixing with
# the true references RMSE <= 0.02.
def test_nmf_recovers_component_spectra_and_abundances(cleaned, truth):
    est = NMFComponents(n_components=4, random_state=0).fit(cleaned["corrected"])
    _, _, cos = _match(est.components_, truth["pure_spectra"])
    assert cos.min() >= 0.98, cos
    good = ~cleaned["flagged"].mask
    frac = _fractions(est.components_, est.fit_images_, truth)
    rmse = np.sqrt(np.mean((frac[:, good] - truth["mass_fraction"][:, good]) ** 2))
    assert rmse <= 0.03, rmse


def test_mcr_als_recovers_spectra_and_reports_fit(cleaned, truth):
    from mapkit.reduce import MCRALS

    mcr = MCRALS(n_components=4, init="nmf").fit(cleaned["corrected"])
    _, _, cos = _match(mcr.components_, truth["pure_spectra"])
    assert cos.min() >= 0.98, cos
    # lack of fit 100·‖X − CSᵀ‖/‖X‖ and explained variance 100·(1 − ‖X − CSᵀ‖²/‖X‖²) (de Juan
    # & Tauler 2006, Crit. Rev. Anal. Chem. 36:163), recomputed here from the data and the
    # model the estimator returns (its spectra and images), not from its own numbers
    m = cleaned["corrected"]
    keep = ~m.mask.ravel()
    X = m.spectra()[keep].astype(float)
    C = mcr.fit_images_.reshape(4, -1)[:, keep].T
    resid = np.linalg.norm(X - C @ mcr.components_) / np.linalg.norm(X)
    assert mcr.lack_of_fit_ == pytest.approx(100 * resid, rel=1e-6)
    assert mcr.explained_variance_ == pytest.approx(100 * (1 - resid ** 2), rel=1e-6)


def test_mcr_with_a_fixed_known_spectrum(cleaned, truth):
    """A known spectrum held fixed (equality constraint, de Juan & Tauler 2006) must carry
    that material's distribution, and the free components the others (ground truth of
    the invented sample; measured: image r = 0.998, free cosines >= 0.997)."""
    from mapkit.reduce import MCRALS

    known = truth["pure_spectra"][0] / truth["pure_spectra"][0].max()
    mcr = MCRALS(n_components=4, init="nmf", fixed={0: known}).fit(cleaned["corrected"])
    good = ~cleaned["flagged"].mask
    r = np.corrcoef(mcr.fit_images_[0][good], truth["mass_fraction"][0][good])[0, 1]
    assert r >= 0.99, r
    _, cols, cos = _match(mcr.components_[1:], truth["pure_spectra"][1:])
    assert cos.min() >= 0.98, cos


def test_mcr_closure_recovers_closed_fractions():
    """Closure (concentrations summing to one, de Juan & Tauler 2006) on an invented
    noise-free mixture whose fractions do sum to one: MCR must return those fractions,
    which a closure that only rescaled its output would not."""
    from mapkit.reduce import MCRALS

    rng = np.random.default_rng(2)
    E = np.abs(rng.normal(size=(3, 80)))
    E /= E.max(axis=1, keepdims=True)           # MCR scales free spectra to a maximum of 1
    F = rng.dirichlet(np.ones(3) * 0.7, 400)
    F[:3] = np.eye(3)                           # pure pixels, so the start (VCA) finds E
    m = RamanMap((F @ E).reshape(20, 20, 80), raman_shift=np.arange(80.0),
                 x=np.arange(20.0), y=np.arange(20.0))
    mcr = MCRALS(n_components=3, closure=True, max_iter=50).fit(m)
    rows, cols, cos = _match(mcr.components_, E)
    assert cos.min() > 0.9999
    C = mcr.fit_images_.reshape(3, -1).T
    np.testing.assert_allclose(C[:, rows], F[:, cols], atol=1e-6)


def test_vca_finds_pure_pixels():
    # VCA picks the simplex vertices, i.e. the pure pixels when they exist (Nascimento &
    # Bioucas Dias 2005, IEEE Trans. Geosci. Remote Sens. 43:898)
    from mapkit.reduce import vca

    rng = np.random.default_rng(1)
    E = np.abs(rng.normal(size=(4, 60)))
    F = rng.dirichlet(np.ones(4) * 0.5, 500)
    F[[10, 20, 30, 40]] = np.eye(4)
    picked = vca(F @ E, 4, random_state=3)
    np.testing.assert_allclose(np.sort(F[picked].max(axis=1)), 1.0)


def test_pca_explained_variance_matches_sklearn(cleaned):
    from sklearn.decomposition import PCA

    from mapkit.reduce import PCAScores

    m = cleaned["corrected"]
    est = PCAScores(n_components=5).fit(m)
    X = m.spectra()[~m.mask.ravel()].astype(float)
    np.testing.assert_allclose(est.explained_variance_ratio_,
                               PCA(5, svd_solver="full").fit(X).explained_variance_ratio_,
                               rtol=1e-6)
    r = est.result(m)
    assert r.fields["scores"].data.shape == (5, 48, 64)


def test_classes_agree_with_truth(cleaned, truth):
    from mapkit.preprocess import normalise_map

    normed = normalise_map(cleaned["corrected"])
    good = truth["labels"] >= 0
    for method in ("kmeans", "minibatch"):
        km = KMeansClasses(n_classes=4, method=method, random_state=0).fit(normed)
        assert (km.labels_[~good] == -1).all(), "masked pixels stay out of the classes"
        ari = adjusted_rand_score(truth["labels"][good], km.labels_[good])
        assert ari >= 0.97, (method, ari)
        assert km.area_fraction_.sum() == pytest.approx(1.0)
    ward = KMeansClasses(n_classes=4, method="ward").fit(normed)
    assert adjusted_rand_score(truth["labels"][good], ward.labels_[good]) >= 0.95


def test_class_number_guidance_points_to_four(cleaned):
    # highest mean silhouette (Rousseeuw 1987, J. Comput. Appl. Math. 20:53) and lowest
    # Davies-Bouldin index (Davies & Bouldin 1979, IEEE TPAMI 1:224) at the invented
    # sample's four materials; the indices themselves are scikit-learn's
    from mapkit.preprocess import normalise_map
    from mapkit.reduce import class_number_guidance

    rows = class_number_guidance(normalise_map(cleaned["corrected"]), range(2, 7))
    best_sil = max(rows, key=lambda r: r["silhouette"])["k"]
    best_db = min(rows, key=lambda r: r["davies_bouldin"])["k"]
    assert best_sil == 4 and best_db == 4


def test_domains_and_equivalent_diameter():
    from mapkit.reduce import class_domains

    lab = np.zeros((20, 20), int)
    yy, xx = np.mgrid[:20, :20]
    lab[(yy - 10) ** 2 + (xx - 10) ** 2 <= 16] = 1      # one disc of radius 4 px
    lab[0:2, 0:2] = 1                                   # and a 2 x 2 px square
    d = class_domains(lab, (0.5, 0.5))[1]
    assert d["summary"]["domains"] == 2
    area = np.sort(d["area_um2"])
    assert area[0] == pytest.approx(4 * 0.25)
    # equivalent circle diameter ECD = 2 sqrt(A / pi) (ISO 9276-6:2008, from memory): the
    # square of 1 um^2 has ECD 1.128 um; domains are 8-connected or 4-connected regions
    # (scipy.ndimage.label, the reference labelling)
    assert np.sort(d["ecd_um"])[0] == pytest.approx(2 * np.sqrt(1 / np.pi))


def test_unmixing_recovers_mass_fractions(cleaned, truth, sample_dir):
    import warnings

    lib = read_library(sample_dir / "library")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        un = ReferenceUnmixing(lib, baseline_order=5).fit(cleaned["despiked"])
    assert un.resampled_
    abundance, rms = un.transform(cleaned["despiked"])
    names = list(truth["components"])
    # library spectra are scaled to a tallest band of 1000 instead of the invented scattering
    # strength of each material, so abundances are rescaled before comparing fractions
    from mapkit.samples import PURE_HEIGHT

    good = ~cleaned["flagged"].mask
    est = np.stack([abundance[un.names_.index(n)] / (PURE_HEIGHT[n] / 1000) for n in names])
    est_frac = est / est.sum(axis=0)
    rmse = np.sqrt(np.mean((est_frac[:, good] - truth["mass_fraction"][:, good]) ** 2))
    assert rmse <= 0.02, rmse  # the target for unmixing with the true references
    assert np.isnan(rms[~good]).all()


def test_fcls_sums_to_one_and_matches_constrained_optimum():
    from scipy.optimize import minimize

    from mapkit.reduce import unmix_spectra

    rng = np.random.default_rng(5)
    R = np.abs(rng.normal(size=(3, 50)))
    truth = np.array([0.2, 0.5, 0.3])
    y = truth @ R + rng.normal(0, 0.01, 50)
    A, _ = unmix_spectra(R, y[None], np.arange(50.0), None, sum_to_one=True)
    assert A.sum() == pytest.approx(1.0, abs=1e-4)
    # reference: SLSQP with the same constraints (Heinz & Chang 2001 define the problem)
    ref = minimize(lambda a: np.sum((a @ R - y) ** 2), np.ones(3) / 3, method="SLSQP",
                   bounds=[(0, None)] * 3, constraints={"type": "eq", "fun": lambda a: a.sum() - 1})
    np.testing.assert_allclose(A[:, 0], ref.x, atol=1e-3)


def test_unmixing_with_baseline_terms_matches_scipy_and_skips_the_residual_on_request():
    # reference: scipy.optimize.nnls on the design [R' Q] with the polynomial terms' signs
    # left free (they are split into + and - columns, both non-negative: the usual
    # reduction of a free variable to two non-negative ones, common practice); without the
    # residual the same abundances come from R_p'X (R_p orthogonal to the polynomials)
    from scipy.optimize import nnls

    from mapkit.reduce import unmix_spectra
    from mapkit.reduce.unmix import polynomial_basis

    rng = np.random.default_rng(6)
    shift = np.linspace(300, 1700, 120)
    R = np.stack([np.exp(-0.5 * ((shift - c) / 12) ** 2) for c in (600, 1000, 1400)]) * 100
    X = (rng.uniform(0, 3, (25, 3)) @ R + 200 + 0.1 * (shift - 300)
         + rng.normal(0, 2, (25, 120)))
    A, rms = unmix_spectra(R, X, shift, 2)
    A2, none = unmix_spectra(R, X, shift, 2, residual=False)
    assert none is None
    np.testing.assert_allclose(A2, A, rtol=1e-9, atol=1e-9 * np.abs(A).max())
    Q = polynomial_basis(shift, 2)
    D = np.concatenate([R.T, Q, -Q], axis=1)
    for j in (0, 7, 24):
        ref, norm = nnls(D, X[j])
        np.testing.assert_allclose(A[:, j], ref[:3], rtol=1e-6, atol=1e-6)
        assert rms[j] == pytest.approx(norm / np.sqrt(120), rel=1e-6)


def test_library_matching_names_components(cleaned, sample_dir):
    # the hit-quality index (squared cosine, common practice in spectral library search)
    # names each NMF component after the library entry it was generated from (invented
    # sample; ground truth); a band in no library entry stays unmatched
    from mapkit.reduce import match_library

    lib = read_library(sample_dir / "library")
    est = NMFComponents(n_components=4).fit(cleaned["corrected"])
    matches = match_library(est.components_, cleaned["corrected"].raman_shift, lib)
    assert sorted(r["match"] for r in matches) == sorted(s.name for s in lib)
    assert min(r["score"] for r in matches) > 0.95
    # a spectrum of something not in the library is reported as unmatched
    s = cleaned["corrected"].raman_shift
    odd = 1 / (1 + ((s - 1500) / 5) ** 2)
    assert match_library(odd[None], s, lib)[0]["match"] == "unmatched"


def test_hqi_and_correlation_against_numpy():
    # references: numpy.corrcoef (Pearson r); HQI is the squared cosine (common practice)
    from mapkit.reduce import correlation, hit_quality_index

    rng = np.random.default_rng(0)
    a, b = rng.normal(size=(2, 30))
    assert correlation(a, b)[0, 0] == pytest.approx(np.corrcoef(a, b)[0, 1])
    cos = a @ b / np.linalg.norm(a) / np.linalg.norm(b)
    assert hit_quality_index(a, b)[0, 0] == pytest.approx(cos ** 2)


def test_band_height_centroid_and_ratio(cleaned):
    from mapkit.reduce import band_ratio_image

    m = cleaned["corrected"]
    h = band_image(m, 845, 872, measure="height").fields["image"]
    c = band_image(m, 845, 872, measure="centroid").fields["image"]
    api = h.data > 200
    assert np.nanmedian(c.data[api]) == pytest.approx(857.9, abs=1.0)   # ASTM E1840 band
    r = band_ratio_image(m, (845, 872), (1080, 1092))
    ratio = r.fields["image"].data
    calcite = band_image(m, 1080, 1092, measure="height").fields["image"].data
    assert np.isnan(ratio[calcite < 20]).mean() > 0.9, "noise-level denominators are masked"
    assert np.isfinite(ratio[calcite > 500]).all()


def test_too_many_components_is_refused():
    m = RamanMap(np.random.default_rng(0).random((3, 3, 5)), raman_shift=np.arange(5.0),
                 x=np.arange(3.0), y=np.arange(3.0))
    with pytest.raises(MapkitError, match="at most 5"):
        NMFComponents(n_components=6).fit(m)
    with pytest.raises(MapkitError, match="at most"):
        KMeansClasses(n_classes=12).fit(m)


def test_all_masked_map_is_refused():
    m = RamanMap(np.ones((2, 2, 5)), raman_shift=np.arange(5.0), x=[0.0, 1.0], y=[0.0, 1.0],
                 mask=np.ones((2, 2), bool))
    with pytest.raises(MapkitError, match="every pixel is masked"):
        KMeansClasses(n_classes=2).fit(m)


def test_band_image_has_physical_axes(cleaned):
    r = band_image(cleaned["corrected"], 845, 872, name="api")
    f = r.fields["image"]
    assert f.axis_names == ("y", "x") and f.axes[0].units == "um"
    assert np.isnan(f.data[cleaned["flagged"].mask]).all()


def test_background_mcr_start_from_blocks_finds_the_pure_pixels():
    """The start of a sampled background MCR, computed block by block: on an invented
    mixture with a linear background per pixel and one pure pixel per component (rows
    37, 180, 333, not in the every-2nd sample's even rows for two of them), the successive
    projections find the pure pixels (separable factorisation: Araújo et al. 2001, Chemom.
    Intell. Lab. Syst. 57:65; Gillis & Vavasis 2014, IEEE TPAMI 36:698); blocks of any size
    give the same start, and a fit on every 2nd spectrum from it recovers the spectra."""
    from mapkit.reduce import BackgroundMCR

    rng = np.random.default_rng(3)
    s = np.linspace(0, 1, 160)
    E = np.stack([np.exp(-0.5 * ((s - c) / 0.02) ** 2) for c in (0.25, 0.5, 0.75)])
    F = rng.dirichlet(np.ones(3), 400) * 0.6 + 0.1
    F[[37, 180, 333]] = np.eye(3)
    X = F @ E + rng.uniform(0.2, 1, (400, 1)) + rng.uniform(-0.3, 0.3, (400, 1)) * s \
        + rng.normal(0, 1e-3, (400, 160))
    est = BackgroundMCR(n_components=3, baseline_order=1)
    for size in (400, 150, 64):
        blocks = lambda: (X[i:i + size] for i in range(0, 400, size))  # noqa: E731
        S, rows = est.start_from_blocks(blocks, s)
        assert sorted(rows.tolist()) == [37, 180, 333], size
    fit = BackgroundMCR(n_components=3, baseline_order=1).fit(X[::2], raman_shift=s,
                                                                start=(S, rows))
    assert sorted(fit.start_pixels_.tolist()) == [37, 180, 333]
    assert _match(fit.components_, E)[2].min() > 0.99


def _start_from_gram(X, s, k, order):
    """The block start from the whole channel Gram matrix's leading eigenvectors (LAPACK
    through numpy.linalg.eigh) and the successive projections on every spectrum's scores."""
    from mapkit.reduce.endmembers import successive_projections
    from mapkit.reduce.factorise import least_area_lift
    from mapkit.reduce.unmix import polynomial_basis

    Q = polynomial_basis(s, order)
    Xp = X - (X @ Q) @ Q.T
    V = np.linalg.eigh(Xp.T @ Xp)[1][:, ::-1][:, :k].T
    idx = successive_projections(Xp @ V.T, k)
    return least_area_lift((Xp @ V.T)[idx] @ V, Q), idx


@pytest.mark.parametrize("noise", [1e-2, 0.3])
def test_background_mcr_start_from_blocks_matches_the_whole_gram_matrix(noise, monkeypatch):
    """The block start's subspace iteration (Halko, Martinsson & Tropp 2011, SIAM Rev.
    53:217, algorithm 4.4) against the eigenvectors of the whole Gram matrix from LAPACK
    (numpy.linalg.eigh): with a clear gap below three strong components (noise 0.01) it
    iterates (no eigendecomposition of a whole channel Gram matrix, at most 3 passes) and
    picks the same purest rows, spectra within 1e-6 of their largest value; with a weak
    third component at the noise level (0.3: no gap) it forms the whole matrix and gives
    the same start (to rounding, 1e-12)."""
    from mapkit.reduce import BackgroundMCR

    eigh, sizes = np.linalg.eigh, []

    def recording_eigh(a, *args, **kw):
        sizes.append(a.shape[0])
        return eigh(a, *args, **kw)

    rng = np.random.default_rng(5)
    s = np.linspace(0, 1, 200)
    E = np.stack([np.exp(-0.5 * ((s - c) / 0.03) ** 2) for c in (0.2, 0.5, 0.8)])
    E[2] *= 1 if noise < 0.1 else 0.05
    F = rng.dirichlet(np.ones(3), 3000)
    X = F @ E * 50 + rng.uniform(5, 10, (3000, 1)) + rng.uniform(-2, 2, (3000, 1)) * s \
        + rng.normal(0, noise, (3000, 200))
    calls = []

    def blocks():
        calls.append(1)
        return (X[i:i + 700] for i in range(0, 3000, 700))

    est = BackgroundMCR(n_components=3, baseline_order=1)
    monkeypatch.setattr(np.linalg, "eigh", recording_eigh)
    S, rows = est.start_from_blocks(blocks, s)
    monkeypatch.undo()
    S0, rows0 = _start_from_gram(X, s, 3, 1)
    assert est.start_passes_ == len(calls)
    if noise < 0.1:
        assert max(sizes) < 200 and len(calls) <= 3, (sizes, len(calls))
        assert sorted(rows.tolist()) == sorted(rows0.tolist())
        assert np.abs(S - S0).max() <= 1e-6 * np.abs(S0).max()
    else:
        assert 200 in sizes and len(calls) >= 3
        np.testing.assert_array_equal(rows, rows0)
        np.testing.assert_allclose(S, S0, rtol=0, atol=1e-12 * np.abs(S0).max())


def test_background_mcr_start_from_blocks_with_few_channels_beside_the_background():
    """Four components on 15 channels with an order-10 background leave four channels
    beside the polynomials, too few for the subspace and the one below it: the start comes
    from the whole Gram matrix (LAPACK through numpy.linalg.eigh, as in the test above) in
    two passes."""
    from mapkit.reduce import BackgroundMCR

    rng = np.random.default_rng(2)
    s = np.linspace(0, 1, 15)
    X = rng.random((300, 4)) @ rng.random((4, 15)) + rng.normal(0, 0.01, (300, 15))
    est = BackgroundMCR(n_components=4, baseline_order=10)
    S, rows = est.start_from_blocks(lambda: (X[i:i + 100] for i in range(0, 300, 100)), s)
    S0, rows0 = _start_from_gram(X, s, 4, 10)
    assert est.start_passes_ == 2
    np.testing.assert_array_equal(rows, rows0)
    np.testing.assert_allclose(S, S0, rtol=0, atol=1e-9 * np.abs(S0).max())


def test_background_mcr_lack_of_fit_is_read_against_shot_noise():
    # with the right model the residual of Poisson counts is their noise, whose expected
    # sum of squares is the sum of the counts reduced by the fitted terms (common practice:
    # E[RSS] = sigma^2 (n - p) for a linear fit; Poisson variance = mean): the lack of fit
    # matches the shot-noise one (within 1 % over seeds 0-2, measured 1.000 +- 0.001); one
    # component short leaves more (measured 1.13)
    from mapkit.reduce import BackgroundMCR

    for seed in (0, 1):
        rng = np.random.default_rng(seed)
        ny, nx, n = 20, 25, 300
        shift = np.linspace(200, 1800, n)

        def band(c, w):
            return np.exp(-0.5 * ((shift - c) / w) ** 2)

        pure = np.stack([band(500, 10) + 0.5 * band(1200, 15),
                         band(800, 12) + 0.7 * band(1500, 10)]) * 300
        a = rng.uniform(0, 1, (ny, nx))
        mu = (np.einsum("kyx,ks->yxs", np.stack([a, 1 - a]), pure) + 500 + 0.3 * (shift - 200)
              + 200 * band(1000, 400))
        m = RamanMap(rng.poisson(mu).astype(float), raman_shift=shift, x=np.arange(nx * 1.0),
                     y=np.arange(ny * 1.0))
        right = BackgroundMCR(n_components=2).fit(m)
        assert right.lack_of_fit_ / right.noise_lack_of_fit_ == pytest.approx(1.0, abs=0.01)
        short = BackgroundMCR(n_components=1).fit(m)
        assert short.lack_of_fit_ / short.noise_lack_of_fit_ > 1.08
        assert right.result(m).summary["noise_lack_of_fit_pct"] == right.noise_lack_of_fit_
