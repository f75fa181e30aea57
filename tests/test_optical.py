"""The optical micrograph: reading its scale, registration from control points, storage.

Registration is checked against an independent least-squares solve in numpy (the normal
equations of the linear transform model: Hartley & Zisserman 2004, "Multiple View Geometry
in Computer Vision", 2nd ed., sec. 4.1 / 4.7, from memory) and against the transform the
synthetic micrograph was rendered with.
"""

import json

import h5py
import numpy as np
import pytest

from mapkit.errors import MapkitError
from mapkit.read.optical import read_control_points, read_optical, read_placed_image
from mapkit.register import ControlPointRegistration, place_image
from mapkit.samples import micrograph_matrix, render_micrograph

PIXEL_UM = 0.6


def _lstsq_affine(src, dst):
    """Affine by ordinary least squares: [x y 1] B = [X Y]."""
    a = np.c_[src, np.ones(len(src))]
    b, *_ = np.linalg.lstsq(a, dst, rcond=None)
    return np.vstack([b.T, [0, 0, 1]])


def _lstsq_similarity(src, dst):
    """Similarity X = a x - b y + tx, Y = b x + a y + ty, linear in (a, b, tx, ty)."""
    n = len(src)
    a = np.zeros((2 * n, 4))
    a[0::2] = np.c_[src[:, 0], -src[:, 1], np.ones(n), np.zeros(n)]
    a[1::2] = np.c_[src[:, 1], src[:, 0], np.zeros(n), np.ones(n)]
    p, *_ = np.linalg.lstsq(a, dst.ravel(), rcond=None)
    return np.array([[p[0], -p[1], p[2]], [p[1], p[0], p[3]], [0, 0, 1]])


def _apply(matrix, pts):
    return (matrix @ np.c_[pts, np.ones(len(pts))].T).T[:, :2]


@pytest.mark.parametrize("kind,shear", [("similarity", 0.0), ("affine", 0.04)])
@pytest.mark.parametrize("seed", range(8))
def test_registration_recovers_a_known_transform(kind, shear, seed):
    true = micrograph_matrix(rotation_deg=4.0 + seed, scale=1.02, shift=(-18.0, -12.0),
                             shear=shear)
    rng = np.random.default_rng(seed)
    stage = rng.uniform([5, 5], [120, 90], size=(8, 2))          # features on the map
    cam = _apply(np.linalg.inv(true), stage)
    # clicked to a tenth of a micrograph pixel (rounding error: sd 0.029 px)
    clicked = (np.round(cam / PIXEL_UM - 0.5, 1) + 0.5) * PIXEL_UM
    reg = ControlPointRegistration(kind).fit(clicked, stage)
    ref = (_lstsq_similarity if kind == "similarity" else _lstsq_affine)(clicked, stage)
    # scikit-image solves the homogeneous system by SVD, not the normal equations: the two
    # agree to ~1e-4 µm in the shift (measured over these seeds), far below a pixel
    np.testing.assert_allclose(reg.matrix_[:2, :2], ref[:2, :2], atol=1e-5)
    np.testing.assert_allclose(reg.matrix_[:2, 2], ref[:2, 2], atol=1e-3)
    # transform error over the map's field (where the features are), in micrograph pixels
    grid = _apply(np.linalg.inv(true), np.stack(np.meshgrid(np.linspace(0, 126, 9),
                                                            np.linspace(0, 94, 9)), -1).reshape(-1, 2))
    err_px = np.hypot(*(reg.transform(grid) - _apply(true, grid)).T) / PIXEL_UM
    assert np.sqrt(np.mean(err_px ** 2)) <= 0.1
    assert np.abs(reg.transform(grid) - _apply(ref, grid)).max() / PIXEL_UM < 1e-3
    # residuals are the distances the pairs miss by, and the RMS their root mean square
    resid = np.hypot(*(_apply(ref, clicked) - stage).T)
    np.testing.assert_allclose(reg.residuals_um_, resid, atol=1e-4)
    assert reg.rms_um_ == pytest.approx(np.sqrt(np.mean(resid ** 2)))


def test_a_wrong_pair_shows_in_its_residual():
    true = micrograph_matrix()
    stage = np.array([[10, 10], [110, 12], [115, 85], [15, 80], [60, 45.0]])
    cam = _apply(np.linalg.inv(true), stage)
    cam[2] += 5.0                       # one pair mis-clicked by 5 µm
    reg = ControlPointRegistration("similarity").fit(cam, stage)
    assert np.argmax(reg.residuals_um_) == 2
    assert reg.rms_um_ > 1.0


def test_resampled_micrograph_lands_on_the_map(tmp_path):
    """The rendered micrograph, registered from the sample's control points and resampled
    onto the map grid, matches a rendering made directly in stage coordinates."""
    from mapkit.read import open_map
    from mapkit.samples import sample_dir

    here = sample_dir()
    m = open_map(here / "tablet_map.h5")
    img = read_optical(here / "tablet_micrograph.png")
    placed, notices = place_image(img, m.x, m.y,
                                  read_control_points(here / "tablet_micrograph_points.csv", img))
    assert notices == []
    assert placed.registration["rms_um"] < 0.1 * PIXEL_UM
    # the same surface rendered with the camera aligned to the stage at the map's step
    # (its grain texture is drawn afresh, so even a perfect match correlates below 1)
    direct = render_micrograph(np.array([[1, 0, -1.0], [0, 1, -1.0], [0, 0, 1]]),
                               pixel_um=2.0, shape=m.shape[:2], label=False) / 255.0
    b = direct.mean(-1).ravel()
    r = {}
    for name, p in (("registered", placed), ("as read", place_image(img, m.x, m.y)[0])):
        a = p.resample(m.x, m.y).mean(-1).ravel()
        ok = np.isfinite(a)
        assert ok.mean() > (0.99 if name == "registered" else 0.5)
        r[name] = np.corrcoef(a[ok], b[ok])[0, 1]
    # measured 0.76 registered, -0.01 as read (3° and 21 µm off)
    assert r["registered"] > 0.6 and r["as read"] < 0.3


def test_pixel_to_map_matrix_agrees_with_resampling():
    img = read_optical_from_array(np.arange(12, dtype=np.uint8).reshape(3, 4) * 20, (0.5, 0.5),
                                  (10.0, 20.0))
    placed, _ = place_image(img, np.arange(0, 40, 2.0), np.arange(0, 40, 2.0))
    a = placed.pixel_to_map()
    # pixel (row 1, col 2) centre: x = 10 + 2.5 * 0.5, y = 20 + 1.5 * 0.5
    np.testing.assert_allclose(a @ [1, 2, 1], [20.75, 11.25, 1])


def read_optical_from_array(data, pixel_size, origin):
    from mapkit.read.optical import OpticalImage

    return OpticalImage(np.asarray(data), pixel_size, origin, source="array")


def _png(path, shape=(20, 30), rgb=True):
    from PIL import Image

    rng = np.random.default_rng(0)
    data = rng.integers(0, 255, shape + ((3,) if rgb else ()), dtype=np.uint8)
    Image.fromarray(data).save(path)
    return data


def test_scale_from_command_line_sidecar_and_tiff_tags(tmp_path):
    import tifffile

    data = _png(tmp_path / "a.png")
    with pytest.raises(MapkitError, match="no pixel size"):
        read_optical(tmp_path / "a.png")
    img = read_optical(tmp_path / "a.png", pixel_size=0.4, origin=(5, 6))
    np.testing.assert_array_equal(img.data, data)
    assert img.pixel_size == (0.4, 0.4) and img.origin == (5.0, 6.0)
    assert img.x[0] == pytest.approx(5.2) and img.y[-1] == pytest.approx(6 + 19.5 * 0.4)
    (tmp_path / "a.png.scale.json").write_text('{"pixel_size_um": [0.3, 0.35], "origin_um": [1, 2]}')
    img = read_optical(tmp_path / "a.png")
    assert img.pixel_size == (0.35, 0.3) and img.origin == (1.0, 2.0)
    assert img.scale_from.startswith("sidecar")
    assert read_optical(tmp_path / "a.png", pixel_size=0.5).pixel_size == (0.5, 0.5)
    # TIFF: 25 000 pixels per cm = 0.4 µm per pixel (TIFF 6.0, 1992, tags 282/283/296)
    tifffile.imwrite(tmp_path / "b.tif", data[..., 0], resolution=(25000, 25000),
                     resolutionunit=3)
    img = read_optical(tmp_path / "b.tif")
    assert img.pixel_size == pytest.approx((0.4, 0.4)) and img.scale_from == "TIFF resolution tags"
    # inch-based tags carry a print resolution, not the optics': ignored
    tifffile.imwrite(tmp_path / "c.tif", data[..., 0], resolution=(300, 300), resolutionunit=2)
    with pytest.raises(MapkitError, match="no pixel size"):
        read_optical(tmp_path / "c.tif")


def test_large_image_is_reduced_with_a_notice(tmp_path):
    import tifffile

    data = np.random.default_rng(1).integers(0, 255, (64, 96, 3), dtype=np.uint8)
    tifffile.imwrite(tmp_path / "big.tif", data)
    img = read_optical(tmp_path / "big.tif", pixel_size=0.5, max_bytes=data.nbytes // 10)
    assert img.downsampled == 4 and img.data.shape == (16, 24, 3)
    assert img.pixel_size == (2.0, 2.0)
    assert "reduced 4x" in img.notices[0]
    # block mean (the reduction), numpy's own reshape mean as reference
    ref = data.reshape(16, 4, 24, 4, 3).mean(axis=(1, 3))
    np.testing.assert_allclose(img.data, np.rint(ref), atol=0)
    # the corner stays where it was: pixel centres move by half the new pixel
    assert img.x[0] == pytest.approx(1.0)
    from PIL import Image

    Image.fromarray(data).save(tmp_path / "big.jpg", quality=95)
    jpg = read_optical(tmp_path / "big.jpg", pixel_size=0.5, max_bytes=data.nbytes // 10)
    assert jpg.downsampled == 4 and jpg.data.shape == (16, 24, 3)


def test_image_too_large_to_decode_is_refused(tmp_path, monkeypatch):
    import mapkit.read.optical as optical

    _png(tmp_path / "a.png", shape=(200, 300))
    monkeypatch.setattr(optical, "_memory_available", lambda: 100_000)
    with pytest.raises(MapkitError, match="needs .* GiB to decode"):
        read_optical(tmp_path / "a.png", pixel_size=1.0, max_bytes=10_000)


@pytest.mark.parametrize("rows,match", [
    ("image_x_um,image_y_um,map_x_um,map_y_um\n1,1,2,2\n5,1,6,2\n", "needs at least 3"),
    ("image_x_um,image_y_um,map_x_um,map_y_um\n1,1,2,2\n5,5,6,6\n9,9,10,10\n", "on one line"),
    ("image_x_um,image_y_um,map_x_um,map_y_um\n1,1,2,2\n5,1,6,2\n1,5,2,500\n", "outside the map"),
    ("image_x_um,image_y_um,map_x_um,map_y_um\n1,1,2,2\n5,1,6,2\n1,50,2,6\n", "outside the micrograph"),
    ("image_x_um,image_y_um,map_x\n1,1,2\n", "no column 'map_x_um'"),
    ("image_x_um,image_y_um,map_x_um,map_y_um\n1,1,2,x\n", "not a number"),
])
def test_bad_control_points(tmp_path, rows, match):
    img = read_optical_from_array(np.zeros((20, 20), np.uint8), (1.0, 1.0), (0.0, 0.0))
    (tmp_path / "p.csv").write_text(rows)
    with pytest.raises(MapkitError, match=match) as exc:
        pairs = read_control_points(tmp_path / "p.csv", img)
        place_image(img, np.arange(0, 20, 2.0), np.arange(0, 20, 2.0), pairs,
                    source=tmp_path / "p.csv")
    assert "\n" not in str(exc.value)


def test_stored_and_read_back(tmp_path):
    from mapkit.export.nexus import write_results_file
    from mapkit.read import open_map
    from mapkit.samples import sample_dir

    here = sample_dir()
    m = open_map(here / "tablet_map.h5")
    img = read_optical(here / "tablet_micrograph.png")
    placed, _ = place_image(img, m.x, m.y, read_control_points(
        here / "tablet_micrograph_points.csv", img), kind="affine")
    write_results_file(tmp_path / "r.h5", m, (), optical=placed)
    with h5py.File(tmp_path / "r.h5") as f:          # plain h5py: the documented layout
        g = f["/entry/optical"]
        assert g.attrs["NX_class"] == "NXdata" and g.attrs["signal"] == "image"
        assert list(g.attrs["axes"]) == ["y", "x", "channel"]
        assert g["x"].attrs["units"] == "um"
        np.testing.assert_allclose(g["x"][:2], [0.3, 0.9])
        prov = json.loads(g.attrs["provenance"])
        assert prov["source"] == "tablet_micrograph.png" and len(prov["sha256"]) == 64
        assert "SYNTHETIC" in prov["description"]
        r = f["/entry/optical_registration"]
        assert r.attrs["transform"] == "affine"
        assert r["residual_um"].shape == (6,)
        assert r.attrs["rms_um"] == pytest.approx(np.sqrt(np.mean(r["residual_um"][...] ** 2)))
    back = read_placed_image(tmp_path / "r.h5")
    np.testing.assert_allclose(back.matrix, placed.matrix)
    np.testing.assert_array_equal(back.image.data, img.data)
    np.testing.assert_allclose(back.pixel_to_map(), placed.pixel_to_map())


def test_size_checks_are_ours_not_pillows(tmp_path, monkeypatch):
    """Pillow's decompression-bomb limit would refuse a large micrograph with its own error;
    mapkit applies its memory budget instead (and restores Pillow's setting)."""
    from PIL import Image

    data = _png(tmp_path / "a.png")
    monkeypatch.setattr(Image, "MAX_IMAGE_PIXELS", 100)    # a 600-pixel image is a "bomb"
    img = read_optical(tmp_path / "a.png", pixel_size=1.0)
    np.testing.assert_array_equal(img.data, data)
    assert Image.MAX_IMAGE_PIXELS == 100
