"""Identify spectra (components, class means) against a library of reference spectra."""

from __future__ import annotations

import numpy as np

from ..errors import MapkitError

MEASURES = ("hqi", "correlation")


def hit_quality_index(a, b):
    """HQI = (a·b)² / ((a·a)(b·b)) for every pair of rows (1 = identical shape).

    The squared cosine similarity used by spectral search software; insensitive to
    intensity scale.

    Examples
    --------
    >>> hit_quality_index(np.array([[1., 2., 3.]]), np.array([[2., 4., 6.]])).round(12).tolist()
    [[1.0]]
    """
    a = np.atleast_2d(np.asarray(a, float))
    b = np.atleast_2d(np.asarray(b, float))
    num = (a @ b.T) ** 2
    den = np.outer((a * a).sum(1), (b * b).sum(1))
    return np.divide(num, den, out=np.zeros_like(num), where=den > 0)


def correlation(a, b):
    """Pearson correlation of every pair of rows (mean-centred cosine)."""
    a = np.atleast_2d(np.asarray(a, float))
    b = np.atleast_2d(np.asarray(b, float))
    a = a - a.mean(1, keepdims=True)
    b = b - b.mean(1, keepdims=True)
    den = np.outer(np.linalg.norm(a, axis=1), np.linalg.norm(b, axis=1))
    return np.divide(a @ b.T, den, out=np.zeros((a.shape[0], b.shape[0])), where=den > 0)


def remove_trend(block, shift, order: int = 1):
    """Each row minus its least-squares polynomial of ``order`` on the shift axis.

    What :func:`match_library` does to both sides before scoring, so an offset or a slope
    (an NMF component's floor, a reference's residual background) does not lower the score.

    Examples
    --------
    >>> s = np.arange(5.0)
    >>> remove_trend(np.array([[3., 4., 9., 6., 7.]]), s).round(12).tolist()
    [[-0.8, -0.8, 3.2, -0.8, -0.8]]
    """
    from .unmix import polynomial_basis

    Q = polynomial_basis(shift, order)
    B = np.atleast_2d(np.asarray(block, float))
    return B - (B @ Q) @ Q.T


def describe_match(entry: dict) -> str:
    """One line for a match entry: the name (or unmatched with the best candidate) and the
    score on its 0-1 scale, e.g. ``calcite (HQI 0.973 on 0-1)``."""
    label = "HQI" if entry.get("measure", "hqi") == "hqi" else "r"
    score = f"{label} {entry['score']:.3f} on 0-1"
    if entry["match"] != "unmatched":
        return f"{entry['match']} ({score})"
    return (f"unmatched (best candidate {entry['best_candidate']}, {score}, below the "
            f"minimum score {entry.get('min_score', 0.9):g})")


def match_library(spectra, shift, library, *, measure: str = "hqi", min_score: float = 0.9,
                  names=None, preprocess=None, baseline_order: int | None = 1) -> list[dict]:
    """Best library match of each spectrum, with scores; weak matches say "unmatched".

    Both sides are compared like with like: by default a least-squares straight line is
    removed from every spectrum and every reference (:func:`remove_trend`) before the
    score, so offsets and slopes (an NMF component on a floor of a few % of its maximum,
    a reference with a residual background) do not drag the score down. HQI and
    correlation are on a 0-1 scale (1 = same shape).

    Parameters
    ----------
    spectra : array (k, n_shift)
        Spectra to identify (e.g. NMF components or class means) on ``shift``.
    library : list of mapkit.read.Spectrum
        Interpolated onto ``shift``; a reference that does not cover it is an error.
    measure : {"hqi", "correlation"}
    min_score : float
        Below this the spectrum is reported as unmatched (the best candidate and its
        score are kept).
    preprocess : callable, optional
        Applied to both the spectra and the library (``f(block, shift) -> block``) so
        both are compared after the same treatment, e.g. a baseline removal.
    baseline_order : int or None
        Order of the polynomial removed from both sides after ``preprocess`` (default 1:
        offset and slope); None compares the spectra as they are.
    """
    if measure not in MEASURES:
        raise MapkitError(f"unknown match measure {measure!r}", field="measure",
                          fix=f"use one of {', '.join(MEASURES)}")
    if not library:
        raise MapkitError("the library is empty", field="library", fix="give reference spectra")
    spectra = np.atleast_2d(np.asarray(spectra, float))
    refs = np.stack([r.on_axis(shift) for r in library])
    if preprocess is not None:
        spectra, refs = preprocess(spectra, shift), preprocess(refs, shift)
    if baseline_order is not None:
        spectra = remove_trend(spectra, shift, baseline_order)
        refs = remove_trend(refs, shift, baseline_order)
    score = hit_quality_index(spectra, refs) if measure == "hqi" else correlation(spectra, refs)
    # after the trend removal a mirror image would square to a high HQI: it is no match
    score = np.where(spectra @ refs.T > 0, score, 0.0)
    ref_names = [r.name for r in library]
    names = names or [f"spectrum {i + 1}" for i in range(spectra.shape[0])]
    out = []
    for i, row in enumerate(score):
        order = np.argsort(-row)
        best = int(order[0])
        entry = {"spectrum": names[i], "match": ref_names[best] if row[best] >= min_score
                 else "unmatched", "best_candidate": ref_names[best], "score": float(row[best]),
                 "measure": measure, "min_score": float(min_score)}
        if len(order) > 1:
            entry["runner_up"] = ref_names[int(order[1])]
            entry["runner_up_score"] = float(row[order[1]])
        out.append(entry)
    return out
