"""Open HDF5 files read-only, and read a cube from any dataset by path."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from .. import layout
from ..core.ramanmap import DIMS, RamanMap
from ..errors import MapkitError

_AXIS_ALIASES = {"y": "y", "row": "y", "x": "x", "col": "x", "column": "x",
                 "raman_shift": "raman_shift", "shift": "raman_shift", "s": "raman_shift",
                 "wavenumber": "raman_shift"}


def open_h5(path):
    """Open ``path`` read-only with a chunk cache sized for whole-spectrum tiles."""
    import h5py

    path = Path(path)
    if not path.exists():
        raise MapkitError("file not found", file=path, fix="check the path")
    if path.is_dir():
        raise MapkitError("this is a folder, not a file", file=path, fix="give a map file")
    try:
        return h5py.File(path, "r", rdcc_nbytes=layout.CHUNK_CACHE_BYTES)
    except OSError as exc:
        raise MapkitError(f"not a readable HDF5 file ({str(exc).split('(')[0].strip()})",
                          file=path, fix="give an HDF5/NeXus map or a text table") from None


def dataset(f, name: str, *, source, hint: str):
    """The dataset at ``name`` or a one-line error saying how to fix the file."""
    import h5py

    obj = f.get(name)
    if obj is None:
        raise MapkitError("dataset is missing", file=source, field=name, fix=hint)
    if not isinstance(obj, h5py.Dataset):
        raise MapkitError("this is a group, not a dataset", file=source, field=name, fix=hint)
    return obj


def _read_chunk(path, name, block_info=None):
    """Read one chunk of an HDF5 dataset by file path (picklable: works on any Dask worker)."""
    import h5py

    loc = block_info[None]["array-location"]
    with h5py.File(path, "r", rdcc_nbytes=layout.CHUNK_CACHE_BYTES) as f:
        return f[name][tuple(slice(a, b) for a, b in loc)]


def lazy_cube(dset, *, source, field: str, block_bytes: int | None = None):
    """A Dask array over an HDF5 dataset: nothing is read until asked.

    Each chunk task opens the file by path and reads its slice, so the array can be
    computed by threads or by the worker processes of a Dask cluster alike. By default a
    Dask chunk is one file chunk (a pixel read touches the least data: what the viewer
    wants); ``block_bytes`` groups whole file chunks along x, then y, into reads of about
    that size (what a pass over the whole cube wants: one file open and one HDF5 call per
    block instead of per tile).
    """
    import dask.array as da

    if dset.dtype.kind not in "iuf":
        raise MapkitError(f"intensity dtype {dset.dtype} is not numeric", file=source,
                          field=field, fix="store counts as integers or floats")
    if 0 in dset.shape:
        raise MapkitError(f"dataset is empty (shape {dset.shape})", file=source, field=field,
                          fix="store at least one pixel and one channel")
    chunks = dset.chunks or layout.pixel_tile(*dset.shape[:2], dset.shape[-1])
    if len(dset.shape) == 3:
        chunks = (chunks[0], chunks[1], dset.shape[2])
        if block_bytes:
            chunks = _grouped_tiles(chunks, dset.shape, dset.dtype.itemsize, block_bytes)
    normalized = da.core.normalize_chunks(chunks, dset.shape)
    return da.map_blocks(_read_chunk, str(Path(dset.file.filename).resolve()), dset.name,
                         chunks=normalized, dtype=dset.dtype,
                         meta=np.empty((0,) * len(dset.shape), dset.dtype))


def _grouped_tiles(tile, shape, itemsize, block_bytes):
    """Chunk shape of whole ``tile``s, about ``block_bytes``: along x first, then y.

    Examples
    --------
    >>> _grouped_tiles((16, 16, 1024), (1000, 1000, 1024), 4, 8 << 20)
    (16, 128, 1024)
    >>> _grouped_tiles((16, 16, 600), (48, 64, 600), 4, 8 << 20)
    (48, 64, 600)
    """
    ty, tx, ns = tile
    ny, nx = shape[:2]
    per_block = max(1, block_bytes // max(1, ty * tx * ns * itemsize))
    kx = min(-(-nx // tx), per_block)
    ky = min(-(-ny // ty), max(1, per_block // kx)) if kx * tx >= nx else 1
    return min(ky * ty, ny), min(kx * tx, nx), ns


def parse_axes(axes) -> tuple[str, str, str]:
    """Normalise an axis-order statement such as ``"x,y,shift"`` to canonical names.

    Examples
    --------
    >>> parse_axes("shift, x, y")
    ('raman_shift', 'x', 'y')
    """
    parts = axes.split(",") if isinstance(axes, str) else list(axes)
    names = tuple(_AXIS_ALIASES.get(p.strip().lower(), p.strip()) for p in parts)
    if sorted(names) != sorted(DIMS):
        raise MapkitError(f"axis order {axes!r} must name y, x and raman_shift once each",
                          field="axes", fix="for example --axes y,x,raman_shift")
    return names


def read_hdf5_dataset(path, dataset_path: str, *, axes, shift_path: str,
                      x_path: str | None = None, y_path: str | None = None,
                      pixel_size: float | None = None, laser_wavelength=None) -> RamanMap:
    """A map from any 3-D HDF5 dataset, with its axis order stated by the caller.

    Parameters
    ----------
    path : path-like
    dataset_path : str
        Path of the intensity cube inside the file.
    axes : str or sequence
        The cube's axis order, e.g. ``"x,y,raman_shift"``; it is transposed to
        mapkit's ``(y, x, raman_shift)``.
    shift_path : str
        Dataset holding the Raman shift of each channel (cm⁻¹).
    x_path, y_path : str, optional
        Datasets holding stage positions in µm. Without them, ``pixel_size``
        (µm) must be given and positions start at 0.
    """
    order = parse_axes(axes)
    with open_h5(path) as f:
        return _read_dataset(f, path, dataset_path, order, shift_path, x_path, y_path,
                             pixel_size, laser_wavelength)


def _read_dataset(f, path, dataset_path, order, shift_path, x_path, y_path, pixel_size,
                  laser_wavelength):
    hint = "give the path of a dataset inside the file (see h5ls -r)"
    cube_ds = dataset(f, dataset_path, source=path, hint=hint)
    if cube_ds.ndim != 3:
        raise MapkitError(f"dataset has rank {cube_ds.ndim}, a map needs 3 (y, x, shift)",
                          file=path, field=dataset_path, fix="point to the 3-D cube")
    cube = lazy_cube(cube_ds, source=path, field=dataset_path)
    cube = cube.transpose([order.index(d) for d in DIMS])
    ny, nx, _ = cube.shape
    shift = dataset(f, shift_path, source=path, hint=hint)[...]

    def positions(p, n, name):
        if p is not None:
            return dataset(f, p, source=path, hint=hint)[...]
        if pixel_size is None:
            raise MapkitError(f"no {name} positions given", file=path, field=name,
                              fix=f"pass the {name} dataset path or the pixel size in um")
        return np.arange(n) * float(pixel_size)

    return RamanMap(cube, raman_shift=shift, x=positions(x_path, nx, "x"),
                    y=positions(y_path, ny, "y"), laser_wavelength=laser_wavelength,
                    source=str(path))
