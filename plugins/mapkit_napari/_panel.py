"""Dock panel: the spectrum under the cursor, pinned spectra, baseline overlays, region means,
and band images made by dragging a range on the plot.

The panel reads spectra through :meth:`mapkit.RamanMap.spectrum` (one pixel at a time from the
lazily opened file); baselines, band images and region statistics come from the mapkit library.
"""

from __future__ import annotations

import numpy as np
from qtpy.QtWidgets import (QCheckBox, QHBoxLayout, QLabel, QPushButton, QVBoxLayout, QWidget)

_PIN_COLOURS = ("#E69F00", "#56B4E9", "#009E73", "#F0E442", "#CC79A7", "#D55E00")
_BG, _FG = "#262930", "#d0d3d8"   # close to napari's dark theme


class SpectrumPanel(QWidget):
    """Shows the spectrum under the cursor; a click pins it for comparison."""

    def __init__(self, napari_viewer, parent=None):
        super().__init__(parent)
        from matplotlib.backends.backend_qtagg import FigureCanvasQTAgg
        from matplotlib.figure import Figure
        from matplotlib.widgets import SpanSelector

        self.viewer = napari_viewer
        self._maps: dict[str, object] = {}
        self.current = None          # (layer, iy, ix) under the cursor
        self.pinned: list[tuple] = []
        self.region_lines: list = []

        self.figure = Figure(figsize=(4, 3), layout="constrained")
        self.canvas = FigureCanvasQTAgg(self.figure)
        self.ax = self.figure.add_subplot()
        self.line, = self.ax.plot([], [], color="#f0f0f0", lw=1.0, label="under cursor")
        self.baseline_line, = self.ax.plot([], [], color="#E69F00", lw=1.0, ls="--",
                                           label="baseline (arPLS)")
        self.corrected_line, = self.ax.plot([], [], color="#56B4E9", lw=1.0,
                                            label="after baseline")
        # the moving lines are drawn by blitting over a cached background, so following the
        # cursor does not redraw the whole figure (a full draw costs tens of ms)
        for line in (self.line, self.baseline_line, self.corrected_line):
            line.set_animated(True)
        self._background = None
        self.canvas.mpl_connect("draw_event", self._on_draw)
        self.span = SpanSelector(self.ax, self.band_from_range, "horizontal", useblit=False,
                                 props={"alpha": 0.25, "facecolor": "#009E73"},
                                 interactive=False, minspan=1.0)
        self.status = QLabel("Move the cursor over a map layer; drag on the plot to make a "
                             "band image.")
        self.status.setWordWrap(True)
        self.show_baseline = QCheckBox("Baseline")
        self.show_corrected = QCheckBox("After baseline")
        for box in (self.show_baseline, self.show_corrected):
            box.toggled.connect(lambda _=None: self._on_cursor())
        self.region_button = QPushButton("Region mean ± sd")
        self.region_button.setToolTip("Mean spectrum of the selected label, or of the last "
                                      "shape drawn in the selected shapes layer")
        self.region_button.clicked.connect(self.plot_region)
        self.clear_button = QPushButton("Clear pinned")
        self.clear_button.clicked.connect(self.clear_pinned)
        self.depth_button = QPushButton("Depth profile")
        self.depth_button.setToolTip("Component images (or the mean intensity) against depth "
                                     "at the pixel under the cursor, or averaged inside "
                                     "the last shape of a selected shapes layer, with the "
                                     "located interfaces (depth sections and volumes)")
        self.depth_button.clicked.connect(self.plot_depth_profile)
        row = QHBoxLayout()
        for w in (self.show_baseline, self.show_corrected, self.region_button, self.clear_button,
                  self.depth_button):
            row.addWidget(w)
        # the depth plot: shown the first time a depth profile is asked for
        self.depth_figure = Figure(figsize=(4, 2.6), layout="constrained")
        self.depth_canvas = FigureCanvasQTAgg(self.depth_figure)
        self.depth_ax = self.depth_figure.add_subplot()
        self.depth_canvas.setVisible(False)
        layout = QVBoxLayout(self)
        layout.addWidget(self.canvas, 1)
        layout.addWidget(self.depth_canvas, 1)
        layout.addLayout(row)
        layout.addWidget(self.status)
        self._style()
        napari_viewer.cursor.events.position.connect(self._on_cursor)
        napari_viewer.mouse_drag_callbacks.append(self._on_click)

    # -- appearance -----------------------------------------------------------
    def _style(self):
        self.figure.set_facecolor(_BG)
        self.ax.set_facecolor(_BG)
        for spine in self.ax.spines.values():
            spine.set_color(_FG)
        self.ax.tick_params(colors=_FG, labelsize=8)
        self.ax.set_xlabel("Raman shift (cm⁻¹)", color=_FG, fontsize=9)
        self.ax.set_ylabel("intensity (counts)", color=_FG, fontsize=9)

    # -- data -----------------------------------------------------------------
    def _map_layer(self):
        """The selected layer if it carries a map, else the first one that does."""
        active = self.viewer.layers.selection.active
        candidates = ([active] if active is not None else []) + list(self.viewer.layers)
        for layer in candidates:
            if layer is not None and "mapkit_path" in layer.metadata and layer.visible:
                return layer
        for layer in self.viewer.layers:
            if "mapkit_path" in layer.metadata:
                return layer
        return None

    def map_for(self, layer):
        from mapkit.read import open_map

        path = layer.metadata["mapkit_path"]
        if path not in self._maps:
            self._maps[path] = open_map(path)
        return self._maps[path]

    def pixel_at(self, position):
        """(layer, iy, ix) of the map pixel at a world position, or None outside the map; in a
        volume (layer, iz, iy, ix), the depth taken from the slice shown."""
        layer = self._map_layer()
        if layer is None:
            return None
        n = layer.data.ndim
        idx = tuple(int(np.round(v)) for v in layer.world_to_data(position)[-n:])
        if not all(0 <= i < s for i, s in zip(idx, layer.data.shape)):
            return None
        return (layer, *idx)

    def spectrum(self, layer, *index):
        m = self.map_for(layer)
        return m.raman_shift, m.spectrum(*index), m

    @staticmethod
    def where(m, index) -> str:
        """Position of a pixel in words: 'x = 1.0 µm, y = 2.0 µm' (z too in depth maps)."""
        coords = dict(zip(m.spatial_dims, index))
        return ", ".join(f"{d} = {m.coords(d)[coords[d]]:.1f} µm" for d in ("x", "y", "z")
                         if d in coords)

    # -- events ---------------------------------------------------------------
    def _on_cursor(self, event=None):
        hit = self.pixel_at(self.viewer.cursor.position)
        if hit is None:
            return
        layer, *index = hit
        shift, spec, m = self.spectrum(layer, *index)
        self.current = (layer, *index)
        self.line.set_data(shift, spec)
        base = None
        if self.show_baseline.isChecked() or self.show_corrected.isChecked():
            from mapkit.preprocess.baseline import arpls_baseline

            base = arpls_baseline(spec, shift, lam=1e6)
        self.baseline_line.set_data((shift, base) if self.show_baseline.isChecked()
                                    else ([], []))
        self.corrected_line.set_data((shift, spec - base) if self.show_corrected.isChecked()
                                     else ([], []))
        flag = "  (masked pixel)" if m.mask[tuple(index)] else ""
        self.status.setText(f"{self.where(m, index)}  (column {index[-1]}, row {index[-2]})"
                            f"{flag}")
        if self._fits_view(shift, spec):
            self._blit()
        else:
            self._redraw()

    def _moving(self):
        return [a for a in (self.line, self.baseline_line, self.corrected_line)
                if len(a.get_xdata())]

    def _fits_view(self, shift, spec):
        """True when the spectrum fills the current view well enough to skip a rescale."""
        if self._background is None or not len(spec):
            return False
        lo, hi = self.ax.get_ylim()
        x0, x1 = sorted(self.ax.get_xlim())
        top, bottom = float(np.nanmax(spec)), float(np.nanmin(spec))
        return (bottom >= lo and top <= hi and (top - lo) >= 0.3 * (hi - lo)
                and x0 <= np.min(shift) and x1 >= np.max(shift))

    def _on_draw(self, event=None):
        self._background = self.canvas.copy_from_bbox(self.ax.bbox)
        for artist in self._moving():
            self.ax.draw_artist(artist)
        self.canvas.blit(self.ax.bbox)

    def _blit(self):
        self.canvas.restore_region(self._background)
        for artist in self._moving():
            self.ax.draw_artist(artist)
        self.canvas.blit(self.ax.bbox)

    def _on_click(self, viewer, event):
        if event.type == "mouse_press" and event.button == 1:
            hit = self.pixel_at(event.position)
            if hit is not None:
                self.pin(*hit)

    def pin(self, layer, *index):
        shift, spec, m = self.spectrum(layer, *index)
        colour = _PIN_COLOURS[len(self.pinned) % len(_PIN_COLOURS)]
        line, = self.ax.plot(shift, spec, color=colour, lw=1.0,
                             label=f"pinned {self.where(m, index).replace(' µm', '')} µm")
        self.pinned.append((layer.name, *index, line))
        self._redraw()

    def clear_pinned(self):
        for *_, line in self.pinned:
            line.remove()
        self.pinned.clear()
        for artist in self.region_lines:
            artist.remove()
        self.region_lines.clear()
        self._redraw()

    def region_mask(self):
        """Boolean (ny, nx) region from the selected labels or shapes layer, or None."""
        from napari.layers import Labels, Shapes

        from mapkit.quantify import polygon_mask

        layer = self.viewer.layers.selection.active
        target = self._map_layer_excluding(layer)
        if target is None:
            return None, None
        m = self.map_for(target)
        if isinstance(layer, Labels):
            if layer.data.shape != m.mask.shape:
                return None, None
            return layer.data == layer.selected_label, f"{layer.name} label {layer.selected_label}"
        if isinstance(layer, Shapes) and len(layer.data):
            verts = np.asarray(layer.data[-1])[:, -2:]
            world = np.array([layer.data_to_world(v) for v in verts])[:, -2:]
            rows = m.coords(m.spatial_dims[-2])      # y, or z for a depth section
            return polygon_mask(m.x, rows, world[:, ::-1]), f"{layer.name} shape"
        return None, None

    def _map_layer_excluding(self, layer):
        for candidate in self.viewer.layers:
            if candidate is not layer and "mapkit_path" in candidate.metadata \
                    and candidate.data.ndim == 2:
                return candidate
        return self._map_layer()

    def plot_region(self):
        from mapkit.errors import MapkitError
        from mapkit.reduce import region_spectrum

        region, label = self.region_mask()
        if region is None:
            self.status.setText("Select a labels layer (with a label picked) or a shapes layer "
                                "with a drawn shape first.")
            return None
        m = self.map_for(self._map_layer_excluding(self.viewer.layers.selection.active))
        try:
            mean, sd, n = region_spectrum(m, region)
        except MapkitError as exc:
            self.status.setText(str(exc))
            return None
        colour = _PIN_COLOURS[(len(self.pinned) + len(self.region_lines)) % len(_PIN_COLOURS)]
        line, = self.ax.plot(m.raman_shift, mean, color=colour, lw=1.2,
                             label=f"{label}: mean of {n}")
        band = self.ax.fill_between(m.raman_shift, mean - sd, mean + sd, color=colour, alpha=0.25)
        self.region_lines += [line, band]
        self._redraw()
        return mean, sd, n

    def _depth_images(self, layer, m):
        """(images (k, nz, ...), names, units) to profile: the component images of the map's
        results file (unmixing, MCR, NMF), else the mean-intensity layer itself."""
        from mapkit.read.nexus import is_nexus_map, read_result_objects

        path = layer.metadata["mapkit_path"]
        if is_nexus_map(path):
            found = {r.name: r for r in read_result_objects(path)}
            for name, fname in (("unmixing", "abundance"), ("mcr", "images"),
                                ("nmf", "images")):
                f = found.get(name, None) and found[name].fields.get(fname)
                if f is not None and f.axis_names[1:] == m.spatial_dims:
                    return (np.asarray(f.data, float), [str(v) for v in f.axes[0].values],
                            f.units)
        return np.asarray(layer.data, float)[None], ["mean intensity"], "counts"

    def _lateral_region(self, m):
        """The pixels beside the depth axis inside the last shape of the selected shapes
        layer: an (ny, nx) polygon of a volume, the x span of a section; None without one."""
        from napari.layers import Shapes

        from mapkit.quantify import polygon_mask

        layer = self.viewer.layers.selection.active
        if not isinstance(layer, Shapes) or not len(layer.data):
            return None
        verts = np.asarray(layer.data[-1])
        world = np.array([layer.data_to_world(v) for v in verts])
        if m.spatial_dims == ("z", "y", "x"):
            return polygon_mask(m.x, m.y, world[:, -2:][:, ::-1])
        xs = world[:, -1]
        return (m.x >= xs.min()) & (m.x <= xs.max())

    def plot_depth_profile(self):
        """Draw the depth profile inside the last shape of a selected shapes layer, else at
        the pixel under the cursor (the mean over the map when the cursor is elsewhere),
        with its located interfaces; returns (profile, interfaces)."""
        from mapkit.errors import MapkitError
        from mapkit.quantify.depth import depth_profile, locate_interfaces

        layer = self._map_layer()
        if layer is None:
            return None
        m = self.map_for(layer)
        if m.z is None or m.spatial_dims[0] != "z" or m.shape[0] < 2:
            self.status.setText("The map has no depth axis: a depth profile needs a depth "
                                "section or a volume.")
            return None
        images, names, units = self._depth_images(layer, m)
        at, region = None, self._lateral_region(m)
        if region is None and self.current is not None and self.current[0] is layer:
            at = tuple(self.current[2:])             # the lateral index below the depth
        try:
            profile = depth_profile(images, m.z, names=names, units=units, at=at,
                                    region=region)
            interfaces, _ = locate_interfaces(profile)
        except MapkitError as exc:
            self.status.setText(str(exc))
            return None
        ax = self.depth_ax
        ax.clear()
        for k, name in enumerate(profile.names):
            colour = _PIN_COLOURS[k % len(_PIN_COLOURS)]
            ax.plot(profile.values[k], profile.z, color=colour, lw=1.2, label=name)
        for i in interfaces:
            ax.axhline(i.z, color=_FG, lw=0.8, ls="--")
        ax.invert_yaxis()                            # depth grows downward
        ax.set_ylabel("depth z (µm, apparent)", color=_FG, fontsize=9)
        ax.set_xlabel(units or "value", color=_FG, fontsize=9)
        ax.set_title(profile.where, color=_FG, fontsize=9)
        self.depth_figure.set_facecolor(_BG)
        ax.set_facecolor(_BG)
        ax.tick_params(colors=_FG, labelsize=8)
        ax.legend(fontsize=7, frameon=False, labelcolor=_FG)
        self.depth_canvas.setVisible(True)
        self.depth_canvas.draw_idle()
        found = "; ".join(f"{i.component} {i.direction} at {i.z:.2f} ± {i.z_err:.2f} µm"
                          for i in interfaces) or "no interface located"
        self.status.setText(f"depth profile ({profile.where}): {found}. {profile.caution}")
        return profile, interfaces

    def show_class_spectrum(self, row):
        """Draw a class's mean ± sd spectrum (a legend row from ``class_legend_data``)."""
        line, = self.ax.plot(row["shift"], row["mean"], color=row["colour"], lw=1.2,
                             label=f"{row['name']}: mean ± sd")
        self.region_lines.append(line)
        if row.get("sd") is not None:
            self.region_lines.append(self.ax.fill_between(
                row["shift"], row["mean"] - row["sd"], row["mean"] + row["sd"],
                color=row["colour"], alpha=0.25))
        self.ax.set_ylabel("intensity (a.u.)", color=_FG, fontsize=9)
        self.status.setText(f"{row['name']}: {row['fraction_pct']:.1f} % of the map, "
                            f"{row['area_um2']:.0f} µm²")
        self._redraw()
        return line

    def band_from_range(self, lo, hi):
        """Make a band-integral image layer from a shift range dragged on the plot."""
        from mapkit.reduce import band_image

        layer = self._map_layer()
        if layer is None or hi - lo <= 0:
            return None
        m = self.map_for(layer)
        r = band_image(m, float(lo), float(hi), name=f"band {lo:.0f}-{hi:.0f}")
        from ._layers import common_kwargs, result_layers

        data, kw, kind = result_layers([r], common_kwargs(m, layer.metadata["mapkit_path"]),
                                       visible=True)[0]
        new = self.viewer.add_image(data, **kw)
        self.status.setText(f"band image {lo:.0f}-{hi:.0f} cm⁻¹ added (local linear baseline)")
        return new

    def _redraw(self):
        # limits from every line shown (relim skips the animated, blitted ones)
        lines = self._moving() + [p[-1] for p in self.pinned] + \
            [a for a in self.region_lines if hasattr(a, "get_xdata")]
        if lines:
            xs = np.concatenate([np.asarray(a.get_xdata(), float) for a in lines])
            ys = np.concatenate([np.asarray(a.get_ydata(), float) for a in lines])
            ys = ys[np.isfinite(ys)]
            if xs.size and ys.size:
                lo, hi = float(ys.min()), float(ys.max())
                pad = 0.05 * (hi - lo or 1.0)
                self.ax.set_xlim(float(xs.min()), float(xs.max()))
                # head-room above, so most cursor moves fit and only blit
                self.ax.set_ylim(lo - pad, hi + 0.15 * (hi - lo or 1.0))
        handles = [h for h in (self.line, self.baseline_line, self.corrected_line)
                   if len(h.get_xdata())] + [p[-1] for p in self.pinned] + \
            [a for a in self.region_lines if hasattr(a, "get_xdata")]
        if handles:
            legend = self.ax.legend(handles=handles, fontsize=7, loc="upper right",
                                    framealpha=0.3)
            for text in legend.get_texts():
                text.set_color(_FG)
        self.canvas.draw_idle()
