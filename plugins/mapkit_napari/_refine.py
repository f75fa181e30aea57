"""Show the library's finer mean images as they come, from a napari worker with a progress bar.

Only arranging: every image comes from :func:`mapkit.core.overview.mean_image_steps`.
"""

from __future__ import annotations

_RUNNING: set = set()   # workers alive (a worker nobody holds would be collected mid-run)
START_AFTER_MS = 100


def _each(steps):
    yield from steps


def refine_in_background(token, steps, total, desc="mean image"):
    """Replace the data of the layer whose ``metadata["mapkit_mean"]`` is ``token`` with each
    step of ``steps``; returns the started worker."""
    from napari.qt.threading import create_worker

    worker = create_worker(_each, steps, _start_thread=False,
                           _progress={"total": total, "desc": desc})
    seen = [False]

    def show(step):
        import napari

        from ._layers import robust_limits

        viewer = napari.current_viewer()
        layers = [] if viewer is None else [
            lyr for lyr in viewer.layers if lyr.metadata.get("mapkit_mean") == token]
        if not layers:
            if seen[0]:            # the layer was closed: stop reading the cube
                worker.quit()
            return
        seen[0] = True
        for layer in layers:
            layer.data = step.image
            if step.exact:
                layer.contrast_limits = robust_limits(step.image)
                layer.metadata["mapkit_mean"] = "exact"

    worker.yielded.connect(show)
    worker.finished.connect(lambda: _RUNNING.discard(worker))
    _RUNNING.add(worker)
    # start once the viewer has added and drawn the estimate, so reading the cube does not
    # hold up the first image
    from qtpy.QtCore import QTimer

    QTimer.singleShot(START_AFTER_MS, worker.start)
    return worker


def finish_now(steps):
    """The last (exact) step at once: where no event loop could show the others."""
    last = None
    for last in steps:
        pass
    return last
