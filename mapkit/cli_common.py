"""Helpers every ``mapkit`` subcommand module shares: argument types, the options that
open a map, opening, cleaning and checking before work, and writing a results bundle.

``cli.py`` (the parser and ``main``), ``cli_reduce.py`` and ``cli_quantify.py`` import from
here; this module imports none of them, so the command modules form no import circle
(``tests/test_architecture.py``).
"""

from __future__ import annotations

import argparse
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


def _count_or_auto(text: str):
    """A whole number >= 1, or 'auto'."""
    if text.strip().lower() == "auto":
        return "auto"
    try:
        return _positive_int(text)
    except argparse.ArgumentTypeError:
        raise argparse.ArgumentTypeError(f"{text!r} is not auto or a whole number >= 1") from None


def _range(text: str):
    m = re.fullmatch(r"\s*([\d.]+)\s*-\s*([\d.]+)\s*", text)
    if not m:
        import argparse

        raise argparse.ArgumentTypeError(f"{text!r} is not LO-HI in 1/cm (e.g. 500-540)")
    return float(m.group(1)), float(m.group(2))


def _range_arg(text):
    return _range(text)


def _add_read_options(p, laser: bool = True):
    g = p.add_argument_group("reading a cube from any HDF5 file")
    g.add_argument("--dataset", help="path of the intensity cube inside the HDF5 file")
    g.add_argument("--axes", help="the dataset's axis order, e.g. y,x,raman_shift (a 2-D stack "
                                  "of spectra: pixel,raman_shift); checked against the file's "
                                  "dimension labels and the shift and position datasets, and "
                                  "reported when nothing in the file can confirm it")
    g.add_argument("--shift-dataset", dest="shift_path",
                   help="path of the shift axis dataset; its units attribute is honoured "
                        "(1/cm, cm-1, cm^-1: Raman shift; nm: wavelength, converted with "
                        "--laser); other units are refused")
    g.add_argument("--x", dest="x_path", help="path of the x positions dataset (um; one per "
                                              "column, or one per spectrum of a 2-D stack)")
    g.add_argument("--y", dest="y_path", help="path of the y positions dataset (um)")
    g.add_argument("--z-dataset", dest="z_path", help="path of the nominal depths dataset (um) "
                                                      "of a depth section or volume (--axes "
                                                      "naming z)")
    g.add_argument("--pixel-size", type=float, help="step in um when no position datasets exist")
    p.add_argument("--position-tolerance", type=float, metavar="UM",
                   help="text tables and 2-D stacks: snap positions that jitter by up to UM "
                        "around a grid onto it (reported); default: positions must repeat "
                        "exactly")
    if laser:
        p.add_argument("--laser", type=float, help="excitation wavelength in nm, if the file lacks "
                                                   "it (converts a wavelength axis to shift)")


def _open_kwargs(a) -> dict:
    from . import layout

    # every command is a pass over whole maps: read them in blocks, not pixel tiles
    return {"dataset": a.dataset, "axes": a.axes, "shift": a.shift_path, "x": a.x_path,
            "y": a.y_path, "pixel_size": a.pixel_size, "laser_wavelength": a.laser,
            "position_tolerance": a.position_tolerance, "block_bytes": layout.READ_BYTES,
            "z": getattr(a, "z_path", None)}


def _print_notes(m, prefix="notice    ", file=None):
    """Print what the reader converted, snapped or could not confirm."""
    from .read.dispatch import read_notes

    for note in read_notes(m):
        print(f"{prefix}{note}", file=file or sys.stdout)


def missing_folders(out) -> list[Path]:
    """The folders of ``out`` and above it that do not exist yet, deepest first."""
    chain, p = [], Path(out)
    while not p.exists() and p != p.parent:
        chain.append(p)
        p = p.parent
    return chain


def remove_if_empty(folders):
    """Remove the ``folders`` (deepest first) that are empty: a failed run that made its
    output folder leaves nothing behind."""
    for p in folders:
        try:
            if p.is_dir() and not any(p.iterdir()):
                p.rmdir()
        except OSError:
            return


def _check_outputs(out, overwrite, names=("results.h5",)):
    """Refuse, before any work, an output folder that is a file, cannot be made or holds
    earlier outputs."""
    out = Path(out)
    if out.exists() and not out.is_dir():
        raise MapkitError("the output path is a file, not a folder", file=out, field="--out",
                          fix="give a folder for the outputs")
    made = missing_folders(out)
    if made:   # can it be made? (made and removed again: the run makes it when it writes)
        try:
            out.mkdir(parents=True)
        except OSError as exc:
            remove_if_empty(made)
            why = (exc.strerror or str(exc)).lower()
            raise MapkitError(f"the output folder cannot be made ({why})", file=out,
                              field="--out",
                              fix="give a folder on a disk you can write to") from None
        remove_if_empty(made)
    if overwrite:
        return
    for name in names:
        if (out / name).exists():
            raise MapkitError("the output file exists (from an earlier run)", file=out / name,
                              field="--out", fix="choose another --out folder or pass --overwrite")


def _formats(a):
    choice = getattr(a, "figure_format", "png")
    return ("png", "svg") if choice == "both" else (choice,)


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


def add_response_options(g, range_type):
    """Options that define the calibration response (analyse and calibrate share them)."""
    g.add_argument("--weighting", choices=("none", "replicates"), default="none",
                   help="least-squares weights of the standards: none (default), or "
                        "replicates (1/variance, a line fitted to the replicate variances "
                        "at each level)")
    g.add_argument("--response-band", type=range_type, metavar="LO-HI",
                   help="response: the band area over LO-HI 1/cm above a straight line "
                        "through its end points (default: the unmixing fraction)")
    g.add_argument("--internal-standard", type=range_type, metavar="LO-HI",
                   help="divide the response band by this band's area")


def _common(p, default_recipe="default"):
    p.add_argument("map", help="map file (.h5 mapkit layout, any HDF5 with --dataset, or text table)")
    p.add_argument("--out", default="mapkit-output", help="folder for the outputs")
    p.add_argument("--recipe", help=f"TOML recipe of cleaning steps (default: the {default_recipe} "
                                    "recipe; 'none' for no cleaning)")
    p.add_argument("--seed", type=int, default=0, help="random seed (default 0)")
    p.add_argument("--overwrite", action="store_true", help="replace existing outputs")
    p.add_argument("--no-figures", action="store_true", help="skip figures")
    p.add_argument("--figure-format", choices=("png", "svg", "both"), default="png",
                   help="figure files to write (default png)")
    p.add_argument("--quiet", action="store_true", help="print only the results, no mode line")


def _channel_need(a, library):
    """Channels the method after the recipe needs, and why (checked before cleaning)."""
    if a.command == "components":
        return a.n, f"{a.method.upper()} with {a.n} components"
    if a.command == "unmix" and library:
        from .reduce.unmix import baseline_terms

        terms = baseline_terms(a.baseline_order)
        return (len(library) + terms + 1,
                f"unmixing {len(library)} references with {terms} baseline terms")
    return 0, ""


def _prepare(a, minimal=False, lazy_ok=False, background=False):
    """Open and clean the map. ``background``: the method fits the fluorescence itself, so
    it gets the map cleaned by every step of the recipe except the baseline ones."""
    from .preprocess.recipe import Recipe
    from .read import open_map

    if a.recipe == "none":
        recipe = None
    elif a.recipe:
        recipe = Recipe.from_file(a.recipe)
    else:
        recipe = Recipe.minimal() if minimal else Recipe.default()
    library = None
    if getattr(a, "library", None):
        from .read import read_library

        library = read_library(a.library)
    _check_outputs(a.out, a.overwrite)   # before the map is read or cleaned
    m = open_map(a.map, **_open_kwargs(a))
    if not getattr(a, "quiet", False):
        _print_notes(m)
    if recipe is not None:   # the axis alone: a crop too narrow or a short library fail here
        need, why = _channel_need(a, library)
        notes = []
        recipe.check_axis(m.raman_shift, need=need, why=why, library=library, notes=notes)
        for note in notes if not getattr(a, "quiet", False) else ():
            print(f"notice    {note}")
    elif library:
        for ref in library:
            ref.on_axis(m.raman_shift)
    from .stream import fits_in_memory

    if not (lazy_ok and m.is_lazy and not fits_in_memory(m)):
        m = m.load()
    elif not getattr(a, "quiet", False):
        print("mode      chunk-wise (the cube would not fit comfortably in memory)")
    if recipe is not None:
        m = recipe.apply_keeping_background(m)[2] if background else recipe.apply(m)[0]
    return m, library


def _write(a, m, results, lines):
    from .core.provenance import Step
    from .export.atomic import output_transaction
    from .export.bundle import safe_name, write_bundle, write_summary

    out = Path(a.out)
    if out.exists() and not out.is_dir():
        raise MapkitError("the output path is a file, not a folder", file=out,
                          fix="give a folder for the outputs")
    out.mkdir(parents=True, exist_ok=True)
    final = m.derive(m.intensity, Step(a.command, {k: v for k, v in vars(a).items()
                                                   if k not in ("func",)}))
    with output_transaction(out):   # the bundle and its summary replace the old ones together
        written = write_bundle(out, final, results, stem=safe_name(Path(a.map).stem),
                               overwrite=a.overwrite, figures=not a.no_figures,
                               inputs={"map": a.map}, formats=_formats(a))
        written.append(write_summary(out, {"map": str(a.map), "command": a.command,
                                           "results": {r.name: r.summary for r in results}}))
    for line in lines:
        print(line)
    print(f"wrote     {len(written)} files to {out}/ (results in {written[0]})")
