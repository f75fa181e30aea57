"""How classes and components are named and numbered in every output file and figure.

In Python a class image holds 0-based indices with -1 for masked pixels (the scikit-learn
convention, ``KMeansClasses.labels_``); every file and figure numbers classes from 1, as
the command line and the report do, with 0 for masked pixels (the convention of ImageJ
and napari label images). Components and classes identified against a reference library
carry the library name beside their number.
"""

from __future__ import annotations

import numpy as np

#: how a class image is numbered in files (TIFF, CSV, results.h5)
CLASS_NUMBERING = "class number from 1; 0 = masked"


def class_numbers(labels) -> np.ndarray:
    """0-based class indices (-1 masked) → 1-based class numbers (0 masked), int16.

    Examples
    --------
    >>> class_numbers(np.array([[0, 3], [-1, 1]])).tolist()
    [[1, 4], [0, 2]]
    """
    a = np.asarray(labels)
    return np.where(a >= 0, a + 1, 0).astype(np.int16)


def class_indices(numbers) -> np.ndarray:
    """The inverse of :func:`class_numbers`."""
    a = np.asarray(numbers)
    return np.where(a > 0, a - 1, -1).astype(np.int16)


def identified_names(result) -> dict:
    """``{"component 1": "calcite", ...}`` for the spectra a library match named."""
    return {i["spectrum"]: i["match"] for i in result.summary.get("identification", [])
            if i.get("match") not in (None, "", "unmatched")}


def display_label(label, names: dict) -> str:
    """``"component 1 (calcite)"`` where the component was identified, else the label."""
    label = str(label)
    return f"{label} ({names[label]})" if label in names else label


def class_names(result, n: int) -> list:
    """Library names of classes 1..n (empty strings where none matched)."""
    names = identified_names(result)
    return [names.get(f"class {k + 1}", "") for k in range(n)]
