"""Long-form CSV export: one row per pixel, its position in µm, then every image value."""

from __future__ import annotations

import csv

import numpy as np

from ..core.provenance import library_versions
from .atomic import atomic_path


def image_columns(results):
    """(column name, 2-D array) for every image in the results, stacks split by component.

    Components carry their library name where one was identified
    (``nmf.images.component 1 (calcite)``); class images hold class numbers from 1
    (0 = masked), as everywhere else.
    """
    from .labels import CLASS_NUMBERING, class_numbers, display_label, identified_names

    cols = []
    for r in results:
        names = identified_names(r)
        for fname, fld in r.fields.items():
            spatial = 3 if fld.is_volume else 2
            if not fld.is_image or fld.data.ndim > spatial + 1:
                continue
            unit = f" [{fld.units}]" if fld.units else ""
            base = r.name if fname in ("image", r.name) else f"{r.name}.{fname}"
            if fld.data.ndim == spatial + 1:
                for k, label in enumerate(fld.axes[0].values):
                    cols.append((f"{base}.{display_label(label, names)}{unit}", fld.data[k]))
            elif fld.signal == "labels":
                cols.append((f"{base} [{CLASS_NUMBERING}]", class_numbers(fld.data)))
            else:
                cols.append((f"{base}{unit}", fld.data))
                if fld.errors is not None:
                    cols.append((f"{base}.uncertainty{unit}", fld.errors))
    return cols


def write_long_csv(path, m, results, *, overwrite: bool = False):
    """Write x (µm), y (µm), mask and every image value per pixel; a comment line records
    the library versions and the class legends. Masked or undefined values are empty
    cells."""
    cols = image_columns(results)
    dims = m.spatial_dims[::-1]          # x, y; x, z (a section); x, y, z (a volume)
    grids = np.meshgrid(*[m.coords(d) for d in m.spatial_dims], indexing="ij")[::-1]
    with atomic_path(path, overwrite=overwrite) as tmp:
        with open(tmp, "w", newline="") as fh:
            fh.write("# mapkit long-form export; versions: " + ", ".join(
                f"{k} {v}" for k, v in library_versions().items())
                + "".join(f"; {line}" for line in _class_legends(results)) + "\n")
            w = csv.writer(fh)
            w.writerow([f"{d} [um]" for d in dims] + ["masked"] + [c[0] for c in cols])
            flat = [c[1].ravel() for c in cols]
            coords = [g.ravel() for g in grids]
            for i, bad in enumerate(m.mask.ravel()):
                w.writerow([f"{c[i]:.6g}" for c in coords] + [int(bad)]
                           + ["" if not np.isfinite(v[i]) else f"{v[i]:.6g}" for v in flat])
    return path


def _class_legends(results):
    """``kmeans.labels: 1 = class 1 (calcite), 2 = class 2, ...`` for each class image."""
    from .labels import display_label, identified_names

    out = []
    for r in results:
        names = identified_names(r)
        for fname, fld in r.fields.items():
            if fld.signal == "labels" and fld.is_image and fld.data.size:
                base = r.name if fname in ("image", r.name) else f"{r.name}.{fname}"
                n = int(np.max(fld.data)) + 1
                out.append(f"{base}: " + ", ".join(
                    f"{k} = {display_label(f'class {k}', names)}" for k in range(1, n + 1))
                           + ", 0 = masked")
    return out
