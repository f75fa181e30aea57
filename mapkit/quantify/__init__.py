"""Put numbers on images: calibrations and concentration maps with uncertainty."""

from .calibration import LinearCalibration
from .concentration import concentration_map, response_fraction

__all__ = ["LinearCalibration", "concentration_map", "response_fraction"]
