"""A 1000 x 1000 x 1024 map (4.1 GB float32) through the chunk-wise pipeline, measured.

Prints, in one run:
1. wall time and peak RSS of despike + ALS baseline + NMF + k-means + exports
   (`mapkit analyse --chunked`, a separate process so its peak RSS is its own);
2. the streaming limit: reading the cube once and summing it; pipeline time / that time;
3. threads against a 2-worker LocalCluster on a quarter of the map: same output? speed-up;
4. with --double, the same pipeline on a cube twice as tall: peak RSS ratio (flat = bounded).

Run: python benchmarks/bench_large.py [--ny 1000 --nx 1000 --ns 1024] [--double]
The cubes go to $MAPKIT_BENCH_DIR (default: a folder in the system temp dir).
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

RECIPE = """[recipe]
name = "benchmark"
[[step]]
name = "mask_bad_pixels"
saturation = 65535.0
[[step]]
name = "despike"
[[step]]
name = "baseline"
method = "als"
lam = 1e5
p = 0.01
"""


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


def run_pipeline(cube, out, extra=()):
    recipe = Path(out).with_suffix(".toml")
    recipe.write_text(RECIPE)
    # the child reports its own peak RSS as VmHWM, the high-water mark of its own address
    # space. Not ru_maxrss: Linux carries the parent's RSS at fork over into the child's
    # ru_maxrss across exec, which made a child started late in this script report this
    # script's 2.3 GiB instead of its own 1.3 GiB.
    wrapper = ("import sys\nfrom mapkit.cli import main\nrc = main(sys.argv[1:])\n"
               "hwm = open('/proc/self/status').read().split('VmHWM:')[1].split()[0]\n"
               "print('PEAK_RSS_KIB', hwm)\nsys.exit(rc)")
    t0 = time.perf_counter()
    done = subprocess.run([sys.executable, "-c", wrapper, "analyse", str(cube), "--chunked",
                           "--recipe", str(recipe), "--out", str(out), "--overwrite", "--quiet",
                           *extra], capture_output=True, text=True)
    if done.returncode:
        raise SystemExit(f"pipeline failed ({done.returncode}): {done.stderr.strip()}")
    wall = time.perf_counter() - t0
    print("   " + "\n   ".join(line for line in done.stdout.splitlines()
                                 if not line.startswith("PEAK")))
    peak = int(done.stdout.split("PEAK_RSS_KIB")[1].split()[0])
    return wall, peak / 2**20   # VmHWM is in KiB


def read_and_sum(cube):
    from mapkit import layout
    from mapkit.read import open_map

    m = open_map(cube, block_bytes=layout.READ_BYTES)      # the pipeline's own read blocks
    t0 = time.perf_counter()
    float(m.intensity.sum(dtype=np.float64).compute())
    return time.perf_counter() - t0


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--ny", type=int, default=1000)
    ap.add_argument("--nx", type=int, default=1000)
    ap.add_argument("--ns", type=int, default=1024)
    ap.add_argument("--double", action="store_true")
    a = ap.parse_args()
    folder = Path(os.environ.get("MAPKIT_BENCH_DIR", Path(tempfile.gettempdir()) / "mapkit-bench"))
    folder.mkdir(parents=True, exist_ok=True)
    cube = folder / f"cube_{a.ny}x{a.nx}x{a.ns}.h5"
    t0 = time.perf_counter()
    if not cube.exists():
        make_cube(cube, a.ny, a.nx, a.ns)
    gen = time.perf_counter() - t0
    size = a.ny * a.nx * a.ns * 4 / 1e9
    print(f"cube {a.ny} x {a.nx} x {a.ns} float32 = {size:.2f} GB, generated in {gen:.0f} s "
          f"(0 if reused); {os.cpu_count()} CPUs")
    wall, rss = run_pipeline(cube, folder / "out")
    print(f"1. despike + ALS + NMF + k-means + exports: {wall:.0f} s, peak RSS {rss:.2f} GiB")
    t_read = read_and_sum(cube)
    print(f"2. read once and sum: {t_read:.1f} s ({size / t_read:.2f} GB/s); "
          f"pipeline / streaming limit = {wall / t_read:.1f}")
    quarter = folder / f"cube_{a.ny // 4}x{a.nx}x{a.ns}.h5"
    if not quarter.exists():
        make_cube(quarter, a.ny // 4, a.nx, a.ns, seed=1)
    t_threads, _ = run_pipeline(quarter, folder / "q_threads", ("--no-figures",))
    t_cluster, _ = run_pipeline(quarter, folder / "q_cluster", ("--no-figures", "--workers", "2"))
    import h5py

    with h5py.File(folder / "q_threads" / "results.h5") as x, \
            h5py.File(folder / "q_cluster" / "results.h5") as y:
        same = all(np.array_equal(x[p][...], y[p][...]) for p in
                   ("/entry/map/intensity", "/entry/results/kmeans/labels/labels"))
    print(f"3. quarter map: threads {t_threads:.0f} s, 2-worker LocalCluster {t_cluster:.0f} s "
          f"(speed-up {t_threads / t_cluster:.2f}x), identical output: {same}")
    if a.double:
        big = folder / f"cube_{2 * a.ny}x{a.nx}x{a.ns}.h5"
        if not big.exists():
            make_cube(big, 2 * a.ny, a.nx, a.ns, seed=2)
        wall2, rss2 = run_pipeline(big, folder / "out2", ("--no-figures",))
        print(f"4. doubled cube: {wall2:.0f} s, peak RSS {rss2:.2f} GiB "
              f"(ratio to single {rss2 / rss:.2f})")


if __name__ == "__main__":
    main()
