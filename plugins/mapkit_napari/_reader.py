"""Reader: mapkit NeXus files → napari layers with the physical scale in µm."""

from __future__ import annotations

from pathlib import Path

import numpy as np


def get_reader(path):
    """Return a reader for mapkit map/results files, or None (napari's convention) otherwise."""
    from mapkit.read.nexus import is_nexus_map

    if isinstance(path, list):
        if len(path) != 1:
            return None
        path = path[0]
    if not str(path).lower().endswith((".h5", ".hdf5", ".nxs", ".nx5")):
        return None
    return read_layers if is_nexus_map(path) else None


def _robust_limits(img):
    """Display range from the 1st to 99th percentile, so one hot pixel doesn't wash out the map."""
    finite = img[np.isfinite(img)]
    if finite.size == 0:
        return (0.0, 1.0)
    lo, hi = np.percentile(finite, [1, 99])
    return (float(lo), float(hi if hi > lo else lo + 1))


def read_layers(path):
    """Layers for a mapkit file: the mean-intensity image, then every image result."""
    from mapkit.errors import MapkitError
    from mapkit.read import open_map
    from mapkit.read.nexus import read_results

    if isinstance(path, list):
        path = path[0]
    try:
        m = open_map(path)
        results = read_results(path)
    except MapkitError:
        return []
    dy, dx = m.pixel_size
    common = {"scale": (dy, dx), "translate": (float(m.y[0]), float(m.x[0])), "units": ("um", "um"),
              "metadata": {"mapkit_path": str(path)}}
    stem = Path(path).stem
    # the mean over the shift axis is computed chunk-wise by Dask (the cube stays on disk)
    mean = np.asarray(m.intensity.mean(axis=-1).compute() if m.is_lazy
                      else m.intensity.mean(axis=-1), dtype=np.float32)
    layers = [(mean, {**common, "name": f"{stem}: mean intensity", "colormap": "gray",
                      "contrast_limits": _robust_limits(mean)}, "image")]
    for rname, r in results.items():
        for fname, f in r["fields"].items():
            names = list(f["axes"])
            data = f["data"]
            if names[-2:] != ["y", "x"] or f["signal"] == "flags":
                continue
            units = f["units"].decode() if isinstance(f["units"], bytes) else str(f["units"])
            suffix = f" ({units})" if units else ""
            if data.ndim == 3:   # a stack: one layer per component
                for k, label in enumerate(f["axes"][names[0]]):
                    label = label.decode() if isinstance(label, bytes) else str(label)
                    plane = data[k].astype(np.float32)
                    layers.append((plane, {**common, "name": f"{rname}: {label}",
                                           "colormap": "viridis", "visible": False,
                                           "contrast_limits": _robust_limits(plane)}, "image"))
            elif f["signal"] == "labels":  # napari labels: 0 is background, so shift by one
                layers.append(((data + 1).astype(np.int32),
                               {**common, "name": f"{rname}: classes", "opacity": 0.6,
                                "visible": False}, "labels"))
            else:
                img = data.astype(np.float32)
                layers.append((img, {**common, "name": f"{rname}: {fname}{suffix}",
                                     "colormap": "viridis", "visible": False,
                                     "contrast_limits": _robust_limits(img)}, "image"))
    return layers
