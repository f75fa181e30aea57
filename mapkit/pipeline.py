"""The end-to-end path: open → clean → reduce → quantify → export, in one call.

:func:`analyse` is what ``mapkit analyse`` and ``mapkit demo`` run; every
number it writes comes from the stage modules, so Python, the command line
and the viewer agree.
"""

from __future__ import annotations

import contextlib
import time
from dataclasses import asdict, dataclass, field, replace
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
    #: a number, or "auto": as many as stand above the shot noise
    #: (:func:`mapkit.reduce.choose_n_components`, on the spectra the fit sees)
    n_components: int | str = "auto"
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
            regions: dict | None = None, formats=("png",), optical: dict | None = None,
            chunked: bool = False, block_bytes: int | None = None, workers: int | None = None,
            address: str | None = None, notify=None) -> dict:
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

    Every map size runs this same code: read → clean → fit → images → quantities → write.
    The memory budget (``Settings.memory_fraction``) or ``block_bytes`` decides only how
    many blocks of rows the map is processed in and whether the estimators are fitted on a
    strided sample of the spectra (:func:`mapkit.stream.plan_blocks`); a map that fits is
    one block, cleaned in memory. ``chunked`` forces blocks; ``workers`` (a Dask
    ``LocalCluster``) or ``address`` (an existing scheduler) run the lazy cleaning there.
    ``notify`` (a callable) receives a line saying which, before the work starts.
    """
    from . import stream
    from .export.bundle import write_summary
    from .preprocess.recipe import Recipe
    from .read import open_map, read_library

    s = settings or Settings()
    if s.component_method not in COMPONENT_METHODS:
        raise MapkitError(f"unknown component method {s.component_method!r}",
                          field="component_method", fix=f"use one of {', '.join(COMPONENT_METHODS)}")
    if s.class_method not in CLASS_METHODS:
        raise MapkitError(f"unknown class method {s.class_method!r}", field="class_method",
                          fix=f"use one of {', '.join(CLASS_METHODS)}")
    if s.n_components != "auto" and (isinstance(s.n_components, bool) or not
                                     isinstance(s.n_components, (int, np.integer))
                                     or s.n_components < 1):
        raise MapkitError(f"the number of components must be a whole number >= 1 or auto, "
                          f"not {s.n_components!r}", field="--components",
                          fix="give a number such as 4, or auto")
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
    _check_table_size(map_path, s.memory_fraction)
    placed, optical_notices = (None, []) if optical is None else place_optical(
        optical, open_map_axes(map_path, open_kwargs))
    outdir.mkdir(parents=True, exist_ok=True)
    recipe = recipe or Recipe.default()

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

    raw = open_map(map_path, **{"block_bytes": layout.READ_BYTES, **(open_kwargs or {})})
    # the axis alone, before the cube is read: a crop too narrow for NMF or unmixing, or a
    # library that does not cover what the recipe leaves, fails here with the recipe line
    label = {"mcr": "MCR-ALS", "nmf": "NMF"}[s.component_method]
    from .reduce.factorise import AUTO_MIN

    need = AUTO_MIN if s.n_components == "auto" else s.n_components
    why = f"{label} with {need} components"
    if refs:
        from .reduce.unmix import baseline_terms

        terms = baseline_terms(s.unmix_baseline_order)
        if len(refs) + terms + 1 > need:
            need, why = len(refs) + terms + 1, f"unmixing {len(refs)} references with {terms} " \
                                                "baseline terms"
    axis_notes = []
    recipe.check_axis(raw.raman_shift, need=need, why=why, library=refs, notes=axis_notes)
    plan = stream.plan_blocks(raw, memory_fraction=s.memory_fraction, chunked=chunked,
                              block_bytes=block_bytes, cluster=bool(workers or address))
    if plan.chunked and not raw.is_lazy and not stream.fits_in_memory(raw, s.memory_fraction):
        raise MapkitError(f"the map needs about {raw.n_pixels * raw.shape[-1] * 32 / 2**30:.1f} "
                          "GiB to process in memory and only an HDF5 map can be processed "
                          "chunk by chunk", file=map_path, field="intensity",
                          fix=f"convert it first: mapkit convert {map_path} map.h5")
    t0 = time.perf_counter()
    with stream.dask_scheduler(workers, address) if plan.chunked else \
            contextlib.nullcontext("this process") as where:
        out = _analyse_blocks(map_path, outdir, raw, plan, where, s=s, refs=refs, model=model,
                              recipe=recipe, regions=regions, overwrite=overwrite,
                              progress=progress, figures=figures, formats=formats,
                              placed=placed, optical=optical, library=library,
                              standards=standards, notify=notify,
                              notices=list(optical_notices) + axis_notes)
    summary, results, written = out
    provenance = summary.pop("_provenance")
    from .export.report import write_report

    t1 = time.perf_counter()

    inputs = _inputs(map_path, standards, optical, placed, library)
    written.append(write_report(
        outdir / "report.html", map_name=Path(map_path).name, summary=summary, results=results,
        model=model, recipe_text=recipe.text, provenance=provenance, optical=placed,
        inputs={role: {"path": Path(p).name, "sha256": _sha(p)} for role, p in inputs.items()}))
    if model is not None:
        written.append(model.save(outdir / "quant_model.json", overwrite=True))
    summary["timings_s"]["report"] = time.perf_counter() - t1
    summary["seconds"] = time.perf_counter() - t0
    written.append(write_summary(outdir, summary))
    return {"written": [Path(p) for p in written], "summary": summary, "results": results,
            "calibration": model.calibration if model is not None else None, "model": model}


def _inputs(map_path, standards, optical, placed, library=None):
    # every file the results depend on, each recorded with its digest
    inputs = {"map": map_path}
    if library is not None:
        from .read.reference import library_files

        for p in library_files(library):
            inputs[f"library: {p.name}"] = p
    if standards is not None:
        inputs["standards"] = standards
    if placed is not None:
        inputs["optical"] = optical["image"]
        if optical.get("control_points"):
            inputs["control_points"] = optical["control_points"]
    return inputs


def _check_table_size(map_path, fraction):
    """A text table too large to read into memory is refused before it is read: only
    HDF5 maps can be processed chunk by chunk."""
    import h5py

    path = Path(map_path)
    if not path.is_file() or h5py.is_hdf5(path):
        return
    from .stream import WORKING_COPIES, memory_available

    # a table holds about 8 characters per value; processing takes WORKING_COPIES float64
    # copies of every value
    need = path.stat().st_size / 8 * 8 * WORKING_COPIES
    if need > fraction * memory_available():
        raise MapkitError(f"the table is too large to process in memory (about "
                          f"{need / 2**30:.1f} GiB) and only an HDF5 map can be processed "
                          "chunk by chunk", file=path, field="intensity",
                          fix=f"convert it first: mapkit convert {path} {path.stem}.h5")


def _identify(summary, spectra, shift, refs, names, min_score):
    from .reduce import match_library

    if refs:
        summary["identification"] = match_library(spectra, shift, refs, names=names,
                                                  min_score=min_score)


def _analyse_blocks(map_path, outdir, raw, plan, where, *, s, refs, model, recipe, regions,
                    overwrite, progress, figures, formats, placed, optical, library,
                    standards, notify, notices):
    """The analysis proper, for any number of blocks (see :func:`analyse`)."""
    import warnings

    from tqdm.auto import tqdm

    from . import stream
    from .export.bundle import safe_name, write_bundle
    from .export.nexus import _write_cube_from, _write_result, hash_in_background, results_file
    from .preprocess import normalise_map
    from .preprocess.quality import snr
    from .quantify import class_regions, polygon_mask, region_statistics
    from .quantify.concentration import concentration_map
    from .read.dispatch import read_notes
    from .reduce import BackgroundMCR, DominantClasses, KMeansClasses, NMFComponents
    from .reduce import ReferenceUnmixing, band_image
    from .reduce.unmix import unmixing_statistics
    from .reduce._common import image_axes

    bar = tqdm(total=3 * plan.n_blocks + 2, desc="mapkit", unit="step",
               disable=not progress, leave=False)
    timings = {}
    clock = [time.perf_counter()]

    def stage(name):
        bar.set_postfix_str(name)
        bar.update()

    def lap(name):   # seconds per stage, for the summary (where the time goes)
        now = time.perf_counter()
        timings[name] = timings.get(name, 0.0) + now - clock[0]
        clock[0] = now

    # clean: in memory for one block, lazily (Dask) for several
    m = raw if plan.chunked and raw.is_lazy else raw.load()
    corrected, extras, keep = recipe.apply_keeping_background(m)
    same = keep is corrected
    lap("recipe (lazy graph, bad-pixel mask)" if corrected.is_lazy else "recipe")
    bad_report = extras.get("mask_bad_pixels", {}).get("report",
                                                       {"nonfinite": 0, "dead": 0, "saturated": 0})
    spikes = extras.get("despike", {}).get("spikes")
    conv = extras.get("baseline", {}).get("converged")
    grid, ns = corrected.shape[:-1], corrected.shape[-1]   # (y, x), (z, x) or (z, y, x)
    ny, n_pixels = grid[0], int(np.prod(grid))
    if spikes is not None and tuple(spikes.shape) != corrected.shape:
        spikes = None          # a later step changed the grid or the axis
    if conv is not None and tuple(conv.shape) != grid:
        conv = None
    mask = corrected.mask
    n_good = int((~mask).sum())
    stride = plan.sample_stride(n_good)
    n_sample = len(range(0, n_good, stride)) if stride > 1 else n_good
    if notify:
        notify(plan.describe(stride, n_sample))

    def fetch(y0):
        """Blocks of rows y0:y0+rows of the cleaned cube, the cube before the baseline,
        the spike flags and the baseline's convergence (computed together: shared work)."""
        sl = slice(y0, y0 + plan.rows)
        parts = [corrected.intensity[sl], None if same else keep.intensity[sl],
                 None if spikes is None else spikes[sl], None if conv is None else conv[sl]]
        if corrected.is_lazy:
            import dask

            lazy = [p for p in parts if p is not None and hasattr(p, "compute")]
            done = iter(dask.compute(*lazy))
            parts = [next(done) if p is not None and hasattr(p, "compute") else p for p in parts]
        return [None if p is None else np.asarray(p) for p in parts]

    run_step = Step("analyse", {"settings": asdict(s), "library": str(library) if library else None,
                                "standards": str(standards) if standards else None,
                                "recipe": recipe.text, "blocks": plan.n_blocks,
                                "block_rows": plan.rows, "sample_stride": stride,
                                "scheduler": where,
                                **({"optical": optical} if optical is not None else {})})
    final = corrected.derive(corrected.intensity, run_step)
    inputs = _inputs(map_path, standards, optical, placed, library)
    if plan.n_blocks > 1:    # a long run: its inputs are hashed while it cleans, once
        hash_in_background(list(inputs.values()))
    snr_img = np.full(grid, np.nan)
    conv_img = np.ones(grid, bool)
    record = stream.SpikeRecord(grid)
    rng = np.random.default_rng(s.seed)
    sample_c, sample_k = [], []
    # the cleaned spectra's sample enters a fit only with NMF or clustered classes (the
    # default background MCR, dominant classes and unmixing fit the spectra before the
    # baseline step): otherwise it is not gathered, and the fits' peak memory is lower
    need_c = same or s.component_method != "mcr" or s.class_method != "dominant"
    scratch = outdir / f".{Path(map_path).stem}.background.part.h5"
    import h5py

    with results_file(outdir / "results.h5", final, overwrite=overwrite, inputs=inputs,
                      optical=placed) as f, \
            (h5py.File(scratch, "w") if plan.n_blocks > 1 else contextlib.nullcontext(None)) \
            as scratch_file:
        try:
            # pass 1: clean block by block; one writer stores the cube; keep a sample
            def cleaned():
                # (computing the next block in a background thread while this one is
                # written was measured: 1.8x on this stage on a saturated machine, but the
                # whole run's peak RSS rose from 1.39 to 1.97 GiB at 1000 x 1000 x 1024;
                # not kept, benchmarks/RESULTS.md)
                for y0 in plan.starts:
                    c, k, sp, cv = fetch(y0)
                    rows = c.shape[0]
                    g = ~mask[y0:y0 + rows].ravel()
                    yield y0, c.astype(np.float32, copy=False)
                    flat = c.reshape(-1, ns)
                    snr_blk = np.full(g.size, np.nan)
                    snr_blk[g] = snr(flat)[g]   # every row (no copy of the good ones)
                    snr_img[y0:y0 + rows] = snr_blk.reshape((rows,) + grid[1:])
                    if cv is not None:
                        conv_img[y0:y0 + rows] = cv
                    if sp is not None:
                        record.add(y0, sp & ~mask[y0:y0 + rows, ..., None])
                    store_c.put(y0, c)
                    if not same:
                        store_k.put(y0, k)
                    if stride > 1:
                        pick = np.flatnonzero(g)[int(rng.integers(stride))::stride]
                        if need_c:
                            sample_c.append(flat[pick].copy())
                        if not same:
                            sample_k.append(k.reshape(-1, ns)[pick].copy())
                    stage("cleaning")
                    del c, k, sp, cv, flat   # this block's arrays go before the next arrives

            one = plan.n_blocks == 1
            store_c = stream.BlockStore(one, write=False)   # multi-block: the results cube
            store_k = stream.BlockStore(one or same, None if one or same else
                                        scratch_file.create_dataset(
                                            "background", shape=corrected.shape,
                                            dtype="float32",
                                            chunks=layout.cube_tile(corrected.shape)))
            store_c.dataset = _write_cube_from(f, corrected, cleaned())
            # fit: on the whole map (one block, no sample) or on the sample
            if stride == 1 and plan.n_blocks == 1:
                fit_c = stream.block_map(corrected, store_c.get(0, ny), 0)
                fit_k = fit_c if same else stream.block_map(keep, store_k.get(0, ny), 0)
            else:
                if stride == 1:        # every good spectrum, in order: the same fit
                    Sc = np.concatenate([store_c.get(y0, plan.rows).reshape(-1, ns)[
                        ~mask[y0:y0 + plan.rows].ravel()] for y0 in plan.starts]) \
                        if need_c else None
                    Sk = Sc if same else np.concatenate(
                        [store_k.get(y0, plan.rows).reshape(-1, ns)[
                            ~mask[y0:y0 + plan.rows].ravel()] for y0 in plan.starts])
                else:
                    Sc = np.concatenate(sample_c) if need_c else None
                    Sk = Sc if same else np.concatenate(sample_k)
                sample_c.clear()
                sample_k.clear()
                fit_c = stream.sample_map(corrected, Sc) if need_c else None
                fit_k = fit_c if same else stream.sample_map(keep, Sk)
                del Sc, Sk
                stream.release_freed_memory()   # before the fits, the run's peak
            lap("clean, write cube, sample")
            if s.n_components == "auto":   # from the despiked spectra the fit sees
                s = replace(s, n_components=_components_of(keep, fit_k, notices))
                lap("number of components")
            names = [f"component {i + 1}" for i in range(s.n_components)]
            if s.component_method == "mcr":   # fits the background itself: the despiked map
                comp = BackgroundMCR(n_components=s.n_components, random_state=s.seed)
                start = None
                if stride > 1:   # the purest pixels of every block, the sweeps on the sample
                    def background_blocks():
                        for y0 in plan.starts:
                            blk = (store_c if same else store_k).get(y0, plan.rows)
                            yield blk.reshape(-1, ns)[~mask[y0:y0 + blk.shape[0]].ravel()]

                    start = comp.start_from_blocks(background_blocks, keep.raman_shift)
                comp.fit(fit_k, start=start)
            else:
                comp = NMFComponents(n_components=s.n_components, random_state=s.seed).fit(fit_c)
            comp_on_k = s.component_method == "mcr"
            if s.class_method != "dominant":
                km = KMeansClasses(n_classes=s.n_classes or s.n_components, method=s.class_method,
                                   random_state=s.seed).fit(
                    normalise_map(fit_c, method=s.normalisation))
            unmix = None
            if refs is not None:
                with warnings.catch_warnings(record=True) as caught:
                    warnings.simplefilter("always")
                    unmix = ReferenceUnmixing(refs, baseline_order=s.unmix_baseline_order,
                                              weights="poisson").fit(fit_k)
                notices += [str(w.message) for w in caught]
            del fit_c, fit_k
            stage("fit")
            lap("fit")
            # pass 2: apply the fitted estimators block by block; the per-pixel results of
            # several blocks wait in the scratch file, not in memory (peak memory stays
            # flat as the map grows)
            images = np.full((s.n_components, *grid), np.nan)
            labels = np.full(grid, -1, np.int16)

            def parts(name):
                return stream.BlockParts(corrected, None if scratch_file is None
                                         else scratch_file.create_group(name))

            band_parts = {name: parts(f"band {i}") for i, (name, _, _) in enumerate(s.bands)}
            unmix_parts, conc_parts = parts("unmixing"), parts("concentration")
            for y0 in plan.starts:
                bc = stream.block_map(corrected, store_c.get(y0, plan.rows), y0)
                bk = bc if same else stream.block_map(keep, store_k.get(y0, plan.rows), y0)
                rows = bc.shape[0]
                for name, lo, hi in s.bands:
                    try:
                        band_parts[name].add(y0, band_image(bc, lo, hi, name=name))
                    except MapkitError as exc:
                        raise MapkitError(exc.problem, file=map_path,
                                          field=f"--band {name}:{lo:g}-{hi:g}",
                                          fix=exc.fix) from None
                images[:, y0:y0 + rows] = comp.transform(bk if comp_on_k else bc)
                if s.class_method != "dominant":
                    labels[y0:y0 + rows] = km.predict(normalise_map(bc, method=s.normalisation))
                if unmix is not None:
                    unmix_parts.add(y0, unmix.result(bk))
                if model is not None:
                    conc_parts.add(y0, model.apply(bc, refs))
                stage("images")
            del bc, bk
            lap("apply by blocks")
            results = [band_parts.pop(name).stitched() for name, _, _ in s.bands]
            comp_result = comp.result(corrected, images)
            _identify(comp_result.summary, comp.components_, corrected.raman_shift, refs, names,
                      s.min_score)
            results.append(comp_result)
            # classes: labels from the images (dominant) or the clustering; class spectra
            # gathered block by block
            n_cls = s.n_components if s.class_method == "dominant" else (s.n_classes or s.n_components)
            good = ~mask.ravel()
            if s.class_method == "dominant":
                cls = DominantClasses(n_classes=s.n_components)
                shares = cls.shares_of(images, good)
                lab = np.full(n_pixels, -1, np.int16)
                lab[good] = cls.labels_of(shares, good, grid)
                labels = lab.reshape(grid)
                del shares   # only the labels are written (no shares_ image kept)
                for k in cls.never_pure():
                    notices.append(
                        f"classes: component {k + 1} is never close to pure on this map (at "
                        f"its purest pixels the other components hold "
                        f"{100 * cls.mixing_at_purest_[k]:.0f} % of the shares), so its pure "
                        f"level is underestimated and class {k + 1}'s area is likely "
                        "overstated; read its abundance image (or the unmixing) instead")
            else:
                cls = km
            stats = stream.ClassStats(n_cls, ns)
            for y0 in plan.starts:
                bc = stream.block_map(corrected, store_c.get(y0, plan.rows), y0)
                if s.class_method != "dominant":
                    bc = normalise_map(bc, method=s.normalisation)
                g = ~bc.mask.ravel()
                lab = labels[y0:y0 + bc.shape[0]].ravel()[g]
                stats.add(np.asarray(bc.intensity, float).reshape(-1, ns)[g], lab)
                stage("classes")
            del bc
            stats.store(cls, labels, corrected)
            km_result = cls.result(corrected, name="classes")
            if s.class_method == "dominant":
                km_result.summary["mixing_at_purest"] = [float(v) for v in
                                                         cls.mixing_at_purest_]
            _identify(km_result.summary, comp.components_ if s.class_method == "dominant"
                      else cls.class_mean_, corrected.raman_shift, refs,
                      list(km_result.summary["areas"]), s.min_score)
            results.append(km_result)
            if unmix is not None:
                joined = unmix_parts.stitched(sum_keys=("not_converged",))
                joined.summary.update(unmixing_statistics(joined))   # of the whole map
                results.append(joined)
            del unmix_parts
            if model is not None:
                x0 = conc_parts.stitched().fields["concentration"]
                del conc_parts
                conc = concentration_map(x0.data, x0.errors, model.calibration,
                                         image_axes(corrected), mask=mask)
                del x0
                conc.summary["response"] = model.response.to_dict()
                region_masks = class_regions(labels, list(km_result.summary["areas"]))
                for name, verts in (regions or {}).items():
                    region_masks[name] = polygon_mask(corrected.x, corrected.y, verts)
                conc.summary["regions"] = region_statistics(conc.fields["concentration"].data,
                                                            conc.fields["flags"].data,
                                                            region_masks)
                results.append(conc)
            img_axes = image_axes(corrected)
            snr_img[mask] = np.nan
            quality = {
                "snr": Field("snr", snr_img, img_axes, "", long_name="signal-to-noise ratio"),
                "mask": Field("bad_pixel", mask.astype(np.uint8), img_axes, "",
                              long_name="1 = masked (dead, saturated or non-finite)")}
            quality_summary = {"snr_median": float(np.nanmedian(snr_img)) if n_good else None,
                               "masked": int(mask.sum())}
            if conv is not None:
                # iterative baselines that stopped at max_iter are reported, not hidden
                quality["baseline_converged"] = Field(
                    "baseline_converged", conv_img.astype(np.uint8), img_axes, "",
                    long_name="1 = baseline converged")
                quality_summary["baseline_not_converged"] = int((~conv_img & ~mask).sum())
            results.append(Result("quality", "quality", {}, quality, quality_summary))
            spike_summary = {"channels_replaced": 0, "spectra_touched": 0}
            if spikes is not None:
                spike_result, spike_summary = record.result(corrected,
                                                            dict(recipe.steps)["despike"])
                results.append(spike_result)
            lap("classes, quality")
            for r in results:
                _write_result(f, r)
        finally:
            if scratch.exists():
                scratch.unlink()
    bar.close()
    notices = notices + read_notes(raw)
    csv = n_pixels <= stream.LONG_TABLE_MAX_PIXELS
    if not csv:
        notices.append(f"the per-pixel table ({n_pixels} pixels) is not written above "
                       f"{stream.LONG_TABLE_MAX_PIXELS} pixels; every map is in results.h5 "
                       "and the TIFFs")
    lap("write results file")
    written = [outdir / "results.h5"] + write_bundle(
        outdir, final, results, stem=safe_name(Path(map_path).stem), overwrite=overwrite,
        figures=figures, formats=formats, optical=placed, write_h5=False, csv=csv)
    lap("TIFFs, table, figures")
    summary = {"map": str(map_path), "shape": list(raw.shape), "bad_pixels": bad_report,
               "spikes": spike_summary, "notices": notices, "recipe": recipe.text,
               "mode": "chunk-wise" if plan.chunked else "in memory",
               "plan": {"reason": plan.reason, "blocks": plan.n_blocks, "block_rows": plan.rows,
                        "sample_stride": stride, "sample_spectra": n_sample},
               "scheduler": where, "timings_s": timings,
               "results": {r.name: r.summary for r in results if r.summary},
               "settings": asdict(s), "versions": library_versions()}
    if placed is not None:
        summary["optical"] = optical_summary(placed)
    summary["_provenance"] = final.provenance
    return summary, results, written


#: At most this many spectra (strided) go into the choice of the number of components:
#: enough for a component of 0.1 % of them to reach the noise edge, and seconds of work.
GUIDANCE_SPECTRA = 50_000


def _components_of(keep, fit_k, notices) -> int:
    """``n_components="auto"``: the number from the spectra the fit sees (``fit_k``, the
    map or its sample, before the baseline step), with a notice saying how it was found."""
    from . import stream
    from .reduce import choose_n_components
    from .reduce._common import good_spectra

    m = fit_k
    n_good = int((~np.asarray(fit_k.mask)).sum())
    if n_good > GUIDANCE_SPECTRA:   # (the guidance copies its spectra itself otherwise)
        X, _ = good_spectra(fit_k, what="the choice of the number of components")
        m = stream.sample_map(keep, X[::-(-n_good // GUIDANCE_SPECTRA)])
    k, line = choose_n_components(m)
    notices.append(line)
    return k


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
    from .reduce.unmix import unmixing_statistics

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
        res.summary.update(unmixing_statistics(res))
        return [res]
    if model is None:
        raise MapkitError("a content map needs a quantification model", field="model",
                          fix="make one with 'mapkit calibrate' and choose its file")
    return [model.apply(m, library)]
