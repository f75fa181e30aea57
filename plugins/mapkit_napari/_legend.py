"""Dock panel: the legend of the selected class layer (colour, name or library match with its
HQI, area % and µm²). Clicking a row shows that class's mean ± sd spectrum.

Every number comes from the classification Result's summary (mapkit library); the panel
only lays them out.
"""

from __future__ import annotations

from qtpy.QtGui import QColor
from qtpy.QtWidgets import QLabel, QTableWidget, QTableWidgetItem, QVBoxLayout, QWidget

HEADER = ("", "class", "area %", "area (µm²)")


class ClassLegend(QWidget):
    """Follows the selected labels layer; ``on_class(row)`` is called when a row is clicked."""

    def __init__(self, napari_viewer, on_class=None, parent=None):
        super().__init__(parent)
        self.viewer = napari_viewer
        self.on_class = on_class
        self.layer = None
        self.rows: list[dict] = []
        self.title = QLabel("Select a class layer to see its legend.")
        self.title.setWordWrap(True)
        self.table = QTableWidget(0, len(HEADER))
        self.table.setHorizontalHeaderLabels(list(HEADER))
        self.table.verticalHeader().setVisible(False)
        self.table.setEditTriggers(QTableWidget.NoEditTriggers)
        self.table.setSelectionBehavior(QTableWidget.SelectRows)
        self.table.cellClicked.connect(lambda row, _col: self.select(row))
        self.table.setMinimumHeight(170)
        layout = QVBoxLayout(self)
        layout.addWidget(self.title)
        layout.addWidget(self.table, 1)
        napari_viewer.layers.selection.events.active.connect(self._on_active)
        self._on_active()

    def _on_active(self, event=None):
        layer = self.viewer.layers.selection.active
        if layer is not None and "mapkit_classes" in layer.metadata:
            self.show_for(layer)

    def show_for(self, layer):
        """Fill the legend from a class layer's rows (made by ``class_legend_data``)."""
        self.layer = layer
        self.rows = list(layer.metadata.get("mapkit_classes", []))
        self.title.setText(f"{layer.name}: click a class for its mean ± sd spectrum")
        self.table.setRowCount(len(self.rows))
        for i, row in enumerate(self.rows):
            swatch = QTableWidgetItem("")
            # the colour the layer actually draws this label with
            colour = layer.get_color(row["label"]) if hasattr(layer, "get_color") else None
            qc = QColor.fromRgbF(*[float(c) for c in colour[:3]]) if colour is not None \
                else QColor(row["colour"])
            swatch.setBackground(qc)
            self.table.setItem(i, 0, swatch)
            self.table.setItem(i, 1, QTableWidgetItem(row["name"]))
            self.table.setItem(i, 2, QTableWidgetItem(f"{row['fraction_pct']:.1f}"))
            self.table.setItem(i, 3, QTableWidgetItem(f"{row['area_um2']:.0f}"))
        self.table.resizeColumnsToContents()
        self.table.setColumnWidth(0, 24)

    def select(self, index: int):
        """A row was clicked: hand the class's spectrum to the spectrum panel."""
        if not 0 <= index < len(self.rows):
            return None
        row = self.rows[index]
        if self.on_class is not None and row.get("mean") is not None:
            self.on_class(row)
        return row
