"""Reference spectra: two-column text and JCAMP-DX (IUPAC open standard), and libraries of them."""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..core.ramanmap import check_axis
from ..errors import MapkitError


@dataclass(frozen=True, eq=False)
class Spectrum:
    """One spectrum with its shift axis (cm⁻¹), a name and free-form metadata."""

    name: str
    raman_shift: np.ndarray
    intensity: np.ndarray
    metadata: dict = field(default_factory=dict)

    def on_axis(self, shift: np.ndarray) -> np.ndarray:
        """Intensity linearly interpolated onto ``shift``; outside the overlap it is an error."""
        lo, hi = sorted((self.raman_shift[0], self.raman_shift[-1]))
        tlo, thi = sorted((shift[0], shift[-1]))
        # a half-channel tolerance: axes that agree to rounding still count as covering
        tol = 0.5 * float(np.median(np.abs(np.diff(shift)))) if shift.size > 1 else 0.0
        if tlo < lo - tol or thi > hi + tol:
            raise MapkitError(
                f"reference covers {lo:.1f}-{hi:.1f} 1/cm, the map needs {tlo:.1f}-{thi:.1f} 1/cm",
                file=self.metadata.get("source"), field=self.name,
                fix="crop the map to the reference's range or supply a wider reference")
        order = np.argsort(self.raman_shift)
        return np.interp(shift, self.raman_shift[order], self.intensity[order])


def _two_column(path: Path) -> Spectrum:
    rows = []
    for lineno, line in enumerate(path.read_text(encoding="utf-8-sig").splitlines(), 1):
        s = line.strip()
        if not s or s.startswith("#"):
            continue
        cells = re.split(r"[,;\t ]+", s)
        try:
            vals = [float(c) for c in cells]
        except ValueError:
            if not rows:  # a header line
                continue
            raise MapkitError(f"line {lineno} is not two numbers: {s[:40]!r}", file=path,
                              field=f"line {lineno}", fix="write 'shift, intensity' per line") from None
        if len(vals) != 2:
            raise MapkitError(f"line {lineno} has {len(vals)} values, expected 2", file=path,
                              field=f"line {lineno}", fix="write 'shift, intensity' per line")
        rows.append(vals)
    if len(rows) < 2:
        raise MapkitError("fewer than two data points", file=path, fix="give a whole spectrum")
    a = np.array(rows)
    shift = check_axis(a[:, 0], name="raman_shift", source=str(path), field_path="column 1")
    return Spectrum(path.stem, shift, a[:, 1], {"source": str(path)})


def _jcamp(path: Path) -> Spectrum:
    """Read JCAMP-DX 4.24/5 with XYDATA=(X++(Y..Y)) or XYPOINTS=(XY..XY) in AFFN form."""
    labels: dict[str, str] = {}
    xs, ys = [], []
    mode = None
    for lineno, raw in enumerate(path.read_text(encoding="latin-1").splitlines(), 1):
        line = raw.split("$$")[0].strip()
        if not line:
            continue
        if line.startswith("##"):
            key, _, value = line[2:].partition("=")
            key = re.sub(r"[\s\-/_]", "", key).upper()
            labels[key] = value.strip()
            mode = None
            if key == "XYDATA":
                if "X++(Y..Y)" not in value.replace(" ", ""):
                    raise MapkitError(f"unsupported XYDATA form {value.strip()!r}", file=path,
                                      field="##XYDATA", fix="export as (X++(Y..Y))")
                mode = "xydata"
            elif key in ("XYPOINTS", "PEAKTABLE"):
                mode = "xypoints"
            continue
        if mode is None:
            continue
        if re.search(r"[@A-Za-z%]", line.replace("E", "").replace("e", "")):
            raise MapkitError(f"compressed (ASDF) data at line {lineno} is not supported",
                              file=path, field=f"line {lineno}",
                              fix="export the spectrum with uncompressed AFFN numbers")
        try:
            nums = [float(v) for v in re.split(r"[,;\s]+", line) if v]
        except ValueError:
            raise MapkitError(f"line {lineno} is not a row of numbers: {line[:30]!r}", file=path,
                              field=f"line {lineno}", fix="export the spectrum as plain AFFN "
                              "numbers") from None
        if not nums:
            continue
        if mode == "xydata":
            x0, yv = nums[0], nums[1:]
            xs.append((x0, len(yv)))
            ys.extend(yv)
        else:
            if len(nums) % 2:
                raise MapkitError(f"line {lineno} holds an odd number of values in an (XY..XY) "
                                  "block", file=path, field=f"line {lineno}",
                                  fix="give x,y pairs")
            xs.extend(nums[0::2])
            ys.extend(nums[1::2])
        if any(isinstance(v, tuple) for v in xs) and not all(isinstance(v, tuple) for v in xs):
            raise MapkitError("the file mixes ##XYDATA and ##XYPOINTS blocks", file=path,
                              field="##XYDATA", fix="export one spectrum per file")
    if not ys:
        raise MapkitError("no ##XYDATA or ##XYPOINTS block found", file=path, field="##XYDATA",
                          fix="export the spectrum as JCAMP-DX with XYDATA")
    def number(key, default):
        text = labels.get(key, "")
        if not text:
            return default
        try:
            return float(text)
        except ValueError:
            raise MapkitError(f"##{key}={text!r} is not a number", file=path, field=f"##{key}",
                              fix="repair the label or re-export the file") from None

    xfactor = number("XFACTOR", 1.0) or 1.0
    yfactor = number("YFACTOR", 1.0) or 1.0
    y = np.array(ys) * yfactor
    if isinstance(xs[0], tuple):
        first = number("FIRSTX", xs[0][0] * xfactor)
        last = number("LASTX", first)
        n = number("NPOINTS", float(y.size))
        if not np.isfinite(n) or n != int(n):
            raise MapkitError(f"##NPOINTS={n!r} is not a whole number", file=path,
                              field="##NPOINTS", fix="re-export the file")
        n = int(n)
        if n != y.size:
            raise MapkitError(f"##NPOINTS says {n} but {y.size} values were read", file=path,
                              field="##NPOINTS", fix="re-export the file; it may be truncated")
        x = np.linspace(first, last, n)
    else:
        x = np.array(xs) * xfactor
    units = labels.get("XUNITS", "1/CM").upper().replace(" ", "")
    if units not in ("1/CM", "CM-1", "CM^-1", "RAMANSHIFT"):
        raise MapkitError(f"x units {units!r} are not Raman shift in 1/cm", file=path,
                          field="##XUNITS", fix="convert the spectrum to Raman shift (1/CM)")
    shift = check_axis(x, name="raman_shift", source=str(path), field_path="##XYDATA")
    name = labels.get("TITLE") or path.stem
    return Spectrum(name, shift, y, {"source": str(path), **{k.lower(): v for k, v in labels.items()
                                                             if k in ("TITLE", "ORIGIN", "OWNER")}})


def read_reference(path) -> Spectrum:
    """Read one reference spectrum (``.jdx``/``.dx`` JCAMP-DX, else two-column text).

    Examples
    --------
    >>> import tempfile, pathlib
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "quartz.txt"
    >>> _ = p.write_text("shift,intensity\\n100,1\\n200,5\\n300,2\\n")
    >>> s = read_reference(p)
    >>> s.name, s.intensity.tolist()
    ('quartz', [1.0, 5.0, 2.0])
    """
    path = Path(path)
    if not path.is_file():
        raise MapkitError("reference spectrum not found", file=path, fix="check the path")
    if path.suffix.lower() in (".jdx", ".dx", ".jcamp"):
        return _jcamp(path)
    return _two_column(path)


#: the file types a library folder is read from
LIBRARY_SUFFIXES = (".jdx", ".dx", ".jcamp", ".txt", ".csv", ".tsv")


def library_files(path) -> list[Path]:
    """The reference files a library (a folder, or one file) is read from, in order."""
    path = Path(path)
    if path.is_dir():
        return sorted(p for p in path.iterdir() if p.suffix.lower() in LIBRARY_SUFFIXES)
    return [path]


def read_library(path) -> list[Spectrum]:
    """Every reference spectrum in a folder (or one file), names unique."""
    path = Path(path)
    if path.is_dir():
        files = library_files(path)
        if not files:
            raise MapkitError("no reference spectra (.jdx, .dx, .txt, .csv) in the folder",
                              file=path, fix="put one spectrum per file in it")
        library = [read_reference(p) for p in files]
    else:
        files = [path]
        library = [read_reference(path)]
    names = [s.name for s in library]
    dup = sorted({n for n in names if names.count(n) > 1})
    if dup:
        holders = [f.name for f, n in zip(files, names) if n == dup[0]]
        raise MapkitError(f"the library holds the name {dup[0]!r} more than once (in "
                          f"{' and '.join(holders)})", file=path,
                          field="names (a JCAMP-DX TITLE, or a text spectrum's file name)",
                          fix="give every reference a unique name")
    return library
