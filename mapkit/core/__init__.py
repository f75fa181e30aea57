"""The map type and the provenance record that travel through every stage."""

from .provenance import Step, library_versions
from .ramanmap import RamanMap

__all__ = ["RamanMap", "Step", "library_versions"]
