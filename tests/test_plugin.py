"""The napari plugin, driven headless under Xvfb with napari's viewer fixture."""

import numpy as np
import pytest

napari = pytest.importorskip("napari")
pytest.importorskip("mapkit_napari")


def test_reader_declines_foreign_files(tmp_path):
    from mapkit_napari._reader import get_reader

    (tmp_path / "a.h5").write_text("not hdf5")
    assert get_reader(str(tmp_path / "a.h5")) is None
    assert get_reader(str(tmp_path / "a.tif")) is None


def test_manifest_is_valid():
    from npe2 import PluginManifest

    pm = PluginManifest.from_distribution("mapkit-napari")
    pm.validate_imports()
    assert any(r.command == "mapkit-napari.get_reader" for r in pm.contributions.readers)


def test_open_map_with_physical_scale(make_napari_viewer, sample_map_path):
    viewer = make_napari_viewer()
    layers = viewer.open(str(sample_map_path), plugin="mapkit-napari")
    layer = layers[0]
    np.testing.assert_allclose(layer.scale, (2.0, 2.0))
    assert layer.data.shape == (48, 64)


def test_spectrum_follows_cursor_and_pins(make_napari_viewer, sample_map_path, sample_map):
    from mapkit_napari._panel import SpectrumPanel

    viewer = make_napari_viewer()
    viewer.open(str(sample_map_path), plugin="mapkit-napari")
    panel = SpectrumPanel(viewer)
    viewer.window.add_dock_widget(panel)
    iy, ix = 30, 17
    viewer.cursor.position = (sample_map.y[iy], sample_map.x[ix])  # world units: µm
    x, y = panel.line.get_data()
    np.testing.assert_array_equal(x, sample_map.raman_shift)
    np.testing.assert_array_equal(y, sample_map.intensity[iy, ix])
    assert "column 17, row 30" in panel.status.text()

    class Click:
        type = "mouse_press"
        button = 1
        position = (sample_map.y[5], sample_map.x[6])

    panel._on_click(viewer, Click())
    assert len(panel.pinned) == 1
    np.testing.assert_array_equal(panel.pinned[0][-1].get_ydata(), sample_map.intensity[5, 6])
    panel.clear_pinned()
    assert panel.pinned == []


def test_results_open_as_layers(make_napari_viewer, tmp_path):
    from mapkit.cli import main

    assert main(["demo", "--out", str(tmp_path), "--quiet", "--no-figures"]) == 0
    viewer = make_napari_viewer()
    viewer.open(str(tmp_path / "results.h5"), plugin="mapkit-napari")
    names = [layer.name for layer in viewer.layers]
    assert "kmeans: classes" in names and "unmixing: acetaminophen" in names
    labels = viewer.layers["kmeans: classes"]
    assert labels.data.max() == 4


def test_screenshot_is_not_blank(make_napari_viewer, sample_map_path, tmp_path, qtbot):
    from mapkit_napari._panel import SpectrumPanel

    viewer = make_napari_viewer(show=True)
    viewer.open(str(sample_map_path), plugin="mapkit-napari")
    panel = SpectrumPanel(viewer)
    viewer.window.add_dock_widget(panel, area="right", name="Pixel spectra")
    viewer.window._qt_window.resize(1400, 800)
    viewer.cursor.position = (40.0, 60.0)
    qtbot.waitUntil(lambda: panel.isVisible() and panel.width() > 100, timeout=5000)
    qtbot.wait(200)
    img = viewer.screenshot(canvas_only=False, flash=False)
    assert img.ndim == 3 and img.std() > 10
    canvas = viewer.screenshot(canvas_only=True, flash=False)
    lit = (canvas[..., :3].max(axis=-1) > 40).mean()
    assert lit > 0.2, f"the map itself must render ({lit:.0%} of the canvas lit)"
    from imageio import imwrite

    imwrite(tmp_path / "viewer.png", img)
