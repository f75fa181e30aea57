"""Accuracy scores of a reduction against a scene's ground truth, free of its scale.

Every score here is scale-free, so no test or benchmark needs to know the constants a
scene was generated with:

- component spectra are paired with the true pure spectra by the assignment that
  maximises the summed cosine similarity (Hungarian method, Kuhn 1955, as implemented by
  :func:`scipy.optimize.linear_sum_assignment`);
- an abundance image is compared with the true abundance after the one scale factor that
  fits it best (least squares), since a factorisation fixes spectra and images only up to
  a scale;
- the **noise floor** is an oracle's error: the worst-component abundance RMSE of
  non-negative least squares with the true references on the map with its true
  background subtracted. A method that has to estimate the background (and, for a
  factorisation, the spectra) can only approach it; ratios a little below 1 are possible
  (the oracle does not weight or smooth). Abundance scores are given as multiples of it;
- classes are compared by the adjusted Rand index (Hubert & Arabie 1985), which ignores
  how classes are numbered.
"""

from __future__ import annotations

import numpy as np


def match_spectra(estimated, true):
    """Pair estimated spectra (m, n) with true spectra (k, n) by cosine similarity.

    Returns ``(rows, cols, cosine)`` of the best one-to-one pairing; a true spectrum left
    without a partner (m < k) gets cosine 0 in :func:`worst_cosine`.

    Examples
    --------
    >>> t = np.eye(3)
    >>> match_spectra(t[[2, 0]], t)[1].tolist()
    [2, 0]
    """
    from scipy.optimize import linear_sum_assignment

    e = np.asarray(estimated, float)
    t = np.asarray(true, float)
    e = e / np.maximum(np.linalg.norm(e, axis=1, keepdims=True), 1e-300)
    t = t / np.maximum(np.linalg.norm(t, axis=1, keepdims=True), 1e-300)
    cos = e @ t.T
    rows, cols = linear_sum_assignment(-cos)
    return rows, cols, cos[rows, cols]


def worst_cosine(estimated, true) -> float:
    """Smallest cosine of the best pairing; 0 when a true spectrum has no partner."""
    _, cols, cos = match_spectra(estimated, true)
    return float(cos.min()) if len(cols) == len(true) else 0.0


def scaled_rmse(estimate, truth, where=None) -> float:
    """RMSE of ``estimate`` against ``truth`` after the least-squares scale factor.

    >>> scaled_rmse(np.array([2., 4.]), np.array([1., 2.]))
    0.0
    """
    e = np.asarray(estimate, float)
    t = np.asarray(truth, float)
    if where is not None:
        e, t = e[where], t[where]
    e = np.where(np.isfinite(e), e, 0.0)
    den = e @ e
    scale = (e @ t) / den if den > 0 else 0.0
    return float(np.sqrt(np.mean((scale * e - t) ** 2)))


def abundance_errors(images, truth_abundance, where, pairs=None) -> np.ndarray:
    """Scaled RMSE per true component. ``images`` (m, ny, nx) are paired with the true
    components by ``pairs`` = (rows, cols) (default: row i is component i); a component
    with no image gets the RMSE of an all-zero estimate."""
    k = truth_abundance.shape[0]
    rows, cols = pairs if pairs is not None else (np.arange(k), np.arange(k))
    out = np.array([float(np.sqrt(np.mean(truth_abundance[j][where] ** 2))) for j in range(k)])
    for i, j in zip(rows, cols):
        out[j] = scaled_rmse(images[i], truth_abundance[j], where)
    return out


def scored_pixels(truth) -> np.ndarray:
    """Pixels abundance scores are taken over: not dead, no cosmic-ray spike."""
    return ~truth["bad_pixels"] & ~truth["spike_mask"].any(axis=-1)


def oracle_abundances(scene, where) -> np.ndarray:
    """Abundance images (k, ny, nx) of NNLS with the true references on the map with its
    true background subtracted, on the pixels ``where`` (zero elsewhere)."""
    from .reduce.unmix import nnls_batch

    t = scene.truth
    images = np.zeros(t["abundance"].shape)
    images[:, where] = nnls_batch(t["pure_spectra"].T,
                                  (scene.counts.astype(float) - t["background"])[where].T)
    return images


def noise_floor(scene) -> float:
    """Worst-component abundance RMSE of the oracle (:func:`oracle_abundances`, which knows
    the spectra and the background) over the scored pixels."""
    where = scored_pixels(scene.truth)
    return float(abundance_errors(oracle_abundances(scene, where), scene.truth["abundance"],
                                  where).max())


def class_agreement(labels, truth) -> dict:
    """Adjusted Rand index of a class map against the dominant-component truth, on every
    good pixel and on the core pixels (largest fraction ≥ 0.8)."""
    from sklearn.metrics import adjusted_rand_score

    lab = np.asarray(labels)
    good = truth["labels"] >= 0
    core = truth["core"] & good
    return {"all": float(adjusted_rand_score(truth["labels"][good], lab[good])),
            "core": float(adjusted_rand_score(truth["labels"][core], lab[core]))}


def score_factorisation(spectra, images, scene, floor=None) -> dict:
    """Worst cosine and worst abundance RMSE ÷ noise floor of component spectra and images."""
    t = scene.truth
    rows, cols, _ = match_spectra(spectra, t["pure_spectra"])
    where = scored_pixels(t)
    floor = noise_floor(scene) if floor is None else floor
    err = abundance_errors(np.nan_to_num(images), t["abundance"], where, (rows, cols))
    return {"worst_cosine": worst_cosine(spectra, t["pure_spectra"]),
            "abundance_vs_floor": float(err.max() / floor)}


def score_unmixing(images, scene, floor=None) -> float:
    """Worst abundance RMSE ÷ noise floor of images (k, ny, nx) in the truth's order."""
    t = scene.truth
    where = scored_pixels(t)
    floor = noise_floor(scene) if floor is None else floor
    return float(abundance_errors(np.nan_to_num(images), t["abundance"], where).max() / floor)
