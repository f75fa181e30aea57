"""Normalisation of spectra."""

from __future__ import annotations

import numpy as np

from ..errors import MapkitError

METHODS = ("area", "vector", "max", "snv")


def normalise(block, shift=None, *, method: str = "vector"):
    """Normalise each spectrum (row) of ``block``.

    ``area`` divides by the absolute trapezoid area over the shift axis (or the
    sum without one), ``vector`` by the L2 norm, ``max`` by the maximum, and
    ``snv`` centres and scales to unit standard deviation. Rows whose scale is
    zero are returned as zeros, not NaN.

    Examples
    --------
    >>> normalise(np.array([[3., 4.]]), method="vector").tolist()
    [[0.6, 0.8]]
    """
    b = np.asarray(block, dtype=np.float64)
    if method == "snv":
        centred = b - b.mean(axis=-1, keepdims=True)
        scale = b.std(axis=-1, keepdims=True)
    elif method == "vector":
        centred, scale = b, np.linalg.norm(b, axis=-1, keepdims=True)
    elif method == "max":
        centred, scale = b, b.max(axis=-1, keepdims=True)
    elif method == "area":
        centred = b
        if shift is None:
            scale = b.sum(axis=-1, keepdims=True)
        else:
            scale = np.abs(np.trapezoid(b, np.asarray(shift, float), axis=-1))[..., None]
    else:
        raise MapkitError(f"unknown normalisation {method!r}", field="method",
                          fix=f"choose one of {', '.join(METHODS)}")
    out = np.zeros_like(centred)
    np.divide(centred, scale, out=out, where=np.abs(scale) > 0)
    return out
