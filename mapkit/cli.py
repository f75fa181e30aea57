"""The ``mapkit`` command: one program, one subcommand per job.

Exit status: 0 success, 2 a problem with the user's input (one line on
stderr), 1 an internal error (a bug: please report it with MAPKIT_DEBUG=1
output).
"""

from __future__ import annotations

import argparse
import os

import numpy as np
import sys
from pathlib import Path

from .cli_common import (_add_read_options, _band, _check_outputs, _count_or_auto, _formats,
                         _map_files, _open_kwargs, _positive_int, _print_notes, _range_arg,
                         add_response_options, missing_folders, remove_if_empty)
from .errors import MapkitError, environment_error
from .export.atomic import STAGING_PREFIX


def _add_analysis_options(p, default_out="mapkit-output"):
    p.add_argument("--out", default=default_out,
                   help="folder for the outputs (default: %(default)s)")
    p.add_argument("--library", help="folder of reference spectra (.jdx or two-column text)")
    p.add_argument("--standards", help="calibration standards table (CSV)")
    p.add_argument("--analyte", help="reference to quantify (default: from the standards file)")
    p.add_argument("--band", action="append", type=_band, metavar="NAME:LO-HI",
                   help="band image to integrate, cm-1 (repeatable)")
    p.add_argument("--components", type=_count_or_auto, default="auto",
                   help="number of components, or auto (default): as many as stand above the "
                        "shot noise of the despiked counts (biwhitened singular values; the "
                        "summary says how many and why; spectra in counts)")
    p.add_argument("--component-method", choices=("mcr", "nmf"), default="mcr",
                   help="components: 'mcr' (default) is MCR-ALS on the despiked spectra with a "
                        "polynomial background per pixel, started from the purest pixels; "
                        "'nmf' factorises the baseline-corrected spectra")
    p.add_argument("--class-method", choices=("dominant", "kmeans", "minibatch", "ward"),
                   default="dominant",
                   help="classes: 'dominant' (default) puts each pixel in the component "
                        "with the largest abundance, one class per component; kmeans, "
                        "minibatch or ward cluster the spectra's shapes")
    p.add_argument("--classes", type=_positive_int,
                   help="number of classes for kmeans, minibatch or ward (default: as many as "
                        "--components)")
    p.add_argument("--seed", type=int, default=0, help="random seed (default 0)")
    p.add_argument("--min-score", type=_score, default=0.9,
                   help="lowest hit-quality index (0-1, after removing offset and slope on both "
                        "sides) that names a component or class from the library (default 0.9); "
                        "below it the best candidate is still printed")
    p.add_argument("--recipe", help="TOML recipe of cleaning steps (default: mask bad pixels, "
                                    "despike, arPLS baseline; see 'mapkit steps')")
    big = p.add_argument_group("maps larger than memory")
    big.add_argument("--chunked", action="store_true",
                     help="process chunk by chunk even if the map would fit in memory")
    big.add_argument("--workers", type=_positive_int,
                     help="run on a local Dask cluster of this many worker processes")
    big.add_argument("--scheduler", help="address of a running Dask scheduler (tcp://host:port)")
    q = p.add_argument_group("quantification")
    q.add_argument("--model-file", help="saved quantification model (from 'mapkit calibrate')")
    q.add_argument("--calibration-model", choices=("linear", "quadratic", "pls"),
                   default="linear", help="model fitted to --standards (default linear)")
    add_response_options(q, _range_arg)
    q.add_argument("--region", action="append", metavar="NAME:X,Y;X,Y;X,Y",
                   help="polygon (um) for separate content statistics (repeatable)")
    p.add_argument("--overwrite", action="store_true", help="replace existing outputs")
    p.add_argument("--no-figures", action="store_true", help="skip figures")
    p.add_argument("--figure-format", choices=("png", "svg", "both"), default="png",
                   help="figure files to write (default png)")
    p.add_argument("--quiet", action="store_true", help="no progress bar")


def _numbers(text: str, n_max: int = 2):
    try:
        vals = tuple(float(v) for v in text.replace(" ", "").split(","))
    except ValueError:
        vals = ()
    if not 1 <= len(vals) <= n_max:
        raise argparse.ArgumentTypeError(f"{text!r} is not one number or two as X,Y")
    return vals


def _xy(text: str):
    vals = _numbers(text)
    if len(vals) != 2:
        raise argparse.ArgumentTypeError(f"{text!r} is not X,Y in um")
    return vals


def _add_optical_options(p, positional: bool = False):
    g = p.add_argument_group("optical micrograph under the maps")
    if positional:
        g.add_argument("image", help="micrograph (PNG, JPEG or TIFF; grey or RGB)")
    else:
        g.add_argument("--optical", metavar="IMAGE",
                       help="micrograph of the sample surface (PNG, JPEG or TIFF)")
    g.add_argument("--optical-pixel-size", type=_numbers, metavar="UM[,UM_Y]",
                   help="um per micrograph pixel (default: IMAGE.scale.json or TIFF tags)")
    g.add_argument("--optical-origin", type=_xy, metavar="X,Y",
                   help="stage position (um) of the micrograph's top-left corner (default 0,0)")
    g.add_argument("--control-points", metavar="CSV",
                   help="pairs to register the micrograph: map_x_um,map_y_um and "
                        "image_x_um,image_y_um (or image_col,image_row)")
    g.add_argument("--transform", choices=("similarity", "affine"), default="similarity",
                   help="transform fitted to the control points (default similarity)")


def _optical_request(a, image):
    if image is None:
        for opt in ("optical_pixel_size", "optical_origin", "control_points"):
            if getattr(a, opt, None) is not None:
                raise MapkitError("micrograph options without a micrograph",
                                  field="--" + opt.replace("_", "-"), fix="add --optical IMAGE")
        return None
    ps = a.optical_pixel_size
    return {"image": image, "pixel_size": None if ps is None else (ps if len(ps) == 2 else ps[0]),
            "origin": a.optical_origin, "control_points": a.control_points,
            "transform": a.transform}


def _print_optical(info):
    reg = info.get("registration")
    dx, dy = info["pixel_size_um"]
    print(f"optical   {info['source']} ({dx:g} x {dy:g} um per pixel, {info['scale_from']})")
    if reg:
        print(f"register  {reg['transform']} from {len(reg['residuals_um'])} pairs: RMS "
              f"{reg['rms_um']:.3g} um; residuals " + ", ".join(f"{v:.3g}" for v in
                                                                reg["residuals_um"]) + " um")


def _score(text: str) -> float:
    import argparse

    try:
        v = float(text)
    except ValueError:
        v = float("nan")
    if not 0.0 <= v <= 1.0:
        raise argparse.ArgumentTypeError(f"{text!r} is not a score between 0 and 1")
    return v


def _recipe(a):
    from .preprocess.recipe import Recipe

    return Recipe.from_file(a.recipe) if getattr(a, "recipe", None) else Recipe.default()


def _run_analysis(a, map_path, library, standards, bands):
    from .pipeline import Settings, analyse

    recipe = _recipe(a)  # checked before any data is read
    _check_outputs(a.out, a.overwrite)

    from .quantify import QuantModel
    from .quantify.regions import parse_region

    s = Settings(n_components=a.components, component_method=a.component_method,
                 class_method=a.class_method,
                 n_classes=a.classes, seed=a.seed,
                 analyte=a.analyte, calibration_model=a.calibration_model,
                 weighting=a.weighting, response_band=a.response_band,
                 internal_standard=a.internal_standard, min_score=a.min_score)
    if bands:
        s.bands = bands
    model = QuantModel.load(a.model_file) if a.model_file else None
    if model is not None:
        recipe = _model_recipe(a, model, recipe)
    regions = dict(parse_region(r) for r in a.region or [])
    optical = _optical_request(a, getattr(a, "optical", None)) if hasattr(a, "transform") \
        else None
    out = analyse(map_path, a.out, library=library, standards=standards, settings=s,
                  overwrite=a.overwrite, progress=not a.quiet, figures=not a.no_figures,
                  open_kwargs=_open_kwargs(a) if hasattr(a, "dataset") else None, recipe=recipe,
                  model=model, regions=regions, formats=_formats(a), optical=optical,
                  chunked=getattr(a, "chunked", False), workers=getattr(a, "workers", None),
                  address=getattr(a, "scheduler", None),
                  notify=lambda line: print(f"mode      {line}"))
    summ = out["summary"]
    print(f"scheduler {summ['scheduler']}, {summ['seconds']:.1f} s")
    print(f"map       {map_path}  ({summ['shape'][0]} x {summ['shape'][1]} pixels, "
          f"{summ['shape'][2]} channels)")
    bp = summ["bad_pixels"]
    print(f"masked    {bp['nonfinite']} non-finite, {bp['dead']} dead, {bp['saturated']} saturated pixels")
    sp = summ["spikes"]
    print(f"spikes    {sp['channels_replaced']} channels replaced in {sp['spectra_touched']} spectra")
    for note in summ["notices"]:
        print(f"notice    {note}")
    if "optical" in summ:
        _print_optical(summ["optical"])
    km = summ["results"].get("classes") or summ["results"].get("kmeans", {})
    from .reduce.match import describe_match

    names = {r["spectrum"]: describe_match(r) for r in km.get("identification", [])}
    if km.get("areas"):
        print("classes   " + ", ".join(
            f"{k}{' = ' + names[k] if k in names else ''} {v['fraction_pct']:.1f} %"
            for k, v in km["areas"].items()))
    results = summ["results"]
    ident = (results.get("mcr") or results.get("nmf") or {}).get("identification", [])
    if ident:
        print("components " + ", ".join(f"{r['spectrum']} = {describe_match(r)}"
                                        for r in ident))
    un = results.get("unmixing") or {}
    if un.get("references"):
        rms = un.get("residual_rms_median")
        print("unmixing  mean abundance " + ", ".join(
            f"{k} {v['mean']:.3g}" for k, v in un["references"].items() if v["mean"] is not None)
            + (f"; median residual {rms:.3g} counts" if rms is not None else "")
            + f"; {un.get('not_converged', 0)} not converged")
    conc = summ["results"].get("concentration")
    if conc:
        cal = conc["calibration"]
        fit = f"r = {cal['r']:.4f}" if "r" in cal else f"R² = {cal['r2']:.4f}"
        print(f"calibration {cal['analyte']} ({cal['model']}): {fit}, LOD {cal['lod']:.2f} "
              f"{cal['unit']}, LOQ {cal['loq']:.2f} {cal['unit']}")
        if cal["model"] != "pls":
            from .quantify.calibration import describe_lack_of_fit

            print(f"          {describe_lack_of_fit(cal.get('lack_of_fit'))}")
        print(f"content   mean {conc['mean']:.2f} {conc['unit']}, median "
              f"{conc['percentiles'][50]:.2f} {conc['unit']} (flagged pixels included); "
              f"{conc['below_loq']} of {conc['pixels']} pixels below LOQ, "
              f"{conc['outside_range']} outside the calibrated range")
    print(f"wrote     {len(out['written'])} files to {Path(a.out)}/")
    for p in out["written"]:
        if p.suffix in (".h5", ".json", ".html"):
            print(f"          {p}")
    return out


def _model_recipe(a, model, recipe):
    """The recipe to clean with when a saved model is applied: its own, unless one is given."""
    from .preprocess.recipe import Recipe

    if not getattr(a, "recipe", None):
        print(f"recipe    the one saved in {a.model_file}")
        return Recipe.from_text(model.recipe_text, f"{a.model_file} (recipe)")
    try:
        model.check_recipe(recipe)
    except MapkitError as exc:
        raise MapkitError(exc.problem, file=a.recipe, field="--recipe",
                          fix="omit --recipe to clean with the recipe saved in the model, or "
                              "pass the recipe.toml 'mapkit calibrate' wrote beside it") from None
    return recipe


def cmd_demo(a):
    from .samples import sample_dir

    here = sample_dir()
    if a.out is None:  # the demo's own folder: a rerun replaces the previous demo output
        a.out, a.overwrite = "mapkit-output/demo", True
    if a.recipe is None and (here / "tablet_recipe.toml").exists():
        a.recipe = str(here / "tablet_recipe.toml")
    if a.model_file is None and a.calibration_model == "linear":
        # the unmixing fraction of the invented standards curves: a quadratic fits it
        a.calibration_model = "quadratic"
    print("demo: invented tablet cross-section (synthetic data, see sample_maps/README.md)")
    bands = a.band or [("acetaminophen_858", 845.0, 872.0), ("calcite_1086", 1080.0, 1092.0),
                       ("anatase_144", 125.0, 165.0)]
    from .export.atomic import output_transaction

    with output_transaction(a.out):
        return _run_analysis(a, here / "tablet_map.h5", here / "library",
                             here / "calibration_standards.csv", bands)


def cmd_analyse(a):
    from .export.atomic import output_transaction

    # outputs replace the previous ones only once the run has finished them all
    with output_transaction(a.out):
        return _run_analysis(a, a.map, a.library, a.standards, a.band)


def _map_stem(results_path):
    """Stem of the map a results file was made from (its recorded input), else its own."""
    import json

    import h5py

    from . import layout

    with h5py.File(results_path, "r") as f:
        raw = f[layout.PROVENANCE].attrs.get("inputs") if layout.PROVENANCE in f else None
    try:
        return Path(json.loads(raw)["map"]["path"]).stem
    except (TypeError, KeyError, ValueError):
        return Path(results_path).stem


def cmd_micrograph(a):
    """Place a micrograph under the maps of an existing results file (a new file is written)."""
    from .export.atomic import check_target
    from .export.bundle import safe_name, write_optical_figures
    from .export.nexus import copy_with_optical
    from .pipeline import optical_summary, place_optical
    from .read.nexus import is_nexus_map, read_nexus_map, read_result_objects

    src = Path(a.results)
    if not is_nexus_map(src):
        raise MapkitError("not a mapkit results file (no /entry/map/intensity)", file=src,
                          fix="give the results.h5 written by 'mapkit analyse'")
    out = Path(a.out) if a.out else src.with_name(f"{src.stem}_optical.h5")
    if out.resolve() == src.resolve():
        raise MapkitError("the output would replace the input", file=out, field="--out",
                          fix="give another file name")
    check_target(out, overwrite=a.overwrite)
    m = read_nexus_map(src)
    placed, notices = place_optical(_optical_request(a, a.image), (m.x, m.y))
    results = read_result_objects(src) if not a.no_figures else []
    written = [copy_with_optical(src, out, placed, overwrite=a.overwrite)]
    if not a.no_figures:
        written += write_optical_figures(out.parent, safe_name(_map_stem(src)), placed, results,
                                         overwrite=True)
    for note in notices:
        print(f"notice    {note}")
    _print_optical(optical_summary(placed))
    print(f"wrote     {len(written)} files: {out}" + (f" and {len(written) - 1} figures in "
                                                       f"{out.parent}/" if len(written) > 1 else ""))


def cmd_info(a):
    from .read import open_map
    from .read.nexus import is_nexus_map, read_results

    m = open_map(a.map, **_open_kwargs(a))
    print(repr(m))
    _print_notes(m)
    if m.laser_wavelength:
        print(f"laser     {m.laser_wavelength:g} nm")
    for step in m.provenance:
        print(f"step      {step.name} {step.parameters}")
    if is_nexus_map(a.map):
        from .pipeline import optical_summary
        from .read.optical import read_placed_image

        placed = read_placed_image(a.map)
        if placed is not None:
            _print_optical(optical_summary(placed))
        for name, r in read_results(a.map).items():
            fields = ", ".join(f"{k} {tuple(v['data'].shape)}" for k, v in r["fields"].items())
            print(f"result    {name} ({r['method']}): {fields}")


def cmd_convert(a):
    from .export import write_map
    from .export.atomic import check_target
    from .read import open_map

    out = Path(a.output)
    folder = next((q for q in [out.parent, *out.parent.parents] if q.exists()), None)
    if folder is not None and not folder.is_dir():
        raise MapkitError("the output folder does not exist: it would lie under a file",
                          file=out, fix=f"{folder} is a file; give a path in a folder")
    if out.parent.is_dir():
        check_target(out, overwrite=a.overwrite)   # before the input is read
    m = open_map(a.input, **_open_kwargs(a))
    _print_notes(m)
    out.parent.mkdir(parents=True, exist_ok=True)   # as analyse --out does
    write_map(out, m, overwrite=a.overwrite)
    print(f"wrote {a.output}: {m!r}")


def cmd_spectrum(a):
    import numpy as np

    from .read import open_map

    m = open_map(a.map, **_open_kwargs(a))
    names = ("x",) + tuple(d for d in m.spatial_dims[::-1] if d != "x")   # x y, x z, x y z
    if len(a.at) != len(names):
        raise MapkitError(f"--at gives {len(a.at)} values, this {m.kind} needs "
                          f"{' '.join(n.upper() for n in names)}", file=a.map, field="--at",
                          fix=f"give {' '.join(n.upper() for n in names)} in um")
    for name, want in zip(names, a.at):
        axis = m.coords(name)
        # a pixel covers half a step on each side of its position: beyond that is outside
        half = 0.5 * float(np.median(np.abs(np.diff(axis)))) if axis.size > 1 else 0.5
        lo, hi = float(axis.min()) - half, float(axis.max()) + half
        if not lo <= want <= hi:
            raise MapkitError(f"{name} = {want:g} um lies outside the map ({name} "
                              f"{axis.min():g} to {axis.max():g} um)", file=a.map, field="--at",
                              fix=f"give a position from {lo:g} to {hi:g} um")
    want = dict(zip(names, a.at))
    index = tuple(int(np.argmin(np.abs(m.coords(d) - want[d]))) for d in m.spatial_dims)
    s = m.spectrum(*index)
    _print_notes(m, prefix="# notice: ")
    where = ", ".join(f"{d}={m.coords(d)[i]:g} um" for d, i in
                      sorted(zip(m.spatial_dims, index), key=lambda t: "xyz".index(t[0])))
    print(f"# pixel {where} (column {index[-1]}, row {index[-2]})")
    print("raman_shift_cm-1,intensity")
    for sh, v in zip(m.raman_shift, s):
        print(f"{sh:.3f},{v:.6g}")


def cmd_preprocess(a):
    from .export import write_map
    from .read import open_map

    recipe = _recipe(a)
    files = _map_files(a.target)
    out = Path(a.out)
    _check_outputs(out, a.overwrite, [f"{f.stem}_clean.h5" for f in files])  # before any read
    out.mkdir(parents=True, exist_ok=True)
    for f in files:
        m = open_map(f, **_open_kwargs(a))
        _print_notes(m)
        notes = []
        recipe.check_axis(m.raman_shift, notes=notes)
        for note in notes:
            print(f"notice    {note}")
        clean, extras = recipe.apply(m)
        target = out / f"{f.stem}_clean.h5"
        write_map(target, clean, overwrite=a.overwrite)
        touched = extras.get("despike", {}).get("spikes")
        note = f", {int(np.sum(touched))} spike channels replaced" if touched is not None else ""
        print(f"{f} -> {target} ({int(clean.mask.sum())} pixels masked{note})")


def cmd_steps(a):
    from .preprocess.recipe import DEFAULT_RECIPE, Recipe
    from .preprocess.registry import describe_steps

    print(describe_steps(Recipe.default()))
    print("\nDefault recipe:\n" + DEFAULT_RECIPE)


def cmd_axis_calibrate(a):
    from .preprocess.axis_calibration import calibrate_axis
    from .read import open_map, read_reference

    p = Path(a.spectrum)
    if p.suffix.lower() in (".h5", ".hdf5", ".nxs"):
        from .preprocess.engine import good_mean_spectrum

        m = open_map(p)
        shift, spec = m.raman_shift, good_mean_spectrum(m)
    else:
        ref = read_reference(p)
        shift, spec = ref.raman_shift, ref.intensity
    cal = calibrate_axis(shift, spec, a.material, order=a.order, window=a.window)
    print(f"{'standard':>10} {'measured':>10} {'corrected':>10} {'residual':>9}  (1/cm)")
    for r, m_, res in zip(cal.reference, cal.measured, cal.residuals):
        print(f"{r:10.2f} {m_:10.2f} {r - res:10.2f} {res:9.3f}")
    print(f"RMS residual {cal.rms:.3f} 1/cm with {len(cal.reference)} bands, order {a.order}")
    snippet = cal.recipe_step()
    if a.out:
        from .export.atomic import atomic_path

        with atomic_path(a.out, overwrite=a.overwrite) as tmp:
            tmp.write_text(snippet)
        print(f"wrote {a.out}")
    else:
        print("\nAdd to a recipe:\n" + snippet)


def cmd_samples(a):
    from .samples import write_samples

    for p in write_samples(a.outdir):
        print(p)


def cmd_view(a):
    try:
        import napari
        from mapkit_napari import open_with_panels
    except ImportError:
        raise MapkitError("the viewer needs napari and the mapkit-napari plugin",
                          field="view", fix="pip install -e plugins (see README)") from None
    open_with_panels(a.map)
    napari.run()


def build_parser() -> argparse.ArgumentParser:
    from ._version import __version__

    p = argparse.ArgumentParser(prog="mapkit", description=(
        "Turn hyperspectral Raman maps into component images, spectral classes and "
        "concentration maps."))
    p.add_argument("--version", action="version", version=f"mapkit {__version__}")
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")

    d = sub.add_parser("demo", help="run the whole path on the bundled synthetic map",
                       description="Run the whole path on the bundled, invented sample map.")
    _add_analysis_options(d, default_out=None)
    d.set_defaults(func=cmd_demo)

    an = sub.add_parser("analyse", help="clean, reduce and quantify one map file",
                        description="Mask bad pixels, remove spikes and baseline, then "
                                    "components (MCR-ALS with the background by default, or "
                                    "NMF), classes (each pixel's dominant component by "
                                    "default, or k-means), unmixing against a library and a "
                                    "concentration map from calibration standards.")
    an.add_argument("map", help="map file (.h5 mapkit layout, any HDF5 with --dataset, or text table)")
    _add_analysis_options(an)
    _add_read_options(an)
    _add_optical_options(an)
    an.set_defaults(func=cmd_analyse)

    mi = sub.add_parser("micrograph", help="place a micrograph under the maps of a results file",
                        description="Read a micrograph with its scale, register it to the map "
                                    "from control points if given, and write a copy of the "
                                    "results file holding it, with the maps drawn over it.")
    mi.add_argument("results", help="results.h5 written by 'mapkit analyse' (left unchanged)")
    _add_optical_options(mi, positional=True)
    mi.add_argument("--out", help="results file to write (default: RESULTS_optical.h5 beside it)")
    mi.add_argument("--overwrite", action="store_true", help="replace an existing --out file")
    mi.add_argument("--no-figures", action="store_true", help="skip the overlay figures")
    mi.set_defaults(func=cmd_micrograph)

    i = sub.add_parser("info", help="describe a map or results file")
    i.add_argument("map", help="map or results file")
    _add_read_options(i)
    i.set_defaults(func=cmd_info)

    c = sub.add_parser("convert", help="write any readable map in the mapkit HDF5 layout")
    c.add_argument("input", help="map file (text table, any HDF5 with --dataset, mapkit file)")
    c.add_argument("output", help="mapkit HDF5 file to write (its folder is created)")
    c.add_argument("--overwrite", action="store_true", help="replace an existing output")
    _add_read_options(c)
    c.set_defaults(func=cmd_convert)

    s = sub.add_parser("spectrum", help="print one pixel's spectrum as CSV")
    s.add_argument("map", help="map file")
    s.add_argument("--at", nargs="+", type=float, metavar="UM", required=True,
                   help="stage position X Y in um (a depth section: X Z; a volume: X Y Z; "
                        "nearest pixel; a position more than half a pixel outside the map is "
                        "an error)")
    _add_read_options(s)
    s.set_defaults(func=cmd_spectrum)

    from . import cli_quantify, cli_reduce

    cli_reduce.add_parsers(sub, _add_read_options, _band, _positive_int)
    cli_quantify.add_parsers(sub, _add_read_options, _range_arg)
    from . import cli_depth
    cli_depth.add_parsers(sub, _add_read_options, _open_kwargs, _band)

    pp = sub.add_parser("preprocess", help="clean one map or every map in a folder with a recipe",
                        description="Apply a recipe of cleaning steps and write *_clean.h5 maps.")
    pp.add_argument("target", help="map file or folder of maps")
    pp.add_argument("--recipe", help="TOML recipe (default: see 'mapkit steps')")
    pp.add_argument("--out", default="mapkit-output", help="folder for the cleaned maps")
    pp.add_argument("--overwrite", action="store_true", help="replace existing outputs")
    _add_read_options(pp)
    pp.set_defaults(func=cmd_preprocess)

    st = sub.add_parser("steps", help="list the cleaning steps a recipe can use")
    st.set_defaults(func=cmd_steps)

    ac = sub.add_parser("axis-calibrate", help="fit a shift-axis correction from a reference "
                                               "material's spectrum")
    ac.add_argument("spectrum", help="spectrum (.jdx, two-column text) or map (.h5: mean spectrum)")
    ac.add_argument("--material", default="polystyrene",
                    help="reference material (polystyrene, cyclohexane, naphthalene, "
                         "acetaminophen, toluene, sulfur, silicon)")
    ac.add_argument("--order", type=int, default=2, help="polynomial order (default 2)")
    ac.add_argument("--window", type=float, default=10.0,
                    help="search half-width around each tabulated band, 1/cm (default 10)")
    ac.add_argument("--out", help="write the recipe step to this TOML file")
    ac.add_argument("--overwrite", action="store_true", help="replace an existing output")
    ac.set_defaults(func=cmd_axis_calibrate)

    g = sub.add_parser("samples", help="regenerate the synthetic sample data")
    g.add_argument("outdir", help="folder to write the sample files into")
    g.set_defaults(func=cmd_samples)

    v = sub.add_parser("view", help="open a map in napari with the mapkit panels")
    v.add_argument("map", help="map or results file")
    v.set_defaults(func=cmd_view)
    return p


def main(argv=None) -> int:
    args = build_parser().parse_args(argv)
    out = getattr(args, "out", None)
    made = missing_folders(out) if isinstance(out, (str, Path)) else []
    rc = _run(args)
    if rc != 0:          # a failed run leaves no empty output folder of its own making
        remove_if_empty(made)
    return rc


def _run(args) -> int:
    try:
        args.func(args)
    except BrokenPipeError:
        # the reader stopped reading (e.g. '| head'): not an error, and nothing to report
        _silence_stdout()
        return 0
    except MapkitError as exc:
        print(f"mapkit: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("mapkit: interrupted", file=sys.stderr)
        return 130
    except OSError as exc:    # a full disk or a refused write: the user can act on it
        # a failed write or close names no file: then the output folder of the command
        told = environment_error(exc, staging=STAGING_PREFIX,
                                 where=getattr(args, "out", None))
        if told is None:
            return _internal(exc)
        print(f"mapkit: error: {told}", file=sys.stderr)
        return 2
    except Exception as exc:  # a bug, not a user mistake
        return _internal(exc)
    return 0


def _internal(exc) -> int:
    if os.environ.get("MAPKIT_DEBUG"):
        raise exc
    first = str(exc).splitlines()[0] if str(exc) else ""
    print(f"mapkit: internal error: {type(exc).__name__}: {first} "
          "(rerun with MAPKIT_DEBUG=1 for the traceback and report it)", file=sys.stderr)
    return 1


def _silence_stdout():
    """Point stdout at /dev/null, so flushing at exit does not raise a second BrokenPipeError."""
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
    except (OSError, ValueError, AttributeError):  # no real file descriptor (captured output)
        pass


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
