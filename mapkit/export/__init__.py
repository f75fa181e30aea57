"""Write results: NeXus/HDF5, TIFF with physical pixel size, figures."""

from .atomic import atomic_path
from .figures import save_image_figure, save_spectra_figure
from .nexus import write_map, write_results_file
from .tiff import write_tiff

__all__ = ["atomic_path", "write_map", "write_results_file", "write_tiff",
           "save_image_figure", "save_spectra_figure"]
