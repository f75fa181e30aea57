"""``mapkit analyse --optical`` and ``mapkit micrograph`` on the invented tablet."""

import hashlib
import json

import h5py
import numpy as np
import pytest

from mapkit.cli import main


@pytest.fixture(scope="module")
def analysed(tmp_path_factory, sample_dir):
    import mapkit.read.optical as optical

    out = tmp_path_factory.mktemp("optical")
    mp = pytest.MonkeyPatch()
    # a budget below the micrograph's 283 kB: it must be reduced, with a notice
    mp.setattr(optical, "MAX_BYTES", 100_000)
    try:
        rc = main(["analyse", str(sample_dir / "tablet_map.h5"), "--out", str(out / "run"),
                   "--quiet", "--library", str(sample_dir / "library"),
                   "--optical", str(sample_dir / "tablet_micrograph.png"),
                   "--control-points", str(sample_dir / "tablet_micrograph_points.csv")])
    finally:
        mp.undo()
    assert rc == 0
    return out / "run"


def test_analyse_stores_and_reports_the_micrograph(analysed, capsys):
    summary = json.loads((analysed / "summary.json").read_text())
    opt = summary["optical"]
    assert opt["downsampled_by"] == 2 and opt["pixel_size_um"] == [1.2, 1.2]
    assert any("reduced 2x" in n for n in summary["notices"])
    reg = opt["registration"]
    assert reg["transform"] == "similarity" and reg["pairs"] == 6
    # the pairs were clicked to a tenth of a 0.6 µm pixel of the full image
    assert reg["rms_um"] < 0.1
    with h5py.File(analysed / "results.h5") as f:
        assert f["/entry/optical/image"].shape == (135, 175, 3)
        np.testing.assert_allclose(f["/entry/optical_registration/residual_um"][...],
                                   reg["residuals_um"])
        inputs = json.loads(f["/entry/provenance"].attrs["inputs"])
        assert set(inputs) >= {"map", "optical", "control_points"}
    for name in ("tablet_map_classes_labels_on_optical.png",
                 "tablet_map_mcr_component_1_on_optical.png",
                 "tablet_map_unmixing_acetaminophen_on_optical.png",
                 "tablet_map_optical_side_by_side.png"):
        assert (analysed / name).stat().st_size > 10_000
    report = (analysed / "report.html").read_text()
    assert "On the micrograph" in report and "RMS residual" in report


def test_micrograph_subcommand_writes_a_new_file(analysed, sample_dir, tmp_path, capsys):
    src = analysed / "results.h5"
    before = hashlib.sha256(src.read_bytes()).hexdigest()
    out = tmp_path / "with_optical.h5"
    assert main(["micrograph", str(src), str(sample_dir / "tablet_micrograph.png"),
                 "--control-points", str(sample_dir / "tablet_micrograph_points.csv"),
                 "--transform", "affine", "--out", str(out), "--no-figures"]) == 0
    printed = capsys.readouterr().out
    assert "affine from 6 pairs" in printed
    assert hashlib.sha256(src.read_bytes()).hexdigest() == before, "the input was modified"
    with h5py.File(out) as f:
        assert f["/entry/optical_registration"].attrs["transform"] == "affine"
        assert f["/entry/optical/image"].shape == (270, 350, 3)      # full size this time
        assert "/entry/results/classes/labels" in f                   # the results came along
    # a second run refuses to replace the file without --overwrite, and writes nothing
    assert main(["micrograph", str(src), str(sample_dir / "tablet_micrograph.png"),
                 "--out", str(out), "--no-figures"]) == 2
    assert "--overwrite" in capsys.readouterr().err
