"""From cube to images: band images, factorisations, classes and unmixing."""

from .bands import band_image, band_integral
from .factorise import NMFComponents
from .segment import KMeansClasses
from .unmix import ReferenceUnmixing, nnls_batch

__all__ = ["band_integral", "band_image", "NMFComponents", "KMeansClasses",
           "ReferenceUnmixing", "nnls_batch"]
