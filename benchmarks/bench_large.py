"""The default analysis of a large map, measured as a user meets it.

`mapkit analyse MAP --library L --standards S` with the DEFAULT recipe (mask bad pixels,
despike, arPLS baseline) and the default methods (background MCR components, dominant
classes, Poisson-weighted unmixing against a 4-reference library, a content map from
calibration standards) and every output (results file, TIFFs, figures, report, summary).
The memory budget decides whether the run is one block in memory or chunk-wise (the
table says which); ``--chunked`` forces blocks.

Prints one table: median and spread of three runs, peak RSS (VmHWM of the analysing
process), whether the cube was in the page cache, the thread counts, the stage that
dominates (from the run's own timings), the cost per pixel, and with ``--double`` the
peak RSS ratio when the cube doubles (flat = bounded memory); with ``--cluster`` threads
against a 2-worker LocalCluster on the same map.

Run: python benchmarks/bench_large.py [--ny 1000 --nx 1000 --ns 1024] [--double]
     [--chunked] [--cold] [--runs 3] [--cluster]
The cubes go to $MAPKIT_BENCH_DIR (default: a folder in the system temp dir).
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
sys.path.insert(0, str(ROOT))
SAMPLES = ROOT / "sample_maps"

def make_cube(path, ny, nx, ns, seed=0):
    """Write a synthetic 4-component map band by band (never the whole cube in memory)."""
    import h5py
    from scipy.ndimage import zoom

    from mapkit import layout
    from mapkit.samples import COMPONENTS, fluorescence_shape, pure_spectrum

    rng = np.random.default_rng(seed)
    shift = np.linspace(120, 1800, ns)
    pure = np.stack([pure_spectrum(c, shift) for c in COMPONENTS])
    coarse = rng.random((len(COMPONENTS), max(2, ny // 50), max(2, nx // 50))) ** 3
    fields = np.stack([zoom(c, (ny / c.shape[0], nx / c.shape[1]), order=1)[:ny, :nx]
                       for c in coarse])
    fields /= fields.sum(axis=0)
    bg_shape = fluorescence_shape(shift)
    with h5py.File(path, "w") as f:
        g = f.create_group("entry/map")
        d = g.create_dataset("intensity", (ny, nx, ns), "float32",
                             chunks=layout.pixel_tile(ny, nx, ns))
        g.create_dataset("x", data=np.arange(nx) * 1.0).attrs["units"] = "um"
        g.create_dataset("y", data=np.arange(ny) * 1.0).attrs["units"] = "um"
        g.create_dataset("raman_shift", data=shift).attrs["units"] = "1/cm"
        rows = 16
        for y0 in range(0, ny, rows):
            w = fields[:, y0:y0 + rows].reshape(len(COMPONENTS), -1).T
            mu = w @ pure + 600 * bg_shape + 60
            block = mu + np.sqrt(mu) * rng.standard_normal(mu.shape, dtype=np.float32)
            spikes = rng.random(block.shape) < 2e-6
            block[spikes] += 5000
            d[y0:y0 + rows] = block.reshape(-1, nx, ns).astype(np.float32)
    return path


def cache_state(cube, cold):
    """Put the cube in the page cache (read it once) or drop it (posix_fadvise); say which."""
    fd = os.open(cube, os.O_RDONLY)
    try:
        if cold:
            os.posix_fadvise(fd, 0, 0, os.POSIX_FADV_DONTNEED)
            return "dropped before the run (fadvise DONTNEED)"
        while os.read(fd, 64 << 20):
            pass
        return "in the page cache (read just before the run)"
    finally:
        os.close(fd)


def run_pipeline(cube, out, extra=()):
    """One `mapkit analyse` in its own process: (wall s, peak RSS GiB, summary dict)."""
    wrapper = ("import sys\nfrom mapkit.cli import main\nrc = main(sys.argv[1:])\n"
               "hwm = open('/proc/self/status').read().split('VmHWM:')[1].split()[0]\n"
               "print('PEAK_RSS_KIB', hwm)\nsys.exit(rc)")
    # the child reports its own peak RSS as VmHWM (not ru_maxrss, which Linux carries over
    # from the parent across fork + exec)
    args = [sys.executable, "-c", wrapper, "analyse", str(cube), "--library",
            str(SAMPLES / "library"), "--standards", str(SAMPLES / "calibration_standards.csv"),
            "--calibration-model", "quadratic", "--out", str(out), "--overwrite", "--quiet",
            *extra]
    t0 = time.perf_counter()
    done = subprocess.run(args, capture_output=True, text=True, cwd=ROOT)
    wall = time.perf_counter() - t0
    if done.returncode:
        raise SystemExit(f"analyse failed ({done.returncode}): {done.stderr.strip()[-2000:]}")
    peak = int(done.stdout.split("PEAK_RSS_KIB")[1].split()[0])
    summary = json.loads((Path(out) / "summary.json").read_text())
    return wall, peak / 2**20, summary


def thread_counts():
    from threadpoolctl import threadpool_info

    import numba

    blas = ", ".join(f"{i['internal_api']} {i['num_threads']}" for i in threadpool_info())
    return (f"{os.cpu_count()} CPUs; Dask threads {os.cpu_count()} (default); numba "
            f"{numba.config.NUMBA_NUM_THREADS}; BLAS/OpenMP: {blas or 'none'}")


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--ny", type=int, default=1000)
    ap.add_argument("--nx", type=int, default=1000)
    ap.add_argument("--ns", type=int, default=1024)
    ap.add_argument("--runs", type=int, default=3)
    ap.add_argument("--double", action="store_true", help="also a cube twice as tall (RSS ratio)")
    ap.add_argument("--chunked", action="store_true", help="force the chunk-wise path")
    ap.add_argument("--cold", action="store_true", help="drop the cube from the page cache "
                    "before each run (default: read it into the cache first)")
    ap.add_argument("--cluster", action="store_true", help="also a 2-worker LocalCluster run")
    a = ap.parse_args()
    folder = Path(os.environ.get("MAPKIT_BENCH_DIR", Path(tempfile.gettempdir()) / "mapkit-bench"))
    folder.mkdir(parents=True, exist_ok=True)
    extra = ("--chunked",) if a.chunked else ()
    cube = folder / f"cube_{a.ny}x{a.nx}x{a.ns}.h5"
    t0 = time.perf_counter()
    if not cube.exists():
        make_cube(cube, a.ny, a.nx, a.ns)
    gen = time.perf_counter() - t0
    size = a.ny * a.nx * a.ns * 4 / 2**30
    rows = []

    def measure(label, path, runs, more=()):
        walls, peaks, summ, cache = [], [], None, None
        for i in range(runs):
            cache = cache_state(path, a.cold)
            wall, peak, summ = run_pipeline(path, folder / f"out_{path.stem}", extra + more)
            walls.append(wall)
            peaks.append(peak)
        rows.append((label, walls, peaks, summ, cache))
        return walls, peaks, summ

    walls, peaks, summ = measure("default analysis", cube, a.runs)
    if a.double:
        big = folder / f"cube_{2 * a.ny}x{a.nx}x{a.ns}.h5"
        if not big.exists():
            make_cube(big, 2 * a.ny, a.nx, a.ns, seed=2)
        measure("cube doubled (2 ny)", big, 1)
    if a.cluster:
        measure("2-worker LocalCluster", cube, 1, ("--workers", "2"))
    print(f"\ncube {a.ny} x {a.nx} x {a.ns} float32 = {size:.2f} GiB (generated in {gen:.0f} s, "
          f"0 if reused); {thread_counts()}; {time.strftime('%Y-%m-%d %H:%M UTC', time.gmtime())}")
    print(f"{'run':24} {'mode':11} {'blocks':>6} {'n':>2} {'median s':>9} {'spread s':>9} "
          f"{'peak RSS GiB':>12} {'us/pixel':>9}  cube")
    for label, w, p, sm, cache in rows:
        spread = f"{min(w):.1f}-{max(w):.1f}" if len(w) > 1 else "-"
        ny, nx, _ = sm["shape"]
        print(f"{label:24} {sm['mode']:11} {sm['plan']['blocks']:>6} {len(w):>2} "
              f"{statistics.median(w):>9.1f} {spread:>9} {max(p):>12.2f} "
              f"{1e6 * statistics.median(w) / (ny * nx):>9.0f}  {cache}")
    if a.double:
        print(f"peak RSS ratio, doubled / single cube: {rows[1][2][0] / max(peaks):.2f}")
    t = summ["timings_s"]
    total = sum(t.values())
    print("stages of the last run (s): " + ", ".join(f"{k} {v:.1f}" for k, v in t.items())
          + f"; largest: {max(t, key=t.get)} ({100 * max(t.values()) / total:.0f} %)")
    # per-pixel stages grow with the map; the fit (on at most stream.SAMPLE_PIXELS spectra),
    # figures and report do not
    fixed = {"fit", "TIFFs, table, figures", "report"}
    per_px = sum(v for k, v in t.items() if k not in fixed) / (a.ny * a.nx)
    fixed_s = sum(v for k, v in t.items() if k in fixed)
    from mapkit.stream import SAMPLE_PIXELS

    print(f"per-pixel stages {1e6 * per_px:.0f} us/pixel, fixed stages {fixed_s:.0f} s: "
          f"1000 x 1000 x 1024 would take about {fixed_s + per_px * 1e6 * 1024 / a.ns:.0f} s "
          f"(an estimate: per-pixel cost scaled by pixels and channels; the fit then sees "
          f"{SAMPLE_PIXELS} spectra{'' if a.ny * a.nx <= SAMPLE_PIXELS else ', as here'})")

if __name__ == "__main__":
    main()
