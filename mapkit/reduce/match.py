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


def match_library(spectra, shift, library, *, measure: str = "hqi", min_score: float = 0.9,
                  names=None, preprocess=None) -> list[dict]:
    """Best library match of each spectrum, with scores; weak matches say "unmatched".

    Parameters
    ----------
    spectra : array (k, n_shift)
        Spectra to identify (e.g. NMF components or class means) on ``shift``.
    library : list of mapkit.read.Spectrum
        Interpolated onto ``shift``; a reference that does not cover it is an error.
    measure : {"hqi", "correlation"}
    min_score : float
        Below this the spectrum is reported as unmatched (the best candidate is kept).
    preprocess : callable, optional
        Applied to both the spectra and the library (``f(block, shift) -> block``) so
        both are compared after the same treatment, e.g. a baseline removal.
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
    score = hit_quality_index(spectra, refs) if measure == "hqi" else correlation(spectra, refs)
    ref_names = [r.name for r in library]
    names = names or [f"spectrum {i + 1}" for i in range(spectra.shape[0])]
    out = []
    for i, row in enumerate(score):
        order = np.argsort(-row)
        best = int(order[0])
        entry = {"spectrum": names[i], "match": ref_names[best] if row[best] >= min_score
                 else "unmatched", "best_candidate": ref_names[best], "score": float(row[best]),
                 "measure": measure}
        if len(order) > 1:
            entry["runner_up"] = ref_names[int(order[1])]
            entry["runner_up_score"] = float(row[order[1]])
        out.append(entry)
    return out
