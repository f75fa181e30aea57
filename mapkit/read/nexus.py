"""Read a map stored in the mapkit NeXus layout (see docs/file-layout.md)."""

from __future__ import annotations

import json

import numpy as np

from .. import layout
from ..core.provenance import Step
from ..core.ramanmap import RamanMap
from ..errors import MapkitError
from .hdf5 import dataset, lazy_cube, open_h5


def is_nexus_map(path) -> bool:
    """True if ``path`` is an HDF5 file holding ``/entry/map/intensity``."""
    import h5py

    try:
        with h5py.File(path, "r") as f:
            return isinstance(f.get(layout.INTENSITY), h5py.Dataset)
    except (OSError, ValueError):
        return False


def read_nexus_map(path, *, block_bytes: int | None = None) -> RamanMap:
    """Open a map file lazily: axes are read, the cube stays on disk.

    The file is opened read-only and closed again; chunks are read on demand (one file
    chunk at a time, or blocks of about ``block_bytes``: see :func:`lazy_cube`).
    Errors name the dataset path that is wrong.
    """
    with open_h5(path) as f:
        return _read_nexus(f, path, block_bytes)


def _read_nexus(f, path, block_bytes=None):
    hint = ("write the map in the mapkit layout (docs/file-layout.md), or read the cube by "
            "path with --dataset and --axes")
    cube_ds = dataset(f, layout.INTENSITY, source=path, hint=hint)
    group = f.get(layout.MAP)
    stated = [a.decode() if isinstance(a, bytes) else str(a)
              for a in np.atleast_1d(group.attrs.get("axes", layout.AXES))]
    dims = {3: layout.SECTION_AXES if tuple(stated) == layout.SECTION_AXES else layout.AXES,
            4: layout.VOLUME_AXES}.get(cube_ds.ndim)
    if dims is None:
        raise MapkitError(f"intensity has rank {cube_ds.ndim}, the layout needs 3 (y, x, "
                          "raman_shift or z, x, raman_shift) or 4 (z, y, x, raman_shift)",
                          file=path, field=layout.INTENSITY, fix="store the cube as (y, x, raman_shift)")
    if cube_ds.ndim == 4 and tuple(stated) != layout.VOLUME_AXES:
        raise MapkitError(f"intensity has rank 4, a volume, but the map group states axes "
                          f"{stated}, not {list(layout.VOLUME_AXES)}", file=path,
                          field=f"{layout.MAP} (axes)",
                          fix="store the volume as (z, y, x, raman_shift) and say so in axes")
    cube = lazy_cube(cube_ds, source=path, field=layout.INTENSITY,
                     block_bytes=block_bytes)

    def axis(name):
        d = dataset(f, f"{layout.MAP}/{name}", source=path, hint=hint)
        units = d.attrs.get("units")
        units = units.decode() if isinstance(units, bytes) else units
        if units is not None and units != layout.AXIS_UNITS[name]:
            raise MapkitError(f"units are {units!r}, the layout needs {layout.AXIS_UNITS[name]!r}",
                              file=path, field=f"{layout.MAP}/{name}",
                              fix=f"convert the axis to {layout.AXIS_UNITS[name]}")
        return d[...]

    mask = f[layout.MASK][...] if layout.MASK in f else None
    laser = float(f[layout.LASER][()]) if layout.LASER in f else None
    steps = ()
    if f"{layout.PROVENANCE}/steps" in f:
        raw = f[f"{layout.PROVENANCE}/steps"][...]
        steps = tuple(Step.from_json(s.decode() if isinstance(s, bytes) else s) for s in raw)
    units = cube_ds.attrs.get("units")
    units = units.decode() if isinstance(units, bytes) else units
    if units is not None and str(units).strip().lower() != "counts":
        # read as given, but said: the noise model (shot-noise weights, SNR, the number of
        # components) assumes detector counts, and the outputs label the intensity counts
        steps = steps + (Step("read", {"source": str(path), "note": (
            f"intensity units are {units!r}, not counts: the shot-noise weights, the SNR and "
            "the choice of the number of components assume counts, and the outputs label "
            "the values counts; give --components N, or convert the data to counts")}),)
    from ..core.ramanmap import check_axis
    sizes = dict(zip(dims, cube.shape))
    shift = check_axis(axis("raman_shift"), name="raman_shift", length=sizes["raman_shift"],
                       source=str(path), field_path=f"{layout.MAP}/raman_shift")
    x = check_axis(axis("x"), name="x", length=sizes["x"], source=str(path),
                   field_path=f"{layout.MAP}/x")
    y = check_axis(np.atleast_1d(axis("y")), name="y", length=sizes.get("y", 1),
                   source=str(path), field_path=f"{layout.MAP}/y")
    z = None
    if "z" in dims or f"{layout.MAP}/z" in f:
        z = check_axis(np.atleast_1d(axis("z")), name="z", length=sizes.get("z", 1),
                       source=str(path), field_path=f"{layout.MAP}/z")
    return RamanMap(cube, raman_shift=shift, x=x, y=y, z=z,
                    mask=None if mask is None else np.asarray(mask, bool),
                    laser_wavelength=laser, provenance=steps, source=str(path))


def read_results(path) -> dict[str, dict]:
    """Every result group under ``/entry/results`` as plain arrays and attributes.

    Returns ``{result_name: {"method": str, "parameters": dict,
    "fields": {field_name: {"signal": str, "data": array, "units": str,
    "axes": {axis_name: array}, "errors": array or None}}}}``.
    """
    import h5py

    out: dict[str, dict] = {}
    with open_h5(path) as f:
        group = f.get(layout.RESULTS)
        if group is None:
            return out
        for rname, rgroup in group.items():
            fields = {}
            for fname, g in rgroup.items():
                if not isinstance(g, h5py.Group):
                    continue
                signal = g.attrs["signal"]
                axes = [a.decode() if isinstance(a, bytes) else a for a in g.attrs["axes"]]
                data = g[signal][...]
                fields[fname] = {
                    "signal": signal, "data": data,
                    "units": g[signal].attrs.get("units", ""),
                    "axes": {a: g[a][...] for a in axes if a in g},
                    "errors": g[f"{signal}_errors"][...] if f"{signal}_errors" in g else None,
                    "numbering": str(g[signal].attrs.get("numbering", "")),
                    "extras": {k: g[k][...] for k in g if k not in (signal, f"{signal}_errors", *axes)},
                }
            out[rname] = {"method": rgroup.attrs.get("method", ""),
                          "parameters": json.loads(rgroup.attrs.get("parameters", "{}")),
                          "summary": json.loads(rgroup.attrs.get("summary", "{}")),
                          "fields": fields}
    return out


def read_result_objects(path) -> list:
    """The results of a file as :class:`~mapkit.core.result.Result` objects (axes, units, errors)."""
    from ..core.result import Axis, Field, Result

    out = []
    for name, r in read_results(path).items():
        fields = {}
        for fname, f in r["fields"].items():
            axes = []
            for aname, values in f["axes"].items():
                vals = np.array([v.decode() if isinstance(v, bytes) else v for v in values]) \
                    if values.dtype.kind in "SO" else values
                axes.append(Axis(aname, vals, "um" if aname in ("x", "y", "z") else
                                 "1/cm" if aname == "raman_shift" else ""))
            units = f["units"].decode() if isinstance(f["units"], bytes) else str(f["units"])
            data = f["data"]
            if f.get("numbering"):   # class numbers from 1 in the file, 0-based in Python
                from ..export.labels import class_indices

                data = class_indices(data)
            try:
                fields[fname] = Field(f["signal"], data, tuple(axes), units,
                                      errors=f["errors"])
            except ValueError:
                continue  # a group whose axes are not all stored: not an image or spectrum
        out.append(Result(name, str(r["method"]), r["parameters"], fields, r.get("summary", {})))
    return out
