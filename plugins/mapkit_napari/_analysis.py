"""Dock panel: run a cleaning recipe and one method in a background worker, get layers back.

Everything it computes goes through the mapkit library (``Recipe.iter_apply`` and
``mapkit.pipeline.run_method``), so the viewer, the command line and Python agree.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from qtpy.QtWidgets import (QComboBox, QFileDialog, QFormLayout, QHBoxLayout, QLabel, QLineEdit,
                            QProgressBar, QPushButton, QSpinBox, QVBoxLayout, QWidget)

#: what the user picks → mapkit method name
METHOD_CHOICES = {
    "Components: MCR-ALS, background per pixel": "mcr_background",
    "Components: NMF": "nmf",
    "Components: MCR-ALS": "mcr",
    "Components: PCA": "pca",
    "Classes: dominant component (NMF)": "dominant",
    "Classes: k-means": "kmeans",
    "Classes: Ward": "ward",
    "Abundances: unmixing (NNLS)": "unmix",
    "Content map (saved model)": "content",
}


def analysis_job(path, method, *, n=4, recipe_path="", library_path="", model_path="", seed=0):
    """Generator run in the worker: yields (done, total, label), returns (map, results)."""
    from mapkit.pipeline import FITS_BACKGROUND, run_method
    from mapkit.preprocess.recipe import Recipe
    from mapkit.quantify import QuantModel
    from mapkit.read import open_map, read_library

    model = QuantModel.load(model_path) if model_path else None
    if recipe_path:
        recipe = Recipe.from_file(recipe_path)
    elif model is not None:
        recipe = Recipe.from_text(model.recipe_text, f"{model_path} (recipe)")
    else:
        recipe = Recipe.default()
    library = read_library(library_path) if library_path else None
    total = 3
    yield 0, total, "reading the map"
    m = open_map(path).load()
    yield 1, total, "cleaning: " + ", ".join(name for name, _ in recipe.steps)
    m, _, before_baseline = recipe.apply_keeping_background(m)
    if method in FITS_BACKGROUND:
        m = before_baseline
    if model is not None:
        model.check_recipe(recipe)
    yield total - 1, total, f"running {method}"
    results = run_method(m, method, n=n, seed=seed, library=library, model=model)
    return m, results


class AnalysisPanel(QWidget):
    """Choose a method, run it on the map layer in the background, receive result layers."""

    def __init__(self, napari_viewer, parent=None):
        super().__init__(parent)
        from matplotlib.backends.backend_qtagg import FigureCanvasQTAgg
        from matplotlib.figure import Figure

        self.viewer = napari_viewer
        self.worker = None
        self.last = None            # (map, results) of the last finished run
        self.method = QComboBox()
        self.method.addItems(list(METHOD_CHOICES))
        self.number = QSpinBox()
        self.number.setRange(1, 30)
        self.number.setValue(4)
        self.recipe = QLineEdit()
        self.recipe.setPlaceholderText("default cleaning recipe")
        self.library = QLineEdit()
        self.library.setPlaceholderText("reference spectra folder (optional)")
        self.model = QLineEdit()
        self.model.setPlaceholderText("quant_model.json (content maps)")
        form = QFormLayout()
        form.addRow("Method", self.method)
        form.addRow("Components / classes", self.number)
        form.addRow("Recipe", self._with_browse(self.recipe, file=True, pattern="*.toml"))
        form.addRow("Library", self._with_browse(self.library, file=False))
        form.addRow("Model", self._with_browse(self.model, file=True, pattern="*.json"))
        self.run_button = QPushButton("Run")
        self.run_button.clicked.connect(self.run)
        self.cancel_button = QPushButton("Cancel")
        self.cancel_button.setEnabled(False)
        self.cancel_button.clicked.connect(self.cancel)
        self.export_button = QPushButton("Export results…")
        self.export_button.setEnabled(False)
        self.export_button.clicked.connect(lambda: self.export_results())
        buttons = QHBoxLayout()
        for b in (self.run_button, self.cancel_button, self.export_button):
            buttons.addWidget(b)
        self.progress = QProgressBar()
        self.status = QLabel("Open a map, pick a method and press Run.")
        self.status.setWordWrap(True)
        self.figure = Figure(figsize=(4, 2.4), layout="constrained", facecolor="#262930")
        self.canvas = FigureCanvasQTAgg(self.figure)
        self.canvas.setMinimumHeight(200)
        layout = QVBoxLayout(self)
        layout.addLayout(form)
        layout.addLayout(buttons)
        layout.addWidget(self.progress)
        layout.addWidget(self.status)
        layout.addWidget(self.canvas, 1)
        self._add_calibration(layout)

    # -- calibration (the same library calls as 'mapkit calibrate') ------------------------
    def _add_calibration(self, layout):
        from qtpy.QtWidgets import QGroupBox

        # folded away until ticked, so the spectrum panel above keeps its room
        box = QGroupBox("Calibration from standards")
        box.setCheckable(True)
        box.setChecked(False)
        inner = QWidget()
        QVBoxLayout(box).addWidget(inner)
        box.toggled.connect(inner.setVisible)
        inner.setVisible(False)
        form = QFormLayout(inner)
        self.standards = QLineEdit()
        self.standards.setPlaceholderText("standards table (CSV)")
        self.cal_model = QComboBox()
        self.cal_model.addItems(["linear", "quadratic", "pls"])
        form.addRow("Standards", self._with_browse(self.standards, file=True, pattern="*.csv"))
        form.addRow("Model", self.cal_model)
        row = QHBoxLayout()
        self.fit_button = QPushButton("Fit")
        self.fit_button.clicked.connect(lambda: self.fit_calibration())
        self.save_button = QPushButton("Save model…")
        self.save_button.setEnabled(False)
        self.save_button.clicked.connect(lambda: self.save_calibration())
        self.apply_button = QPushButton("Apply to map")
        self.apply_button.setEnabled(False)
        self.apply_button.clicked.connect(lambda: self.apply_calibration())
        for b in (self.fit_button, self.save_button, self.apply_button):
            row.addWidget(b)
        form.addRow(row)
        self.cal_status = QLabel("")
        self.cal_status.setWordWrap(True)
        self.cal_plot = QLabel()
        form.addRow(self.cal_status)
        form.addRow(self.cal_plot)
        self.quant_model = None
        self.quant_model_path = None
        layout.addWidget(box)

    def fit_calibration(self):
        """Fit the model to the standards file; show the curve, residuals, LOD and LOQ."""
        import tempfile

        from qtpy.QtGui import QPixmap

        from mapkit.errors import MapkitError
        from mapkit.export.figures import save_calibration_figure
        from mapkit.pipeline import Settings, quantification_model
        from mapkit.preprocess.recipe import Recipe
        from mapkit.read import read_library

        try:
            recipe = (Recipe.from_file(self.recipe.text().strip()) if self.recipe.text().strip()
                      else Recipe.default())
            lib = self.library.text().strip()
            model = quantification_model(self.standards.text().strip(),
                                         read_library(lib) if lib else None, recipe,
                                         Settings(calibration_model=self.cal_model.currentText()))
        except MapkitError as exc:
            self._on_error(exc)
            return None
        self.quant_model, self.quant_model_path = model, None
        c = model.calibration.summary()
        fit = (f"R² {c['r2']:.4f}, {c['n_components']} latent variables" if c["model"] == "pls"
               else f"r = {c['r']:.5f}")
        self.cal_status.setText(f"{c['analyte']} ({c['unit']}), {c['model']} on {c['n']} "
                                f"standards: {fit}; LOD {c['lod']:.3g} {c['unit']}, "
                                f"LOQ {c['loq']:.3g} {c['unit']} (ICH Q2(R2))")
        with tempfile.TemporaryDirectory() as tmp:
            png = Path(tmp) / "calibration.png"
            save_calibration_figure(png, model.calibration, overwrite=True, dpi=70)
            self.cal_plot.setPixmap(QPixmap(str(png)).scaledToWidth(360))
        self.save_button.setEnabled(True)
        self.apply_button.setEnabled(True)
        return model

    def save_calibration(self, path=None):
        """Save the fitted model as quant_model.json (the file dialog asks before replacing one)."""
        if self.quant_model is None:
            return None
        if path is None:
            path = QFileDialog.getSaveFileName(self, "Save model", "quant_model.json",
                                               "*.json")[0]
            if not path:
                return None
        from mapkit.errors import MapkitError

        try:
            written = self.quant_model.save(path, overwrite=True)
        except MapkitError as exc:
            self._on_error(exc)
            return None
        self.quant_model_path = str(written)
        self.model.setText(self.quant_model_path)
        self.cal_status.setText(self.cal_status.text() + f"; saved {Path(written).name}")
        return written

    def apply_calibration(self):
        """Content map of the open map with the fitted model (saved first if it is not)."""
        if self.quant_model is None:
            return None
        if self.quant_model_path is None and self.save_calibration() is None:
            return None
        self.model.setText(self.quant_model_path)
        self.method.setCurrentText("Content map (saved model)")
        return self.run()

    def _with_browse(self, edit, *, file, pattern=""):
        row = QWidget()
        h = QHBoxLayout(row)
        h.setContentsMargins(0, 0, 0, 0)
        h.addWidget(edit, 1)
        button = QPushButton("…")
        button.setFixedWidth(28)

        def browse():
            chosen = (QFileDialog.getOpenFileName(self, "Choose a file", "", pattern)[0] if file
                      else QFileDialog.getExistingDirectory(self, "Choose a folder"))
            if chosen:
                edit.setText(chosen)

        button.clicked.connect(browse)
        h.addWidget(button)
        return row

    def map_layer(self):
        active = self.viewer.layers.selection.active
        for layer in ([active] if active is not None else []) + list(self.viewer.layers):
            if layer is not None and "mapkit_path" in layer.metadata:
                return layer
        return None

    # -- running --------------------------------------------------------------------------
    def run(self):
        from napari.qt.threading import create_worker

        layer = self.map_layer()
        if layer is None:
            self.status.setText("Open a map first (File ▸ Open, or the sample data).")
            return None
        method = METHOD_CHOICES[self.method.currentText()]
        # errors go to _on_error (a one-line notification), not re-raised in the GUI thread
        self.worker = create_worker(
            analysis_job, layer.metadata["mapkit_path"], method, n=self.number.value(),
            recipe_path=self.recipe.text().strip(), library_path=self.library.text().strip(),
            model_path=self.model.text().strip(), _start_thread=False,
            _connect={"yielded": self._on_progress, "returned": self._on_done,
                      "errored": self._on_error, "finished": self._on_finished})
        self.run_button.setEnabled(False)
        self.cancel_button.setEnabled(True)
        self.status.setText(f"running {self.method.currentText()}…")
        self.worker.start()
        return self.worker

    def cancel(self):
        if self.worker is not None:
            self.worker.quit()   # stops at the next step boundary
            self.status.setText("cancelled")

    def _on_progress(self, value):
        done, total, label = value
        self.progress.setMaximum(total)
        self.progress.setValue(done)
        self.status.setText(label)

    def _on_error(self, exc):
        from napari.utils.notifications import show_error

        message = " ".join(str(exc).split()) or type(exc).__name__
        self.status.setText(f"failed: {message}")
        show_error(f"mapkit: {message}")

    def _on_finished(self):
        self.run_button.setEnabled(True)
        self.cancel_button.setEnabled(False)

    def _on_done(self, value):
        from ._layers import common_kwargs, result_layers

        m, results = value
        self.last = value
        self.progress.setValue(self.progress.maximum())
        layer = self.map_layer()
        path = layer.metadata["mapkit_path"] if layer is not None else ""
        # over a micrograph the maps are drawn see-through, as when a results file opens
        under = any("mapkit_optical" in lyr.metadata for lyr in self.viewer.layers)
        for data, kw, kind in result_layers(results, common_kwargs(m, path), visible=False):
            if under:
                kw.setdefault("opacity", 0.6)
            getattr(self.viewer, f"add_{kind}")(data, **kw)
        for lyr in list(self.viewer.layers)[-1:]:
            lyr.visible = True
        self.viewer.scale_bar.visible = True
        self._show_summary(results)
        self.export_button.setEnabled(True)

    def _show_summary(self, results):
        self.figure.clear()
        ax = self.figure.add_subplot(facecolor="#262930")
        ax.tick_params(colors="#d0d3d8", labelsize=7)
        for spine in ax.spines.values():
            spine.set_color("#d0d3d8")
        lines = []
        for r in results:
            for f in r.fields.values():
                if f.axis_names[-1] == "raman_shift" and f.data.ndim == 2:
                    data = np.asarray(f.data, float)
                    offset = 1.1 * np.nanmax(np.abs(data)) if data.size else 1.0
                    from mapkit.export.figures import CLASS_COLOURS

                    for k, (label, spec) in enumerate(zip(f.axes[0].values, data)):
                        ax.plot(f.axes[-1].values, spec + k * offset, lw=0.9, label=str(label),
                                color=CLASS_COLOURS[k % len(CLASS_COLOURS)])
                    ax.set_xlabel("Raman shift (cm⁻¹)", fontsize=8, color="#d0d3d8")
                    ax.set_yticks([])
                    ax.legend(fontsize=6)
                    break
            ident = {i["spectrum"]: i["match"] for i in r.summary.get("identification", [])}
            for name, v in r.summary.get("areas", {}).items():
                lines.append(f"{name}{' (' + ident[name] + ')' if name in ident else ''}: "
                             f"{v['fraction_pct']:.1f} %, domains: {v['domains']}")
            if not r.summary.get("areas"):
                lines += [f"{k}: {v}" for k, v in ident.items()]
            if r.summary.get("mean") is not None and "unit" in r.summary:
                s = r.summary
                lines.append(f"{s['analyte']}: mean {s['mean']:.2f} {s['unit']}, "
                             f"{s['quantifiable']} of {s['pixels']} pixels quantifiable")
        self.canvas.draw_idle()
        self.status.setText("done. " + "; ".join(lines))

    # -- export ------------------------------------------------------------------------------
    def export_results(self, folder=None):
        """Write the last results with the library's exporter (the same files as the CLI)."""
        from mapkit.export.bundle import safe_name, write_bundle

        if self.last is None:
            return None
        if folder is None:
            folder = QFileDialog.getExistingDirectory(self, "Export results to")
            if not folder:
                return None
        m, results = self.last
        layer = self.map_layer()
        stem = safe_name(Path(layer.metadata["mapkit_path"]).stem if layer else "map")
        written = write_bundle(folder, m, results, stem=stem, overwrite=True)
        self.status.setText(f"wrote {len(written)} files to {folder}")
        return written
