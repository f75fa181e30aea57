"""Quantification from the command line: calibrate, analyse with a model, batch, physics maps."""

import csv
import json
import shutil

import h5py
import numpy as np
import pytest

from mapkit import RamanMap
from mapkit.cli import main
from mapkit.export import write_map


@pytest.fixture(scope="module")
def model_dir(tmp_path_factory, sample_dir):
    out = tmp_path_factory.mktemp("model")
    rc = main(["calibrate", str(sample_dir / "calibration_standards.csv"), "--library",
               str(sample_dir / "library"), "--recipe", str(sample_dir / "tablet_recipe.toml"),
               "--model", "quadratic", "--out", str(out)])
    assert rc == 0
    return out


def test_calibrate_writes_model_recipe_and_figure(model_dir, capsys):
    for name in ("quant_model.json", "recipe.toml", "calibration.png"):
        assert (model_dir / name).exists()


def test_batch_applies_the_model_to_a_folder(model_dir, sample_dir, tmp_path, capsys):
    maps = tmp_path / "maps"
    maps.mkdir()
    shutil.copy(sample_dir / "blend_map.h5", maps / "lot_A.h5")
    shutil.copy(sample_dir / "blend_map.h5", maps / "lot_B.h5")
    rc = main(["batch", str(maps), "--model-file", str(model_dir / "quant_model.json"),
               "--library", str(sample_dir / "library"), "--out", str(tmp_path / "o"),
               "--no-figures"])
    assert rc == 0
    rows = list(csv.reader(open(tmp_path / "o" / "batch_summary.csv")))
    assert rows[0][:3] == ["map", "pixels", "mean [% w/w]"] and len(rows) == 3
    truth = np.load(sample_dir / "blend_truth.npz")["acetaminophen_pct"]
    assert float(rows[1][2]) == pytest.approx(truth.mean(), abs=0.5)
    with h5py.File(tmp_path / "o" / "lot_A" / "results.h5") as f:
        assert f["/entry/results/concentration/concentration/concentration"].attrs["units"] == "% w/w"


def test_model_refuses_another_recipe(model_dir, sample_dir, tmp_path, capsys):
    other = tmp_path / "other.toml"
    other.write_text((sample_dir / "tablet_recipe.toml").read_text().replace("1e6", "1e5"))
    rc = main(["analyse", str(sample_dir / "blend_map.h5"), "--model-file",
               str(model_dir / "quant_model.json"), "--library", str(sample_dir / "library"),
               "--recipe", str(other), "--out", str(tmp_path / "o"), "--quiet", "--no-figures"])
    err = capsys.readouterr().err
    assert rc == 2 and "another recipe" in err


def test_model_refuses_another_analyte(model_dir, sample_dir, tmp_path, capsys):
    rc = main(["analyse", str(sample_dir / "blend_map.h5"), "--model-file",
               str(model_dir / "quant_model.json"), "--library", str(sample_dir / "library"),
               "--recipe", str(sample_dir / "tablet_recipe.toml"), "--analyte", "calcite",
               "--out", str(tmp_path / "o"), "--quiet", "--no-figures"])
    assert rc == 2 and "quantifies 'acetaminophen'" in capsys.readouterr().err


def test_model_needs_its_references(model_dir, sample_dir, tmp_path, capsys):
    lib = tmp_path / "lib"
    shutil.copytree(sample_dir / "library", lib)
    (lib / "calcite.jdx").unlink()
    rc = main(["batch", str(sample_dir / "blend_map.h5"), "--model-file",
               str(model_dir / "quant_model.json"), "--library", str(lib),
               "--out", str(tmp_path / "o"), "--no-figures"])
    assert rc == 2 and "lacks 'calcite'" in capsys.readouterr().err


@pytest.mark.parametrize("edit, words", [
    (lambda rows: rows[:2] + [rows[2]], "distinct concentration levels"),
    (lambda rows: [rows[0]] + [r.replace(",20,", ",-20,", 1) for r in rows[1:]], "negative"),
    (lambda rows: [rows[0]] + [r.split(",", 2)[0] + ",," + r.split(",", 2)[2] if i == 3 else r
                               for i, r in enumerate(rows[1:], 1)], "missing"),
])
def test_bad_standards(sample_dir, tmp_path, capsys, edit, words):
    lines = (sample_dir / "calibration_standards.csv").read_text().splitlines()
    comment, rows = lines[0], lines[1:]
    bad = tmp_path / "bad.csv"
    bad.write_text("\n".join([comment] + edit(rows)) + "\n")
    rc = main(["calibrate", str(bad), "--library", str(sample_dir / "library"), "--out",
               str(tmp_path / "o")])
    err = capsys.readouterr().err
    assert rc == 2 and words in err and len(err.strip().splitlines()) == 1, err


def test_flat_response_is_refused(sample_dir, tmp_path, capsys):
    rc = main(["calibrate", str(sample_dir / "calibration_standards.csv"), "--response-band",
               "1700-1750", "--out", str(tmp_path / "o")])
    assert rc == 2 and "does not change" in capsys.readouterr().err


def test_analyse_regions_report_and_csv(sample_dir, tmp_path, capsys):
    rc = main(["analyse", str(sample_dir / "blend_map.h5"), "--library",
               str(sample_dir / "library"), "--standards",
               str(sample_dir / "calibration_standards.csv"), "--calibration-model", "quadratic",
               "--region", "left:0,0;90,0;90,155;0,155", "--out", str(tmp_path),
               "--quiet", "--no-figures"])
    assert rc == 0
    import json

    summary = json.loads((tmp_path / "summary.json").read_text())
    regions = summary["results"]["concentration"]["regions"]
    assert "left" in regions and "class 1" in regions
    truth = np.load(sample_dir / "blend_truth.npz")["acetaminophen_pct"]
    assert regions["left"]["mean"] == pytest.approx(truth[:, :19].mean(), abs=1.0)
    html = (tmp_path / "report.html").read_text()
    for heading in ("Calibration", "content map", "Spectral classes", "Cautions", "Provenance",
                    "IEC 60825-1", "data:image/png;base64"):
        assert heading in html
    header = (tmp_path / "blend_map_maps.csv").read_text().splitlines()[1]
    assert header.startswith("x [um],y [um],masked,") and "concentration [% w/w]" in header


def _write(tmp_path, name, cube, shift, laser=532.0):
    ny, nx, _ = cube.shape
    return write_map(tmp_path / name, RamanMap(cube, raman_shift=shift, x=np.arange(nx) * 1.0,
                                               y=np.arange(ny) * 1.0, laser_wavelength=laser))


def test_temperature_command(tmp_path, capsys):
    shift = np.linspace(-700, 700, 1401)
    # I_aS/I_S = [(nu0 + nu)/(nu0 - nu)]^n exp(-c2 nu/T), c2 = 1.438776877 cm K (CODATA
    # 2018), n = 3 for photon counting (Malyj & Griffiths 1983, Appl. Spectrosc. 37:315;
    # from memory): the spectra are built by hand for a photon-counting detector at 350 K
    nu0 = 1e7 / 532.0
    ratio = ((nu0 + 520.7) / (nu0 - 520.7)) ** 3 * np.exp(-1.438776877 * 520.7 / 350.0)
    band = lambda c: 20000 / (1 + ((shift - c) / 2.0) ** 2)  # noqa: E731
    spec = 50 + band(520.7) + ratio * band(-520.7)
    cube = np.random.default_rng(0).poisson(np.tile(spec, (4, 5, 1))).astype(float)
    path = _write(tmp_path, "si.h5", cube, shift)
    medians = {}
    for flag in ([], ["--energy-detection"]):
        out = tmp_path / ("o" + "".join(flag))
        assert main(["temperature", str(path), "--shift", "520.7", "--half-width", "12",
                     "--out", str(out), "--no-figures", *flag]) == 0
        with h5py.File(out / "results.h5") as f:
            medians[bool(flag)] = np.median(f["/entry/results/temperature/temperature/"
                                              "temperature"][...])
    text = capsys.readouterr().out
    assert "photon counting" in text and "relative spectral response" in text
    assert medians[False] == pytest.approx(350.0, abs=5.0)
    # read as energy detection the same spectra come out colder (by hand: 341.2 K)
    assert medians[True] == pytest.approx(medians[False] - 8.9, abs=0.5)


def test_crystallite_command(tmp_path):
    shift = np.linspace(1100, 1800, 701)
    spec = 30 + 800 / (1 + ((shift - 1350) / 5) ** 2) + 800 / (1 + ((shift - 1580) / 5) ** 2)
    cube = np.random.default_rng(1).poisson(np.tile(spec, (3, 3, 1))).astype(float)
    path = _write(tmp_path, "carbon.h5", cube, shift)
    assert main(["crystallite", str(path), "--recipe", "none", "--out", str(tmp_path / "o"),
                 "--no-figures"]) == 0
    with h5py.File(tmp_path / "o" / "results.h5") as f:
        la = f["/entry/results/crystallite_size/crystallite_size/crystallite_size"][...]
    assert np.median(la) == pytest.approx(19.2, rel=0.05)   # I_D/I_G = 1 at 532 nm


def test_a_saved_model_cleans_with_its_own_recipe(model_dir, sample_dir, tmp_path, capsys):
    # the model was calibrated with tablet_recipe.toml, not the default recipe: without
    # --recipe its own recipe is used (and said so); another recipe is refused before any
    # work with the way out
    rc = main(["analyse", str(sample_dir / "blend_map.h5"), "--model-file",
               str(model_dir / "quant_model.json"), "--library", str(sample_dir / "library"),
               "--out", str(tmp_path / "o"), "--quiet", "--no-figures", "--components", "2",
               "--classes", "2"])
    out, err = capsys.readouterr()
    assert rc == 0, err
    assert "recipe    the one saved in" in out
    with h5py.File(tmp_path / "o" / "results.h5") as f:
        steps = [s.decode() if isinstance(s, bytes) else s for s in f["/entry/provenance/steps"]]
    saved = (model_dir / "recipe.toml").read_text()
    assert any('"recipe"' in s and json.loads(s)["parameters"]["text"] == saved for s in steps)
    other = tmp_path / "other.toml"
    other.write_text(saved.replace("1e6", "1e5"))
    rc = main(["analyse", str(tmp_path / "missing.h5"), "--model-file",
               str(model_dir / "quant_model.json"), "--recipe", str(other),
               "--out", str(tmp_path / "o2"), "--quiet"])
    err = capsys.readouterr().err
    assert rc == 2 and "other.toml: --recipe: the map is cleaned with another recipe" in err
    assert "omit --recipe" in err and "file not found" not in err
