"""Dock panel: put a micrograph under the map and register it from clicked point pairs.

Reading, the fit and the writing are mapkit library calls (``read_optical``, ``place_image``,
``copy_with_optical``); the panel turns clicks into coordinates and updates the layer.
Pairs are clicked into one points layer, alternately: a feature on the micrograph, then the
same feature on the map.
"""

from __future__ import annotations

import numpy as np
from qtpy.QtWidgets import (QComboBox, QDoubleSpinBox, QFileDialog, QFormLayout, QHBoxLayout,
                            QLabel, QLineEdit, QPushButton, QWidget)

POINTS_NAME = "control points (micrograph, map, ...)"


class MicrographPanel(QWidget):
    """Add a micrograph with its pixel size; pick control-point pairs; register; save."""

    def __init__(self, napari_viewer, parent=None):
        super().__init__(parent)
        self.viewer = napari_viewer
        self.image_path = QLineEdit()
        self.image_path.setPlaceholderText("micrograph (PNG, JPEG, TIFF)")
        self.pixel_size = QDoubleSpinBox()
        self.pixel_size.setRange(0.0, 1000.0)
        self.pixel_size.setDecimals(4)
        self.pixel_size.setSpecialValueText("from the scale file")
        self.pixel_size.setSuffix(" µm")
        self.transform = QComboBox()
        self.transform.addItems(["similarity", "affine"])
        browse = QPushButton("…")
        browse.setFixedWidth(28)
        browse.clicked.connect(self._browse)
        row = QHBoxLayout()
        row.addWidget(self.image_path, 1)
        row.addWidget(browse)
        form = QFormLayout(self)
        form.addRow("Micrograph", row)
        form.addRow("Pixel size", self.pixel_size)
        form.addRow("Transform", self.transform)
        buttons = QHBoxLayout()
        self.add_button = QPushButton("Add")
        self.add_button.clicked.connect(lambda: self.add_micrograph())
        self.pick_button = QPushButton("Pick pairs")
        self.pick_button.clicked.connect(lambda: self.points_layer())
        self.register_button = QPushButton("Register")
        self.register_button.clicked.connect(lambda: self.register())
        self.save_button = QPushButton("Save…")
        self.save_button.clicked.connect(lambda: self.save())
        for b in (self.add_button, self.pick_button, self.register_button, self.save_button):
            buttons.addWidget(b)
        form.addRow(buttons)
        self.status = QLabel("Add a micrograph, then click pairs: a feature on the micrograph, "
                             "the same feature on the map, and so on (3 pairs or more).")
        self.status.setWordWrap(True)
        form.addRow(self.status)
        self.image = None            # OpticalImage
        self.placed = None           # PlacedImage shown now

    def _browse(self):
        chosen = QFileDialog.getOpenFileName(self, "Choose a micrograph", "",
                                             "Images (*.png *.jpg *.jpeg *.tif *.tiff)")[0]
        if chosen:
            self.image_path.setText(chosen)

    def _map(self):
        from mapkit.read import open_map

        for layer in self.viewer.layers:
            if "mapkit_path" in layer.metadata:
                return open_map(layer.metadata["mapkit_path"]), layer.metadata["mapkit_path"]
        return None, None

    def _fail(self, exc):
        from napari.utils.notifications import show_error

        self.status.setText(f"failed: {exc}")
        show_error(f"mapkit: {exc}")

    def _micrograph_layer(self):
        for layer in self.viewer.layers:
            if "mapkit_optical" in layer.metadata:
                return layer
        return None

    def add_micrograph(self):
        """Read the micrograph with its scale and show it at the bottom of the layer list."""
        from mapkit.errors import MapkitError
        from mapkit.read.optical import read_optical
        from mapkit.register import place_image

        m, path = self._map()
        if m is None:
            self.status.setText("Open a map first.")
            return None
        try:
            ps = self.pixel_size.value() or None
            self.image = read_optical(self.image_path.text().strip(), pixel_size=ps)
            self.placed, notices = place_image(self.image, m.x, m.y)
        except MapkitError as exc:
            self._fail(exc)
            return None
        self._show(path)
        self.status.setText("; ".join(notices) or "micrograph added at its pixel size and origin")
        return self.placed

    def _show(self, path):
        from ._layers import optical_layer

        data, kw, _ = optical_layer(self.placed, path)
        old = self._micrograph_layer()
        if old is not None:
            old.affine = kw["affine"]
            return old
        layer = self.viewer.add_image(data, **kw)
        self.viewer.layers.move(self.viewer.layers.index(layer), 0)
        for other in self.viewer.layers:
            if "mapkit_path" in other.metadata and other.opacity == 1.0:
                other.opacity = 0.6
        return layer

    def points_layer(self):
        """The points layer pairs are clicked into (created in 'add' mode when missing)."""
        if POINTS_NAME in self.viewer.layers:
            layer = self.viewer.layers[POINTS_NAME]
        else:
            layer = self.viewer.add_points(np.empty((0, 2)), name=POINTS_NAME, size=3,
                                           face_color="#F0E442", border_color="black")
        layer.mode = "add"
        self.viewer.layers.selection.active = layer
        return layer

    def pairs(self):
        """(image-frame µm, map µm) from the clicked points, each (n, 2) as (x, y)."""
        if self.placed is None or POINTS_NAME not in self.viewer.layers:
            return None
        layer = self.viewer.layers[POINTS_NAME]
        world = np.array([layer.data_to_world(p) for p in layer.data]).reshape(-1, 2)[:, ::-1]
        n = len(world) // 2
        on_image, on_map = world[0:2 * n:2], world[1:2 * n:2]
        # the micrograph points were clicked where it is drawn now: back to its own frame
        inv = np.linalg.inv(self.placed.matrix)
        frame = (inv @ np.c_[on_image, np.ones(n)].T).T[:, :2]
        return frame, on_map

    def register(self):
        """Fit the transform to the clicked pairs and redraw the micrograph through it."""
        from mapkit.errors import MapkitError
        from mapkit.register import place_image

        m, path = self._map()
        pairs = self.pairs()
        if m is None or pairs is None:
            self.status.setText("Add a micrograph and click pairs first.")
            return None
        try:
            placed, notices = place_image(self.image, m.x, m.y, pairs,
                                          kind=self.transform.currentText(), source="clicked pairs")
        except MapkitError as exc:
            self._fail(exc)
            return None
        self.placed = placed
        self._show(path)
        reg = placed.registration
        self.status.setText(f"{reg['transform']} from {len(reg['residuals_um'])} pairs: RMS "
                            f"{reg['rms_um']:.3g} µm; residuals "
                            + ", ".join(f"{v:.2g}" for v in reg["residuals_um"]) + " µm")
        return placed

    def save(self, out=None):
        """Write a copy of the map's results file holding the micrograph and its placement."""
        from mapkit.errors import MapkitError
        from mapkit.export.nexus import copy_with_optical

        m, path = self._map()
        if self.placed is None or path is None:
            self.status.setText("Add a micrograph first.")
            return None
        if out is None:
            out = QFileDialog.getSaveFileName(self, "Save results with the micrograph", "",
                                              "*.h5")[0]
            if not out:
                return None
        try:
            written = copy_with_optical(path, out, self.placed, overwrite=True)
        except MapkitError as exc:
            self._fail(exc)
            return None
        self.status.setText(f"wrote {written}")
        return written
