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
