"""Accuracy on a family of invented scenes: mapkit's default command-line path against a
plain script, both scored against the noise floor.

    .venv/bin/python benchmarks/bench_accuracy.py [--seeds 0 1 2] [--kinds grains minor ...]
                                                   [--out table.md]

For every scene kind (``mapkit.scenes.KINDS``) and seed, the scene is written as a map file
plus a library of its true pure spectra, and run through

- **mapkit**: ``mapkit analyse MAP --library LIB`` with every option at its default (the
  number of components chosen from the data); ``--components true`` passes the scene's
  number of materials instead, as a user who knows the sample would;
- **plain script**: spikes replaced by a 5-channel running median where a channel stands
  more than 6 robust standard deviations above it (common practice), pybaselines ``asls``
  per spectrum (its defaults), then scikit-learn
  ``NMF`` (nndsvda) on the clipped corrected spectra, ``KMeans`` on the vector-normalised
  corrected spectra and ``scipy.optimize.nnls`` per pixel against the true references.

Scores (``mapkit.scoring``): the worst component-spectrum cosine, the worst abundance RMSE
as a multiple of the noise floor (NMF images after one least-squares scale each), the
adjusted Rand index of the class map on all pixels and on core pixels, and the unmixing
abundance RMSE as a multiple of the noise floor. The "floor" rows give the class agreement
of the noise-floor abundances themselves (true references, true background removed): the
best a class map can reach through the noise. Prints one Markdown table, then the median
and worst over the family.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from mapkit.cli import main as mapkit_main
from mapkit.read.nexus import read_results
from mapkit.scenes import KINDS, make_scene
from mapkit.scoring import (class_agreement, noise_floor, oracle_abundances,
                            score_factorisation, score_unmixing)

COLUMNS = ("cosine", "abund/floor", "ARI all", "ARI core", "unmix/floor")
# which way is better for each score
HIGHER_IS_BETTER = {"cosine": True, "abund/floor": False, "ARI all": True, "ARI core": True,
                    "unmix/floor": False}


def run_mapkit(scene, folder, extra=(), true_k=False):
    map_path, lib = scene.write(folder)
    out = Path(folder) / "out"
    k = ["--components", str(len(scene.names))] if true_k else []
    rc = mapkit_main(["analyse", str(map_path), "--library", str(lib), *k,
                      "--out", str(out), "--no-figures", "--quiet",
                      "--overwrite", *extra])
    if rc != 0:
        raise SystemExit(f"mapkit analyse failed on {scene.kind} seed {scene.seed} (exit {rc})")
    res = read_results(out / "results.h5")
    nmf = (res.get("mcr") or res["nmf"])["fields"]
    classes = next(r for name, r in res.items() if "labels" in r["fields"])
    un = res["unmixing"]["fields"]["abundance"]
    names = [n.decode() if isinstance(n, bytes) else str(n) for n in un["axes"]["component"]]
    order = [names.index(n.replace(" ", "_")) for n in scene.names]
    return {"spectra": nmf["spectra"]["data"], "images": nmf["images"]["data"],
            "labels": classes["fields"]["labels"]["data"], "unmix": un["data"][order]}


def run_plain(scene, seed=0):
    """What a practitioner would write with general-purpose libraries."""
    from pybaselines import Baseline
    from scipy.optimize import nnls
    from sklearn.cluster import KMeans
    from sklearn.decomposition import NMF

    ny, nx, n = scene.counts.shape
    X = scene.counts.reshape(-1, n).astype(float)
    good = ~np.all(X == 0, axis=1)
    from scipy.signal import medfilt

    Y = X[good].copy()
    for y in Y:
        med = medfilt(y, 5)
        r = y - med
        spike = r > 6 * 1.4826 * np.median(np.abs(r - np.median(r)))
        y[spike] = med[spike]
    fitter = Baseline(scene.raman_shift)
    C = np.array([y - fitter.asls(y)[0] for y in Y])
    k = len(scene.names)
    nmf = NMF(k, init="nndsvda", max_iter=1000, random_state=seed)
    W = nmf.fit_transform(np.clip(C, 0, None))
    V = C / np.maximum(np.linalg.norm(C, axis=1, keepdims=True), 1e-12)
    lab = KMeans(k, n_init=10, random_state=seed).fit_predict(V)
    R = scene.truth["pure_spectra"].T
    A = np.array([nnls(R, y)[0] for y in C])

    def images(values, fill=np.nan):
        full = np.full((ny * nx, values.shape[1]), fill)
        full[good] = values
        return full.T.reshape(-1, ny, nx)

    return {"spectra": nmf.components_, "images": images(W),
            "labels": images(lab[:, None].astype(float), -1)[0].astype(int),
            "unmix": images(A)}


def floor_classes(scene):
    """The class map of the noise-floor abundances (true references, true background
    removed): what the dominant-component truth looks like through the noise."""
    good = ~scene.truth["bad_pixels"]
    lab = np.where(good, np.argmax(oracle_abundances(scene, good), axis=0), -1)
    return class_agreement(lab, scene.truth)


def score(out, scene, floor):
    f = score_factorisation(out["spectra"], out["images"], scene, floor)
    ari = class_agreement(out["labels"], scene.truth)
    return {"cosine": f["worst_cosine"], "abund/floor": f["abundance_vs_floor"],
            "ARI all": ari["all"], "ARI core": ari["core"],
            "unmix/floor": score_unmixing(out["unmix"], scene, floor)}


def table(rows):
    head = "| scene | seed | who | k | " + " | ".join(COLUMNS) + " |"
    lines = [head, "|" + "---|" * (4 + len(COLUMNS))]
    for r in rows:
        lines.append(f"| {r['kind']} | {r['seed']} | {r['who']} | {r.get('k', '')} | " + " | ".join(
            f"{r[c]:.3f}" for c in COLUMNS) + " |")
    return "\n".join(lines)


def summary(rows):
    lines = ["| who | statistic | " + " | ".join(COLUMNS) + " |", "|" + "---|" * (2 + len(COLUMNS))]
    for who in ("mapkit", "plain", "floor"):
        sel = [r for r in rows if r["who"] == who]
        if not sel:
            continue
        med = {c: np.median([r[c] for r in sel]) for c in COLUMNS}
        worst = {c: (min if HIGHER_IS_BETTER[c] else max)(r[c] for r in sel) for c in COLUMNS}
        lines.append(f"| {who} | median | " + " | ".join(f"{med[c]:.3f}" for c in COLUMNS) + " |")
        lines.append(f"| {who} | worst | " + " | ".join(f"{worst[c]:.3f}" for c in COLUMNS) + " |")
    wins = []
    mk = {(r["kind"], r["seed"]): r for r in rows if r["who"] == "mapkit"}
    pl = {(r["kind"], r["seed"]): r for r in rows if r["who"] == "plain"}
    for c in COLUMNS:
        better = sum((mk[s][c] >= pl[s][c]) if HIGHER_IS_BETTER[c] else (mk[s][c] <= pl[s][c])
                     for s in mk)
        wins.append(f"{better}/{len(mk)}")
    lines.append("| mapkit at least as good as plain | scenes | " + " | ".join(wins) + " |")
    return "\n".join(lines)


def main(argv=None):
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--seeds", type=int, nargs="+", default=[0, 1, 2])
    p.add_argument("--kinds", nargs="+", default=list(KINDS), choices=list(KINDS))
    p.add_argument("--no-plain", action="store_true", help="skip the plain script")
    p.add_argument("--out", help="also write the tables to this Markdown file")
    p.add_argument("--mapkit-args", default="", help="extra options for mapkit analyse")
    p.add_argument("--components", choices=("auto", "true"), default="auto",
                   help="mapkit's number of components: auto (the default path) or the "
                        "scene's true number of materials")
    a = p.parse_args(argv)
    rows = []
    t0 = time.perf_counter()
    for kind in a.kinds:
        for seed in a.seeds:
            scene = make_scene(kind, seed)
            floor = noise_floor(scene)
            with tempfile.TemporaryDirectory() as tmp:
                outs = {"mapkit": run_mapkit(scene, tmp, a.mapkit_args.split(),
                                             true_k=a.components == "true")}
            if not a.no_plain:
                outs["plain"] = run_plain(scene)
            ari = floor_classes(scene)
            rows.append({"kind": kind, "seed": seed, "who": "floor", "cosine": 1.0,
                         "abund/floor": 1.0, "ARI all": ari["all"], "ARI core": ari["core"],
                         "unmix/floor": 1.0})
            for who, out in outs.items():
                rows.append({"kind": kind, "seed": seed, "who": who, "k": len(out["spectra"]),
                             **score(out, scene, floor)})
                print(f"{kind:9s} {seed} {who:6s} " + "  ".join(
                    f"{c} {rows[-1][c]:.3f}" for c in COLUMNS), file=sys.stderr, flush=True)
    text = table(rows) + "\n\n" + (summary(rows) if not a.no_plain else "")
    print(text)
    print(f"\n{len(rows)} runs in {time.perf_counter() - t0:.0f} s", file=sys.stderr)
    if a.out:
        Path(a.out).write_text(text + "\n")


if __name__ == "__main__":
    main()
