"""Put numbers on images: calibrations, concentration maps with uncertainty, region
statistics and physical quantities."""

from .calibration import LinearCalibration, PolynomialCalibration
from .concentration import concentration_map, response_fraction
from .model import QuantModel
from .physics import (crystallite_size, crystallite_size_map, stokes_antistokes_ratio,
                      temperature_from_ratio, temperature_map)
from .pls import PLSCalibration
from .regions import class_regions, polygon_mask, region_statistics
from .response import Response

__all__ = ["LinearCalibration", "PolynomialCalibration", "PLSCalibration", "QuantModel",
           "Response", "concentration_map", "response_fraction", "region_statistics",
           "polygon_mask", "class_regions", "stokes_antistokes_ratio", "temperature_from_ratio",
           "temperature_map", "crystallite_size", "crystallite_size_map"]
