"""Preprocessing throughput, measured side by side in one run.

1. ALS baseline: mapkit's compiled batched solver against a per-spectrum pybaselines loop
   on the same spectra (same λ, p and stopping rule), with their largest difference.
2. Every registered step of the default and optional recipes on the sample map, in
   spectra per second.

Medians over several repeats; the first (compiling) call is excluded.
Run: python benchmarks/bench_preprocess.py [n_spectra]
"""

from __future__ import annotations

import platform
import statistics
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from mapkit.preprocess.baseline import als_baseline  # noqa: E402
from mapkit.preprocess.registry import run_step  # noqa: E402
from mapkit.read import open_map  # noqa: E402

STEP_CASES = [
    ("mask_bad_pixels", {}), ("despike", {}), ("despike", {"method": "spectral"}),
    ("baseline", {"method": "als"}), ("baseline", {"method": "arpls"}),
    ("baseline", {"method": "airpls"}), ("baseline", {"method": "modpoly"}),
    ("baseline", {"method": "rolling"}), ("smooth", {"method": "savgol"}),
    ("smooth", {"method": "whittaker"}), ("normalise", {"method": "vector"}),
    ("scatter_correction", {"method": "emsc"}),
    ("resample", {"start": 150.0, "stop": 1750.0, "step": 2.0}), ("bin", {"factor": 2}),
]


def median_time(fn, repeats=5):
    fn()  # warm-up: numba compilation, caches
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


def main(n=1024, lam=1e5, p=0.01):
    from pybaselines import Baseline

    m = open_map(ROOT / "sample_maps" / "tablet_map.h5").load()
    spectra = m.spectra().astype(np.float64)
    spectra = spectra[np.ptp(spectra, axis=1) > 0][:n]
    fitter = Baseline(m.raman_shift)
    ours = als_baseline(spectra, lam=lam, p=p)
    ref = np.array([fitter.asls(s, lam=lam, p=p)[0] for s in spectra])
    rel = float(np.max(np.abs(ours - ref) / np.max(np.abs(ref), axis=1, keepdims=True)))
    import numba

    threads = numba.get_num_threads()
    t_ours = median_time(lambda: als_baseline(spectra, lam=lam, p=p))
    numba.set_num_threads(1)           # the same kernel on one thread, like the loop
    t_one = median_time(lambda: als_baseline(spectra, lam=lam, p=p))
    numba.set_num_threads(threads)
    t_ref = median_time(lambda: [fitter.asls(s, lam=lam, p=p) for s in spectra], repeats=3)
    print(f"machine: {platform.machine()}, python {platform.python_version()}, "
          f"numpy {np.__version__}, {threads} numba threads")
    print(f"\n1. ALS baseline, {len(spectra)} spectra x {spectra.shape[1]} channels, "
          f"lam={lam:g}, p={p:g} (medians: mapkit of 5 runs, pybaselines of 3)")
    print(f"   pybaselines asls loop (1 thread) : {t_ref:8.3f} s  "
          f"{len(spectra) / t_ref:9.0f} spectra/s")
    print(f"   mapkit compiled ALS (1 thread)   : {t_one:8.3f} s  "
          f"{len(spectra) / t_one:9.0f} spectra/s")
    print(f"   mapkit compiled ALS ({threads} threads)  : {t_ours:8.3f} s  "
          f"{len(spectra) / t_ours:9.0f} spectra/s")
    print(f"   ratio 1 vs 1 thread {t_ref / t_one:.1f}x, {threads} threads vs 1 "
          f"{t_ref / t_ours:.1f}x; max relative difference {rel:.1e}")
    print(f"\n2. steps on the sample map ({m.n_pixels} spectra x {m.shape[2]} channels)")
    for name, params in STEP_CASES:
        t = median_time(lambda: run_step(m, name, params), repeats=3)
        label = f"{name} {params.get('method', '')}".strip()
        print(f"   {label:28s} {t * 1e3:8.1f} ms  {m.n_pixels / t:9.0f} spectra/s")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 1024)
