"""Dominant-component classes: pure levels from closure, and the spatial prior.

Every map here is built in the test from its own random spectra and smooth random
fraction fields (no scene of mapkit.scenes): the truth is the argmax of the fractions,
and classes are scored by the adjusted Rand index (Hubert & Arabie 1985, J. Classif.
2:193, as implemented by scikit-learn). Bounds were measured over seeds 0-2 on
2026-12-02, with a margin.
"""

import numpy as np
import pytest
from scipy.ndimage import gaussian_filter
from sklearn.metrics import adjusted_rand_score

from mapkit import MapkitError, RamanMap
from mapkit.reduce import DominantClasses, nnls_batch


def _map(values):
    """A map on the grid of ``values`` (ny, nx, n) with unit spacing."""
    ny, nx, n = values.shape
    return RamanMap(values, raman_shift=np.arange(n, dtype=float), x=np.arange(nx, dtype=float),
                    y=np.arange(ny, dtype=float))


def _fractions(rng, shape, k, sigma=5.0, floor=0.3):
    """Smooth random volume fractions (k, ny, nx) that sum to one; with a ``floor`` of
    every phase everywhere, no pixel is pure."""
    f = np.stack([gaussian_filter(rng.normal(size=shape), sigma, mode="reflect")
                  for _ in range(k)])
    f = (f - f.min(axis=(1, 2), keepdims=True)) / np.ptp(f, axis=(1, 2), keepdims=True)
    f = f + floor
    return f / f.sum(axis=0)


def _spectra(rng, k, n=150):
    """k random band spectra: three Gaussian bands each at random positions and widths."""
    s = np.arange(n, dtype=float)
    out = np.zeros((k, n))
    for j in range(k):
        for _ in range(3):
            out[j] += rng.uniform(0.3, 1) * np.exp(-0.5 * ((s - rng.uniform(5, n - 5))
                                                          / rng.uniform(2, 6)) ** 2)
    return out


def test_closure_recovers_each_scale_on_a_gradient_without_pure_pixels():
    # closure: volume fractions sum to one (common practice: the closure constraint of
    # MCR-ALS, e.g. de Juan & Tauler 2006, Crit. Rev. Anal. Chem. 36:163, from memory), so
    # weights with sum_k w_k·image_k = 1 are exactly the inverse scales of noise-free images
    rng = np.random.default_rng(11)
    k, shape = 3, (30, 34)
    F = _fractions(rng, shape, k)
    scale = rng.uniform(0.2, 5.0, k)             # what a factorisation leaves arbitrary
    images = F * scale[:, None, None]
    m = _map(np.ones((*shape, 4)))
    dom = DominantClasses(n_classes=k, scale="closure", neighbour_weight=0).fit(m, images)
    assert dom.scale_source_ == "closure"
    np.testing.assert_allclose(dom.level_, scale, rtol=1e-8)
    np.testing.assert_array_equal(dom.labels_, np.argmax(F, axis=0))
    # the purest level (3rd-largest value) is not the pure level where no pixel is pure
    old = DominantClasses(n_classes=k, neighbour_weight=0).fit(m, images)
    assert old.scale_source_ == "purest"
    assert np.mean(old.labels_ != np.argmax(F, axis=0)) > 0.01


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_closure_classes_of_a_noisy_gradient_follow_the_largest_fraction(seed):
    # a map of counts: random spectra of different strengths, Poisson noise, component
    # images from NNLS against unit-norm spectra (a factorisation's arbitrary scale). The
    # best a scale can do is the images over their true scales (the spectra's norms);
    # closure comes close to it (measured over seeds 0-2: 0.021 below to 0.010 above),
    # the purest level does not (0.23-0.35 below).
    rng = np.random.default_rng(seed)
    k, shape = 3, (30, 34)
    F = _fractions(rng, shape, k)
    P = _spectra(rng, k) * rng.uniform(300, 1000, k)[:, None]
    counts = rng.poisson(np.einsum("kyx,kn->yxn", F, P)).astype(float)
    norm = np.linalg.norm(P, axis=1)
    images = nnls_batch((P / norm[:, None]).T, counts.reshape(-1, P.shape[1]).T)
    images = images.reshape(k, *shape)
    m, truth = _map(counts), np.argmax(F, axis=0).ravel()
    best = adjusted_rand_score(truth, np.argmax(images / norm[:, None, None], axis=0).ravel())
    closure = DominantClasses(n_classes=k, scale="closure", neighbour_weight=0).fit(m, images)
    purest = DominantClasses(n_classes=k, neighbour_weight=0).fit(m, images)
    a_closure = adjusted_rand_score(truth, closure.labels_.ravel())
    a_purest = adjusted_rand_score(truth, purest.labels_.ravel())
    assert closure.scale_source_ == "closure" and closure.closure_residual_ < 0.1
    assert a_closure >= best - 0.04, (a_closure, best)
    assert a_purest < best - 0.15, (a_purest, best)


def test_closure_that_does_not_hold_falls_back_to_the_purest_level():
    # a hole in the sample (no Raman signal in 40 % of the map): the fractions of the
    # materials do not sum to one there, the fit's residual says so, and the purest level
    # is used instead
    rng = np.random.default_rng(3)
    k, shape = 3, (30, 34)
    F = _fractions(rng, shape, k)
    F[:, :12] = 0.0
    images = F * rng.uniform(0.2, 5.0, k)[:, None, None]
    m = _map(np.ones((*shape, 4)))
    dom = DominantClasses(n_classes=k, scale="closure").fit(m, images)
    assert dom.scale_source_ == "purest" and dom.closure_residual_ > 0.25
    ref = DominantClasses(n_classes=k, scale="purest").fit(m, images)
    np.testing.assert_array_equal(dom.labels_, ref.labels_)
    np.testing.assert_allclose(dom.level_, ref.level_)


def _noisy_shares(seed, shape=(40, 44), k=3, noise=0.15):
    """Fractions with domains and smooth boundaries (a softmax of smooth random fields)
    and the same plus white noise of sd ``noise``."""
    rng = np.random.default_rng(seed)
    g = np.stack([gaussian_filter(rng.normal(size=shape), 4.0, mode="reflect")
                  for _ in range(k)])
    F = np.exp(g / (0.5 * g.std()))
    F /= F.sum(axis=0)
    return F, F + rng.normal(0, noise, F.shape), noise


def _neighbours(L, k):
    """Edge neighbours of each pixel in each class, counted with a padded copy (an
    implementation independent of the library's)."""
    ny, nx = L.shape
    pad = np.full((ny + 2, nx + 2), -1)
    pad[1:-1, 1:-1] = L
    out = np.zeros((k, ny, nx))
    for dy, dx in ((0, 1), (2, 1), (1, 0), (1, 2)):
        nb = pad[dy:dy + ny, dx:dx + nx]
        for j in range(k):
            out[j] += nb == j
    return out


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_spatial_prior_is_a_local_optimum_that_removes_noise_flips(seed):
    # iterated conditional modes (Besag 1986, J. R. Stat. Soc. B 48:259) stops where no
    # single pixel can raise share/σ + β·(neighbours in its class); on smooth fraction
    # fields with noisy shares it removes per-pixel flips. Measured over seeds 0-2:
    # per-pixel ARI 0.71-0.82, with the prior 0.83-0.90 (0.075-0.12 higher); the noise
    # estimate 0.955-1.067 of the added noise.
    F, S, noise = _noisy_shares(seed)
    k = len(F)
    m = _map(np.ones((*F.shape[1:], 4)))
    dom = DominantClasses(n_classes=k).fit(m, S)        # scale 1: purest level of S
    assert dom.n_iter_ >= 1
    # the noise the prior is weighed against: the added sd, seen through the shares'
    # scaling (MAD of second differences; Rousseeuw & Croux 1993, JASA 88:1273 for the
    # 1.4826 factor of a normal distribution)
    assert dom.share_noise_ == pytest.approx(noise / np.median(dom.level_), rel=0.12)
    L = dom.labels_
    energy = (S / dom.level_[:, None, None]) / dom.share_noise_ + \
        dom.neighbour_weight * _neighbours(L, k)
    np.testing.assert_array_equal(np.argmax(energy, axis=0), L)
    truth = np.argmax(F, axis=0).ravel()
    per_pixel = DominantClasses(n_classes=k, neighbour_weight=0).fit(m, S).labels_
    a_prior = adjusted_rand_score(truth, L.ravel())
    a_pixel = adjusted_rand_score(truth, per_pixel.ravel())
    assert a_prior >= 0.78 and a_prior > a_pixel + 0.04, (a_prior, a_pixel)


def test_spatial_prior_keeps_small_spots_of_a_minor_phase():
    # a minor phase in spots of radius 0, 1 and 2 pixels (1, 5 and 13 pixels) in a noisy
    # two-phase matrix: its share stands far above the noise, so the prior keeps every
    # pixel of every spot (common practice: a Potts weight below the data term's margin)
    rng = np.random.default_rng(5)
    shape = (30, 34)
    yy, xx = np.mgrid[:shape[0], :shape[1]]
    spot = np.zeros(shape, bool)
    for (cy, cx), r in (((6, 6), 0), ((15, 20), 1), ((23, 9), 2)):
        spot |= np.hypot(yy - cy, xx - cx) <= r
    major = 0.5 + 0.4 * np.sin(xx / 6.0)
    F = np.stack([major * 0.98, (1 - major) * 0.98, np.full(shape, 0.02)])
    F[:, spot] = np.array([0.15, 0.15, 0.7])[:, None]
    S = F + rng.normal(0, 0.05, F.shape)
    m = _map(np.ones((*shape, 4)))
    dom = DominantClasses(n_classes=3).fit(m, S)
    assert np.all(dom.labels_[spot] == 2)
    assert np.all(dom.labels_[~spot] != 2)


def test_rows_have_no_grid_and_take_the_largest_share():
    F, S, _ = _noisy_shares(0, shape=(12, 14))
    rows = S.reshape(3, -1).T
    X = np.ones((rows.shape[0], 4))
    dom = DominantClasses(n_classes=3).fit(X, rows)
    np.testing.assert_array_equal(dom.labels_, np.argmax(rows / dom.level_, axis=1))
    assert dom.n_iter_ == 0


def test_unknown_pure_level_rule_is_refused():
    m = _map(np.ones((4, 5, 4)))
    with pytest.raises(MapkitError, match="pure-level") as err:
        DominantClasses(n_classes=2, scale="median").fit(m, np.ones((2, 4, 5)))
    assert err.value.field == "scale"


def test_a_component_never_pure_is_flagged_and_said(tmp_path):
    # a binder at 15-40 % everywhere is never close to pure: its image over its own purest
    # pixels overstates it, and the class map gives it pixels it never dominates. The
    # classes flag it (mixing at its purest pixels above NEVER_PURE), and components
    # that are pure somewhere are not flagged (a pure-pixel scale needs a pure pixel: the
    # premise of pure-pixel methods, Boardman, Kruse & Green 1995, Summaries of the 5th
    # JPL Airborne Earth Science Workshop, from memory)
    from mapkit.reduce.segment import NEVER_PURE, DominantClasses

    rng = np.random.default_rng(4)
    ny, nx = 30, 40
    xx = np.broadcast_to(np.arange(nx) / (nx - 1), (ny, nx))
    binder = 0.15 + 0.25 * xx
    layer = (np.arange(ny)[:, None] < ny // 2) * np.ones((1, nx))
    a = (1 - binder) * layer
    b = (1 - binder) * (1 - layer)
    images = np.stack([a, b, binder]) + rng.normal(0, 0.01, (3, ny, nx))
    m = RamanMap(np.ones((ny, nx, 5)), raman_shift=np.arange(5.0), x=np.arange(nx * 1.0),
                 y=np.arange(ny * 1.0))
    cls = DominantClasses(n_classes=3).fit(m, images)
    assert cls.never_pure() == [2]
    assert cls.mixing_at_purest_[2] > 0.35 > NEVER_PURE > cls.mixing_at_purest_[:2].max()
    # the overstatement the flag warns of: the binder dominates no pixel, yet gets a class
    assert (cls.labels_ == 2).mean() > 0.1


def test_analyse_says_when_a_component_is_never_pure(tmp_path):
    # the same invented layout as spectra (two layers and a binder in every pixel): the
    # default analysis says in its notices which class area is likely overstated
    import json

    from mapkit.cli import main
    from mapkit.export.nexus import write_map

    rng = np.random.default_rng(5)
    ny, nx, n = 24, 30, 300
    shift = np.linspace(200, 1800, n)
    band = lambda c, w: np.exp(-0.5 * ((shift - c) / w) ** 2)   # noqa: E731
    pure = np.stack([band(400, 8) + 0.6 * band(1000, 10), band(700, 9) + 0.5 * band(1300, 8),
                     band(1450, 12) + 0.8 * band(1650, 9)]) * 400
    xx = np.broadcast_to(np.arange(nx) / (nx - 1), (ny, nx))
    binder = 0.15 + 0.25 * xx
    layer = (np.arange(ny)[:, None] < ny // 2) * np.ones((1, nx))
    frac = np.stack([(1 - binder) * layer, (1 - binder) * (1 - layer), binder])
    mu = np.einsum("kyx,ks->yxs", frac, pure) + 100 + 0.05 * (shift - 200)
    m = RamanMap(rng.poisson(mu).astype(np.float32), raman_shift=shift,
                 x=np.arange(nx * 1.0), y=np.arange(ny * 1.0))
    write_map(tmp_path / "film.h5", m)
    assert main(["analyse", str(tmp_path / "film.h5"), "--components", "3", "--out",
                 str(tmp_path / "out"), "--quiet", "--no-figures"]) == 0
    summary = json.loads((tmp_path / "out" / "summary.json").read_text())
    said = [t for t in summary["notices"] if "never close to pure" in t]
    assert len(said) == 1, summary["notices"]
    mixing = summary["results"]["classes"]["mixing_at_purest"]
    k = int(np.argmax(mixing))
    assert f"component {k + 1} is never close to pure" in said[0] and mixing[k] > 0.3
