"""Fuzzed readers, crash-safe outputs, recorded versions and reported convergence."""

import json
import signal
import subprocess
import sys
import time

import h5py
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from mapkit import MapkitError

FUZZ = settings(max_examples=60, deadline=None,
                suppress_health_check=[HealthCheck.function_scoped_fixture])

cell = st.one_of(st.floats(allow_nan=True, allow_infinity=True).map(repr),
                 st.integers(-10, 10**6).map(str), st.text(max_size=6),
                 st.sampled_from(["x", "y", "raman_shift", "intensity", "1,5", "", "nan"]))
line = st.lists(cell, min_size=0, max_size=7).flatmap(
    lambda cells: st.sampled_from([",", ";", "\t", " "]).map(lambda d: d.join(cells)))
table = st.lists(line, min_size=0, max_size=12).map("\n".join)


@FUZZ
@given(text=table)
def test_fuzz_text_tables(tmp_path_factory, text):
    from mapkit.read import open_map

    path = tmp_path_factory.mktemp("t") / "f.csv"
    path.write_text(text)
    try:
        open_map(path)
    except MapkitError:
        pass


jcamp_line = st.one_of(
    st.sampled_from(["##TITLE=a", "##XUNITS=1/CM", "##XUNITS=NM", "##XYDATA=(X++(Y..Y))",
                     "##XYPOINTS=(XY..XY)", "##NPOINTS=3", "##FIRSTX=1", "##LASTX=9",
                     "##XFACTOR=0", "##YFACTOR=abc", "##END="]),
    st.lists(st.floats(allow_nan=True, allow_infinity=True).map(repr), max_size=6).map(" ".join),
    st.text(max_size=20))


@FUZZ
@given(lines=st.lists(jcamp_line, max_size=14))
def test_fuzz_jcamp_and_two_column(tmp_path_factory, lines):
    from mapkit.read import read_reference

    folder = tmp_path_factory.mktemp("j")
    for name in ("r.jdx", "r.txt"):
        (folder / name).write_text("\n".join(lines))
        try:
            read_reference(folder / name)
        except MapkitError:
            pass


@FUZZ
@given(shape=st.lists(st.integers(0, 4), min_size=0, max_size=4),
       dtype=st.sampled_from(["f4", "f8", "i2", "u1", "S3", "?"]),
       axis_len=st.integers(0, 5), units=st.sampled_from(["um", "1/cm", "mm", "", None]),
       monotonic=st.booleans(), fill=st.sampled_from([0.0, 1.0, np.nan, np.inf]))
def test_fuzz_hdf5_maps(tmp_path_factory, shape, dtype, axis_len, units, monotonic, fill):
    from mapkit.read import open_map

    path = tmp_path_factory.mktemp("h") / "m.h5"
    with h5py.File(path, "w") as f:
        data = np.full(shape, fill if dtype[0] == "f" else 1).astype(dtype)
        f.create_dataset("entry/map/intensity", data=data)
        for name in ("y", "x", "raman_shift"):
            vals = np.arange(axis_len, dtype=float)
            if not monotonic and axis_len > 2:
                vals[1] = vals[2]
            d = f.create_dataset(f"entry/map/{name}", data=vals)
            if units is not None:
                d.attrs["units"] = units
    try:
        m = open_map(path)
        m.spectrum(0, 0)
    except MapkitError:
        pass


@FUZZ
@given(text=st.text(max_size=200))
def test_fuzz_recipes(text):
    from mapkit.preprocess.recipe import Recipe

    try:
        Recipe.from_text(text)
    except MapkitError:
        pass


@FUZZ
@given(rows=st.lists(line, max_size=8))
def test_fuzz_calibration_tables(tmp_path_factory, rows):
    from mapkit.read.calibration_set import read_calibration_set

    path = tmp_path_factory.mktemp("c") / "s.csv"
    path.write_text("standard,concentration,100,200,300\n" + "\n".join(rows))
    try:
        read_calibration_set(path)
    except MapkitError:
        pass


# --- crash safety: kill a writer mid-export; the previous output survives intact
WRITER = """
import sys, numpy as np
from mapkit import RamanMap
from mapkit.export import write_map
cube = np.random.default_rng(0).random((400, 400, 256), dtype=np.float32)
m = RamanMap(cube, raman_shift=np.arange(256.0), x=np.arange(400.0), y=np.arange(400.0))
print("start", flush=True)
write_map(sys.argv[1], m, overwrite=True)
print("done", flush=True)
"""


@pytest.mark.parametrize("delay", [0.05, 0.3, 0.8])
def test_killed_export_leaves_previous_output_intact(tmp_path, delay):
    import hashlib

    from mapkit.export import write_map
    from mapkit import RamanMap

    target = tmp_path / "out.h5"
    old = RamanMap(np.ones((2, 2, 3), np.float32), raman_shift=[1.0, 2.0, 3.0], x=[0.0, 1.0],
                   y=[0.0, 1.0])
    write_map(target, old)
    digest = hashlib.sha256(target.read_bytes()).hexdigest()
    proc = subprocess.Popen([sys.executable, "-c", WRITER, str(target)], stdout=subprocess.PIPE,
                            text=True)
    assert proc.stdout.readline().strip() == "start"
    time.sleep(delay)
    proc.send_signal(signal.SIGKILL)
    proc.wait()
    # either the old file, untouched, or (if the writer finished first) a complete new one
    if hashlib.sha256(target.read_bytes()).hexdigest() != digest:
        with h5py.File(target) as f:
            assert f["/entry/map/intensity"].shape == (400, 400, 256)
    leftovers = [p.name for p in tmp_path.iterdir() if p.name != "out.h5"]
    assert all(n.startswith(".out.h5.") and n.endswith(".part") for n in leftovers)


# --- every output records the library versions
def test_every_output_records_versions(tmp_path):
    import tifffile

    from mapkit.cli import main

    assert main(["demo", "--out", str(tmp_path), "--quiet"]) == 0
    needed = ("mapkit", "numpy", "scipy", "scikit-learn", "h5py")
    with h5py.File(tmp_path / "results.h5") as f:
        versions = json.loads(f["/entry/provenance"].attrs["versions"])
    assert all(versions.get(k) for k in needed)
    with tifffile.TiffFile(tmp_path / "tablet_map_classes_labels.tif") as tif:
        info = json.loads(tif.imagej_metadata["Info"])
    assert all(info["versions"].get(k) for k in needed)
    for name in ("summary.json", "quant_model.json"):
        assert all(json.loads((tmp_path / name).read_text())["versions"].get(k) for k in needed)
    first = (tmp_path / "tablet_map_maps.csv").read_text().splitlines()[0]
    assert first.startswith("# mapkit long-form export") and "scikit-learn" in first
    assert "scikit-learn" in (tmp_path / "report.html").read_text()


# --- convergence failures are reported per pixel, not hidden
def test_baseline_convergence_is_reported(sample_map):
    from mapkit.preprocess.registry import run_step

    _, extras = run_step(sample_map, "baseline", {"method": "arpls", "lam": 1e6, "max_iter": 1})
    assert (~extras["converged"]).sum() > 100
    out, extras = run_step(sample_map, "baseline", {"method": "als", "max_iter": 50})
    assert extras["converged"].mean() > 0.99
    assert out.provenance[-1].parameters["not_converged"] == int((~extras["converged"]).sum())


def test_inputs_of_the_whole_session_are_unchanged(sample_dir, sample_digests):
    """Compared again at the end of the session by the fixture (conftest.py)."""
    assert sample_digests
