"""The number of components chosen from the data (``--components auto``, the default).

The maps are built here from random band spectra (nothing from ``mapkit.scenes``): random
mixtures over a random smooth fluorescence per pixel, in Poisson counts. The count rests
on biwhitening (Landa, Zhang & Kluger 2022, SIAM J. Math. Data Sci. 4:1420, "Biwhitening
reveals the rank of a count matrix"): the shot noise becomes white with unit variance, so
its singular values stay below the Marchenko-Pastur edge √m + √n (Marchenko & Pastur 1967,
Math. USSR Sb. 1:457) and each material above it counts.
"""

import json

import numpy as np
import pytest

from mapkit import RamanMap
from mapkit.reduce import choose_n_components
from mapkit.reduce.factorise import AUTO_FALLBACK

SHIFT = np.linspace(300, 1700, 500)


def random_count_map(seed, k, shape=(30, 36), height=80.0, gain=1.0):
    """Counts (ny, nx, n) of k random band spectra mixed at random (Dirichlet) in every
    pixel, over a fluorescence of 1-3x the Raman signal that varies per pixel; ``gain``
    divides the counts (a detector reading gain electrons per unit)."""
    rng = np.random.default_rng([seed, k])
    S = np.zeros((k, SHIFT.size))
    for j in range(k):
        for _ in range(rng.integers(3, 7)):
            c = rng.uniform(SHIFT[0] + 30, SHIFT[-1] - 30)
            S[j] += rng.uniform(0.2, 1) * np.exp(-0.5 * ((SHIFT - c) / rng.uniform(3, 10)) ** 2)
        S[j] *= height / S[j].max()
    m = shape[0] * shape[1]
    A = rng.dirichlet(np.full(k, 0.5), m)
    t = (SHIFT - SHIFT[0]) / np.ptp(SHIFT)
    B = height * rng.uniform(1, 3, (m, 1)) * np.exp(-0.5 * ((t - rng.uniform(0.3, 0.9, (m, 1)))
                                                           / 0.4) ** 2) + 30
    X = rng.poisson(A @ S + B).astype(float) / gain
    return RamanMap(X.reshape(*shape, -1), raman_shift=SHIFT, x=np.arange(shape[1], dtype=float),
                    y=np.arange(shape[0], dtype=float))


@pytest.mark.parametrize("k", [2, 3, 5, 6])
def test_the_count_is_the_number_of_materials(k):
    for seed in (0, 1, 2):
        n, line = choose_n_components(random_count_map(seed, k))
        assert n == k, (k, seed, line)
        assert "chosen from the data" in line


def test_a_detector_gain_does_not_change_the_count():
    # counts read through a gain of 0.5-10 electrons per unit: the noise level moves to
    # 1/sqrt(gain) of the Poisson edge; the count, read against that level, stays, and the
    # guidance the components subcommand prints agrees
    from mapkit.reduce import component_number_guidance

    for gain in (0.5, 2.0, 10.0):
        m = random_count_map(0, 3, gain=gain)
        assert choose_n_components(m)[0] == 3, gain
        g = component_number_guidance(m)
        assert g["n_components"] == 3, gain
        assert g["noise_level"] == pytest.approx(gain ** -0.5, rel=0.15), gain
        # fewer values reported: the noise is still read past the components
        assert component_number_guidance(m, max_components=3)["noise_level"] == \
            pytest.approx(g["noise_level"]), gain


def test_data_that_are_not_counts_fall_back_with_a_notice():
    # intensities scaled to fractions of a count: the shot-noise model does not hold, the
    # map cannot say how many components it has, and the user is told to give the number
    m = random_count_map(0, 3)
    scaled = RamanMap(m.intensity * 1e-3, raman_shift=m.raman_shift, x=m.x, y=m.y)
    n, line = choose_n_components(scaled)
    assert n == AUTO_FALLBACK and "--components" in line and "counts" in line


def _write(tmp_path, m, name="map.h5"):
    from mapkit.export.nexus import write_map

    path = tmp_path / name
    write_map(path, m)
    return path


def test_analyse_chooses_the_count_and_says_so(tmp_path, capsys):
    from mapkit.cli import main

    path = _write(tmp_path, random_count_map(1, 3))
    assert main(["analyse", str(path), "--out", str(tmp_path / "auto"), "--no-figures",
                 "--quiet"]) == 0
    summary = json.loads((tmp_path / "auto" / "summary.json").read_text())
    assert summary["settings"]["n_components"] == 3
    assert any("chosen from the data" in n for n in summary["notices"])
    assert summary["timings_s"]["number of components"] >= 0   # a stage of its own
    assert "chosen from the data" in capsys.readouterr().out
    # a number given is a number kept
    assert main(["analyse", str(path), "--components", "5", "--out", str(tmp_path / "five"),
                 "--no-figures", "--quiet"]) == 0
    summary = json.loads((tmp_path / "five" / "summary.json").read_text())
    assert summary["settings"]["n_components"] == 5
    assert not any("chosen from the data" in n for n in summary["notices"])
    assert "number of components" not in summary["timings_s"]


def test_a_bad_component_count_is_one_line(tmp_path, capsys):
    from mapkit.cli import main

    path = _write(tmp_path, random_count_map(1, 2, shape=(6, 6)))
    with pytest.raises(SystemExit) as exc:
        main(["analyse", str(path), "--components", "several", "--out", str(tmp_path / "o")])
    assert exc.value.code == 2
    err = capsys.readouterr().err
    assert "--components" in err and "auto" in err and "Traceback" not in err


def test_too_few_spectra_fall_back_with_a_notice():
    # 9 spectra give 9 singular values: none past the components to read the noise from
    n, line = choose_n_components(random_count_map(0, 3, shape=(3, 3)))
    assert n == AUTO_FALLBACK and "too few" in line and "--components" in line


def test_components_subcommand_chooses_the_count_too(tmp_path, capsys):
    from mapkit.cli import main
    from mapkit.read.nexus import read_results

    path = _write(tmp_path, random_count_map(2, 3))
    assert main(["components", str(path), "--out", str(tmp_path / "o"), "--no-figures",
                 "--quiet"]) == 0
    assert "components: 3, chosen from the data" in capsys.readouterr().out
    spectra = read_results(tmp_path / "o" / "results.h5")["mcr"]["fields"]["spectra"]["data"]
    assert len(spectra) == 3


def test_report_overview_names_every_component_in_order():
    # the report's first lines: every component in its own order, an unmatched one said as
    # such (not dropped, not sorted away)
    from mapkit.core.result import Result
    from mapkit.export.report import _overview

    ident = [{"spectrum": "component 1", "match": "hematite"},
             {"spectrum": "component 2", "match": "unmatched"},
             {"spectrum": "component 3", "match": "goethite"}]
    res = {"mcr": Result("mcr", "mcr_als_background", {}, {}, {"identification": ident})}
    text = _overview("m.h5", {"shape": [4, 5, 100]}, res)
    assert ("3 components: component 1 as hematite; component 2 not identified; "
            "component 3 as goethite.") in text


def test_intensity_units_other_than_counts_are_said(tmp_path):
    # a map whose intensity is labelled a.u. is read as given, with a notice in the summary
    import h5py

    from mapkit.read import open_map
    from mapkit.read.dispatch import read_notes

    path = _write(tmp_path, random_count_map(1, 2, shape=(6, 6)))
    with h5py.File(path, "a") as f:
        f["entry/map/intensity"].attrs["units"] = "a.u."
    notes = read_notes(open_map(path))
    assert any("'a.u.', not counts" in n for n in notes), notes
    assert not read_notes(open_map(_write(tmp_path, random_count_map(1, 2, shape=(6, 6)),
                                          "counts.h5")))
