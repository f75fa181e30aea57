"""Stage positions of separate spectra onto a rectangular grid (text tables, 2-D HDF5 datasets).

Positions read back from a stage encoder jitter around the nominal grid. By default a
position must repeat exactly to share a row or column; with a ``tolerance`` (µm) the
positions of each axis are grouped into grid lines no wider than the tolerance, every
position is snapped to its line's median, and the largest offset is reported.
"""

from __future__ import annotations

import numpy as np

from ..errors import MapkitError

TOLERANCE_FIX = ("if the stage positions jitter around a grid, pass --position-tolerance UM "
                 "(a little above the jitter, below half the pixel step)")


def _lines(values, tolerance, name, path):
    """Grid lines of one axis: sorted line positions, each value's line index, largest offset."""
    v = np.asarray(values, dtype=np.float64)
    if not tolerance:
        u, idx = np.unique(v, return_inverse=True)
        return u, idx.ravel(), 0.0
    order = np.argsort(v, kind="stable")
    sv = v[order]
    starts = np.r_[0, np.flatnonzero(np.diff(sv) > tolerance) + 1]
    label_sorted = np.repeat(np.arange(starts.size), np.diff(np.r_[starts, sv.size]))
    centres = np.array([np.median(sv[a:b]) for a, b in zip(starts, np.r_[starts[1:], sv.size])])
    idx = np.empty(v.size, int)
    idx[order] = label_sorted
    offset = np.abs(v - centres[idx])
    if offset.max() > tolerance:
        k = int(offset.argmax())
        raise MapkitError(f"{name} positions near {centres[idx[k]]:g} um spread over more than "
                          f"the tolerance of {tolerance:g} um (offset {offset[k]:.3g} um): "
                          "neighbouring grid lines run together", file=path, field=name,
                          fix="give a tolerance below half the pixel step")
    return centres, idx, float(offset.max())


def grid_positions(xs, ys, *, tolerance: float | None = None, path=None):
    """Grid lines and each spectrum's ``(ix, iy)`` from per-spectrum positions (µm).

    Returns ``(ux, uy, ix, iy, note)``; ``note`` says what was snapped (``None`` when
    every position sat exactly on its grid line).

    Examples
    --------
    >>> ux, uy, ix, iy, note = grid_positions([0, 1.01, 0.0, 0.99], [0, 0, 2.02, 2],
    ...                                       tolerance=0.05)
    >>> ux.tolist(), uy.tolist(), ix.tolist(), iy.tolist()
    ([0.0, 1.0], [0.0, 2.01], [0, 1, 0, 1], [0, 0, 1, 1])
    >>> note
    'snapped 3 of 4 positions to a 2 x 2 grid (largest offset 0.01 um, tolerance 0.05 um)'
    """
    if tolerance is not None and (not np.isfinite(tolerance) or tolerance < 0):
        raise MapkitError(f"position tolerance {tolerance!r} is not a non-negative number",
                          field="--position-tolerance", fix="give a distance in um, e.g. 0.05")
    ux, ix, dx = _lines(xs, tolerance, "x", path)
    uy, iy, dy = _lines(ys, tolerance, "y", path)
    note = None
    if tolerance:
        xy = np.c_[np.asarray(xs, float), np.asarray(ys, float)]
        off = (xy[:, 0] != ux[ix]) | (xy[:, 1] != uy[iy])
        moved = len(np.unique(xy[off], axis=0))  # rows of one spectrum count once
        if moved:
            total = len(np.unique(xy, axis=0))
            note = (f"snapped {moved} of {total} positions to a {uy.size} x {ux.size} grid "
                    f"(largest offset {max(dx, dy):.3g} um, tolerance {tolerance:g} um)")
    return ux, uy, ix, iy, note


def check_coverage(seen, ux, uy, path):
    """Refuse a grid where a position repeats or is missing (``seen``: spectra per cell)."""
    if np.any(seen > 1):
        iy, ix = np.argwhere(seen > 1)[0]
        raise MapkitError(f"position x={ux[ix]:g}, y={uy[iy]:g} appears more than once",
                          file=path, field="x, y", fix="keep one spectrum per position")
    missing = int((seen == 0).sum())
    n = int(seen.sum())
    if missing > n:   # far more holes than spectra: positions that never repeat exactly
        raise MapkitError(f"the positions are not a rectangular grid: {ux.size} distinct x and "
                          f"{uy.size} distinct y values for {n} spectra", file=path,
                          field="x, y", fix=TOLERANCE_FIX)
    if missing:
        iy, ix = np.argwhere(seen == 0)[0]
        raise MapkitError(f"position x={ux[ix]:g}, y={uy[iy]:g} is missing: the scan is not a "
                          f"rectangular grid ({int((seen == 0).sum())} positions missing)",
                          file=path, field="x, y",
                          fix="export the full rectangular scan; " + TOLERANCE_FIX)


def depth_grid(xs, ys, zs, *, tolerance: float | None = None, path=None):
    """Grid lines and each spectrum's ``(iz, iy, ix)`` from per-spectrum x, y, z (µm).

    Like :func:`grid_positions` with a depth axis: returns ``(ux, uy, uz, ix, iy, iz,
    note)``. z is never snapped (depth steps are set by the focus drive, not jittered).
    """
    ux, uy, ix, iy, note = grid_positions(xs, ys, tolerance=tolerance, path=path)
    uz, iz, _ = _lines(zs, None, "z", path)
    return ux, uy, uz, ix, iy, iz, note


def check_depth_coverage(seen, ux, uy, uz, path):
    """Refuse a (z, y, x) grid where a position repeats or is missing (one-line errors)."""
    if np.any(seen > 1):
        iz, iy, ix = np.argwhere(seen > 1)[0]
        raise MapkitError(f"position x={ux[ix]:g}, y={uy[iy]:g}, z={uz[iz]:g} appears more than "
                          "once: a depth value repeats", file=path, field="z",
                          fix="keep one spectrum per position and depth (average repeats "
                              "or give each depth its own z)")
    missing = int((seen == 0).sum())
    if missing:
        iz, iy, ix = np.argwhere(seen == 0)[0]
        raise MapkitError(f"the z values do not form a grid: position x={ux[ix]:g}, "
                          f"y={uy[iy]:g} has no spectrum at z={uz[iz]:g} ({missing} of "
                          f"{seen.size} grid positions missing)", file=path, field="z",
                          fix="measure every position at the same depths (or split the "
                              "file by depth range)")
