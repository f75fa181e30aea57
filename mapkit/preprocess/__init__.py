"""Clean every spectrum: spikes, baselines, smoothing, normalisation, axis, quality.

Each step is a function on a block of spectra ``(n_pixels, n_shift)`` plus the
shift axis, so the same code runs on a numpy cube and chunk-wise on Dask; the
map-level wrappers in :mod:`mapkit.preprocess.steps` add provenance.
"""

from .axis import (air_to_vacuum, shift_to_wavelength, vacuum_to_air, wavelength_to_shift)
from .baseline import als_baseline
from .normalise import normalise
from .quality import bad_pixel_mask
from .smooth import savgol
from .spikes import spatial_spike_mask, spectral_spike_mask
from .steps import (flag_bad_pixels, normalise_map, remove_baseline, remove_spikes)

__all__ = ["als_baseline", "normalise", "savgol", "bad_pixel_mask", "spatial_spike_mask",
           "spectral_spike_mask", "shift_to_wavelength", "wavelength_to_shift",
           "air_to_vacuum", "vacuum_to_air", "remove_spikes", "remove_baseline",
           "normalise_map", "flag_bad_pixels"]
