"""The estimators as scikit-learn estimators: its own checks, arrays as well as maps, blocks.

``parametrize_with_checks`` runs scikit-learn's estimator checks (the API contract of
scikit-learn, 1.9: Pedregosa et al. 2011, J. Mach. Learn. Res. 12:2825; Buitinck et al.
2013, "API design for machine learning software: experiences from the scikit-learn
project") on every estimator that takes spectra alone. The checks that cannot apply are
listed in ``EXPECTED_FAILED`` with the reason; everything else must pass.

Left out of the checks, with the reason:

- ``ReferenceUnmixing``: the model is its reference spectra on one shift axis; the checks'
  random data (1 to 10 columns) have no axis the references live on.
- ``DominantClasses``: its classes come from component weights passed to ``fit``, not
  from the spectra (``fit(X, images)``, not ``fit(X, y)``).

Both are tested below on arrays, maps and blocks.
"""

import numpy as np
import pytest
from numpy.testing import assert_allclose, assert_array_equal
from sklearn.base import clone
from sklearn.utils.estimator_checks import parametrize_with_checks

from mapkit.core.ramanmap import RamanMap
from mapkit.errors import DataError, MapkitError
from mapkit.quantify import LinearCalibration, PLSCalibration, PolynomialCalibration
from mapkit.read import Spectrum
from mapkit.reduce import (MCRALS, BackgroundMCR, DominantClasses, KMeansClasses,
                           NMFComponents, PCAScores, ReferenceUnmixing)

# --- scikit-learn's estimator checks ----------------------------------------------------

#: a univariate calibration has one content per standard: X is one column (or a 1-D list)
_UNIVARIATE = ("univariate calibration: X is the one column of contents; this check "
               "fits on 2 to 10 columns")
_UNIVARIATE_CHECKS = (
    "check_fit_score_takes_y", "check_estimators_overwrite_params",
    "check_dont_overwrite_parameters", "check_estimators_fit_returns_self",
    "check_readonly_memmap_input", "check_n_features_in_after_fitting",
    "check_positive_only_tag_during_fit", "check_estimators_dtypes", "check_dtype_object",
    "check_pipeline_consistency", "check_estimators_nan_inf", "check_estimators_pickle",
    "check_f_contiguous_array_estimator", "check_regressors_train",
    "check_regressor_data_not_an_array", "check_regressors_no_decision_function",
    "check_supervised_y_2d", "check_regressors_int", "check_methods_sample_order_invariance",
    "check_methods_subset_invariance", "check_fit2d_1sample", "check_dict_unchanged",
    "check_fit_idempotent", "check_fit_check_is_fitted", "check_n_features_in",
    "check_fit2d_predict1d")
_CALIBRATION_FAILS = {**{c: _UNIVARIATE for c in _UNIVARIATE_CHECKS},
                      "check_fit1d": "a 1-D x is the native input (a list of contents), "
                                     "not an error"}

EXPECTED_FAILED = {
    "PolynomialCalibration": _CALIBRATION_FAILS,
    "LinearCalibration": _CALIBRATION_FAILS,
}

# Parameters: small numbers of components so the checks' small data (down to one column
# and one sample) can carry them; MCR-ALS starts from NMF (its VCA start picks a pixel
# that is negative in every channel of the checks' centred 2-column data, whose spectrum
# then clips to zero); BackgroundMCR with one component and a constant background (two
# components plus a background term need more than the checks' 2 columns).
ESTIMATORS = [
    PCAScores(n_components=2),
    NMFComponents(n_components=2),
    NMFComponents(n_components=2, batch_size=16),      # adds the partial_fit checks
    MCRALS(n_components=2, init="nmf"),
    BackgroundMCR(n_components=1, baseline_order=0),
    KMeansClasses(n_classes=2),
    KMeansClasses(n_classes=2, method="minibatch"),               # adds the partial_fit checks
    PLSCalibration(),
    PolynomialCalibration(),
    LinearCalibration(),
]


def _expected_failed(est):
    return EXPECTED_FAILED.get(type(est).__name__, {})


@parametrize_with_checks(ESTIMATORS, expected_failed_checks=_expected_failed)
def test_sklearn_estimator_checks(estimator, check):
    check(estimator)


def test_the_expected_failures_are_few_and_explained():
    # every listed check names a reason; the estimators of spectra expect none at all
    for name, fails in EXPECTED_FAILED.items():
        assert all(isinstance(r, str) and len(r) > 20 for r in fails.values()), name
    assert set(EXPECTED_FAILED) == {"PolynomialCalibration", "LinearCalibration"}


# --- a small invented mixture map -------------------------------------------------------

def _mixture(seed=0, ny=9, nx=11, n_shift=90, background=5.0):
    """Three Gaussian bands mixed with Dirichlet weights (pure pixels included), a flat
    background and white noise; two pixels masked. Returns (map, spectra, weights)."""
    rng = np.random.default_rng(seed)
    s = np.linspace(300.0, 1700.0, n_shift)
    S = np.stack([np.exp(-0.5 * ((s - c) / w) ** 2) for c, w in
                  ((600, 25), (1000, 35), (1400, 30))])
    C = rng.dirichlet([0.6, 0.6, 0.6], ny * nx)
    C[:3] = np.eye(3)
    X = 100 * C @ S + background + rng.normal(0, 0.3, (ny * nx, n_shift))
    mask = np.zeros((ny, nx), bool)
    mask[4, 5] = mask[8, 0] = True
    m = RamanMap(X.reshape(ny, nx, n_shift), raman_shift=s, x=np.arange(nx, dtype=float),
                 y=np.arange(ny, dtype=float), mask=mask)
    return m, S, C


def _good_rows(m):
    """The map's unmasked spectra as rows and their flat indices (independent of mapkit's
    own helper: the plain definition)."""
    good = np.flatnonzero(~m.mask.ravel())
    return np.asarray(m.intensity, float).reshape(-1, m.shape[2])[good], good


def _blocks(X, size=23):
    return [X[i:i + size] for i in range(0, X.shape[0], size)]


def _as_rows(images, good):
    """(k, ny, nx) images -> (n_good, k) rows."""
    return images.reshape(images.shape[0], -1)[:, good].T


# --- arrays give what maps give, blocks give what the whole gives --------------------------
# Block invariance of a per-spectrum transform is the contract of scikit-learn's
# check_methods_subset_invariance (common practice); here on the project's map sizes.
# The non-negative least squares behind NMF, MCR and unmixing sweeps every spectrum of a
# batch until the last one meets the stopping tolerance, so spectra in a block that
# finishes early stop a few sweeps sooner: blocks agree with the whole to that tolerance
# (relative 1e-10 on the weights, 1e-6 on the provisional fit of the Poisson weights), not
# to the last bit. BLOCK_RTOL allows for it; a wrong block layout errs by whole units.
BLOCK_RTOL = 1e-8

TRANSFORMERS = [
    lambda: PCAScores(n_components=3),
    lambda: NMFComponents(n_components=3),
    lambda: NMFComponents(n_components=3, image_baseline_order=2),
    lambda: MCRALS(n_components=3),
    lambda: BackgroundMCR(n_components=3, baseline_order=1),
]


@pytest.mark.parametrize("make", TRANSFORMERS, ids=["pca", "nmf", "nmf-order2", "mcr",
                                                    "mcr-background"])
def test_array_input_gives_the_map_numbers_and_blocks_give_the_whole(make):
    m, _, _ = _mixture()
    X, good = _good_rows(m)
    on_map = make().fit(m)
    images = on_map.transform(m)
    assert images.shape == (3, *m.shape[:2])
    assert np.isnan(images[:, m.mask]).all()
    # the same spectra as rows, with the map's axis: the same model, the same numbers
    kw = {} if isinstance(on_map, (PCAScores, MCRALS)) else {"raman_shift": m.raman_shift}
    on_rows = make().fit(X, **kw)
    assert_allclose(on_rows.components_, on_map.components_, rtol=1e-10, atol=1e-12)
    rows = on_rows.transform(X)
    assert rows.shape == (X.shape[0], 3)
    assert_allclose(rows, _as_rows(images, good), rtol=1e-10, atol=1e-10)
    # a model fitted on the map applied to blocks of rows: the whole map's numbers
    blocks = np.concatenate([on_map.transform(b) for b in _blocks(X)])
    assert_allclose(blocks, _as_rows(images, good), rtol=BLOCK_RTOL, atol=1e-9)


def _slabs(m, rows=4):
    """The map cut into slabs of whole image rows, each a RamanMap of its own."""
    from dataclasses import replace

    return [replace(m, intensity=np.asarray(m.intensity)[i:i + rows], y=m.y[i:i + rows],
                    mask=m.mask[i:i + rows]) for i in range(0, m.shape[0], rows)]


@pytest.mark.parametrize("make", TRANSFORMERS[:2] + TRANSFORMERS[3:4],
                         ids=["pca", "nmf", "mcr"])
def test_maps_in_slabs_give_the_whole_map(make):
    # a large map is read in slabs of image rows: their images stack to the whole map's
    m, _, _ = _mixture()
    est = make().fit(m)
    whole = est.transform(m)
    parts = np.concatenate([est.transform(sl) for sl in _slabs(m)], axis=1)
    assert_allclose(parts, whole, rtol=BLOCK_RTOL, atol=1e-9, equal_nan=True)
    km = KMeansClasses(n_classes=3).fit(m)
    assert_array_equal(np.concatenate([km.predict(sl) for sl in _slabs(m)]), km.labels_)


def test_channel_index_is_the_default_axis_for_rows():
    # an evenly spaced axis and the channel index give the same Legendre terms
    m, _, _ = _mixture()
    X, _ = _good_rows(m)
    a = NMFComponents(n_components=3, image_baseline_order=2).fit(X, raman_shift=m.raman_shift)
    b = NMFComponents(n_components=3, image_baseline_order=2).fit(X)
    assert_array_equal(b.raman_shift_, np.arange(X.shape[1]))
    assert_allclose(b.transform(X), a.transform(X), rtol=1e-9, atol=1e-9)
    with pytest.raises(DataError, match="raman_shift"):
        NMFComponents(n_components=3).fit(X, raman_shift=m.raman_shift[:-1])


def test_pca_scores_match_scikit_learn_and_its_incremental_pca():
    from sklearn.decomposition import PCA, IncrementalPCA

    m, _, _ = _mixture()
    X, _ = _good_rows(m)
    est = PCAScores(n_components=3).fit(X)
    ref = PCA(n_components=3).fit(X)
    assert_allclose(np.abs(est.transform(X)), np.abs(ref.transform(X)), rtol=1e-8, atol=1e-8)
    # partial_fit over blocks is scikit-learn's IncrementalPCA over the same blocks
    inc = PCAScores(n_components=3)
    ipca = IncrementalPCA(n_components=3)
    for b in _blocks(X, 30):
        inc.partial_fit(b)
        ipca.partial_fit(b)
    assert_allclose(inc.components_, ipca.components_, rtol=1e-12, atol=1e-12)
    # four noisy components in three: the incremental variance share is within 1 % of
    # the exact one (Ross et al. 2008: the incremental update is exact only at full rank)
    assert inc.explained_variance_ratio_.sum() == pytest.approx(
        est.explained_variance_ratio_.sum(), rel=1e-2)


def _cosines(A, B):
    A = A / np.linalg.norm(A, axis=1, keepdims=True)
    B = B / np.linalg.norm(B, axis=1, keepdims=True)
    return np.abs(A @ B.T).max(axis=1)


def test_nmf_partial_fit_over_blocks_recovers_the_spectra():
    m, S, _ = _mixture(background=0.0)
    X, _ = _good_rows(m)
    est = NMFComponents(n_components=3, batch_size=32, init="vca")
    for _ in range(30):                                   # a few passes over the blocks
        for b in _blocks(X, 40):
            est.partial_fit(b)
    # each true band is found (cosine similarity; common practice for endmember spectra)
    assert _cosines(S, est.components_).min() > 0.99
    assert est.transform(X).shape == (X.shape[0], 3)
    assert not hasattr(NMFComponents(n_components=3), "partial_fit")   # batch_size unset


def test_kmeans_rows_predict_and_blocks():
    from sklearn.cluster import KMeans
    from sklearn.decomposition import PCA
    from sklearn.metrics import adjusted_rand_score

    m, _, C = _mixture()
    X, good = _good_rows(m)
    km = KMeansClasses(n_classes=3, n_pca=4).fit(m)
    on_rows = KMeansClasses(n_classes=3, n_pca=4).fit(X)
    assert on_rows.labels_.shape == (X.shape[0],)
    assert_array_equal(on_rows.labels_, km.labels_.ravel()[good])
    # scikit-learn's k-means on the PCA scores gives the same partition (ARI = 1)
    S = PCA(n_components=4, random_state=0).fit_transform(X)
    ref = KMeans(n_clusters=3, n_init=10, random_state=0).fit_predict(S)
    assert adjusted_rand_score(ref, on_rows.labels_) == 1.0
    # predict: on the fitted map it is labels_, and blocks give the whole
    assert_array_equal(km.predict(m), km.labels_)
    assert_array_equal(np.concatenate([km.predict(b) for b in _blocks(X)]),
                       km.labels_.ravel()[good])
    # mini-batch k-means refined over blocks
    mb = KMeansClasses(n_classes=3, n_pca=4, method="minibatch")
    for _ in range(5):
        for b in _blocks(X, 40):
            mb.partial_fit(b)
    assert adjusted_rand_score(mb.predict(X), km.predict(X)) > 0.8
    # smoothing needs the map's grid
    with pytest.raises(DataError, match="smooth"):
        KMeansClasses(n_classes=3, smooth=1.0).fit(X)
    with pytest.raises(AttributeError):
        KMeansClasses(method="kmeans").partial_fit   # noqa: B018 (only mini-batch refines)


def test_ward_predict_is_the_nearest_centre():
    m, _, _ = _mixture()
    X, good = _good_rows(m)
    ward = KMeansClasses(n_classes=3, method="ward").fit(X)
    scores = ward.pca_.transform(X)
    d = ((scores[:, None, :] - ward.centres_[None]) ** 2).sum(axis=-1)
    assert_array_equal(ward.predict(X), np.argmin(d, axis=1))


def test_dominant_classes_on_rows_match_the_map():
    m, _, _ = _mixture()
    X, good = _good_rows(m)
    images = NMFComponents(n_components=3).fit_transform(m)
    # rows have no grid, so no spatial prior: the map without one gives the same classes
    on_map = DominantClasses(n_classes=3, neighbour_weight=0).fit(m, images)
    on_rows = DominantClasses(n_classes=3).fit(X, _as_rows(images, good))
    assert_array_equal(on_rows.labels_, on_map.labels_.ravel()[good])
    assert_allclose(on_rows.shares_, _as_rows(on_map.shares_, good))
    with pytest.raises(DataError, match="weights"):
        DominantClasses(n_classes=3).fit(X, images)


def _library(m, S):
    return [Spectrum(f"phase {i + 1}", m.raman_shift, S[i]) for i in range(S.shape[0])]


@pytest.mark.parametrize("weights, method", [("none", "nnls"), ("poisson", "nnls"),
                                             ("none", "fcls")])
def test_reference_unmixing_rows_and_blocks(weights, method):
    m, S, C = _mixture()
    X, good = _good_rows(m)
    lib = _library(m, S)
    un = ReferenceUnmixing(lib, baseline_order=0, weights=weights, method=method).fit(m)
    abundance, _ = un.transform(m)
    rows = ReferenceUnmixing(lib, baseline_order=0, weights=weights, method=method).fit(X)
    assert_array_equal(rows.raman_shift_, m.raman_shift)     # the references' own axis
    assert_allclose(rows.transform(X), _as_rows(abundance, good), rtol=1e-12, atol=1e-12)
    assert_allclose(np.concatenate([un.transform(b) for b in _blocks(X)]),
                    _as_rows(abundance, good), rtol=BLOCK_RTOL, atol=1e-9)
    if method == "nnls" and weights == "none":
        # the weights of the mixture come back (noise 0.3 on bands of height 100)
        assert_allclose(rows.transform(X) / 100, C[good], atol=0.02)


def test_reference_unmixing_rows_need_an_axis_when_the_references_have_another():
    m, S, _ = _mixture()
    X, _ = _good_rows(m)
    lib = _library(m, S)
    with pytest.raises(DataError, match="raman_shift"):
        ReferenceUnmixing(lib, baseline_order=0).fit(X[:, :-5])
    un = ReferenceUnmixing(lib, baseline_order=0, weights="none").fit(
        X[:, :-5], raman_shift=m.raman_shift[:-5])
    assert un.transform(X[:, :-5]).shape == (X.shape[0], 3)


# --- scikit-learn tools on the estimators ----------------------------------------------------

def test_pipeline_and_cross_validation_on_spectra():
    from sklearn.linear_model import LinearRegression
    from sklearn.model_selection import GridSearchCV, cross_val_predict
    from sklearn.pipeline import make_pipeline

    m, _, C = _mixture()
    X, good = _good_rows(m)
    y = C[good, 0]
    # NMF weights as features of a regression: the first phase's share comes back
    pipe = make_pipeline(NMFComponents(n_components=3), LinearRegression())
    pred = cross_val_predict(pipe, X, y, cv=3)
    assert np.sqrt(np.mean((pred - y) ** 2)) < 0.02
    # a search over the number of PCA scores picks at least the three phases
    search = GridSearchCV(make_pipeline(PCAScores(), LinearRegression()),
                          {"pcascores__n_components": [1, 2, 3, 5]}, cv=3).fit(X, y)
    assert search.best_params_["pcascores__n_components"] >= 3
    # PLS in cross-validation of its own: the content of phase 1 from the spectra
    pls_pred = cross_val_predict(PLSCalibration(max_components=4), X, y, cv=3)
    assert np.sqrt(np.mean((pls_pred - y) ** 2)) < 0.02


def test_calibration_accepts_a_column_and_a_list_alike():
    # worked example of a straight-line calibration, fluorescence standards with
    # b = 1.93, a = 1.52 (Miller & Miller, Statistics and Chemometrics for Analytical
    # Chemistry, the worked example of chapter 5; from memory)
    x = np.array([0, 2, 4, 6, 8, 10, 12.0])
    y = np.array([2.1, 5.0, 9.0, 12.6, 17.3, 21.0, 24.7])
    a = PolynomialCalibration().fit(x, y)
    from sklearn.exceptions import DataConversionWarning

    with pytest.warns(DataConversionWarning):    # a column of responses, as scikit-learn
        b = PolynomialCalibration().fit(x.reshape(-1, 1), y.reshape(-1, 1))
    assert_allclose(b.coef_, a.coef_)
    assert round(a.slope_, 2) == 1.93 and round(a.intercept_, 2) == 1.52
    assert_allclose(b.predict(x.reshape(-1, 1)), a.predict(x))
    assert b.predict(x.reshape(-1, 1)).shape == (7,)
    with pytest.raises(DataError, match="feature"):
        PolynomialCalibration().fit(np.c_[x, x], y)
    with pytest.raises(ValueError, match="features"):
        b.predict(np.c_[x, x])
    assert b.n_features_in_ == 1


def test_data_errors_are_mapkit_errors_and_value_errors():
    m, _, _ = _mixture()
    with pytest.raises(MapkitError, match="n_components = 200 exceeds"):
        NMFComponents(n_components=200).fit(m)
    with pytest.raises(ValueError, match=r"1 feature\(s\)"):
        PCAScores(n_components=2).fit(np.ones((10, 1)))
    # and fitted models refuse a block with other channels
    est = PCAScores(n_components=2).fit(_good_rows(m)[0])
    with pytest.raises(ValueError, match="features"):
        est.transform(np.ones((4, m.shape[2] - 1)))


def test_clone_keeps_parameters_and_drops_state():
    est = NMFComponents(n_components=3, batch_size=8).fit(_good_rows(_mixture()[0])[0])
    fresh = clone(est)
    assert fresh.get_params() == est.get_params()
    assert not hasattr(fresh, "components_")
