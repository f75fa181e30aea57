"""Open HDF5 files read-only, and read a cube from any dataset by path."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from .. import layout
from ..core.ramanmap import DIMS, SECTION_DIMS, VOLUME_DIMS, RamanMap, check_axis
from ..errors import MapkitError
from .dispatch import read_steps

_AXIS_ALIASES = {"y": "y", "row": "y", "x": "x", "col": "x", "column": "x",
                 "raman_shift": "raman_shift", "shift": "raman_shift", "s": "raman_shift",
                 "wavenumber": "raman_shift", "z": "z", "depth": "z"}


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
        raise MapkitError(f"not a readable HDF5 file ({str(exc).split('(')[0].strip()}; it "
                          "may be truncated or corrupt, or in another format)", file=path,
                          fix="give an HDF5/NeXus map or a text table; copy a truncated file "
                              "again") from None


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
    chunks = dset.chunks or (layout.cube_tile(dset.shape) if len(dset.shape) in (3, 4)
                             else layout.pixel_tile(*dset.shape[:2], dset.shape[-1]))
    if len(dset.shape) == 4:
        chunks = tuple(chunks[:3]) + (dset.shape[3],)
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


_PIXEL = ("pixel", "pixels", "point", "points", "spectrum", "spectra")

#: spellings of units on a foreign shift dataset: Raman shift in cm⁻¹, or wavelength in nm
SHIFT_UNITS = ("1/cm", "cm-1", "cm^-1", "cm**-1", "cm⁻¹", "1/cm⁻¹", "rcm", "wavenumber",
               "wavenumbers", "raman shift", "raman_shift", "/cm")
WAVELENGTH_UNITS = ("nm", "nanometer", "nanometers", "nanometre", "nanometres")
#: spellings of position units and their factor to µm
POSITION_UNITS = {"um": 1.0, "µm": 1.0, "μm": 1.0, "micron": 1.0, "microns": 1.0,
                  "micrometer": 1.0, "micrometre": 1.0, "micrometers": 1.0,
                  "micrometres": 1.0, "mm": 1e3, "nm": 1e-3, "m": 1e6}


def parse_axes(axes, ndim: int = 3) -> tuple[str, ...]:
    """Normalise an axis-order statement such as ``"x,y,shift"`` to canonical names.

    A 3-D cube names y, x and raman_shift once each; a 2-D stack of spectra names
    ``pixel`` and raman_shift.

    Examples
    --------
    >>> parse_axes("shift, x, y")
    ('raman_shift', 'x', 'y')
    >>> parse_axes("spectrum,shift", ndim=2)
    ('pixel', 'raman_shift')
    """
    parts = axes.split(",") if isinstance(axes, str) else list(axes)
    names = tuple("pixel" if p.strip().lower() in _PIXEL else
                  _AXIS_ALIASES.get(p.strip().lower(), p.strip()) for p in parts)
    want = {3: SECTION_DIMS if "z" in names else DIMS, 4: VOLUME_DIMS}.get(
        ndim, ("pixel", "raman_shift"))
    if sorted(names) != sorted(want):
        example = {3: "y,x,raman_shift (a depth section: z,x,raman_shift)",
                   4: "z,y,x,raman_shift"}.get(ndim, "pixel,raman_shift")
        raise MapkitError(f"axis order {axes!r} must name {', '.join(want[:-1])} and "
                          f"raman_shift once each for a {ndim}-D dataset", field="--axes",
                          fix=f"for example --axes {example}")
    return names


def _units(d):
    u = d.attrs.get("units", d.attrs.get("unit"))
    if isinstance(u, bytes):
        u = u.decode("utf-8", "replace")
    if isinstance(u, np.ndarray) and u.size == 1:
        u = u.item()
        u = u.decode("utf-8", "replace") if isinstance(u, bytes) else u
    return None if u is None else str(u).strip()


def read_hdf5_dataset(path, dataset_path: str, *, axes, shift_path: str,
                      x_path: str | None = None, y_path: str | None = None,
                      pixel_size: float | None = None, laser_wavelength=None,
                      position_tolerance: float | None = None,
                      z_path: str | None = None) -> RamanMap:
    """A map from any 3-D HDF5 dataset, or a 2-D stack of spectra with positions.

    Parameters
    ----------
    path : path-like
    dataset_path : str
        Path of the intensity cube inside the file: 3-D ``(y, x, raman_shift)`` in any
        order, or 2-D ``(pixel, raman_shift)`` in either order.
    axes : str or sequence
        The dataset's axis order, e.g. ``"x,y,raman_shift"`` or ``"pixel,raman_shift"``;
        it is transposed to mapkit's ``(y, x, raman_shift)``. It is checked against
        what the file can confirm: HDF5 dimension labels, the length of the shift
        dataset and of the position datasets.
    shift_path : str
        Dataset holding the shift axis. Its ``units`` attribute is honoured: cm⁻¹
        spellings (``1/cm``, ``cm-1``, ``cm^-1``, ``cm⁻¹``) are read as Raman shift, ``nm``
        as scattered wavelength, converted with ``laser_wavelength`` (refused without
        it); other units are refused. Without ``units`` the axis is read as cm⁻¹.
    x_path, y_path : str, optional
        Datasets holding stage positions in µm (``units`` um, mm, nm or m are
        converted): one per column/row of a cube, or one per spectrum of a 2-D stack.
        Without them, ``pixel_size`` (µm) must be given and positions start at 0.
    z_path : str, optional
        For a depth section (``axes`` naming ``z, x, raman_shift``) or a volume (``z, y, x,
        raman_shift``): the dataset of nominal depths in µm, one per layer (required).
        A section's y is then a single position (``y_path`` with one value, else 0).
    position_tolerance : float, optional
        For a 2-D stack: snap positions within this many µm onto a grid.

    What the reader converted or could not confirm is recorded as ``read`` steps in
    the map's provenance (:func:`mapkit.read.dispatch.read_notes`).
    """
    with open_h5(path) as f:
        return _read_dataset(f, path, dataset_path, axes, shift_path, x_path, y_path,
                             pixel_size, laser_wavelength, position_tolerance, z_path)


def _shift_axis(f, path, shift_path, laser_wavelength, hint):
    """The shift dataset as Raman shift in cm⁻¹, and a note of what was done to it."""
    d = dataset(f, shift_path, source=path, hint=hint)
    values = np.asarray(d[...], dtype=np.float64)
    units = _units(d)
    if units is None:
        return values, f"{shift_path} has no units attribute: read as Raman shift in 1/cm"
    key = units.lower().replace(" ", "")
    if key in {u.replace(" ", "") for u in SHIFT_UNITS}:
        return values, None
    if key in WAVELENGTH_UNITS:
        if laser_wavelength is None:
            raise MapkitError("the shift axis is a wavelength in nm, and the laser wavelength "
                              "is unknown", file=path, field=f"{shift_path} (units)",
                              fix="pass --laser NM to convert it to Raman shift, or store the "
                                  "axis in 1/cm")
        from ..preprocess.axis import wavelength_to_shift

        if values.ndim == 1 and values.size and np.nanmin(values) <= 0:
            raise MapkitError("a wavelength axis holds zero or negative values", file=path,
                              field=shift_path, fix="store wavelengths in nm")
        shift = wavelength_to_shift(values, laser_wavelength)
        return shift, (f"{shift_path} is in nm: converted to Raman shift with the "
                       f"{float(laser_wavelength):g} nm laser (10^7/laser - 10^7/wavelength; "
                       f"{shift.min():.1f} to {shift.max():.1f} 1/cm)")
    raise MapkitError(f"shift axis units {units!r} are neither Raman shift (1/cm) nor "
                      "wavelength (nm)", file=path, field=f"{shift_path} (units)",
                      fix="set the units attribute to 1/cm or nm, or convert the axis")


def _positions(f, path, p, hint):
    d = dataset(f, p, source=path, hint=hint)
    values = np.asarray(d[...], dtype=np.float64)
    units = _units(d)
    if units is None:
        return values
    factor = POSITION_UNITS.get(units) or POSITION_UNITS.get(units.lower())
    if factor is None:
        raise MapkitError(f"position units {units!r} are not a length", file=path,
                          field=f"{p} (units)", fix="store positions in um (or mm, nm, m)")
    return values * factor


def _dimension_labels(cube_ds):
    """Axis names the file itself gives the dataset (HDF5 dimension labels), or None."""
    try:
        labels = [dim.label for dim in cube_ds.dims]
    except Exception:  # pragma: no cover - h5py without dimension-scale support
        return None
    if not all(labels):
        return None
    names = tuple("pixel" if lb.strip().lower() in _PIXEL else
                  _AXIS_ALIASES.get(lb.strip().lower()) for lb in labels)
    return names if all(names) and len(set(names)) == len(names) else None


def _read_dataset(f, path, dataset_path, axes, shift_path, x_path, y_path, pixel_size,
                  laser_wavelength, position_tolerance=None, z_path=None):
    hint = "give the path of a dataset inside the file (see h5ls -r)"
    cube_ds = dataset(f, dataset_path, source=path, hint=hint)
    if cube_ds.ndim not in (2, 3, 4):
        raise MapkitError(f"dataset has rank {cube_ds.ndim}, a map needs 3 (y, x, shift) or 2 "
                          "(pixel, shift) with position datasets", file=path,
                          field=dataset_path, fix="point to the 3-D cube")
    parts = axes.split(",") if isinstance(axes, str) else list(axes)
    if len(parts) != cube_ds.ndim:
        raise MapkitError(f"dataset has rank {cube_ds.ndim} but --axes {axes!r} names "
                          f"{len(parts)} dimensions", file=path, field=dataset_path,
                          fix="point to the 3-D cube (y, x, raman_shift in any order), or give "
                              "a 2-D stack of spectra with --axes pixel,raman_shift and --x/--y "
                              "positions per spectrum")
    order = parse_axes(axes, ndim=cube_ds.ndim)
    stated = ",".join(order)
    labels = _dimension_labels(cube_ds)
    if labels is not None and set(labels) == set(order) and labels != order:
        raise MapkitError(f"--axes says {stated} but the file labels the dimensions of "
                          f"{dataset_path} {','.join(labels)}", file=path, field="--axes",
                          fix=f"pass --axes {','.join(labels)}")
    shape = dict(zip(order, cube_ds.shape))
    notes = []
    shift, note = _shift_axis(f, path, shift_path, laser_wavelength, hint)
    notes.append(note)
    if shift.ndim == 1 and shift.size != shape["raman_shift"]:
        others = [f"dimension {k} ({n})" for k, n in enumerate(cube_ds.shape)
                  if n == shift.size and order[k] != "raman_shift"]
        raise MapkitError(
            f"the shift dataset {shift_path} has {shift.size} values but dimension "
            f"{order.index('raman_shift')} of {dataset_path}, raman_shift by --axes {stated}, "
            f"has {shape['raman_shift']}" + (f"; {others[0]} matches" if others else ""),
            file=path, field="--axes", fix="check --axes (the order of the dataset's "
                                            "dimensions) and --shift-dataset")
    if cube_ds.ndim == 2:
        return _stack(f, path, cube_ds, dataset_path, order, shift, x_path, y_path,
                      laser_wavelength, position_tolerance, notes, hint)
    target = {3: SECTION_DIMS if "z" in order else DIMS, 4: VOLUME_DIMS}[cube_ds.ndim]
    cube = lazy_cube(cube_ds, source=path, field=dataset_path)
    cube = cube.transpose([order.index(d) for d in target])
    ny, nx = shape.get("y", 1), shape["x"]
    z = None
    if "z" in order:
        if z_path is None:
            raise MapkitError(f"--axes {stated} names a depth axis z but no depth dataset is "
                              "given", file=path, field="z",
                              fix="pass the dataset of nominal depths in um (--z-dataset PATH)")
        z = _positions(f, path, z_path, hint)
        if z.ndim != 1 or z.size != shape["z"]:
            raise MapkitError(f"{z_path} holds {z.size} depths but --axes {stated} puts z along "
                              f"dimension {order.index('z')} of {dataset_path}, which has "
                              f"{shape['z']}", file=path, field="--axes",
                              fix="check --axes and --z-dataset")
        check_axis(z, name="z", source=str(path), field_path=z_path)

    given = {}
    for name, p in (("x", x_path), ("y", y_path)):
        if p is not None:
            given[name] = (p, _positions(f, path, p, hint))
    for name, (p, values) in given.items():
        n = shape.get(name, 1)
        if values.ndim == 1 and values.size != n:
            other = "y" if name == "x" else "x"
            swapped = values.size == shape.get(other)
            raise MapkitError(
                f"{p} holds {values.size} {name} positions but --axes {stated} puts {name} "
                f"along dimension {order.index(name)} of {dataset_path}, which has {n}"
                + (f" (dimension {order.index(other)}, {other} by --axes, has "
                   f"{values.size}: the two are likely swapped)" if swapped else ""),
                file=path, field="--axes",
                fix="check --axes (the order of the dataset's dimensions) and --x/--y")
    if labels is None and "y" in order and (len(given) < 2 or nx == ny):   # square
        notes.append(f"axis order from --axes {stated} alone (nothing in the file confirms "
                     f"it): read as {ny} rows (y) x {nx} columns (x); if the map looks "
                     "transposed, swap x and y in --axes")

    def positions(name, n):
        if name in given:
            return given[name][1]
        if pixel_size is None:
            raise MapkitError(f"no {name} positions given", file=path, field=name,
                              fix=f"pass the {name} dataset path or the pixel size in um")
        return np.arange(n) * float(pixel_size)

    x = positions("x", nx)
    y = positions("y", ny) if ("y" in order or "y" in given) else np.zeros(1)
    return RamanMap(cube, raman_shift=shift, x=x, y=y, z=z,
                    laser_wavelength=laser_wavelength, source=str(path),
                    provenance=read_steps(notes, path))


def _stack(f, path, ds, dataset_path, order, shift, x_path, y_path, laser_wavelength,
           tolerance, notes, hint):
    """A (pixel, shift) dataset with one x and one y position per spectrum, on a grid."""
    from .positions import check_coverage, grid_positions

    if ds.dtype.kind not in "iuf":
        raise MapkitError(f"intensity dtype {ds.dtype} is not numeric", file=path,
                          field=dataset_path, fix="store counts as integers or floats")
    n_pix = ds.shape[order.index("pixel")]
    if x_path is None or y_path is None:
        raise MapkitError("a 2-D stack of spectra needs the position of each spectrum",
                          file=path, field=dataset_path,
                          fix="pass --x and --y datasets with one position per spectrum")
    xs, ys = (_positions(f, path, p, hint) for p in (x_path, y_path))
    for p, v in ((x_path, xs), (y_path, ys)):
        if v.ndim != 1 or v.size != n_pix:
            raise MapkitError(f"{p} holds {v.size} positions, {dataset_path} has {n_pix} "
                              f"spectra along dimension {order.index('pixel')}", file=path,
                              field="--axes", fix="check --axes (pixel,raman_shift or "
                                                  "raman_shift,pixel) and --x/--y")
    data = np.asarray(ds[...])
    if order[0] != "pixel":
        data = data.T
    ux, uy, ix, iy, note = grid_positions(xs, ys, tolerance=tolerance, path=path)
    notes.append(note)
    seen = np.zeros((uy.size, ux.size), int)
    np.add.at(seen, (iy, ix), 1)
    check_coverage(seen, ux, uy, path)
    cube = np.full((uy.size, ux.size, data.shape[1]), np.nan, np.float32)
    cube[iy, ix] = data
    return RamanMap(cube, raman_shift=shift, x=ux, y=uy, laser_wavelength=laser_wavelength,
                    source=str(path),
                    provenance=read_steps(notes, path))
