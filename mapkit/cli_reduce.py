"""Subcommands that run one reduction method on a map and write its results bundle.

``mapkit components | classes | unmix | peaks | bands``: each opens the map, cleans it
with a recipe, runs the method, prints a short report and writes ``results.h5``, TIFFs
and figures (docs/file-layout.md names every dataset).
"""

from __future__ import annotations

import numpy as np

from .cli_common import _common, _count_or_auto, _prepare, _range, _write
from .errors import MapkitError


def _identified(res):
    from .reduce.match import describe_match

    return [f"  {r['spectrum']}: {describe_match(r)}"
            for r in res.summary.get("identification", [])]


def cmd_components(a):
    from .pipeline import FITS_BACKGROUND, run_method

    method = "mcr_background" if a.method == "mcr-background" else a.method
    if method == "mcr_background" and (a.closure or a.init != "nndsvda"):
        raise MapkitError("--init and --closure do not apply to mcr-background (it starts "
                          "from the purest pixels)", field="--init",
                          fix="drop them, or choose --method mcr")
    m, library = _prepare(a, background=method in FITS_BACKGROUND)
    guide = []
    counts = None   # the despiked counts with their background, whatever the method
    n = a.n
    if a.guide or n == "auto":
        counts = m if method in FITS_BACKGROUND else _prepare(a, background=True)[0]
    g = None
    if a.guide:
        from .reduce import component_number_guidance

        g = component_number_guidance(counts)
        guide = ["singular value / noise edge: " + ", ".join(f"{i + 1}: {r:.2f}" for i, r in
                                                              enumerate(g["ratios"])),
                 f"components above the noise (ratio > {g['margin']:g} x noise level "
                 f"{g['noise_level']:.2f}): {g['n_components']}"]
    if a.guide or n == "auto":   # the same choice as analyse, with its reason or its warning
        from .reduce import choose_n_components

        chosen, line = choose_n_components(counts, g, option="--n")
        n = chosen if n == "auto" else n
        guide.append(line)
    res = run_method(m, method, n=n, seed=a.seed, library=library, init=a.init,
                     closure=a.closure, min_score=a.min_score)[0]
    s = res.summary
    if a.method == "pca":
        lines = ["PCA explained variance (cumulative %): " +
                 ", ".join(f"PC{i + 1} {v:.1f}" for i, v in enumerate(s["cumulative_pct"]))]
    elif a.method == "nmf":
        lines = [f"NMF: {n} components, {s['n_iter']} iterations"]
    elif method == "mcr_background":
        lines = [f"MCR-ALS with a background per pixel: {n} components, baseline order "
                 f"{s['baseline_order']}, lack of fit {s['lack_of_fit_pct']:.2f} % (shot noise "
                 f"alone would leave about {s['noise_lack_of_fit_pct']:.2f} % if the data are "
                 "counts)"]
    else:
        lines = [f"MCR-ALS: {n} components, lack of fit {s['lack_of_fit_pct']:.2f} %, "
                 f"explained variance {s['explained_variance_pct']:.2f} %, {s['n_iter']} "
                 "iterations"]
    return _write(a, m, [res], guide + lines + _identified(res))


def cmd_classes(a):
    from .preprocess import normalise_map
    from .reduce import class_number_guidance
    from .pipeline import run_method

    m, library = _prepare(a)
    lines = []
    if a.guide:
        lo, hi = a.guide
        rows = class_number_guidance(normalise_map(m, method="vector"), range(lo, hi + 1),
                                     random_state=a.seed)
        lines.append("   k   inertia  silhouette  Davies-Bouldin")
        lines += [f"{r['k']:4d} {r['inertia']:9.3g} {r['silhouette']:11.3f} "
                  f"{r['davies_bouldin']:15.3f}" for r in rows]
        best = max(rows, key=lambda r: r["silhouette"])["k"] if rows else None
        lines.append(f"highest silhouette at k = {best}")
    res = run_method(m, a.method, n=a.n, seed=a.seed, library=library, smooth=a.smooth,
                     min_score=a.min_score)[0]
    for name, v in res.summary["areas"].items():
        size, d = ((f"{v['area_um2']:.0f} um2", "ECD") if "area_um2" in v else
                   (f"{v['volume_um3']:.0f} um3", "ESD"))   # a volume: 3-D domains
        lines.append(f"{name}: {v['fraction_pct']:.1f} % ({size}), {v['domains']} domains, "
                     f"median {d} {v.get(d.lower() + '_median_um', 0):.1f} um")
    return _write(a, m, [res], lines + _identified(res))


def _order(text: str):
    """A baseline order: 'auto', a whole number, or -1 (none)."""
    import argparse

    if text.strip().lower() == "auto":
        return "auto"
    try:
        v = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not auto, a whole number or -1") from None
    if v < -1:
        raise argparse.ArgumentTypeError(f"{text} is not auto, a whole number >= 0 or -1 (none)")
    return None if v == -1 else v


def cmd_unmix(a):
    from .pipeline import run_method

    m, library = _prepare(a, background=True)   # the baseline is fitted with the references
    res = run_method(m, "fcls" if a.method == "fcls" else "unmix", library=library,
                     baseline_order=a.baseline_order, weights=a.weights)[0]
    ab = res.fields["abundance"].data
    names = [str(v) for v in res.fields["abundance"].axes[0].values]
    lines = [f"notice    {w}" for w in res.summary.get("notices", [])]
    what = " (share of the fitted total)" if a.method == "fcls" else ""
    lines += [f"{n}: mean abundance {np.nanmean(ab[i]):.3g}{what}" for i, n in enumerate(names)]
    lines.append(f"baseline  polynomial order {res.parameters['baseline_order']}"
                 + (" (chosen by the data)" if res.parameters.get("baseline_order_requested")
                    == "auto" else ""))
    lines.append(f"residual RMS median {np.nanmedian(res.fields['residual'].data):.3g} counts")
    return _write(a, m, [res], lines)


def cmd_peaks(a):
    from .reduce import peak_fit_map, stress_result

    m, _ = _prepare(a, minimal=True, lazy_ok=True)
    lo, hi = a.range
    res = peak_fit_map(m, lo, hi, shape=a.shape, n_peaks=a.peaks, centres=a.centres,
                       weights=a.weights, min_significance=a.min_significance)
    results = [res]
    c = res.fields["centre" if a.peaks == 1 else "centre_1"]
    s = res.summary
    lines = [f"{a.shape} fit in {lo:g}-{hi:g} 1/cm: {s['pixels']} pixels, "
             f"{s['not_converged']} not converged ("
             + ", ".join(f"{s[k]} {k.replace('_', ' ')}" for k in
                         ("iteration_limit", "stalled", "centre_outside", "singular")) + ")",
             f"errors    {s['covariance']} covariance"
             + (" (robust to unequal channel noise)" if s["covariance"] == "sandwich"
                else ""),
             f"reported  {s['reported']} pixels; masked {s['pixels'] - s['reported']} (band "
             f"under {a.min_significance:g} standard errors: {s['no_band']}, centre outside "
             f"the window: {s['left_window']})"]
    if s["reported"]:
        lines.append(f"centre median {np.nanmedian(c.data):.3f} 1/cm, median standard error "
                     f"{np.nanmedian(c.errors):.3f} 1/cm (over the reported pixels)")
    if a.stress:
        if a.peaks != 1:
            raise MapkitError("a stress map needs a single-peak fit", field="--stress",
                              fix="fit the silicon band alone with --peaks 1")
        st = stress_result(res, reference=a.reference, mode=a.stress)
        results.append(st)
        lines.append(f"{a.stress} stress median {np.nanmedian(st.fields['stress'].data):.3f} GPa "
                     f"(reference {a.reference:g} 1/cm)")
    return _write(a, m, results, lines)


def cmd_bands(a):
    from .reduce import band_image, band_ratio_image

    m, _ = _prepare(a)
    results, lines = [], []
    for name, lo, hi in a.band or []:
        r = band_image(m, lo, hi, name=name, measure=a.measure)
        results.append(r)
        lines.append(f"{name}: {a.measure} median {np.nanmedian(r.fields['image'].data):.4g} "
                     f"{r.fields['image'].units}")
    for i, text in enumerate(a.ratio or [], 1):
        num, _, den = text.partition("/")
        if not den:
            raise MapkitError(f"ratio {text!r} is not LO-HI/LO-HI", field="--ratio",
                              fix="for example --ratio 845-872/1080-1092")
        r = band_ratio_image(m, _range(num), _range(den), name=f"ratio_{i}",
                             measure=a.measure)
        results.append(r)
        lines.append(f"{r.name} {text}: median {np.nanmedian(r.fields['image'].data):.4g}, "
                     f"{r.summary['masked_low_denominator']} pixels masked (denominator at noise)")
    if not results:
        raise MapkitError("no band or ratio given", field="--band",
                          fix="for example --band api:845-872 or --ratio 845-872/1080-1092")
    return _write(a, m, results, lines)


def add_parsers(sub, add_read_options, band_type, positive_int):
    c = sub.add_parser("components", help="component spectra and images (NMF, MCR-ALS, PCA)",
                       description="Factorise the cleaned map into component spectra and images; "
                                   "with --library, name each component.")
    _common(c, default_recipe="minimal (mcr-background) or default (the others)")
    c.add_argument("--method", choices=("mcr-background", "nmf", "mcr", "pca"),
                   default="mcr-background",
                   help="factorisation: mcr-background (default; MCR-ALS on the despiked "
                        "spectra with a polynomial background per pixel, started from the "
                        "purest pixels), nmf or mcr of the baseline-corrected spectra, pca")
    c.add_argument("--n", type=_count_or_auto, default="auto",
                   help="number of components, or auto (default): as many as stand above the "
                        "shot noise of the despiked counts (see --guide)")
    c.add_argument("--init", choices=("nndsvda", "vca", "nmf"), default="nndsvda",
                   help="starting point (NMF: nndsvda or vca; MCR: vca or nmf)")
    c.add_argument("--closure", action="store_true", help="MCR: concentrations sum to one")
    c.add_argument("--library", help="folder of reference spectra to identify components")
    c.add_argument("--guide", action="store_true",
                   help="also print how many components stand above the shot noise "
                        "(singular values of the biwhitened counts; spectra in counts)")
    c.add_argument("--min-score", type=float, default=0.9,
                   help="lowest hit-quality index (0-1, after removing offset and slope on "
                        "both sides) that counts as a match (default 0.9)")
    add_read_options(c)
    c.set_defaults(func=cmd_components)

    k = sub.add_parser("classes", help="spectral classes (k-means, Ward), areas and domains",
                       description="Segment the cleaned, normalised map into classes; report "
                                   "area fractions and connected domains.")
    _common(k)
    k.add_argument("--method", choices=("kmeans", "minibatch", "ward"), default="kmeans",
                   help="clustering (default kmeans)")
    k.add_argument("--n", type=positive_int, default=4, help="number of classes (default 4)")
    k.add_argument("--smooth", type=float, default=0.0,
                   help="spatial smoothing of the scores, sigma in pixels (default 0)")
    k.add_argument("--guide", type=_range_int, metavar="KMIN-KMAX",
                   help="print silhouette, Davies-Bouldin and inertia for each k in the range")
    k.add_argument("--library", help="folder of reference spectra to identify the classes")
    k.add_argument("--min-score", type=float, default=0.9,
                   help="lowest hit-quality index (0-1) that names a class (default 0.9)")
    add_read_options(k)
    k.set_defaults(func=cmd_classes)

    u = sub.add_parser("unmix", help="abundance maps against reference spectra (NNLS, FCLS)")
    _common(u, default_recipe="minimal (bad pixels and spikes only)")
    u.add_argument("--library", required=True, help="folder of reference spectra")
    u.add_argument("--method", choices=("nnls", "fcls"), default="nnls",
                   help="nnls: non-negative abundances in reference units; fcls: shares that "
                        "sum to 1 in every pixel, with a fitted per-pixel scale (so raw counts "
                        "are fine; the scale is written as its own image)")
    u.add_argument("--weights", choices=("poisson", "none"), default="poisson",
                   help="poisson (default): each channel weighted by its shot-noise variance "
                        "(spectra in counts); none: ordinary least squares")
    u.add_argument("--baseline-order", type=_order, default="auto",
                   help="order of the polynomial baseline fitted with the references on the "
                        "despiked counts: auto (default; chosen by the Bayesian information "
                        "criterion), a whole number, or -1 for none")
    add_read_options(u)
    u.set_defaults(func=cmd_unmix)

    pk = sub.add_parser("peaks", help="peak-fit maps: centre, width, height, area, errors",
                        description="Fit peaks in a window at every pixel (raw counts: only bad "
                                    "pixels and spikes are cleaned by default).")
    _common(pk, default_recipe="minimal (bad pixels, spikes)")
    pk.add_argument("--range", type=_range, required=True, metavar="LO-HI",
                    help="fit window in 1/cm, e.g. 500-540")
    pk.add_argument("--shape", choices=("lorentzian", "gaussian", "pseudo_voigt"),
                    default="lorentzian",
                    help="band shape, fitted with a straight background (default lorentzian; "
                         "pseudo_voigt also fits the Lorentzian fraction eta)")
    pk.add_argument("--peaks", type=positive_int, default=1,
                    help="number of overlapping peaks fitted together in the window (default 1)")
    pk.add_argument("--centres", type=float, nargs="+", help="starting centres, one per peak")
    pk.add_argument("--weights", choices=("auto", "poisson", "uniform"), default="auto",
                    help="poisson: maximum likelihood for shot noise (weights 1/expected "
                         "counts; raw counts only), uniform: least squares, auto (default): "
                         "poisson when every value in the window is non-negative")
    pk.add_argument("--min-significance", type=float, default=3.0, metavar="Z",
                    help="report a pixel only where every peak's height exceeds Z standard "
                         "errors and its centre stays in the window (default 3); the others "
                         "are blank in the maps and counted")
    pk.add_argument("--stress", choices=("uniaxial", "biaxial"),
                    help="also write a silicon stress map from the band centre")
    pk.add_argument("--reference", type=float, default=520.7,
                    help="unstrained silicon position, 1/cm (default 520.7)")
    add_read_options(pk)
    pk.set_defaults(func=cmd_peaks)

    b = sub.add_parser("bands", help="band images (area, height, centroid) and ratios")
    _common(b)
    b.add_argument("--band", action="append", type=band_type, metavar="NAME:LO-HI",
                   help="band over LO-HI 1/cm, measured above a straight line through the "
                        "band's end points (repeatable)")
    b.add_argument("--ratio", action="append", metavar="LO-HI/LO-HI",
                   help="band ratio image, masked where the denominator is at noise level")
    b.add_argument("--measure", choices=("area", "height", "centroid"), default="area",
                   help="band area (trapezoid rule), height or centroid, each above the "
                        "straight-line baseline (default area)")
    add_read_options(b)
    b.set_defaults(func=cmd_bands)


def _range_int(text: str):
    lo, hi = _range(text)
    return int(lo), int(hi)
