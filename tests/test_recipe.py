"""Recipes: validation before any data is read, application, provenance, the CLI."""

import h5py
import numpy as np
import pytest

from mapkit import MapkitError
from mapkit.cli import main
from mapkit.preprocess.recipe import Recipe

GOOD = """\
[recipe]
name = "test"

[[step]]
name = "mask_bad_pixels"

[[step]]
name = "despike"
threshold = 9.0

[[step]]
name = "baseline"
method = "arpls"
lam = 1e5

[[step]]
name = "crop"
low = 200.0
high = 1700.0
"""


@pytest.mark.parametrize("edit, words, line", [
    (('method = "arpls"', 'method = "fancy"'), "method = 'fancy' is not allowed", 13),
    (("lam = 1e5", "lam = -1.0"), "out of range", 14),
    (("lam = 1e5", 'lam = "big"'), "wrong type", 14),
    (("lam = 1e5", "lamda = 1e5"), "no parameter 'lamda'", 14),
    (('name = "despike"', 'name = "despeckle"'), "unknown step 'despeckle'", 7),
    (("threshold = 9.0", "threshold = 1.0"), "out of range", 9),
    (("low = 200.0\n", ""), "needs low", 16),
    (("lam = 1e5", "p = 0.01"), "p does not apply to method 'arpls'", 14),
    (("[recipe]", "[recipe"), "not valid TOML", None),
])
def test_invalid_recipes_name_the_line_and_allowed_values(edit, words, line):
    with pytest.raises(MapkitError) as err:
        Recipe.from_text(GOOD.replace(*edit), "r.toml")
    msg = str(err.value)
    assert words in msg and msg.startswith("r.toml")
    if line:
        assert f"line {line}" in msg, msg


def test_allowed_values_are_listed():
    with pytest.raises(MapkitError, match="one of 'als', 'arpls', 'airpls', 'modpoly', 'rolling'"):
        Recipe.from_text(GOOD.replace('method = "arpls"', 'method = "x"'))


def test_recipe_applies_and_is_recorded(sample_map):
    r = Recipe.from_text(GOOD, "r.toml")
    out, extras = r.apply(sample_map)
    names = [s.name for s in out.provenance]
    assert names[-5:] == ["recipe", "mask_bad_pixels", "despike", "baseline", "crop"]
    assert out.provenance[-5].parameters["text"] == GOOD
    assert out.raman_shift.min() >= 200 and out.raman_shift.max() <= 1700
    # the recorded text alone reproduces the result
    again, _ = Recipe.from_text(out.provenance[-5].parameters["text"]).apply(sample_map)
    np.testing.assert_array_equal(again.intensity, out.intensity)


def test_bad_recipe_rejected_before_reading_data(tmp_path, capsys):
    (tmp_path / "r.toml").write_text(GOOD.replace("lam = 1e5", "lam = 0"))
    rc = main(["analyse", str(tmp_path / "missing.h5"), "--recipe", str(tmp_path / "r.toml"),
               "--out", str(tmp_path / "o"), "--quiet"])
    err = capsys.readouterr().err
    assert rc == 2 and "r.toml: line 14: lam = 0" in err   # not "file not found"


def test_preprocess_a_folder(tmp_path, sample_map_path, capsys):
    import shutil

    folder = tmp_path / "maps"
    folder.mkdir()
    for name in ("a.h5", "b.h5"):
        shutil.copy(sample_map_path, folder / name)
    (tmp_path / "r.toml").write_text(GOOD)
    assert main(["preprocess", str(folder), "--recipe", str(tmp_path / "r.toml"),
                 "--out", str(tmp_path / "clean")]) == 0
    out = capsys.readouterr().out
    assert "a_clean.h5" in out and "b_clean.h5" in out and "spike channels replaced" in out
    with h5py.File(tmp_path / "clean" / "a_clean.h5") as f:
        steps = [s.decode() if isinstance(s, bytes) else s for s in f["/entry/provenance/steps"]]
        assert any('"recipe"' in s and "arpls" in s for s in steps)


def test_steps_listing(capsys):
    assert main(["steps"]) == 0
    out = capsys.readouterr().out
    for name in ("despike", "baseline", "normalise", "scatter_correction", "correct_axis"):
        assert f"\n{name}:" in "\n" + out
    # the listing names the default recipe's baseline where it differs from the step
    # default, so a user does not read 'als' as what mapkit uses (consistency check)
    from mapkit.preprocess.recipe import Recipe

    used = dict(Recipe.default().steps)["baseline"]["method"]
    line = next(ln for ln in out.splitlines() if ln.strip().startswith("method (one of 'als'"))
    assert f"default recipe uses {used!r}" in line or f"default {used!r}" in line


def test_axis_calibrate_cli(tmp_path, capsys):
    from mapkit.preprocess.axis_calibration import REFERENCE_SHIFTS
    from mapkit.samples import write_jcamp

    s = np.linspace(500, 1700, 1500)
    truth = s + 1.2
    y = 100 + sum(800 * 16 / ((truth - p) ** 2 + 16) for p in REFERENCE_SHIFTS["polystyrene"])
    write_jcamp(tmp_path / "ps.jdx", "polystyrene", s, y)
    assert main(["axis-calibrate", str(tmp_path / "ps.jdx"), "--order", "1",
                 "--out", str(tmp_path / "axis.toml")]) == 0
    step = Recipe.from_text((tmp_path / "axis.toml").read_text())
    coef = step.steps[0][1]["coefficients"]
    assert coef[0] + coef[1] * 1000 == pytest.approx(1001.2, abs=0.05)


@pytest.mark.parametrize("step, words, line", [
    ('[[step]]\nname = "crop"\nlow = 1800.0\nhigh = 179.0\n', "crop low = 1800 is not below high = 179", 4),
    ('[[step]]\nname = "normalise"\nmethod = "band"\nlow = 1470.0\nhigh = 1430.0\n',
     "normalise low = 1470 is not below high = 1430", 5),
    ('[[step]]\nname = "resample"\nstart = 1800.0\nstop = 200.0\n', "start = 1800 is not below", 4),
])
def test_reversed_ranges_are_refused_not_swapped(step, words, line):
    with pytest.raises(MapkitError) as err:
        Recipe.from_text(step, "r.toml")
    msg = str(err.value)
    assert words in msg and f"r.toml: line {line}:" in msg, msg


def test_a_crop_too_narrow_for_a_later_step_names_the_crop_line():
    text = ('[[step]]\nname = "crop"\nlow = 100.0\nhigh = 179.0\n\n'
            '[[step]]\nname = "smooth"\nwindow = 11\n')
    r = Recipe.from_text(text, "r.toml")
    shift = np.linspace(100.0, 1900.0, 201)       # 9 cm-1 steps: 100-179 keeps 9 channels
    with pytest.raises(MapkitError) as err:
        r.check_axis(shift)
    msg = str(err.value)
    # the message docs/recipes.md quotes
    assert msg.startswith("r.toml: line 1: crop keeps 9 of 201 channels (100.0-172.0 1/cm), "
                          "fewer than the 11 that step 'smooth' (window = 11) needs; "), msg
    # what the analysis after the recipe needs counts as well
    ok = Recipe.from_text(text.replace("179.0", "1790.0"), "r.toml")
    assert ok.check_axis(shift).size == 188
    with pytest.raises(MapkitError, match="fewer than the 200 that NMF with 200 components"):
        ok.check_axis(shift, need=200, why="NMF with 200 components")


def test_a_band_outside_what_the_crop_left_names_its_line():
    text = ('[[step]]\nname = "crop"\nlow = 200.0\nhigh = 1000.0\n\n'
            '[[step]]\nname = "normalise"\nmethod = "band"\nlow = 1430.0\nhigh = 1470.0\n')
    with pytest.raises(MapkitError, match=r"r.toml: line 6: normalise: no channel lies in 1430-1470"):
        Recipe.from_text(text, "r.toml").check_axis(np.linspace(100.0, 1900.0, 201))


def test_a_narrow_crop_fails_before_cleaning(sample_map):
    # the crop's own line is named at apply time too, before any step runs
    text = GOOD.replace("low = 200.0\nhigh = 1700.0", "low = 400.0\nhigh = 401.0") + \
        '\n[[step]]\nname = "smooth"\nwindow = 7\n'
    r = Recipe.from_text(text, "r.toml")
    with pytest.raises(MapkitError, match="r.toml: line 16: crop keeps"):
        r.apply(sample_map)


def test_a_crop_keeping_a_small_share_is_reported_with_its_line():
    # 1700-1790 of a 100-1900 axis: enough channels for NMF with 4 components, but only
    # 10 of 201 (under a tenth): said, not refused
    r = Recipe.from_text('[[step]]\nname = "crop"\nlow = 1700.0\nhigh = 1790.0\n', "r.toml")
    notes = []
    axis = r.check_axis(np.linspace(100.0, 1900.0, 201), need=4, why="NMF", notes=notes)
    assert axis.size == 10                                       # 1702, 1711, ..., 1783
    assert notes == ["r.toml: line 1: crop keeps 10 of 201 channels (1702.0-1783.0 1/cm); "
                     "check the range if that was not meant"]
    notes = []
    r.check_axis(np.linspace(1500.0, 1900.0, 41), notes=notes)   # 10 of 41: silent
    assert notes == []
