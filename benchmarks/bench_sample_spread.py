"""How far apart background-MCR fits of one map are, as the reference for a fitting sample.

    .venv/bin/python benchmarks/bench_sample_spread.py [--map sample_maps/blend_map.h5]

The map is cleaned with the tablet recipe (background kept, as ``mapkit analyse`` fits the
MCR), then ``BackgroundMCR`` (4 components) is fitted on all spectra with seeds 0-2, with
100 sweeps instead of 25, and on the even and on the odd spectra alone (with their own
start, and with the start from all spectra that a sampled fit gets); each fit's images
are computed for all spectra. Printed against the fit on all spectra (seed 0) and the odd
half against the even half: the worst matched component cosine, the adjusted Rand index of
the largest-image labels and the images' RMS difference as a fraction of the reference's
99th percentile (the measures of ``tests/test_stream.py``), and the start pixels.
"""

import argparse
from pathlib import Path

import numpy as np
from scipy.optimize import linear_sum_assignment
from sklearn.metrics import adjusted_rand_score

from mapkit.preprocess.recipe import Recipe
from mapkit.read.dispatch import open_map
from mapkit.reduce import BackgroundMCR

ROOT = Path(__file__).resolve().parent.parent


def compare(fit, ref, X, shift):
    """Worst cosine, ARI and relative image RMS of ``fit`` against ``ref`` on spectra X."""
    e = fit.components_ / np.linalg.norm(fit.components_, axis=1, keepdims=True)
    r = ref.components_ / np.linalg.norm(ref.components_, axis=1, keepdims=True)
    cos = e @ r.T
    i, j = linear_sum_assignment(-cos)
    C, Cref = fit._images(X, shift).T, ref._images(X, shift).T
    Cm = np.zeros_like(C)
    Cm[:, j] = C[:, i]
    rms = np.sqrt(np.mean((Cm - Cref) ** 2)) / np.percentile(np.abs(Cref), 99)
    return cos[i, j].min(), adjusted_rand_score(Cref.argmax(1), Cm.argmax(1)), rms


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--map", default=str(ROOT / "sample_maps" / "blend_map.h5"))
    ap.add_argument("--recipe", default=str(ROOT / "sample_maps" / "tablet_recipe.toml"))
    args = ap.parse_args(argv)
    m = open_map(args.map).load()
    _, _, keep = Recipe.from_file(args.recipe).apply_keeping_background(m)
    X = keep.intensity.reshape(-1, keep.shape[-1])[~keep.mask.ravel()]
    shift = keep.raman_shift

    def fit(rows=slice(None), **kw):
        return BackgroundMCR(n_components=4, **kw).fit(X[rows], raman_shift=shift)

    full = fit(random_state=0)
    even, odd = fit(slice(0, None, 2)), fit(slice(1, None, 2))
    rows = [("all spectra, seed 1", fit(random_state=1), full),
            ("all spectra, seed 2", fit(random_state=2), full),
            ("all spectra, 100 sweeps", fit(max_iter=100), full),
            ("even half", even, full), ("odd half", odd, full),
            ("odd half against even half", odd, even)]
    # the start a sampled fit gets in mapkit analyse: the purest pixels of all spectra
    start = BackgroundMCR(n_components=4).start_from_blocks(lambda: [X], shift)
    rows += [(f"{name} half, start from all spectra",
              BackgroundMCR(n_components=4).fit(X[sl], raman_shift=shift, start=start), full)
             for name, sl in (("even", slice(0, None, 2)), ("odd", slice(1, None, 2)))]
    print(f"{X.shape[0]} spectra; start pixels of the full fit: "
          f"{sorted(full.start_pixels_.tolist())}")
    print("| fit | against | cosine | ARI | image RMS | start pixels (rows of the spectra the "
          "start came from) |")
    print("|---|---|---|---|---|---|")
    for name, est, ref in rows:
        c, a, r = compare(est, ref, X, shift)
        print(f"| {name} | {'even half' if ref is even else 'all, seed 0'} | {c:.3f} | "
              f"{a:.3f} | {100 * r:.1f} % | {sorted(est.start_pixels_.tolist())} |")


if __name__ == "__main__":
    main()
