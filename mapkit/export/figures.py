"""Figures: maps with a scale bar and a colourbar with units, spectra on the shift axis."""

from __future__ import annotations

import numpy as np

from ..core.result import Field
from .atomic import atomic_path

#: Colour-blind-safe qualitative palette for classes (Okabe & Ito 2008, "Color
#: Universal Design"); quantities use the perceptually uniform 'cividis'.
CLASS_COLOURS = ("#0072B2", "#E69F00", "#009E73", "#CC79A7", "#56B4E9", "#D55E00",
                 "#F0E442", "#000000")
QUANTITY_CMAP = "cividis"


def _nice_length(span_um: float) -> float:
    """A round scale-bar length near a fifth of the field of view."""
    target = span_um / 5
    mag = 10 ** np.floor(np.log10(target))
    for f in (5, 2, 1):
        if f * mag <= target:
            return float(f * mag)
    return float(mag)


def _scale_bar(ax, extent):
    from matplotlib.patches import Rectangle
    from matplotlib.patheffects import withStroke

    x0, x1, y0, y1 = extent
    length = _nice_length(abs(x1 - x0))
    pad = 0.05 * abs(x1 - x0)
    h = 0.02 * abs(y1 - y0)
    bx, by = x0 + pad, y0 + pad if y0 < y1 else y0 - pad
    ax.add_patch(Rectangle((bx, by), length, h, color="white", ec="black", lw=0.6))
    label = f"{length:g} µm"
    # the label sits above the bar on screen, inside the image (below it, it ran over the
    # frame and the tick labels); y runs downwards on screen where y0 > y1
    ty = by - 0.6 * h if y0 > y1 else by + 1.6 * h
    ax.text(bx + length / 2, ty, label, ha="center", va="bottom", color="white", fontsize=8,
            path_effects=[withStroke(linewidth=2, foreground="black")])


def _figure(**kw):
    from matplotlib.figure import Figure  # no pyplot: no global state, no GUI backend
    return Figure(**kw)


def robust_limits(img, low: float = 2.0, high: float = 98.0):
    """Colour limits from the ``low``-``high`` percentiles of the finite values, so a few
    outliers (a fit that ran off, a hot pixel) do not flatten the real contrast.

    Examples
    --------
    >>> v = np.r_[np.linspace(0, 1, 98), 1e6, np.nan]
    >>> [round(float(x), 2) for x in robust_limits(v)]
    [0.02, 0.99]
    """
    v = np.asarray(img, float)
    v = v[np.isfinite(v)]
    if v.size == 0:
        return 0.0, 1.0
    lo, hi = np.percentile(v, [low, high])
    if not hi > lo:
        lo, hi = float(v.min()), float(v.max())
    if not hi > lo:
        lo, hi = lo - 0.5, hi + 0.5
    return float(lo), float(hi)


def bit_categories(values, bits: dict) -> dict:
    """Legend text for every bit-field value present: 0 "none", else the set bits joined.

    Examples
    --------
    >>> bit_categories(np.array([0, 3, 3, 8]), {1: "low", 2: "lower", 8: "masked"})
    {0: 'none', 3: 'low + lower', 8: 'masked'}
    """
    out = {}
    for v in np.unique(np.asarray(values).astype(np.int64)):
        names = [text for bit, text in bits.items() if int(v) & bit]
        out[int(v)] = " + ".join(names) if names else "none"
    return out
def _draw_micrograph(ax, placed, extent, *, margin: float = 0.0, outline: bool = False,
                     max_side: int = 1200):
    """Draw a placed micrograph (mapkit.register.PlacedImage) under ``extent`` (µm), resampled
    onto the map's frame at about its own pixel size; ``outline`` marks the map's edge."""
    x0, x1, y1, y0 = extent          # image extents run top (y0) to bottom (y1)
    w, h = abs(x1 - x0), abs(y1 - y0)
    lo_x, hi_x = min(x0, x1) - margin * w, max(x0, x1) + margin * w
    lo_y, hi_y = min(y0, y1) - margin * h, max(y0, y1) + margin * h
    step = max(placed.pixel_size_on_map(), max(hi_x - lo_x, hi_y - lo_y) / max_side)
    xs = np.arange(lo_x + step / 2, hi_x, step)
    ys = np.arange(lo_y + step / 2, hi_y, step)
    img = placed.resample(xs, ys)
    if img.ndim == 2:
        finite = img[np.isfinite(img)]
        lo, hi = np.percentile(finite, [1, 99]) if finite.size else (0.0, 1.0)
        ax.imshow(np.ma.masked_invalid(img), cmap="gray", vmin=lo, vmax=hi if hi > lo else lo + 1,
                  extent=(lo_x, hi_x, hi_y, lo_y), interpolation="bilinear")
    else:
        rgba = np.dstack([np.nan_to_num(img), np.isfinite(img[..., 0]).astype(float)])
        ax.imshow(np.clip(rgba, 0, 1), extent=(lo_x, hi_x, hi_y, lo_y),
                  interpolation="bilinear")
    if outline:
        from matplotlib.patches import Rectangle

        ax.add_patch(Rectangle((min(x0, x1), min(y0, y1)), w, h, fill=False,
                               ec=CLASS_COLOURS[5], lw=1.2, label="Raman map"))
    ax.set_xlim(lo_x, hi_x)
    ax.set_ylim(hi_y, lo_y)
    return (lo_x, hi_x, hi_y, lo_y)


def save_image_figure(path, field: Field, index: int | None = None, *, title: str = "",
                      classes: bool = False, overwrite: bool = False, dpi: int = 150,
                      class_names=None, categories: dict | None = None,
                      underlay=None, opacity: float = 0.6, side_by_side: bool = False):
    """Save one image (a 2-D field, or plane ``index`` of a stack) as PNG or SVG.

    Quantities use the 2nd-98th percentile as colour limits (:func:`robust_limits`; the
    colourbar extends where values lie beyond). ``classes``: label images (0-based
    indices, -1 masked) drawn with a legend numbered from 1, with ``class_names`` where
    given. ``categories`` (value → text): a categorical legend, e.g. for bit fields.

    ``underlay`` (a :class:`mapkit.register.PlacedImage`) draws the map at ``opacity`` over
    the micrograph, or, with ``side_by_side``, the micrograph (map edge outlined) beside it.
    """
    from matplotlib.colors import BoundaryNorm, ListedColormap
    from matplotlib.patches import Patch

    img = np.asarray(field.data if index is None else field.data[index], dtype=float)
    if img.ndim == 3 and field.is_volume:   # a volume: its middle depth layer
        z, kz = field.axes[-3].values, img.shape[0] // 2
        img = img[kz]
        title = f"{title} (z = {z[kz]:g} µm, layer {kz + 1} of {len(z)})".strip()
    y, x = field.axes[-2].values, field.axes[-1].values
    dy = abs(y[1] - y[0]) if len(y) > 1 else 1.0
    dx = abs(x[1] - x[0]) if len(x) > 1 else 1.0
    extent = (x[0] - dx / 2, x[-1] + dx / 2, y[-1] + dy / 2, y[0] - dy / 2)
    if underlay is not None and side_by_side:
        fig = _figure(figsize=(9.8, 4.2), layout="constrained")
        left, ax = fig.subplots(1, 2)
        around = _draw_micrograph(left, underlay, extent, margin=0.1, outline=True)
        left.set_xlabel("x (µm)")
        left.set_ylabel("y (µm)")
        left.set_title("micrograph (map outlined)", fontsize=10)
        _scale_bar(left, around)
    else:
        fig = _figure(figsize=(5.2, 4.2), layout="constrained")
        ax = fig.add_subplot()
        if underlay is not None:
            _draw_micrograph(ax, underlay, extent, margin=0.05)
    if classes or categories is not None:
        if classes:
            n = max(int(np.nanmax(img)) + 1, 1) if np.isfinite(img).any() else 1
            values = list(range(n))
            names = list(class_names or [])
            labels = [f"class {k + 1}" + (f": {names[k]}" if k < len(names) and names[k]
                                          else "") for k in values]
            colours = [CLASS_COLOURS[k % len(CLASS_COLOURS)] for k in values]
            masked = np.ma.masked_less(img, 0)
        else:
            values = sorted(categories)
            labels = [categories[v] for v in values]
            colours = ["#f2f2f2" if v == 0 else CLASS_COLOURS[k % len(CLASS_COLOURS)]
                       for k, v in enumerate(values)]
            masked = np.ma.masked_invalid(img)
        # draw category indices, not the values themselves (bit fields are sparse)
        lookup = {v: i for i, v in enumerate(values)}
        index_img = np.ma.masked_array(np.zeros(img.shape), mask=np.ma.getmaskarray(masked))
        for v, i in lookup.items():
            index_img[np.asarray(img) == v] = i
        cmap = ListedColormap(colours)
        cmap.set_bad("#bbbbbb")
        im = ax.imshow(index_img, extent=extent, cmap=cmap, interpolation="nearest",
                       norm=BoundaryNorm(np.arange(-0.5, len(values) + 0.5), len(values)))
        cb = None
        handles = [Patch(facecolor=c, edgecolor="#555555", label=t)
                   for c, t in zip(colours, labels)]
        if max(len(t) for t in labels) > 24:   # long texts below the map, not beside it
            ax.legend(handles=handles, loc="upper center", bbox_to_anchor=(0.5, -0.2),
                      fontsize=7, frameon=False, ncol=2)
        else:
            ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(1.02, 1.0),
                      fontsize=7, frameon=False)
    else:
        lo, hi = robust_limits(img)
        finite = img[np.isfinite(img)]
        extend = {(False, False): "neither", (True, False): "min", (False, True): "max",
                  (True, True): "both"}[(bool(finite.size and finite.min() < lo),
                                         bool(finite.size and finite.max() > hi))]
        im = ax.imshow(np.ma.masked_invalid(img), extent=extent, cmap=QUANTITY_CMAP,
                       interpolation="nearest", vmin=lo, vmax=hi)
        im.cmap.set_bad("#bbbbbb")
        cb = fig.colorbar(im, ax=ax, extend=extend)
        label = field.long_name or field.signal
        if len(label) > 40:   # a long description would be cut off beside the bar
            label = field.signal
        cb.set_label(label + (f" ({field.units})" if field.units else ""))
    if underlay is not None and not side_by_side:
        im.set_alpha(opacity)
        if cb is not None:
            cb.solids.set_alpha(1)
    ax.set_xlabel("x (µm)")
    if field.axes[-2].name == "z":    # a depth section: depth downward, x and z scale bars
        ax.set_ylabel("depth z (µm, apparent)")
        section_scale_bars(ax, extent, "apparent")
    else:
        ax.set_ylabel("y (µm)")
        _scale_bar(ax, extent)
    ax.set_title(title, fontsize=10)
    with atomic_path(path, overwrite=overwrite) as tmp:
        fig.savefig(tmp, dpi=dpi, format=str(path).rsplit(".", 1)[-1], bbox_inches="tight")
    return path


def save_spectra_figure(path, field: Field, *, title: str = "", classes: bool = False,
                        overwrite: bool = False, dpi: int = 150, names: dict | None = None):
    """Save stacked spectra (component or class spectra) against Raman shift; ``names``
    (label → library name) are shown in the legend beside the labels."""
    from .labels import display_label

    shift = field.axes[-1].values
    names = [display_label(v, names or {}) for v in field.axes[0].values]
    fig = _figure(figsize=(6.4, 4.0), layout="constrained")
    ax = fig.add_subplot()
    data = np.asarray(field.data, float)
    offset = 1.1 * np.nanmax(np.abs(data)) if data.size else 1.0
    for k, (name, spec) in enumerate(zip(names, data)):
        colour = CLASS_COLOURS[k % len(CLASS_COLOURS)]
        ax.plot(shift, spec + k * offset, color=colour, lw=1.0, label=name)
        if field.errors is not None:
            sd = np.asarray(field.errors[k], float)
            ax.fill_between(shift, spec - sd + k * offset, spec + sd + k * offset,
                            color=colour, alpha=0.25, lw=0)
    ax.set_xlabel("Raman shift (cm⁻¹)")
    ax.set_ylabel(f"intensity ({field.units}), offset" if field.units else "intensity, offset")
    ax.set_yticks([])
    ax.legend(fontsize=8, loc="upper right")
    ax.set_title(title, fontsize=10)
    with atomic_path(path, overwrite=overwrite) as tmp:
        fig.savefig(tmp, dpi=dpi, format=str(path).rsplit(".", 1)[-1])
    return path


def save_calibration_figure(path, calibration, *, overwrite: bool = False, dpi: int = 150):
    """Calibration curve with its standards, LOD/LOQ, and the residuals beneath.

    For PLS: predicted against known content, and RMSECV against the number of latent
    variables.
    """
    fig = _figure(figsize=(6.4, 5.6), layout="constrained")
    top, bottom = fig.subplots(2, 1, height_ratios=(3, 1.4))
    unit = calibration.unit
    if hasattr(calibration, "coef_"):
        x, y = calibration.x_, calibration.y_
        xs = np.linspace(min(0.0, x.min()), x.max() * 1.05, 200)
        top.plot(x, y, "o", color=CLASS_COLOURS[0], ms=4, label="standards")
        top.plot(xs, calibration.predict(xs), color="black", lw=1,
                 label=f"{'linear' if calibration.degree == 1 else 'quadratic'} fit, "
                       f"r² = {calibration.r2_:.4f}")
        for value, name, style in ((calibration.lod_, "LOD", ":"), (calibration.loq_, "LOQ", "--")):
            top.axvline(value, color=CLASS_COLOURS[5], ls=style, lw=1,
                        label=f"{name} {value:.3g} {unit}")
        top.set_ylabel("response")
        bottom.axhline(0, color="black", lw=0.8)
        bottom.plot(x, calibration.residuals_, "o", color=CLASS_COLOURS[0], ms=3)
        bottom.set_ylabel("residual")
        bottom.set_xlabel(f"{calibration.analyte} ({unit})")
        top.set_xlabel(f"{calibration.analyte} ({unit})")
    else:  # PLS
        fitted = calibration.y_ - calibration.residuals_
        top.plot(calibration.y_, fitted, "o", color=CLASS_COLOURS[0], ms=4, label="standards")
        lim = [calibration.y_.min(), calibration.y_.max()]
        top.plot(lim, lim, color="black", lw=1, label="ideal")
        top.set_xlabel(f"known {calibration.analyte} ({unit})")
        top.set_ylabel(f"predicted ({unit})")
        k = np.arange(1, calibration.rmsecv_.size + 1)
        bottom.plot(k, calibration.rmsecv_, "o-", color=CLASS_COLOURS[1], ms=3)
        bottom.axvline(calibration.n_components_, color="grey", ls=":")
        bottom.set_xlabel("latent variables")
        bottom.set_ylabel(f"RMSECV ({unit})")
    top.legend(fontsize=7)
    with atomic_path(path, overwrite=overwrite) as tmp:
        fig.savefig(tmp, dpi=dpi, format=str(path).rsplit(".", 1)[-1])
    return path


def save_histogram_figure(path, values, *, label: str, overwrite: bool = False, dpi: int = 150):
    """Histogram of the finite values of an image."""
    fig = _figure(figsize=(5.2, 3.2), layout="constrained")
    ax = fig.add_subplot()
    v = np.asarray(values, float)
    ax.hist(v[np.isfinite(v)], bins=30, color=CLASS_COLOURS[0])
    ax.set_xlabel(label)
    ax.set_ylabel("pixels")
    with atomic_path(path, overwrite=overwrite) as tmp:
        fig.savefig(tmp, dpi=dpi, format=str(path).rsplit(".", 1)[-1])
    return path


def section_scale_bars(ax, extent, z_label):
    """A horizontal (x) and a vertical (z) scale bar in the lower left corner."""
    from matplotlib.patheffects import withStroke

    x0, x1, z_bottom, z_top = extent
    span_x, span_z = abs(x1 - x0), abs(z_bottom - z_top)
    lx, lz = _nice_length(span_x), _nice_length(span_z)
    bx, bz = x0 + 0.06 * span_x, z_bottom - 0.06 * span_z
    stroke = [withStroke(linewidth=3, foreground="black")]
    ax.plot([bx, bx + lx], [bz, bz], color="white", lw=2, path_effects=stroke,
            solid_capstyle="butt")
    ax.plot([bx, bx], [bz, bz - lz], color="white", lw=2, path_effects=stroke,
            solid_capstyle="butt")
    text = dict(color="white", fontsize=8, path_effects=[withStroke(linewidth=2, foreground="black")])
    ax.text(bx + lx / 2, bz + 0.02 * span_z, f"x {lx:g} µm", ha="center", va="top", **text)
    ax.text(bx + 0.02 * span_x, bz - lz / 2, f"z {lz:g} µm\n{z_label}", ha="left",
            va="center", **text)
    return lx, lz
