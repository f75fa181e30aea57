"""The reduction subcommands write documented results and report what they found."""

import h5py
import numpy as np
import pytest

from mapkit.cli import main


@pytest.mark.parametrize("args, group, words", [
    (["components", "--library", "LIB"], "mcr/spectra", "acetaminophen (HQI"),
    (["components", "--method", "nmf"], "nmf/spectra", "NMF: 4 components"),
    (["components", "--method", "mcr", "--init", "nmf"], "mcr/images", "lack of fit"),
    (["components", "--method", "pca", "--n", "5"], "pca/explained_variance", "PC4"),
    (["classes", "--guide", "2-5", "--library", "LIB"], "classes/domains",
     "highest silhouette at k = 4"),
    (["classes", "--method", "ward"], "classes/labels", "domains"),
    (["unmix", "--library", "LIB"], "unmixing/abundance", "residual RMS"),
    (["unmix", "--library", "LIB", "--method", "fcls"], "unmixing/abundance", "mean abundance"),
    (["peaks", "--range", "1075-1100", "--shape", "pseudo_voigt"], "peakfit/centre",
     "pseudo_voigt fit in 1075-1100"),
    (["bands", "--band", "api:845-872", "--measure", "centroid", "--ratio",
      "845-872/1080-1092"], "ratio_1/image", "denominator at noise"),
])
def test_reduction_commands(tmp_path, capsys, sample_map_path, sample_dir, args, group, words):
    args = [a.replace("LIB", str(sample_dir / "library")) for a in args]
    rc = main([args[0], str(sample_map_path), *args[1:], "--out", str(tmp_path), "--no-figures"])
    out = capsys.readouterr().out
    assert rc == 0, out
    assert words in out, out
    if "--library" in args and args[0] == "components":
        assert "on 0-1)" in out          # the hit-quality index is printed with its scale
    with h5py.File(tmp_path / "results.h5") as f:
        assert f"/entry/results/{group}" in f
        g = f[f"/entry/results/{group}"]
        assert g.attrs["NX_class"] == "NXdata"


def test_peaks_stress_map(tmp_path, capsys):
    from mapkit import RamanMap
    from mapkit.export import write_map

    rng = np.random.default_rng(0)
    s = np.arange(480.0, 561.0, 1.0)
    yy, xx = np.mgrid[:6, :8]
    centre = 520.7 - 0.2 * xx                   # a stress gradient along x
    cube = rng.poisson(80 + 900 / (1 + (2 * (s - centre[..., None]) / 4.0) ** 2)).astype(float)
    write_map(tmp_path / "wafer.h5", RamanMap(cube, raman_shift=s, x=xx[0] * 5.0, y=yy[:, 0] * 5.0))
    assert main(["peaks", str(tmp_path / "wafer.h5"), "--range", "500-540", "--stress", "uniaxial",
                 "--out", str(tmp_path / "o"), "--no-figures"]) == 0
    with h5py.File(tmp_path / "o" / "results.h5") as f:
        stress = f["/entry/results/silicon_stress/stress/stress"][...]
    # 0.2 1/cm per column at -2.3 1/cm/GPa (De Wolf 1996, from memory): +0.087 GPa per column
    slope = np.polyfit(np.tile(np.arange(8), 6), stress.ravel(), 1)[0]
    assert slope == pytest.approx(0.2 / 2.3, rel=0.05)


def test_unmix_needs_a_library(capsys, sample_map_path, tmp_path):
    with pytest.raises(SystemExit) as e:
        main(["unmix", str(sample_map_path), "--out", str(tmp_path)])
    assert e.value.code == 2


def test_svg_figures(tmp_path, sample_map_path):
    assert main(["bands", str(sample_map_path), "--band", "api:845-872", "--figure-format",
                 "both", "--out", str(tmp_path)]) == 0
    svg = (tmp_path / "tablet_map_api.svg").read_text()
    assert svg.lstrip().startswith("<?xml") and "<svg" in svg and "µm" in svg
    assert (tmp_path / "tablet_map_api.png").exists()
