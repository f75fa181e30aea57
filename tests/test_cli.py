"""The command line: the demo end to end, and bad input as one-line errors with status 2."""

import json
import subprocess
import sys

import h5py
import numpy as np
import pytest

from mapkit.cli import main

from .conftest import SAMPLES, sha256


@pytest.fixture(scope="module")
def demo_out(tmp_path_factory, sample_dir):
    out = tmp_path_factory.mktemp("demo")
    before = {p: sha256(p) for p in sample_dir.rglob("*") if p.is_file()}
    rc = main(["demo", "--out", str(out), "--quiet"])
    after = {p: sha256(p) for p in sample_dir.rglob("*") if p.is_file()}
    return rc, out, before, after


def test_demo_writes_everything(demo_out):
    rc, out, before, after = demo_out
    assert rc == 0
    assert before == after, "inputs must never be modified"
    names = {p.name for p in out.iterdir()}
    for expected in ("results.h5", "summary.json", "quant_model.json", "report.html",
                     "tablet_map_maps.csv",
                     "tablet_map_classes_labels.tif", "tablet_map_classes_labels.png",
                     "tablet_map_concentration.tif", "tablet_map_concentration_uncertainty.tif",
                     "tablet_map_mcr_images.tif", "tablet_map_unmixing_abundance.tif"):
        assert expected in names, expected
    assert not [n for n in names if n.endswith(".part")]


def test_demo_results_file_layout(demo_out):
    _, out, *_ = demo_out
    with h5py.File(out / "results.h5", "r") as f:
        for group in ("mcr/images", "mcr/spectra", "classes/labels", "classes/class_spectra",
                      "unmixing/abundance", "concentration/concentration", "spikes/replaced"):
            assert f"/entry/results/{group}" in f, group
        conc = f["/entry/results/concentration/concentration"]
        assert conc["concentration"].attrs["units"] == "% w/w"
        assert "concentration_errors" in conc
        assert conc["x"].attrs["units"] == "um"
        versions = f["/entry/provenance"].attrs["versions"]
        for lib in ("mapkit", "numpy", "scipy", "scikit-learn", "h5py"):
            assert lib in versions
        inputs = f["/entry/provenance"].attrs["inputs"]
        assert "sha256" in inputs
        steps = [s.decode() if isinstance(s, bytes) else s for s in f["/entry/provenance/steps"][...]]
        assert any('"despike"' in s for s in steps) and any('"baseline"' in s for s in steps)
    # every file the results depend on is named with its SHA-256 (FIPS 180-4; reference:
    # hashlib over the file's bytes): the map, the standards and each library spectrum
    recorded = json.loads(inputs)
    for p in sorted((SAMPLES / "library").iterdir()):
        assert recorded[f"library: {p.name}"] == {"path": p.name, "sha256": sha256(p)}
    assert recorded["standards"]["sha256"] == sha256(SAMPLES / "calibration_standards.csv")


def test_report_gives_the_unmixing_numbers_of_the_results_file(demo_out):
    # the report's unmixing table states, per reference, the mean and median abundance
    # over the fitted pixels and the share of pixels where it is found; they must be the
    # numbers of the results file it describes (reference: numpy over the stored images)
    import re

    _, out, *_ = demo_out
    page = (out / "report.html").read_text()
    section = page.split("<h2>Unmixing against the reference spectra</h2>")[1].split("<h2>")[0]
    with h5py.File(out / "results.h5", "r") as f:
        g = f["/entry/results/unmixing/abundance"]
        data = g["abundance"][()]
        names = [n.decode() if isinstance(n, bytes) else str(n) for n in g["component"][()]]
        rms = f["/entry/results/unmixing/residual"]["residual_rms"][()]
    good = np.all(np.isfinite(data), axis=0)
    assert "weighted for shot noise" in section and "baseline terms of order" in section
    summary = json.loads((out / "summary.json").read_text())["results"]["unmixing"]   # same
    for k, name in enumerate(names):
        v = data[k][good]
        row = re.search(rf"<tr><td>{re.escape(name)}</td>(.*?)</tr>", section).group(1)
        cells = re.findall(r"<td>(.*?)</td>", row)
        assert cells[:2] == [f"{v.mean():.4g}", f"{np.median(v):.4g}"], (name, cells)
        assert cells[3] == f"{100 * (v > 0).mean():.4g}"
        assert summary["references"][name]["mean"] == pytest.approx(v.mean(), rel=1e-6)
        assert summary["references"][name]["p95"] == pytest.approx(np.percentile(v, 95),
                                                                   rel=1e-6)
    assert f"<td>{np.median(rms[np.isfinite(rms)]):.4g}</td>" in section
    assert summary["residual_rms_median"] == pytest.approx(np.median(rms[np.isfinite(rms)]))


def test_tiff_has_physical_pixel_size(demo_out):
    import tifffile

    _, out, *_ = demo_out
    with tifffile.TiffFile(out / "tablet_map_mcr_images.tif") as tif:
        assert tif.is_imagej
        assert tif.imagej_metadata["unit"] in ("micron", "um", "\\u00B5m")
        xres = tif.pages[0].tags["XResolution"].value
        assert xres[0] / xres[1] == pytest.approx(1 / 2.0)  # 2 µm pixels
        assert tif.series[0].shape == (4, 48, 64)
        assert "numpy" in tif.imagej_metadata["Info"]


def test_png_figures_are_pictures(demo_out):
    from PIL import Image

    _, out, *_ = demo_out
    img = np.asarray(Image.open(out / "tablet_map_concentration.png").convert("L"), float)
    assert img.shape[0] > 300 and img.std() > 20


def test_demo_is_reproducible(demo_out, tmp_path):
    _, out, *_ = demo_out
    assert main(["demo", "--out", str(tmp_path), "--quiet", "--no-figures"]) == 0
    with h5py.File(out / "results.h5") as a, h5py.File(tmp_path / "results.h5") as b:
        for path in ("/entry/map/intensity", "/entry/results/mcr/images/concentration",
                     "/entry/results/classes/labels/labels",
                     "/entry/results/concentration/concentration/concentration"):
            np.testing.assert_array_equal(a[path][...], b[path][...])


def test_existing_output_not_overwritten(demo_out, capsys):
    _, out, *_ = demo_out
    before = sha256(out / "results.h5")
    rc = main(["demo", "--out", str(out), "--quiet", "--no-figures"])
    err = capsys.readouterr().err
    assert rc == 2 and "exists" in err and "--overwrite" in err
    assert sha256(out / "results.h5") == before


def _write_h5(path, **datasets):
    with h5py.File(path, "w") as f:
        for name, (data, units) in datasets.items():
            d = f.create_dataset(name, data=data)
            if units:
                d.attrs["units"] = units


def _good(n=5):
    return {"entry/map/intensity": (np.ones((3, 4, n), np.float32) *
                                    np.arange(1, n + 1), None),
            "entry/map/x": (np.arange(4.0), "um"), "entry/map/y": (np.arange(3.0), "um"),
            "entry/map/raman_shift": (np.linspace(100, 500, n), "1/cm")}


def _case(tmp_path, name):
    p = tmp_path / "in.h5"
    d = _good()
    if name == "missing":
        return tmp_path / "nothere.h5", "file not found"
    if name == "not_hdf5":
        p.write_text("hello")
        return p, "not a readable HDF5 file"
    if name == "no_dataset":
        del d["entry/map/intensity"]
        _write_h5(p, **d)
        return p, "/entry/map/intensity: dataset is missing"
    if name == "wrong_rank":
        d["entry/map/intensity"] = (np.ones((3, 4)), None)
        _write_h5(p, **d)
        return p, "rank 2"
    if name == "shift_length":
        d["entry/map/raman_shift"] = (np.linspace(100, 500, 4), "1/cm")
        _write_h5(p, **d)
        return p, "4 values but the cube has 5"
    if name == "non_monotonic":
        d["entry/map/raman_shift"] = (np.array([100, 300, 200, 400, 500.0]), "1/cm")
        _write_h5(p, **d)
        return p, "not monotonic"
    if name == "duplicated":
        d["entry/map/raman_shift"] = (np.array([100, 200, 200, 400, 500.0]), "1/cm")
        _write_h5(p, **d)
        return p, "duplicated value"
    if name == "all_nan":
        d["entry/map/intensity"] = (np.full((3, 4, 5), np.nan, np.float32), None)
        _write_h5(p, **d)
        return p, "non-finite"
    if name == "ragged_text":
        p = tmp_path / "in.csv"
        p.write_text("x,y,100,200\n0,0,1,2\n1,0,3\n")
        return p, "line 3 has 3 values"
    raise AssertionError(name)


CASES = ["missing", "not_hdf5", "no_dataset", "wrong_rank", "shift_length", "non_monotonic",
         "duplicated", "all_nan", "ragged_text"]


@pytest.mark.parametrize("case", CASES)
def test_bad_input_one_line_exit_2(tmp_path, capsys, case):
    path, words = _case(tmp_path, case)
    digest = sha256(path) if path.exists() else None
    rc = main(["analyse", str(path), "--out", str(tmp_path / "out"), "--quiet", "--no-figures"])
    err = capsys.readouterr().err.strip()
    assert rc == 2, err
    assert len(err.splitlines()) == 1, err
    assert words in err and path.name in err, err
    assert "Traceback" not in err
    if digest:
        assert sha256(path) == digest, "input changed"


def test_nan_pixels_are_masked_and_reported(tmp_path, capsys):
    d = _good(40)
    cube = np.random.default_rng(0).poisson(100, (3, 4, 40)).astype(np.float32)
    cube[1, 2, 5] = np.nan
    cube[0, 0, :] = np.inf
    d["entry/map/intensity"] = (cube, None)
    p = tmp_path / "some_nan.h5"
    _write_h5(p, **d)
    rc = main(["analyse", str(p), "--out", str(tmp_path / "o"), "--quiet", "--no-figures",
               "--components", "2", "--classes", "2"])
    out = capsys.readouterr().out
    assert rc == 0
    assert "2 non-finite" in out


def test_console_script_exit_codes(tmp_path):
    bad = tmp_path / "x.h5"
    bad.write_text("not hdf5")
    r = subprocess.run([sys.executable, "-m", "mapkit.cli", "info", str(bad)],
                       capture_output=True, text=True)
    assert r.returncode == 2 and "Traceback" not in r.stderr and len(r.stderr.splitlines()) == 1
    r = subprocess.run([sys.executable, "-m", "mapkit.cli", "analyse", "--help"],
                       capture_output=True, text=True)
    assert r.returncode == 0 and "--library" in r.stdout


def test_info_and_spectrum(sample_map_path, capsys):
    assert main(["info", str(sample_map_path)]) == 0
    assert "48 x 64 pixels" in capsys.readouterr().out
    assert main(["spectrum", str(sample_map_path), "--at", "10", "4"]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert lines[0].startswith("# pixel x=10 um, y=4 um") and len(lines) == 602


def test_convert_from_text_then_analyse(tmp_path, capsys):
    rng = np.random.default_rng(5)
    rows = ["x,y," + ",".join(str(s) for s in range(200, 600, 10))]
    for iy in range(4):
        for ix in range(5):
            rows.append(f"{ix},{iy}," + ",".join(str(v) for v in rng.poisson(50, 40)))
    src = tmp_path / "scan.csv"
    src.write_text("\n".join(rows) + "\n")
    assert main(["convert", str(src), str(tmp_path / "scan.h5")]) == 0
    assert main(["analyse", str(tmp_path / "scan.h5"), "--out", str(tmp_path / "o"), "--quiet",
                 "--no-figures", "--components", "2", "--classes", "2",
                 "--band", "mid:300-400"]) == 0
    assert (tmp_path / "o" / "scan_mid.tif").exists()


def test_spectrum_into_a_closed_pipe_exits_cleanly(sample_map_path, monkeypatch, capsys):
    # a reader that stops early ('mapkit spectrum ... | head'): writes raise BrokenPipeError
    class ClosedPipe:
        def write(self, text):
            raise BrokenPipeError(32, "Broken pipe")

        def flush(self):
            raise BrokenPipeError(32, "Broken pipe")

    monkeypatch.setattr(sys, "stdout", ClosedPipe())
    rc = main(["spectrum", str(sample_map_path), "--at", "10", "4"])
    monkeypatch.undo()
    assert rc == 0 and capsys.readouterr().err == ""


def test_spectrum_through_head_in_a_real_pipe(sample_map_path):
    cmd = f"'{sys.executable}' -m mapkit.cli spectrum '{sample_map_path}' --at 10 4"
    r = subprocess.run(f"{cmd} | head -n 2", shell=True, capture_output=True, text=True,
                       executable="/bin/bash")
    assert r.stdout.splitlines()[0].startswith("# pixel x=10 um")
    assert "Error" not in r.stderr and "internal error" not in r.stderr, r.stderr
    # a reader gone before the first line (it exits while Python still imports numpy):
    # the status of mapkit itself (pipefail) is 0 and nothing is printed
    r = subprocess.run(f"set -o pipefail; {cmd} | true", shell=True, capture_output=True,
                       text=True, executable="/bin/bash")
    assert r.returncode == 0 and r.stderr == "", r.stderr


def test_spectrum_position_is_checked_against_the_map(sample_map_path, capsys):
    # the sample map: 64 x 48 pixels of 2 um from 0: half a pixel beyond the edge still is
    # the edge pixel, further out is an error
    assert main(["spectrum", str(sample_map_path), "--at", "126.9", "-0.9"]) == 0
    assert capsys.readouterr().out.startswith("# pixel x=126 um, y=0 um")
    assert main(["spectrum", str(sample_map_path), "--at", "10", "500"]) == 2
    err = capsys.readouterr().err
    assert "--at: y = 500 um lies outside the map (y 0 to 94 um)" in err


def test_convert_creates_the_output_folder_and_checks_first(tmp_path, sample_map_path, capsys):
    target = tmp_path / "new" / "deeper" / "map.h5"
    assert main(["convert", str(sample_map_path), str(target)]) == 0
    assert target.is_file()
    # an existing output is refused before the (broken) input is read
    broken = tmp_path / "broken.h5"
    broken.write_text("not HDF5")
    assert main(["convert", str(broken), str(target)]) == 2
    err = capsys.readouterr().err
    assert "the output file exists" in err and "not a readable" not in err


def test_every_option_has_help_text():
    import argparse

    from mapkit.cli import build_parser

    sub = next(a for a in build_parser()._actions if isinstance(a, argparse._SubParsersAction))
    missing = [f"{name} {'/'.join(act.option_strings) or act.dest}"
               for name, parser in sub.choices.items() for act in parser._actions
               if act.help is None and not isinstance(act, argparse._HelpAction)]
    assert not missing, missing


@pytest.mark.parametrize("command", ["unmix", "components", "classes", "peaks", "bands"])
def test_reduction_subcommands_accept_quiet(command):
    from mapkit.cli import build_parser

    extra = {"unmix": ["--library", "lib"], "peaks": ["--range", "500-540"]}.get(command, [])
    a = build_parser().parse_args([command, "map.h5", *extra, "--quiet"])
    assert a.quiet is True


def test_analyse_prints_the_unmixing_and_unit_of_the_content(tmp_path, capsys, sample_map_path,
                                                             sample_dir):
    # the terminal summary carries the unmixing's numbers (as summary.json does) and the
    # content line its unit and that flagged pixels are included
    rc = main(["analyse", str(sample_map_path), "--library", str(sample_dir / "library"),
               "--standards", str(sample_dir / "calibration_standards.csv"),
               "--component-method", "nmf", "--class-method", "kmeans", "--components", "3",
               "--out", str(tmp_path / "out")])
    out = capsys.readouterr().out
    assert rc == 0
    line = next(x for x in out.splitlines() if x.startswith("unmixing  mean abundance "))
    un = json.loads((tmp_path / "out" / "summary.json").read_text())["results"]["unmixing"]
    for name, v in un["references"].items():
        assert f"{name} {v['mean']:.3g}" in line
    assert f"median residual {un['residual_rms_median']:.3g} counts" in line
    content = next(x for x in out.splitlines() if x.startswith("content   mean "))
    assert "(flagged pixels included)" in content and content.count("% w/w") == 2


def test_report_reads_the_lack_of_fit_against_shot_noise(demo_out):
    # the components section gives the MCR lack of fit beside what shot noise alone would
    # leave (the numbers of summary.json), so a large value from fluorescence noise is not
    # read as a failed fit
    _, out, *_ = demo_out
    mcr = json.loads((out / "summary.json").read_text())["results"]["mcr"]
    page = (out / "report.html").read_text()
    assert (f"Lack of fit {mcr['lack_of_fit_pct']:.1f} % of the signal after the background; "
            f"shot noise alone would leave about {mcr['noise_lack_of_fit_pct']:.1f} %") in page
