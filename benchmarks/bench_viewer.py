"""Time from a cursor move to the redrawn spectrum in the napari panel, on a large map file.

Opens the map lazily in a napari viewer (under Xvfb), moves the cursor to random pixels and
times the panel's update including a synchronous redraw of its plot. Prints the median and
95th percentile in ms. Run under a display:
    xvfb-run -a python benchmarks/bench_viewer.py [map.h5]
Default map: the 1000 x 1000 x 1024 cube made by bench_large.py (4.1 GB).
"""

from __future__ import annotations

import os
import statistics
import sys
import tempfile
import time
from pathlib import Path

import numpy as np


def main(path):
    import napari
    from qtpy.QtWidgets import QApplication

    from mapkit_napari._panel import SpectrumPanel

    viewer = napari.Viewer(show=False)
    t0 = time.perf_counter()
    viewer.open(str(path), plugin="mapkit-napari")
    opened = time.perf_counter() - t0
    panel = SpectrumPanel(viewer)
    layer = viewer.layers[0]
    ny, nx = layer.data.shape
    rng = np.random.default_rng(0)
    panel.canvas.draw()   # the first full draw caches the background the panel blits onto
    times, handler = [], []
    for i in range(60):
        iy, ix = int(rng.integers(ny)), int(rng.integers(nx))
        pos = tuple(np.asarray(layer.data_to_world((iy, ix)))[-2:])
        t0 = time.perf_counter()
        viewer.cursor.position = pos          # fires the panel's handler (blit or redraw)
        if panel.canvas.__dict__.get("_draw_pending"):
            panel.canvas.draw()               # a rescale was queued: count its full draw
        t2 = time.perf_counter()
        QApplication.processEvents()          # napari's own work on the same event
        times.append((time.perf_counter() - t0) * 1e3)
        handler.append((t2 - t0) * 1e3)
    times, handler = times[5:], handler[5:]   # the first reads warm caches
    print(f"map {path} ({ny} x {nx}), opened (mean image computed chunk-wise) in {opened:.1f} s")
    print(f"cursor -> spectrum read and redrawn (panel): median {statistics.median(handler):.1f} "
          f"ms, 95th percentile {np.percentile(handler, 95):.1f} ms over {len(handler)} moves "
          f"(goal: median <= 20 ms)")
    print(f"including napari's own event processing: median {statistics.median(times):.1f} ms")
    viewer.close()


if __name__ == "__main__":
    default = Path(os.environ.get("MAPKIT_BENCH_DIR", Path(tempfile.gettempdir()) / "mapkit-bench"))
    main(sys.argv[1] if len(sys.argv) > 1 else default / "cube_1000x1000x1024.h5")
