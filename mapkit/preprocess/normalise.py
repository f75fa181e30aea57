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


def normalise_to_band(block, shift, *, low: float, high: float):
    """Divide each spectrum by its integrated intensity over ``low``-``high`` cm⁻¹.

    Useful with an internal-standard band whose intensity should be constant.
    """
    from ..reduce.bands import band_integral

    b = np.asarray(block, dtype=np.float64)
    area = np.atleast_1d(band_integral(b, shift, low, high, local_baseline=False))
    out = np.zeros_like(b)
    np.divide(b, area[..., None], out=out, where=np.abs(area[..., None]) > 0)
    return out


def msc(block, reference):
    """Multiplicative scatter correction (Geladi, MacDougall & Martens 1985, Appl. Spectrosc. 39:491).

    Each spectrum x is regressed on the reference r as x ≈ a + b·r and returned as
    (x − a)/b. The reference is usually the mean spectrum of the map.

    Examples
    --------
    >>> r = np.array([1.0, 3.0, 2.0, 5.0])
    >>> msc(np.array([2 + 0.5 * r]), r).round(12).tolist()
    [[1.0, 3.0, 2.0, 5.0]]
    """
    return emsc(block, reference, order=0)


def emsc(block, reference, *, order: int = 2, shift=None):
    """Extended multiplicative signal correction (Martens & Stark 1991, J. Pharm. Biomed. Anal. 9:625).

    Each spectrum is modelled as x ≈ b·r + Σₖ cₖ·Pₖ(ν̃) with polynomial terms up to
    ``order`` on the shift axis (mapped to [-1, 1]); the corrected spectrum is
    (x − Σ cₖPₖ)/b. ``order=0`` is plain MSC. Rows with b ≤ 0 are returned as zeros.
    """
    b = np.atleast_2d(np.asarray(block, dtype=np.float64))
    r = np.asarray(reference, dtype=np.float64)
    n = r.size
    x = np.arange(n, dtype=float) if shift is None else np.asarray(shift, dtype=float)
    t = 2 * (x - x.min()) / max(np.ptp(x), 1e-300) - 1
    poly = np.polynomial.legendre.legvander(t, order)       # (n, order+1)
    design = np.column_stack([r, poly])
    coef, *_ = np.linalg.lstsq(design, b.T, rcond=None)      # (1+order+1, m)
    scale = coef[0]
    background = (poly @ coef[1:]).T
    out = np.zeros_like(b)
    ok = scale > 0
    out[ok] = (b[ok] - background[ok]) / scale[ok, None]
    return out.reshape(np.shape(block))
