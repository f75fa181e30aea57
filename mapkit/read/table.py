"""Read maps from plain text tables, long or wide form.

Long form: one row per (x, y, shift) with an intensity, columns found by their
header names. Wide form: one row per pixel, ``x`` and ``y`` columns followed by
one column per channel whose header is the Raman shift. Either form may carry a ``z``
(depth, µm) column: the table is then a depth section (x, z; ``y`` may be left out) or
a volume (x, y, z), and every position must be measured at the same depths. The delimiter
(comma, semicolon, tab or spaces) is detected from the header line. Headers may write
µm as ``um`` or ``µm`` and cm⁻¹ as ``1/cm``, ``cm-1`` or ``cm⁻¹``.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np

from ..core.ramanmap import RamanMap
from ..errors import MapkitError
from .dispatch import read_steps
from .positions import check_coverage as _check_coverage
from .positions import grid_positions

_NAMES = {
    "x": ("x", "x_um", "x (um)", "x [um]", "x(um)", "pos_x", "x_position"),
    "y": ("y", "y_um", "y (um)", "y [um]", "y(um)", "pos_y", "y_position"),
    "z": ("z", "z_um", "z (um)", "z [um]", "z(um)", "pos_z", "z_position", "depth",
          "depth (um)", "depth_um"),
    "raman_shift": ("raman_shift", "shift", "raman shift", "wavenumber", "raman_shift_cm-1",
                    "shift (1/cm)", "raman shift (cm-1)", "shift [1/cm]", "shift (cm-1)",
                    "raman shift (1/cm)", "raman shift [cm-1]", "raman_shift (cm-1)"),
    "intensity": ("intensity", "counts", "signal", "intensity (counts)"),
}
_NUMBER = re.compile(r"^[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?$")


def _split_fn(header_line: str):
    for delim in ("\t", ";", ","):
        if delim in header_line:
            return lambda s, d=delim: [c.strip() for c in s.rstrip("\r\n").split(d)]
    return lambda s: s.split()


def _read_rows(path):
    path = Path(path)
    if not path.exists():
        raise MapkitError("file not found", file=path, fix="check the path")
    try:
        text = path.read_text(encoding="utf-8-sig")
    except UnicodeDecodeError:
        raise MapkitError("not a UTF-8 text table", file=path,
                          fix="export the table as UTF-8 text (CSV or tab-separated)") from None
    lines = [(i + 1, ln) for i, ln in enumerate(text.splitlines())
             if ln.strip() and not ln.lstrip().startswith("#")]
    if len(lines) < 2:
        raise MapkitError("the table has no data rows", file=path,
                          fix="give a header line and at least one row")
    split = _split_fn(lines[0][1])
    header = split(lines[0][1])
    width = len(header)
    values = np.empty((len(lines) - 1, width))
    for r, (lineno, line) in enumerate(lines[1:]):
        cells = split(line)
        if len(cells) != width:
            raise MapkitError(f"line {lineno} has {len(cells)} values, the header has {width}",
                              file=path, field=f"line {lineno}",
                              fix="make every row as long as the header (ragged rows are not read)")
        for c, cell in enumerate(cells):
            if not cell.strip():
                raise MapkitError(f"the value in column {header[c]!r} is missing (an empty "
                                  "cell)", file=path, field=f"line {lineno}",
                                  fix="fill it in, write nan for a missing value, or remove "
                                      "the row")
            if not _NUMBER.match(cell) and cell.lower() not in ("nan", "inf", "-inf"):
                raise MapkitError(f"value {cell!r} in column {header[c]!r} is not a number",
                                  file=path, field=f"line {lineno}",
                                  fix="use '.' as the decimal separator and numbers only")
        values[r] = [float(c) for c in cells]
    return header, values


def _plain(name: str) -> str:
    """A header name with the micro sign (or Greek mu) as 'u' and cm⁻¹ as cm-1, lower case."""
    name = name.strip().lower().replace("\u00b5", "u").replace("\u03bc", "u")
    return name.replace("\u207b\u00b9", "-1").replace("cm^-1", "cm-1")


def _find(header, key, path, required=True):
    low = [_plain(h) for h in header]
    for name in _NAMES[key]:
        if name in low:
            return low.index(name)
    if required:
        raise MapkitError(f"no {key} column in the header {header}", file=path, field=key,
                          fix=f"name the column one of {', '.join(_NAMES[key][:3])}")
    return None


def read_table(path, *, laser_wavelength=None, position_tolerance=None) -> RamanMap:
    """Read a long- or wide-form text table into a map.

    ``position_tolerance`` (µm) snaps positions that jitter around a grid onto it (see
    :func:`~mapkit.read.positions.grid_positions`); what was snapped is recorded as a
    ``read`` step in the map's provenance.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "wide.csv"
    >>> _ = p.write_text("x,y,100,200\\n0,0,1,2\\n1,0,3,4\\n")
    >>> m = read_table(p)
    >>> m.shape, m.spectrum(0, 1).tolist()
    ((1, 2, 2), [3.0, 4.0])
    """
    header, values = _read_rows(path)
    cz = _find(header, "z", path, required=False)
    cx = _find(header, "x", path)
    cy = _find(header, "y", path, required=cz is None)
    cs = _find(header, "raman_shift", path, required=False)
    if cz is not None:
        return _depth(header, values, cx, cy, cz, cs, path, laser_wavelength,
                      position_tolerance)
    if cs is not None:
        ci = _find(header, "intensity", path)
        return _long(values, cx, cy, cs, ci, path, laser_wavelength, position_tolerance)
    channel_cols = [i for i in range(len(header)) if i not in (cx, cy)]
    bad = [header[i] for i in channel_cols if not _NUMBER.match(header[i])]
    if bad or not channel_cols:
        raise MapkitError(f"cannot tell the table's form: column {bad[0] if bad else ''!r} is "
                          "neither a shift value nor a known column", file=path, field="header",
                          fix="use long form (x, y, raman_shift, intensity) or wide form "
                              "(x, y, then one numeric shift per column)")
    shift = np.array([float(header[i]) for i in channel_cols])
    ux, uy, ix, iy, note = grid_positions(values[:, cx], values[:, cy],
                                          tolerance=position_tolerance, path=path)
    cube = np.full((uy.size, ux.size, shift.size), np.nan, np.float32)
    seen = np.zeros((uy.size, ux.size), int)
    np.add.at(seen, (iy, ix), 1)
    _check_coverage(seen, ux, uy, path)
    cube[iy, ix] = values[:, channel_cols]
    return RamanMap(cube, raman_shift=shift, x=ux, y=uy, laser_wavelength=laser_wavelength,
                    source=str(path), provenance=read_steps([note], path))


def _long(values, cx, cy, cs, ci, path, laser_wavelength, position_tolerance=None):
    shift_vals = values[:, cs]
    shift = np.unique(shift_vals)
    # in long form every channel repeats a position, so snapping sees each one many times
    ux, uy, ix, iy, note = grid_positions(values[:, cx], values[:, cy],
                                          tolerance=position_tolerance, path=path)
    counts = np.zeros((uy.size, ux.size), int)
    np.add.at(counts, (iy, ix), 1)
    if np.any(counts > shift.size):
        iyy, ixx = np.argwhere(counts > shift.size)[0]
        raise MapkitError(f"position x={ux[ixx]:g}, y={uy[iyy]:g} has a channel more than once",
                          file=path, field="raman_shift",
                          fix="keep one row per position and shift")
    _check_coverage((counts > 0).astype(int), ux, uy, path)
    if np.any(counts != shift.size):
        iyy, ixx = np.argwhere(counts != shift.size)[0]
        raise MapkitError(f"position x={ux[ixx]:g}, y={uy[iyy]:g} has {counts[iyy, ixx]} of "
                          f"{shift.size} channels", file=path, field="raman_shift",
                          fix="export every channel at every position on the same shift axis")
    ish = np.searchsorted(shift, shift_vals)
    cube = np.full((uy.size, ux.size, shift.size), np.nan, np.float32)
    cube[iy, ix, ish] = values[:, ci]
    return RamanMap(cube, raman_shift=shift, x=ux, y=uy, laser_wavelength=laser_wavelength,
                    source=str(path), provenance=read_steps([note], path))


def _depth(header, values, cx, cy, cz, cs, path, laser_wavelength, position_tolerance):
    """A table with a z column: a depth section (one y) or a volume, long or wide form."""
    from .positions import check_depth_coverage, depth_grid

    ys = values[:, cy] if cy is not None else np.zeros(len(values))
    known = [c for c in (cx, cy, cz) if c is not None]
    if cs is not None:
        ci = _find(header, "intensity", path)
        shift = np.unique(values[:, cs])
        keys = np.c_[values[:, cx], ys, values[:, cz]]
        # one spectrum per distinct (x, y, z): group the rows, then check the channels
        pos, inverse = np.unique(keys, axis=0, return_inverse=True)
        inverse = inverse.ravel()
        per = np.bincount(inverse, minlength=len(pos))
        if np.any(per != shift.size):
            k = int(np.flatnonzero(per != shift.size)[0])
            more = per[k] > shift.size
            raise MapkitError(f"position x={pos[k, 0]:g}, y={pos[k, 1]:g}, z={pos[k, 2]:g} has "
                              f"{per[k]} rows for {shift.size} channels"
                              + (": a depth value repeats" if more else ""),
                              file=path, field="z" if more else "raman_shift",
                              fix="keep one row per position, depth and shift" if more else
                                  "export every channel at every position and depth")
        spectra = np.full((len(pos), shift.size), np.nan)
        spectra[inverse, np.searchsorted(shift, values[:, cs])] = values[:, ci]
        xs, ys, zs = pos[:, 0], pos[:, 1], pos[:, 2]
    else:
        channel_cols = [i for i in range(len(header)) if i not in known]
        bad = [header[i] for i in channel_cols if not _NUMBER.match(header[i])]
        if bad or not channel_cols:
            raise MapkitError(f"cannot tell the table's form: column {bad[0] if bad else ''!r}"
                              " is neither a shift value nor a known column", file=path,
                              field="header", fix="use long form (x, y, z, raman_shift, "
                                                  "intensity) or wide form (x, y, z, then one "
                                                  "numeric shift per column)")
        shift = np.array([float(header[i]) for i in channel_cols])
        spectra = values[:, channel_cols]
        xs, zs = values[:, cx], values[:, cz]
    ux, uy, uz, ix, iy, iz, note = depth_grid(xs, ys, zs, tolerance=position_tolerance,
                                              path=path)
    seen = np.zeros((uz.size, uy.size, ux.size), int)
    np.add.at(seen, (iz, iy, ix), 1)
    check_depth_coverage(seen, ux, uy, uz, path)
    cube = np.full((uz.size, uy.size, ux.size, shift.size), np.nan, np.float32)
    cube[iz, iy, ix] = spectra
    if uz.size == 1:          # one depth: an area map (or line) at that depth
        cube = cube[0]
    elif uy.size == 1:        # one y: a depth section (z, x)
        cube = cube[:, 0]
    return RamanMap(cube, raman_shift=shift, x=ux, y=uy, z=uz,
                    laser_wavelength=laser_wavelength, source=str(path),
                    provenance=read_steps([note], path))
