"""Line scans, depth sections and volumes: the map type, the file layout and the readers.

The checks compare what is read against the arrays written (with plain h5py or as text),
so they do not depend on mapkit's own writer; the NeXus NXdata ``axes`` /
``<axis>_indices`` attributes follow the NeXus format definition (NIAC, NXdata base
class, https://manual.nexusformat.org/classes/base_classes/NXdata.html).
"""

import h5py
import numpy as np
import pytest

from mapkit import MapkitError, RamanMap
from mapkit.export import write_map
from mapkit.read import open_map, read_depth_stack, stack_depths

SHIFT = np.linspace(300.0, 1700.0, 12)


def _cube(*shape, seed=0):
    return np.random.default_rng(seed).poisson(100, shape + (SHIFT.size,)).astype(np.float32)


def test_old_map_is_unchanged():
    m = RamanMap(_cube(3, 4), raman_shift=SHIFT, x=np.arange(4.0), y=np.arange(3.0))
    assert m.dims == ("y", "x", "raman_shift") and m.kind == "map" and m.z is None
    line = RamanMap(_cube(1, 4), raman_shift=SHIFT, x=np.arange(4.0), y=[2.0])
    assert line.kind == "line" and line.n_pixels == 4


def test_section_and_volume_geometry():
    s = RamanMap(_cube(5, 4), raman_shift=SHIFT, x=np.arange(4.0), y=[1.0], z=np.arange(5) * 0.5)
    assert s.dims == ("z", "x", "raman_shift") and s.kind == "section"
    assert s.pixel_size == (0.5, 1.0) and s.z_step == 0.5 and s.mask.shape == (5, 4)
    v = RamanMap(_cube(3, 2, 4), raman_shift=SHIFT, x=np.arange(4.0), y=[0.0, 2.0], z=[0, 1, 2.0])
    assert v.dims == ("z", "y", "x", "raman_shift") and v.kind == "volume"
    assert v.n_pixels == 24 and v.spectra().shape == (24, SHIFT.size)
    np.testing.assert_array_equal(v.spectrum(2, 1, 3), v.intensity[2, 1, 3])
    with pytest.raises(MapkitError, match="4-D cube needs its depth axis"):
        RamanMap(_cube(3, 2, 4), raman_shift=SHIFT, x=np.arange(4.0), y=[0.0, 2.0])
    with pytest.raises(MapkitError, match="duplicated value"):
        RamanMap(_cube(3, 2, 4), raman_shift=SHIFT, x=np.arange(4.0), y=[0.0, 2.0], z=[0, 1, 1.0])


@pytest.mark.parametrize("kind", ["section", "volume"])
def test_nexus_round_trip(tmp_path, kind):
    if kind == "section":
        m = RamanMap(_cube(5, 4), raman_shift=SHIFT, x=np.arange(4.0), y=[3.0], z=np.arange(5.0))
        axes = ["z", "x", "raman_shift"]
    else:
        m = RamanMap(_cube(3, 2, 4), raman_shift=SHIFT, x=np.arange(4.0), y=[0., 2.], z=[0, 1, 2.])
        axes = ["z", "y", "x", "raman_shift"]
    p = write_map(tmp_path / "a.h5", m)
    with h5py.File(p, "r") as f:
        g = f["/entry/map"]
        assert list(g.attrs["axes"]) == axes
        assert [int(g.attrs[f"{a}_indices"]) for a in axes] == list(range(len(axes)))
        assert g["z"].attrs["units"] == "um"
        np.testing.assert_array_equal(g["intensity"][...], m.intensity)
        assert g["intensity"].chunks[-1] == SHIFT.size
    back = open_map(p)
    assert back.dims == m.dims and back.is_lazy
    np.testing.assert_array_equal(np.asarray(back.load().intensity), m.intensity)
    np.testing.assert_array_equal(back.z, m.z)
    np.testing.assert_array_equal(back.y, m.y)


def _wide_depth(path, xs, ys, zs, spectra, with_y=True):
    head = ("x,y,z," if with_y else "x,z,") + ",".join(f"{s:g}" for s in SHIFT)
    rows = [",".join([f"{x:g}"] + ([f"{y:g}"] if with_y else []) + [f"{z:g}"]
                     + [f"{v:g}" for v in spec]) for x, y, z, spec in zip(xs, ys, zs, spectra)]
    path.write_text("\n".join([head] + rows) + "\n")
    return path


def test_wide_table_section_and_volume(tmp_path):
    cube = _cube(3, 2, 4)                 # (z, y, x, shift)
    zz, yy, xx = np.meshgrid([0.0, 1.5, 3.0], [0.0, 2.0], np.arange(4.0), indexing="ij")
    order = np.random.default_rng(1).permutation(cube[..., 0].size)   # rows in any order
    flat = cube.reshape(-1, SHIFT.size)[order]
    v = open_map(_wide_depth(tmp_path / "v.csv", xx.ravel()[order], yy.ravel()[order],
                             zz.ravel()[order], flat))
    assert v.kind == "volume"
    np.testing.assert_array_equal(v.intensity, cube)
    np.testing.assert_array_equal(v.z, [0.0, 1.5, 3.0])
    sec = cube[:, 0]
    zz, xx = np.meshgrid([0.0, 1.5, 3.0], np.arange(4.0), indexing="ij")
    s = open_map(_wide_depth(tmp_path / "s.csv", xx.ravel(), 0 * xx.ravel(), zz.ravel(),
                             sec.reshape(-1, SHIFT.size), with_y=False))
    assert s.kind == "section" and s.dims[0] == "z"
    np.testing.assert_array_equal(s.intensity, sec)


def test_long_table_section(tmp_path):
    sec = _cube(3, 4)                     # (z, x, shift)
    rows = ["x,z,raman_shift,intensity"]
    for iz, z in enumerate([0.0, 2.0, 4.0]):
        for ix in range(4):
            rows += [f"{ix},{z},{s:g},{sec[iz, ix, k]:g}" for k, s in enumerate(SHIFT)]
    p = tmp_path / "long.csv"
    p.write_text("\n".join(rows) + "\n")
    s = open_map(p)
    assert s.dims == ("z", "x", "raman_shift")
    np.testing.assert_array_equal(s.intensity, sec)


def test_hdf5_dataset_with_stated_axis_order(tmp_path):
    cube = _cube(3, 2, 4)                 # (z, y, x, shift)
    p = tmp_path / "f.h5"
    with h5py.File(p, "w") as f:
        f["data"] = np.transpose(cube, (3, 2, 0, 1))     # stored as (shift, x, z, y)
        f["shift"], f["depth"], f["xs"], f["ys"] = SHIFT, [0.0, 1.0, 2.0], np.arange(4.0), [0., 2.]
    m = open_map(p, dataset="/data", axes="shift,x,depth,y", shift="/shift", z="/depth",
                 x="/xs", y="/ys")
    assert m.dims == ("z", "y", "x", "raman_shift")
    np.testing.assert_array_equal(np.asarray(m.load().intensity), cube)


def test_stack_of_maps_at_depths(tmp_path):
    layers = [_cube(2, 4, seed=k) for k in range(3)]
    paths = [write_map(tmp_path / f"z{k}.h5",
                       RamanMap(c, raman_shift=SHIFT, x=np.arange(4.0), y=[0.0, 1.0]))
             for k, c in enumerate(layers)]
    v = read_depth_stack(paths, [0.0, 2.0, 4.0])
    assert v.kind == "volume"
    np.testing.assert_array_equal(v.intensity, np.stack(layers))
    lines = [RamanMap(c[:1], raman_shift=SHIFT, x=np.arange(4.0), y=[0.0]) for c in layers]
    s = stack_depths(lines, [0.0, 2.0, 4.0])
    assert s.kind == "section"
    np.testing.assert_array_equal(s.intensity, np.stack([c[0] for c in layers]))
    with pytest.raises(MapkitError, match="duplicated value"):
        stack_depths(lines, [0.0, 2.0, 2.0])
    other = RamanMap(layers[0][:1], raman_shift=SHIFT, x=np.arange(4.0) + 0.5, y=[0.0])
    with pytest.raises(MapkitError, match="other x values"):
        stack_depths(lines[:2] + [other], [0.0, 2.0, 4.0])


def test_a_file_written_before_depth_axes_reads_as_an_area_map(sample_map_path):
    """The bundled tablet map was written before maps had a depth axis (its layout has no
    z): it opens as the same (y, x) map, and its NXdata axes are still the three of old."""
    import h5py

    from mapkit.read import open_map

    with h5py.File(sample_map_path) as f:
        assert [str(a) for a in f["entry/map"].attrs["axes"]] == ["y", "x", "raman_shift"]
        assert "z" not in f["entry/map"]
        shape = f["entry/map/intensity"].shape
    m = open_map(sample_map_path)
    assert m.dims == ("y", "x", "raman_shift") and m.kind == "map" and m.z is None
    assert m.shape == shape and m.spatial_dims == ("y", "x")
