"""Writers: image and labels layers → TIFF with the µm pixel size (mapkit's TIFF export)."""

from __future__ import annotations

import numpy as np


def _field(data, meta, signal):
    from mapkit.core.result import Axis, Field

    scale = meta.get("scale") or (1.0, 1.0)
    translate = meta.get("translate") or (0.0, 0.0)
    data = np.asarray(data)
    ny, nx = data.shape[-2:]
    axes = (Axis("y", translate[-2] + scale[-2] * np.arange(ny), "um"),
            Axis("x", translate[-1] + scale[-1] * np.arange(nx), "um"))
    if data.ndim == 3:
        axes = (Axis("plane", np.arange(data.shape[0])),) + axes
    units = meta.get("metadata", {}).get("units", "")
    return Field(signal, data, axes, units, long_name=meta.get("name", ""))


def write_image(path, data, meta):
    from mapkit.export.tiff import write_tiff

    write_tiff(path, _field(data, meta, "image"), overwrite=True,
               parameters={"layer": meta.get("name", "")})
    return [path]


def write_labels(path, data, meta):
    from mapkit.export.tiff import write_tiff

    # napari labels count from 1 (0 = background); mapkit classes from 0 (-1 = none)
    write_tiff(path, _field(np.asarray(data, np.int16) - 1, meta, "labels"), overwrite=True,
               parameters={"layer": meta.get("name", "")})
    return [path]
