"""Peak-fit maps as a user meets them, against a per-pixel unweighted curve_fit loop.

The map (invented): 60 × 80 pixels of Poisson counts, one Lorentzian (height 500, FWHM
6 cm⁻¹, centre 520 ± 2) on a sloping background of about 100 counts, 500 channels at
1 cm⁻¹, written to an HDF5 file. mapkit's side is what ``mapkit peaks`` does: open the file
(as the CLI does), fit the 160-channel window 440-599 cm⁻¹, assemble the images (compiled
caches warm: one untimed run first). The reference is the loop a user would write:
``scipy.optimize.curve_fit`` per pixel, unweighted, same model, a start near the truth,
given the window already in memory (its reading is not timed), timed on every 10th pixel
and scaled to the map.

Both sides run interleaved in one process, on 1 thread each (numba, BLAS, Dask
synchronous; the loop in this process) and on 2 threads each (numba and Dask 2 threads;
the loop split over 2 worker processes started before timing): medians of ``--repeats``
runs, so a load from other work on the machine falls on both alike; the 1-thread runs'
CPU time is printed as well (what they cost a quiet core). Accuracy: the
centre's scatter about the truth over the pixels, divided by the RMS of the reported
standard errors and by the Cramér–Rao bound (inverse Fisher information of Poisson counts
at the true parameters). Run: python benchmarks/bench_peakfit.py [--repeats 7]
"""

from __future__ import annotations

import argparse
import os
import platform
import statistics
import sys
import tempfile
import time
import warnings
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

NY, NX = 60, 80
SHIFT = np.arange(300.0, 800.0, 1.0)
LO, HI = 440.0, 599.0
HEIGHT, FWHM, BG, SLOPE = 500.0, 6.0, 100.0, 0.05
P0 = [400.0, 519.0, 5.0, 90.0, 0.0]     # curve_fit's start: near the truth


def make_map(seed=0):
    rng = np.random.default_rng(seed)
    centres = 520.0 + rng.uniform(-2, 2, NY * NX)
    mu = (BG + SLOPE * (SHIFT[None] - 520.0)
          + HEIGHT / (1 + (2 * (SHIFT[None] - centres[:, None]) / FWHM) ** 2))
    return rng.poisson(mu).astype(np.float32).reshape(NY, NX, -1), centres


def _lorentz_line(x, h, c, w, a, b, mid):
    return h / (1 + (2 * (x - c) / w) ** 2) + a + b * (x - mid)


def curve_fit_loop(window, s):
    """Centre and its standard error per spectrum (rows of ``window``), unweighted."""
    from scipy.optimize import OptimizeWarning, curve_fit

    mid = 0.5 * (s[0] + s[-1])
    f = lambda x, h, c, w, a, b: _lorentz_line(x, h, c, w, a, b, mid)  # noqa: E731
    out = np.full((len(window), 2), np.nan)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", OptimizeWarning)
        for i, yi in enumerate(window):
            try:
                p, cov = curve_fit(f, s, yi, p0=P0)
            except RuntimeError:          # no convergence: the pixel is lost
                continue
            out[i] = p[1], np.sqrt(cov[1, 1])
    return out


def _worker_init():
    from threadpoolctl import threadpool_limits

    threadpool_limits(1)


def crlb_centre(centres, s):
    """[I(θ)⁻¹]_cc at the true parameters, I = Σ (∂μ/∂θ)(∂μ/∂θ)ᵀ/μ (Kay 1993, vol. 1, ch. 3)."""
    from mapkit.reduce.peakfit import model_and_jacobian

    mid = 0.5 * (s[0] + s[-1])
    n = centres.size
    theta = np.column_stack([np.full(n, HEIGHT), centres, np.full(n, FWHM),
                             np.full(n, BG + SLOPE * (mid - 520.0)), np.full(n, SLOPE)])
    mu, J = model_and_jacobian(theta, s, "lorentzian", 1, mid)
    return np.linalg.inv(np.einsum("pnk,pn,pnl->pkl", J, 1 / mu, J))[:, 1, 1]


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=7)
    ap.add_argument("--every", type=int, default=10, help="curve_fit on every n-th pixel")
    a = ap.parse_args(argv)

    import dask
    import numba
    from threadpoolctl import threadpool_limits

    from mapkit import RamanMap, layout
    from mapkit.export import write_map
    from mapkit.read import open_map
    from mapkit.reduce import peak_fit_map

    cube, centres = make_map()
    tmp = Path(tempfile.mkdtemp(prefix="bench_peakfit_"))
    path = write_map(tmp / "map.h5", RamanMap(cube, raman_shift=SHIFT, x=np.arange(NX * 1.0),
                                              y=np.arange(NY * 1.0)))
    sel = (SHIFT >= LO) & (SHIFT <= HI)
    s = SHIFT[sel]
    sub = np.arange(0, NY * NX, a.every)
    window = cube.reshape(NY * NX, -1)[sub][:, sel].astype(float)

    def ours():
        m = open_map(path, block_bytes=layout.READ_BYTES)
        r = peak_fit_map(m, LO, HI)
        return {k: (f.data, f.errors) for k, f in r.fields.items()}, r.summary

    pool = ProcessPoolExecutor(2, initializer=_worker_init)
    halves = np.array_split(window, 2)
    list(pool.map(curve_fit_loop, halves, [s, s]))          # workers started and warm

    def theirs(threads):
        if threads == 1:
            return curve_fit_loop(window, s)
        return np.concatenate(list(pool.map(curve_fit_loop, halves, [s, s])))

    cpu = {"mapkit": [], "curve_fit": []}    # this process's CPU time, 1-thread runs

    def timed(fn, *args):
        t0, c0 = time.perf_counter(), time.process_time()
        out = fn(*args)
        timed.cpu = time.process_time() - c0
        return time.perf_counter() - t0, out

    max_threads = numba.config.NUMBA_NUM_THREADS
    configs = [t for t in (1, 2) if t <= max_threads]
    times = {(side, t): [] for side in ("mapkit", "curve_fit") for t in configs}
    results = {}
    for rep in range(a.repeats + 1):            # run 0 warms the compiled caches: untimed
        for t in configs:
            numba.set_num_threads(t)
            with threadpool_limits(t), dask.config.set(
                    scheduler="synchronous" if t == 1 else "threads", num_workers=t):
                dt, results["mapkit", t] = timed(ours)
                if rep:
                    times["mapkit", t].append(dt)
                    if t == 1:
                        cpu["mapkit"].append(timed.cpu)
                dt, results["curve_fit", t] = timed(theirs, t)
                if rep:
                    times["curve_fit", t].append(dt * NY * NX / sub.size)
                    if t == 1:
                        cpu["curve_fit"].append(timed.cpu * NY * NX / sub.size)
    pool.shutdown()

    fields, summary = results["mapkit", 1]
    c_fit, c_err = fields["centre"]
    c_fit, c_err = c_fit.ravel(), c_err.ravel()
    crlb = np.sqrt(np.mean(crlb_centre(centres, s)))
    keep = np.isfinite(c_fit)
    acc = {"mapkit": (np.sqrt(np.mean((c_fit[keep] - centres[keep]) ** 2)),
                      np.sqrt(np.mean(c_err[keep] ** 2)), keep.sum(), keep.size)}
    cf = results["curve_fit", 1]
    ok = np.isfinite(cf[:, 0])
    acc["curve_fit"] = (np.sqrt(np.mean((cf[ok, 0] - centres[sub][ok]) ** 2)),
                        np.sqrt(np.mean(cf[ok, 1] ** 2)), ok.sum(), ok.size)

    n = NY * NX
    print(f"map {NY} x {NX} = {n} pixels, window {LO:g}-{HI:g} cm-1 ({s.size} channels), "
          f"one Lorentzian + line, Poisson counts; {platform.processor() or platform.machine()}, "
          f"{os.cpu_count()} cores, load average {os.getloadavg()[0]:.1f} at the end")
    print(f"mapkit: open (block reads, as the CLI) + peak_fit_map + images; curve_fit: "
          f"unweighted loop on {sub.size} pixels (every {a.every}th) scaled to {n}; "
          f"medians of {a.repeats} interleaved runs")
    print(f"{'threads':>16} {'mapkit ms/px':>13} {'curve_fit ms/px':>16} {'ratio':>7}   "
          f"(spread of mapkit runs, ms)")
    for t in configs:
        ours_t = statistics.median(times["mapkit", t])
        theirs_t = statistics.median(times["curve_fit", t])
        print(f"{f'{t} vs {t} thread' + ('s' if t > 1 else ''):>16} {ours_t / n * 1e3:13.4f} "
              f"{theirs_t / n * 1e3:16.4f} {theirs_t / ours_t:6.1f}x   "
              f"({min(times['mapkit', t]) * 1e3:.0f}-{max(times['mapkit', t]) * 1e3:.0f})")
    c_ours, c_theirs = statistics.median(cpu["mapkit"]), statistics.median(cpu["curve_fit"])
    print(f"{'1 vs 1, CPU time':>16} {c_ours / n * 1e3:13.4f} {c_theirs / n * 1e3:16.4f} "
          f"{c_theirs / c_ours:6.1f}x   (process CPU seconds: what the runs cost a quiet core)")
    print("centre accuracy (scatter about the truth):")
    for side, (rmse, se, kept, total) in acc.items():
        print(f"  {side:>9}: scatter / reported SE {rmse / se:.3f}, scatter / CRLB "
              f"{rmse / crlb:.3f}  ({kept} of {total} pixels)")
    print(f"mapkit fit states: {summary['pixels'] - summary['not_converged']} converged, "
          f"{summary['reported']} reported, median {summary['median_iterations']:g} "
          f"iterations; {summary['covariance']} covariance")


if __name__ == "__main__":
    main()
