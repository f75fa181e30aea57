"""Conversions between Raman shift, absolute wavenumber and wavelength (air, vacuum)."""

from __future__ import annotations

import numpy as np

from ..errors import MapkitError


def _check_laser(laser_nm):
    if laser_nm is None or not np.isfinite(laser_nm) or laser_nm <= 0:
        raise MapkitError("the laser wavelength is unknown or not positive", field="laser_wavelength",
                          fix="give the excitation wavelength in nm (e.g. --laser 532)")
    return float(laser_nm)


def shift_to_wavelength(shift, laser_nm):
    """Scattered (vacuum) wavelength in nm of a Raman shift in cm⁻¹.

    Uses Δν̃ = 10⁷/λ₀ − 10⁷/λ; positive shifts are Stokes, negative anti-Stokes.

    Examples
    --------
    >>> round(float(shift_to_wavelength(520.7, 532.0)), 3)
    547.157
    """
    laser_nm = _check_laser(laser_nm)
    return 1e7 / (1e7 / laser_nm - np.asarray(shift, dtype=float))


def wavelength_to_shift(wavelength_nm, laser_nm):
    """Raman shift in cm⁻¹ of a scattered (vacuum) wavelength in nm.

    Examples
    --------
    >>> round(float(wavelength_to_shift(547.157, 532.0)), 1)
    520.7
    """
    laser_nm = _check_laser(laser_nm)
    return 1e7 / laser_nm - 1e7 / np.asarray(wavelength_nm, dtype=float)


def air_refractive_index(vacuum_nm):
    """Refractive index of standard air (Birch & Downs 1994, Metrologia 31:315, as in Morton 2000)."""
    s2 = (1e3 / np.asarray(vacuum_nm, dtype=float)) ** 2  # (1/λ in µm)²
    return 1 + 8.34254e-5 + 0.02406147 / (130 - s2) + 1.5998e-4 / (38.9 - s2)


def vacuum_to_air(vacuum_nm):
    """Wavelength in standard air of a vacuum wavelength (both nm)."""
    vacuum_nm = np.asarray(vacuum_nm, dtype=float)
    return vacuum_nm / air_refractive_index(vacuum_nm)


def air_to_vacuum(air_nm, iterations: int = 4):
    """Vacuum wavelength of an air wavelength (nm), by fixed-point iteration of n(λ_vac).

    Examples
    --------
    >>> round(float(air_to_vacuum(632.816)), 3)
    632.991
    """
    air_nm = np.asarray(air_nm, dtype=float)
    vac = air_nm * 1.00027
    for _ in range(iterations):
        vac = air_nm * air_refractive_index(vac)
    return vac


def crop_indices(shift, lo, hi):
    """Channel indices whose shift lies in [lo, hi] cm⁻¹ (either axis direction)."""
    shift = np.asarray(shift)
    idx = np.flatnonzero((shift >= min(lo, hi)) & (shift <= max(lo, hi)))
    if idx.size == 0:
        raise MapkitError(f"no channel lies in {lo:g}-{hi:g} 1/cm "
                          f"(the map covers {shift.min():.1f}-{shift.max():.1f})",
                          field="range", fix="choose a range inside the map's shift axis")
    return idx


def resample_matrix(source, target):
    """Linear-interpolation indices and weights from ``source`` onto ``target`` (both 1-D).

    Returns ``(i, f)`` with ``out = y[:, i] * (1 - f) + y[:, i + 1] * f``; the source axis
    may run in either direction. Targets outside the source range are an error.
    """
    src = np.asarray(source, float)
    tgt = np.asarray(target, float)
    flip = src[0] > src[-1]
    s = src[::-1] if flip else src
    if tgt.min() < s[0] - 1e-9 or tgt.max() > s[-1] + 1e-9:
        raise MapkitError(f"the new axis {tgt.min():g}-{tgt.max():g} 1/cm reaches outside the "
                          f"data ({s[0]:g}-{s[-1]:g})", field="raman_shift",
                          fix="choose start and stop inside the measured range")
    i = np.clip(np.searchsorted(s, tgt, side="right") - 1, 0, s.size - 2)
    f = (tgt - s[i]) / (s[i + 1] - s[i])
    if flip:  # index pairs in the original, descending order: (j, j+1) with j = n-2-i
        return s.size - 2 - i, 1 - f
    return i, f


def resample(block, source, target):
    """Spectra linearly interpolated from the ``source`` onto the ``target`` shift axis.

    Examples
    --------
    >>> resample(np.array([[0.0, 10.0, 20.0]]), [100, 200, 300], [150, 250]).tolist()
    [[5.0, 15.0]]
    """
    b = np.atleast_2d(np.asarray(block, dtype=np.float64))
    i, f = resample_matrix(source, target)
    return b[:, i] * (1 - f) + b[:, i + 1] * f


def bin_cube(cube, mask, factor: int):
    """Average ``factor`` x ``factor`` pixel tiles, ignoring masked pixels.

    Returns the binned cube, the binned mask (a tile is masked when all its pixels are)
    and the number of trailing rows and columns dropped to fit whole tiles.
    """
    cube = np.asarray(cube, dtype=np.float64)
    ny, nx, ns = cube.shape
    by, bx = ny // factor, nx // factor
    if by == 0 or bx == 0:
        raise MapkitError(f"binning by {factor} leaves no pixel of a {ny} x {nx} map",
                          field="factor", fix="choose a smaller factor")
    c = cube[:by * factor, :bx * factor].reshape(by, factor, bx, factor, ns)
    good = ~np.asarray(mask)[:by * factor, :bx * factor].reshape(by, factor, bx, factor)
    w = good[..., None].astype(np.float64)
    count = w.sum(axis=(1, 3))
    total = (c * w).sum(axis=(1, 3))
    out = np.zeros_like(total)
    np.divide(total, count, out=out, where=count > 0)
    return out, count[..., 0] == 0, (ny - by * factor, nx - bx * factor)
