"""Subcommands that put numbers on maps: calibrate, batch, temperature, crystallite."""

from __future__ import annotations

import csv
from pathlib import Path

from .cli_common import _check_outputs, _common, _map_files, _prepare, _write, add_response_options


def cmd_calibrate(a):
    from .export.atomic import atomic_path, output_transaction
    from .export.figures import save_calibration_figure
    from .pipeline import Settings, quantification_model
    from .preprocess.recipe import Recipe
    from .read import read_library

    recipe = Recipe.from_file(a.recipe) if a.recipe else Recipe.default()
    _check_outputs(a.out, a.overwrite, ("quant_model.json",))   # before any fitting
    library = read_library(a.library) if a.library else None
    s = Settings(analyte=a.analyte, calibration_model=a.model, weighting=a.weighting,
                 response_band=a.response_band, internal_standard=a.internal_standard)
    model = quantification_model(a.standards, library, recipe, s)
    out = Path(a.out)
    out.mkdir(parents=True, exist_ok=True)
    # the model, its recipe and its figure replace the previous ones together, or not at all
    with output_transaction(out):
        path = model.save(out / "quant_model.json", overwrite=a.overwrite)
        with atomic_path(out / "recipe.toml", overwrite=True) as tmp:
            tmp.write_text(model.recipe_text)
        save_calibration_figure(out / "calibration.png", model.calibration, overwrite=True)
    c = model.calibration.summary()
    print(f"{c['analyte']} ({c['unit']}), {c['model']} model on {c['n']} standards, "
          f"response: {model.response.kind}")
    if c["model"] == "pls":
        print(f"latent variables {c['n_components']}, RMSECV {min(c['rmsecv']):.4g}, "
              f"R² {c['r2']:.4f}")
    else:
        coef = ", ".join(f"{v:.6g}" for v in c["coefficients"])
        print(f"coefficients b0, b1(, b2): {coef}")
        print(f"r = {c['r']:.5f}, s_y/x = {c['s_yx']:.5g}")
        from .quantify.calibration import describe_lack_of_fit

        print(describe_lack_of_fit(c.get("lack_of_fit")))
    print(f"LOD {c['lod']:.4g} {c['unit']}, LOQ {c['loq']:.4g} {c['unit']} (ICH Q2(R2))")
    print(f"wrote {path}, {out / 'recipe.toml'}, {out / 'calibration.png'}")


def cmd_batch(a):
    from .export.atomic import atomic_path, output_transaction
    from .export.bundle import safe_name, write_bundle
    from .preprocess.recipe import Recipe
    from .quantify import QuantModel
    from .read import open_map, read_library

    model = QuantModel.load(a.model_file)
    recipe = Recipe.from_file(a.recipe) if a.recipe else Recipe.from_text(
        model.recipe_text, f"{a.model_file} (recipe)")
    model.check_recipe(recipe)
    library = read_library(a.library) if a.library else None
    files = _map_files(a.folder)
    out = Path(a.out)
    out.mkdir(parents=True, exist_ok=True)
    # every map's bundle and the summary replace the previous ones together: a batch that
    # fails part-way leaves the previous batch's files as they were
    with output_transaction(out):
        rows = []
        for f in files:
            m, _ = recipe.apply(open_map(f).load())
            r = model.apply(m, library)
            sub = out / safe_name(f.stem)
            sub.mkdir(exist_ok=True)
            write_bundle(sub, m, [r], stem=safe_name(f.stem), overwrite=a.overwrite,
                         figures=not a.no_figures, inputs={"map": f})
            s = r.summary
            pct = s.get("percentiles", {})
            rows.append([f.name, s["pixels"], s.get("mean"), s.get("sd"), s.get("rsd_pct"),
                         pct.get(5), pct.get(50), pct.get(95), s["below_lod"], s["below_loq"],
                         s["outside_range"], s["quantifiable"]])
            print(f"{f.name}: mean {s.get('mean', float('nan')):.3f} {model.unit}, "
                  f"{s['quantifiable']} of {s['pixels']} pixels quantifiable")
        header = ["map", "pixels", f"mean [{model.unit}]", f"sd [{model.unit}]", "rsd [%]",
                  f"p5 [{model.unit}]", f"median [{model.unit}]", f"p95 [{model.unit}]",
                  "below_lod", "below_loq", "outside_range", "quantifiable"]
        with atomic_path(out / "batch_summary.csv", overwrite=True) as tmp:
            with open(tmp, "w", newline="") as fh:
                w = csv.writer(fh)
                w.writerow(header)
                for row in rows:
                    w.writerow(["" if v is None else (f"{v:.6g}" if isinstance(v, float) else v)
                                for v in row])
    print(f"wrote {out / 'batch_summary.csv'} ({len(rows)} maps)")


def cmd_temperature(a):
    from .quantify import temperature_map

    m, _ = _prepare(a, minimal=True)
    r = temperature_map(m, a.shift, a.half_width, laser_nm=a.laser,
                        exponent=4 if a.energy_detection else 3)
    med = r.summary["median_K"]
    _write(a, m, [r], [f"anti-Stokes/Stokes temperature at {a.shift:g} 1/cm: median "
                       f"{med:.1f} K ({r.summary['detector']})" if med
                       else "no pixel gave a usable ratio",
                       f"caution   {r.summary['caution']}"])


def cmd_crystallite(a):
    from .quantify import crystallite_size_map

    m, _ = _prepare(a)
    r = crystallite_size_map(m, laser_nm=a.laser, d_band=a.d_band, g_band=a.g_band)
    med = r.summary["median_nm"]
    lo, hi = r.summary["valid_range_nm"]
    _write(a, m, [r], [f"crystallite size L_a median {med:.2f} nm (Cancado et al. 2006); "
                       f"{r.summary['outside_validity']} pixels outside {lo:g}-{hi:g} nm, "
                       "where the relation holds" if med else "no pixel gave a usable I_D/I_G"])


def add_parsers(sub, add_read_options, range_type):
    c = sub.add_parser("calibrate", help="fit a quantification model from standards and save it",
                       description="Clean the standards with the recipe, compute the response, "
                                   "fit the calibration, report LOD/LOQ and save the model.")
    c.add_argument("standards", help="standards table (CSV: standard,concentration,<shifts>)")
    c.add_argument("--library", help="reference spectra (for the unmixing-fraction response)")
    c.add_argument("--recipe", help="cleaning recipe (default recipe when omitted)")
    c.add_argument("--model", choices=("linear", "quadratic", "pls"), default="linear",
                   help="calibration model (default linear)")
    add_response_options(c, range_type)
    c.add_argument("--analyte", help="reference name of the analyte (default: from the file)")
    c.add_argument("--out", default="mapkit-output", help="folder for the model and figure")
    c.add_argument("--overwrite", action="store_true", help="replace existing outputs")
    c.set_defaults(func=cmd_calibrate)

    b = sub.add_parser("batch", help="apply a saved model (and its recipe) to a folder of maps",
                       description="Clean every map with the model's recipe, write its "
                                   "content map, and one summary CSV across maps.")
    b.add_argument("folder", help="folder of map files (or one map)")
    b.add_argument("--model-file", required=True, help="quant_model.json from 'mapkit calibrate'")
    b.add_argument("--library", help="reference spectra the model was made with")
    b.add_argument("--recipe", help="recipe (default: the one saved in the model)")
    b.add_argument("--out", default="mapkit-output", help="folder for the outputs")
    b.add_argument("--overwrite", action="store_true", help="replace existing outputs")
    b.add_argument("--no-figures", action="store_true", help="skip figures")
    b.set_defaults(func=cmd_batch)

    t = sub.add_parser("temperature", help="anti-Stokes/Stokes temperature map")
    _common(t, default_recipe="minimal (bad pixels, spikes)")
    t.add_argument("--shift", type=float, required=True, help="band position, 1/cm (e.g. 520.7)")
    t.add_argument("--half-width", type=float, default=15.0, help="integration half-width, 1/cm")
    t.add_argument("--laser", type=float, help="excitation wavelength, nm (if the file lacks it)")
    det = t.add_mutually_exclusive_group()
    det.add_argument("--photon-counting", action="store_true",
                     help="detector counts photons, e.g. a CCD (frequency factor cubed; the "
                          "default)")
    det.add_argument("--energy-detection", action="store_true",
                     help="detector measures energy (frequency factor to the 4th power)")
    add_read_options(t, laser=False)
    t.set_defaults(func=cmd_temperature)

    k = sub.add_parser("crystallite", help="nanographite crystallite size from I_D/I_G")
    _common(k)
    k.add_argument("--laser", type=float, help="excitation wavelength, nm (if the file lacks it)")
    k.add_argument("--d-band", type=range_type, default=(1250.0, 1450.0), metavar="LO-HI",
                   help="D band window, 1/cm (default 1250-1450)")
    k.add_argument("--g-band", type=range_type, default=(1500.0, 1650.0), metavar="LO-HI",
                   help="G band window, 1/cm (default 1500-1650)")
    add_read_options(k, laser=False)
    k.set_defaults(func=cmd_crystallite)
