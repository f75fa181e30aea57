"""The napari plugin, driven headless under Xvfb with napari's viewer fixture."""

import numpy as np
import pytest

import napari  # noqa: F401  (declared: the viewer extra; a missing package fails here)
import mapkit_napari  # noqa: F401


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
    assert "classes" in names and "unmixing: acetaminophen" in names
    labels = viewer.layers["classes"]
    assert labels.data.max() == 4
    # quantity layers use the figures' perceptually uniform map (Nuñez, Anderton & Renslow
    # 2018, PLoS ONE 13:e0199239, "cividis"), as the docs say
    assert viewer.layers["unmixing: acetaminophen"].colormap.name == "cividis"


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


def _viewer_with_map(make_napari_viewer, path):
    viewer = make_napari_viewer()
    viewer.open(str(path), plugin="mapkit-napari")
    return viewer


def test_baseline_overlay_comes_from_the_library(make_napari_viewer, sample_map_path, sample_map):
    from mapkit.preprocess.baseline import arpls_baseline
    from mapkit_napari._panel import SpectrumPanel

    viewer = _viewer_with_map(make_napari_viewer, sample_map_path)
    panel = SpectrumPanel(viewer)
    panel.show_baseline.setChecked(True)
    panel.show_corrected.setChecked(True)
    viewer.cursor.position = (sample_map.y[10], sample_map.x[20])
    spec = sample_map.intensity[10, 20].astype(float)
    base = arpls_baseline(spec, sample_map.raman_shift, lam=1e6)
    np.testing.assert_allclose(panel.baseline_line.get_ydata(), base)
    np.testing.assert_allclose(panel.corrected_line.get_ydata(), spec - base)


def test_dragged_range_makes_a_band_image(make_napari_viewer, sample_map_path, sample_map):
    from mapkit.reduce import band_image
    from mapkit_napari._panel import SpectrumPanel

    viewer = _viewer_with_map(make_napari_viewer, sample_map_path)
    panel = SpectrumPanel(viewer)
    layer = panel.band_from_range(845.0, 872.0)
    expected = band_image(sample_map, 845.0, 872.0).fields["image"].data
    np.testing.assert_allclose(layer.data, expected.astype(np.float32), rtol=1e-6)
    np.testing.assert_allclose(layer.scale, (2.0, 2.0))


def test_region_mean_spectrum(make_napari_viewer, sample_map_path, sample_map):
    from mapkit.reduce import region_spectrum
    from mapkit_napari._panel import SpectrumPanel

    viewer = _viewer_with_map(make_napari_viewer, sample_map_path)
    panel = SpectrumPanel(viewer)
    labels = np.zeros((48, 64), np.int32)
    labels[10:20, 30:40] = 3
    lab_layer = viewer.add_labels(labels, scale=(2.0, 2.0))
    lab_layer.selected_label = 3
    viewer.layers.selection.active = lab_layer
    mean, sd, n = panel.plot_region()
    ref_mean, ref_sd, ref_n = region_spectrum(sample_map, labels == 3)
    assert n == ref_n == 100
    np.testing.assert_allclose(mean, ref_mean)


def test_analysis_panel_runs_in_a_worker_and_exports(make_napari_viewer, sample_map_path,
                                                     sample_dir, qtbot, tmp_path):
    from mapkit.read.nexus import read_result_objects
    from mapkit_napari._analysis import AnalysisPanel

    viewer = _viewer_with_map(make_napari_viewer, sample_map_path)
    panel = AnalysisPanel(viewer)
    panel.method.setCurrentText("Components: NMF")
    panel.library.setText(str(sample_dir / "library"))
    worker = panel.run()
    with qtbot.waitSignal(worker.finished, timeout=120000):
        pass
    names = [layer.name for layer in viewer.layers]
    for k in range(1, 5):
        assert f"nmf: component {k}" in names
    assert "acetaminophen" in panel.status.text()
    layer = viewer.layers["nmf: component 1"]
    np.testing.assert_allclose(layer.scale, (2.0, 2.0))
    written = panel.export_results(tmp_path)
    assert (tmp_path / "results.h5") in written
    res = {r.name: r for r in read_result_objects(tmp_path / "results.h5")}
    np.testing.assert_array_equal(res["nmf"].fields["images"].data[0],
                                  panel.last[1][0].fields["images"].data[0])


def test_worker_errors_reach_the_user(make_napari_viewer, sample_map_path, qtbot):
    from mapkit_napari._analysis import AnalysisPanel

    viewer = _viewer_with_map(make_napari_viewer, sample_map_path)
    panel = AnalysisPanel(viewer)
    panel.method.setCurrentText("Content map (saved model)")
    worker = panel.run()
    with qtbot.waitSignal(worker.finished, timeout=60000):
        pass
    assert panel.status.text().startswith("failed:")
    assert "a content map needs a quantification model" in panel.status.text()
    assert "\n" not in panel.status.text()
    assert panel.run_button.isEnabled()


def test_writer_keeps_the_scale(make_napari_viewer, sample_map_path, tmp_path):
    import tifffile

    viewer = _viewer_with_map(make_napari_viewer, sample_map_path)
    out = viewer.layers[0].save(str(tmp_path / "mean.tif"), plugin="mapkit-napari")
    with tifffile.TiffFile(out[0] if isinstance(out, list) else out) as tif:
        xres = tif.pages[0].tags["XResolution"].value
        assert xres[0] / xres[1] == pytest.approx(0.5)


def test_writer_saves_a_volume_as_a_z_stack(make_napari_viewer, tmp_path):
    """A volume layer saved from the viewer is an ImageJ z stack with the depth step as its
    spacing and the lateral pixel size in the resolution tags (ImageJ hyperstack
    convention, from memory)."""
    import tifffile

    from mapkit import RamanMap
    from mapkit.export import write_map

    cube = np.random.default_rng(1).poisson(50, (3, 4, 5, 20)).astype(np.float32)
    m = RamanMap(cube, raman_shift=np.linspace(400, 1600, 20), x=np.arange(5) * 0.5,
                 y=np.arange(4) * 0.5, z=np.array([0.0, 1.5, 3.0]))
    path = write_map(tmp_path / "vol.h5", m)
    viewer = make_napari_viewer()
    (layer,) = viewer.open(str(path), plugin="mapkit-napari")
    out = layer.save(str(tmp_path / "vol.tif"), plugin="mapkit-napari")
    with tifffile.TiffFile(out[0] if isinstance(out, list) else out) as tif:
        assert tif.series[0].shape == (3, 4, 5)
        assert tif.imagej_metadata["spacing"] == pytest.approx(1.5)
        xres = tif.pages[0].tags["XResolution"].value
        assert xres[0] / xres[1] == pytest.approx(2.0)      # pixels per µm


def test_reader_opens_text_tables(make_napari_viewer, tmp_path):
    rows = ["x,y,100,200,300"] + [f"{ix},{iy},1,{ix + iy},3" for iy in range(3) for ix in range(4)]
    (tmp_path / "scan.csv").write_text("\n".join(rows) + "\n")
    viewer = make_napari_viewer()
    layers = viewer.open(str(tmp_path / "scan.csv"), plugin="mapkit-napari")
    assert layers[0].data.shape == (3, 4)


def test_screenshot_with_both_panels(make_napari_viewer, sample_map_path, sample_dir, qtbot,
                                     tmp_path):
    from mapkit_napari._analysis import AnalysisPanel
    from mapkit_napari._panel import SpectrumPanel

    viewer = make_napari_viewer(show=True)
    viewer.open(str(sample_map_path), plugin="mapkit-napari")
    spectra = SpectrumPanel(viewer)
    analysis = AnalysisPanel(viewer)
    viewer.window.add_dock_widget(spectra, area="right", name="Pixel spectra")
    viewer.window.add_dock_widget(analysis, area="right", name="Map analysis")
    viewer.window._qt_window.resize(1500, 950)
    analysis.method.setCurrentText("Classes: k-means")
    analysis.library.setText(str(sample_dir / "library"))
    worker = analysis.run()
    with qtbot.waitSignal(worker.finished, timeout=120000):
        pass
    viewer.cursor.position = (40.0, 60.0)
    qtbot.wait(300)
    _screenshot(viewer, tmp_path, "viewer_panels.png")


def _screenshot(viewer, tmp_path, name):
    """Grab the whole window, check it is not blank, keep it (and in $MAPKIT_SCREENSHOT_DIR)."""
    import os

    from imageio import imwrite

    img = viewer.screenshot(canvas_only=False, flash=False)
    assert img.std() > 10
    imwrite(tmp_path / name, img)
    if os.environ.get("MAPKIT_SCREENSHOT_DIR"):
        imwrite(os.path.join(os.environ["MAPKIT_SCREENSHOT_DIR"], name), img)
    return img


@pytest.fixture(scope="module")
def optical_results(tmp_path_factory, sample_dir):
    from mapkit.cli import main

    out = tmp_path_factory.mktemp("optical_viewer")
    assert main(["analyse", str(sample_dir / "tablet_map.h5"), "--out", str(out), "--quiet",
                 "--no-figures", "--library", str(sample_dir / "library"),
                 "--optical", str(sample_dir / "tablet_micrograph.png"),
                 "--control-points", str(sample_dir / "tablet_micrograph_points.csv")]) == 0
    return out


def test_micrograph_layer_sits_in_map_coordinates(make_napari_viewer, optical_results):
    from mapkit.read.optical import read_placed_image

    viewer = make_napari_viewer()
    viewer.open(str(optical_results / "results.h5"), plugin="mapkit-napari")
    layer = viewer.layers["micrograph"]
    assert viewer.layers.index(layer) == 0 and layer.rgb
    placed = read_placed_image(optical_results / "results.h5")
    # a micrograph pixel lands where the library's transform puts it (world = µm)
    for row, col in ((10, 20), (200, 300)):
        world = layer.data_to_world((row, col))
        np.testing.assert_allclose(world, (placed.pixel_to_map() @ [row, col, 1])[:2],
                                   atol=1e-9)
    # the maps above it are see-through
    assert viewer.layers["classes"].opacity < 1
    assert viewer.layers["mcr: component 1"].opacity < 1


def test_class_legend_matches_the_summary(make_napari_viewer, optical_results):
    import json

    from mapkit_napari._legend import ClassLegend
    from mapkit_napari._panel import SpectrumPanel
    from mapkit.read.nexus import read_results

    viewer = make_napari_viewer()
    viewer.open(str(optical_results / "results.h5"), plugin="mapkit-napari")
    spectra = SpectrumPanel(viewer)
    legend = ClassLegend(viewer, on_class=spectra.show_class_spectrum)
    viewer.layers.selection.active = viewer.layers["classes"]
    summary = json.loads((optical_results / "summary.json").read_text())["results"]["classes"]
    ident = {i["spectrum"]: i for i in summary["identification"]}
    assert legend.table.rowCount() == len(summary["areas"])
    for i, (name, area) in enumerate(summary["areas"].items()):
        assert legend.table.item(i, 1).text().startswith(name)
        assert ident[name]["match"] in legend.table.item(i, 1).text()
        assert float(legend.table.item(i, 2).text()) == pytest.approx(area["fraction_pct"],
                                                                       abs=0.05)
        assert float(legend.table.item(i, 3).text()) == pytest.approx(area["area_um2"], abs=0.5)
    # the fractions are those of the label image itself (count of pixels per class)
    labels = viewer.layers["classes"].data
    good = labels > 0
    for i, area in enumerate(summary["areas"].values()):
        assert area["fraction_pct"] == pytest.approx(100 * np.mean(labels[good] == i + 1))
    # clicking a row draws that class's mean ± sd from the results file
    row = legend.select(1)
    stored = read_results(optical_results / "results.h5")["classes"]["fields"]["class_spectra"]
    line = spectra.region_lines[0]
    np.testing.assert_allclose(line.get_ydata(), stored["data"][1])
    np.testing.assert_allclose(row["sd"], stored["errors"][1])
    assert "%" in spectra.status.text()


def test_calibration_in_the_panel_matches_the_command_line(make_napari_viewer, sample_dir,
                                                          sample_map_path, tmp_path, qtbot):
    from mapkit.cli import main
    from mapkit_napari._analysis import AnalysisPanel
    from mapkit.quantify import QuantModel

    recipe = str(sample_dir / "tablet_recipe.toml")
    assert main(["calibrate", str(sample_dir / "calibration_standards.csv"), "--library",
                 str(sample_dir / "library"), "--recipe", recipe, "--model", "quadratic",
                 "--out", str(tmp_path / "cli")]) == 0
    viewer = make_napari_viewer()
    viewer.open(str(sample_map_path), plugin="mapkit-napari")
    panel = AnalysisPanel(viewer)
    panel.recipe.setText(recipe)
    panel.library.setText(str(sample_dir / "library"))
    panel.standards.setText(str(sample_dir / "calibration_standards.csv"))
    panel.cal_model.setCurrentText("quadratic")
    model = panel.fit_calibration()
    cli = QuantModel.load(tmp_path / "cli" / "quant_model.json")
    s, c = model.calibration.summary(), cli.calibration.summary()
    np.testing.assert_allclose(s["coefficients"], c["coefficients"], rtol=1e-10)
    assert s["lod"] == pytest.approx(c["lod"]) and s["loq"] == pytest.approx(c["loq"])
    assert "LOD" in panel.cal_status.text() and not panel.cal_plot.pixmap().isNull()
    saved = panel.save_calibration(tmp_path / "quant_model.json")
    assert QuantModel.load(saved).calibration.summary()["coefficients"] == \
        pytest.approx(c["coefficients"])
    from mapkit_napari._optical import MicrographPanel

    under = MicrographPanel(viewer)          # a micrograph under the map: results see-through
    under.image_path.setText(str(sample_dir / "tablet_micrograph.png"))
    assert under.add_micrograph() is not None
    worker = panel.apply_calibration()
    with qtbot.waitSignal(worker.finished, timeout=120000):
        pass
    content = [layer for layer in viewer.layers if layer.name.startswith("concentration")]
    assert content and all(layer.opacity < 1 for layer in content)


def test_clicked_pairs_register_the_micrograph(make_napari_viewer, sample_dir, sample_map_path,
                                               tmp_path):
    from mapkit_napari._optical import MicrographPanel
    from mapkit.read.optical import read_control_points, read_optical, read_placed_image
    from mapkit.samples import micrograph_matrix

    viewer = make_napari_viewer()
    viewer.open(str(sample_map_path), plugin="mapkit-napari")
    panel = MicrographPanel(viewer)
    panel.image_path.setText(str(sample_dir / "tablet_micrograph.png"))
    assert panel.add_micrograph() is not None
    img = read_optical(sample_dir / "tablet_micrograph.png")
    on_image, on_map = read_control_points(sample_dir / "tablet_micrograph_points.csv", img)
    points = panel.points_layer()
    for (xi, yi), (xm, ym) in zip(on_image, on_map):   # micrograph first, then the map
        points.add([yi, xi])
        points.add([ym, xm])
    placed = panel.register()
    assert placed.registration["pairs"] == 6 and "RMS" in panel.status.text()
    # the same fit as the library makes from the pairs in the file (clicks → coordinates
    # lose nothing), and close to the transform the micrograph was rendered with
    from mapkit.register import ControlPointRegistration

    ref = ControlPointRegistration("similarity").fit(on_image, on_map).matrix_
    np.testing.assert_allclose(placed.matrix, ref, atol=1e-9)
    np.testing.assert_allclose(placed.matrix, micrograph_matrix(), atol=0.05)
    written = panel.save(tmp_path / "with_micrograph.h5")
    np.testing.assert_allclose(read_placed_image(written).matrix, placed.matrix)


def test_screenshot_with_micrograph_and_legend(make_napari_viewer, optical_results, qtbot,
                                              tmp_path):
    from mapkit_napari._legend import ClassLegend
    from mapkit_napari._panel import SpectrumPanel

    viewer = make_napari_viewer(show=True)
    viewer.open(str(optical_results / "results.h5"), plugin="mapkit-napari")
    spectra = SpectrumPanel(viewer)
    legend = ClassLegend(viewer, on_class=spectra.show_class_spectrum)
    viewer.window.add_dock_widget(spectra, area="right", name="Pixel spectra")
    viewer.window.add_dock_widget(legend, area="right", name="Class legend")
    viewer.window._qt_window.resize(1500, 950)
    for layer in viewer.layers:
        layer.visible = layer.name in ("micrograph", "classes")
    viewer.layers.selection.active = viewer.layers["classes"]
    legend.select(0)
    viewer.reset_view()
    qtbot.wait(300)
    _screenshot(viewer, tmp_path, "viewer_micrograph.png")


def test_screenshot_of_the_calibration_panel(make_napari_viewer, sample_map_path, sample_dir,
                                             qtbot, tmp_path):
    from mapkit_napari._analysis import AnalysisPanel

    viewer = make_napari_viewer(show=True)
    viewer.open(str(sample_map_path), plugin="mapkit-napari")
    panel = AnalysisPanel(viewer)
    viewer.window.add_dock_widget(panel, area="right", name="Map analysis")
    viewer.window._qt_window.resize(1500, 1000)
    panel.library.setText(str(sample_dir / "library"))
    panel.recipe.setText(str(sample_dir / "tablet_recipe.toml"))
    panel.standards.setText(str(sample_dir / "calibration_standards.csv"))
    panel.cal_model.setCurrentText("quadratic")
    from qtpy.QtWidgets import QGroupBox

    box, = panel.findChildren(QGroupBox)
    assert not panel.standards.isVisibleTo(panel)      # folded away until asked for
    box.setChecked(True)
    assert panel.standards.isVisibleTo(panel)
    assert panel.fit_calibration() is not None
    qtbot.wait(300)
    _screenshot(viewer, tmp_path, "viewer_calibration.png")


def _small_sample_budget(monkeypatch):
    """Make the 7 MB sample map count as large: an estimate from 2 of its 12 tiles' worth,
    refined one row of tiles at a time (as a multi-GB map is by default)."""
    import mapkit.core.overview as overview

    tile = 16 * 16 * 600 * 4
    monkeypatch.setattr(overview, "SAMPLE_BYTES", 2 * tile)
    monkeypatch.setattr(overview, "BAND_BYTES", tile)


def test_large_map_shows_an_estimate_then_the_exact_mean(make_napari_viewer, sample_map_path,
                                                         sample_map, qtbot, monkeypatch):
    """The first image comes from a sample of the cube; a worker with a progress bar makes
    it exact (numpy's mean as the reference) while the cursor spectrum keeps working."""
    from mapkit_napari import _refine
    from mapkit_napari._panel import SpectrumPanel

    _small_sample_budget(monkeypatch)
    viewer = make_napari_viewer()
    viewer.open(str(sample_map_path), plugin="mapkit-napari")
    layer = viewer.layers[0]
    exact = np.asarray(sample_map.intensity, np.float64).mean(axis=-1)
    assert layer.metadata["mapkit_mean"].startswith("estimate")
    assert layer.data.shape == exact.shape
    assert not np.allclose(layer.data, exact, rtol=1e-3)
    (worker,) = _refine._RUNNING
    assert worker.pbar.total == 3
    panel = SpectrumPanel(viewer)
    viewer.cursor.position = (sample_map.y[30], sample_map.x[17])
    np.testing.assert_array_equal(panel.line.get_data()[1], sample_map.intensity[30, 17])
    qtbot.waitUntil(lambda: not _refine._RUNNING, timeout=60000)
    qtbot.waitUntil(lambda: layer.metadata["mapkit_mean"] == "exact", timeout=10000)
    assert worker.pbar.n == 3                     # one step of the progress bar per band
    np.testing.assert_allclose(layer.data, exact, rtol=1e-6)
    assert layer.contrast_limits[0] < layer.contrast_limits[1]
    assert not _refine._RUNNING


def test_small_map_and_no_event_loop_give_the_exact_mean_at_once(make_napari_viewer,
                                                                  sample_map_path, sample_map,
                                                                  monkeypatch):
    from qtpy.QtWidgets import QApplication

    from mapkit_napari import _refine
    from mapkit_napari._reader import read_layers

    exact = np.asarray(sample_map.intensity, np.float64).mean(axis=-1)
    viewer = make_napari_viewer()
    viewer.open(str(sample_map_path), plugin="mapkit-napari")   # 7 MB: no estimate needed
    assert viewer.layers[0].metadata["mapkit_mean"] == "exact" and not _refine._RUNNING
    np.testing.assert_allclose(viewer.layers[0].data, exact, rtol=1e-6)
    # a script reading layers with no Qt application: nothing could show the steps
    _small_sample_budget(monkeypatch)
    monkeypatch.setattr(QApplication, "instance", staticmethod(lambda: None))
    data, kw, kind = read_layers(str(sample_map_path))[0]
    assert kind == "image" and kw["metadata"]["mapkit_mean"] == "exact"
    np.testing.assert_allclose(data, exact, rtol=1e-6)
    assert not _refine._RUNNING
def test_volume_opens_with_a_depth_slider_and_the_spectrum_follows_any_slice(
        make_napari_viewer, tmp_path):
    from mapkit import RamanMap
    from mapkit.export import write_map
    from mapkit_napari._panel import SpectrumPanel

    rng = np.random.default_rng(0)
    cube = rng.poisson(100, (3, 4, 5, 30)).astype(np.float32)
    m = RamanMap(cube, raman_shift=np.linspace(400, 1600, 30), x=np.arange(5) * 0.5,
                 y=np.arange(4) * 0.5, z=np.array([0.0, 2.0, 4.0]))
    path = write_map(tmp_path / "vol.h5", m)
    viewer = make_napari_viewer()
    (layer,) = viewer.open(str(path), plugin="mapkit-napari")
    assert layer.data.shape == (3, 4, 5)
    np.testing.assert_allclose(layer.scale, (2.0, 0.5, 0.5))
    assert viewer.dims.ndim == 3            # napari shows a slider for the depth axis
    panel = SpectrumPanel(viewer)
    viewer.window.add_dock_widget(panel)
    viewer.cursor.position = (4.0, 1.0, 1.5)          # z = 4 um (slice 2), y = 1, x = 1.5 um
    np.testing.assert_array_equal(panel.line.get_data()[1], cube[2, 2, 3])
    assert "z = 4.0 µm" in panel.status.text() and "column 3, row 2" in panel.status.text()


def test_depth_profile_of_a_clicked_point(make_napari_viewer, tmp_path):
    from mapkit.export import write_results_file
    from mapkit.reduce.unmix import ReferenceUnmixing
    from mapkit.scenes import make_film_section
    from mapkit_napari._panel import SpectrumPanel

    s = make_film_section(0)
    m = s.to_map()
    result = ReferenceUnmixing(s.references(), baseline_order=1).fit(m).result(m)
    path = write_results_file(tmp_path / "film.h5", m, [result])
    viewer = make_napari_viewer()
    viewer.open(str(path), plugin="mapkit-napari")
    panel = SpectrumPanel(viewer)
    viewer.window.add_dock_widget(panel)
    viewer.layers.selection.active = viewer.layers[0]
    viewer.cursor.position = (m.z[20], m.x[4])
    profile, interfaces = panel.plot_depth_profile()
    np.testing.assert_allclose(profile.values, result.fields["abundance"].data[:, :, 4])
    assert profile.names == tuple(result.fields["abundance"].axes[0].values)
    assert any(abs(i.z - s.truth["interface"]) < 0.5 for i in interfaces)
    assert panel.depth_canvas.isVisible() or not panel.isVisible()
    assert "apparent" in panel.status.text()


def test_depth_profile_over_a_drawn_region(make_napari_viewer, tmp_path):
    """A rectangle drawn over a volume: the profile is the mean over the pixels inside it at
    every depth (numpy's nanmean over the same pixels as the reference)."""
    from mapkit import RamanMap
    from mapkit.export import write_map
    from mapkit_napari._panel import SpectrumPanel

    rng = np.random.default_rng(3)
    cube = rng.poisson(100, (4, 6, 7, 30)).astype(np.float32)
    m = RamanMap(cube, raman_shift=np.linspace(400, 1600, 30), x=np.arange(7) * 0.5,
                 y=np.arange(6) * 0.5, z=np.array([0.0, 1.0, 2.0, 3.0]))
    path = write_map(tmp_path / "vol.h5", m)
    viewer = make_napari_viewer()
    (layer,) = viewer.open(str(path), plugin="mapkit-napari")
    panel = SpectrumPanel(viewer)
    viewer.window.add_dock_widget(panel)
    # y 0.4-1.6 um, x 0.9-2.1 um: rows 1-3, columns 2-4
    shapes = viewer.add_shapes([[[0, 0.4, 0.9], [0, 0.4, 2.1], [0, 1.6, 2.1], [0, 1.6, 0.9]]],
                               shape_type="polygon")
    viewer.layers.selection.active = shapes
    profile, _ = panel.plot_depth_profile()
    inside = np.zeros((6, 7), bool)
    inside[1:4, 2:5] = True
    expected = np.nanmean(np.asarray(layer.data, float)[:, inside], axis=-1)
    np.testing.assert_allclose(profile.values[0], expected, rtol=1e-6)
    assert "9 pixels" in profile.where
