"""Dock panel: the spectrum of the pixel under the cursor, and pinned spectra to compare.

The panel reads spectra through :meth:`mapkit.RamanMap.spectrum` (one pixel at
a time from the lazily opened file) and only draws them.
"""

from __future__ import annotations

import numpy as np
from qtpy.QtWidgets import QHBoxLayout, QLabel, QPushButton, QVBoxLayout, QWidget

_PIN_COLOURS = ("#E69F00", "#56B4E9", "#009E73", "#F0E442", "#CC79A7", "#D55E00")


class SpectrumPanel(QWidget):
    """Shows the spectrum under the cursor; a click pins it for comparison."""

    def __init__(self, napari_viewer, parent=None):
        super().__init__(parent)
        from matplotlib.backends.backend_qtagg import FigureCanvasQTAgg
        from matplotlib.figure import Figure

        self.viewer = napari_viewer
        self._maps: dict[str, object] = {}
        self.current = None          # (layer name, iy, ix) under the cursor
        self.pinned: list[tuple] = []

        self.figure = Figure(figsize=(4, 3), layout="constrained")
        self.canvas = FigureCanvasQTAgg(self.figure)
        self.ax = self.figure.add_subplot()
        self.line, = self.ax.plot([], [], color="#f0f0f0", lw=1.0, label="under cursor")
        self.status = QLabel("Move the cursor over a map layer.")
        self.clear_button = QPushButton("Clear pinned")
        self.clear_button.clicked.connect(self.clear_pinned)
        row = QHBoxLayout()
        row.addWidget(self.status, 1)
        row.addWidget(self.clear_button)
        layout = QVBoxLayout(self)
        layout.addWidget(self.canvas, 1)
        layout.addLayout(row)
        self._style()
        napari_viewer.cursor.events.position.connect(self._on_cursor)
        napari_viewer.mouse_drag_callbacks.append(self._on_click)

    # -- appearance -----------------------------------------------------------
    def _style(self):
        bg, fg = "#262930", "#d0d3d8"   # close to napari's dark theme
        self.figure.set_facecolor(bg)
        self.ax.set_facecolor(bg)
        for spine in self.ax.spines.values():
            spine.set_color(fg)
        self.ax.tick_params(colors=fg, labelsize=8)
        self.ax.set_xlabel("Raman shift (cm⁻¹)", color=fg, fontsize=9)
        self.ax.set_ylabel("intensity (counts)", color=fg, fontsize=9)

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

    def _map(self, layer):
        from mapkit.read import open_map

        path = layer.metadata["mapkit_path"]
        if path not in self._maps:
            self._maps[path] = open_map(path)
        return self._maps[path]

    def pixel_at(self, position):
        """(layer, iy, ix) of the map pixel at a world position, or None outside the map."""
        layer = self._map_layer()
        if layer is None:
            return None
        iy, ix = (int(np.round(v)) for v in layer.world_to_data(position)[-2:])
        ny, nx = layer.data.shape[-2:]
        if not (0 <= iy < ny and 0 <= ix < nx):
            return None
        return layer, iy, ix

    def spectrum(self, layer, iy, ix):
        m = self._map(layer)
        return m.raman_shift, m.spectrum(iy, ix), m

    # -- events ---------------------------------------------------------------
    def _on_cursor(self, event=None):
        hit = self.pixel_at(self.viewer.cursor.position)
        if hit is None:
            return
        layer, iy, ix = hit
        shift, spec, m = self.spectrum(layer, iy, ix)
        self.current = (layer.name, iy, ix)
        self.line.set_data(shift, spec)
        flag = "  (masked pixel)" if m.mask[iy, ix] else ""
        self.status.setText(f"x = {m.x[ix]:.1f} µm, y = {m.y[iy]:.1f} µm  "
                            f"(column {ix}, row {iy}){flag}")
        self._redraw()

    def _on_click(self, viewer, event):
        if event.type == "mouse_press" and event.button == 1:
            hit = self.pixel_at(event.position)
            if hit is not None:
                self.pin(*hit)

    def pin(self, layer, iy, ix):
        shift, spec, m = self.spectrum(layer, iy, ix)
        colour = _PIN_COLOURS[len(self.pinned) % len(_PIN_COLOURS)]
        line, = self.ax.plot(shift, spec, color=colour, lw=1.0,
                             label=f"pinned x={m.x[ix]:.1f}, y={m.y[iy]:.1f} µm")
        self.pinned.append((layer.name, iy, ix, line))
        self._redraw()

    def clear_pinned(self):
        for *_, line in self.pinned:
            line.remove()
        self.pinned.clear()
        self._redraw()

    def _redraw(self):
        self.ax.relim()
        self.ax.autoscale_view()
        handles = [self.line] + [p[-1] for p in self.pinned]
        legend = self.ax.legend(handles=handles, fontsize=7, loc="upper right", framealpha=0.3)
        for text in legend.get_texts():
            text.set_color("#d0d3d8")
        self.canvas.draw_idle()
