"""The block machinery of :func:`mapkit.pipeline.analyse`: how many blocks, and their plumbing.

One analysis runs for every map size. The memory budget decides only how many blocks of
rows (bands) the map is processed in and whether the estimators are fitted on a strided
sample of the spectra instead of all of them (:func:`plan_blocks`). A map that fits is one
block, cleaned in memory; a map that does not is cleaned lazily (Dask, on threads, a
``LocalCluster`` or an existing scheduler), band by band, and written into the results file
by this process alone (a single writer, so HDF5 needs no parallel I/O). Peak memory is set
by the band size and the sample, not by the cube.
"""

from __future__ import annotations

import contextlib
from dataclasses import dataclass

import numpy as np

from .core.result import Axis, Field, Result
from .errors import MapkitError

#: bytes of float64 working data per band of rows (the knob that bounds memory)
BAND_BYTES = 128 << 20
#: spectra the estimators are fitted on when the map is processed in several blocks
SAMPLE_PIXELS = 20000
#: above this many pixels the per-pixel long-form table (CSV) is skipped, with a notice
LONG_TABLE_MAX_PIXELS = 250_000
#: float64 working copies of the cube the in-memory cleaning holds at once
WORKING_COPIES = 4


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
    return m.n_pixels * m.shape[-1] * 8 * WORKING_COPIES <= fraction * memory_available()


def band_rows(m, band_bytes: int = BAND_BYTES) -> int:
    per_row = int(np.prod(m.shape[1:]))     # values in one row (one depth of a volume)
    tile = m.intensity.chunks[0][0] if m.is_lazy else 1
    rows = max(1, band_bytes // max(1, per_row * 8))
    return int(max(tile, (rows // tile) * tile)) if rows >= tile else int(rows)


def release_freed_memory() -> bool:
    """Hand memory the process has freed back to the system (glibc's ``malloc_trim``; a
    no-op elsewhere). Freed blocks of the cleaning threads' allocations otherwise stay
    counted in the resident set and raise the next stage's peak. True when trimmed."""
    import ctypes
    import ctypes.util
    import sys

    if not sys.platform.startswith("linux"):
        return False
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
        return bool(libc.malloc_trim(0))
    except (OSError, AttributeError):   # not glibc (musl has no malloc_trim)
        return False


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


@dataclass
class BlockPlan:
    """How a map is processed: ``starts`` of its row blocks of ``rows`` rows each;
    ``chunked`` when it is cleaned lazily block by block (``reason`` says why). A depth
    section or volume is cut along z: its "rows" are depths (``unit``)."""

    rows: int
    starts: list
    chunked: bool
    reason: str
    unit: str = "rows"

    @property
    def n_blocks(self) -> int:
        return len(self.starts)

    def sample_stride(self, n_good: int) -> int:
        """Every how many good spectra one enters the fit (1: all of them)."""
        if not self.chunked or n_good <= SAMPLE_PIXELS:
            return 1
        return int(np.ceil(n_good / SAMPLE_PIXELS))

    def describe(self, stride: int, n_sample: int | None = None) -> str:
        mode = "chunk-wise" if self.chunked else "in memory"
        text = f"{mode} ({self.reason}): "
        text += "one block" if self.n_blocks == 1 else \
            f"{self.n_blocks} blocks of {self.rows} {self.unit}"
        if stride > 1:
            text += (f"; estimators fitted on a sample of about {n_sample} spectra (one "
                     f"good pixel in {stride}), applied block by block")
        return text


def plan_blocks(m, *, memory_fraction: float = 0.5, chunked: bool = False,
                block_bytes: int | None = None, cluster: bool = False) -> BlockPlan:
    """Blocks for map ``m`` (lazy or not): one when its working copies fit in
    ``memory_fraction`` of the available memory, else bands of ``block_bytes`` of float64
    each (:data:`BAND_BYTES`). ``chunked``, ``cluster`` (a Dask cluster was asked for) or an
    explicit ``block_bytes`` force the chunk-wise cleaning."""
    ny, ns = m.shape[0], m.shape[-1]
    if cluster:
        reason = "a Dask cluster was asked for"
    elif chunked:
        reason = "--chunked"
    elif block_bytes:
        reason = "a block size was given"
    elif not fits_in_memory(m, memory_fraction):
        reason = (f"the cube ({m.n_pixels * ns * 4 / 2**30:.1f} GiB) would not fit "
                  "comfortably in memory")
    else:
        return BlockPlan(ny, [0], False, "the map fits comfortably")
    # a band is at most BAND_BYTES, less on a machine with little memory to spare
    budget = max(1 << 20, int(memory_fraction * memory_available()) // 16)
    rows = band_rows(m, block_bytes or min(BAND_BYTES, budget))
    unit = "rows" if m.spatial_dims[0] == "y" else "depths"
    return BlockPlan(rows, list(range(0, ny, rows)), True, reason, unit)


def block_map(m, intensity, y0: int):
    """The rows ``y0:y0 + len(intensity)`` of map ``m`` as a map in memory: rows of y of
    an area map, depths (z) of a section or a volume."""
    from dataclasses import replace

    if y0 == 0 and intensity.shape[0] == m.shape[0]:   # the whole map (any spatial shape)
        return replace(m, intensity=intensity)
    y1 = y0 + intensity.shape[0]
    first = m.spatial_dims[0]
    return replace(m, intensity=intensity, mask=m.mask[y0:y1],
                   **{first: m.coords(first)[y0:y1]})


def sample_map(m, spectra):
    """Sampled spectra (n, n_shift) of map ``m`` as a one-row map to fit estimators on."""
    from .core.ramanmap import RamanMap

    return RamanMap(spectra[None], raman_shift=m.raman_shift, x=np.arange(spectra.shape[0], dtype=float),
                    y=np.zeros(1), laser_wavelength=m.laser_wavelength,
                    provenance=m.provenance, source=m.source)


class BlockStore:
    """Blocks of a cube kept for the later passes: in memory (a single block), else in an
    HDF5 ``dataset`` read back block by block; ``write`` False when the dataset is the
    results file's cube, which the writer fills itself."""

    def __init__(self, in_memory: bool, dataset=None, write: bool = True):
        self.in_memory, self.dataset, self.write = in_memory, dataset, write
        self.kept = {}

    def put(self, y0, block):
        if self.in_memory:
            self.kept[y0] = block
        elif self.write:
            self.dataset[y0:y0 + block.shape[0]] = block

    def get(self, y0, rows):
        if self.in_memory:
            return self.kept[y0]
        return np.asarray(self.dataset[y0:y0 + rows])


def stitch(parts, m, *, sum_keys=()):
    """One result from the results of consecutive row blocks of map ``m``: image fields
    are joined along the map's first spatial axis (y, or z of a depth map); the others (spectra, references) are the
    first block's; ``sum_keys`` of the summary are summed over the blocks."""
    first = parts[0]
    if len(parts) == 1:       # one block: the whole map, whatever its spatial axes
        return first
    at = -len(m.spatial_dims)

    def joined(name, fld):
        return (np.concatenate([p.fields[name].data for p in parts], axis=at),
                None if fld.errors is None else np.concatenate(
                    [p.fields[name].errors for p in parts], axis=at))

    return _whole_map(first, m, joined, [p.summary for p in parts], sum_keys)


def _whole_map(first, m, arrays, summaries, sum_keys):
    """The first block's result ``first`` with each image field replaced by the whole
    map's ``arrays(name, field)`` -> (data, errors), along the map's first spatial axis
    (blocks run along it: y of a map, z of a depth map), and ``sum_keys`` of the blocks'
    ``summaries`` summed."""
    import dataclasses

    dims = m.spatial_dims
    lead = Axis(dims[0], m.coords(dims[0]), "um")
    at = -len(dims)
    fields = {}
    for name, fld in first.fields.items():
        if not fld.is_image:
            fields[name] = fld
            continue
        data, errors = arrays(name, fld)
        axes = fld.axes[:at] + (lead,) + fld.axes[at + 1:]
        fields[name] = dataclasses.replace(fld, data=data, errors=errors, axes=axes)
    summary = dict(first.summary)
    for key in sum_keys:
        if key in summary:
            summary[key] = sum(s[key] for s in summaries)
    return dataclasses.replace(first, fields=fields, summary=summary)


class BlockParts:
    """The results of consecutive row blocks of map ``m``, gathered into the one result
    :func:`stitch` would join them into, without holding every block's images at once.

    With an HDF5 ``group`` (a scratch file's) each image field (data and errors) goes into
    a dataset of the whole map's size as its block arrives, and :meth:`stitched` reads it
    back: memory holds one block, not the map. Without one (a single block) the parts stay
    in memory and :meth:`stitched` is :func:`stitch`. The other fields are the first
    block's; ``sum_keys`` of the summary are summed over the blocks.
    """

    def __init__(self, m, group=None):
        self.m, self.group = m, group
        self.parts, self.first, self.summaries = [], None, []

    def _rows(self, ndim, y0, y1):
        """Index of rows y0:y1 along the first spatial axis of an ``ndim``-D image field."""
        at = ndim - len(self.m.spatial_dims)
        return (slice(None),) * at + (slice(y0, y1),)

    def add(self, y0, part):
        """Add the result of the block whose first row is ``y0``."""
        if self.group is None:
            self.parts.append(part)
            return
        if self.first is None:
            self.first = part
            for name, fld in part.fields.items():
                if not fld.is_image:
                    continue
                for key, arr in (("data", fld.data), ("errors", fld.errors)):
                    if arr is None:
                        continue
                    shape = list(arr.shape)
                    shape[arr.ndim - len(self.m.spatial_dims)] = self.m.shape[0]
                    self.group.create_dataset(f"{name}/{key}", shape=tuple(shape),
                                              dtype=arr.dtype)
        for name, fld in part.fields.items():
            if not fld.is_image:
                continue
            rows = fld.data.shape[fld.data.ndim - len(self.m.spatial_dims)]
            for key, arr in (("data", fld.data), ("errors", fld.errors)):
                if arr is not None:
                    self.group[f"{name}/{key}"][self._rows(arr.ndim, y0, y0 + rows)] = arr
        self.summaries.append({k: v for k, v in part.summary.items()   # the counts only
                               if isinstance(v, (int, float, np.number))})

    def stitched(self, *, sum_keys=()):
        """The result for the whole map (the same fields and values as :func:`stitch`)."""
        if self.group is None:
            return stitch(self.parts, self.m, sum_keys=sum_keys)

        def stored(name, fld):
            return (self.group[f"{name}/data"][()],
                    None if fld.errors is None else self.group[f"{name}/errors"][()])

        return _whole_map(self.first, self.m, stored, self.summaries, sum_keys)


class ClassStats:
    """Mean and sd spectrum of each class, gathered block by block (pairwise update of
    count, mean and sum of squared deviations: Chan, Golub & LeVeque 1979); one block gives
    exactly the in-memory mean and sd."""

    def __init__(self, n_classes, n_shift):
        self.n = np.zeros(n_classes, np.int64)
        self.mean = np.zeros((n_classes, n_shift))
        self.m2 = np.zeros((n_classes, n_shift))

    def add(self, X, lab):
        for k in range(self.n.size):
            Xk = X[lab == k]
            nb = Xk.shape[0]
            if not nb:
                continue
            mb = Xk.mean(axis=0)
            m2b = ((Xk - mb) ** 2).sum(axis=0)
            na = self.n[k]
            delta = mb - self.mean[k]
            tot = na + nb
            self.mean[k] = self.mean[k] + delta * nb / tot
            self.m2[k] = self.m2[k] + m2b + delta ** 2 * na * nb / tot
            self.n[k] = tot

    def store(self, est, labels, m):
        """Set a class estimator's fitted state from the labels of map ``m`` and the stats."""
        empty = self.n == 0
        est.labels_ = labels.astype(np.int16)
        est.class_mean_ = np.where(empty[:, None], np.nan, self.mean)
        est.class_sd_ = np.where(empty[:, None], np.nan,
                                 np.sqrt(self.m2 / np.maximum(self.n, 1)[:, None]))
        est.area_fraction_ = self.n / max(int(self.n.sum()), 1)
        est.pixel_size_ = m.pixel_size
        est.spacing_ = m.spacing
        return est


class SpikeRecord:
    """The cosmic-ray spikes a despike step replaced, kept compactly: a count image
    (channels replaced per pixel) and the (row, column, channel) index of every replaced
    channel, instead of a one-byte flag per value of the cube."""

    def __init__(self, shape):
        self.count = np.zeros(tuple(shape), np.uint16)   # the spatial shape of the map
        self.where = []

    def add(self, y0, flags):
        flags = np.asarray(flags, bool)
        self.count[y0:y0 + flags.shape[0]] = flags.sum(axis=-1)
        index = list(np.nonzero(flags))
        index[0] = index[0] + y0
        self.where.append(np.stack(index, axis=1).astype(np.int32))

    def result(self, m, parameters):
        from .reduce._common import image_axes

        idx = np.concatenate(self.where) if self.where else \
            np.zeros((0, self.count.ndim + 1), np.int32)
        yx = image_axes(m)
        summary = {"channels_replaced": int(idx.shape[0]),
                   "spectra_touched": int((self.count > 0).sum())}
        fields = {
            "count": Field("count", self.count, yx, "",
                           long_name="channels replaced as cosmic-ray spikes"),
            "replaced": Field("replaced", idx,
                              (Axis("spike", np.arange(idx.shape[0])),
                               Axis("index", np.array(list(m.dims)))), "",
                              long_name="position (cube order) and channel of each replaced "
                                        "channel"),
            "raman_shift": Field("raman_shift", m.raman_shift,
                                 (Axis("channel", np.arange(m.raman_shift.size)),), "1/cm",
                                 long_name="Raman shift of each channel")}
        return Result("spikes", "despike", parameters, fields, summary), summary
