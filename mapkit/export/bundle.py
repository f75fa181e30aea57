"""Write a set of results as one bundle: the NeXus results file, a TIFF per image, figures."""

from __future__ import annotations

import json
import re
from pathlib import Path

import numpy as np

from ..core.provenance import library_versions
from ..core.result import Field
from .atomic import all_or_nothing, atomic_path
from .figures import bit_categories, save_image_figure, save_spectra_figure
from .nexus import write_results_file
from .tiff import write_tiff

#: fields written to the results file only (3-D masks, per-pixel index images)
_NO_IMAGE_FILES = ("replaced", "mask", "domains")


def safe_name(name: str) -> str:
    """A file-name-safe version of a label."""
    return re.sub(r"[^A-Za-z0-9_.-]+", "_", str(name)).strip("_") or "map"


@all_or_nothing   # a failure part-way leaves the previous bundle as it was
def write_bundle(outdir, m, results, *, stem: str, overwrite: bool = False, figures: bool = True,
                 inputs: dict | None = None, results_name: str = "results.h5",
                 formats=("png",), write_h5: bool = True, csv: bool = True,
                 optical=None) -> list[Path]:
    """Write ``results`` of map ``m`` into ``outdir``; returns every path written.

    - ``results.h5``: the map and every result (docs/file-layout.md);
    - ``<stem>_<result>[_<field>].tif`` for every image field (stacks as multi-page TIFF),
      plus ``*_uncertainty.tif`` where a field carries errors;
    - ``<stem>_maps.csv``: long-form table of every image value per pixel;
    - with ``figures``, a figure per image (per component for stacks) and per spectra field,
      in each of ``formats`` (``png``, ``svg``);
    - with ``optical`` (a placed micrograph), the micrograph in the results file and the
      maps drawn over it (:func:`write_optical_figures`).
    """
    from .table import write_long_csv

    outdir = Path(outdir)
    written = []
    if write_h5:
        written.append(write_results_file(outdir / results_name, m, results, overwrite=overwrite,
                                          inputs=inputs, optical=optical))
    if csv:
        written.append(write_long_csv(outdir / f"{stem}_maps.csv", m, results,
                                      overwrite=overwrite))

    def each_format(save, base, *args, **kw):
        for ext in formats:
            written.append(save(outdir / f"{base}.{ext}", *args, overwrite=overwrite, **kw))

    from .labels import class_names, display_label, identified_names

    for r in results:
        names = identified_names(r)
        for fname, fld in r.fields.items():
            if not fld.is_image or fname in _NO_IMAGE_FILES or \
                    fld.data.ndim > (4 if fld.is_volume else 3):
                continue
            base = f"{stem}_{r.name}" + ("" if fname in ("image", r.name) else f"_{fname}")
            written.append(write_tiff(outdir / f"{base}.tif", fld, overwrite=overwrite,
                                      parameters=r.parameters, names=names))
            if fld.errors is not None and fld.data.ndim == 2:
                err = Field(f"{fld.signal}_uncertainty", fld.errors, fld.axes, fld.units,
                            long_name=f"standard uncertainty of {fld.long_name or fld.signal}")
                written.append(write_tiff(outdir / f"{base}_uncertainty.tif", err,
                                          overwrite=overwrite))
                if figures:
                    each_format(save_image_figure, f"{base}_uncertainty", err,
                                title=f"{r.name}: uncertainty")
            if not figures or fld.is_volume:   # a volume: the TIFF z stack (and the viewer)
                continue
            if fld.data.ndim == 3:
                for k, label in enumerate(fld.axes[0].values):
                    each_format(save_image_figure, f"{base}_{safe_name(label)}", fld, k,
                                title=f"{r.name}: {display_label(label, names)}")
            elif fld.signal == "labels":
                n = int(np.max(fld.data)) + 1 if fld.data.size else 0
                each_format(save_image_figure, base, fld, title="classes" if r.name == "classes" else f"{r.name}: classes",
                            classes=True, class_names=class_names(r, n))
            else:
                bits = _bit_meanings(fld.signal)
                each_format(save_image_figure, base, fld,
                            title=r.name if fname in ("image", r.name) else f"{r.name}: {fname}",
                            categories=None if bits is None else bit_categories(fld.data, bits))
        if figures:
            for fname, fld in r.fields.items():
                if fld.axis_names[-1] == "raman_shift" and fld.data.ndim == 2:
                    each_format(save_spectra_figure, f"{stem}_{r.name}_{fname}", fld,
                                title=f"{r.name}: {fname}", names=names)
    if figures and optical is not None:
        written += write_optical_figures(outdir, stem, optical, results, overwrite=overwrite,
                                         formats=formats)
    return written


#: results whose maps are drawn over the micrograph (components, classes, abundances, content)
OVERLAID = ("nmf", "mcr", "kmeans", "classes", "unmixing", "concentration")


def overlay_fields(results):
    """(result, field, plane index or None, label, is_classes) of every map drawn over the
    micrograph, in the order of ``results``."""
    out = []
    for r in results:
        if r.name not in OVERLAID:
            continue
        for fname, fld in r.fields.items():
            if not fld.is_image or fname in _NO_IMAGE_FILES or fname == "flags" \
                    or fname == "residual":
                continue
            if fld.data.ndim == 3:
                out += [(r, fld, k, f"{r.name}: {label}", False)
                        for k, label in enumerate(fld.axes[0].values)]
            elif fld.data.ndim == 2:
                out.append((r, fld, None, f"{r.name}: {fname}", fld.signal == "labels"))
    return out


def write_optical_figures(outdir, stem, placed, results, *, overwrite=False, formats=("png",),
                          opacity: float = 0.6) -> list[Path]:
    """Each component, class and content map over the micrograph (``*_on_optical``), plus the
    side-by-side view of the micrograph and the class map (``*_optical_side_by_side``)."""
    outdir = Path(outdir)
    written = []
    side = None
    for r, fld, k, label, classes in overlay_fields(results):
        base = f"{stem}_{safe_name(label.replace(': ', '_'))}_on_optical"
        for ext in formats:
            written.append(save_image_figure(outdir / f"{base}.{ext}", fld, k,
                                             title=f"{label} over the micrograph",
                                             classes=classes, underlay=placed, opacity=opacity,
                                             overwrite=overwrite))
        if side is None or (classes and not side[3]):
            side = (fld, k, label, classes)
    if side is not None:
        fld, k, label, classes = side
        for ext in formats:
            written.append(save_image_figure(outdir / f"{stem}_optical_side_by_side.{ext}", fld,
                                             k, title=label, classes=classes, underlay=placed,
                                             side_by_side=True, overwrite=overwrite))
    return written


def _bit_meanings(signal: str):
    """The bits of a quality bit field (drawn with a categorical legend), or None."""
    if signal == "flags":
        from ..quantify.concentration import FLAG_BITS

        return FLAG_BITS
    if signal == "rejected":
        from ..reduce.peakfit import REJECT_MEANING

        return REJECT_MEANING
    return None


def write_summary(outdir, summary: dict, name: str = "summary.json") -> Path:
    """The run's numbers, settings and library versions as JSON (always replaced)."""
    path = Path(outdir) / name
    with atomic_path(path, overwrite=True) as tmp:
        tmp.write_text(json.dumps({**summary, "versions": library_versions()}, indent=2,
                                  default=str))
    return path
