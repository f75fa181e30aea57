"""mapkit: from hyperspectral Raman maps to component images, classes and concentrations.

The package mirrors the pipeline: :mod:`mapkit.read` → :mod:`mapkit.preprocess`
→ :mod:`mapkit.reduce` → :mod:`mapkit.quantify` → :mod:`mapkit.export`.
"""

from ._version import __version__
from .core import RamanMap, Step
from .errors import MapkitError

__all__ = ["RamanMap", "Step", "MapkitError", "__version__"]
