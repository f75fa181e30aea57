"""Smoothing and derivatives along the shift axis."""

from __future__ import annotations

import numpy as np
from scipy.signal import savgol_filter


def savgol(block, shift=None, *, window: int = 7, order: int = 2, deriv: int = 0):
    """Savitzky–Golay smoothing (or derivative) of each spectrum in ``block``.

    A thin wrapper over :func:`scipy.signal.savgol_filter` along the last axis;
    derivatives are per unit shift (cm⁻¹) when ``shift`` is given.

    Examples
    --------
    >>> y = np.zeros((1, 11)); y[0, 5] = 35.0
    >>> np.round(savgol(y, window=5, order=2)[0, 3:8]).astype(int).tolist()
    [-3, 12, 17, 12, -3]
    """
    block = np.asarray(block, dtype=np.float64)
    delta = 1.0
    if deriv and shift is not None:
        delta = float(np.median(np.diff(shift)))
    return savgol_filter(block, window, order, deriv=deriv, delta=delta, axis=-1, mode="interp")


def whittaker_smooth(block, shift=None, *, lam: float = 10.0):
    """Whittaker smoother (Eilers 2003, Anal. Chem. 75:3631): argmin ‖y − z‖² + λ‖Δ²z‖².

    Examples
    --------
    >>> line = np.linspace(0, 5, 50)
    >>> bool(np.allclose(whittaker_smooth(line, lam=1e3), line))
    True
    """
    from ._banded import weighted_whittaker

    b = np.atleast_2d(np.asarray(block, dtype=np.float64))
    if lam == 0:
        return b.reshape(np.shape(block)).copy()
    z = weighted_whittaker(np.ones_like(b), b, lam)
    return z.reshape(np.shape(block))
