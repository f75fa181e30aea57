"""Names and paths of the mapkit HDF5 layout (NeXus NXdata convention).

Readers and writers both take their paths from here, so the documented layout
(docs/file-layout.md) and the code cannot drift apart.
"""

ENTRY = "/entry"
MAP = "/entry/map"
INTENSITY = "/entry/map/intensity"
MASK = "/entry/map/mask"
INSTRUMENT = "/entry/instrument"
LASER = "/entry/instrument/laser_wavelength"
PROVENANCE = "/entry/provenance"
RESULTS = "/entry/results"
#: the optical micrograph (NXdata, axes in µm of its own frame) and its placement on the map
OPTICAL = "/entry/optical"
OPTICAL_REGISTRATION = "/entry/optical_registration"

AXES = ("y", "x", "raman_shift")
#: a depth section (rows are nominal depths) and a volume; ``/entry/map/z`` holds the depths
SECTION_AXES = ("z", "x", "raman_shift")
VOLUME_AXES = ("z", "y", "x", "raman_shift")
AXIS_UNITS = {"z": "um", "y": "um", "x": "um", "raman_shift": "1/cm"}

#: Target size of one HDF5 chunk of the cube. Chunks always hold whole
#: spectra, so reading one pixel touches one chunk.
CHUNK_BYTES = 1 << 20
#: h5py chunk cache per open file; above the chunk size so a tile is read once.
CHUNK_CACHE_BYTES = 64 << 20
#: Size of one read task in whole-map passes: whole chunks grouped (one file open and one
#: HDF5 call per block; 2.2x faster than chunk-sized tasks, benchmarks/RESULTS.md).
#: The viewer keeps chunk-sized reads: a cursor touches one chunk, not a block.
READ_BYTES = 8 << 20


def cube_tile(shape, itemsize: int = 4) -> tuple[int, ...]:
    """HDF5 chunk shape of a 3-D cube, or of a volume (one depth layer deep).

    Examples
    --------
    >>> cube_tile((4, 48, 64, 600))
    (1, 16, 16, 600)
    """
    if len(shape) == 4:
        return (1,) + pixel_tile(*shape[1:], itemsize=itemsize)
    return pixel_tile(*shape, itemsize=itemsize)


def pixel_tile(ny: int, nx: int, n_shift: int, itemsize: int = 4) -> tuple[int, int, int]:
    """HDF5 chunk shape (ty, tx, n_shift) of about CHUNK_BYTES holding whole spectra.

    Examples
    --------
    >>> pixel_tile(48, 64, 600)
    (16, 16, 600)
    >>> pixel_tile(1, 5, 10)
    (1, 5, 10)
    """
    per_chunk = max(1, CHUNK_BYTES // max(1, n_shift * itemsize))
    side = 1
    while (side * 2) ** 2 <= per_chunk:
        side *= 2
    return min(side, ny), min(side, nx), n_shift
