"""Calibration standards: spectra with known analyte contents, from a wide text table.

Layout: optional comment lines, one of which may read
``# analyte: NAME; unit: UNIT``; then a header ``standard,concentration,<shift>,<shift>,…``
and one row per spectrum (the standard's name, its known content, intensities). Without
the comment the analyte must be named otherwise (``--analyte``): ``analyte_named`` says
whether the file named it.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..core.ramanmap import check_axis
from ..errors import MapkitError


@dataclass(frozen=True, eq=False)
class CalibrationSet:
    names: list
    concentration: np.ndarray
    raman_shift: np.ndarray
    spectra: np.ndarray
    analyte: str
    unit: str
    source: str
    analyte_named: bool = True


def read_calibration_set(path) -> CalibrationSet:
    path = Path(path)
    if not path.is_file():
        raise MapkitError("calibration standards file not found", file=path, fix="check the path")
    analyte, unit = "analyte", "% w/w"
    named = False
    header = None
    names, conc, rows = [], [], []
    for lineno, line in enumerate(path.read_text(encoding="utf-8-sig").splitlines(), 1):
        if not line.strip():
            continue
        if line.lstrip().startswith("#"):
            ma = re.search(r"analyte:\s*([^;]+)", line)
            mu = re.search(r"unit:\s*([^;]+)", line)
            analyte = ma.group(1).strip() if ma else analyte
            named = named or bool(ma)
            unit = mu.group(1).strip() if mu else unit
            continue
        cells = [c.strip() for c in line.split(",")]
        if header is None:
            header = cells
            if len(header) < 4 or header[1].lower() != "concentration":
                raise MapkitError("the header must read 'standard,concentration,<shift>,…'",
                                  file=path, field="header",
                                  fix="put the known content in the second column")
            try:
                shift = np.array([float(h) for h in header[2:]])
            except ValueError:
                raise MapkitError("header columns after the second must be Raman shifts",
                                  file=path, field="header", fix="write the shifts as numbers") from None
            continue
        if len(cells) != len(header):
            raise MapkitError(f"line {lineno} has {len(cells)} values, the header has {len(header)}",
                              file=path, field=f"line {lineno}", fix="make every row complete")
        vals = []
        for col, cell in enumerate(cells[1:], 1):
            if col == 1 and not cell:
                vals.append(np.nan)   # a missing concentration: reported below
                continue
            try:
                vals.append(float(cell))
            except ValueError:
                what = f"value {cell!r}" if cell else "an empty value"
                raise MapkitError(f"{what} in column {header[col]!r} (column {col + 1}) is not "
                                  "a number", file=path, field=f"line {lineno}",
                                  fix="write numbers with '.' as the decimal separator") from None
        c, vals = vals[0], vals[1:]
        if not np.isfinite(c) or c < 0:
            raise MapkitError(f"standard {cells[0]!r} has a missing or negative concentration",
                              file=path, field="concentration",
                              fix="give every standard its known, non-negative content")
        names.append(cells[0])
        conc.append(c)
        rows.append(vals)
    if header is None or not rows:
        raise MapkitError("no standards in the file", file=path, fix="add one row per spectrum")
    shift = check_axis(shift, name="raman_shift", source=str(path), field_path="header")
    return CalibrationSet(names, np.array(conc), shift, np.array(rows), analyte, unit, str(path),
                          named)
