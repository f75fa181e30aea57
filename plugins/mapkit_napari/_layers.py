"""Turn mapkit maps and Results into napari layer data (physical scale in µm).

Only arranging: every number comes from the mapkit library.
"""

from __future__ import annotations

import numpy as np

from mapkit.export.figures import QUANTITY_CMAP  # one colour map for quantities: figures, docs, viewer


def robust_limits(img):
    """Display range from the 1st to 99th percentile, so one hot pixel doesn't wash out the map."""
    finite = np.asarray(img)[np.isfinite(img)]
    if finite.size == 0:
        return (0.0, 1.0)
    lo, hi = np.percentile(finite, [1, 99])
    return (float(lo), float(hi if hi > lo else lo + 1))


def common_kwargs(m, path):
    """Scale and origin in µm along every spatial axis: (y, x), a section's (z, x), or a
    volume's (z, y, x), which napari shows with a depth slider."""
    dims = m.spatial_dims
    return {"scale": m.spacing, "translate": tuple(float(m.coords(d)[0]) for d in dims),
            "units": ("um",) * len(dims),
            "metadata": {"mapkit_path": str(path), "mapkit_dims": dims}}


def mean_image_layer(m, path, name):
    """(layer data, steps): the mean-intensity image at once, and the rest of
    :func:`mapkit.core.overview.mean_image_steps` (None when the first image is exact)."""
    from mapkit.core.overview import mean_image_steps

    # a large lazy cube: an estimate from a sample of its tiles first, exact band by band
    steps = mean_image_steps(m)
    first = next(steps)
    mean = first.image
    meta = {**common_kwargs(m, path), "name": f"{name}: mean intensity",
            "colormap": "gray", "contrast_limits": robust_limits(mean)}
    meta["metadata"] = {**meta["metadata"], "mapkit_mean": "exact" if first.exact
                        else f"estimate:{id(steps)}"}
    return (mean, meta, "image"), (None if first.exact else (steps, first.total))


def result_layers(results, common, *, visible: bool = False):
    """Layer data for every image field of the given Results."""
    layers = []
    for r in results:
        for fname, f in r.fields.items():
            if not f.is_image or f.signal in ("flags", "domain", "replaced", "bad_pixel"):
                continue
            suffix = f" ({f.units})" if f.units else ""
            meta = {**common.get("metadata", {}), "mapkit_result": r.name,
                    "mapkit_field": fname, "units": f.units}
            kw = {**common, "metadata": meta, "visible": visible}
            if f.data.ndim == (4 if f.is_volume else 3):   # a stack: one layer per component
                for k, label in enumerate(f.axes[0].values):
                    plane = np.asarray(f.data[k], np.float32)
                    layers.append((plane, {**kw, "name": f"{r.name}: {label}",
                                           "colormap": QUANTITY_CMAP,
                                           "contrast_limits": robust_limits(plane)}, "image"))
            elif f.signal == "labels":  # napari labels: 0 is background, so shift by one
                from mapkit.export.figures import CLASS_COLOURS

                data = (np.asarray(f.data) + 1).astype(np.int32)
                # the same colour-blind-safe colours as mapkit's class figures
                colours = {None: "transparent", 0: "transparent"}
                colours.update({k + 1: CLASS_COLOURS[k % len(CLASS_COLOURS)]
                                for k in range(int(data.max()))})
                meta["mapkit_classes"] = class_legend_data(r)
                layers.append((data, {**kw, "name": "classes" if r.name == "classes" else f"{r.name}: classes", "opacity": 0.7,
                                      "colormap": colours}, "labels"))
            else:
                img = np.asarray(f.data, np.float32)
                layers.append((img, {**kw, "name": f"{r.name}: {fname}{suffix}",
                                     "colormap": QUANTITY_CMAP,
                                     "contrast_limits": robust_limits(img)}, "image"))
                if f.errors is not None:
                    err = np.asarray(f.errors, np.float32)
                    layers.append((err, {**kw, "name": f"{r.name}: {fname} uncertainty{suffix}",
                                         "colormap": QUANTITY_CMAP,
                                         "contrast_limits": robust_limits(err)}, "image"))
    return layers


def class_legend_data(r):
    """Rows of a class legend from a classification Result (numbers from its summary):
    label value in the layer, colour, name (library match and HQI when identified), area %
    and µm², and the class's mean ± sd spectrum."""
    from mapkit.export.figures import CLASS_COLOURS

    ident = {i["spectrum"]: i for i in r.summary.get("identification", [])}
    spectra = r.fields.get("class_spectra")
    rows = []
    for k, (name, area) in enumerate(r.summary.get("areas", {}).items()):
        match = ident.get(name)
        shown = name if match is None or match.get("match") in (None, "unmatched") else \
            f"{name}: {match['match']} (HQI {match['score']:.3f})"
        row = {"label": k + 1, "class": name, "name": shown,
               "colour": CLASS_COLOURS[k % len(CLASS_COLOURS)],
               "fraction_pct": area["fraction_pct"], "area_um2": area["area_um2"]}
        if spectra is not None and k < spectra.data.shape[0]:
            row["shift"] = np.asarray(spectra.axes[-1].values, float)
            row["mean"] = np.asarray(spectra.data[k], float)
            row["sd"] = None if spectra.errors is None else np.asarray(spectra.errors[k], float)
        rows.append(row)
    return rows


def optical_layer(placed, path=""):
    """Layer data for a placed micrograph: drawn in the map's µm world through an affine."""
    data = np.asarray(placed.image.data)
    rgb = data.ndim == 3
    kw = {"name": "micrograph", "affine": placed.pixel_to_map(), "rgb": rgb, "units": ("um", "um"),
          "metadata": {"mapkit_optical": str(path),
                       "description": placed.image.description}}
    if not rgb:
        kw.update(colormap="gray", contrast_limits=robust_limits(data))
    return (data, kw, "image")
