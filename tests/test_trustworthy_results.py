"""No silent wrong answers: FCLS on counts, collinear references, library matching with an
offset, peak-fit masking, lack of fit of a calibration, class numbering in every output."""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from mapkit import RamanMap
from mapkit.read.reference import Spectrum


def _bands(s, centres, width=8.0):
    return np.stack([1.0 / (1 + ((s - c) / width) ** 2) for c in centres])


def _counts_map(seed=0, ny=4, nx=5):
    """Pixels of three invented materials in raw counts: a per-pixel total (focus, laser
    power) of 2000-9000 counts, a sloping background and Poisson noise."""
    rng = np.random.default_rng(seed)
    s = np.linspace(200.0, 1800.0, 400)
    R = _bands(s, (465.0, 1086.0, 820.0)) + 0.3 * _bands(s, (700.0, 1400.0, 960.0), 20.0)
    shares = rng.dirichlet(np.ones(3), size=ny * nx)
    total = rng.uniform(2000, 9000, ny * nx)
    clean = (total[:, None] * shares) @ R + 300 + 0.1 * s
    cube = rng.poisson(clean).astype(float).reshape(ny, nx, -1)
    refs = [Spectrum(n, s, R[i]) for i, n in enumerate(("quartz", "calcite", "forsterite"))]
    return RamanMap(cube, raman_shift=s, x=np.arange(nx) * 1.0, y=np.arange(ny) * 1.0), refs, \
        shares, total


# --- item 4: FCLS on raw counts
def test_fcls_on_counts_matches_a_scaled_constrained_optimum():
    from scipy.optimize import minimize

    from mapkit.reduce import ReferenceUnmixing
    from mapkit.reduce.unmix import polynomial_basis

    m, refs, shares, total = _counts_map()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        # unweighted, to compare with the least-squares optimum below
        un = ReferenceUnmixing(refs, baseline_order=1, method="fcls", weights="none").fit(m)
    res = un.result(m)
    est = res.fields["abundance"].data.reshape(3, -1)
    # independent optimum: scipy's SLSQP on y = s R^T a + c0 + c1 t, a >= 0, sum(a) = 1,
    # s >= 0 (the fully constrained problem of Heinz & Chang 2001, IEEE TGRS 39:529, with a
    # free scale and free linear baseline terms)
    R = np.stack([r.intensity for r in refs])
    Q = polynomial_basis(m.raman_shift, 1)
    X = m.intensity.reshape(-1, m.shape[2])
    for i in range(X.shape[0]):
        y = X[i] / X[i].max()

        def cost(v):
            return np.sum((v[3] * (v[:3] @ R) + Q @ v[4:] - y) ** 2)

        ref = minimize(cost, np.r_[np.ones(3) / 3, 1.0, 0.0, 0.0], method="SLSQP",
                       bounds=[(0, None)] * 4 + [(None, None)] * 2,
                       constraints={"type": "eq", "fun": lambda v: v[:3].sum() - 1},
                       options={"ftol": 1e-14, "maxiter": 500})
        assert ref.success
        np.testing.assert_allclose(est[:, i], ref.x[:3], atol=2e-3)
        scale = res.fields["scale"].data.ravel()[i]
        assert scale == pytest.approx(ref.x[3] * X[i].max(), rel=2e-3)
    # and the shares are the invented ones (the mean total of ~5000 counts keeps noise small)
    rmse = np.sqrt(np.mean((est - shares.T) ** 2))
    assert rmse < 0.02, rmse
    assert np.corrcoef(res.fields["scale"].data.ravel(), total)[0, 1] > 0.99


def test_fcls_command_says_what_it_reports(tmp_path, capsys):
    from mapkit.cli import main
    from mapkit.export import write_map

    m, refs, _, _ = _counts_map(1)
    write_map(tmp_path / "counts.h5", m)
    lib = tmp_path / "lib"
    lib.mkdir()
    for r in refs:
        np.savetxt(lib / f"{r.name}.txt", np.c_[r.raman_shift, r.intensity])
    assert main(["unmix", str(tmp_path / "counts.h5"), "--library", str(lib), "--method", "fcls",
                 "--recipe", "none", "--out", str(tmp_path / "o"), "--no-figures"]) == 0
    out = capsys.readouterr().out
    assert "notice" in out and "shares summing to 1" in out and "'scale'" in out


# --- item 7: duplicate or collinear references
def test_collinear_references_are_reported_with_their_correlation(tmp_path, capsys):
    from mapkit.cli import main
    from mapkit.export import write_map
    from mapkit.reduce import ReferenceUnmixing

    m, refs, _, _ = _counts_map(2)
    s = m.raman_shift
    # a copy of quartz at another scale on a sloping offset: the same spectrum to the fit,
    # whose baseline terms absorb offset and slope
    twin = Spectrum("quartz-2", s, 3 * refs[0].intensity + 0.5 + 1e-4 * s)
    with pytest.warns(UserWarning, match=r"'quartz' and 'quartz-2' are nearly collinear "
                                         r"\(r = 1\.0000"):
        un = ReferenceUnmixing([*refs, twin], baseline_order=2).fit(m)
    assert [(a, b) for a, b, _ in un.collinear_] == [("quartz", "quartz-2")]
    # the threshold is |r| > 0.98 (common practice); the reference value is numpy's Pearson
    # r of the residuals after numpy.polyfit removes a quadratic from each spectrum
    def detrend(v):
        return v - np.polyval(np.polyfit(s, v, 2), s)

    r = np.corrcoef(detrend(refs[0].intensity), detrend(twin.intensity))[0, 1]
    assert un.collinear_[0][2] == pytest.approx(r, abs=1e-6)
    # quartz with 15 % of the calcite spectrum mixed in is still above the threshold
    near = Spectrum("quartz-ish", s, refs[0].intensity + 0.15 * refs[1].intensity)
    with pytest.warns(UserWarning, match=r"'quartz' and 'quartz-ish'") as rec:
        ReferenceUnmixing([refs[0], near, refs[2]], baseline_order=2).fit(m)
    r2 = np.corrcoef(detrend(refs[0].intensity), detrend(near.intensity))[0, 1]
    assert f"r = {r2:.4f}" in str(rec[0].message)
    with warnings.catch_warnings():
        warnings.simplefilter("error")   # distinct references: not a word
        ReferenceUnmixing(refs, baseline_order=2).fit(m)
    write_map(tmp_path / "m.h5", m)
    lib = tmp_path / "lib"
    lib.mkdir()
    for r_ in (*refs, twin):
        np.savetxt(lib / f"{r_.name}.txt", np.c_[r_.raman_shift, r_.intensity])
    assert main(["unmix", str(tmp_path / "m.h5"), "--library", str(lib), "--recipe", "none",
                 "--out", str(tmp_path / "o"), "--no-figures"]) == 0
    out = capsys.readouterr().out
    assert "notice    references 'quartz-2' and 'quartz' are nearly collinear (r = 1.0000" in out


# --- item 6: library matching compares like with like
def test_matching_ignores_an_offset_on_the_component():
    from mapkit.reduce import match_library

    s = np.linspace(100.0, 1800.0, 820)
    R = _bands(s, (465.0, 1086.0, 820.0), 3.0) + 0.2 * _bands(s, (206.0, 712.0, 1160.0), 3.0)
    lib = [Spectrum(n, s, R[i]) for i, n in enumerate(("quartz", "calcite", "forsterite"))]
    rng = np.random.default_rng(0)
    # NMF components sit on a floor of ~2 % of their maximum, with a little noise
    comps = R[:2] + 0.02 * R[:2].max(axis=1, keepdims=True) + rng.normal(0, 2e-3, (2, s.size))
    raw = match_library(comps, s, lib, baseline_order=None)
    assert all(r["match"] == "unmatched" for r in raw), raw   # what the raw HQI did (< 0.9)
    res = match_library(comps, s, lib, names=["c1", "c2"])
    assert [r["match"] for r in res] == ["quartz", "calcite"]
    # reference value: the squared Pearson r of the residuals after numpy.polyfit removes a
    # straight line from both sides (HQI as squared cosine, common practice)
    def detrend(v):
        return v - np.polyval(np.polyfit(s, v, 1), s)

    for r, c, ref in zip(res, comps, R[:2]):
        assert r["score"] == pytest.approx(np.corrcoef(detrend(c), detrend(ref))[0, 1] ** 2,
                                           abs=1e-9)
        assert r["score"] > 0.99
    # an inverted spectrum correlates at r = -1 after the trend removal: not a match
    inverted = match_library(-R[:1] + 1.0, s, lib)[0]
    assert inverted["match"] == "unmatched" and inverted["score"] < 0.01


def test_unmatched_components_name_the_best_candidate(tmp_path, capsys, sample_map_path,
                                                      sample_dir):
    from mapkit.cli import main

    assert main(["components", str(sample_map_path), "--library", str(sample_dir / "library"),
                 "--min-score", "0.99999", "--out", str(tmp_path), "--no-figures"]) == 0
    out = capsys.readouterr().out
    assert "unmatched (best candidate " in out and "on 0-1, below the minimum score 0.99999)" in out


def test_analyse_takes_min_score_and_reports_the_best_candidate(tmp_path, capsys,
                                                               sample_map_path, sample_dir):
    from mapkit.cli import main

    assert main(["analyse", str(sample_map_path), "--library", str(sample_dir / "library"),
                 "--min-score", "0.99999", "--out", str(tmp_path), "--quiet"]) == 0
    out = capsys.readouterr().out
    line = next(ln for ln in out.splitlines() if ln.startswith("components"))
    assert line.count("unmatched (best candidate") == 4, line
    html = (tmp_path / "report.html").read_text()
    assert "best candidate acetaminophen" in html and "HQI (0-1)" in html
    with pytest.raises(SystemExit) as e:
        main(["analyse", str(sample_map_path), "--min-score", "1.5", "--out", str(tmp_path)])
    assert e.value.code == 2


# --- item 8: lack of fit of a calibration with replicate standards
def _nested_anova_F(x, y, degree):
    """Lack-of-fit F as a nested-model comparison, computed here independently: the
    polynomial against the saturated one-mean-per-level model (Draper & Smith 1998,
    Applied Regression Analysis, 3rd ed., section 2.1), both by numpy.linalg.lstsq."""
    from scipy import stats

    levels = np.unique(x)
    poly = np.vander(x, degree + 1)
    cells = (x[:, None] == levels[None, :]).astype(float)
    rss = [np.sum((y - D @ np.linalg.lstsq(D, y, rcond=None)[0]) ** 2) for D in (poly, cells)]
    df_red, df_full = x.size - (degree + 1), x.size - levels.size
    F = ((rss[0] - rss[1]) / (df_red - df_full)) / (rss[1] / df_full)
    return F, stats.f.sf(F, df_red - df_full, df_full)


def test_lack_of_fit_matches_a_nested_anova_and_suggests_the_quadratic():
    from mapkit.quantify import PolynomialCalibration

    rng = np.random.default_rng(3)
    x = np.repeat([0.0, 5, 10, 20, 30, 40, 50], 3)
    curved = 2.0 * x - 0.012 * x ** 2 + rng.normal(0, 0.6, x.size)   # saturating response
    lin = PolynomialCalibration(1).fit(x, curved)
    F, p = _nested_anova_F(x, curved, 1)
    lof = lin.lack_of_fit_
    assert (lof["df_lof"], lof["df_pe"]) == (5, 14)
    assert lof["F"] == pytest.approx(F, rel=1e-9) and lof["p"] == pytest.approx(p, rel=1e-9)
    assert lof["p"] < 0.05 and "quadratic" in lof["suggestion"]
    quad = PolynomialCalibration(2).fit(x, curved)
    F2, p2 = _nested_anova_F(x, curved, 2)
    assert quad.lack_of_fit_["F"] == pytest.approx(F2, rel=1e-9)
    assert quad.lack_of_fit_["p"] > 0.05 and quad.lack_of_fit_["suggestion"] is None
    # no replicates: no pure error, no test
    assert PolynomialCalibration(1).fit(np.unique(x), np.unique(x) * 2.0 + 1 +
                                        rng.normal(0, 0.1, 7)).lack_of_fit_ is None


def test_lack_of_fit_rejects_a_true_line_at_its_nominal_rate():
    # under a straight line with normal errors the test rejects in 5 % of cases (the F
    # distribution, scipy.stats.f); 600 seeds give a binomial sd of 0.9 %
    from mapkit.quantify import PolynomialCalibration

    x = np.repeat([0.0, 5, 10, 20, 30, 40, 50], 3)
    rejected = 0
    for seed in range(600):
        y = 1.0 + 2.0 * x + np.random.default_rng(seed).normal(0, 1.0, x.size)
        rejected += PolynomialCalibration(1).fit(x, y).lack_of_fit_["p"] < 0.05
    assert 0.03 <= rejected / 600 <= 0.075, rejected


def test_calibrate_prints_the_lack_of_fit(tmp_path, capsys, sample_dir):
    from mapkit.cli import main

    std = str(sample_dir / "calibration_standards.csv")
    lib = str(sample_dir / "library")
    assert main(["calibrate", std, "--library", lib, "--out", str(tmp_path / "lin")]) == 0
    out = capsys.readouterr().out
    assert "lack of fit F(5, 14) = " in out and "try the quadratic model" in out, out
    assert main(["calibrate", std, "--library", lib, "--model", "quadratic",
                 "--out", str(tmp_path / "quad")]) == 0
    assert "lack of fit F(4, 14) = " in capsys.readouterr().out


# --- item 5: peak-fit maps over pixels without the band
def _partly_banded_map(seed=0):
    """Silicon-like band in the five left columns (centre 520.0 + 0.4 cm-1 per column, a
    1.6 cm-1 gradient), a flat background of 100 counts alone in the seven right ones."""
    rng = np.random.default_rng(seed)
    s = np.arange(480.0, 561.0, 1.0)
    yy, xx = np.mgrid[:8, :12]
    centre = 520.0 + 0.4 * xx
    height = np.where(xx < 5, 500.0, 0.0)
    mu = 100 + height[..., None] / (1 + (2 * (s - centre[..., None]) / 6.0) ** 2)
    cube = rng.poisson(mu).astype(float)
    return RamanMap(cube, raman_shift=s, x=xx[0] * 1.0, y=yy[:, 0] * 1.0), xx < 5


def _cramer_rao_centre_sd(s, h=500.0, w=6.0, bg=100.0, c=520.8):
    """sqrt of the Cramér–Rao bound of a Lorentzian centre for Poisson counts (Kay 1993,
    Fundamentals of Statistical Signal Processing, vol. 1, ch. 3): the Fisher information
    sum_i (d mu_i/d theta)(d mu_i/d theta)^T / mu_i, by finite differences here."""
    def mu(t):
        return t[3] + t[4] * (s - s.mean()) + t[0] / (1 + (2 * (s - t[1]) / t[2]) ** 2)

    t0 = np.array([h, c, w, bg, 0.0])
    J = np.stack([(mu(t0 + e) - mu(t0 - e)) / 2e-5 for e in np.eye(5) * 1e-5], axis=1)
    return float(np.sqrt(np.linalg.inv(J.T @ (J / mu(t0)[:, None]))[1, 1]))


def test_peak_maps_mask_pixels_without_the_band(tmp_path, capsys):
    from mapkit.cli import main
    from mapkit.export import write_map
    from mapkit.reduce import peak_fit_map
    from mapkit.reduce.peakfit import NO_BAND

    m, band = _partly_banded_map()
    r = peak_fit_map(m, 500, 540)
    centre, rejected = r.fields["centre"], r.fields["rejected"].data
    assert (rejected[band] == 0).all()                       # every real band is kept
    assert (rejected[~band] > 0).mean() >= 0.9                # pixels of noise are not
    assert np.isnan(centre.data[rejected > 0]).all() and np.isnan(centre.errors[rejected > 0]).all()
    assert ((rejected[~band] & NO_BAND) > 0).mean() >= 0.9
    assert r.summary["reported"] == int((rejected == 0).sum())
    # the gradient survives: 0.4 cm-1 per column over the reported pixels
    xx = np.broadcast_to(m.x, band.shape)
    keep = rejected == 0
    assert np.polyfit(xx[keep], centre.data[keep], 1)[0] == pytest.approx(0.4, abs=0.05)
    write_map(tmp_path / "wafer.h5", m)
    assert main(["peaks", str(tmp_path / "wafer.h5"), "--range", "500-540", "--out",
                 str(tmp_path / "o"), "--no-figures"]) == 0
    out = capsys.readouterr().out
    line = next(ln for ln in out.splitlines() if "median standard error" in ln)
    se = float(line.split("median standard error")[1].split()[0])
    # over the band pixels only: the physical limit of the centre's precision
    bound = _cramer_rao_centre_sd(np.arange(500.0, 541.0))
    assert se == pytest.approx(bound, rel=0.15), (se, bound)
    assert "band under 3 standard errors" in out


def _capture_figures(monkeypatch):
    import mapkit.export.figures as figures

    made = []
    original = figures._figure

    def capture(**kw):
        fig = original(**kw)
        made.append(fig)
        return fig

    monkeypatch.setattr(figures, "_figure", capture)
    return made


def test_map_figures_use_robust_colour_limits(tmp_path, monkeypatch):
    from mapkit.core.result import Axis, Field
    from mapkit.export.figures import save_image_figure

    made = _capture_figures(monkeypatch)
    rng = np.random.default_rng(1)
    img = 520.0 + np.tile(np.linspace(0, 2, 20), (16, 1)) + rng.normal(0, 0.05, (16, 20))
    img[3, 4], img[9, 11] = 418.0, 612.0                       # two fits that ran off
    f = Field("centre", img, (Axis("y", np.arange(16.0), "um"), Axis("x", np.arange(20.0), "um")),
              "1/cm")
    save_image_figure(tmp_path / "c.png", f)
    lo, hi = made[-1].axes[0].images[0].get_clim()
    # the 2nd and 98th percentiles (numpy.percentile as the reference): the 2 cm-1 gradient
    # spans the colour scale instead of a sliver of it
    assert (lo, hi) == pytest.approx(tuple(np.percentile(img, [2, 98])))
    assert 519.9 < lo < 520.2 and 521.8 < hi < 522.1


# --- friction: bit fields with a categorical legend, classes numbered from 1 with names
def test_flags_figure_has_a_categorical_legend(tmp_path, monkeypatch):
    from mapkit.core.result import Axis, Field, Result
    from mapkit.export.bundle import write_bundle
    from mapkit.quantify.concentration import FLAG_MEANING

    made = _capture_figures(monkeypatch)
    axes = (Axis("y", np.arange(4.0), "um"), Axis("x", np.arange(5.0), "um"))
    flags = np.zeros((4, 5), np.uint8)
    flags[0, :2], flags[1, 0], flags[3, 4] = 3, 7, 8
    conc = Result("concentration", "calibration", {}, {
        "concentration": Field("concentration", np.ones((4, 5)), axes, "% w/w"),
        "flags": Field("flags", flags, axes, "", long_name=FLAG_MEANING)})
    m = RamanMap(np.ones((4, 5, 6)), raman_shift=np.arange(6.0), x=np.arange(5.0),
                 y=np.arange(4.0))
    write_bundle(tmp_path, m, [conc], stem="t", write_h5=False, csv=False)
    fig = next(f for f in made if f.axes[0].get_title() == "concentration: flags")
    assert len(fig.axes) == 1                                   # no colourbar
    texts = [t.get_text() for t in fig.axes[0].get_legend().get_texts()]
    assert texts == ["none", "below LOD + below LOQ",
                     "below LOD + below LOQ + outside the calibrated range",
                     "masked or no response"]


def test_classes_are_numbered_from_one_with_their_names_in_every_output(
        tmp_path, monkeypatch, sample_map_path, sample_dir):
    import csv
    import json

    import h5py
    import tifffile

    from mapkit.cli import main
    from mapkit.read.nexus import read_result_objects

    made = _capture_figures(monkeypatch)
    assert main(["classes", str(sample_map_path), "--library", str(sample_dir / "library"),
                 "--out", str(tmp_path)]) == 0
    with h5py.File(tmp_path / "results.h5") as f:
        d = f["/entry/results/classes/labels/labels"]
        h5_labels, numbering = d[...], d.attrs["numbering"]
        assert "0-based" not in d.attrs["long_name"]
        ident = json.loads(f["/entry/results/classes"].attrs["summary"])["identification"]
    names = {i["spectrum"]: i["match"] for i in ident if i["match"] != "unmatched"}
    assert len(names) == 4
    masked = h5_labels == 0
    assert "from 1" in numbering and h5_labels.max() == 4 and masked.any()
    with tifffile.TiffFile(tmp_path / "tablet_map_classes_labels.tif") as tif:
        tif_labels = tif.asarray()
        info = json.loads(tif.imagej_metadata["Info"])
    np.testing.assert_array_equal(tif_labels, h5_labels)
    assert info["classes"]["1"] == f"class 1 ({names['class 1']})"
    assert info["numbering"] == numbering and "0-based" not in info["long_name"]
    lines = (tmp_path / "tablet_map_maps.csv").read_text().splitlines()
    assert lines[0].startswith("# mapkit long-form export")
    assert f"; classes.labels: 1 = class 1 ({names['class 1']}), 2 = class 2 (" in lines[0]
    rows = list(csv.reader(ln for ln in lines if not ln.startswith("#")))
    col = next(i for i, h in enumerate(rows[0]) if h.startswith("classes.labels"))
    csv_labels = np.array([int(r[col]) for r in rows[1:]]).reshape(h5_labels.shape)
    np.testing.assert_array_equal(csv_labels, h5_labels)
    # the class figure's legend: numbered from 1, with the library names
    fig = next(f for f in made if f.axes[0].get_title() == "classes")
    texts = [t.get_text() for t in fig.axes[0].get_legend().get_texts()]
    assert texts[0] == f"class 1: {names['class 1']}" and len(texts) == 4
    # reading the file back gives the 0-based indices of the estimator again
    back = next(r for r in read_result_objects(tmp_path / "results.h5") if r.name == "classes")
    np.testing.assert_array_equal(back.fields["labels"].data, np.where(masked, -1, h5_labels - 1))


def test_analyse_reports_the_lack_of_fit_in_output_summary_and_report(tmp_path, capsys,
                                                                      sample_map_path,
                                                                      sample_dir):
    import json

    from mapkit.cli import main

    assert main(["analyse", str(sample_map_path), "--library", str(sample_dir / "library"),
                 "--standards", str(sample_dir / "calibration_standards.csv"),
                 "--recipe", str(sample_dir / "tablet_recipe.toml"), "--out", str(tmp_path),
                 "--quiet", "--no-figures"]) == 0
    out = capsys.readouterr().out
    assert "lack of fit F(5, 14) = " in out and "try the quadratic model" in out, out
    summary = json.loads((tmp_path / "summary.json").read_text())
    lof = summary["results"]["concentration"]["calibration"]["lack_of_fit"]
    assert lof["p"] < 0.05 and lof["df_pe"] == 14
    assert json.loads((tmp_path / "quant_model.json").read_text())["summary"]["lack_of_fit"] == lof
    html = (tmp_path / "report.html").read_text()
    assert "lack-of-fit F-test" in html and "try the quadratic model" in html
