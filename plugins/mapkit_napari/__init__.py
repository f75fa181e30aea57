"""napari plugin for mapkit. It arranges library calls and shows their results; every
number it displays is computed by the ``mapkit`` package."""

__version__ = "0.1.0"


def open_with_panels(path):
    """Open ``path`` in a new napari viewer with the mapkit panels docked; returns the viewer."""
    import napari

    from ._analysis import AnalysisPanel
    from ._legend import ClassLegend
    from ._panel import SpectrumPanel

    viewer = napari.Viewer(title="mapkit")
    viewer.open(str(path), plugin="mapkit-napari")
    spectra = SpectrumPanel(viewer)
    viewer.window.add_dock_widget(spectra, name="Pixel spectra", area="right")
    viewer.window.add_dock_widget(AnalysisPanel(viewer), name="Map analysis", area="right")
    viewer.window.add_dock_widget(ClassLegend(viewer, on_class=spectra.show_class_spectrum),
                                  name="Class legend", area="left")
    from ._optical import MicrographPanel

    viewer.window.add_dock_widget(MicrographPanel(viewer), name="Micrograph", area="left")
    viewer.scale_bar.visible = True
    return viewer


__all__ = ["open_with_panels"]
