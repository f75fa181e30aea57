"""The stages of the default analysis, this checkout against another one, side by side.

`mapkit analyse CUBE --chunked` with the library, standards and calibration model of
``bench_large.run_pipeline``, once per run in a fresh process, alternating between the
other tree (``--old``, e.g. ``git worktree add /tmp/mapkit-main main``) and this one, so
both see the same load on a shared machine. Each run reports the seconds of every stage
of its summary (``timings_s``) and the CPU seconds the process spent in it (all threads:
above the wall time when two threads work, far above it when BLAS threads wait for a core
on a loaded machine). Prints medians over the runs, the ratio old / new, the thread
counts and the load average around the runs, and whether the two trees' results files
agree (largest difference of every numeric dataset relative to its largest value).

Run: python benchmarks/bench_stages.py --old /tmp/mapkit-main [--cube PATH] [--runs 3]
The default cube is 128 x 1000 x 1024 (``bench_large.make_cube``) in $MAPKIT_BENCH_DIR.
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent

# runs in the child: the pipeline's stage clock also notes the CPU time at every tick
CHILD = r"""
import json, sys, time, types
from pathlib import Path
import mapkit.pipeline as P
from mapkit.cli import main
ticks = []
def clock():
    t = time.perf_counter()
    ticks.append((t, time.process_time()))
    return t
P.time = types.SimpleNamespace(perf_counter=clock)
cube, out, samples = sys.argv[1:4]
S = Path(samples)
rc = main(["analyse", cube, "--library", str(S / "library"), "--standards",
           str(S / "calibration_standards.csv"), "--calibration-model", "quadratic",
           "--out", out, "--overwrite", "--quiet", "--chunked"])
wall = json.loads((Path(out) / "summary.json").read_text())["timings_s"]
cpu = {b[0] - a[0]: b[1] - a[1] for a, b in zip(ticks, ticks[1:])}
print("STAGES", json.dumps({k: [v, cpu.get(v)] for k, v in wall.items()}))
sys.exit(rc)
"""


def run(tree, cube, out):
    """One analysis with the mapkit of ``tree``: {stage: [wall s, CPU s]}, load before."""
    env = dict(os.environ, PYTHONPATH=str(tree))
    load = os.getloadavg()[0]
    done = subprocess.run([sys.executable, "-c", CHILD, str(cube), str(out),
                           str(ROOT / "sample_maps")], capture_output=True, text=True,
                          env=env, cwd=tempfile.gettempdir())
    if done.returncode:
        raise SystemExit(f"analyse failed in {tree}: {done.stderr.strip()[-2000:]}")
    return json.loads(done.stdout.split("STAGES")[1].strip().splitlines()[0]), load


def _worst(x, y):
    """Largest |x - y| relative to the largest |x| (0.0: identical, NaNs where both are)."""
    x, y = np.asarray(x, float), np.asarray(y, float)
    same = (x == y) | (np.isnan(x) & np.isnan(y))
    if same.all():
        return 0.0
    return float(np.nanmax(np.abs(x - y)[~same]) / (np.nanmax(np.abs(x)) or 1.0))


def compare(a, b):
    """Largest relative difference per numeric dataset of two results files."""
    import h5py

    worst = {}
    with h5py.File(a) as fa, h5py.File(b) as fb:
        def visit(name, obj):
            if not isinstance(obj, h5py.Dataset) or obj.dtype.kind not in "fiub":
                return
            if obj.size > 2**26:   # the cleaned cube: compared block by block
                worst[name] = max(_worst(obj[i:i + 16], fb[name][i:i + 16])
                                  for i in range(0, obj.shape[0], 16))
                return
            x, y = obj[()], fb[name][()]
            worst[name] = np.inf if np.shape(x) != np.shape(y) else _worst(x, y)
        fa.visititems(visit)
    return worst


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--old", required=True, help="the other checkout (its folder)")
    ap.add_argument("--cube", help="an HDF5 map (default: a 128 x 1000 x 1024 cube)")
    ap.add_argument("--runs", type=int, default=3)
    a = ap.parse_args()
    sys.path.insert(0, str(ROOT))
    sys.path.insert(0, str(Path(__file__).resolve().parent))
    from bench_large import make_cube, thread_counts   # one place for both
    folder = Path(os.environ.get("MAPKIT_BENCH_DIR", Path(tempfile.gettempdir()) / "mapkit-bench"))
    folder.mkdir(parents=True, exist_ok=True)
    cube = Path(a.cube) if a.cube else folder / "cube_128x1000x1024.h5"
    if not cube.exists():
        make_cube(cube, 128, 1000, 1024)
    trees = {"old": Path(a.old).resolve(), "new": ROOT}
    got = {"old": [], "new": []}
    loads = []
    for i in range(a.runs):
        for name, tree in trees.items():
            stages, load = run(tree, cube, folder / f"out_stages_{name}")
            got[name].append(stages)
            loads.append(load)
            print(f"run {i + 1} {name}: " + ", ".join(f"{k} {v[0]:.1f}/{v[1]:.1f}"
                                                      for k, v in stages.items()), flush=True)
    loads.append(os.getloadavg()[0])
    print(f"\n{cube.name}, --chunked, {a.runs} runs each, alternated old/new; "
          f"{thread_counts()}; load average (1 min) at the runs' starts "
          f"{min(loads):.1f}-{max(loads):.1f}; "
          f"{time.strftime('%Y-%m-%d %H:%M UTC', time.gmtime())}")
    print("| stage | old wall s | new wall s | old / new | old CPU s | new CPU s | old / new |")
    print("|---|---|---|---|---|---|---|")
    names = list(got["new"][0])
    med = {n: {s: [statistics.median(r[s][j] for r in got[n]) for j in (0, 1)] for s in names}
           for n in got}
    for s in names + ["total"]:
        o, w = ([sum(med[n][t][j] for t in names) for j in (0, 1)] for n in ("old", "new")) \
            if s == "total" else (med["old"][s], med["new"][s])
        print(f"| {s} | {o[0]:.1f} | {w[0]:.1f} | {o[0] / w[0]:.2f} | {o[1]:.1f} | {w[1]:.1f} "
              f"| {o[1] / w[1]:.2f} |")
    worst = compare(folder / "out_stages_old" / "results.h5",
                    folder / "out_stages_new" / "results.h5")
    same = sorted(k for k, v in worst.items() if v == 0)
    print(f"\nresults files: {len(same)} of {len(worst)} numeric datasets bit-identical; "
          + ("; ".join(f"{k} {v:.1e}" for k, v in sorted(worst.items(), key=lambda t: -t[1])
                       if v) or "all identical"))


if __name__ == "__main__":
    main()
