"""Write maps and results in the mapkit NeXus layout (see docs/file-layout.md)."""

from __future__ import annotations

import concurrent.futures
import contextlib
import hashlib
import json
import os
import threading
from pathlib import Path

import numpy as np

from .. import layout
from ..core.provenance import Step, library_versions
from ..core.ramanmap import RamanMap
from ..core.result import Result
from .atomic import atomic_path


def _str_attr(obj, name, value):
    obj.attrs[name] = value


def _write_axis(group, name, values, units):
    d = group.create_dataset(name, data=np.asarray(values))
    if units:
        d.attrs["units"] = units
    return d


def _write_provenance(f, steps, extra: dict | None = None):
    import h5py

    g = f.require_group(layout.PROVENANCE)
    g.attrs["NX_class"] = "NXcollection"
    if "steps" in g:
        del g["steps"]
    g.create_dataset("steps", data=[s.to_json() for s in steps], dtype=h5py.string_dtype())
    g.attrs["versions"] = json.dumps(library_versions(), sort_keys=True)
    for k, v in (extra or {}).items():
        g.attrs[k] = json.dumps(v, sort_keys=True) if not isinstance(v, str) else v


#: digests already computed (or being computed) in this process, by file identity and
#: state: a map of several GB is read once for its digest, not once per output naming it
_DIGESTS: dict = {}
_DIGESTS_LOCK = threading.Lock()
_DIGESTS_KEPT = 64


def _identity(path):
    # the change time too: any write moves it, and no tool can set it back (touch -r and
    # cp -p restore only the modification time)
    st = os.stat(path)
    return (str(Path(path).resolve()), st.st_dev, st.st_ino, st.st_size, st.st_mtime_ns,
            st.st_ctime_ns)


def file_sha256(path) -> str:
    """SHA-256 of a file, read in blocks (recorded so a result names its exact input).

    Remembered for the file as it is (path, inode, size, modification and change times):
    asked again in the same process, and the file unchanged, the digest is not read again;
    asked while :func:`hash_in_background` is reading it, the call waits for that reading. A
    file that changed while it was read is not remembered.
    """
    key = _identity(path)
    with _DIGESTS_LOCK:
        pending = _DIGESTS.get(key)
        mine = pending is None
        if mine:
            while len(_DIGESTS) >= _DIGESTS_KEPT:
                _DIGESTS.pop(next(iter(_DIGESTS)))
            pending = _DIGESTS[key] = concurrent.futures.Future()
    if not mine:
        return pending.result()
    try:
        h = hashlib.sha256()
        with open(path, "rb") as fh:
            for block in iter(lambda: fh.read(1 << 20), b""):
                h.update(block)    # (hashlib releases the GIL on large blocks)
        if _identity(path) != key:     # changed while read: do not remember this digest
            with _DIGESTS_LOCK:
                _DIGESTS.pop(key, None)
        pending.set_result(h.hexdigest())
    except BaseException as exc:
        with _DIGESTS_LOCK:
            _DIGESTS.pop(key, None)
        pending.set_exception(exc)
        raise
    return pending.result()


def hash_in_background(paths) -> threading.Thread:
    """Start reading the digests of ``paths`` in a daemon thread (errors are left for the
    caller's own :func:`file_sha256` to meet), so a long run's input is hashed while it
    works instead of after."""
    def run():
        for p in paths:
            try:
                file_sha256(p)
            except Exception:      # (e.g. the file vanished): the caller will say so
                pass

    t = threading.Thread(target=run, name="mapkit-digests", daemon=True)
    t.start()
    return t


def _write_cube_from(f, m: RamanMap, bands, compression=None):
    """Create the map group and fill the cube from an iterator of (first row, block)."""
    g = _map_group(f, m)
    d = g.create_dataset("intensity", shape=m.shape, dtype="float32",
                         chunks=layout.cube_tile(m.shape), compression=compression,
                         shuffle=compression is not None)
    d.attrs["units"] = "counts"
    d.attrs["long_name"] = "Raman intensity"
    for y0, block in bands:
        d[y0:y0 + block.shape[0]] = block
    return d


def _map_group(f, m: RamanMap):
    g = f.require_group(layout.MAP)
    g.attrs["NX_class"] = "NXdata"
    g.attrs["signal"] = "intensity"
    g.attrs["axes"] = list(m.dims)
    for i, name in enumerate(m.dims):
        g.attrs[f"{name}_indices"] = i
    _write_axis(g, "y", m.y, "um")   # a section's y: one value, its position
    _write_axis(g, "x", m.x, "um")
    if m.z is not None:   # nominal depths; a corrected axis says so in its long_name
        _write_axis(g, "z", m.z, "um").attrs["long_name"] = "nominal (stage) depth, apparent"
    _write_axis(g, "raman_shift", m.raman_shift, "1/cm")
    mk = g.create_dataset("mask", data=m.mask.astype(np.uint8))
    mk.attrs["long_name"] = "bad pixel (1) / good pixel (0)"
    if m.laser_wavelength is not None:
        inst = f.require_group(layout.INSTRUMENT)
        inst.attrs["NX_class"] = "NXinstrument"
        lw = inst.create_dataset("laser_wavelength", data=float(m.laser_wavelength))
        lw.attrs["units"] = "nm"
    return g


def _write_cube(f, m: RamanMap, compression):
    """Write the cube tile by tile, so a lazy map never has to fit in memory."""
    ty = layout.cube_tile(m.shape)[0]

    def bands():
        for y0 in range(0, m.shape[0], ty):
            yield y0, np.asarray(m.intensity[y0:y0 + ty], dtype=np.float32)

    _write_cube_from(f, m, bands(), compression)


def _write_result(f, result: Result):
    import h5py

    parent = f.require_group(layout.RESULTS)
    parent.attrs["NX_class"] = "NXcollection"
    if result.name in parent:
        del parent[result.name]
    rg = parent.create_group(result.name)
    rg.attrs["NX_class"] = "NXcollection"
    rg.attrs["method"] = result.method
    rg.attrs["parameters"] = json.dumps(Step(result.method, result.parameters).parameters,
                                        sort_keys=True)
    rg.attrs["summary"] = json.dumps(Step("s", result.summary).parameters, sort_keys=True)
    for fname, fld in result.fields.items():
        g = rg.create_group(fname)
        g.attrs["NX_class"] = "NXdata"
        g.attrs["signal"] = fld.signal
        g.attrs["axes"] = list(fld.axis_names)
        for i, ax in enumerate(fld.axes):
            g.attrs[f"{ax.name}_indices"] = i
            vals = np.asarray(ax.values)
            if vals.dtype.kind in "UO":
                g.create_dataset(ax.name, data=[str(v) for v in vals], dtype=h5py.string_dtype())
            else:
                _write_axis(g, ax.name, vals, ax.units)
        if fld.signal == "labels":   # files number classes from 1 (0 = masked)
            from .labels import CLASS_NUMBERING, class_numbers

            d = g.create_dataset(fld.signal, data=class_numbers(fld.data))
            d.attrs["numbering"] = CLASS_NUMBERING
        else:
            d = g.create_dataset(fld.signal, data=fld.data)
        d.attrs["units"] = fld.units
        if fld.signal == "labels":
            d.attrs["long_name"] = CLASS_NUMBERING   # the Field's text describes 0-based indices
        elif fld.long_name:
            d.attrs["long_name"] = fld.long_name
        if fld.errors is not None:
            e = g.create_dataset(f"{fld.signal}_errors", data=fld.errors)
            e.attrs["units"] = fld.units
        for k, v in fld.extras.items():
            g.create_dataset(k, data=v)


def write_optical(f, placed):
    """Write a :class:`~mapkit.register.PlacedImage` into an open HDF5 file (replacing one)."""
    import h5py

    img = placed.image
    for p in (layout.OPTICAL, layout.OPTICAL_REGISTRATION):
        if p in f:
            del f[p]
    g = f.create_group(layout.OPTICAL)
    g.attrs["NX_class"] = "NXdata"
    g.attrs["signal"] = "image"
    rgb = img.data.ndim == 3
    g.attrs["axes"] = ["y", "x", "channel"] if rgb else ["y", "x"]
    g.attrs["y_indices"], g.attrs["x_indices"] = 0, 1
    d = g.create_dataset("image", data=img.data, chunks=True)
    d.attrs["long_name"] = "optical micrograph" + (" (RGB)" if rgb else " (grey)")
    _write_axis(g, "y", img.y, "um")
    _write_axis(g, "x", img.x, "um")
    if rgb:
        g.attrs["channel_indices"] = 2
        g.create_dataset("channel", data=["red", "green", "blue"], dtype=h5py.string_dtype())
    g.attrs["provenance"] = json.dumps(img.provenance(), sort_keys=True)
    r = f.create_group(layout.OPTICAL_REGISTRATION)
    r.attrs["NX_class"] = "NXcollection"
    m = r.create_dataset("matrix", data=np.asarray(placed.matrix, float))
    m.attrs["long_name"] = "(x, y, 1) in the micrograph's frame (um) -> (x, y, 1) on the map (um)"
    reg = placed.registration
    r.attrs["transform"] = reg["transform"] if reg else "none (pixel size and origin)"
    if reg:
        r.attrs["rms_um"] = float(reg["rms_um"])
        for name in ("image_points_um", "map_points_um"):
            _write_axis(r, name, np.asarray(reg[name], float).reshape(-1, 2), "um")
        _write_axis(r, "residual_um", np.asarray(reg["residuals_um"], float), "um")


def copy_with_optical(source, path, placed, *, overwrite: bool = False) -> Path:
    """Write a copy of results file ``source`` holding the placed micrograph, atomically
    (``source`` is left unchanged)."""
    import shutil

    import h5py

    if Path(path).resolve() == Path(source).resolve():
        from ..errors import MapkitError

        raise MapkitError("the output would replace the input", file=path, field="--out",
                          fix="give another file name")
    with atomic_path(path, overwrite=overwrite) as tmp:
        shutil.copyfile(source, tmp)
        with h5py.File(tmp, "a") as f:
            write_optical(f, placed)
    return Path(path)


def write_results_file(path, m: RamanMap, results=(), *, overwrite=False, compression=None,
                       inputs: dict | None = None, optical=None) -> Path:
    """Write a map and its results into one new NeXus file, atomically.

    Parameters
    ----------
    path : path-like
        Target file; refused if it exists and ``overwrite`` is false.
    m : RamanMap
        The map the results were computed from (written under ``/entry/map``).
    results : iterable of Result
        Written under ``/entry/results/<name>``.
    compression : str, optional
        ``"gzip"`` pays off only for integer-valued counts; default none.
    inputs : dict, optional
        Input files by role, e.g. ``{"map": "a.h5"}``; their SHA-256 is recorded.
    optical : PlacedImage, optional
        A micrograph placed on the map (``/entry/optical``, ``/entry/optical_registration``).
    """
    with results_file(path, m, overwrite=overwrite, inputs=inputs, optical=optical) as f:
        _write_cube(f, m, compression)
        for r in results:
            _write_result(f, r)
    return Path(path)


@contextlib.contextmanager
def results_file(path, m: RamanMap, *, overwrite=False, inputs: dict | None = None,
                 optical=None):
    """Open a new results file atomically and yield it with its entry made; the caller
    writes the cube (``_write_cube`` or, block by block, ``_write_cube_from``) and the
    results; the micrograph and the provenance of ``m`` follow on a clean exit. An error
    leaves any previous file at ``path`` intact."""
    import h5py

    with atomic_path(path, overwrite=overwrite) as tmp:
        with h5py.File(tmp, "w") as f:
            f.attrs["default"] = "entry"
            f.attrs["creator"] = "mapkit"
            entry = f.create_group(layout.ENTRY)
            entry.attrs["NX_class"] = "NXentry"
            entry.attrs["default"] = "map"
            yield f
            if optical is not None:
                write_optical(f, optical)
            # the inputs' digests at the end: a long run has read them in the background
            recorded = {role: {"path": Path(p).name, "sha256": file_sha256(p)}
                        for role, p in (inputs or {}).items()}
            _write_provenance(f, m.provenance, {"inputs": recorded} if recorded else None)


def write_map(path, m: RamanMap, *, overwrite=False, compression=None) -> Path:
    """Write a map alone in the mapkit layout (atomic)."""
    return write_results_file(path, m, (), overwrite=overwrite, compression=compression)
