"""TIFF export with the physical pixel size, readable at the right scale by ImageJ/Fiji."""

from __future__ import annotations

import json

import numpy as np

from ..core.provenance import library_versions
from ..core.result import Field
from .atomic import atomic_path


def write_tiff(path, field: Field, *, overwrite: bool = False, parameters: dict | None = None,
               names: dict | None = None):
    """Write an image or stack of images (…, y, x) as an ImageJ-compatible TIFF.

    The pixel size goes into the TIFF resolution tags and the ImageJ ``unit``
    (micron), so common image tools show the map in µm. Parameters and
    library versions are recorded in the ImageJ ``Info`` property. Class images are
    written as class numbers from 1 (0 = masked); ``names`` (label → library name, e.g.
    ``{"class 2": "calcite"}``) go into the ``Info`` record with the plane labels.

    Depth maps: a volume field ``(…, z, y, x)`` is written as an ImageJ z stack whose
    ``spacing`` is the depth step in µm (``(component, z, y, x)`` as a ``ZCYX``
    hyperstack); a section ``(…, z, x)`` as images whose rows are depths (the row
    resolution is the depth step). The ``Info`` record gives the depths and says they are
    nominal (apparent) depths.
    """
    import tifffile

    from .labels import CLASS_NUMBERING, class_numbers, display_label

    if not field.is_image:
        raise ValueError(f"{field.signal} is not an image (axes {field.axis_names})")
    y, x = field.axes[-2].values, field.axes[-1].values
    dy = float(abs(np.median(np.diff(y)))) if len(y) > 1 else 1.0
    dx = float(abs(np.median(np.diff(x)))) if len(x) > 1 else 1.0
    data = np.asarray(field.data)
    names = names or {}
    extra = {}
    if field.signal == "labels":
        data = class_numbers(data)
        n = int(data.max()) if data.size else 0
        extra = {"numbering": CLASS_NUMBERING,
                 "classes": {str(k): display_label(f"class {k}", names) for k in range(1, n + 1)}}
    if data.dtype.kind == "f" or data.dtype == np.float64:
        data = data.astype(np.float32)
    elif data.dtype.kind == "i" and data.dtype.itemsize > 2:
        data = data.astype(np.int16)
    names_ = field.axis_names
    spacing = 1.0
    depth = {}
    axes = "ZYX" if data.ndim == 3 else "YX"
    if "z" in names_:
        z = np.asarray(field.axes[names_.index("z")].values, float)
        dz = float(abs(np.median(np.diff(z)))) if z.size > 1 else 1.0
        depth = {"z_um": z.tolist(), "z_step_um": dz,
                 "depth": "nominal (apparent) unless corrected for refraction"}
        if names_[-3:] == ("z", "y", "x"):      # a volume: an ImageJ z stack
            spacing = dz
            if data.ndim == 4:                  # (component, z, y, x) -> ZCYX
                data = np.ascontiguousarray(np.moveaxis(data, 0, 1))
                axes = "ZCYX"
        else:
            depth["rows"] = "z"
    info = json.dumps({**depth, "signal": field.signal, "units": field.units,
                       "long_name": CLASS_NUMBERING if field.signal == "labels" else field.long_name,
                       "origin_um": [float(y[0]), float(x[0])],
                       "labels": [display_label(v, names) for v in field.axes[0].values]
                       if (len(names_) >= 3 and names_[-3] != "z") or axes == "ZCYX" else [],
                       **extra,
                       "parameters": parameters or {}, "versions": library_versions()})
    with atomic_path(path, overwrite=overwrite) as tmp:
        tifffile.imwrite(tmp, data, imagej=True, resolution=(1.0 / dx, 1.0 / dy),
                         metadata={"unit": "micron", "axes": axes, "spacing": spacing,
                                   "Info": info})
    return path
