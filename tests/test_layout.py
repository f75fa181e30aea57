"""The HDF5 layout, read back with plain h5py exactly as docs/file-layout.md documents it."""

import h5py
import numpy as np
import pytest

from mapkit import MapkitError, RamanMap, Step
from mapkit.core.result import Axis, Field, Result
from mapkit.export import write_map, write_results_file
from mapkit.read import open_map
from mapkit.read.nexus import read_results


@pytest.fixture
def m():
    rng = np.random.default_rng(1)
    return RamanMap(rng.random((5, 7, 11)).astype(np.float32), raman_shift=np.linspace(200, 1800, 11),
                    x=np.arange(7) * 0.5, y=10 + np.arange(5) * 0.5, laser_wavelength=785.0,
                    provenance=(Step("made", {"k": 1}),))


def test_documented_layout(tmp_path, m):
    p = write_map(tmp_path / "a.h5", m)
    with h5py.File(p, "r") as f:
        assert f["/entry"].attrs["NX_class"] == "NXentry"
        g = f["/entry/map"]
        assert g.attrs["NX_class"] == "NXdata"
        assert g.attrs["signal"] == "intensity"
        assert list(g.attrs["axes"]) == ["y", "x", "raman_shift"]
        d = g["intensity"]
        assert d.dtype == np.float32 and d.shape == (5, 7, 11)
        assert d.chunks[2] == 11, "chunks must hold whole spectra"
        np.testing.assert_array_equal(d[...], m.intensity)
        assert g["x"].attrs["units"] == "um" and g["y"].attrs["units"] == "um"
        assert g["raman_shift"].attrs["units"] == "1/cm"
        np.testing.assert_allclose(g["y"][...], m.y)
        assert g["mask"].dtype == np.uint8 and g["mask"].shape == (5, 7)
        lw = f["/entry/instrument/laser_wavelength"]
        assert lw[()] == 785.0 and lw.attrs["units"] == "nm"
        steps = f["/entry/provenance/steps"][...]
        assert b"made" in steps[0] or "made" in steps[0]
        assert "numpy" in f["/entry/provenance"].attrs["versions"]


def test_written_map_reads_back_lazily(tmp_path, m):
    p = write_map(tmp_path / "a.h5", m)
    back = open_map(p)
    assert back.is_lazy
    np.testing.assert_array_equal(back.spectrum(3, 4), m.intensity[3, 4])
    np.testing.assert_allclose(back.raman_shift, m.raman_shift)
    assert back.laser_wavelength == 785.0
    assert [s.name for s in back.provenance] == ["made"]


def test_file_written_by_someone_else_opens(tmp_path):
    """A map written with plain h5py following the documentation is read correctly."""
    p = tmp_path / "theirs.h5"
    cube = np.arange(2 * 3 * 4, dtype=np.float32).reshape(2, 3, 4)
    with h5py.File(p, "w") as f:
        g = f.create_group("entry").create_group("map")
        g.create_dataset("intensity", data=cube)
        for name, vals, unit in (("y", [0, 1.0], "um"), ("x", [0, 1, 2.0], "um"),
                                 ("raman_shift", [100, 200, 300, 400.0], "1/cm")):
            g.create_dataset(name, data=vals).attrs["units"] = unit
    m = open_map(p)
    assert m.shape == (2, 3, 4)
    np.testing.assert_array_equal(m.spectrum(1, 2), cube[1, 2])


def test_wrong_units_are_refused(tmp_path, m):
    p = write_map(tmp_path / "a.h5", m)
    with h5py.File(p, "a") as f:
        f["/entry/map/x"].attrs["units"] = "mm"
    with pytest.raises(MapkitError, match="units are 'mm'"):
        open_map(p)


def test_results_round_trip(tmp_path, m):
    img = Field("abundance", np.ones((2, 5, 7)), (Axis("component", np.array(["a", "b"])),
                                                  Axis("y", m.y, "um"), Axis("x", m.x, "um")),
                "a.u.", errors=np.full((2, 5, 7), 0.1))
    r = Result("unmixing", "nnls", {"order": 3}, {"abundance": img})
    p = write_results_file(tmp_path / "r.h5", m, [r])
    res = read_results(p)
    f = res["unmixing"]["fields"]["abundance"]
    assert res["unmixing"]["parameters"] == {"order": 3}
    assert f["data"].shape == (2, 5, 7) and f["errors"][0, 0, 0] == pytest.approx(0.1)
    with h5py.File(p, "r") as h:
        g = h["/entry/results/unmixing/abundance"]
        assert g.attrs["NX_class"] == "NXdata" and g.attrs["signal"] == "abundance"
        assert list(g.attrs["axes"]) == ["component", "y", "x"]
        assert "abundance_errors" in g


def test_outputs_are_atomic_and_not_overwritten(tmp_path, m):
    p = write_map(tmp_path / "a.h5", m)
    before = p.read_bytes()
    with pytest.raises(MapkitError, match="exists"):
        write_map(p, m)
    assert p.read_bytes() == before
    write_map(p, m, overwrite=True)
    assert [q.name for q in tmp_path.iterdir()] == ["a.h5"], "no temporary file left behind"
    with pytest.raises(MapkitError, match="directory"):
        write_map(tmp_path, m)


def test_documented_depth_layout(tmp_path):
    """The section and volume rows of docs/file-layout.md, read back with plain h5py."""
    rng = np.random.default_rng(2)
    shift = np.linspace(200, 1800, 11)
    sec = RamanMap(rng.random((4, 7, 11)).astype(np.float32), raman_shift=shift,
                   x=np.arange(7) * 0.5, y=[3.0], z=np.arange(4) * 2.0)
    vol = RamanMap(rng.random((3, 5, 7, 11)).astype(np.float32), raman_shift=shift,
                   x=np.arange(7) * 0.5, y=np.arange(5) * 0.5, z=np.arange(3) * 2.0)
    for m, axes in ((sec, ["z", "x", "raman_shift"]), (vol, ["z", "y", "x", "raman_shift"])):
        p = write_map(tmp_path / f"{m.kind}.h5", m, overwrite=True)
        with h5py.File(p, "r") as f:
            g = f["/entry/map"]
            assert list(g.attrs["axes"]) == axes
            for i, a in enumerate(axes):
                assert g.attrs[f"{a}_indices"] == i
            assert g["z"].attrs["units"] == "um" and "apparent" in g["z"].attrs["long_name"]
            assert g["intensity"].shape == m.shape and g["mask"].shape == m.shape[:-1]
            assert g["y"].shape == (m.y.size,)
            if m.kind == "volume":
                assert g["intensity"].chunks[0] == 1, "a volume is chunked one layer deep"
    with h5py.File(tmp_path / "section.h5", "r") as f:
        assert f["/entry/map/y"].shape == (1,)
