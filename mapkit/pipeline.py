"""The end-to-end path: open → clean → reduce → quantify → export, in one call.

:func:`analyse` is what ``mapkit analyse`` and ``mapkit demo`` run; every
number it writes comes from the stage modules, so Python, the command line
and the viewer agree.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np

from . import layout
from .core.provenance import Step, library_versions
from .core.result import Axis, Field, Result
from .errors import MapkitError


COMPONENT_METHODS = ("mcr", "nmf")
CLASS_METHODS = ("dominant", "kmeans", "minibatch", "ward")


@dataclass
class Settings:
    """Parameters of the end-to-end path (all recorded in every output)."""

    bands: list = field(default_factory=list)
    normalisation: str = "vector"
    n_components: int = 4
    #: "mcr": MCR-ALS with a polynomial background per pixel on the despiked spectra;
    #: "nmf": NMF of the baseline-corrected spectra
    component_method: str = "mcr"
    #: "dominant" (each pixel joins its dominant component) or a clustering method
    #: ("kmeans", "minibatch", "ward") of the spectra's shapes
    class_method: str = "dominant"
    #: classes for the clustering methods (None: as many as components)
    n_classes: int | None = None
    seed: int = 0
    #: polynomial baseline terms fitted with the references; "auto": chosen by the data
    unmix_baseline_order: int | str | None = "auto"
    #: baseline terms of an unmixing response fitted to standards (stored in the model)
    content_baseline_order: int = 5
    analyte: str | None = None
    calibration_model: str = "linear"
    weighting: str = "none"
    response_band: tuple | None = None
    internal_standard: tuple | None = None
    memory_fraction: float = 0.5
    min_score: float = 0.9


def _memory_available() -> int:
    from .stream import memory_available

    return memory_available()


def _sha(path):
    from .export.nexus import file_sha256

    return file_sha256(path)


def quantification_model(standards, library, recipe, settings):
    """Fit the quantification model the settings ask for from a standards file."""
    from .quantify import QuantModel, Response
    from .read.calibration_set import read_calibration_set

    cs = read_calibration_set(standards)
    analyte = settings.analyte or cs.analyte
    if (settings.calibration_model != "pls" and settings.response_band is None
            and library is not None):   # the unmixing fraction: the analyte is a reference
        names = [r.name for r in library]
        if not settings.analyte and not cs.analyte_named:
            raise MapkitError("the standards file does not name its analyte", file=standards,
                              field="# analyte:", fix=f"add a line '# analyte: NAME; unit: UNIT' "
                              f"with NAME one of {', '.join(names)}, or pass --analyte NAME")
        if analyte not in names:
            raise MapkitError(f"the analyte {analyte!r} is not among the references "
                              f"({', '.join(names)})", file=standards,
                              field="--analyte" if settings.analyte else "# analyte:",
                              fix="name the reference spectrum of the analyte")
    if settings.calibration_model == "pls":
        response = Response("spectrum", analyte)
    elif settings.response_band is not None:
        response = Response("band", analyte, band=tuple(settings.response_band),
                            internal_standard=None if settings.internal_standard is None
                            else tuple(settings.internal_standard))
    else:
        if library is None:
            raise MapkitError("calibration standards need a reference library to unmix against",
                              field="--standards", fix="pass --library too, or --response-band")
        response = Response("unmix_fraction", analyte, references=tuple(r.name for r in library),
                            baseline_order=settings.content_baseline_order)
    return QuantModel.fit(cs, response, model=settings.calibration_model,
                          weighting=settings.weighting, library=library, recipe=recipe)


def analyse(map_path, outdir, *, library=None, standards=None, settings: Settings | None = None,
            overwrite: bool = False, progress: bool = True, figures: bool = True,
            open_kwargs: dict | None = None, recipe=None, model=None,
            regions: dict | None = None, formats=("png",), optical: dict | None = None) -> dict:
    """Run the whole path on one map file and write every output into ``outdir``.

    ``recipe`` (a :class:`~mapkit.preprocess.recipe.Recipe`, default: mask bad pixels,
    despike, arPLS baseline) cleans the map before every reduction. Returns a dict with the
    paths written and a summary of the results.

    Content maps come from ``model`` (a saved :class:`~mapkit.quantify.QuantModel`) or from
    a model fitted to ``standards``; ``regions`` (name → polygon vertices in µm) get their
    own statistics, as do the classes.

    ``optical`` places a micrograph under the maps: ``{"image": path, "pixel_size": µm or
    (dx, dy), "origin": (x0, y0), "control_points": CSV path, "transform": "similarity" or
    "affine"}`` (all but ``image`` optional); it is checked before anything is written.
    """
    from .preprocess.recipe import Recipe
    from tqdm.auto import tqdm

    from .export.bundle import safe_name, write_bundle, write_summary
    from .preprocess.quality import snr
    from .quantify import class_regions, polygon_mask, region_statistics
    from .read import open_map, read_library
    from .reduce import band_image

    s = settings or Settings()
    if s.component_method not in COMPONENT_METHODS:
        raise MapkitError(f"unknown component method {s.component_method!r}",
                          field="component_method", fix=f"use one of {', '.join(COMPONENT_METHODS)}")
    if s.class_method not in CLASS_METHODS:
        raise MapkitError(f"unknown class method {s.class_method!r}", field="class_method",
                          fix=f"use one of {', '.join(CLASS_METHODS)}")
    if s.class_method == "dominant" and s.n_classes not in (None, s.n_components):
        raise MapkitError("dominant-component classes come one per component",
                          field="--classes", fix="drop --classes, or add --class-method kmeans")
    outdir = Path(outdir)
    if outdir.exists() and not outdir.is_dir():
        raise MapkitError("the output path is a file, not a folder", file=outdir,
                          fix="give a folder for the outputs")
    if not overwrite and (outdir / "results.h5").exists():   # before any work, not after it
        raise MapkitError("the output file exists (from an earlier run)",
                          file=outdir / "results.h5", field="--out",
                          fix="choose another --out folder or pass --overwrite")
    placed, optical_notices = (None, []) if optical is None else place_optical(
        optical, open_map_axes(map_path, open_kwargs))
    outdir.mkdir(parents=True, exist_ok=True)
    recipe = recipe or Recipe.default()
    stages = ["read"] + [name for name, _ in recipe.steps] + [
        "bands", "components", "classes", "unmixing", "concentration", "write"]
    bar = tqdm(total=len(stages), desc="mapkit", unit="step", disable=not progress, leave=False)

    def stage(name):
        bar.set_postfix_str(name)

    # library, standards and model are read before the cube, so their errors come first
    refs = read_library(library) if library is not None else None
    if model is not None and standards is not None:
        raise MapkitError("give either standards to fit a model or a saved model, not both",
                          field="--model-file", fix="drop one of --standards and --model-file")
    if standards is not None:
        model = quantification_model(standards, refs, recipe, s)
    if model is not None:
        model.check_recipe(recipe)
        if s.analyte and s.analyte != model.analyte:
            raise MapkitError(f"the model quantifies {model.analyte!r}, not {s.analyte!r}",
                              field="--analyte", fix="use a model made for that analyte")

    stage("read")
    raw = open_map(map_path, **{"block_bytes": layout.READ_BYTES, **(open_kwargs or {})})
    # the axis alone, before the cube is read: a crop too narrow for NMF or unmixing, or a
    # library that does not cover what the recipe leaves, fails here with the recipe line
    label = {"mcr": "MCR-ALS", "nmf": "NMF"}[s.component_method]
    need, why = s.n_components, f"{label} with {s.n_components} components"
    if refs:
        from .reduce.unmix import baseline_terms

        terms = baseline_terms(s.unmix_baseline_order)
        if len(refs) + terms + 1 > need:
            need, why = len(refs) + terms + 1, f"unmixing {len(refs)} references with {terms} " \
                                                "baseline terms"
    axis_notes = []
    recipe.check_axis(raw.raman_shift, need=need, why=why, library=refs, notes=axis_notes)
    need = raw.n_pixels * raw.shape[-1] * 8 * 4  # float64 working copies of the cube
    if need > s.memory_fraction * _memory_available():
        raise MapkitError(f"the map needs about {need / 2**30:.1f} GiB to process in memory",
                          file=map_path, field="intensity",
                          fix="crop or bin the map first; chunk-wise processing is not available yet")
    m = raw.load()
    bar.update()

    def step_progress(name):
        stage(name)
        bar.update()

    # unmixing and background MCR fit the fluorescence themselves: the map before the baseline
    corrected, extras, with_background = recipe.apply_keeping_background(
        m, progress=step_progress)
    bad_report = extras.get("mask_bad_pixels", {}).get("report",
                                                       {"nonfinite": 0, "dead": 0, "saturated": 0})
    spikes = extras.get("despike", {}).get("spikes")

    results: list[Result] = []
    stage("bands")
    for name, lo, hi in s.bands:
        try:
            results.append(band_image(corrected, lo, hi, name=name))
        except MapkitError as exc:
            raise MapkitError(exc.problem, file=map_path, field=f"--band {name}:{lo:g}-{hi:g}",
                              fix=exc.fix) from None
    bar.update()
    # the same calls as the reduction subcommands and the viewer make (one place for each)
    stage("components")
    if s.component_method == "mcr":   # fits the background itself: the despiked map
        comp_result, = run_method(with_background, "mcr_background", n=s.n_components,
                                 seed=s.seed, library=refs, min_score=s.min_score)
    else:
        comp_result, = run_method(corrected, "nmf", n=s.n_components, seed=s.seed,
                                 library=refs, min_score=s.min_score)
    results.append(comp_result)
    bar.update()
    stage("classes")
    if s.class_method == "dominant":
        km_result, = run_method(corrected, "dominant", n=s.n_components, library=refs,
                                images=comp_result.fields["images"].data, name="classes",
                                spectra=comp_result.fields["spectra"].data,
                                min_score=s.min_score)
    else:
        km_result, = run_method(corrected, s.class_method, n=s.n_classes or s.n_components,
                                seed=s.seed, library=refs, normalisation=s.normalisation,
                                name="classes", min_score=s.min_score)
    results.append(km_result)
    bar.update()
    stage("unmixing")
    from .read.dispatch import read_notes

    notices = list(optical_notices) + read_notes(raw) + axis_notes
    calibration = None
    if refs is not None:
        unmix_result, = run_method(with_background, "unmix", library=refs,
                                   baseline_order=s.unmix_baseline_order)
        notices += unmix_result.summary.pop("notices", [])
        results.append(unmix_result)
    bar.update()
    stage("concentration")
    if model is not None:
        conc = model.apply(corrected, refs)
        calibration = model.calibration
        region_masks = class_regions(km_result.fields["labels"].data,
                                     list(km_result.summary["areas"]))
        for name, verts in (regions or {}).items():
            region_masks[name] = polygon_mask(corrected.x, corrected.y, verts)
        conc.summary["regions"] = region_statistics(conc.fields["concentration"].data,
                                                    conc.fields["flags"].data, region_masks)
        results.append(conc)
    bar.update()

    from .reduce._common import image_axes

    img_axes = image_axes(corrected)      # (y, x), (z, x) or (z, y, x)
    ns = corrected.shape[-1]
    snr_img = snr(np.asarray(corrected.intensity, float).reshape(-1, ns)).reshape(
        corrected.shape[:-1])
    snr_img[corrected.mask] = np.nan
    quality = {
        "snr": Field("snr", snr_img, img_axes, "", long_name="signal-to-noise ratio"),
        "mask": Field("bad_pixel", corrected.mask.astype(np.uint8), img_axes, "",
                      long_name="1 = masked (dead, saturated or non-finite)")}
    quality_summary = {"snr_median": float(np.nanmedian(snr_img)),
                       "masked": int(corrected.mask.sum())}
    conv = extras.get("baseline", {}).get("converged")
    if conv is not None and conv.shape == corrected.mask.shape:
        # iterative baselines that stopped at max_iter are reported, not hidden
        quality["baseline_converged"] = Field("baseline_converged", conv.astype(np.uint8),
                                              img_axes, "", long_name="1 = baseline converged")
        quality_summary["baseline_not_converged"] = int((~conv & ~corrected.mask).sum())
    results.append(Result("quality", "quality", {}, quality, quality_summary))
    spike_summary = {"channels_replaced": 0, "spectra_touched": 0}
    if spikes is not None and spikes.shape[:-1] == corrected.shape[:-1]:
        spikes = np.asarray(spikes)
        spike_summary = {"channels_replaced": int(spikes.sum()),
                         "spectra_touched": int(spikes.any(axis=-1).sum())}
        spike_axes = img_axes + (Axis("raman_shift", m.raman_shift, "1/cm"),)
        if spikes.shape[-1] == m.raman_shift.size:
            results.append(Result("spikes", "despike", dict(recipe.steps)["despike"],
                                  {"replaced": Field("replaced", spikes.astype(np.uint8),
                                                     spike_axes, "",
                                                     long_name="1 where a cosmic-ray spike "
                                                               "was replaced")},
                                  spike_summary))

    stage("write")
    run_step = Step("analyse", {"settings": asdict(s), "library": str(library) if library else None,
                                "standards": str(standards) if standards else None,
                                "recipe": recipe.text,
                                **({"optical": optical} if optical is not None else {})})
    final = corrected.derive(corrected.intensity, run_step)
    inputs = {"map": map_path}
    if standards is not None:
        inputs["standards"] = standards
    if placed is not None:
        inputs["optical"] = optical["image"]
        if optical.get("control_points"):
            inputs["control_points"] = optical["control_points"]
    if model is not None:
        written_model = model.save(outdir / "quant_model.json", overwrite=True)
    written = write_bundle(outdir, final, results, stem=safe_name(Path(map_path).stem),
                           overwrite=overwrite, figures=figures, inputs=inputs, formats=formats,
                           optical=placed)
    summary = {"map": str(map_path), "shape": list(raw.shape), "bad_pixels": bad_report,
               "spikes": spike_summary, "notices": notices, "recipe": recipe.text,
               "results": {r.name: r.summary for r in results if r.summary},
               "settings": asdict(s), "versions": library_versions()}
    if placed is not None:
        summary["optical"] = optical_summary(placed)
    written.append(write_summary(outdir, summary))
    from .export.report import write_report

    written.append(write_report(
        outdir / "report.html", map_name=Path(map_path).name, summary=summary, results=results,
        model=model, recipe_text=recipe.text, provenance=final.provenance, optical=placed,
        inputs={role: {"path": Path(p).name, "sha256": _sha(p)} for role, p in inputs.items()}))
    bar.update()
    bar.close()
    if model is not None:
        written.append(written_model)
    return {"written": [Path(p) for p in written], "summary": summary, "results": results,
            "calibration": calibration, "model": model}


def open_map_axes(map_path, open_kwargs=None):
    """(x, y) axes of a map in µm, read lazily (the cube stays on disk)."""
    from .read import open_map

    m = open_map(map_path, **{"block_bytes": layout.READ_BYTES, **(open_kwargs or {})})
    return m.x, m.y


def place_optical(optical: dict, axes):
    """Read, check and place a micrograph on a map with axes ``(x, y)``; (placed, notices).

    The same call for ``mapkit analyse --optical`` and the subcommand that adds a
    micrograph to an existing results file.
    """
    from .read.optical import read_control_points, read_optical
    from .register import place_image

    image = read_optical(optical["image"], pixel_size=optical.get("pixel_size"),
                         origin=optical.get("origin"), max_bytes=optical.get("max_bytes"))
    cp = optical.get("control_points")
    pairs = read_control_points(cp, image) if cp else None
    return place_image(image, axes[0], axes[1], pairs, kind=optical.get("transform", "similarity"),
                       source=cp)


def optical_summary(placed) -> dict:
    """The micrograph's provenance and registration, for summary.json and the report."""
    out = {**placed.image.provenance(), "matrix": np.asarray(placed.matrix).tolist()}
    if placed.registration:
        reg = placed.registration
        out["registration"] = {k: reg[k] for k in ("transform", "pairs", "rms_um",
                                                    "residuals_um") if k in reg}
    return out


#: methods that fit the background themselves and take the map before the baseline step
FITS_BACKGROUND = ("mcr_background", "unmix", "fcls")
METHODS = ("nmf", "mcr", "mcr_background", "pca", "kmeans", "minibatch", "ward", "dominant", "unmix", "fcls",
           "content")


def run_method(m, method: str, *, n: int = 4, seed: int = 0, library=None, model=None,
               init: str = "nndsvda", closure: bool = False, smooth: float = 0.0,
               baseline_order: int | str | None = "auto", min_score: float = 0.9,
               images=None, spectra=None, normalisation: str = "vector",
               name: str = "classes", weights: str = "poisson"):
    """Run one reduction or quantification method on a cleaned map; returns its Results.

    The command line's ``analyse``, ``components``, ``classes`` and ``unmix`` subcommands
    and the napari analysis panel all call this, so they give the same numbers.
    ``normalisation`` and ``name`` apply to the classifications (spectra are normalised
    before clustering; ``name`` is the result's name). ``"dominant"`` classes follow the
    largest of the component ``images`` (default: those of an NMF of ``m`` with ``n``
    components) and are named by matching the components' ``spectra`` (default: the class
    means); ``baseline_order`` is the unmixing's ("auto": chosen by the data).
    """
    import warnings

    from .preprocess import normalise_map
    from .reduce import (MCRALS, BackgroundMCR, DominantClasses, KMeansClasses, NMFComponents,
                         PCAScores, ReferenceUnmixing)
    from .reduce import match_library

    if method not in METHODS:
        raise MapkitError(f"unknown method {method!r}", field="method",
                          fix=f"use one of {', '.join(METHODS)}")
    names = [f"component {i + 1}" for i in range(n)]
    if method == "pca":
        return [PCAScores(n_components=n, random_state=seed).fit(m).result(m)]
    if method in ("nmf", "mcr", "mcr_background"):
        if method == "nmf":
            est = NMFComponents(n_components=n, init=init, random_state=seed).fit(m)
        elif method == "mcr_background":
            est = BackgroundMCR(n_components=n, random_state=seed).fit(m)
        else:
            est = MCRALS(n_components=n, init=init if init != "nndsvda" else "vca",
                         closure=closure, random_state=seed).fit(m)
        res = est.result(m, est.fit_images_)
        if library:
            res.summary["identification"] = match_library(est.components_, m.raman_shift,
                                                          library, names=names,
                                                          min_score=min_score)
        return [res]
    if method == "dominant":
        if images is None:   # the components of an NMF of this map
            fields = run_method(m, "nmf", n=n, seed=seed)[0].fields
            images, spectra = fields["images"].data, fields["spectra"].data
        dom = DominantClasses(n_classes=len(images)).fit(m, images)
        res = dom.result(m, name=name)
        if library:   # class k is component k: its spectrum names it
            res.summary["identification"] = match_library(
                dom.class_mean_ if spectra is None else spectra, m.raman_shift, library,
                names=list(res.summary["areas"]), min_score=min_score)
        return [res]
    if method in ("kmeans", "minibatch", "ward"):
        normed = normalise_map(m, method=normalisation)
        km = KMeansClasses(n_classes=n, method=method, smooth=smooth, random_state=seed)
        res = km.fit(normed).result(normed, name=name)
        if library:
            res.summary["identification"] = match_library(km.class_mean_, m.raman_shift, library,
                                                          names=list(res.summary["areas"]),
                                                          min_score=min_score)
        return [res]
    if method in ("unmix", "fcls"):
        if not library:
            raise MapkitError("unmixing needs reference spectra", field="library",
                              fix="choose a library folder")
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            un = ReferenceUnmixing(library, baseline_order=baseline_order, weights=weights,
                                   method="fcls" if method == "fcls" else "nnls").fit(m)
        res = un.result(m)
        res.summary["notices"] = [str(w.message) for w in caught]
        return [res]
    if model is None:
        raise MapkitError("a content map needs a quantification model", field="model",
                          fix="make one with 'mapkit calibrate' and choose its file")
    return [model.apply(m, library)]
