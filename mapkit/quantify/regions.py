"""Statistics of a quantity map over regions: classes, drawn polygons, the whole map."""

from __future__ import annotations

import numpy as np

from ..errors import MapkitError
from .concentration import MASKED, summarise


def polygon_mask(x, y, vertices) -> np.ndarray:
    """Pixels (ny, nx) whose centres lie inside a polygon given in stage units (µm).

    Examples
    --------
    >>> polygon_mask(np.arange(4.), np.arange(3.), [(0.5, -1), (2.5, -1), (2.5, 5), (0.5, 5)]).astype(int).tolist()
    [[0, 1, 1, 0], [0, 1, 1, 0], [0, 1, 1, 0]]
    """
    from matplotlib.path import Path

    v = np.asarray(vertices, float)
    if v.ndim != 2 or v.shape[1] != 2 or v.shape[0] < 3:
        raise MapkitError("a region needs at least three (x, y) vertices in um", field="region",
                          fix="for example x1,y1;x2,y2;x3,y3")
    xx, yy = np.meshgrid(np.asarray(x, float), np.asarray(y, float))
    inside = Path(v).contains_points(np.column_stack([xx.ravel(), yy.ravel()]))
    return inside.reshape(xx.shape)


def parse_region(text: str):
    """``name:x1,y1;x2,y2;…`` → (name, vertices)."""
    name, _, rest = text.partition(":")
    try:
        verts = [tuple(float(v) for v in pair.split(",")) for pair in rest.split(";") if pair]
    except ValueError:
        raise MapkitError(f"region {text!r} is not NAME:x1,y1;x2,y2;x3,y3", field="--region",
                          fix="give vertices in um separated by ';'") from None
    return name or "region", verts


def region_statistics(values, flags, regions: dict) -> dict:
    """Summary statistics (mean, sd, RSD, percentiles, histogram, flag counts) per region.

    ``regions`` maps a name to a boolean image; masked pixels never count.
    """
    out = {}
    for name, region in regions.items():
        region = np.asarray(region, bool)
        if region.shape != np.shape(values):
            raise MapkitError(f"region {name!r} has shape {region.shape}, the map "
                              f"{np.shape(values)}", field="region", fix="draw it on this map")
        f = np.where(region, flags, MASKED).astype(np.uint8)
        out[name] = summarise(np.where(region, values, np.nan), f)
    return out


def class_regions(labels, names=None) -> dict:
    """One boolean region per class of a label image (−1 = masked)."""
    n = int(labels.max()) + 1 if labels.size and labels.max() >= 0 else 0
    names = names or [f"class {k + 1}" for k in range(n)]
    return {names[k]: labels == k for k in range(n)}
