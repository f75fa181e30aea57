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
