"""Readers: text tables, any HDF5 dataset by path, reference spectra, libraries."""

import h5py
import numpy as np
import pytest

from mapkit import MapkitError
from mapkit.read import open_map, read_library, read_reference
from mapkit.samples import write_jcamp


def _cube():
    return np.arange(2 * 3 * 4, dtype=float).reshape(2, 3, 4) + 1  # (y, x, shift)


def _long_text(delim=","):
    c = _cube()
    rows = [delim.join(["x", "y", "raman_shift", "intensity"])]
    for iy in range(2):
        for ix in range(3):
            for k, s in enumerate([100, 150, 200, 250]):
                rows.append(delim.join(str(v) for v in (ix * 0.5, iy * 0.5, s, c[iy, ix, k])))
    return "\n".join(rows) + "\n"


@pytest.mark.parametrize("delim", [",", ";", "\t", " "])
def test_long_form_any_delimiter(tmp_path, delim):
    p = tmp_path / "long.txt"
    p.write_text(_long_text(delim))
    m = open_map(p)
    assert m.shape == (2, 3, 4)
    np.testing.assert_array_equal(m.intensity, _cube())
    np.testing.assert_allclose(m.x, [0, 0.5, 1.0])


def test_long_form_rows_in_any_order(tmp_path):
    lines = _long_text().splitlines()
    rng = np.random.default_rng(0)
    body = [lines[1:][i] for i in rng.permutation(len(lines) - 1)]
    p = tmp_path / "shuffled.csv"
    p.write_text("\n".join([lines[0]] + body) + "\n")
    np.testing.assert_array_equal(open_map(p).intensity, _cube())


def test_wide_form(tmp_path):
    c = _cube()
    rows = ["x,y,100,150,200,250"]
    for iy in range(2):
        for ix in range(3):
            rows.append(",".join([str(ix), str(iy)] + [str(v) for v in c[iy, ix]]))
    p = tmp_path / "wide.csv"
    p.write_text("\n".join(rows) + "\n")
    m = open_map(p)
    np.testing.assert_array_equal(m.intensity, c)
    np.testing.assert_array_equal(m.raman_shift, [100, 150, 200, 250])


@pytest.mark.parametrize("body, words", [
    ("x,y,100,200\n0,0,1,2\n1,0,3\n", "line 3 has 3 values"),
    ("x,y,100,200\n0,0,1,2\n0,0,3,4\n", "appears more than once"),
    ("x,y,100,200\n0,0,1,2\n1,0,3,4\n0,1,5,6\n", "not a rectangular grid"),
    ("x;y;100;200\n0;0;1,5;2\n", "not a number"),
    ("x,y,100,100\n0,0,1,2\n", "duplicated value"),
    ("x,y,200,100,300\n0,0,1,2,3\n", "not monotonic"),
    ("a,b,c\n1,2,3\n", "no x column"),
    ("x,y\n", "no data rows"),
])
def test_bad_tables(tmp_path, body, words):
    p = tmp_path / "bad.csv"
    p.write_text(body)
    with pytest.raises(MapkitError) as err:
        open_map(p)
    msg = str(err.value)
    assert words in msg and "bad.csv" in msg and "\n" not in msg


def test_any_hdf5_dataset_with_stated_axis_order(tmp_path):
    c = _cube()
    p = tmp_path / "instrument.h5"
    with h5py.File(p, "w") as f:
        f["data/cube"] = np.transpose(c, (2, 1, 0))  # stored as (shift, x, y)
        f["data/wn"] = [100.0, 150, 200, 250]
        f["data/flat"] = np.zeros((4, 5))
    m = open_map(p, dataset="/data/cube", axes="shift,x,y", shift="/data/wn", pixel_size=1.5)
    np.testing.assert_array_equal(np.asarray(m.intensity), c)
    np.testing.assert_allclose(m.x, [0, 1.5, 3.0])
    with pytest.raises(MapkitError, match="rank 2"):
        open_map(p, dataset="/data/flat", axes="y,x,shift", shift="/data/wn", pixel_size=1)
    with pytest.raises(MapkitError, match="no x positions"):
        open_map(p, dataset="/data/cube", axes="shift,x,y", shift="/data/wn")


def test_jcamp_round_trip(tmp_path):
    shift = np.linspace(100, 400, 31)
    y = np.exp(-((shift - 250) / 20) ** 2) * 100
    p = tmp_path / "ref.jdx"
    write_jcamp(p, "quartz-like", shift, y)
    s = read_reference(p)
    assert s.name == "quartz-like"
    np.testing.assert_allclose(s.raman_shift, shift)
    np.testing.assert_allclose(s.intensity, y, atol=1e-3)


def test_jcamp_handwritten_xypoints(tmp_path):
    # JCAMP-DX 4.24 (McDonald & Wilks 1988, Appl. Spectrosc. 42:151): ##XYPOINTS=(XY..XY)
    p = tmp_path / "peaks.dx"
    p.write_text("##TITLE=test\n##JCAMP-DX=4.24\n##XUNITS=1/CM\n##YUNITS=COUNTS\n"
                 "##XFACTOR=1\n##YFACTOR=2\n##NPOINTS=3\n##XYPOINTS=(XY..XY)\n"
                 "100, 1; 200, 2; 300, 3\n##END=\n")
    s = read_reference(p)
    np.testing.assert_allclose(s.raman_shift, [100, 200, 300])
    np.testing.assert_allclose(s.intensity, [2, 4, 6])


def test_jcamp_compressed_is_refused_clearly(tmp_path):
    p = tmp_path / "sqz.jdx"
    p.write_text("##TITLE=t\n##XUNITS=1/CM\n##FIRSTX=1\n##LASTX=4\n##NPOINTS=4\n"
                 "##XYDATA=(X++(Y..Y))\n1@A1B2C3\n##END=\n")
    with pytest.raises(MapkitError, match="compressed"):
        read_reference(p)


def test_library_and_resampling(sample_dir):
    lib = read_library(sample_dir / "library")
    assert sorted(s.name for s in lib) == ["acetaminophen", "anatase", "calcite", "cellulose"]
    api = next(s for s in lib if s.name == "acetaminophen")
    on = api.on_axis(np.linspace(800, 900, 101))
    assert on.argmax() == pytest.approx(58, abs=1)  # the 857.9 band (ASTM E1840)
    with pytest.raises(MapkitError, match="reference covers"):
        api.on_axis(np.linspace(50, 3000, 10))


def test_library_with_duplicate_names(tmp_path):
    for name in ("a.txt", "b.jdx"):
        if name.endswith(".txt"):
            (tmp_path / name).write_text("100,1\n200,2\n")
        else:
            write_jcamp(tmp_path / name, "a", np.array([100.0, 200.0]), np.array([1.0, 2.0]))
    with pytest.raises(MapkitError, match="more than once"):
        read_library(tmp_path)


@pytest.mark.parametrize("block_bytes", [None, 1, 700_000, 64 << 20])
def test_block_reads_give_the_same_cube(sample_map_path, block_bytes):
    # reference: h5py reading the whole dataset at once
    with h5py.File(sample_map_path) as f:
        want = f["entry/map/intensity"][...]
        tile = f["entry/map/intensity"].chunks
    m = open_map(sample_map_path, block_bytes=block_bytes)
    ty, tx = m.intensity.chunksize[:2]
    assert ty % tile[0] == 0 or ty == want.shape[0]          # whole file chunks only
    assert tx % tile[1] == 0 or tx == want.shape[1]
    if block_bytes in (None, 1):
        assert (ty, tx) == tile[:2]
    elif block_bytes > want.nbytes:
        assert m.intensity.numblocks == (1, 1, 1)
    np.testing.assert_array_equal(m.intensity.compute(), want)
