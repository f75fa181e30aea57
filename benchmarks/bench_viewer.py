"""Opening a large map in the napari viewer: time to the first image, time to the exact mean
image, and the spectrum under the cursor, idle and while the image is being refined.

Side by side in one run, on the same file (each three times, medians with min-max):
- before: the mean image over the whole cube computed before the first image (the reader's
  old way; the library's estimate switched off with ``SAMPLE_BYTES`` = infinity);
- after: an estimate from a strided sample of the file's tiles at once, refined band by band
  in a napari worker (``mapkit.core.overview.mean_image_steps``).
Each open runs in a fresh process with a shown viewer (the plugin's imports count, as on a
user's first open), timed from ``viewer.open`` to the first processed draw. The cursor
latency is the panel's handler: the spectrum read from the file and its line
redrawn (blit, or a full draw when the scale changes), 55 moves after 5 warm-up moves.

Run under a display, sized by arguments (the cube is written once with bench_large.py's
generator; ``nice`` it on a shared machine):
    xvfb-run -a python benchmarks/bench_viewer.py --ny 600 --nx 600 --ns 1024
    xvfb-run -a python benchmarks/bench_viewer.py --map some_map.h5
The whole file is read once before timing, so every row sees the cube in the page cache
(say so beside the numbers; a cold disk is slower for both, most for 'before').
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent


def _events():
    from qtpy.QtWidgets import QApplication

    QApplication.processEvents()


def _cursor_moves(viewer, panel, layer, n=60, seed=0, between=None):
    """Panel handler times (ms) for n cursor moves to random pixels (the first 5 dropped)."""
    rng = np.random.default_rng(seed)
    ny, nx = layer.data.shape
    times = []
    for _ in range(n):
        iy, ix = int(rng.integers(ny)), int(rng.integers(nx))
        pos = tuple(np.asarray(layer.data_to_world((iy, ix)))[-2:])
        t0 = time.perf_counter()
        viewer.cursor.position = pos          # fires the panel's handler (blit or redraw)
        if panel.canvas.__dict__.get("_draw_pending"):
            panel.canvas.draw()               # a rescale was queued: count its full draw
        times.append((time.perf_counter() - t0) * 1e3)
        _events()                             # napari's own work, and the worker's steps
        if between is not None:
            between()
    return times[5:]


def open_once(path, *, estimate: bool):
    """In a fresh process (the plugin's imports counted, as on a user's first open), open
    ``path`` in a shown viewer: (s to first image, s to exact image, cursor ms idle, cursor
    ms while refining)."""
    import json
    import subprocess

    r = subprocess.run([sys.executable, __file__, "--child", str(path),
                        "--estimate" if estimate else "--no-estimate"],
                       capture_output=True, text=True)
    if r.returncode:
        raise RuntimeError(r.stderr[-2000:])
    return json.loads(r.stdout.strip().splitlines()[-1])


def _child(path, estimate: bool):
    import json

    import napari

    viewer = napari.Viewer(title="mapkit")
    for _ in range(10):
        _events()
    t0 = time.perf_counter()
    if not estimate:   # the old reader: the whole-cube mean before the first image
        import mapkit.core.overview as overview

        overview.SAMPLE_BYTES = float("inf")
    viewer.open(str(path), plugin="mapkit-napari")
    _events()                                 # the first image drawn
    first = time.perf_counter() - t0
    from mapkit_napari import _refine
    from mapkit_napari._panel import SpectrumPanel

    layer = viewer.layers[0]
    panel = SpectrumPanel(viewer)
    viewer.window.add_dock_widget(panel, area="right")
    _events()
    panel.canvas.draw()
    busy = []
    if _refine._RUNNING:                      # moves while the worker still reads the cube
        busy = _cursor_moves(viewer, panel, layer, n=30, seed=1)
    while _refine._RUNNING:
        _events()
        time.sleep(0.005)
    _events()
    exact = time.perf_counter() - t0
    assert layer.metadata["mapkit_mean"] == "exact"
    idle = _cursor_moves(viewer, panel, layer)
    viewer.close()
    print(json.dumps([first, exact, idle, busy]))


def _read_through(path):
    import h5py

    with h5py.File(path, "r") as f:
        d = f["/entry/map/intensity"]
        for y0 in range(0, d.shape[0], 64):
            d[y0:y0 + 64]


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--map", help="a mapkit map file (default: a synthetic cube of the size below)")
    ap.add_argument("--ny", type=int, default=1000)
    ap.add_argument("--nx", type=int, default=1000)
    ap.add_argument("--ns", type=int, default=1024)
    ap.add_argument("--runs", type=int, default=3)
    ap.add_argument("--child", help=argparse.SUPPRESS)
    ap.add_argument("--estimate", action=argparse.BooleanOptionalAction, default=True,
                    help=argparse.SUPPRESS)
    a = ap.parse_args()
    if a.child:
        return _child(a.child, a.estimate)
    if a.map:
        path = Path(a.map)
    else:
        folder = Path(os.environ.get("MAPKIT_BENCH_DIR",
                                     Path(tempfile.gettempdir()) / "mapkit-bench"))
        folder.mkdir(parents=True, exist_ok=True)
        path = folder / f"cube_{a.ny}x{a.nx}x{a.ns}.h5"
        if not path.exists():
            sys.path.insert(0, str(HERE))
            from bench_large import make_cube

            print(f"writing {path} ...", flush=True)
            make_cube(path, a.ny, a.nx, a.ns)
    from mapkit.read import open_map

    m = open_map(path)
    from mapkit.core.overview import SAMPLE_BYTES

    sample_mb = SAMPLE_BYTES >> 20
    gib = m.intensity.nbytes / 2**30
    _read_through(path)
    rows = {}
    labels = {False: "before: whole-cube mean first", True: "after: sampled estimate, refined"}
    for _ in range(a.runs):   # interleaved, so a busy spell on the machine hits both
        for estimate, label in labels.items():
            rows.setdefault(label, []).append(open_once(path, estimate=estimate))

    def med(vals, fmt):
        vals = [v for v in vals if v is not None]
        if not vals:
            return "-"
        return f"{fmt.format(statistics.median(vals))} ({fmt.format(min(vals))}-" \
               f"{fmt.format(max(vals))})"

    print(f"\nmap {path.name}: {m.shape[0]} x {m.shape[1]} x {m.shape[2]} float32, "
          f"{gib:.2f} GiB, tiles {m.intensity.chunksize[:2]}; cube in the page cache; "
          f"sample for the estimate {sample_mb} MiB; "
          f"{os.cpu_count()} cores, load {os.getloadavg()[0]:.1f}; {a.runs} runs each, "
          "median (min-max)")
    print(f"{'':34s} {'first image s':>20s} {'exact image s':>20s} "
          f"{'cursor ms idle':>20s} {'cursor ms refining':>20s}")
    for label, runs in rows.items():
        first = [r[0] for r in runs]
        exact = [r[1] for r in runs]
        idle = [statistics.median(r[2]) for r in runs]
        busy = [statistics.median(r[3]) for r in runs if r[3]]
        print(f"{label:34s} {med(first, '{:.2f}'):>20s} {med(exact, '{:.2f}'):>20s} "
              f"{med(idle, '{:.1f}'):>20s} {med(busy, '{:.1f}'):>20s}")
    print("goals: first image <= 2 s; cursor spectrum <= 20 ms median")


if __name__ == "__main__":
    main()
