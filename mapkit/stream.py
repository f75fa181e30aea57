"""Maps larger than memory: the same recipe and methods, chunk by chunk, on threads or a cluster.

The cube stays on disk. The recipe runs lazily (Dask) and its result is written band by band
(a band = a block of rows) into the results file by this process alone (a single writer,
so HDF5 needs no parallel I/O), while a strided sample of the cleaned spectra is kept.
Factorisation and classification are fitted from that sample and refined by streaming
every band through scikit-learn's mini-batch estimators (``partial_fit``); component
images and class labels are then computed band by band. Peak memory is set by the band
size, not by the cube.
"""

from __future__ import annotations

import contextlib
import time
from pathlib import Path

import numpy as np

from . import layout
from .core.result import Axis, Field, Result
from .errors import MapkitError

#: bytes of float64 working data per band of rows (the knob that bounds memory)
BAND_BYTES = 128 << 20
SAMPLE_PIXELS = 20000


def memory_available() -> int:
    try:
        with open("/proc/meminfo") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    return 8 << 30


def fits_in_memory(m, fraction: float = 0.5) -> bool:
    """True when the in-memory path's working copies (≈ 4 float64 cubes) fit comfortably."""
    return m.n_pixels * m.shape[-1] * 8 * 4 <= fraction * memory_available()


def band_rows(m, band_bytes: int = BAND_BYTES) -> int:
    ny, nx, ns = m.shape
    tile = m.intensity.chunks[0][0] if m.is_lazy else 1
    rows = max(1, band_bytes // max(1, nx * ns * 8))
    return int(max(tile, (rows // tile) * tile)) if rows >= tile else int(rows)


@contextlib.contextmanager
def dask_scheduler(workers: int | None = None, address: str | None = None):
    """Run Dask work on a LocalCluster of ``workers`` processes, an existing scheduler at
    ``address``, or (neither) the local threads. Yields a description for the user."""
    if not workers and not address:
        yield "threads (this process)"
        return
    try:
        from distributed import Client, LocalCluster
    except ImportError:
        raise MapkitError("a Dask cluster needs the 'distributed' package", field="--workers",
                          fix="pip install distributed, or run without --workers") from None
    if address:
        client = Client(address)
        try:
            yield f"Dask scheduler at {address}"
        finally:
            client.close()
        return
    with LocalCluster(n_workers=int(workers), threads_per_worker=1, processes=True,
                      dashboard_address=None) as cluster, Client(cluster):
        yield f"LocalCluster, {workers} worker processes"


class _Progress:
    """Progress of the band passes with an estimate of the time left."""

    def __init__(self, total, enabled=True, label="mapkit"):
        from tqdm.auto import tqdm

        self.bar = tqdm(total=total, desc=label, unit="band", disable=not enabled, leave=False)

    def step(self, text):
        self.bar.set_postfix_str(text)
        self.bar.update()

    def close(self):
        self.bar.close()


def analyse_large(map_path, outdir, *, recipe=None, n_components: int = 4, n_classes: int = 4,
                  seed: int = 0, bands=(), workers: int | None = None, address: str | None = None,
                  overwrite: bool = False, figures: bool = True, progress: bool = True,
                  band_bytes: int = BAND_BYTES, epochs: int = 1, refine_stride: int = 4,
                  library=None, model=None, baseline_order: int | None = 5) -> dict:
    """Clean, factorise and classify a map chunk by chunk; write results like ``analyse``.

    ``bands`` (name, lo, hi) add band-integral images; ``library`` (reference spectra)
    adds abundance maps by NNLS with polynomial baseline terms; ``model`` (a saved
    :class:`~mapkit.quantify.QuantModel`) adds a content map with its uncertainty and flags.
    All are computed band by band in the same pass as the component images.

    Returns ``{"written": [...], "summary": {...}, "results": [...]}``.
    """
    from sklearn.cluster import KMeans, MiniBatchKMeans
    from sklearn.decomposition import NMF, PCA, MiniBatchNMF

    from .core.provenance import Step
    from .export.atomic import atomic_path
    from .export.bundle import safe_name, write_bundle, write_summary
    from .export.nexus import _write_cube_from, _write_provenance, _write_result, file_sha256
    from .preprocess.normalise import normalise
    from .preprocess.recipe import Recipe
    from .read import open_map
    from .reduce.segment import class_domains
    from .reduce.unmix import unmix_spectra

    recipe = recipe or Recipe.default()
    outdir = Path(outdir)
    outdir.mkdir(parents=True, exist_ok=True)
    t0 = time.perf_counter()
    with dask_scheduler(workers, address) as where:
        # tasks of a few MB, read in one call each: file-chunk-sized tasks would drown the
        # work in scheduling overhead
        raw = open_map(map_path, block_bytes=layout.READ_BYTES)
        if raw.dims != ("y", "x", "raman_shift"):
            raise MapkitError(f"the chunk-wise path takes (y, x) maps only, this is a {raw.kind}"
                              f" ({', '.join(raw.spatial_dims)})", file=map_path,
                              field="intensity", fix="process it in memory: crop the depth "
                              "range or bin the layers until it fits, and drop --chunked")
        if not raw.is_lazy:
            raise MapkitError("chunk-wise processing needs an HDF5 map", file=map_path,
                              field="intensity", fix="convert the table with 'mapkit convert'")
        if model is not None:
            model.check_recipe(recipe)
        clean, extras = recipe.apply(raw)        # lazy: nothing computed yet but the mask
        ny, nx, ns = clean.shape
        rows = band_rows(clean, band_bytes)
        starts = list(range(0, ny, rows))
        bar = _Progress(len(starts) * (2 + epochs), progress)
        good = ~clean.mask
        rng = np.random.default_rng(seed)
        stride = max(1, int(np.ceil(good.sum() / SAMPLE_PIXELS)))
        sample = []
        with atomic_path(outdir / "results.h5", overwrite=overwrite) as tmp:
            import h5py

            with h5py.File(tmp, "w") as f:
                def bands_of(dset):
                    for y0 in starts:
                        yield y0, np.asarray(dset[y0:y0 + rows], np.float64)

                # pass 1: compute the recipe band by band; one writer stores it
                def cleaned_bands():
                    for y0 in starts:
                        block = np.asarray(clean.intensity[y0:y0 + rows].compute(), np.float32)
                        g = good[y0:y0 + rows].ravel()
                        flat = block.reshape(-1, ns)[g]
                        offset = int(rng.integers(stride))
                        # a compact float32 copy: a view would keep the whole band alive
                        sample.append(flat[offset::stride].copy())
                        bar.step("cleaning")
                        yield y0, block

                dset = _write_cube_from(f, clean, cleaned_bands())
                S = np.concatenate(sample)
                sample.clear()
                # components: NMF on the sample, refined by mini-batches over every band
                Sc = np.clip(S, 0, None).astype(np.float64)
                base = NMF(n_components, init="nndsvda", random_state=seed, max_iter=400,
                           tol=1e-4).fit(Sc)
                mb = MiniBatchNMF(n_components, init="custom", random_state=seed,
                                  batch_size=4096, max_iter=1)
                H = base.components_.copy()
                if S.shape[0] < good.sum():   # the sample is not the whole map: refine on it all
                    mb.partial_fit(Sc, H=H, W=np.clip(base.transform(Sc), 1e-9, None))
                    for _ in range(epochs):   # every refine_stride-th spectrum of each band
                        for y0, block in bands_of(dset):
                            g = good[y0:y0 + rows].ravel()
                            flat = block.reshape(-1, ns)[g][::refine_stride]
                            mb.partial_fit(np.clip(flat, 0, None))
                            bar.step("components")
                    # a component the mini-batches emptied keeps its sample estimate
                    empty = ~np.any(mb.components_ > 0, axis=1)
                    H = np.where(empty[:, None], H, mb.components_)
                else:
                    bar.bar.update(len(starts) * epochs)
                H = H / np.where(H.max(axis=1, keepdims=True) > 0, H.max(axis=1, keepdims=True),
                                 1.0)
                del Sc
                # classes: PCA + k-means on the normalised sample, refined over every band
                Sn = normalise(S, clean.raman_shift, method="vector")
                solver = "covariance_eigh" if Sn.shape[0] >= Sn.shape[1] else "full"
                pca = PCA(n_components=min(8, Sn.shape[1], Sn.shape[0]), svd_solver=solver,
                          random_state=seed).fit(Sn)
                km0 = KMeans(n_clusters=n_classes, n_init=10, random_state=seed).fit(
                    pca.transform(Sn))
                kmb = MiniBatchKMeans(n_clusters=n_classes, init=km0.cluster_centers_, n_init=1,
                                      random_state=seed, batch_size=4096)
                kmb.partial_fit(pca.transform(Sn))
                del S, Sn
                # pass 2: images and labels band by band
                images = np.full((n_components, ny, nx), np.nan)
                extra = _Extras(clean, bands, library, model, baseline_order)
                labels = np.full((ny, nx), -1, np.int16)
                sums = np.zeros((n_classes, ns))
                sq = np.zeros((n_classes, ns))
                counts = np.zeros(n_classes, np.int64)
                for y0, block in bands_of(dset):
                    g = good[y0:y0 + rows]
                    flat = block.reshape(-1, ns)[g.ravel()]
                    # component images: a looser NNLS tolerance is ~3x faster and moves
                    # abundances by ~1e-8 relative (measured), far below the noise
                    A, _ = unmix_spectra(H, flat, clean.raman_shift, 0, tol=1e-6)
                    img = np.full((n_components, g.size), np.nan)
                    img[:, g.ravel()] = A
                    images[:, y0:y0 + rows] = img.reshape(n_components, *g.shape)
                    norm = normalise(flat, clean.raman_shift, method="vector")
                    lab = kmb.predict(pca.transform(norm))
                    lab_img = np.full(g.size, -1, np.int16)
                    lab_img[g.ravel()] = lab
                    labels[y0:y0 + rows] = lab_img.reshape(g.shape)
                    onehot = np.eye(n_classes)[lab]          # (n, k): far faster than add.at
                    sums += onehot.T @ norm
                    sq += onehot.T @ (norm * norm)
                    counts += np.bincount(lab, minlength=n_classes)
                    extra.add(y0, block.reshape(-1, ns)[g.ravel()], g)
                    bar.step("images")
                results = _stream_results(clean, H, images, labels, sums, sq, counts, n_classes,
                                          class_domains, extras) + extra.results()
                for r in results:
                    _write_result(f, r)
                step = Step("analyse_large", {"recipe": recipe.text, "n_components": n_components,
                                              "n_classes": n_classes, "seed": seed,
                                              "band_rows": rows, "epochs": epochs,
                                              "refine_stride": refine_stride,
                                              "sample_stride": stride, "scheduler": where})
                _write_provenance(f, clean.provenance + (step,),
                                  {"inputs": {"map": {"path": Path(map_path).name,
                                                      "sha256": file_sha256(map_path)}}})
        bar.close()
    final = open_map(outdir / "results.h5")
    written = [outdir / "results.h5"] + write_bundle(
        outdir, final, results, stem=safe_name(Path(map_path).stem), overwrite=overwrite,
        figures=figures, write_h5=False, csv=False)
    summary = {"map": str(map_path), "shape": [ny, nx, ns], "mode": "chunk-wise",
               "scheduler": where, "band_rows": rows, "seconds": time.perf_counter() - t0,
               "results": {r.name: r.summary for r in results if r.summary}}
    written.append(write_summary(outdir, summary))
    return {"written": written, "summary": summary, "results": results}


class _Extras:
    """Band images, abundance maps and content maps filled band by band."""

    def __init__(self, m, bands, library, model, baseline_order):
        ny, nx, _ = m.shape
        self.m, self.bands, self.library, self.model = m, list(bands), library, model
        self.order = baseline_order
        self.band_imgs = {name: np.full((ny, nx), np.nan) for name, _, _ in self.bands}
        if library:
            self.refs = np.stack([r.on_axis(m.raman_shift) for r in library])
            self.abundance = np.full((len(library), ny, nx), np.nan)
            self.residual = np.full((ny, nx), np.nan)
        if model is not None:
            self.x0 = np.full((ny, nx), np.nan)
            self.s_x0 = np.full((ny, nx), np.nan)

    def add(self, y0, spectra, good):
        from .reduce.bands import band_integral
        from .reduce.unmix import unmix_spectra

        rows = slice(y0, y0 + good.shape[0])
        shift = self.m.raman_shift

        def put(target, values):
            block = np.full(good.shape, np.nan)
            block[good] = values
            target[rows] = block

        for name, lo, hi in self.bands:
            put(self.band_imgs[name], band_integral(spectra, shift, lo, hi))
        if self.library:
            A, rms = unmix_spectra(self.refs, spectra, shift, self.order)
            for k in range(A.shape[0]):
                put(self.abundance[k], A[k])
            put(self.residual, rms)
        if self.model is not None:
            if self.model.response.kind == "spectrum":
                from .preprocess.axis import resample

                X = spectra if np.array_equal(shift, self.model.raman_shift) else \
                    resample(spectra, shift, self.model.raman_shift)
                y = self.model.response.compute(X, self.model.raman_shift)
            else:
                y = self.model.response.compute(spectra, shift, self.library)
            x0, s_x0 = self.model.calibration.inverse(y)
            put(self.x0, x0)
            put(self.s_x0, s_x0)

    def results(self):
        from .quantify.concentration import concentration_map

        yx = (Axis("y", self.m.y, "um"), Axis("x", self.m.x, "um"))
        out = []
        for name, lo, hi in self.bands:
            out.append(Result(name, "band_area", {"lo": lo, "hi": hi, "local_baseline": True},
                              {"image": Field("band_integral", self.band_imgs[name], yx,
                                              "counts*1/cm", long_name=f"area {lo:g}-{hi:g} 1/cm")}))
        if self.library:
            comp = Axis("component", np.array([r.name for r in self.library]))
            out.append(Result("unmixing", "nnls_unmixing",
                              {"references": [r.name for r in self.library],
                               "baseline_order": self.order},
                              {"abundance": Field("abundance", self.abundance, (comp, *yx),
                                                  "reference units"),
                               "residual": Field("residual_rms", self.residual, yx, "counts")}))
        if self.model is not None:
            out.append(concentration_map(self.x0, self.s_x0, self.model.calibration, yx,
                                         mask=self.m.mask))
        return out


def _stream_results(m, H, images, labels, sums, sq, counts, n_classes, class_domains, extras):
    yx = (Axis("y", m.y, "um"), Axis("x", m.x, "um"))
    shift = Axis("raman_shift", m.raman_shift, "1/cm")
    comp = Axis("component", np.array([f"component {i + 1}" for i in range(H.shape[0])]))
    cls = Axis("class", np.array([f"class {k + 1}" for k in range(n_classes)]))
    mean = sums / np.maximum(counts, 1)[:, None]
    sd = np.sqrt(np.maximum(sq / np.maximum(counts, 1)[:, None] - mean ** 2, 0))
    dy, dx = m.pixel_size
    frac = counts / max(counts.sum(), 1)
    domains = class_domains(labels, (dy, dx))
    areas = {f"class {k + 1}": {"fraction_pct": float(100 * frac[k]),
                                "area_um2": float(counts[k] * dx * dy), **domains[k]["summary"]}
             for k in range(n_classes)}
    return [
        Result("nmf", "minibatch_nmf", {"n_components": H.shape[0]},
               {"images": Field("abundance", images, (comp, *yx), "a.u.",
                                long_name="NMF component weight"),
                "spectra": Field("spectrum", H, (comp, shift), "a.u.",
                                 long_name="NMF component spectrum (unit maximum)")}),
        Result("kmeans", "minibatch_kmeans", {"n_classes": n_classes},
               {"labels": Field("labels", labels, yx, "", long_name="class index (-1 masked)"),
                "class_spectra": Field("mean_spectrum", mean, (cls, shift), "a.u.", errors=sd,
                                       long_name="class mean spectrum (errors: sd)")},
               {"areas": areas}),
    ]
