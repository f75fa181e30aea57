"""Depth profiles: interfaces, layer thickness and the refraction correction.

References: the edge response of a Gaussian depth response is an error function (a
mathematical identity; the Gaussian model of the confocal depth response is common
practice, e.g. Everall 2000, Appl. Spectrosc. 54:1515, from memory), computed here
independently with ``scipy.ndimage.gaussian_filter1d`` on a fine grid; the paraxial
focal-shift scaling depth_true = depth_nominal * n_sample / n_immersion is common practice
(from memory; an approximation that depends on the numerical aperture). Refractive index of
polystyrene 1.59 near 589 nm (handbook value, from memory).
"""

import numpy as np
import pytest
from scipy.ndimage import gaussian_filter1d

from mapkit import MapkitError
from mapkit.cli import main
from mapkit.export import write_map
from mapkit.quantify.depth import (DepthProfile, correct_depth, depth_profile,
                                   locate_interfaces, refraction_scale)
from mapkit.reduce.unmix import ReferenceUnmixing
from mapkit.scenes import make_film_section

N_POLYSTYRENE = 1.59


def _blurred_layer(top, bottom, sigma, z):
    fine = np.arange(-20, 40, 0.005)
    ind = ((fine >= top) & (fine < bottom)).astype(float)
    return np.interp(z, fine, gaussian_filter1d(ind, sigma / 0.005, mode="nearest"))


def test_edges_of_a_blurred_layer_are_found():
    z = np.arange(-5, 20, 0.5)
    p = _blurred_layer(1.3, 7.9, 1.5, z)
    prof = DepthProfile(z, p[None], 0 * p[None], np.ones(z.size, int), ("a",))
    ints, layers = locate_interfaces(prof)
    assert [i.direction for i in ints] == ["rises", "falls"]
    assert ints[0].z == pytest.approx(1.3, abs=0.01) and ints[1].z == pytest.approx(7.9, abs=0.01)
    assert ints[0].blur_sigma == pytest.approx(1.5, rel=0.01)
    assert layers[0].thickness == pytest.approx(6.6, abs=0.02)


def test_a_thin_layer_is_not_biased_by_the_blur():
    """A layer only 1.3 blur widths thick: its 50 % crossings move, the fitted edges do not."""
    z = np.arange(-5, 15, 0.25)
    p = _blurred_layer(2.0, 4.0, 1.5, z)
    prof = DepthProfile(z, p[None], 0 * p[None], np.ones(z.size, int), ("a",))
    _, layers = locate_interfaces(prof)
    assert layers[0].thickness == pytest.approx(2.0, abs=0.02)


def test_a_single_step_and_its_uncertainty():
    rng = np.random.default_rng(0)
    z = np.arange(-5, 20, 0.5)
    errs, stated = [], []
    for _ in range(200):
        p = _blurred_layer(6.2, 99, 1.2, z) + rng.normal(0, 0.03, z.size)
        prof = DepthProfile(z, p[None], 0 * p[None], np.ones(z.size, int), ("b",))
        (i,), _ = locate_interfaces(prof)
        errs.append(i.z - 6.2)
        stated.append(i.z_err)
    # the stated standard error matches the scatter over repeats (within 25 %)
    assert np.std(errs) == pytest.approx(np.median(stated), rel=0.25)
    assert abs(np.mean(errs)) < 3 * np.std(errs) / np.sqrt(len(errs))


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_two_layer_film(seed):
    """Invented coating on a substrate, unmixed with its references, profile over x."""
    s = make_film_section(seed)
    m = s.to_map()
    f = ReferenceUnmixing(s.references(), baseline_order=1).fit(m).result(m).fields["abundance"]
    prof = depth_profile(f, m.z)
    ints, layers = locate_interfaces(prof)
    step = float(np.median(np.diff(m.z)))
    truth = s.truth
    coat, sub = s.names
    surface = [i for i in ints if i.component == coat and i.direction == "rises"][0]
    below = [i for i in ints if i.component == sub and i.direction == "rises"][0]
    above = [i for i in ints if i.component == coat and i.direction == "falls"][0]
    # the criterion: the interface within one depth step
    for i in (below, above):
        assert abs(i.z - truth["interface"]) < step
    assert abs(surface.z - truth["surface"]) < step
    # measured over seeds 0-2: |interface error| <= 0.13 um, thickness error <= 0.07 um
    assert abs(above.z - truth["interface"]) < 0.25
    (layer,) = layers
    assert abs(layer.thickness - truth["thickness"]) < 0.2
    assert 0 < layer.thickness_err < 0.2


def test_refraction_correction_is_the_closed_form_scaling():
    z = np.array([-3.0, 0.0, 2.5, 10.0])
    np.testing.assert_allclose(correct_depth(z, n_sample=N_POLYSTYRENE, surface=0.0),
                               [-3.0, 0.0, 2.5 * 1.59, 15.9])
    np.testing.assert_allclose(correct_depth(z, n_sample=1.5, n_immersion=1.33, surface=-3.0),
                               -3.0 + (z + 3.0) * 1.5 / 1.33)
    with pytest.raises(MapkitError, match="refractive index"):
        refraction_scale(0.5)
    s = make_film_section(0)
    m = s.to_map()
    f = ReferenceUnmixing(s.references(), baseline_order=1).fit(m).result(m).fields["abundance"]
    prof = depth_profile(f, m.z)
    _, (nominal,) = locate_interfaces(prof)
    corr = prof.corrected(n_sample=N_POLYSTYRENE, surface=nominal.top.z)
    _, (layer,) = locate_interfaces(corr)
    # the corrected thickness against the closed form (nominal thickness x n)
    assert layer.thickness == pytest.approx(nominal.thickness * N_POLYSTYRENE, rel=0.01)
    assert "paraxial" in corr.caution and "apparent" in prof.caution


def test_profile_at_a_point_and_over_a_region():
    rng = np.random.default_rng(3)
    img = rng.random((2, 6, 4, 5))            # (k, z, y, x): a volume
    p = depth_profile(img, np.arange(6.0), at=(1, 2))
    np.testing.assert_allclose(p.values, img[:, :, 1, 2])
    region = np.zeros((4, 5), bool)
    region[1:3, 0:2] = True
    q = depth_profile(img, np.arange(6.0), region=region)
    np.testing.assert_allclose(q.values, img[:, :, 1:3, 0:2].mean(axis=(2, 3)))
    np.testing.assert_allclose(q.sd, img[:, :, 1:3, 0:2].reshape(2, 6, -1).std(axis=-1, ddof=1))


def test_cli_depth_profile(tmp_path, capsys):
    s = make_film_section(1)
    path = write_map(tmp_path / "film.h5", s.to_map())
    lib = tmp_path / "lib"
    lib.mkdir()
    for n, spec in zip(s.names, s.truth["pure_spectra"]):
        (lib / f"{n}.txt").write_text("\n".join(f"{a},{b}" for a, b in zip(s.raman_shift, spec)))
    rc = main(["depth-profile", str(path), "--library", str(lib), "--out", str(tmp_path / "o")])
    out = capsys.readouterr().out
    assert rc == 0, out
    text = (tmp_path / "o" / "depth_profile.csv").read_text()
    assert "apparent" in text and "# layer: polystyrene" in text
    assert (tmp_path / "o" / "depth_section.png").stat().st_size > 0
    rc = main(["depth-profile", str(path), "--band", "ps:990-1012", "--at", "3", "--n-sample",
               "1.59", "--out", str(tmp_path / "p")])
    out = capsys.readouterr().out
    assert rc == 0 and "paraxial" in out and "layer     ps:" in out
    # an area map has no depth: one-line error, exit 2
    from mapkit.scenes import make_scene

    flat = write_map(tmp_path / "flat.h5", make_scene("grains", 0, (6, 7)).to_map())
    assert main(["depth-profile", str(flat), "--band", "990-1012", "--out",
                 str(tmp_path / "q")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "without a depth axis" in err[0]
