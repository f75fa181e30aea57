"""The ``mapkit`` command: one program, one subcommand per job.

Exit status: 0 success, 2 a problem with the user's input (one line on
stderr), 1 an internal error (a bug: please report it with MAPKIT_DEBUG=1
output).
"""

from __future__ import annotations

import argparse
import os

import numpy as np
import re
import sys
from pathlib import Path

from .errors import MapkitError

def _band(text: str):
    m = re.fullmatch(r"\s*(?:([A-Za-z_][\w.-]*)[:=])?\s*([\d.]+)\s*-\s*([\d.]+)\s*", text)
    if not m:
        raise argparse.ArgumentTypeError(f"band {text!r} is not NAME:LO-HI (e.g. api:845-872)")
    lo, hi = float(m.group(2)), float(m.group(3))
    return (m.group(1) or f"band_{lo:g}_{hi:g}", lo, hi)


def _positive_int(text: str) -> int:
    try:
        v = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a whole number") from None
    if v < 1:
        raise argparse.ArgumentTypeError(f"{text} must be at least 1")
    return v


def _add_read_options(p, laser: bool = True):
    g = p.add_argument_group("reading a cube from any HDF5 file")
    g.add_argument("--dataset", help="path of the intensity cube inside the HDF5 file")
    g.add_argument("--axes", help="the cube's axis order, e.g. y,x,raman_shift")
    g.add_argument("--shift-dataset", dest="shift_path",
                   help="path of the Raman shift dataset (cm-1)")
    g.add_argument("--x", dest="x_path", help="path of the x positions dataset (um)")
    g.add_argument("--y", dest="y_path", help="path of the y positions dataset (um)")
    g.add_argument("--pixel-size", type=float, help="step in um when no position datasets exist")
    if laser:
        p.add_argument("--laser", type=float, help="excitation wavelength in nm, if the file lacks it")


def _open_kwargs(a) -> dict:
    from . import layout

    # every command is a pass over whole maps: read them in blocks, not pixel tiles
    return {"dataset": a.dataset, "axes": a.axes, "shift": a.shift_path, "x": a.x_path,
            "y": a.y_path, "pixel_size": a.pixel_size, "laser_wavelength": a.laser,
            "block_bytes": layout.READ_BYTES}


def _add_analysis_options(p, default_out="mapkit-output"):
    p.add_argument("--out", default=default_out,
                   help="folder for the outputs (default: %(default)s)")
    p.add_argument("--library", help="folder of reference spectra (.jdx or two-column text)")
    p.add_argument("--standards", help="calibration standards table (CSV)")
    p.add_argument("--analyte", help="reference to quantify (default: from the standards file)")
    p.add_argument("--band", action="append", type=_band, metavar="NAME:LO-HI",
                   help="band image to integrate, cm-1 (repeatable)")
    p.add_argument("--components", type=_positive_int, default=4, help="NMF components (default 4)")
    p.add_argument("--classes", type=_positive_int, default=4, help="k-means classes (default 4)")
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
    q.add_argument("--weighting", choices=("none", "replicates"), default="none",
                   help="least-squares weighting of the standards (default none)")
    q.add_argument("--response-band", type=_range_arg, metavar="LO-HI",
                   help="use a band area as response instead of the unmixing fraction")
    q.add_argument("--internal-standard", type=_range_arg, metavar="LO-HI",
                   help="divide the response band by this band's area")
    q.add_argument("--region", action="append", metavar="NAME:X,Y;X,Y;X,Y",
                   help="polygon (um) for separate content statistics (repeatable)")
    p.add_argument("--overwrite", action="store_true", help="replace existing outputs")
    p.add_argument("--no-figures", action="store_true", help="skip figures")
    p.add_argument("--figure-format", choices=("png", "svg", "both"), default="png",
                   help="figure files to write (default png)")
    p.add_argument("--quiet", action="store_true", help="no progress bar")


def _range_arg(text):
    from .cli_reduce import _range

    return _range(text)


def _score(text: str) -> float:
    import argparse

    try:
        v = float(text)
    except ValueError:
        v = float("nan")
    if not 0.0 <= v <= 1.0:
        raise argparse.ArgumentTypeError(f"{text!r} is not a score between 0 and 1")
    return v


def _formats(a):
    choice = getattr(a, "figure_format", "png")
    return ("png", "svg") if choice == "both" else (choice,)


def _recipe(a):
    from .preprocess.recipe import Recipe

    return Recipe.from_file(a.recipe) if getattr(a, "recipe", None) else Recipe.default()


def _run_analysis(a, map_path, library, standards, bands):
    from .pipeline import Settings, analyse

    recipe = _recipe(a)  # checked before any data is read

    from .quantify import QuantModel
    from .quantify.regions import parse_region

    s = Settings(n_components=a.components, n_classes=a.classes, seed=a.seed,
                 analyte=a.analyte, calibration_model=a.calibration_model,
                 weighting=a.weighting, response_band=a.response_band,
                 internal_standard=a.internal_standard, min_score=a.min_score)
    if bands:
        s.bands = bands
    model = QuantModel.load(a.model_file) if a.model_file else None
    regions = dict(parse_region(r) for r in a.region or [])
    mode = _choose_mode(a, map_path)
    if mode:
        return _run_large(a, map_path, recipe, mode, library, standards, model)
    print("mode      in memory (the map fits comfortably)")
    out = analyse(map_path, a.out, library=library, standards=standards, settings=s,
                  overwrite=a.overwrite, progress=not a.quiet, figures=not a.no_figures,
                  open_kwargs=_open_kwargs(a) if hasattr(a, "dataset") else None, recipe=recipe,
                  model=model, regions=regions, formats=_formats(a))
    summ = out["summary"]
    print(f"map       {map_path}  ({summ['shape'][0]} x {summ['shape'][1]} pixels, "
          f"{summ['shape'][2]} channels)")
    bp = summ["bad_pixels"]
    print(f"masked    {bp['nonfinite']} non-finite, {bp['dead']} dead, {bp['saturated']} saturated pixels")
    sp = summ["spikes"]
    print(f"spikes    {sp['channels_replaced']} channels replaced in {sp['spectra_touched']} spectra")
    for note in summ["notices"]:
        print(f"notice    {note}")
    km = summ["results"].get("kmeans", {})
    from .reduce.match import describe_match

    names = {r["spectrum"]: describe_match(r) for r in km.get("identification", [])}
    if km.get("areas"):
        print("classes   " + ", ".join(
            f"{k}{' = ' + names[k] if k in names else ''} {v['fraction_pct']:.1f} %"
            for k, v in km["areas"].items()))
    ident = summ["results"].get("nmf", {}).get("identification", [])
    if ident:
        print("components " + ", ".join(f"{r['spectrum']} = {describe_match(r)}"
                                        for r in ident))
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
              f"{conc['percentiles'][50]:.2f}; {conc['below_loq']} of {conc['pixels']} pixels "
              f"below LOQ, {conc['outside_range']} outside the calibrated range")
    print(f"wrote     {len(out['written'])} files to {Path(a.out)}/")
    for p in out["written"]:
        if p.suffix in (".h5", ".json", ".html"):
            print(f"          {p}")
    return out


def _choose_mode(a, map_path):
    """None for the in-memory path, else the reason to go chunk-wise."""
    from .read import open_map
    from .stream import fits_in_memory

    if getattr(a, "workers", None) or getattr(a, "scheduler", None):
        return "a Dask cluster was asked for"
    if getattr(a, "chunked", False):
        return "--chunked"
    m = open_map(map_path, **_open_kwargs(a)) if hasattr(a, "dataset") else open_map(map_path)
    if not fits_in_memory(m):
        return (f"the cube ({m.n_pixels * m.shape[2] * 4 / 2**30:.1f} GiB) would not fit "
                "comfortably in memory")
    return None


def _run_large(a, map_path, recipe, reason, library, standards, model):
    from .stream import analyse_large

    from .pipeline import Settings, quantification_model
    from .read import read_library

    refs = read_library(library) if library else None
    if standards:
        s = Settings(analyte=a.analyte, calibration_model=a.calibration_model,
                     weighting=a.weighting, response_band=a.response_band,
                     internal_standard=a.internal_standard)
        model = quantification_model(standards, refs, recipe, s)
    print(f"mode      chunk-wise ({reason})")
    out = analyse_large(map_path, a.out, recipe=recipe, n_components=a.components,
                        n_classes=a.classes, seed=a.seed, workers=a.workers,
                        address=a.scheduler, overwrite=a.overwrite, figures=not a.no_figures,
                        progress=not a.quiet, bands=a.band or (), library=refs, model=model)
    if model is not None:
        model.save(Path(a.out) / "quant_model.json", overwrite=True)
    s = out["summary"]
    print(f"scheduler {s['scheduler']}, bands of {s['band_rows']} rows, {s['seconds']:.1f} s")
    areas = s["results"].get("kmeans", {}).get("areas", {})
    if areas:
        print("classes   " + ", ".join(f"{k} {v['fraction_pct']:.1f} %" for k, v in areas.items()))
    conc = s["results"].get("concentration")
    if conc and conc.get("mean") is not None:
        print(f"content   mean {conc['mean']:.2f} {conc['unit']}; {conc['quantifiable']} of "
              f"{conc['pixels']} pixels quantifiable")
    print(f"wrote     {len(out['written'])} files to {Path(a.out)}/")
    return out


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
    return _run_analysis(a, here / "tablet_map.h5", here / "library",
                         here / "calibration_standards.csv", bands)


def cmd_analyse(a):
    return _run_analysis(a, a.map, a.library, a.standards, a.band)


def cmd_info(a):
    from .read import open_map
    from .read.nexus import is_nexus_map, read_results

    m = open_map(a.map, **_open_kwargs(a))
    print(repr(m))
    if m.laser_wavelength:
        print(f"laser     {m.laser_wavelength:g} nm")
    for step in m.provenance:
        print(f"step      {step.name} {step.parameters}")
    if is_nexus_map(a.map):
        for name, r in read_results(a.map).items():
            fields = ", ".join(f"{k} {tuple(v['data'].shape)}" for k, v in r["fields"].items())
            print(f"result    {name} ({r['method']}): {fields}")


def cmd_convert(a):
    from .export import write_map
    from .read import open_map

    m = open_map(a.input, **_open_kwargs(a))
    write_map(a.output, m, overwrite=a.overwrite)
    print(f"wrote {a.output}: {m!r}")


def cmd_spectrum(a):
    import numpy as np

    from .read import open_map

    m = open_map(a.map, **_open_kwargs(a))
    ix = int(np.argmin(np.abs(m.x - a.at[0])))
    iy = int(np.argmin(np.abs(m.y - a.at[1])))
    s = m.spectrum(iy, ix)
    print(f"# pixel x={m.x[ix]:g} um, y={m.y[iy]:g} um (column {ix}, row {iy})")
    print("raman_shift_cm-1,intensity")
    for sh, v in zip(m.raman_shift, s):
        print(f"{sh:.3f},{v:.6g}")


def _map_files(target):
    from .read.dispatch import MAP_SUFFIXES

    p = Path(target)
    if p.is_dir():
        files = sorted(q for q in p.iterdir() if q.suffix.lower() in MAP_SUFFIXES)
        if not files:
            raise MapkitError("no map files in the folder", file=p,
                              fix=f"put maps ({', '.join(MAP_SUFFIXES)}) in it")
        return files
    return [p]


def cmd_preprocess(a):
    from .export import write_map
    from .read import open_map

    recipe = _recipe(a)
    files = _map_files(a.target)
    out = Path(a.out)
    out.mkdir(parents=True, exist_ok=True)
    for f in files:
        m = open_map(f, **_open_kwargs(a))
        clean, extras = recipe.apply(m)
        target = out / f"{f.stem}_clean.h5"
        write_map(target, clean, overwrite=a.overwrite)
        touched = extras.get("despike", {}).get("spikes")
        note = f", {int(np.sum(touched))} spike channels replaced" if touched is not None else ""
        print(f"{f} -> {target} ({int(clean.mask.sum())} pixels masked{note})")


def cmd_steps(a):
    from .preprocess.recipe import DEFAULT_RECIPE
    from .preprocess.registry import describe_steps

    print(describe_steps())
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
                        description="Remove spikes and baseline, then band images, NMF, "
                                    "k-means classes, unmixing and a concentration map.")
    an.add_argument("map", help="map file (.h5 mapkit layout, any HDF5 with --dataset, or text table)")
    _add_analysis_options(an)
    _add_read_options(an)
    an.set_defaults(func=cmd_analyse)

    i = sub.add_parser("info", help="describe a map or results file")
    i.add_argument("map")
    _add_read_options(i)
    i.set_defaults(func=cmd_info)

    c = sub.add_parser("convert", help="write any readable map in the mapkit HDF5 layout")
    c.add_argument("input")
    c.add_argument("output")
    c.add_argument("--overwrite", action="store_true")
    _add_read_options(c)
    c.set_defaults(func=cmd_convert)

    s = sub.add_parser("spectrum", help="print one pixel's spectrum as CSV")
    s.add_argument("map")
    s.add_argument("--at", nargs=2, type=float, metavar=("X_UM", "Y_UM"), required=True,
                   help="stage position in um (nearest pixel)")
    _add_read_options(s)
    s.set_defaults(func=cmd_spectrum)

    from . import cli_quantify, cli_reduce

    cli_reduce.add_parsers(sub, _add_read_options, _band, _positive_int)
    cli_quantify.add_parsers(sub, _add_read_options, _range_arg)

    pp = sub.add_parser("preprocess", help="clean one map or every map in a folder with a recipe",
                        description="Apply a recipe of cleaning steps and write *_clean.h5 maps.")
    pp.add_argument("target", help="map file or folder of maps")
    pp.add_argument("--recipe", help="TOML recipe (default: see 'mapkit steps')")
    pp.add_argument("--out", default="mapkit-output", help="folder for the cleaned maps")
    pp.add_argument("--overwrite", action="store_true")
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
    ac.add_argument("--overwrite", action="store_true")
    ac.set_defaults(func=cmd_axis_calibrate)

    g = sub.add_parser("samples", help="regenerate the synthetic sample data")
    g.add_argument("outdir")
    g.set_defaults(func=cmd_samples)

    v = sub.add_parser("view", help="open a map in napari with the mapkit panels")
    v.add_argument("map")
    v.set_defaults(func=cmd_view)
    return p


def main(argv=None) -> int:
    args = build_parser().parse_args(argv)
    try:
        args.func(args)
    except MapkitError as exc:
        print(f"mapkit: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("mapkit: interrupted", file=sys.stderr)
        return 130
    except Exception as exc:  # a bug, not a user mistake
        if os.environ.get("MAPKIT_DEBUG"):
            raise
        first = str(exc).splitlines()[0] if str(exc) else ""
        print(f"mapkit: internal error: {type(exc).__name__}: {first} "
              "(rerun with MAPKIT_DEBUG=1 for the traceback and report it)", file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
