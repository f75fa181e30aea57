"""ALS baseline throughput: mapkit's batched solver against a per-spectrum pybaselines loop.

Both fit the same spectra with the same λ, p and stopping rule; the script prints the
median time of each over several repeats, spectra per second, the ratio and the largest
relative difference of the baselines. Run: python benchmarks/bench_baseline.py [n_spectra]
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
from mapkit.read import open_map  # noqa: E402


def median_time(fn, repeats=3):
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t0)
    return statistics.median(times), out


def main(n=1024, lam=1e5, p=0.01):
    from pybaselines import Baseline

    m = open_map(ROOT / "sample_maps" / "tablet_map.h5").load()
    spectra = m.spectra().astype(np.float64)
    spectra = spectra[np.ptp(spectra, axis=1) > 0][:n]
    fitter = Baseline(m.raman_shift)
    t_ours, ours = median_time(lambda: als_baseline(spectra, lam=lam, p=p))
    t_ref, ref = median_time(lambda: np.array([fitter.asls(s, lam=lam, p=p)[0] for s in spectra]))
    rel = float(np.max(np.abs(ours - ref) / np.max(np.abs(ref), axis=1, keepdims=True)))
    print(f"machine: {platform.machine()}, {platform.processor() or 'cpu'}, "
          f"python {platform.python_version()}, numpy {np.__version__}")
    print(f"{len(spectra)} spectra x {spectra.shape[1]} channels, lam={lam:g}, p={p:g}")
    print(f"pybaselines asls loop : {t_ref:8.3f} s  {len(spectra) / t_ref:9.0f} spectra/s")
    print(f"mapkit batched ALS    : {t_ours:8.3f} s  {len(spectra) / t_ours:9.0f} spectra/s")
    print(f"speed ratio (mapkit / pybaselines): {t_ref / t_ours:.2f}x; "
          f"max relative difference {rel:.1e}")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 1024)
