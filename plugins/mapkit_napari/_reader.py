"""Reader: mapkit NeXus files and text-table maps → napari layers with the scale in µm."""

from __future__ import annotations

from pathlib import Path

from ._layers import common_kwargs, mean_image_layer, result_layers, robust_limits

_HDF5 = (".h5", ".hdf5", ".nxs", ".nx5")
_TEXT = (".csv", ".tsv", ".txt", ".dat")


def get_reader(path):
    """Return a reader for files mapkit opens, or None (napari's convention) otherwise."""
    from mapkit.read.nexus import is_nexus_map

    if isinstance(path, list):
        if len(path) != 1:
            return None
        path = path[0]
    suffix = Path(str(path)).suffix.lower()
    if suffix in _HDF5:
        return read_layers if is_nexus_map(path) else None
    if suffix in _TEXT:
        return read_layers if _looks_like_table_map(path) else None
    return None


def _looks_like_table_map(path) -> bool:
    try:
        with open(path, encoding="utf-8-sig") as fh:
            for line in fh:
                if line.strip() and not line.lstrip().startswith("#"):
                    head = line.lower()
                    return "x" in head and ("y" in head or "z" in head)
    except (OSError, UnicodeDecodeError):
        return False
    return False


def read_layers(path):
    """Layers for a map file: the mean-intensity image, then every image result."""
    from mapkit.errors import MapkitError
    from mapkit.read import open_map
    from mapkit.read.nexus import is_nexus_map, read_result_objects

    if isinstance(path, list):
        path = path[0]
    try:
        m = open_map(path)
        results = read_result_objects(path) if is_nexus_map(path) else []
    except MapkitError:
        return []
    mean, refine = mean_image_layer(m, path, Path(path).stem)
    layers = [mean]
    layers += result_layers(results, common_kwargs(m, path))
    placed = None
    if is_nexus_map(path):
        from mapkit.read.optical import read_placed_image

        placed = read_placed_image(path)
    if placed is not None:
        # the micrograph at the bottom; the maps above it let it show through
        from ._layers import optical_layer

        for _, kw, _kind in layers:
            kw.setdefault("opacity", 0.6)
        layers.insert(0, optical_layer(placed, path))
    if refine is not None:   # a large cube: the first image is an estimate, refined in the background
        k = next(i for i, lyr in enumerate(layers) if lyr is mean)
        layers[k] = _refine(mean, *refine, desc=f"mean image of {Path(path).name}")
    return layers


def _refine(mean, steps, total, desc):
    """The layer to add: the estimate, refined by a worker; with no event loop to show the
    steps in, the exact image at once (as before)."""
    from qtpy.QtWidgets import QApplication

    from ._refine import finish_now, refine_in_background

    data, kw, kind = mean
    if QApplication.instance() is None:
        last = finish_now(steps)
        kw["contrast_limits"] = robust_limits(last.image)
        kw["metadata"]["mapkit_mean"] = "exact"
        return (last.image, kw, kind)
    refine_in_background(kw["metadata"]["mapkit_mean"], steps, total, desc)
    return mean
