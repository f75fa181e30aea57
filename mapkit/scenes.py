"""A family of invented, seeded Raman map scenes with their ground truth.

Defaults are chosen on this family, never on one map: each scene kind stresses another
part of the job (blurred grain boundaries, continuous gradients, a minor phase in small
spots, strongly overlapping bands, broad bands beside sharp ones, very low counts), and
every scene carries fluorescence of 0.5-5x the Raman signal that varies across the map,
cosmic-ray spikes on 0.3-1 % of the spectra (some on grain boundaries) and a few dead
pixels. Everything is invented: the materials are real, but band positions are recalled
from textbooks (from memory, to a few cm⁻¹), and the relative heights, widths, layouts,
backgrounds and noise are made up.

>>> s = make_scene("grains", seed=1, shape=(20, 24))
>>> s.counts.shape[:2], s.truth["abundance"].shape[0]
((20, 24), 4)
>>> bool((s.truth["labels"][s.truth["bad_pixels"]] == -1).all())
True

Truth (``Scene.truth``):

- ``pure_spectra`` (k, n): counts of each pure material at unit abundance;
- ``abundance`` (k, ny, nx): the coefficient of each pure spectrum in each pixel (volume
  fraction times the local collection efficiency), so the noise-free Raman signal is
  ``abundance·pure_spectra``;
- ``fraction`` (k, ny, nx): volume fractions (sum to one); ``labels`` is their argmax
  (the component with the largest abundance), -1 on dead pixels; ``core`` marks pixels
  whose largest fraction is at least 0.8;
- ``signal_share`` (k, ny, nx): share of each component in the pixel's integrated Raman
  signal;
- ``background`` (ny, nx, n): fluorescence plus the detector ``offset``, in counts;
- ``spike_mask`` (ny, nx, n): channels a cosmic-ray spike was added to;
- ``bad_pixels`` (ny, nx): dead pixels (flat zero).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy.ndimage import gaussian_filter

#: Band lists: (position cm⁻¹, relative height, FWHM cm⁻¹). Positions from memory of
#: textbook values for the real materials; heights and widths invented.
MATERIALS = {
    # silicates and carbonates
    "quartz": [(128, .25, 8), (206, .35, 12), (465, 1.0, 8), (808, .08, 10), (1160, .05, 10)],
    "calcite": [(156, .3, 9), (282, .4, 10), (712, .15, 5), (1086, 1.0, 4)],
    "albite": [(290, .3, 14), (479, .6, 8), (508, 1.0, 8), (765, .1, 12), (1100, .1, 20)],
    "forsterite": [(303, .15, 12), (545, .1, 14), (824, .9, 9), (856, 1.0, 9), (964, .25, 14)],
    "dolomite": [(176, .3, 10), (300, .4, 11), (725, .15, 6), (1097, 1.0, 5)],
    "magnesite": [(212, .3, 12), (329, .4, 12), (738, .15, 7), (1094, 1.0, 6)],
    # polymers
    "polystyrene": [(620, .25, 8), (1001, 1.0, 6), (1031, .3, 7), (1155, .15, 10),
                    (1583, .15, 8), (1602, .4, 8)],
    "pmma": [(600, .3, 12), (812, 1.0, 12), (966, .35, 14), (1452, .5, 18), (1728, .4, 16)],
    "polyethylene": [(1063, .7, 10), (1130, .6, 9), (1296, 1.0, 9), (1440, .9, 12),
                     (1460, .5, 12)],
    # a tablet
    "cellulose": [(380, .45, 14), (1095, .9, 14), (1120, 1.0, 12), (1380, .35, 18)],
    "lactose": [(355, .8, 10), (477, .5, 10), (850, .35, 12), (1085, 1.0, 12), (1120, .4, 12)],
    "magnesium stearate": [(1063, .6, 10), (1130, .55, 9), (1296, .8, 9), (1440, 1.0, 12)],
    "caffeine": [(555, .5, 8), (645, .3, 8), (1330, 1.0, 9), (1600, .4, 10), (1700, .45, 10)],
    # a battery electrode: broad disordered-carbon bands beside sharp crystal bands
    "carbon black": [(1350, 1.0, 80), (1590, .9, 60)],
    "lithium iron phosphate": [(440, .2, 12), (950, 1.0, 9), (995, .3, 10), (1070, .25, 12)],
    "pvdf": [(795, .6, 14), (840, 1.0, 16), (880, .5, 14), (1430, .45, 20)],
    "silica glass": [(440, 1.0, 75), (800, .3, 50), (1060, .15, 40)],
    # a cell
    "lipid": [(1080, .35, 25), (1300, .7, 20), (1440, 1.0, 22), (1655, .55, 25), (1745, .3, 20)],
    "protein": [(1003, .7, 8), (1245, .5, 50), (1450, .8, 30), (1660, 1.0, 45)],
    "nucleic acid": [(785, 1.0, 15), (1095, .6, 18), (1340, .5, 25), (1578, .55, 20)],
    "carotenoid": [(1005, .35, 8), (1157, .7, 10), (1525, 1.0, 12)],
}


@dataclass(frozen=True)
class SceneKind:
    """How a scene kind is built: materials, axis, geometry and signal levels."""

    materials: tuple
    shift_range: tuple
    n_channels: int
    layout: str
    counts: tuple          # counts at the tallest band of a pure material (low, high)
    fluorescence: tuple    # background peak ÷ Raman peak, smallest and largest over the map
    description: str


KINDS = {
    "grains": SceneKind(("quartz", "calcite", "albite", "forsterite"), (100, 1800), 850,
                        "grains", (1200, 3000), (0.5, 3.0),
                        "a mineral thin section: grains with blurred boundaries, high counts"),
    "gradient": SceneKind(("polystyrene", "pmma", "polyethylene"), (500, 1800), 700,
                          "gradient", (300, 600), (0.5, 2.0),
                          "a polymer interdiffusion zone: continuous composition gradients"),
    "minor": SceneKind(("cellulose", "lactose", "magnesium stearate", "caffeine"),
                       (300, 1800), 600, "minor", (200, 400), (1.0, 3.0),
                       "a tablet blend with a minor phase (< 5 % of the area) in small spots"),
    "overlap": SceneKind(("calcite", "dolomite", "magnesite"), (100, 1200), 1000, "grains",
                         (600, 1200), (0.5, 2.0),
                         "a carbonate rock: three phases whose bands overlap strongly"),
    "broad": SceneKind(("carbon black", "lithium iron phosphate", "pvdf", "silica glass"),
                       (200, 1800), 800, "particles", (400, 900), (1.0, 4.0),
                       "a battery electrode: bands 40-80 cm⁻¹ wide beside sharp ones"),
    "lowcount": SceneKind(("lipid", "protein", "nucleic acid", "carotenoid"), (600, 1800), 650,
                          "cell", (30, 100), (2.0, 5.0),
                          "a cell at low counts (30-100 at a unit peak) and strong fluorescence"),
}


@dataclass
class Scene:
    """One invented map: counts (ny, nx, n) on ``raman_shift`` and its ``truth``."""

    kind: str
    seed: int
    counts: np.ndarray
    raman_shift: np.ndarray
    names: tuple
    truth: dict = field(repr=False)
    pixel_um: float = 1.0
    laser_nm: float = 532.0

    def to_map(self):
        """The scene as a :class:`~mapkit.core.ramanmap.RamanMap` (no mask: readers find
        the dead pixels as they would in a measured map)."""
        from .core.provenance import Step
        from .core.ramanmap import RamanMap

        ny, nx, _ = self.counts.shape
        return RamanMap(self.counts, raman_shift=self.raman_shift,
                        x=np.arange(nx) * self.pixel_um, y=np.arange(ny) * self.pixel_um,
                        laser_wavelength=self.laser_nm,
                        provenance=(Step("synthesise", {"scene": self.kind, "seed": self.seed,
                                                        "scenario": "invented"},
                                         timestamp="2026-12-02T00:00:00+00:00"),))

    def write(self, folder, *, overwrite: bool = True):
        """Write ``<kind>_<seed>.h5`` and a reference library of the true pure spectra
        (``library/``, two-column text) into ``folder``; returns (map path, library path)."""
        from pathlib import Path

        from .export.nexus import write_map

        folder = Path(folder)
        lib = folder / "library"
        lib.mkdir(parents=True, exist_ok=True)
        path = write_map(folder / f"{self.kind}_{self.seed}.h5", self.to_map(),
                         overwrite=overwrite)
        for name, spec in zip(self.names, self.truth["pure_spectra"]):
            (lib / f"{name.replace(' ', '_')}.txt").write_text(
                "# raman_shift_cm-1, counts (synthetic, invented)\n" + "\n".join(
                    f"{s:.4f},{v:.6f}" for s, v in zip(self.raman_shift, spec)) + "\n")
        return path, lib


def pure_spectrum(name: str, shift, height: float = 1.0) -> np.ndarray:
    """Noise-free spectrum of a material: a sum of Lorentzians, tallest point ``height``."""
    s = np.asarray(shift, float)
    out = np.zeros_like(s)
    for pos, h, fwhm in MATERIALS[name]:
        g = fwhm / 2
        out += h * g ** 2 / ((s - pos) ** 2 + g ** 2)
    return height * out / out.max()


def _smooth_field(rng, shape, sigma):
    f = gaussian_filter(rng.normal(size=shape), sigma, mode="reflect")
    return (f - f.min()) / max(np.ptp(f), 1e-12)


def _closure(parts):
    parts = np.clip(parts, 0, None)
    return parts / np.maximum(parts.sum(axis=0, keepdims=True), 1e-12)


def _grains(rng, shape, k):
    """Voronoi grains, each of one phase (every phase present), boundaries blurred."""
    ny, nx = shape
    n_grains = max(3 * k, int(ny * nx / 60))
    centres = rng.uniform([0, 0], [ny, nx], (n_grains, 2))
    phase = np.concatenate([np.arange(k), rng.integers(0, k, n_grains - k)])
    yy, xx = np.mgrid[:ny, :nx]
    d = (yy[..., None] - centres[:, 0]) ** 2 + (xx[..., None] - centres[:, 1]) ** 2
    owner = phase[np.argmin(d, axis=-1)]
    onehot = np.stack([(owner == j).astype(float) for j in range(k)])
    blur = rng.uniform(0.8, 1.5)          # optical blur of the boundaries, pixels
    return _closure(np.stack([gaussian_filter(f, blur, mode="nearest") for f in onehot]))


def _gradient(rng, shape, k):
    """Smooth composition fields: a ramp across the map for each component plus texture."""
    ny, nx = shape
    yy, xx = np.mgrid[:ny, :nx] / np.array([ny, nx])[:, None, None]
    parts = []
    for j in range(k):
        ang = 2 * np.pi * (j / k + rng.uniform(-0.08, 0.08))
        ramp = 0.5 + 0.5 * (np.cos(ang) * (xx - 0.5) + np.sin(ang) * (yy - 0.5)) * 1.6
        parts.append(np.clip(ramp, 0, None) ** 2 + 0.25 * _smooth_field(rng, shape, 6))
    return _closure(np.stack(parts))


def _spots(rng, shape, n, rmin, rmax, peak):
    """Small soft discs of fraction up to ``peak`` (a minor phase)."""
    ny, nx = shape
    yy, xx = np.mgrid[:ny, :nx]
    f = np.zeros(shape)
    for _ in range(n):
        cy, cx = rng.uniform(2, ny - 2), rng.uniform(2, nx - 2)
        r = rng.uniform(rmin, rmax)
        d = np.hypot(yy - cy, xx - cx)
        f = np.maximum(f, peak * np.clip(r + 0.5 - d, 0, 1))
    return f


def _minor(rng, shape, k):
    """A matrix of smoothly varying majors with a minor phase in small spots (< 5 % area)."""
    ny, nx = shape
    majors = _gradient(rng, shape, k - 1) * 0.7 + 0.3 * _grains(rng, shape, k - 1)
    n_spots = max(3, int(ny * nx * 0.03 / 7))
    spots = _spots(rng, shape, n_spots, 0.8, 1.6, rng.uniform(0.7, 0.9))
    return np.concatenate([majors * (1 - spots), spots[None]])


def _particles(rng, shape, k):
    """Sharp-banded particles in a matrix of a broad-banded phase and binder."""
    ny, nx = shape
    crystal = _spots(rng, shape, int(ny * nx / 40), 1.5, 3.5, 1.0)
    glass = _spots(rng, shape, max(2, int(ny * nx / 300)), 3.0, 6.0, 1.0) * (1 - crystal)
    rest = 1 - crystal - glass
    mix = _smooth_field(rng, shape, 4)
    carbon = rest * (0.1 + 0.8 * mix)
    binder = rest - carbon
    return _closure(np.stack([carbon, crystal, binder, glass])[:k])


def _cell(rng, shape, k):
    """A cell: protein cytoplasm, a nucleic-acid-rich nucleus, lipid droplets, a
    carotenoid-rich spot."""
    ny, nx = shape
    yy, xx = np.mgrid[:ny, :nx]
    cy, cx = ny / 2 + rng.uniform(-2, 2), nx / 2 + rng.uniform(-2, 2)
    cell = 1 / (1 + np.exp((np.hypot((yy - cy) / (0.42 * ny), (xx - cx) / (0.42 * nx)) - 1) * 8))
    ny_, nx_ = cy + rng.uniform(-3, 3), cx + rng.uniform(-3, 3)
    nucleus = 1 / (1 + np.exp((np.hypot(yy - ny_, xx - nx_) - 0.18 * min(ny, nx)) * 1.2))
    droplets = _spots(rng, shape, max(4, int(ny * nx / 150)), 1.2, 2.5, 0.9) * cell
    carot = _spots(rng, shape, 2, 1.5, 2.5, 0.8) * cell * (1 - droplets)
    medium = 0.25                          # the medium around the cell holds some protein
    protein = (cell + medium * (1 - cell)) * (1 - nucleus) * (1 - droplets) * (1 - carot)
    nucleic = nucleus * (1 - droplets) * (1 - carot) * cell + 0.05 * cell
    return _closure(np.stack([droplets + 0.03 * cell, protein, nucleic, carot])[:k])


_LAYOUTS = {"grains": _grains, "gradient": _gradient, "minor": _minor,
            "particles": _particles, "cell": _cell}


def _fluorescence_shapes(rng, shift):
    """Two smooth background shapes, max 1, mixed differently in every pixel: a sum of
    broad humps of random width (a fifth of the axis to more than all of it) and a steep or
    slow exponential slope, so that some scenes need many baseline terms and some few."""
    s = np.asarray(shift, float)
    lo, span = s.min(), np.ptp(s)
    hump = np.zeros_like(s)
    for _ in range(rng.integers(1, 4)):
        c = rng.uniform(lo - 0.2 * span, lo + 1.3 * span)
        hump += rng.uniform(0.3, 1.0) * np.exp(-0.5 * ((s - c) / (rng.uniform(0.2, 0.8) * span))
                                               ** 2)
    slope = np.exp(-(s - lo) / (rng.uniform(0.1, 1.0) * span))
    if rng.random() < 0.5:
        slope = slope[::-1]
    return hump / hump.max(), slope / slope.max()


def make_scene(kind: str, seed: int = 0, shape=(48, 56)) -> Scene:
    """Build one scene of ``kind`` (see :data:`KINDS`) from ``seed``; fully deterministic."""
    if kind not in KINDS:
        raise ValueError(f"unknown scene kind {kind!r}; use one of {', '.join(KINDS)}")
    spec = KINDS[kind]
    rng = np.random.default_rng([seed, list(KINDS).index(kind)])
    ny, nx = shape
    shift = np.linspace(*spec.shift_range, spec.n_channels)
    shift = shift + rng.normal(0, 0.02 * np.diff(shift).mean(), shift.size)  # uneven steps
    shift.sort()
    k = len(spec.materials)
    level = rng.uniform(*spec.counts)
    # invented scattering strengths: the weakest material scatters half as much as the strongest
    strength = rng.uniform(0.5, 1.0, k)
    strength /= strength.max()
    pure = np.stack([pure_spectrum(n, shift, level * st) for n, st in zip(spec.materials,
                                                                            strength)])
    fraction = _LAYOUTS[spec.layout](rng, shape, k)
    focus = 0.85 + 0.3 * _smooth_field(rng, shape, 7)
    abundance = fraction * focus
    raman = np.einsum("kyx,ks->yxs", abundance, pure)

    hump, slope = _fluorescence_shapes(rng, shift)
    mix = _smooth_field(rng, shape, 9)
    lo, hi = spec.fluorescence
    ratio = lo + (hi - lo) * _smooth_field(rng, shape, 8)       # background ÷ Raman peak
    shape_px = mix[..., None] * hump + (1 - mix[..., None]) * slope
    shape_px /= shape_px.max(axis=-1, keepdims=True)
    raman_peak = raman.max(axis=-1)
    offset = rng.uniform(20, 80)
    background = (ratio * np.maximum(raman_peak, 0.05 * level))[..., None] * shape_px + offset
    expected = raman + background
    counts = rng.poisson(expected).astype(float) + rng.normal(0, 3.0, expected.shape)

    # cosmic-ray spikes on 0.3-1 % of the spectra, a third of them on grain boundaries
    share = abundance * pure.sum(axis=1)[:, None, None]
    share = share / share.sum(axis=0, keepdims=True)
    dominant_share = share.max(axis=0)
    boundary = np.flatnonzero(dominant_share.ravel() < 0.75)
    n_spiked = max(2, int(round(rng.uniform(0.003, 0.01) * ny * nx)))
    n_edge = min(boundary.size, n_spiked // 3)
    picks = np.concatenate([rng.choice(boundary, n_edge, replace=False) if n_edge else [],
                            rng.choice(ny * nx, n_spiked - n_edge, replace=False)]).astype(int)
    spike_mask = np.zeros(counts.shape, bool)
    flat = counts.reshape(-1, shift.size)
    smask = spike_mask.reshape(-1, shift.size)
    for p in np.unique(picks):
        c = rng.integers(2, shift.size - 3)
        amp = float(np.exp(rng.uniform(np.log(5 * level), np.log(60 * level))))
        for j, frac in enumerate([1.0, rng.uniform(.1, .5)][:rng.integers(1, 3)]):
            flat[p, c + j] += amp * frac
            smask[p, c + j] = True

    bad = np.zeros(shape, bool)
    for p in rng.choice(ny * nx, 3, replace=False):
        bad.flat[p] = True
    counts[bad] = 0.0
    spike_mask[bad] = False
    counts = np.clip(np.round(counts), 0, 65535).astype(np.float32)

    labels = np.argmax(fraction, axis=0).astype(np.int16)
    labels[bad] = -1
    truth = {"pure_spectra": pure, "abundance": abundance, "fraction": fraction,
             "signal_share": share, "labels": labels,
             "core": (fraction.max(axis=0) >= 0.8) & ~bad,
             "background": background.astype(np.float32), "spike_mask": spike_mask,
             "bad_pixels": bad, "focus": focus, "offset": offset}
    return Scene(kind, seed, counts, shift, tuple(spec.materials), truth)


def scene_family(seeds=(0, 1, 2), kinds=None, shape=(48, 56)):
    """Every scene kind for every seed, in a fixed order."""
    for kind in kinds or KINDS:
        for seed in seeds:
            yield make_scene(kind, seed, shape)


@dataclass
class FilmSection:
    """An invented depth section (z, x) of a coated film and its truth (nominal depths, µm).

    ``truth``: ``pure_spectra`` (2, n), ``abundance`` (2, nz, nx) (the blurred, attenuated
    layer indicators the counts were made from), ``surface`` and ``interface`` (nominal
    depths of the top of the coating and of the coating/substrate boundary), ``thickness``
    (their difference), ``blur_sigma`` (Gaussian depth response, µm).
    """

    seed: int
    counts: np.ndarray
    raman_shift: np.ndarray
    z: np.ndarray
    x: np.ndarray
    names: tuple
    truth: dict = field(repr=False)
    laser_nm: float = 532.0

    def to_map(self):
        from .core.provenance import Step
        from .core.ramanmap import RamanMap

        return RamanMap(self.counts, raman_shift=self.raman_shift, x=self.x, y=[0.0], z=self.z,
                        laser_wavelength=self.laser_nm,
                        provenance=(Step("synthesise", {"scene": "film section",
                                                        "seed": self.seed,
                                                        "scenario": "invented"},
                                         timestamp="2026-12-02T00:00:00+00:00"),))

    def references(self):
        """The true pure spectra as :class:`~mapkit.read.Spectrum` references."""
        from .read.reference import Spectrum

        return [Spectrum(n, self.raman_shift, s) for n, s in zip(self.names,
                                                                  self.truth["pure_spectra"])]


def make_film_section(seed: int = 0, *, thickness: float | None = None,
                      blur_sigma: float = 1.2, z_step: float = 0.5, z_range=(-4.0, 18.0),
                      nx: int = 10, level: float = 400.0, attenuation_um: float = 60.0,
                      materials=("polystyrene", "pmma")) -> FilmSection:
    """An invented coating (``materials[0]``) on a substrate (``materials[1]``), scanned in depth.

    The coating starts at the surface (nominal depth 0) and is ``thickness`` µm thick
    (default: drawn from 4-8 µm, off the depth grid); the signal fades with depth as
    exp(-z / ``attenuation_um``) and is blurred along z by a Gaussian of ``blur_sigma``;
    counts are Poisson with a flat fluorescence background and a detector offset.
    Everything is invented.
    """
    rng = np.random.default_rng([seed, 17])
    if thickness is None:
        thickness = float(rng.uniform(4.0, 8.0))
    z = np.arange(z_range[0], z_range[1] + z_step / 2, z_step)
    shift = np.linspace(500.0, 1800.0, 320)
    pure = np.stack([pure_spectrum(n, shift, level * st) for n, st in zip(materials, (1.0, 0.8))])
    # the layer indicators on a fine grid, attenuated, then blurred by the depth response
    fine = np.arange(z_range[0] - 6 * blur_sigma, z_range[1] + 6 * blur_sigma, 0.01)
    fade = np.where(fine > 0, np.exp(-np.clip(fine, 0, None) / attenuation_um), 0.0)
    ind = np.stack([(fine >= 0) & (fine < thickness), fine >= thickness]).astype(float) * fade
    kernel = np.exp(-0.5 * (np.arange(-600, 601) * 0.01 / blur_sigma) ** 2)
    kernel /= kernel.sum()
    blurred = np.stack([np.convolve(row, kernel, mode="same") for row in ind])
    prof = np.stack([np.interp(z, fine, row) for row in blurred])          # (2, nz)
    gain = 1.0 + 0.05 * rng.standard_normal(nx)                            # lateral variation
    abundance = prof[:, :, None] * gain[None, None, :]                     # (2, nz, nx)
    raman = np.einsum("kzx,ks->zxs", abundance, pure)
    background = 0.5 * level * (1.0 + 0.3 * np.linspace(0, 1, shift.size)) + 30.0
    counts = rng.poisson(raman + background).astype(np.float32)
    truth = {"pure_spectra": pure, "abundance": abundance, "surface": 0.0,
             "interface": float(thickness), "thickness": float(thickness),
             "blur_sigma": float(blur_sigma)}
    return FilmSection(seed, counts, shift, z, np.arange(nx) * 1.0, tuple(materials), truth)
