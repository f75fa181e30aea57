"""Recipes: a TOML file naming a sequence of preprocessing steps and their parameters.

Example::

    [recipe]
    name = "tablet sections"

    [[step]]
    name = "mask_bad_pixels"

    [[step]]
    name = "despike"
    threshold = 8.0

    [[step]]
    name = "baseline"
    method = "als"
    lam = 1e5
    p = 0.01

A recipe is checked completely (unknown steps, unknown or missing parameters, wrong
types, values out of range, reversed ranges such as ``low`` above ``high``) before any data
is read; errors name the file and line. Once the map's shift axis is known (before its
cube is read), :meth:`Recipe.check_axis` runs the steps on the axis alone: a crop or
resample that leaves fewer channels than the later steps (or the analysis after the
recipe) need, a band outside what is left, or a library that does not cover it, is
refused with the recipe line.
Every output records the recipe text in its provenance, so a result can be reproduced
from the file alone.
"""

from __future__ import annotations

import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..core.provenance import Step
from ..errors import MapkitError
from .registry import STEPS, get_step

DEFAULT_RECIPE = """\
# mapkit default cleaning recipe
[recipe]
name = "default"

[[step]]
name = "mask_bad_pixels"

[[step]]
name = "despike"
method = "neighbours"
threshold = 8.0

[[step]]
name = "baseline"
method = "arpls"
lam = 1e6
"""


MINIMAL_RECIPE = DEFAULT_RECIPE.split("[[step]]\nname = \"baseline\"")[0].replace(
    "default cleaning recipe", "minimal cleaning recipe").replace('"default"', '"minimal"')


@dataclass(frozen=True)
class Recipe:
    """A validated sequence of steps: ``[(name, full parameters), …]`` plus its source text."""

    steps: tuple
    name: str = ""
    text: str = ""
    source: str = ""
    lines: tuple = field(default=(), repr=False)

    @classmethod
    def from_text(cls, text: str, source: str = "<recipe>") -> "Recipe":
        try:
            doc = tomllib.loads(text)
        except tomllib.TOMLDecodeError as exc:
            raise MapkitError(f"not valid TOML ({exc})", file=source,
                              fix="check quotes, brackets and '=' signs") from None
        unknown = set(doc) - {"recipe", "step"}
        if unknown:
            raise MapkitError(f"unknown section {sorted(unknown)[0]!r}", file=source,
                              field=_line_of(text, rf"^\s*\[+\s*{sorted(unknown)[0]}"),
                              fix="use [recipe] and [[step]] sections only")
        raw_steps = doc.get("step", [])
        if not isinstance(raw_steps, list) or not raw_steps:
            raise MapkitError("the recipe has no [[step]] sections", file=source,
                              fix="add at least one [[step]] with a name")
        headers = [i + 1 for i, ln in enumerate(text.splitlines())
                   if re.match(r"^\s*\[\[\s*step\s*\]\]", ln)]
        steps, lines = [], []
        for k, raw in enumerate(raw_steps):
            line = headers[k] if k < len(headers) else 0
            where = f"line {line}" if line else f"step {k + 1}"
            params = dict(raw)
            name = params.pop("name", None)
            if name is None:
                raise MapkitError("a [[step]] has no name", file=source, field=where,
                                  fix=f"add name = one of {', '.join(STEPS)}")
            if name not in STEPS:
                raise MapkitError(f"unknown step {name!r}", file=source, field=where,
                                  fix=f"use one of {', '.join(STEPS)}")
            try:
                full = get_step(name).validate(params, where)
            except MapkitError as exc:
                key = re.search(r"^(\w+)(?: = | does not)|parameter '(\w+)'", exc.problem)
                key = key and (key.group(1) or key.group(2))
                at = _param_line(text, line, key) if key else where
                raise MapkitError(exc.problem, file=source, field=at, fix=exc.fix) from None
            _check_range(name, full, text, line, source)
            steps.append((name, full))
            lines.append(line)
        meta = doc.get("recipe", {})
        return cls(tuple(steps), str(meta.get("name", "")), text, source, tuple(lines))

    def check_axis(self, shift, *, need: int = 0, why: str = "", library=None,
                   notes: list | None = None):
        """The shift axis after the recipe, computed from ``shift`` alone (no data read).

        Refuses, naming the recipe line, a ``crop`` or ``resample`` that leaves fewer
        channels than the steps after it need, or than ``need`` (what the analysis after
        the recipe needs, described by ``why``, e.g. ``"NMF with 4 components"``); a
        normalisation band or crop range outside the channels left; and, with
        ``library``, a reference spectrum that does not cover the final axis. A crop or
        resample that keeps less than a tenth of the channels without breaking a need is
        not refused, but described in ``notes`` (a list to append to), with its line.
        """
        from . import axis as _axis

        axis = np.asarray(shift, dtype=np.float64)
        needs = [_channels_needed(name, params) for name, params in self.steps]
        for k, (name, params) in enumerate(self.steps):
            line = self.lines[k] if k < len(self.lines) else 0
            where = f"line {line}" if line else f"step {k + 1}"
            try:
                if name == "crop":
                    idx = _axis.crop_indices(axis, params["low"], params["high"])
                    new = axis[int(idx[0]):int(idx[-1]) + 1]
                elif name == "resample":
                    n = int(np.floor((params["stop"] - params["start"]) / params["step"]
                                     + 1e-9)) + 1
                    new = params["start"] + params["step"] * np.arange(max(n, 1))
                    if n >= 2:
                        _axis.resample_matrix(axis, new)
                elif name == "normalise" and params.get("method") == "band":
                    _axis.crop_indices(axis, params["low"], params["high"])
                    new = axis
                elif name == "correct_axis":
                    new = np.polynomial.polynomial.polyval(axis, params["coefficients"])
                else:
                    new = axis
            except MapkitError as exc:
                raise MapkitError(f"{name}: {exc.problem}", file=self.source, field=where,
                                  fix=exc.fix) from None
            if name in ("crop", "resample"):
                later = [(needs[j][0], f"step {self.steps[j][0]!r} ({needs[j][1]})")
                         for j in range(k + 1, len(self.steps)) if needs[j][0]]
                if need:
                    later.append((need, why or "the analysis after the recipe"))
                if later:
                    most, reason = max(later, key=lambda t: t[0])
                    if new.size < most:
                        span = f"{new.min():.1f}-{new.max():.1f} 1/cm" if new.size else "none"
                        raise MapkitError(
                            f"{name} keeps {new.size} of {axis.size} channels ({span}), fewer "
                            f"than the {most} that {reason} needs", file=self.source,
                            field=where, fix="check the range (a digit missing, e.g. 179 for "
                                             "1790?) or widen it")
                if notes is not None and 10 * new.size < axis.size:
                    notes.append(f"{self.source}: {where}: {name} keeps {new.size} of "
                                 f"{axis.size} channels ({new.min():.1f}-{new.max():.1f} "
                                 "1/cm); check the range if that was not meant")
            axis = new
        for ref in library or ():
            ref.on_axis(axis)
        return axis

    def fingerprint(self):
        """The steps and parameters alone (comments and names ignored), for comparisons."""
        return [[name, dict(sorted(params.items()))] for name, params in self.steps]

    @classmethod
    def from_file(cls, path) -> "Recipe":
        path = Path(path)
        if not path.is_file():
            raise MapkitError("recipe file not found", file=path, fix="check the path")
        return cls.from_text(path.read_text(encoding="utf-8"), str(path))

    @classmethod
    def default(cls) -> "Recipe":
        return cls.from_text(DEFAULT_RECIPE, "default recipe")

    @classmethod
    def minimal(cls) -> "Recipe":
        """Bad pixels and spikes only: for fits that model the background themselves."""
        return cls.from_text(MINIMAL_RECIPE, "minimal recipe")

    def apply(self, m, *, progress=None, spectra_only: bool = False):
        """Run every step on map ``m``; returns (map, by-products of each step by name).

        ``spectra_only`` skips steps that compare a pixel with its neighbours (spatial
        despiking, binning): for stacks of separate spectra such as calibration standards.
        """
        extras = {}
        for name, m, extra in self.iter_apply(m, spectra_only=spectra_only, progress=progress):
            extras[name] = extra
        return m, extras

    def _begin(self, m):
        """Check the axis first (a crop too narrow fails at its line before any work) and
        record the recipe in the map's provenance."""
        self.check_axis(m.raman_shift)
        return m.derive(m.intensity, Step("recipe", {"name": self.name, "source": self.source,
                                                      "text": self.text}))

    def apply_keeping_background(self, m, *, progress=None):
        r"""Run every step; returns (map, by-products, the map cleaned without baselines).

        The third map has had every step but the baseline ones (the same masks, spikes,
        crops, axis corrections and binning), so its grid and axis are those of the first.
        Methods that fit the fluorescence together with the Raman bands (unmixing with
        baseline terms, MCR-ALS with a background per pixel) take it: a baseline
        subtracted first eats the wings of broad bands. Without a baseline step it is the
        cleaned map itself.

        Examples
        --------
        >>> import numpy as np
        >>> from mapkit.core.ramanmap import RamanMap
        >>> m = RamanMap(np.ones((2, 3, 50)) + np.linspace(0, 1, 50), raman_shift=np.arange(50.),
        ...              x=np.arange(3.), y=np.arange(2.))
        >>> r = Recipe.from_text('[[step]]\nname = "baseline"\nmethod = "als"\n'
        ...                      '[[step]]\nname = "crop"\nlow = 10\nhigh = 40', "example")
        >>> cleaned, _, background = r.apply_keeping_background(m)
        >>> cleaned.shape == background.shape, bool(background.intensity.min() > 0.9)
        (True, True)
        """
        m = self._begin(m)
        extras, keep = {}, m
        for name, params in self.steps:
            if progress:
                progress(name)
            out, extra = get_step(name).run(m, **params)
            extras[name] = extra
            if name != "baseline":   # until the first baseline the two maps are one
                keep = out if keep is m else get_step(name).run(keep, **params)[0]
            m = out
        return m, extras, keep

    def iter_apply(self, m, *, spectra_only: bool = False, progress=None):
        """Run the steps one by one, yielding (step name, map after it, by-products).

        The axis is checked first (:meth:`check_axis`), so a crop that leaves too few
        channels for a later step fails at the crop's line before any work.
        """
        m = self._begin(m)
        for name, params in self.steps:
            if spectra_only and (name == "bin" or (name == "despike"
                                                   and params.get("method") == "neighbours")):
                continue
            if progress:
                progress(name)
            m, extra = get_step(name).run(m, **params)
            yield name, m, extra


#: pairs of parameters that bound a range: (step, method or None, low name, high name)
_RANGES = (("crop", None, "low", "high"), ("normalise", "band", "low", "high"),
           ("resample", None, "start", "stop"))


def _check_range(name, params, text, line, source):
    """Refuse a range written backwards (low above high): it is not swapped silently."""
    for step, method, lo, hi in _RANGES:
        if name != step or (method and params.get("method") != method):
            continue
        if params[lo] >= params[hi]:
            raise MapkitError(f"{name} {lo} = {params[lo]:g} is not below {hi} = "
                              f"{params[hi]:g} (a reversed range is not swapped)",
                              file=source, field=_param_line(text, line, hi),
                              fix=f"give {lo} < {hi}, both in 1/cm")


def _channels_needed(name, params):
    """Channels a step needs to run, and why: (0, "") when it has no particular need."""
    if name == "smooth" and params.get("method") == "savgol":
        return params["window"], f"window = {params['window']}"
    if name == "derivative":
        return params["window"], f"window = {params['window']}"
    if name == "baseline":
        if params.get("method") == "modpoly":
            return params["order"] + 2, f"order = {params['order']}"
        if params.get("method") == "rolling":
            return 3, "a rolling window"
        return 3, "a second-difference penalty"
    if name == "scatter_correction":
        return params.get("order", 0) + 2, f"order = {params.get('order', 0)}"
    return 0, ""


def _line_of(text, pattern):
    for i, ln in enumerate(text.splitlines(), 1):
        if re.match(pattern, ln):
            return f"line {i}"
    return ""


def _param_line(text, start, key):
    """Line of ``key = …`` inside the step whose header is on line ``start`` (1-based)."""
    lines = text.splitlines()
    for i in range(start, len(lines)):        # lines[start] is the line after the header
        if re.match(r"^\s*\[", lines[i]):
            break
        if re.match(rf"^\s*{re.escape(key)}\s*=", lines[i]):
            return f"line {i + 1}"
    return f"line {start}" if start else ""
