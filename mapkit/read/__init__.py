"""Read maps and reference spectra from files.

:func:`open_map` opens any map mapkit understands; the format is chosen from
the file's content and name, never from a guess about axis order.
"""

from .dispatch import open_map
from .reference import Spectrum, read_library, read_reference
from .stack import read_depth_stack, stack_depths

__all__ = ["open_map", "read_reference", "read_library", "Spectrum", "read_depth_stack",
           "stack_depths"]
