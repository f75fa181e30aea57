"""Maps of physical quantities derived from band intensities, with their formulas."""

from __future__ import annotations

import numpy as np
from scipy import constants

from ..core.ramanmap import RamanMap
from ..core.result import Field, Result
from ..errors import MapkitError
from ..reduce._common import image_axes

#: second radiation constant c₂ = hc/k in cm·K (CODATA, through scipy.constants)
C2_CM_K = constants.h * constants.c / constants.k * 100


#: caution that goes with every temperature: the ratio is only absolute after correction
RESPONSE_CAUTION = ("the anti-Stokes/Stokes ratio gives an absolute temperature only after "
                    "correcting both bands for the instrument's relative spectral response "
                    "(detector efficiency, grating, filters) at their two wavelengths")

#: frequency-factor exponent: 3 for photon-counting detectors (CCDs, the usual case in
#: Raman microscopes), 4 for detectors that measure energy (Malyj & Griffiths 1983,
#: Appl. Spectrosc. 37:315; from memory)
PHOTON_COUNTING, ENERGY_DETECTION = 3, 4


def stokes_antistokes_ratio(temperature_k, shift_cm, laser_nm, exponent: int = PHOTON_COUNTING):
    """I_aS/I_S = [(ν̃₀ + ν̃ₘ)/(ν̃₀ − ν̃ₘ)]ⁿ · exp(−hcν̃ₘ/kT).

    The Boltzmann factor of the excited vibrational population times the frequency
    factor of the scattered light: n = 3 (the default) for photon-counting detectors
    (CCDs), n = 4 for detectors that measure energy. Measured intensities must be
    corrected for the instrument's relative spectral response at the two wavelengths
    before they are compared with this ratio.

    Examples
    --------
    >>> round(float(stokes_antistokes_ratio(298.15, 520.7, 532.0)), 4)
    0.0957
    >>> round(float(stokes_antistokes_ratio(298.15, 520.7, 532.0, exponent=4)), 4)
    0.1012
    """
    nu0 = 1e7 / laser_nm
    nu = np.asarray(shift_cm, float)
    freq = ((nu0 + nu) / (nu0 - nu)) ** exponent
    return freq * np.exp(-C2_CM_K * nu / np.asarray(temperature_k, float))


def temperature_from_ratio(ratio, shift_cm, laser_nm, exponent: int = PHOTON_COUNTING):
    """Temperature (K) from an anti-Stokes/Stokes intensity ratio (inverse of the above).

    ``exponent`` 3 (default) for photon-counting detectors, 4 for energy detection; reading
    a photon-count ratio with 4 biases a 298 K sample by about −6 K. The ratio must be
    corrected for the relative spectral response first (:data:`RESPONSE_CAUTION`).
    """
    nu0 = 1e7 / laser_nm
    nu = float(shift_cm)
    freq = ((nu0 + nu) / (nu0 - nu)) ** exponent
    ratio = np.asarray(ratio, float)
    with np.errstate(divide="ignore", invalid="ignore"):
        t = C2_CM_K * nu / np.log(freq / ratio)
    return np.where((ratio > 0) & (ratio < freq), t, np.nan)


def temperature_map(m: RamanMap, shift_cm: float, half_width: float, *, laser_nm=None,
                    exponent: int = PHOTON_COUNTING, name: str = "temperature") -> Result:
    """Temperature image from the integrated Stokes (+ν̃ₘ) and anti-Stokes (−ν̃ₘ) bands.

    ``exponent``: 3 (photon counting, default) or 4 (energy detection). The bands are used
    as measured: unless the map was corrected for the instrument's relative spectral
    response, the temperature is not absolute (the summary carries that caution).
    """
    if exponent not in (PHOTON_COUNTING, ENERGY_DETECTION):
        raise MapkitError(f"frequency-factor exponent {exponent!r} is not 3 or 4",
                          file=m.source, field="exponent",
                          fix="use 3 (photon-counting detector) or 4 (energy detection)")
    from ..reduce.bands import band_integral

    laser = laser_nm or m.laser_wavelength
    if laser is None:
        raise MapkitError("the laser wavelength is needed for the frequency factor",
                          file=m.source, field="laser_wavelength", fix="pass --laser NM")
    shift = m.raman_shift
    if shift.min() > -shift_cm + half_width or shift.max() < shift_cm - half_width:
        raise MapkitError(f"the map must cover both -{shift_cm:g} and +{shift_cm:g} 1/cm",
                          file=m.source, field="raman_shift",
                          fix="measure the anti-Stokes side too")
    cube = np.asarray(m.load().intensity, float)
    stokes = band_integral(cube, shift, shift_cm - half_width, shift_cm + half_width)
    anti = band_integral(cube, shift, -shift_cm - half_width, -shift_cm + half_width)
    ratio = np.divide(anti, stokes, out=np.full(stokes.shape, np.nan), where=stokes > 0)
    temp = temperature_from_ratio(ratio, shift_cm, laser, exponent)
    temp[m.mask] = np.nan
    return Result(name, "stokes_antistokes", {"shift": shift_cm, "half_width": half_width,
                                              "laser_nm": laser, "exponent": exponent},
                  {"temperature": Field("temperature", temp, image_axes(m), "K",
                                        long_name="anti-Stokes/Stokes temperature"),
                   "ratio": Field("ratio", ratio, image_axes(m), "",
                                  long_name="anti-Stokes / Stokes intensity")},
                  {"median_K": float(np.nanmedian(temp)) if np.isfinite(temp).any() else None,
                   "detector": "photon counting" if exponent == PHOTON_COUNTING
                   else "energy detection", "caution": RESPONSE_CAUTION})


#: L_a range (nm) over which the Cançado relation was calibrated: about 20 to 500 nm
#: (Cançado et al. 2006, from memory); below ~10-20 nm the D band weakens again as the
#: rings themselves break up (Ferrari & Robertson 2000, Phys. Rev. B 61:14095) and I_D/I_G
#: no longer falls as 1/L_a, so smaller values are flagged rather than trusted
CANCADO_VALID_NM = (20.0, 500.0)


def crystallite_size(id_ig, laser_nm):
    """In-plane crystallite size L_a (nm) of nanographitic carbon from I_D/I_G (areas).

    L_a = 2.4×10⁻¹⁰ · λ⁴ · (I_D/I_G)⁻¹ with λ in nm (Cançado et al. 2006, Appl. Phys.
    Lett. 88:163106; constant from memory).

    Examples
    --------
    >>> round(float(crystallite_size(1.0, 532.0)), 1), round(float(crystallite_size(1.0, 514.5)), 1)
    (19.2, 16.8)
    """
    ratio = np.asarray(id_ig, float)
    return np.divide(2.4e-10 * laser_nm ** 4, ratio, out=np.full(ratio.shape, np.nan),
                     where=ratio > 0)


def crystallite_size_map(m: RamanMap, *, laser_nm=None, d_band=(1250.0, 1450.0),
                         g_band=(1500.0, 1650.0), name: str = "crystallite_size") -> Result:
    """L_a image from the integrated D (≈1350 cm⁻¹) and G (≈1580 cm⁻¹) bands.

    Pixels whose L_a falls outside :data:`CANCADO_VALID_NM` read 1 in the
    ``outside_validity`` field (their value is kept but is not a measurement).
    """
    from ..reduce.bands import band_integral

    laser = laser_nm or m.laser_wavelength
    if laser is None:
        raise MapkitError("the laser wavelength is needed (L_a scales with λ⁴)", file=m.source,
                          field="laser_wavelength", fix="pass --laser NM")
    cube = np.asarray(m.load().intensity, float)
    d = band_integral(cube, m.raman_shift, *d_band)
    g = band_integral(cube, m.raman_shift, *g_band)
    ratio = np.divide(d, g, out=np.full(d.shape, np.nan), where=g > 0)
    la = crystallite_size(ratio, laser)
    la[m.mask] = np.nan
    lo, hi = CANCADO_VALID_NM
    outside = np.isfinite(la) & ((la < lo) | (la > hi))
    return Result(name, "cancado_2006", {"laser_nm": laser, "d_band": list(d_band),
                                         "g_band": list(g_band)},
                  {"crystallite_size": Field("crystallite_size", la, image_axes(m), "nm",
                                             long_name="L_a (Cancado 2006)"),
                   "id_ig": Field("id_ig", ratio, image_axes(m), "", long_name="I_D/I_G (areas)"),
                   "outside_validity": Field("outside_validity", outside.astype(np.uint8),
                                             image_axes(m), "",
                                             long_name=f"1 = L_a outside {lo:g}-{hi:g} nm, "
                                                       "where the relation holds")},
                  {"median_nm": float(np.nanmedian(la)) if np.isfinite(la).any() else None,
                   "valid_range_nm": [lo, hi], "outside_validity": int(outside.sum())})
