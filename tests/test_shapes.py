"""Every step and method on line scans, depth sections and volumes.

A per-spectrum step or method must give, on a section or volume, exactly what it gives on
the same spectra arranged as an ordinary (y, x) map (the 2-D paths are checked against
their outside references elsewhere: pybaselines, scikit-learn, published tables); only the
spatial axes of the results change. Methods that look at neighbours are checked on their
own: the spatial despike against a spike planted in one voxel and a real band present in
one depth layer only (a single-pixel event is a spike, a band shared with the in-plane
neighbours is not: the principle of neighbour-based cosmic-ray removal, common practice),
and 3-D domains against the closed-form volume and equivalent spherical diameter
ESD = 2 (3V / 4π)^(1/3) of a digital ball (from memory).
"""

import numpy as np
import pytest

from mapkit import MapkitError, RamanMap
from mapkit.preprocess.registry import get_step
from mapkit.reduce import class_domains
from mapkit.reduce.bands import band_image
from mapkit.reduce.factorise import MCRALS, NMFComponents, PCAScores
from mapkit.reduce.peakfit import peak_fit_map
from mapkit.reduce.segment import KMeansClasses
from mapkit.reduce.unmix import ReferenceUnmixing
from mapkit.read import Spectrum

from .test_steps_contract import CASES, IDS

SHIFT = np.linspace(400.0, 1200.0, 160)


def _pure():
    def band(c, w):
        return 1.0 / (1 + ((SHIFT - c) / w) ** 2)
    return np.stack([band(600, 6) + 0.4 * band(900, 10), band(760, 8) + 0.6 * band(1050, 7)])


def _cube(spatial, seed=0):
    rng = np.random.default_rng(seed)
    grid = np.indices(spatial).reshape(len(spatial), -1).T.astype(float)
    phase = grid @ rng.uniform(0.2, 0.5, len(spatial)) + rng.uniform(0, 6)
    a = 0.55 + 0.35 * np.cos(phase)                 # composition varies smoothly in space
    ab = np.c_[a, 1.1 - a]
    base = 50 + 20 * (SHIFT - 400) / 800
    lam = 400 * ab @ _pure() + base
    return rng.poisson(lam).astype(np.float32).reshape(*spatial, SHIFT.size)


def make(kind, seed=0):
    """(map of that kind, the same spectra as an ordinary (rows, x) map)."""
    if kind == "line":
        c = _cube((1, 12), seed)
        m = RamanMap(c, raman_shift=SHIFT, x=np.arange(12.0), y=[0.0])
    elif kind == "section":
        c = _cube((5, 8), seed)
        m = RamanMap(c, raman_shift=SHIFT, x=np.arange(8.0), y=[0.0], z=np.arange(5) * 0.5)
    else:
        c = _cube((3, 4, 5), seed)
        m = RamanMap(c, raman_shift=SHIFT, x=np.arange(5.0), y=np.arange(4.0), z=[0, 2, 4.0])
    rows = c.reshape(-1, c.shape[-2], SHIFT.size)
    flat = RamanMap(rows, raman_shift=SHIFT, x=m.x, y=np.arange(rows.shape[0], dtype=float))
    return m, flat


KINDS = ["line", "section", "volume"]
PER_SPECTRUM = [(n, p) for n, p in CASES if n not in ("despike", "bin") or
                p.get("method") == "spectral"]


@pytest.mark.parametrize("kind", KINDS)
@pytest.mark.parametrize("name, params", PER_SPECTRUM,
                         ids=[f"{n}-{p.get('method', '')}".rstrip("-") for n, p in PER_SPECTRUM])
def test_cleaning_step_on_every_shape(kind, name, params):
    m, flat = make(kind)
    out, extra = get_step(name).run(m, **get_step(name).validate(params))
    ref, _ = get_step(name).run(flat, **get_step(name).validate(params))
    assert out.dims == m.dims and out.shape[:-1] == m.shape[:-1]
    np.testing.assert_allclose(np.asarray(out.intensity).reshape(ref.shape),
                               np.asarray(ref.intensity), rtol=1e-6, atol=1e-6)
    np.testing.assert_array_equal(out.raman_shift, ref.raman_shift)
    if m.z is not None:
        np.testing.assert_array_equal(out.z, m.z)


@pytest.mark.parametrize("kind", KINDS)
def test_spatial_despike_uses_the_neighbours_that_exist(kind):
    m, _ = make(kind, seed=4)
    cube = np.asarray(m.intensity).copy()
    spatial = cube.shape[:-1]
    at = tuple(s // 2 for s in spatial)
    cube[at + (80,)] += 3000.0                 # a cosmic ray in one pixel / voxel
    if kind == "volume":                       # a real sharp band in one whole depth layer
        cube[1, :, :, 40] += 400.0
    spiked = RamanMap(cube, raman_shift=SHIFT, x=m.x, y=m.y, z=m.z)
    out, extra = get_step("despike").run(spiked, **get_step("despike").validate({}))
    flags = np.asarray(extra["spikes"])
    assert flags[at + (80,)], "the spike is found"
    assert abs(float(np.asarray(out.intensity)[at + (80,)]) - float(m.intensity[at + (80,)])) < 150
    if kind == "volume":
        assert not flags[1, :, :, 40].any(), "a band shared with in-plane neighbours stays"
    assert flags.sum() <= 3


@pytest.mark.parametrize("kind", ["section", "volume"])
def test_binning(kind):
    m, _ = make(kind)
    out, _ = get_step("bin").run(m, factor=2)
    if kind == "volume":     # each depth layer binned in (y, x); the depths are kept
        assert out.shape[:-1] == (3, 2, 2)
        np.testing.assert_array_equal(out.z, m.z)
        np.testing.assert_allclose(out.intensity[1, 0, 0],
                                   np.asarray(m.intensity)[1, :2, :2].mean(axis=(0, 1)),
                                   rtol=1e-6)
    else:                    # a section: tiles of 2 depths x 2 columns
        assert out.dims == m.dims and out.shape[:-1] == (2, 4)
        np.testing.assert_allclose(out.z, [0.25, 1.25])
    line, _ = make("line")
    with pytest.raises(MapkitError, match="leaves no pixel"):
        get_step("bin").run(line, factor=2)


def _methods():
    refs = [Spectrum(n, SHIFT, s) for n, s in zip(("a", "b"), _pure())]
    return {
        "bands": lambda m: band_image(m, 580, 620).fields["image"],
        "peakfit": lambda m: peak_fit_map(m, 570, 630).fields["centre"],
        "pca": lambda m: PCAScores(n_components=2).fit(m).result(m).fields["scores"],
        "nmf": lambda m: NMFComponents(n_components=2, random_state=0).fit(m)
        .result(m).fields["images"],
        "mcr": lambda m: MCRALS(n_components=2).fit(m).result(m).fields["images"],
        "classes": lambda m: KMeansClasses(n_classes=2, n_pca=2).fit(m).result(m)
        .fields["labels"],
        "unmixing": lambda m: ReferenceUnmixing(refs, baseline_order=1).fit(m).result(m)
        .fields["abundance"],
    }


@pytest.mark.parametrize("kind", KINDS)
@pytest.mark.parametrize("method", list(_methods()))
def test_method_on_every_shape(kind, method):
    m, flat = make(kind)
    run = _methods()[method]
    got, ref = run(m), run(flat)
    names = got.axis_names
    assert names[-len(m.spatial_dims):] == m.spatial_dims
    assert got.data.shape[-len(m.spatial_dims):] == m.shape[:-1]
    np.testing.assert_allclose(np.asarray(got.data).reshape(ref.data.shape), ref.data,
                               rtol=1e-6, atol=1e-9)


@pytest.mark.parametrize("kind", KINDS)
def test_content_map_on_every_shape(kind):
    from mapkit.quantify.calibration import PolynomialCalibration
    from mapkit.quantify.model import QuantModel
    from mapkit.quantify.response import Response

    m, flat = make(kind)
    resp = Response("band", "a", band=(580.0, 620.0))
    standards = np.array([0.0, 5.0, 10.0, 20.0])
    y = 3.0 + 40.0 * standards + np.array([1.0, -2.0, 1.5, -0.5])
    model = QuantModel(resp, PolynomialCalibration(1, "none", "a", "% w/w").fit(standards, y))
    got, ref = model.apply(m), model.apply(flat)
    c, c_ref = got.fields["concentration"], ref.fields["concentration"]
    assert c.axis_names == m.spatial_dims
    np.testing.assert_allclose(c.data.reshape(c_ref.data.shape), c_ref.data)


def test_domains_in_three_dimensions():
    z, y, x = np.mgrid[-6:7, -6:7, -6:7]
    ball = (x ** 2 + y ** 2 + z ** 2 <= 5 ** 2).astype(int)     # one class-0... inverted below
    labels = 1 - ball                                           # class 0: the ball
    spacing = (0.5, 0.5, 0.5)
    d = class_domains(labels, spacing, n_classes=2)
    assert d[0]["summary"]["domains"] == 1
    volume = float(d[0]["volume_um3"][0])
    assert volume == pytest.approx(ball.sum() * 0.125)
    # the digital ball of radius 5 voxels: volume close to 4/3 pi r^3, ESD close to 2 r
    assert volume == pytest.approx(4 / 3 * np.pi * 2.5 ** 3, rel=0.05)
    assert d[0]["esd_um"][0] == pytest.approx(2 * (3 * volume / (4 * np.pi)) ** (1 / 3))
    assert d[0]["esd_um"][0] == pytest.approx(5.0, rel=0.02)
    # two blobs touching only at a corner: separate with face connectivity, one with 3
    lab = np.ones((2, 2, 2), int)
    lab[0, 0, 0] = lab[1, 1, 1] = 0
    assert class_domains(lab, (1, 1, 1), n_classes=1)[0]["summary"]["domains"] == 2
    assert class_domains(lab, (1, 1, 1), connectivity=3, n_classes=1)[0]["summary"]["domains"] == 1


def test_classes_of_a_volume_report_volumes():
    m, _ = make("volume")
    r = KMeansClasses(n_classes=2, n_pca=2).fit(m).result(m)
    areas = r.summary["areas"]
    total = sum(v["volume_um3"] for v in areas.values())
    assert total == pytest.approx(m.n_pixels * 2.0 * 1.0 * 1.0)     # voxel 2 x 1 x 1 um
    assert r.fields["domains"].axis_names == ("z", "y", "x")


@pytest.mark.parametrize("kind", ["section", "volume"])
def test_lazy_equals_in_memory(tmp_path, monkeypatch, kind):
    """A depth map opened lazily (Dask over the file) is cleaned and measured chunk-wise
    exactly as in memory, the spatial despike included (chunks see a one-pixel halo)."""
    from mapkit import layout
    from mapkit.export import write_map
    from mapkit.read import open_map

    monkeypatch.setattr(layout, "CHUNK_BYTES", 4 * SHIFT.size * 4)   # 2 x 2 pixel tiles
    m, _ = make(kind, seed=2)
    cube = np.asarray(m.intensity).copy()
    cube[(0,) * (cube.ndim - 1) + (70,)] += 2500.0
    m = RamanMap(cube, raman_shift=SHIFT, x=m.x, y=m.y, z=m.z)
    lazy = open_map(write_map(tmp_path / "v.h5", m))
    assert lazy.is_lazy and lazy.intensity.numblocks[0] > 1
    for name, params in (("despike", {}), ("baseline", {"method": "als"}),
                         ("normalise", {"method": "snv"}), ("mask_bad_pixels", {})):
        spec = get_step(name)
        a, _ = spec.run(lazy, **spec.validate(params))
        b, _ = spec.run(m, **spec.validate(params))
        assert a.is_lazy
        np.testing.assert_allclose(np.asarray(a.intensity.compute()), np.asarray(b.intensity),
                                   rtol=1e-5, atol=1e-4)
        lazy, m = a, b
    np.testing.assert_allclose(band_image(lazy, 580, 620).fields["image"].data,
                               band_image(m, 580, 620).fields["image"].data, rtol=1e-6)


def test_tiff_stacks_carry_the_depth_step(tmp_path):
    """ImageJ hyperstack metadata (tifffile's ImageJ writer: ``spacing`` is the z step,
    resolution tags the x/y pixel size, unit micron)."""
    import json

    import tifffile

    from mapkit.core.result import Axis, Field
    from mapkit.export.tiff import write_tiff

    z, y, x = np.array([0.0, 1.5, 3.0]), np.arange(4) * 0.5, np.arange(5) * 0.25
    vol = Field("abundance", np.random.default_rng(0).random((2, 3, 4, 5)),
                (Axis("component", np.array(["a", "b"])), Axis("z", z, "um"),
                 Axis("y", y, "um"), Axis("x", x, "um")), "a.u.")
    p = write_tiff(tmp_path / "v.tif", vol)
    with tifffile.TiffFile(p) as t:
        meta = t.imagej_metadata
        assert meta["spacing"] == pytest.approx(1.5) and meta["unit"] == "micron"
        assert t.series[0].axes == "ZCYX" and t.series[0].shape == (3, 2, 4, 5)
        np.testing.assert_allclose(t.series[0].asarray()[2, 1], vol.data[1, 2], rtol=1e-6)
        xres = t.pages[0].tags["XResolution"].value
        assert xres[0] / xres[1] == pytest.approx(4.0)          # 1 / 0.25 um
        info = json.loads(meta["Info"])
        assert info["z_step_um"] == 1.5 and "apparent" in info["depth"]
    sec = Field("band_integral", np.ones((3, 5)), (Axis("z", z, "um"), Axis("x", x, "um")), "")
    with tifffile.TiffFile(write_tiff(tmp_path / "s.tif", sec)) as t:
        yres = t.pages[0].tags["YResolution"].value
        assert yres[0] / yres[1] == pytest.approx(1 / 1.5)      # rows are depths
        assert json.loads(t.imagej_metadata["Info"])["rows"] == "z"


@pytest.mark.parametrize("kind", ["section", "volume"])
def test_cli_on_depth_maps(tmp_path, capsys, kind):
    """The whole path (clean, components, classes, report) on a section and a volume."""
    from mapkit.cli import main
    from mapkit.export import write_map

    m, _ = make(kind, seed=1)
    path = write_map(tmp_path / f"{kind}.h5", m)
    rc = main(["analyse", str(path), "--quiet", "--components", "2", "--classes", "2",
               "--out", str(tmp_path / "o")])
    out, err = capsys.readouterr()
    assert rc == 0, err
    from mapkit.read.nexus import read_result_objects

    res = {r.name: r for r in read_result_objects(tmp_path / "o" / "results.h5")}
    labels = res["classes"].fields["labels"]
    assert labels.axis_names == m.spatial_dims and labels.data.shape == m.shape[:-1]
    assert (tmp_path / "o" / f"{kind}_classes_labels.tif").exists()
    csv = (tmp_path / "o" / f"{kind}_maps.csv").read_text().splitlines()
    assert csv[1].startswith("x [um],y [um],z [um]" if kind == "volume" else "x [um],z [um]")
    assert len(csv) == 2 + m.n_pixels


def test_cli_spectrum_of_a_voxel(tmp_path, capsys):
    from mapkit.cli import main
    from mapkit.export import write_map

    m, _ = make("volume")
    path = write_map(tmp_path / "v.h5", m)
    assert main(["spectrum", str(path), "--at", "3", "1", "2"]) == 0     # x y z in um
    out = capsys.readouterr().out.splitlines()
    assert out[0] == "# pixel x=3 um, y=1 um, z=2 um (column 3, row 1)"
    values = [float(line.split(",")[1]) for line in out[2:]]
    np.testing.assert_allclose(values, m.intensity[1, 1, 3], rtol=1e-5)
    assert main(["spectrum", str(path), "--at", "3", "1"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "this volume needs X Y Z" in err[0]
