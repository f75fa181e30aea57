"""A volume (or depth section) from a stack of maps measured at given depths."""

from __future__ import annotations

import numpy as np

from ..core.ramanmap import RamanMap, check_axis
from ..errors import MapkitError
from .dispatch import read_steps


def stack_depths(maps, depths, *, source: str | None = None) -> RamanMap:
    """Stack (y, x, shift) maps taken at nominal depths ``depths`` (µm) into one map.

    Every map must share the x and y positions and the shift axis. Maps of one row
    (line scans) stack into a depth section ``(z, x, shift)``; area maps into a volume
    ``(z, y, x, shift)``. Depths must be distinct and in scan order (increasing or
    decreasing): a repeated depth is refused. Masks are stacked; the provenance of the
    first map is kept, with a ``read`` step naming the stack.

    Examples
    --------
    >>> a = RamanMap(np.ones((2, 3, 4)), raman_shift=[1., 2., 3., 4.], x=[0., 1., 2.], y=[0., 1.])
    >>> stack_depths([a, a], [0.0, 2.0]).shape
    (2, 2, 3, 4)
    """
    maps = list(maps)
    z = check_axis(depths, name="z", source=source, field_path="depths")
    if len(maps) != z.size:
        raise MapkitError(f"{len(maps)} maps for {z.size} depths", file=source, field="depths",
                          fix="give one depth per map, in the order of the maps")
    first = maps[0]
    for k, m in enumerate(maps):
        if m.intensity.ndim != 3 or m.dims[0] != "y":
            raise MapkitError(f"map {k} is a {m.kind}, not a (y, x) map", file=m.source,
                              field="intensity", fix="stack area maps or line scans only")
        for name in ("x", "y", "raman_shift"):
            a, b = getattr(m, name), getattr(first, name)
            if a.shape != b.shape or not np.allclose(a, b, rtol=0, atol=1e-9 + 1e-6 * np.ptp(b)):
                raise MapkitError(f"map {k} ({m.source}) has other {name} values than map 0 "
                                  f"({first.source})", file=m.source, field=name,
                                  fix="stack maps measured on the same grid and shift axis "
                                      "(resample or crop them first)")
    cube = np.stack([np.asarray(m.load().intensity) for m in maps])
    mask = np.stack([m.mask for m in maps])
    laser = {m.laser_wavelength for m in maps} - {None}
    if len(laser) > 1:
        raise MapkitError(f"the maps were taken with different lasers {sorted(laser)} nm",
                          file=source, field="laser_wavelength",
                          fix="stack maps of one excitation wavelength")
    if first.shape[0] == 1:     # line scans -> a depth section (z, x)
        cube, mask = cube[:, 0], mask[:, 0]
    note = (f"stacked {len(maps)} maps at nominal depths {z[0]:g} to {z[-1]:g} um "
            f"({', '.join(str(m.source) for m in maps[:3])}{', ...' if len(maps) > 3 else ''})")
    return RamanMap(cube, raman_shift=first.raman_shift, x=first.x, y=first.y, z=z, mask=mask,
                    laser_wavelength=laser.pop() if laser else None, source=source or first.source,
                    provenance=first.provenance + read_steps([note], source or first.source))


def read_depth_stack(paths, depths, **open_kwargs) -> RamanMap:
    """Open each file with :func:`~mapkit.read.open_map` and :func:`stack_depths` them."""
    from .dispatch import open_map

    paths = list(paths)
    return stack_depths([open_map(p, **open_kwargs) for p in paths], depths,
                        source=str(paths[0]) if paths else None)
