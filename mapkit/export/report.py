"""A self-contained HTML report of one analysis: every figure embedded, no external files."""

from __future__ import annotations

import base64
import datetime as _dt
import html
import tempfile
from pathlib import Path

from ..core.provenance import library_versions
from .atomic import atomic_path
from .labels import class_names, display_label, identified_names
from .figures import (save_calibration_figure, save_histogram_figure, save_image_figure,
                      save_spectra_figure)

CAUTIONS = (
    "Laser safety: Raman microscopes usually carry Class 3B, sometimes Class 4 lasers "
    "(IEC 60825-1). Direct and specularly reflected beams injure the eye; follow the "
    "instrument's interlocks and the laser safety officer's rules when acquiring maps.",
    "Content maps are estimates that depend on the calibration: standards must match the "
    "samples' matrix and cover the working range. Pixels below the LOD or LOQ, or outside "
    "the calibrated range, are flagged and must not be reported as values. Results used for "
    "regulated, clinical, forensic or food decisions must be validated against a reference "
    "method under the applicable local rules and licensed practice (e.g. ICH Q2(R2)).",
)

_CSS = """
body{font-family:system-ui,-apple-system,'Segoe UI',sans-serif;max-width:1100px;margin:2em auto;
color:#1d2330;line-height:1.45;padding:0 1em}
h1{font-size:1.6em;border-bottom:3px solid #0072B2;padding-bottom:.2em}
h2{font-size:1.2em;margin-top:2em;color:#0b4f7c}
table{border-collapse:collapse;margin:.6em 0;font-size:.92em}
td,th{border:1px solid #c9ced8;padding:.25em .6em;text-align:left}
th{background:#eef2f7}
.figs{display:flex;flex-wrap:wrap;gap:.6em}
.figs img{max-width:330px;border:1px solid #e2e5ea}
img.wide{max-width:640px}
pre{background:#f5f6f8;padding:.6em;overflow-x:auto;font-size:.85em}
.note{background:#fff8e1;border-left:4px solid #E69F00;padding:.5em .8em}
.lead{font-size:1.05em}
"""


def _img(path, cls=""):
    data = base64.b64encode(Path(path).read_bytes()).decode()
    return f'<img class="{cls}" src="data:image/png;base64,{data}" alt="{html.escape(Path(path).stem)}">'


def _table(rows, header):
    head = "".join(f"<th>{html.escape(str(h))}</th>" for h in header)
    body = "".join("<tr>" + "".join(f"<td>{html.escape(_fmt(c))}</td>" for c in r) + "</tr>"
                   for r in rows)
    return f"<table><tr>{head}</tr>{body}</table>"


def _fmt(v):
    if isinstance(v, float):
        return f"{v:.4g}"
    return "" if v is None else str(v)


def write_report(path, *, map_name: str, summary: dict, results, model=None, recipe_text="",
                 inputs: dict | None = None, provenance=(), overwrite: bool = True,
                 optical=None) -> Path:
    """Write the HTML report of an analysis (see ``mapkit analyse``).

    ``optical`` (a placed micrograph) adds the maps drawn over it and the side-by-side view.
    """
    res = {r.name: r for r in results}
    parts = []
    with tempfile.TemporaryDirectory() as tmpdir:
        tmp = Path(tmpdir)
        n = [0]

        def fig(func, *args, **kw):
            n[0] += 1
            p = tmp / f"f{n[0]}.png"
            func(p, *args, overwrite=True, dpi=110, **kw)
            return p

        parts.append(_overview(map_name, summary, res))
        parts.append(_inputs(summary, inputs or {}, recipe_text))
        comp_name = next((n for n in ("mcr", "nmf") if n in res), None)
        if comp_name:
            r = res[comp_name]
            imgs = r.fields["images"]
            named = identified_names(r)
            figs = [_img(fig(save_spectra_figure, r.fields["spectra"], title="component spectra",
                             names=named), "wide")]
            figs += [_img(fig(save_image_figure, imgs, k, title=display_label(lbl, named)))
                     for k, lbl in enumerate(imgs.axes[0].values)]
            ident = r.summary.get("identification", [])
            title = ("MCR-ALS, background fitted per pixel" if r.method == "mcr_als_background"
                     else comp_name.upper())
            lof, noise = r.summary.get("lack_of_fit_pct"), r.summary.get("noise_lack_of_fit_pct")
            fit = (f" Lack of fit {lof:.1f} % of the signal after the background; shot noise "
                   f"alone would leave about {noise:.1f} % if the data are counts (close to it: "
                   "the residual is noise; well above it: a component or a background shape "
                   "is missing)." if lof is not None and noise is not None else "")
            parts.append(f"<h2>Components ({title})</h2><p>Each component is a spectrum and an "
                         "image of where it sits; identification against the reference "
                         "library uses the hit-quality index on a 0-1 scale (1 = same shape), "
                         f"after removing offset and slope from both sides.{html.escape(fit)}</p>"
                         + _identification_table(ident, "component")
                         + f'<div class="figs">{"".join(figs)}</div>')
        classes = res.get("classes") or res.get("kmeans")
        if classes is not None:
            r = classes
            names = {i["spectrum"]: i["match"] for i in r.summary.get("identification", [])}
            rows = [(k, names.get(k, ""), v["fraction_pct"],
                     v.get("area_um2", v.get("volume_um3")), v.get("domains"),
                     v.get("ecd_median_um", v.get("esd_median_um"))) for k, v in r.summary["areas"].items()]
            how = {"dominant": "each pixel with its dominant component",
                   "kmeans": "k-means", "minibatch": "mini-batch k-means",
                   "minibatch_kmeans": "mini-batch k-means", "ward": "Ward clustering"}
            parts.append(f"<h2>Spectral classes ({how.get(r.method, r.method)})</h2>" + _table(
                rows, ["class", "identified as", "area %", "area (µm²)", "domains",
                       "median ECD (µm)"])
                + _identification_table(r.summary.get("identification", []), "class")
                + '<div class="figs">'
                + _img(fig(save_image_figure, r.fields["labels"], title="classes",
                           classes=True, class_names=class_names(r, len(r.summary["areas"]))))
                + _img(fig(save_spectra_figure, r.fields["class_spectra"],
                           title="class mean ± sd", names=identified_names(r)), "wide")
                + "</div>")
        if "unmixing" in res:
            parts.append(_unmixing(res["unmixing"], fig))
        if model is not None:
            parts.append(_calibration(model, fig))
        if "concentration" in res:
            parts.append(_concentration(res["concentration"], fig))
        if optical is not None:
            parts.append(_on_micrograph(optical, results, fig))
        parts.append("<h2>Provenance</h2>" + _table(
            [(s.name, _short(s.parameters)) for s in provenance], ["step", "parameters"])
            + _table(sorted(library_versions().items()), ["library", "version"]))
        parts.append("<h2>Cautions</h2>" + "".join(f'<p class="note">{html.escape(c)}</p>'
                                                   for c in CAUTIONS))
    title = f"mapkit report: {html.escape(map_name)}"
    doc = (f"<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'><title>{title}</title>"
           f"<style>{_CSS}</style></head><body><h1>{title}</h1>"
           f"<p>Written {_dt.datetime.now(_dt.timezone.utc):%Y-%m-%d %H:%M} UTC by mapkit "
           f"{library_versions().get('mapkit')}.</p>" + "".join(parts) + "</body></html>")
    with atomic_path(path, overwrite=overwrite) as tmp_path:
        tmp_path.write_text(doc, encoding="utf-8")
    return Path(path)


def _identification_table(ident, what):
    """Library matches with their score (0-1); unmatched rows name the best candidate."""
    if not ident:
        return ""
    rows = []
    for i in ident:
        other = (f"best candidate {i['best_candidate']}" if i["match"] == "unmatched"
                 else f"runner-up {i['runner_up']} ({i['runner_up_score']:.3f})"
                 if "runner_up" in i else "")
        rows.append((i["spectrum"], i["match"], i["score"], other))
    return _table(rows, [what, "identified as", "HQI (0-1)", "next best"])


def _short(params, limit=160):
    text = ", ".join(f"{k}={v}" for k, v in params.items() if k != "text")
    return text if len(text) <= limit else text[:limit] + "…"


def _overview(map_name, summary, res):
    lines = []
    shape = summary.get("shape")
    if shape:
        lines.append(f"The map holds {shape[0]} × {shape[1]} spectra of {shape[2]} channels.")
    comp = res.get("mcr") or res.get("nmf")
    ident = comp.summary.get("identification", []) if comp is not None else []
    if ident:   # in the components' order, the unmatched ones said as such
        named = [f"{i['spectrum']} as {i['match']}" if i["match"] != "unmatched"
                 else f"{i['spectrum']} not identified" for i in ident]
        lines.append(f"It has {len(ident)} components: " + "; ".join(named) + ".")
    classes = res.get("classes") or res.get("kmeans")
    if classes is not None:
        names = {i["spectrum"]: i["match"] for i in classes.summary.get("identification", [])}
        parts = [f"{names.get(k, k)} {v['fraction_pct']:.1f} %"
                 for k, v in classes.summary["areas"].items()]
        lines.append("Area fractions of the spectral classes: " + "; ".join(parts) + ".")
    if "concentration" in res:
        c = res["concentration"].summary
        if c.get("mean") is not None:
            qm = c.get("quantifiable_mean")
            lines.append(f"{c['quantifiable']} of {c['pixels']} pixels have a quantifiable "
                         f"{c['analyte']} content (at or above LOQ and inside the calibrated "
                         f"range)" + (f", mean {qm:.2f} {c['unit']} over those" if qm is not None
                                      else "") + f"; the mean over all pixels is "
                         f"{c['mean']:.2f} {c['unit']} (sd {c['sd']:.2f}), flagged values "
                         "included.")
    return f'<p class="lead">{html.escape(" ".join(lines))}</p>'


def _inputs(summary, inputs, recipe_text):
    rows = [(role, v.get("path", ""), v.get("sha256", "")) for role, v in inputs.items()]
    bp = summary.get("bad_pixels", {})
    sp = summary.get("spikes", {})
    clean = (f"<p>Masked pixels: {bp.get('nonfinite', 0)} non-finite, {bp.get('dead', 0)} dead, "
             f"{bp.get('saturated', 0)} saturated. Cosmic-ray spikes: "
             f"{sp.get('channels_replaced', 0)} channels replaced in "
             f"{sp.get('spectra_touched', 0)} spectra.</p>")
    notices = "".join(f'<p class="note">{html.escape(n)}</p>' for n in summary.get("notices", []))
    return ("<h2>Inputs and cleaning</h2>" + _table(rows, ["role", "file", "SHA-256"]) + clean
            + notices + f"<p>Recipe:</p><pre>{html.escape(recipe_text)}</pre>")


def _calibration(model, fig):
    cal = model.calibration
    s = cal.summary()
    rows = [("model", s["model"]), ("response", model.response.kind),
            ("standards", f"{s['n']} spectra, {s['range'][0]:g}-{s['range'][1]:g} {s['unit']}")]
    if s["model"] == "pls":
        rows += [("latent variables", s["n_components"]),
                 ("RMSECV", cal.rmsecv_[cal.n_components_ - 1]), ("RMSEC", s["rmsec"]),
                 ("R²", s["r2"])]
    else:
        rows += [("coefficients b0, b1(, b2)", ", ".join(f"{c:.5g}" for c in s["coefficients"])),
                 ("r" if s["model"] == "linear" else "R", s["r"]), ("s_y/x", s["s_yx"])]
        from ..quantify.calibration import describe_lack_of_fit

        rows.append(("lack-of-fit F-test", describe_lack_of_fit(s.get("lack_of_fit"))))
    rows += [("LOD (ICH Q2(R2), 3.3σ/S)", f"{s['lod']:.3g} {s['unit']}"),
             ("LOQ (ICH Q2(R2), 10σ/S)", f"{s['loq']:.3g} {s['unit']}")]
    return ("<h2>Calibration</h2>" + _table(rows, ["quantity", "value"])
            + _img(fig(save_calibration_figure, cal), "wide"))


def _on_micrograph(placed, results, fig):
    from .bundle import overlay_fields

    img = placed.image
    dy, dx = img.pixel_size
    rows = [("file", Path(img.source).name), ("SHA-256", img.sha256),
            ("pixel size", f"{dx:g} × {dy:g} µm ({img.scale_from})"),
            ("image", f"{img.shape[1]} × {img.shape[0]} pixels"
                      + (f", reduced {img.downsampled}x" if img.downsampled > 1 else ""))]
    if img.description:
        rows.append(("description", img.description))
    reg = placed.registration
    table = ""
    if reg:
        rows += [("registration", f"{reg['transform']} from {len(reg['residuals_um'])} "
                                  f"control-point pairs, RMS residual {reg['rms_um']:.3g} µm")]
        table = _table([(k + 1, *(f"{v:.2f}" for v in ip), *(f"{v:.2f}" for v in mp), r)
                        for k, (ip, mp, r) in enumerate(zip(reg["image_points_um"],
                                                            reg["map_points_um"],
                                                            reg["residuals_um"]))],
                       ["pair", "image x (µm)", "image y (µm)", "map x (µm)", "map y (µm)",
                        "residual (µm)"])
    else:
        rows.append(("registration", "none: placed by its pixel size and origin"))
    figs = []
    side = None
    for r, fld, k, label, classes in overlay_fields(results):
        figs.append(_img(fig(save_image_figure, fld, k, title=label, classes=classes,
                             underlay=placed)))
        if side is None or (classes and not side[3]):
            side = (fld, k, label, classes)
    wide = ""
    if side is not None:
        fld, k, label, classes = side
        wide = _img(fig(save_image_figure, fld, k, title=label, classes=classes,
                        underlay=placed, side_by_side=True), "wide")
    return ("<h2>On the micrograph</h2><p>Each map drawn over the optical image of the "
            "sample surface, in stage coordinates.</p>" + _table(rows, ["quantity", "value"])
            + table + wide + f'<div class="figs">{"".join(figs)}</div>')


def _unmixing(r, fig):
    """The unmixing section: how it was fitted, each reference's abundance over the good
    pixels (mean, median, 95th percentile, share of pixels above 0), the residual
    and what did not converge, then the images."""
    from ..reduce.unmix import unmixing_statistics

    ab = r.fields["abundance"]
    p = r.parameters
    # the analysis has put them in the summary (of the whole map); a bare result has not
    numbers = r.summary if "references" in r.summary else unmixing_statistics(r)
    rows = [(name, v["mean"], v["median"], v["p95"], v["positive_pct"])
            for name, v in numbers["references"].items()]
    how = {"nnls": "non-negative least squares", "fcls": "fully constrained least squares "
           "(shares sum to 1, scale fitted)"}.get(p.get("method"), str(p.get("method")))
    weights = " weighted for shot noise (Poisson counts)" if p.get("weights") == "poisson" \
        else ""
    order = p.get("baseline_order")
    base = ("no baseline terms" if order is None else
            f"polynomial baseline terms of order {order}"
            + (" (chosen from the data)" if p.get("baseline_order_requested") == "auto" else ""))
    text = (f"{how[:1].upper() + how[1:]}{weights}, with {base}. Abundances are in "
            f"{html.escape(ab.units or 'reference units')}: one unit is one reference "
            "spectrum as stored in the library, so they compare within a reference, across "
            "pixels, not between references unless the library shares one scale.")
    stats = [("pixels fitted", numbers["pixels_fitted"]),
             ("median residual RMS (counts)", numbers["residual_rms_median"]),
             ("not converged", r.summary.get("not_converged", 0))]
    for c in r.summary.get("collinear_references", []):
        stats.append((f"collinear: {c['pair'][0]} / {c['pair'][1]}", c["r"]))
    figs = [_img(fig(save_image_figure, ab, k, title=str(lbl)))
            for k, lbl in enumerate(ab.axes[0].values)]
    return ("<h2>Unmixing against the reference spectra</h2>"
            f"<p>{html.escape(text)}</p>"
            + _table(rows, ["reference", "mean", "median", "95th percentile",
                            "pixels with abundance > 0 %"])
            + _table(stats, ["fit", "value"])
            + f'<div class="figs">{"".join(figs)}</div>')


def _concentration(r, fig):
    f = r.fields["concentration"]
    s = r.summary
    from ..core.result import Field

    err = Field("uncertainty", f.errors, f.axes, f.units, long_name="standard uncertainty")
    figs = [_img(fig(save_image_figure, f, title=f"{s['analyte']} content")),
            _img(fig(save_image_figure, err, title="standard uncertainty")),
            _img(fig(save_histogram_figure, f.data, label=f"{s['analyte']} ({s['unit']})"))]
    stats = [("pixels", s["pixels"]), ("mean", s.get("mean")), ("sd", s.get("sd")),
             ("RSD %", s.get("rsd_pct")), ("mean of quantifiable pixels", s.get("quantifiable_mean"))]
    stats += [(f"percentile {p}", v) for p, v in s.get("percentiles", {}).items()]
    stats += [("below LOD", s["below_lod"]), ("below LOQ", s["below_loq"]),
              ("outside calibrated range", s["outside_range"]),
              ("quantifiable", s["quantifiable"])]
    regions = s.get("regions", {})
    rtable = _table([(name, v["pixels"], v.get("mean"), v.get("sd"), v.get("rsd_pct"),
                      v["quantifiable"]) for name, v in regions.items()],
                    ["region", "pixels", "mean", "sd", "RSD %", "quantifiable"]) if regions else ""
    return (f"<h2>{html.escape(s['analyte'])} content map ({html.escape(s['unit'])})</h2>"
            f'<div class="figs">{"".join(figs)}</div>' + _table(stats, ["statistic", "value"])
            + ("<p>By region (classes and drawn regions):</p>" + rtable if rtable else ""))
