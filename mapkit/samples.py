"""Deterministic synthetic sample data with ground truth.

The scenario is invented: a cross-section of a fictitious chewable tablet made
of an active ingredient (acetaminophen granules), a mineral filler (calcite
particles), a binder (microcrystalline cellulose) and a thin white coating
(anatase). Band positions are published values for the real materials
(acetaminophen from ASTM E1840; the others common literature values, recalled from
memory); everything else (shapes, widths, relative strengths,
layout, background, noise, spikes, defects) is made up.

``python -m mapkit.samples OUTDIR`` (or ``mapkit samples OUTDIR``) writes:

- ``tablet_map.h5``: the map in the mapkit layout (48 x 64 pixels, 2 µm step,
  600 channels 120-1800 cm⁻¹, 532 nm), with fluorescence, shot noise, cosmic
  spikes, two dead pixels and one saturated pixel;
- ``tablet_truth.npz``: mass fractions, classes, spike positions and the pure
  spectra on the map's axis;
- ``library/``: the pure reference spectra (JCAMP-DX and two-column text);
- ``calibration_standards.csv``: spectra of 7 standards x 3 replicates at
  known acetaminophen contents (% w/w);
- ``tablet_micrograph.png`` (+ ``.scale.json``, ``tablet_micrograph_points.csv``): a
  rendered, synthetic white-light image of the invented surface, in a camera frame rotated
  and shifted against the stage, and control points to register it.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
from scipy.ndimage import gaussian_filter

SEED = 20261202
SHIFT = np.linspace(120.0, 1800.0, 600)
LASER_NM = 532.0
STEP_UM = 2.0
SHAPE = (48, 64)

# (position cm⁻¹, relative height, FWHM cm⁻¹); heights and widths invented.
BANDS = {
    "acetaminophen": [(651.6, .35, 9), (797.2, .45, 8), (857.9, 1.0, 8), (1168.5, .55, 8),
                      (1236.8, .6, 9), (1323.9, .4, 10), (1648.4, .6, 10)],
    "calcite": [(156, .25, 9), (282, .35, 10), (712, .15, 4), (1086, 1.0, 3.5)],
    "cellulose": [(380, .45, 14), (1095, .9, 14), (1120, 1.0, 12), (1380, .35, 18)],
    "anatase": [(144, 1.0, 9), (197, .1, 9), (399, .25, 18), (516, .22, 18), (639, .35, 20)],
}
#: counts at the tallest band of the pure material (invented scattering strengths)
PURE_HEIGHT = {"acetaminophen": 1500.0, "calcite": 2500.0, "cellulose": 500.0, "anatase": 4000.0}
COMPONENTS = tuple(BANDS)
ANALYTE = "acetaminophen"


def pure_spectrum(name: str, shift) -> np.ndarray:
    """Noise-free spectrum of a pure material at unit mass fraction (sum of Lorentzians)."""
    shift = np.asarray(shift, float)
    out = np.zeros_like(shift)
    for pos, h, fwhm in BANDS[name]:
        g = fwhm / 2
        out += h * g ** 2 / ((shift - pos) ** 2 + g ** 2)
    return PURE_HEIGHT[name] * out


def fluorescence_shape(shift) -> np.ndarray:
    """A broad, smooth background shape (invented), max ~1."""
    s = np.asarray(shift, float)
    return 0.55 * np.exp(-(s - 120) / 900) + 0.45 * np.exp(-((s - 1500) / 700) ** 2)


def _discs(rng, shape, n, rmin, rmax, taken=None):
    ny, nx = shape
    yy, xx = np.mgrid[:ny, :nx]
    field = np.zeros(shape)
    for _ in range(n):
        for _try in range(50):
            cy, cx = rng.uniform(6, ny - 1), rng.uniform(0, nx - 1)
            r = rng.uniform(rmin, rmax)
            d = np.hypot(yy - cy, xx - cx)
            if taken is None or taken[d < r + 1].max() < 0.2:
                break
        field = np.maximum(field, np.clip(r + 0.5 - d, 0, 1))
    return field


def mass_fractions(rng, shape=SHAPE) -> np.ndarray:
    """Mass fractions (n_components, ny, nx) summing to 1 in every pixel."""
    api = _discs(rng, shape, 9, 3.0, 6.5)
    calc = _discs(rng, shape, 10, 2.0, 4.0, taken=api)
    ny, nx = shape
    coat = np.zeros(shape)
    coat[:4] = 1.0
    coat[4] = 0.5
    w_api = 0.9 * api * (1 - coat)
    w_calc = 0.85 * calc * (1 - coat) * (1 - api)
    w_ana = 0.7 * coat
    w_cel = 1 - w_api - w_calc - w_ana
    return np.stack([w_api, w_calc, w_cel, w_ana])


def make_map(seed: int = SEED, shape=SHAPE):
    """The synthetic tablet map and its ground truth (a dict of arrays)."""
    rng = np.random.default_rng(seed)
    ny, nx = shape
    w = mass_fractions(rng, shape)
    pure = np.stack([pure_spectrum(c, SHIFT) for c in COMPONENTS])
    focus = 0.85 + 0.3 * _smooth(rng, shape, 6)
    raman = focus[..., None] * np.einsum("kyx,ks->yxs", w, pure)
    fluo_amp = 300 + 1300 * _smooth(rng, shape, 8) + 500 * w[0]
    background = fluo_amp[..., None] * fluorescence_shape(SHIFT) + 60.0
    expected = raman + background
    counts = rng.poisson(expected).astype(np.float64) + rng.normal(0, 4.0, expected.shape)

    # cosmic-ray spikes: 1-3 channels, a few hundred to ten thousand counts
    spike_added = np.zeros_like(counts)
    for _ in range(45):
        iy, ix, c = rng.integers(ny), rng.integers(nx), rng.integers(2, SHIFT.size - 3)
        amp = float(np.exp(rng.uniform(np.log(300), np.log(10000))))
        width = rng.choice([1, 2, 3], p=[.5, .3, .2])
        profile = [1.0, rng.uniform(.2, .6), rng.uniform(.05, .2)][:width]
        for k, frac in enumerate(profile):
            spike_added[iy, ix, c + k] += amp * frac
    counts += spike_added

    mask = np.zeros(shape, bool)
    for iy, ix in ((20, 5), (33, 50)):          # dead pixels: detector reads a flat zero
        counts[iy, ix] = 0.0
        mask[iy, ix] = True
    counts[40, 30] = np.minimum(counts[40, 30] * 90, 65535.0)   # a hot, clipped pixel
    mask[40, 30] = True
    counts = np.clip(np.round(counts), 0, 65535).astype(np.float32)

    # the class of a pixel is the component that contributes most Raman signal (mass
    # fraction x integrated pure spectrum): what a spectral segmentation can see. The
    # mass-dominant component is kept too; the two differ at mixed grain edges.
    signal_share = w * pure.sum(axis=1)[:, None, None]
    labels = np.argmax(signal_share, axis=0).astype(np.int16)
    labels[mask] = -1
    labels_mass = np.argmax(w, axis=0).astype(np.int16)
    labels_mass[mask] = -1
    spike_index = np.argwhere(spike_added > 0)
    truth = {"mass_fraction": w.astype(np.float32), "labels": labels,
             "labels_mass": labels_mass, "bad_pixels": mask,
             "spike_index": spike_index.astype(np.int32),
             "spike_added": spike_added[tuple(spike_index.T)].astype(np.float32),
             "focus": focus.astype(np.float32), "fluorescence_amplitude": fluo_amp.astype(np.float32),
             "pure_spectra": pure.astype(np.float32),
             "components": np.array(COMPONENTS), "raman_shift": SHIFT}
    return counts, truth


def _smooth(rng, shape, sigma):
    f = gaussian_filter(rng.normal(size=shape), sigma, mode="reflect")
    return (f - f.min()) / (f.max() - f.min())


def _blend_spectra(rng, w_api):
    """Spectra of powder blends: acetaminophen at mass fractions ``w_api`` in cellulose and
    calcite 3:1, with the same focus, background and noise model as the standards."""
    pure = {c: pure_spectrum(c, SHIFT) for c in COMPONENTS}
    w = np.asarray(w_api, float)[:, None]
    mix = w * pure["acetaminophen"] + (1 - w) * (0.75 * pure["cellulose"]
                                                 + 0.25 * pure["calcite"])
    focus = rng.uniform(0.9, 1.1, (w.shape[0], 1))
    bg = rng.uniform(300, 1200, (w.shape[0], 1)) * fluorescence_shape(SHIFT) + 60
    return np.round(rng.poisson(focus * mix + bg) + rng.normal(0, 4.0, mix.shape))


BLEND_SHAPE = (32, 40)


def make_blend_map(seed: int = SEED + 2, shape=BLEND_SHAPE):
    """An invented blend-uniformity map: acetaminophen 3-47 % w/w varying smoothly over a
    cellulose/calcite 3:1 matrix, measured like the calibration standards. Returns
    (counts (ny, nx, n), true content in % w/w (ny, nx))."""
    rng = np.random.default_rng(seed)
    content = 3.0 + 44.0 * _smooth(rng, shape, 5)
    spectra = _blend_spectra(rng, content.ravel() / 100)
    return spectra.reshape(*shape, SHIFT.size).astype(np.float32), content


def calibration_standards(seed: int = SEED + 1):
    """Spectra of standards with known acetaminophen content (% w/w), 3 replicates each.

    The rest of each standard is cellulose and calcite 3:1. Returns
    ``(concentration_pct, spectra)``.
    """
    rng = np.random.default_rng(seed)
    levels = np.array([0.0, 5.0, 10.0, 20.0, 30.0, 40.0, 50.0])
    conc = np.repeat(levels, 3)
    return conc, _blend_spectra(rng, conc / 100)


def write_jcamp(path, title, shift, intensity, per_line: int = 8):
    """Write a spectrum as JCAMP-DX 4.24 with XYDATA=(X++(Y..Y)) in AFFN form."""
    shift = np.asarray(shift, float)
    lines = ["##TITLE=" + title, "##JCAMP-DX=4.24", "##DATA TYPE=RAMAN SPECTRUM",
             "##ORIGIN=mapkit synthetic sample data (invented)", "##OWNER=public domain",
             "##XUNITS=1/CM", "##YUNITS=ARBITRARY UNITS", "##XFACTOR=1", "##YFACTOR=0.001",
             f"##FIRSTX={shift[0]:.4f}", f"##LASTX={shift[-1]:.4f}", f"##NPOINTS={shift.size}",
             f"##FIRSTY={intensity[0]:.4f}", "##XYDATA=(X++(Y..Y))"]
    ys = np.round(np.asarray(intensity) / 0.001).astype(np.int64)
    for i in range(0, shift.size, per_line):
        lines.append(f"{shift[i]:.4f} " + " ".join(str(v) for v in ys[i:i + per_line]))
    lines.append("##END=")
    Path(path).write_text("\n".join(lines) + "\n")


def write_samples(outdir) -> list[Path]:
    """Write every sample file into ``outdir`` (created); returns the paths written."""
    from .core.provenance import Step
    from .core.ramanmap import RamanMap
    from .export.nexus import write_map

    out = Path(outdir)
    (out / "library").mkdir(parents=True, exist_ok=True)
    counts, truth = make_map()
    ny, nx = SHAPE
    m = RamanMap(counts, raman_shift=SHIFT, x=np.arange(nx) * STEP_UM, y=np.arange(ny) * STEP_UM,
                 laser_wavelength=LASER_NM,
                 provenance=(Step("synthesise", {"seed": SEED, "scenario": "invented tablet"},
                                  timestamp="2026-12-02T00:00:00+00:00"),))
    written = [write_map(out / "tablet_map.h5", m, overwrite=True, compression="gzip")]
    np.savez_compressed(out / "tablet_truth.npz", **truth)
    written.append(out / "tablet_truth.npz")
    blend, content = make_blend_map()
    by, bx = BLEND_SHAPE
    bm = RamanMap(blend, raman_shift=SHIFT, x=np.arange(bx) * 5.0, y=np.arange(by) * 5.0,
                  laser_wavelength=LASER_NM,
                  provenance=(Step("synthesise", {"seed": SEED + 2, "scenario": "invented blend"},
                                   timestamp="2026-12-02T00:00:00+00:00"),))
    written.append(write_map(out / "blend_map.h5", bm, overwrite=True, compression="gzip"))
    np.savez_compressed(out / "blend_truth.npz", acetaminophen_pct=content.astype(np.float32))
    written.append(out / "blend_truth.npz")
    fine = np.arange(100.0, 1850.01, 0.5)
    for name in COMPONENTS:
        spec = pure_spectrum(name, fine) / PURE_HEIGHT[name] * 1000.0
        if name == "anatase":  # one reference as two-column text, to exercise that reader
            p = out / "library" / f"{name}.txt"
            p.write_text("# raman_shift_cm-1, intensity (synthetic, invented)\n" + "\n".join(
                f"{s:.2f},{v:.4f}" for s, v in zip(fine, spec)) + "\n")
        else:
            p = out / "library" / f"{name}.jdx"
            write_jcamp(p, name, fine, spec)
        written.append(p)
    conc, spectra = calibration_standards()
    header = "standard,concentration," + ",".join(f"{s:.3f}" for s in SHIFT)
    rows = [f"std{i // 3 + 1}-{i % 3 + 1},{c:g}," + ",".join(f"{v:.0f}" for v in s)
            for i, (c, s) in enumerate(zip(conc, spectra))]
    p = out / "tablet_recipe.toml"
    if not p.exists():
        bundled = Path(__file__).resolve().parent.parent / "sample_maps" / "tablet_recipe.toml"
        from .preprocess.recipe import DEFAULT_RECIPE
        p.write_text(bundled.read_text() if bundled.exists() else DEFAULT_RECIPE)
    written.append(p)
    written += write_micrograph_sample(out)
    p = out / "calibration_standards.csv"
    p.write_text(f"# analyte: {ANALYTE}; unit: % w/w; synthetic, invented\n" + header + "\n"
                 + "\n".join(rows) + "\n")
    written.append(p)
    return written


#: invented surface colours (RGB) of the tablet's materials under white light
SURFACE_RGB = {"acetaminophen": (246, 244, 236), "calcite": (188, 196, 204),
               "cellulose": (212, 186, 146), "anatase": (252, 252, 250)}
#: where the invented camera sits: image-frame µm → stage µm (rotation 3°, scale 1.015,
#: offset); the "true" transform the bundled control points come from
MICROGRAPH_ROTATION_DEG, MICROGRAPH_SCALE, MICROGRAPH_SHIFT = 3.0, 1.015, (-21.0, -16.0)
MICROGRAPH_PIXEL_UM, MICROGRAPH_SHAPE = 0.6, (270, 350)
SYNTHETIC_LABEL = "SYNTHETIC micrograph of an invented sample"


def micrograph_matrix(rotation_deg=MICROGRAPH_ROTATION_DEG, scale=MICROGRAPH_SCALE,
                      shift=MICROGRAPH_SHIFT, shear: float = 0.0) -> np.ndarray:
    """3x3 matrix: ``(x, y, 1)`` in the camera's µm frame → stage ``(x, y, 1)`` µm."""
    t = np.deg2rad(rotation_deg)
    lin = scale * np.array([[np.cos(t), -np.sin(t)], [np.sin(t), np.cos(t)]])
    lin = lin @ np.array([[1.0, shear], [0.0, 1.0]])
    return np.array([[*lin[0], shift[0]], [*lin[1], shift[1]], [0, 0, 1.0]])


def _label_mask(shape, text):
    """Boolean mask of ``text`` rendered in the bottom-left corner (matplotlib, no GUI)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    ny, nx = shape
    fig = Figure(figsize=(nx / 100, ny / 100), dpi=100)
    FigureCanvasAgg(fig)
    fig.text(0.02, 0.03, text, color="black", fontsize=max(6, ny // 30), ha="left", va="bottom")
    fig.canvas.draw()
    buf = np.asarray(fig.canvas.buffer_rgba())[..., 0]
    return buf[:ny, :nx] < 128


def render_micrograph(matrix=None, *, pixel_um: float = MICROGRAPH_PIXEL_UM,
                      shape=MICROGRAPH_SHAPE, seed: int = SEED + 3, label: bool = True):
    """A rendered (synthetic) white-light image of the invented tablet's surface.

    The camera frame is ``matrix`` (default :func:`micrograph_matrix`) away from the stage:
    camera pixel ``(row, col)`` sits at camera µm ``((col + 0.5) p, (row + 0.5) p)``, which
    ``matrix`` takes to the stage. Colours are the materials' invented surface colours mixed
    by the map's mass fractions, with grain texture; ``label`` burns in a notice that the
    image is synthetic. Returns an ``(ny, nx, 3)`` uint8 array.
    """
    from scipy.ndimage import map_coordinates

    matrix = micrograph_matrix() if matrix is None else np.asarray(matrix, float)
    rng = np.random.default_rng(seed)
    w = mass_fractions(np.random.default_rng(SEED), SHAPE)   # the map's own layout
    ny, nx = shape
    rows, cols = np.mgrid[:ny, :nx]
    cam = np.stack([(cols.ravel() + 0.5) * pixel_um, (rows.ravel() + 0.5) * pixel_um,
                    np.ones(rows.size)])
    stage = matrix @ cam
    # stage µm → map pixel index (2 µm step, first pixel centre at 0 µm)
    coords = np.stack([stage[1] / STEP_UM, stage[0] / STEP_UM])
    colour = np.zeros((ny * nx, 3))
    for k, name in enumerate(COMPONENTS):
        frac = map_coordinates(w[k], coords, order=1, mode="mirror")
        colour += frac[:, None] * np.asarray(SURFACE_RGB[name], float)
    colour = colour.reshape(ny, nx, 3)
    texture = gaussian_filter(rng.normal(size=(ny, nx)), 1.2)
    colour *= (1 + 0.06 * texture / texture.std())[..., None]
    vignette = 1 - 0.12 * (((rows - ny / 2) / ny) ** 2 + ((cols - nx / 2) / nx) ** 2)
    colour *= vignette[..., None]
    if label:
        mask = _label_mask(shape, SYNTHETIC_LABEL)
        colour[mask] = (20, 20, 20)
    return np.clip(np.rint(colour), 0, 255).astype(np.uint8)


def write_micrograph_sample(outdir) -> list[Path]:
    """The invented tablet's synthetic micrograph, its scale file and control points."""
    from PIL import Image, PngImagePlugin

    out = Path(outdir)
    out.mkdir(parents=True, exist_ok=True)
    img = render_micrograph()
    info = PngImagePlugin.PngInfo()
    info.add_text("Description", SYNTHETIC_LABEL + " (mapkit sample data)")
    p = out / "tablet_micrograph.png"
    Image.fromarray(img).save(p, pnginfo=info)
    side = out / "tablet_micrograph.png.scale.json"
    side.write_text('{"pixel_size_um": %g, "origin_um": [0, 0], "description": "%s; the '
                    'camera frame is rotated and shifted against the stage"}\n'
                    % (MICROGRAPH_PIXEL_UM, SYNTHETIC_LABEL))
    # pairs as a user would click them: features' stage positions, image positions through
    # the inverse of the invented camera placement, rounded to a tenth of a pixel
    rng = np.random.default_rng(SEED + 4)
    stage = np.array([[12, 10], [110, 14], [118, 84], [20, 88], [64, 50], [90, 40]], float)
    inv = np.linalg.inv(micrograph_matrix())
    cam = (inv @ np.c_[stage, np.ones(len(stage))].T).T[:, :2]
    px = np.round(cam / MICROGRAPH_PIXEL_UM - 0.5 + rng.normal(0, 0.05, cam.shape), 1)
    pts = out / "tablet_micrograph_points.csv"
    pts.write_text("# control points for the synthetic micrograph (invented)\n"
                   "name,image_col,image_row,map_x_um,map_y_um\n" + "".join(
                       f"p{i + 1},{c:.1f},{r:.1f},{x:g},{y:g}\n"
                       for i, ((c, r), (x, y)) in enumerate(zip(px, stage))))
    return [p, side, pts]


def sample_dir() -> Path:
    """The bundled sample folder in a source checkout, else a generated copy in the user cache."""
    bundled = Path(__file__).resolve().parent.parent / "sample_maps"
    if (bundled / "tablet_map.h5").exists():
        return bundled
    import os

    cache = Path(os.environ.get("XDG_CACHE_HOME", Path.home() / ".cache")) / "mapkit" / "sample_maps"
    if not (cache / "tablet_map.h5").exists():
        write_samples(cache)
    return cache


if __name__ == "__main__":  # pragma: no cover
    for path in write_samples(sys.argv[1] if len(sys.argv) > 1 else "sample_maps"):
        print(path)
