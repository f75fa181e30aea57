"""Writers: image and labels layers → TIFF with the µm pixel size (mapkit's TIFF export)."""

from __future__ import annotations

import numpy as np


def _field(data, meta, signal):
    """The layer as a mapkit Field: its axes named as the map's (y, x; a section's z, x; a
    volume's z, y, x) with the layer's µm scale and origin; one more leading axis is a
    stack of planes."""
    from mapkit.core.result import Axis, Field

    data = np.asarray(data)
    dims = tuple(meta.get("metadata", {}).get("mapkit_dims") or ("y", "x"))
    dims = dims[-min(len(dims), data.ndim):]
    scale = tuple(meta.get("scale") or (1.0,) * data.ndim)
    translate = tuple(meta.get("translate") or (0.0,) * data.ndim)
    first = data.ndim - len(dims)          # the data axis of the first spatial axis
    axes = tuple(Axis(d, translate[first + i] + scale[first + i] * np.arange(data.shape[first + i]),
                      "um") for i, d in enumerate(dims))
    if first:
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
