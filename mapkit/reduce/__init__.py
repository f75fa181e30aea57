"""From cube to images: band images, peak fits, factorisations, classes, unmixing, matching."""

from .bands import band_centroid, band_height, band_image, band_integral, band_ratio_image
from .endmembers import vca
from .factorise import (MCRALS, BackgroundMCR, NMFComponents, PCAScores,
                        choose_n_components, component_number_guidance)
from .match import correlation, hit_quality_index, match_library
from .peakfit import fit_peaks, peak_fit_map, silicon_stress, stress_result
from .segment import DominantClasses, KMeansClasses, class_domains, class_number_guidance
from .spectra import region_spectrum
from .unmix import ReferenceUnmixing, choose_baseline_order, nnls_batch, unmix_spectra

__all__ = ["band_integral", "band_height", "band_centroid", "band_image", "band_ratio_image",
           "vca", "PCAScores", "NMFComponents", "MCRALS", "BackgroundMCR", "DominantClasses",
           "choose_baseline_order", "KMeansClasses", "class_domains",
           "class_number_guidance", "component_number_guidance", "choose_n_components",
           "ReferenceUnmixing", "nnls_batch", "unmix_spectra",
           "fit_peaks", "peak_fit_map", "silicon_stress", "stress_result",
           "hit_quality_index", "correlation", "match_library", "region_spectrum"]
