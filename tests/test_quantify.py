"""Calibration statistics against a published worked example, and concentration maps."""

import numpy as np
import pytest

from mapkit import MapkitError
from mapkit.core.result import Axis
from mapkit.quantify import LinearCalibration, concentration_map

# Worked calibration set (Miller & Miller, Statistics and Chemometrics for Analytical
# Chemistry, fluorescence example): x = 0..12, y as below. Expected values computed from
# the data with the textbook formulas (shared/REFERENCE_VALUES.md): b = 1.93036,
# a = 1.51786, r = 0.99888, s_y/x = 0.43285; y0 = 2.9 -> x0 = 0.716, s_x0 = 0.265 (m = 1);
# ICH Q2(R2) LOD = 3.3 s_y/x / b = 0.740, LOQ = 10 s_y/x / b = 2.242.
X = [0, 2, 4, 6, 8, 10, 12]
Y = [2.1, 5.0, 9.0, 12.6, 17.3, 21.0, 24.7]


def test_miller_worked_example():
    cal = LinearCalibration().fit(X, Y)
    assert cal.slope_ == pytest.approx(1.93036, abs=1e-3)
    assert cal.intercept_ == pytest.approx(1.51786, abs=1e-3)
    assert cal.r_ == pytest.approx(0.99888, abs=1e-3)
    assert cal.s_yx_ == pytest.approx(0.43285, abs=1e-3)
    x0, s_x0 = cal.inverse(2.9)
    assert x0 == pytest.approx(0.716, abs=1e-3)
    assert s_x0 == pytest.approx(0.265, abs=1e-3)
    assert cal.lod_ == pytest.approx(0.740, abs=1e-3)
    assert cal.loq_ == pytest.approx(2.242, abs=1e-3)


def test_against_scipy_linregress():
    from scipy.stats import linregress

    cal = LinearCalibration().fit(X, Y)
    ref = linregress(X, Y)
    assert cal.slope_ == pytest.approx(ref.slope) and cal.r_ == pytest.approx(ref.rvalue)


def test_save_and_load(tmp_path):
    cal = LinearCalibration("api", "mg/mL").fit(X, Y)
    back = LinearCalibration.load(cal.save(tmp_path / "cal.json"))
    assert back.unit == "mg/mL" and back.slope_ == pytest.approx(cal.slope_)
    (tmp_path / "other.json").write_text('{"kind": "something"}')
    with pytest.raises(MapkitError, match="not a mapkit calibration"):
        LinearCalibration.load(tmp_path / "other.json")


@pytest.mark.parametrize("x, y, words", [
    ([1, 2], [1, 2], "distinct concentration levels"),
    ([1, 1, 2, 2], [1, 2, 3, 4], "distinct concentration levels"),
    ([1, 2, 3, 4], [5, 5, 5, 5], "does not change"),
    ([1, 2, np.nan, 4], [1, 2, 3, 4], "not finite"),
])
def test_bad_calibrations(x, y, words):
    with pytest.raises(MapkitError, match=words):
        LinearCalibration().fit(x, y)


def test_concentration_map_flags():
    cal = LinearCalibration().fit(X, Y)
    resp = np.array([[2.0, 12.6], [40.0, np.nan]])
    r = concentration_map(resp, cal, (Axis("y", np.arange(2.0), "um"), Axis("x", np.arange(2.0), "um")))
    flags = r.fields["flags"].data
    assert flags[0, 0] & 1 and flags[0, 0] & 2          # below LOD and LOQ
    assert flags[0, 1] == 0                            # inside
    assert flags[1, 0] & 4                             # above the highest standard
    assert flags[1, 1] & 8                             # masked / no response
    assert np.isnan(r.fields["concentration"].data[1, 1])
    assert r.fields["concentration"].errors[0, 1] > 0
