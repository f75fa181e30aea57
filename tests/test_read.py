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
    with pytest.raises(MapkitError, match=r"more than once \(in a.txt and b.jdx\)"):
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


def _foreign(path, cube, shift, shift_units=None, x=None, y=None, labels=None):
    """A 'foreign' HDF5 file: a cube stored in its own axis order, axes as plain datasets."""
    with h5py.File(path, "w") as f:
        d = f.create_dataset("data/cube", data=cube)
        s = f.create_dataset("data/axis", data=shift)
        if shift_units is not None:
            s.attrs["units"] = shift_units
        if x is not None:
            f["data/x"] = x
        if y is not None:
            f["data/y"] = y
        if labels:
            for k, name in enumerate(labels):
                d.dims[k].label = name
    return path


def test_a_wavelength_axis_is_converted_with_the_laser(tmp_path):
    # Raman shift = 10^7/laser - 10^7/wavelength (nm -> 1/cm; the definition of Stokes shift,
    # e.g. Ferraro, Nakamoto & Brown 2003, Introductory Raman Spectroscopy, ch. 1, from memory):
    # the silicon band at 520.7 1/cm lies at 547.157 nm under 532 nm excitation
    from mapkit.read.dispatch import read_notes

    wl = np.array([540.0, 547.157, 560.0, 580.0])
    p = _foreign(tmp_path / "wl.h5", np.ones((2, 3, 4), np.float32), wl, shift_units="nm")
    m = open_map(p, dataset="/data/cube", axes="y,x,raman_shift", shift="/data/axis",
                 pixel_size=1, laser_wavelength=532.0)
    assert m.raman_shift[1] == pytest.approx(520.7, abs=0.02)
    assert np.all(np.diff(m.raman_shift) > 0) and m.raman_shift[0] < 520
    assert any("in nm: converted" in n and "532 nm" in n for n in read_notes(m))
    with pytest.raises(MapkitError, match="wavelength in nm.*--laser"):
        open_map(p, dataset="/data/cube", axes="y,x,raman_shift", shift="/data/axis",
                 pixel_size=1)


@pytest.mark.parametrize("units", ["1/cm", "cm-1", "cm^-1", "cm⁻¹", "CM-1", "1/CM"])
def test_cm1_spellings_are_raman_shift(tmp_path, units):
    shift = np.array([100.0, 150, 200, 250])
    p = _foreign(tmp_path / "a.h5", np.ones((2, 3, 4), np.float32), shift, shift_units=units)
    m = open_map(p, dataset="/data/cube", axes="y,x,raman_shift", shift="/data/axis",
                 pixel_size=1)
    np.testing.assert_array_equal(m.raman_shift, shift)


@pytest.mark.parametrize("units", ["eV", "um", "THz", "pixel"])
def test_unknown_shift_units_are_refused(tmp_path, units):
    p = _foreign(tmp_path / "a.h5", np.ones((2, 3, 4), np.float32), [1.0, 2, 3, 4],
                 shift_units=units)
    with pytest.raises(MapkitError, match=f"units '{units}' are neither") as err:
        open_map(p, dataset="/data/cube", axes="y,x,raman_shift", shift="/data/axis",
                 pixel_size=1, laser_wavelength=532)
    assert "/data/axis" in str(err.value)


def test_axes_are_checked_against_the_position_datasets(tmp_path):
    cube = np.ones((5, 7, 4), np.float32)          # stored (y, x, shift): 5 rows, 7 columns
    p = _foreign(tmp_path / "a.h5", cube, [100.0, 150, 200, 250], x=np.arange(7.0),
                 y=np.arange(5.0))
    m = open_map(p, dataset="/data/cube", axes="y,x,shift", shift="/data/axis",
                 x="/data/x", y="/data/y")
    assert m.shape == (5, 7, 4)
    with pytest.raises(MapkitError) as err:           # the order given wrong
        open_map(p, dataset="/data/cube", axes="x,y,shift", shift="/data/axis",
                 x="/data/x", y="/data/y")
    msg = str(err.value)
    assert "--axes" in msg and "swapped" in msg and "check --axes" in msg


def test_axes_are_checked_against_dimension_labels_and_the_shift_axis(tmp_path):
    cube = np.ones((5, 7, 4), np.float32)
    p = _foreign(tmp_path / "a.h5", cube, [100.0, 150, 200, 250], labels=("y", "x", "shift"))
    with pytest.raises(MapkitError, match="--axes.*labels the dimensions.*pass --axes "
                                          "y,x,raman_shift"):
        open_map(p, dataset="/data/cube", axes="x,y,shift", shift="/data/axis", pixel_size=1)
    q = _foreign(tmp_path / "b.h5", cube, [100.0, 150, 200, 250])
    with pytest.raises(MapkitError, match="has 5; dimension 2 \\(4\\) matches; check --axes"):
        open_map(q, dataset="/data/cube", axes="raman_shift,y,x", shift="/data/axis",
                 pixel_size=1)


def test_an_unconfirmed_axis_order_is_reported(tmp_path):
    from mapkit.read.dispatch import read_notes

    p = _foreign(tmp_path / "a.h5", np.ones((5, 7, 4), np.float32), [100.0, 150, 200, 250])
    m = open_map(p, dataset="/data/cube", axes="x,y,shift", shift="/data/axis", pixel_size=1)
    assert m.shape == (7, 5, 4)
    notes = read_notes(m)
    assert any("--axes x,y,raman_shift alone" in n and "7 rows (y) x 5 columns" in n
               for n in notes), notes


@pytest.mark.parametrize("axes", ["pixel,raman_shift", "raman_shift,pixel"])
def test_a_stack_of_spectra_with_position_vectors(tmp_path, axes):
    c = _cube()                                     # (2, 3, 4) on a 3 x 2 grid, 0.5 um steps
    yy, xx = np.meshgrid([0.0, 0.5], [0.0, 0.5, 1.0], indexing="ij")
    order = np.random.default_rng(3).permutation(6)  # spectra stored in scan order unknown
    stack = c.reshape(6, 4)[order]
    p = _foreign(tmp_path / "s.h5", stack if axes.startswith("pixel") else stack.T,
                 [100.0, 150, 200, 250], x=xx.ravel()[order], y=yy.ravel()[order])
    m = open_map(p, dataset="/data/cube", axes=axes, shift="/data/axis", x="/data/x",
                 y="/data/y")
    np.testing.assert_array_equal(np.asarray(m.intensity), c)
    np.testing.assert_allclose(m.x, [0, 0.5, 1.0])
    with pytest.raises(MapkitError, match="needs the position of each spectrum"):
        open_map(p, dataset="/data/cube", axes=axes, shift="/data/axis", pixel_size=1)


@pytest.mark.parametrize("header", ["x (µm),y (µm)", "x [μm],y [μm]", "X_um,Y_um"])
def test_micro_sign_in_table_headers(tmp_path, header):
    p = tmp_path / "t.csv"
    p.write_text(f"{header},100,200\n0,0,1,2\n1,0,3,4\n")
    m = open_map(p)
    assert m.shape == (1, 2, 2) and m.x.tolist() == [0.0, 1.0]


def _jittered(tmp_path, amplitude=0.02):
    # a 6 x 8 grid of 1 um steps read back with +-0.02 um encoder jitter (common practice:
    # stage readback rather than commanded positions)
    rng = np.random.default_rng(7)
    rows = ["x,y,100,200,300"]
    for iy in range(6):
        for ix in range(8):
            jx, jy = rng.uniform(-amplitude, amplitude, 2)
            rows.append(f"{ix + jx:.4f},{2 * iy + jy:.4f},{ix},{iy},1")
    p = tmp_path / "jitter.csv"
    p.write_text("\n".join(rows) + "\n")
    return p


def test_jittered_positions_snap_within_a_stated_tolerance(tmp_path):
    from mapkit.read.dispatch import read_notes

    p = _jittered(tmp_path)
    with pytest.raises(MapkitError, match=r"not a rectangular grid: 48 distinct x and \d+ "
                                          "distinct y values for 48 spectra.*--position-tol"):
        open_map(p)
    m = open_map(p, position_tolerance=0.05)
    assert m.shape == (6, 8, 3)
    np.testing.assert_allclose(m.x, np.arange(8.0), atol=0.02)
    np.testing.assert_allclose(m.y, 2 * np.arange(6.0), atol=0.02)
    cube = np.asarray(m.intensity)
    np.testing.assert_array_equal(cube[..., 0], np.tile(np.arange(8.0), (6, 1)))
    np.testing.assert_array_equal(cube[..., 1], np.tile(np.arange(6.0)[:, None], (1, 8)))
    note, = read_notes(m)
    assert "of 48 positions to a 6 x 8 grid" in note and "tolerance 0.05 um" in note
    with pytest.raises(MapkitError, match="spread over more than the tolerance"):
        open_map(_jittered(tmp_path, amplitude=0.3), position_tolerance=0.2)
