"""The one list of preprocessing steps: names, parameter schemas, and what each does.

Recipes (TOML), the command line's ``mapkit steps`` listing, the napari panels and the
docs all read this registry, so adding a method is one function plus one ``register``
call. Each step takes a map and validated parameters and returns the new map (with a
provenance ``Step`` appended) and a dict of by-products (spike mask, baselines, …).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable

import numpy as np

from ..core.provenance import Step
from ..core.ramanmap import RamanMap
from ..errors import MapkitError
from . import axis as _axis
from . import baseline as _baseline
from . import quality as _quality
from . import smooth as _smooth
from . import spikes as _spikes
from .engine import good_mean_spectrum, map_spectra
from .normalise import emsc, normalise, normalise_to_band

_TYPES = {float: "a number", int: "an integer", str: "a text", bool: "true or false",
          list: "a list of numbers"}


@dataclass(frozen=True)
class Param:
    """One parameter of a step: its type, default, allowed range or choices, and meaning."""

    name: str
    type: type
    default: object
    doc: str
    low: float | None = None
    high: float | None = None
    choices: tuple | None = None
    methods: tuple | None = None      # only meaningful for these values of ``method``
    required: bool = False

    def allowed(self) -> str:
        if self.choices:
            return "one of " + ", ".join(repr(c) for c in self.choices)
        if self.low is not None or self.high is not None:
            lo = "-inf" if self.low is None else f"{self.low:g}"
            hi = "inf" if self.high is None else f"{self.high:g}"
            return f"{_TYPES[self.type]} from {lo} to {hi}"
        return _TYPES[self.type]

    def check(self, value, where: str):
        t = self.type
        ok = (isinstance(value, bool) if t is bool else
              isinstance(value, (int, float)) and not isinstance(value, bool) if t is float else
              isinstance(value, int) and not isinstance(value, bool) if t is int else
              isinstance(value, list) and all(isinstance(v, (int, float)) for v in value)
              if t is list else isinstance(value, t))
        if not ok:
            raise MapkitError(f"{self.name} = {value!r} has the wrong type", field=where,
                              fix=f"give {self.allowed()}")
        if t is float:
            value = float(value)
        if self.choices and value not in self.choices:
            raise MapkitError(f"{self.name} = {value!r} is not allowed", field=where,
                              fix=f"give {self.allowed()}")
        if (self.low is not None and value < self.low) or (self.high is not None and value > self.high):
            raise MapkitError(f"{self.name} = {value!r} is out of range", field=where,
                              fix=f"give {self.allowed()}")
        return value


@dataclass(frozen=True)
class StepSpec:
    name: str
    doc: str
    params: tuple
    run: Callable = field(repr=False)

    def param(self, name):
        return next((p for p in self.params if p.name == name), None)

    def validate(self, given: dict, where: str = "") -> dict:
        """Full parameter set (defaults filled in), or a one-line error naming the problem."""
        where = where or f"step {self.name!r}"
        known = {p.name for p in self.params}
        for key in given:
            if key not in known:
                raise MapkitError(f"step {self.name!r} has no parameter {key!r}", field=where,
                                  fix=f"use {', '.join(sorted(known)) or 'no parameters'}")
        method = given.get("method", self.param("method").default if self.param("method") else None)
        out = {}
        for p in self.params:
            if p.name in given:
                if p.methods and method not in p.methods:
                    raise MapkitError(f"{p.name} does not apply to method {method!r}", field=where,
                                      fix=f"{p.name} is for method {', '.join(p.methods)}")
                out[p.name] = p.check(given[p.name], where)
            elif p.required and (not p.methods or method in p.methods):
                raise MapkitError(f"step {self.name!r} needs {p.name}", field=where,
                                  fix=f"give {p.name} = {p.allowed()}")
            elif not p.methods or method in p.methods:
                out[p.name] = p.default
        return out


STEPS: dict[str, StepSpec] = {}
#: steps that compare a pixel with its spatial neighbours: they handle every spatial shape
#: (line, section, volume) themselves; every other step sees a volume as rows of spectra
SPATIAL_STEPS = ("despike", "bin")


def _unrows(value, nz, ny, nx):
    shape = getattr(value, "shape", None)
    if shape is not None and tuple(shape[:2]) == (nz * ny, nx):
        return value.reshape((nz, ny, nx) + tuple(shape[2:]))
    return value


def _on_rows(func):
    """Run a per-spectrum step on a volume (z, y, x, shift) as a (z·y, x, shift) map."""
    import functools
    from dataclasses import replace

    @functools.wraps(func)
    def run(m, **params):
        if m.intensity.ndim != 4:
            return func(m, **params)
        nz, ny, nx, ns = m.shape
        rows = RamanMap(m.intensity.reshape(nz * ny, nx, ns), raman_shift=m.raman_shift,
                        x=m.x, y=np.arange(nz * ny, dtype=float),
                        mask=m.mask.reshape(nz * ny, nx), laser_wavelength=m.laser_wavelength,
                        provenance=m.provenance, source=m.source)
        out, extra = func(rows, **params)
        back = replace(m, intensity=out.intensity.reshape(nz, ny, nx, out.shape[-1]),
                       raman_shift=out.raman_shift, mask=out.mask.reshape(nz, ny, nx),
                       provenance=out.provenance)
        return back, {k: _unrows(v, nz, ny, nx) for k, v in extra.items()}
    return run


def register(name: str, *params: Param):
    """Decorator: add a step function ``f(map, **params) -> (map, extras)`` to the registry."""
    def deco(func):
        run = func if name in SPATIAL_STEPS else _on_rows(func)
        STEPS[name] = StepSpec(name, (func.__doc__ or "").strip().split("\n\n")[0], params, run)
        return func
    return deco


def get_step(name: str) -> StepSpec:
    if name not in STEPS:
        raise MapkitError(f"unknown step {name!r}", field="step",
                          fix=f"use one of {', '.join(STEPS)}")
    return STEPS[name]


def run_step(m: RamanMap, name: str, params: dict | None = None):
    """Validate ``params`` for step ``name`` and run it: returns (new map, extras)."""
    spec = get_step(name)
    full = spec.validate(params or {})
    return spec.run(m, **full)


def _spectral(m, name, params, func, n_out=None, raman_shift=None):
    """Run a per-spectrum function through the engine and record the step."""
    out = map_spectra(m, func, n_out)
    return m.derive(out, Step(name, params), raman_shift=raman_shift)


# -- quality ------------------------------------------------------------------------
@register("mask_bad_pixels",
          Param("saturation", float, 0.0, "detector ceiling in counts (0: detect a flat top)", low=0),
          Param("max_fraction", float, 0.5, "fail when more than this share of pixels is bad",
                low=0, high=1))
def _mask_bad_pixels(m, saturation, max_fraction):
    """Mask non-finite, dead (constant) and saturated pixels; their values become 0."""
    ny, nx, ns = m.shape
    kinds = ("nonfinite", "dead", "saturated")
    if m.is_lazy:  # one pass: each chunk's tops (small 2-D results), then the map's ceiling
        data = m.intensity.rechunk({2: -1})
        fields = ("nonfinite", "dead", "top", "at_top")

        def on_chunk(b):
            t = _quality.pixel_tops(np.asarray(b))
            return np.stack([t[k].astype(np.float64) for k in fields], axis=-1)

        stacked = data.map_blocks(on_chunk, chunks=data.chunks[:2] + ((4,),),
                                  dtype=np.float64).compute().reshape(-1, 4)
        tops = {k: stacked[:, i] if k in ("top", "at_top") else stacked[:, i] > 0.5
                for i, k in enumerate(fields)}
        flags = _quality.bad_pixels_from_tops(tops, saturation=saturation or None)
    else:
        cube = np.asarray(m.intensity)
        flags = _quality.bad_pixel_mask(cube.reshape(-1, ns), saturation=saturation or None)
    bad = m.mask.copy()
    for v in flags.values():
        bad |= v.reshape(ny, nx)
    report = {k: int(v.sum()) for k, v in flags.items()}
    if bad.mean() > max_fraction:
        raise MapkitError(f"{bad.sum()} of {bad.size} pixels are non-finite, dead or saturated "
                          f"({report})", file=m.source, field="intensity",
                          fix="check the export; NaN/Inf or constant spectra cannot be analysed")
    if m.is_lazy:
        import dask.array as da

        badd = da.from_array(bad[..., None], chunks=m.intensity.chunks[:2] + ((1,),))
        clean = da.where(badd | ~da.isfinite(m.intensity), np.float32(0),
                         m.intensity).astype(np.float32)
    else:
        clean = np.where(bad[..., None] | ~np.isfinite(cube), 0.0, cube).astype(np.float32)
    step = Step("mask_bad_pixels", {"saturation": saturation, "max_fraction": max_fraction,
                                    **report})
    return m.derive(clean, step, mask=bad), {"report": report}


# -- spikes ---------------------------------------------------------------------------
@register("despike",
          Param("method", str, "neighbours", "compare with spatial neighbours, or within "
                "each spectrum (Whitaker & Hayes 2018)", choices=("neighbours", "spectral")),
          Param("threshold", float, 8.0, "how many noise units above the neighbours (or |z|) "
                "make a spike", low=2, high=100),
          Param("grow", float, 3.0, "flank channels above this many noise units join a spike",
                low=0, high=100, methods=("neighbours",)),
          Param("width", int, 2, "channels added on each side of a spectral spike", low=0,
                high=10, methods=("spectral",)))
def _despike(m, method, threshold, grow=3.0, width=2):
    """Find cosmic-ray spikes and replace them; the mask of replaced channels is returned."""
    ns = m.shape[-1]
    if method == "spectral":
        cube = np.asarray(m.load().intensity, dtype=np.float64).reshape(-1, ns)
        flags = _spikes.spectral_spike_mask(cube, threshold=threshold, width=width)
        flags[m.mask.ravel()] = False
        out = _spikes.interpolate_flagged(cube, flags).reshape(m.shape).astype(np.float32)
        flags = flags.reshape(m.shape)
        params = {"method": method, "threshold": threshold, "width": width}
    elif m.is_lazy:
        import dask.array as da

        last = m.intensity.ndim - 1
        mask = da.from_array(m.mask[..., None], chunks=m.intensity.chunks[:-1] + ((1,),))
        cube = m.intensity.rechunk({last: -1})

        def on_chunk(c, mk):   # the cleaned cube and, as more channels, the spike flags
            both = np.empty(c.shape[:-1] + (2 * ns,), np.float32)   # written once, no copies
            _, fl = _spikes.remove_spatial_spikes(c, mk[..., 0], threshold=threshold,
                                                  grow=grow, out=both[..., :ns])
            both[..., ns:] = fl
            return both

        # each chunk sees a one-pixel halo of its neighbours, so results match the whole map;
        # cube and flags come from one run of the kernel per chunk
        depth = {**{i: 1 for i in range(last)}, last: 0}
        cube_h = da.overlap.overlap(cube, depth=depth, boundary="none")
        mask_h = da.overlap.overlap(mask, depth=depth, boundary="none")
        both = da.overlap.trim_internal(
            da.map_blocks(on_chunk, cube_h, mask_h, dtype=np.float32,
                          chunks=cube_h.chunks[:last] + ((2 * ns,),)), depth, boundary="none")
        out, flags = both[..., :ns], both[..., ns:] > 0.5
    else:
        out, flags = _spikes.remove_spatial_spikes(np.asarray(m.intensity), m.mask,
                                                   threshold=threshold, grow=grow)
    if method != "spectral":
        params = {"method": method, "threshold": threshold, "grow": grow}
    if not m.is_lazy or method == "spectral":
        params.update(channels_replaced=int(np.sum(flags)),
                      spectra_touched=int(np.any(flags, axis=-1).sum()))
    return m.derive(out, Step("despike", params)), {"spikes": flags}


# -- baseline ---------------------------------------------------------------------------
_BASELINE_METHODS = tuple(_baseline.METHODS)


@register("baseline",
          Param("method", str, "als", "als (Eilers & Boelens 2005), arpls (Baek 2015), airpls "
                "(Zhang 2010), modpoly (Lieber 2003) or rolling (Perez-Pueyo 2010)",
                choices=_BASELINE_METHODS),
          Param("lam", float, 1e5, "smoothness of the baseline", low=1e-2, high=1e12,
                methods=("als", "arpls", "airpls")),
          Param("p", float, 0.01, "asymmetry (weight of points above the baseline)", low=1e-6,
                high=0.5, methods=("als",)),
          Param("order", int, 3, "polynomial order", low=0, high=15, methods=("modpoly",)),
          Param("half_window", int, 25, "half width of the structuring window in channels",
                low=1, high=100000, methods=("rolling",)),
          Param("max_iter", int, 50, "maximum re-weighting iterations", low=1, high=10000,
                methods=("als", "arpls", "airpls", "modpoly")),
          Param("tol", float, 1e-3, "convergence tolerance", low=1e-12, high=1,
                methods=("als", "arpls", "airpls", "modpoly")))
def _baseline_step(m, method, **params):
    """Estimate and subtract a fluorescence baseline from every spectrum."""
    func = _baseline.METHODS[method]
    shift = m.raman_shift
    if m.is_lazy:
        import dask.array as da

        ns = m.shape[2]

        def sub(block):   # one more channel carries the converged flag: one run gives both
            info = {}
            out = np.empty((block.shape[0], ns + 1), np.float32)
            # computed in float64 (a float32 block is promoted), written as float32
            np.subtract(block, func(block, shift, info=info, **params), out=out[:, :ns],
                        casting="unsafe")
            out[:, ns] = info["converged"]
            return out

        # the reweighted methods read float32 spectra as they are (solving in float64)
        both = map_spectra(m, sub, ns + 1, float32_in=method in _baseline.READS_FLOAT32)
        mask = da.from_array(m.mask, chunks=both.chunks[:2])
        return (m.derive(both[..., :ns], Step("baseline", {"method": method, **params})),
                {"converged": (both[..., ns] > 0.5) | mask})
    # in memory: also record which spectra hit max_iter before converging (a quality mask)
    ny, nx, ns = m.shape
    converged = np.ones(ny * nx, bool)
    good = np.flatnonzero(~m.mask.ravel())
    flat = np.asarray(m.intensity).reshape(-1, ns)
    if not (method in _baseline.READS_FLOAT32 and flat.dtype == np.float32):
        flat = flat.astype(np.float64, copy=False)
    out = np.zeros((ny * nx, ns), np.float32)
    for start in range(0, good.size, 4096):
        idx = good[start:start + 4096]
        info = {}
        out[idx] = flat[idx] - func(flat[idx], shift, info=info, **params)
        converged[idx] = info["converged"]
    step = Step("baseline", {"method": method, **params,
                             "not_converged": int((~converged).sum())})
    return m.derive(out.reshape(ny, nx, ns), step), {"converged": converged.reshape(ny, nx)}


# -- smoothing, derivatives --------------------------------------------------------------
@register("smooth",
          Param("method", str, "savgol", "Savitzky-Golay (1964) or Whittaker (Eilers 2003)",
                choices=("savgol", "whittaker")),
          Param("window", int, 7, "window length in channels (odd)", low=3, high=1001,
                methods=("savgol",)),
          Param("order", int, 2, "polynomial order", low=0, high=10, methods=("savgol",)),
          Param("lam", float, 10.0, "smoothness", low=0, high=1e12, methods=("whittaker",)))
def _smooth_step(m, method, **params):
    """Smooth every spectrum along the shift axis."""
    if method == "savgol":
        if params["window"] % 2 == 0 or params["order"] >= params["window"]:
            raise MapkitError(f"window {params['window']} must be odd and larger than order "
                              f"{params['order']}", field="step 'smooth'",
                              fix="for example window = 7, order = 2")
        func = lambda b: _smooth.savgol(b, window=params["window"], order=params["order"])  # noqa: E731
    else:
        func = lambda b: _smooth.whittaker_smooth(b, lam=params["lam"])  # noqa: E731
    return _spectral(m, "smooth", {"method": method, **params}, func), {}


@register("derivative",
          Param("order", int, 1, "derivative order", low=1, high=2),
          Param("window", int, 9, "Savitzky-Golay window in channels (odd)", low=3, high=1001),
          Param("polyorder", int, 3, "Savitzky-Golay polynomial order", low=2, high=10))
def _derivative(m, order, window, polyorder):
    """Savitzky-Golay derivative with respect to Raman shift (per cm⁻¹)."""
    if window % 2 == 0 or polyorder >= window or order > polyorder:
        raise MapkitError("window must be odd, above polyorder, and polyorder ≥ order",
                          field="step 'derivative'", fix="for example window = 9, polyorder = 3")
    shift = m.raman_shift
    func = lambda b: _smooth.savgol(b, shift, window=window, order=polyorder, deriv=order)  # noqa: E731
    return _spectral(m, "derivative", {"order": order, "window": window,
                                       "polyorder": polyorder}, func), {}


# -- normalisation -------------------------------------------------------------------------
@register("normalise",
          Param("method", str, "vector", "area, vector (L2), max, snv, or band (integral over "
                "low-high)", choices=("area", "vector", "max", "snv", "band")),
          Param("low", float, 0.0, "band start, cm⁻¹", methods=("band",), required=True),
          Param("high", float, 0.0, "band end, cm⁻¹", methods=("band",), required=True))
def _normalise_step(m, method, low=None, high=None):
    """Scale every spectrum to a common intensity."""
    shift = m.raman_shift
    if method == "band":
        _axis.crop_indices(shift, low, high)   # fail before any work if the band is outside
        func = lambda b: normalise_to_band(b, shift, low=low, high=high)  # noqa: E731
        params = {"method": method, "low": low, "high": high}
    else:
        func = lambda b: normalise(b, shift, method=method)  # noqa: E731
        params = {"method": method}
    return _spectral(m, "normalise", params, func), {}


@register("scatter_correction",
          Param("method", str, "emsc", "msc (Geladi 1985) or emsc (Martens & Stark 1991)",
                choices=("msc", "emsc")),
          Param("order", int, 2, "polynomial order of the EMSC baseline terms", low=0, high=10,
                methods=("emsc",)))
def _scatter(m, method, order=0):
    """Correct multiplicative and additive effects against the map's mean spectrum."""
    ref = good_mean_spectrum(m)
    shift = m.raman_shift
    k = 0 if method == "msc" else order
    func = lambda b: emsc(b, ref, order=k, shift=shift)  # noqa: E731
    return _spectral(m, "scatter_correction", {"method": method, "order": k}, func), {}


# -- axis --------------------------------------------------------------------------------
@register("crop",
          Param("low", float, 0.0, "lowest shift kept, cm⁻¹", required=True),
          Param("high", float, 0.0, "highest shift kept, cm⁻¹", required=True))
def _crop(m, low, high):
    """Keep the channels between low and high cm⁻¹ (low below high: not swapped)."""
    if low >= high:
        raise MapkitError(f"crop low = {low:g} is not below high = {high:g} (a reversed "
                          "range is not swapped)", field="step 'crop'",
                          fix="give low < high, both in 1/cm")
    idx = _axis.crop_indices(m.raman_shift, low, high)
    sel = slice(int(idx[0]), int(idx[-1]) + 1)
    return m.derive(m.intensity[:, :, sel], Step("crop", {"low": low, "high": high}),
                    raman_shift=m.raman_shift[sel]), {}


@register("resample",
          Param("start", float, 0.0, "first shift of the new axis, cm⁻¹", required=True),
          Param("stop", float, 0.0, "last shift of the new axis, cm⁻¹", required=True),
          Param("step", float, 1.0, "channel spacing, cm⁻¹", low=1e-3, high=1e3))
def _resample(m, start, stop, step):
    """Interpolate every spectrum linearly onto a new, evenly spaced axis."""
    n = int(np.floor((stop - start) / step + 1e-9)) + 1
    if n < 3:
        raise MapkitError(f"the new axis {start:g}-{stop:g} in steps of {step:g} has {n} channels",
                          field="step 'resample'", fix="make stop larger than start by a few steps")
    target = start + step * np.arange(n)
    _axis.resample_matrix(m.raman_shift, target)   # validate the range before any work
    source = m.raman_shift
    func = lambda b: _axis.resample(b, source, target)  # noqa: E731
    return _spectral(m, "resample", {"start": start, "stop": stop, "step": step}, func,
                     n_out=n, raman_shift=target), {}


@register("bin",
          Param("factor", int, 2, "pixels per side of each averaged tile", low=1, high=1000))
def _bin(m, factor):
    """Average factor x factor pixel tiles (masked pixels excluded)."""
    from dataclasses import replace

    data = m.load().intensity
    if data.ndim == 4:   # a volume: bin each depth layer in (y, x), depths kept
        layers = [_axis.bin_cube(data[k], m.mask[k], factor) for k in range(data.shape[0])]
        cube, mask = np.stack([c for c, _, _ in layers]), np.stack([k for _, k, _ in layers])
        dropped = layers[0][2]
    else:                # a map or a depth section: tiles in its two axes
        cube, mask, dropped = _axis.bin_cube(data, m.mask, factor)
    by, bx = mask.shape[-2:]
    rows = m.dims[-3]    # y, or z for a section
    binned_rows = m.coords(rows)[:by * factor].reshape(by, factor).mean(axis=1)
    x = m.x[:bx * factor].reshape(bx, factor).mean(axis=1)
    step = Step("bin", {"factor": factor, "dropped_rows": dropped[0],
                        "dropped_columns": dropped[1]})
    return replace(m, intensity=cube.astype(np.float32), x=x, mask=mask,
                   provenance=m.provenance + (step,), **{rows: binned_rows}), {"dropped": dropped}


@register("correct_axis",
          Param("coefficients", list, [], "polynomial mapping measured to true shift, lowest "
                "order first (from 'mapkit axis-calibrate')", required=True))
def _correct_axis(m, coefficients):
    """Replace the shift axis by a calibrated one: ν̃ = Σ cₖ ν̃ₘᵏ."""
    new = np.polynomial.polynomial.polyval(m.raman_shift, coefficients)
    return m.derive(m.intensity, Step("correct_axis", {"coefficients": coefficients}),
                    raman_shift=new), {}


def describe_steps(recipe=None) -> str:
    """Plain-text listing of every step and its parameters (for ``mapkit steps``).

    A parameter's default is the step's own (what a recipe that omits it gets); with a
    ``recipe`` (e.g. the default recipe) each value that recipe sets differently is named
    beside it, so the two cannot be confused.
    """
    chosen = {}
    for name, params in (recipe.steps if recipe is not None else ()):
        chosen.setdefault(name, params)
    lines = []
    for spec in STEPS.values():
        lines.append(f"{spec.name}: {spec.doc}")
        for p in spec.params:
            scope = f" [method {', '.join(p.methods)}]" if p.methods else ""
            default = "required" if p.required else f"default {p.default!r}"
            used = chosen.get(spec.name, {})
            if p.name in used and used[p.name] != p.default:
                default += f"; the {recipe.name} recipe uses {used[p.name]!r}"
            lines.append(f"    {p.name} ({p.allowed()}; {default}){scope}: {p.doc}")
    return "\n".join(lines)
