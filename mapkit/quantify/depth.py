"""Depth profiles of depth sections and volumes: profiles, layer interfaces, thickness.

A confocal depth scan moves the focus by a nominal (stage) distance; inside a transparent
sample refraction moves the real focus by a different amount, so every depth here is
*apparent* unless :func:`correct_depth` was applied, and even then it is an approximation
to validate against a sample of known thickness (:data:`DEPTH_CAUTION`).

Interfaces are located by least-squares fits of error-function edges to an abundance (or
content) profile: the depth response of a confocal microscope is close to a Gaussian, so
a sharp interface appears as an erf step whose 50 % crossing is the interface
(common practice; e.g. Everall 2000, Appl. Spectrosc. 54:1515, from memory). A component
present in a layer is fitted with two edges sharing one blur width (a blurred top-hat), so
a layer thinner than a few blur widths is still located without bias; one present below
(or above) an interface with one edge. Uncertainties are the standard errors of the fit
(covariance scaled by the residual variance).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy.optimize import curve_fit
from scipy.special import erf

from ..core.ramanmap import DEPTH_CAUTION
from ..errors import MapkitError

_SQRT2 = np.sqrt(2.0)
#: FWHM of a Gaussian in units of its standard deviation, 2√(2 ln 2)
FWHM_PER_SIGMA = 2.0 * np.sqrt(2.0 * np.log(2.0))


def refraction_scale(n_sample: float, n_immersion: float = 1.0) -> float:
    """Paraxial focal-shift factor: true depth step / nominal step = n_sample / n_immersion.

    Common practice, stated from memory: the paraxial (small-angle) limit of the focal
    shift when focusing from a medium of index ``n_immersion`` (1.0 for a dry objective)
    into one of index ``n_sample``. Marginal rays of a high-numerical-aperture objective
    focus deeper, so at high NA this scaling underestimates the true depth; the true factor
    depends on the objective's NA and the pinhole. Validate on a sample of known thickness.

    Examples
    --------
    >>> refraction_scale(1.5)
    1.5
    >>> round(refraction_scale(1.5, 1.33), 4)   # water immersion into glass
    1.1278
    """
    for name, n in (("n_sample", n_sample), ("n_immersion", n_immersion)):
        if not np.isfinite(n) or not (1.0 <= float(n) <= 4.5):
            raise MapkitError(f"{name} = {n!r} is not a refractive index between 1 and 4.5",
                              field=f"--{name.replace('_', '-')}",
                              fix="give the refractive index at the laser wavelength, e.g. 1.59")
    return float(n_sample) / float(n_immersion)


def correct_depth(z, *, n_sample: float, n_immersion: float = 1.0, surface: float = 0.0):
    """Corrected depths: ``surface + (z - surface) * n_sample / n_immersion`` (µm).

    ``surface`` is the nominal depth at which the focus sits on the sample's surface; above
    it (``z < surface``) the focus is still in the immersion medium and is not rescaled.

    Examples
    --------
    >>> correct_depth([-2.0, 0.0, 4.0], n_sample=1.5).tolist()
    [-2.0, 0.0, 6.0]
    """
    z = np.asarray(z, dtype=np.float64)
    k = refraction_scale(n_sample, n_immersion)
    return np.where(z > surface, surface + (z - surface) * k, z)


@dataclass
class DepthProfile:
    """Values against depth: one row per component, at a point or averaged over a region.

    Attributes
    ----------
    z : array (nz,)
        Depth in µm: nominal (apparent) unless ``refraction`` is set.
    values, sd : arrays (k, nz)
        Mean and standard deviation over the pixels averaged (sd 0 at a point).
    n_pixels : array (nz,)
        Pixels that entered each depth (non-finite values skipped).
    names : tuple of str
    units : str
    where : str
        The point or region, in words.
    refraction : dict or None
        ``{"n_sample", "n_immersion", "surface_um", "scale"}`` when corrected.
    """

    z: np.ndarray
    values: np.ndarray
    sd: np.ndarray
    n_pixels: np.ndarray
    names: tuple
    units: str = ""
    where: str = ""
    refraction: dict | None = None

    @property
    def caution(self) -> str:
        if self.refraction is None:
            return DEPTH_CAUTION
        r = self.refraction
        return (f"depths corrected by the paraxial scaling n_sample/n_immersion = "
                f"{r['n_sample']:g}/{r['n_immersion']:g} below the surface at "
                f"{r['surface_um']:g} um (nominal): an approximation that depends on the "
                "objective's numerical aperture; validate against a known thickness")

    def corrected(self, *, n_sample: float, n_immersion: float = 1.0,
                  surface: float = 0.0) -> "DepthProfile":
        """The same profile on refraction-corrected depths (:func:`correct_depth`)."""
        if self.refraction is not None:
            raise MapkitError("the profile's depths are corrected already", field="refraction",
                              fix="correct the nominal profile once")
        z = correct_depth(self.z, n_sample=n_sample, n_immersion=n_immersion, surface=surface)
        info = {"n_sample": float(n_sample), "n_immersion": float(n_immersion),
                "surface_um": float(surface), "scale": refraction_scale(n_sample, n_immersion)}
        return DepthProfile(z, self.values, self.sd, self.n_pixels, self.names, self.units,
                            self.where, info)

    def component(self, name) -> np.ndarray:
        return self.values[list(self.names).index(name)]


def depth_profile(images, z, *, names=None, units: str = "", at=None, region=None,
                  axes=None) -> DepthProfile:
    """Profile of image stack ``images`` against depth.

    Parameters
    ----------
    images : array (k, nz, nx) or (k, nz, ny, nx), or a :class:`~mapkit.core.result.Field`
        whose axes are ``(component, z, x)`` or ``(component, z, y, x)`` (one image
        ``(nz, …)`` is taken as ``k = 1``).
    z : array (nz,)
        Nominal depths in µm.
    at : tuple of int, optional
        Index of one pixel in the non-depth axes: ``(ix,)`` for a section, ``(iy, ix)``
        for a volume.
    region : bool array, optional
        Pixels to average in the non-depth axes (``(nx,)`` or ``(ny, nx)``); default all.
        Non-finite values (masked pixels) are skipped.

    Examples
    --------
    >>> img = np.array([[[0., 0.], [1., 3.], [1., 1.]]])      # one component, 3 depths, 2 x
    >>> p = depth_profile(img, [0., 1., 2.])
    >>> p.values.tolist(), p.where
    ([[0.0, 2.0, 1.0]], 'mean over 2 pixels')
    """
    from ..core.result import Field

    if isinstance(images, Field):
        fld = images
        axis_names = fld.axis_names
        if "z" not in axis_names:
            raise MapkitError(f"the field {fld.signal!r} has no depth axis (axes "
                              f"{', '.join(axis_names)})", field="z",
                              fix="use a result of a depth section or a volume")
        images = np.asarray(fld.data, dtype=np.float64)
        if axis_names[0] == "z":
            images = images[None]
        elif names is None:
            names = tuple(str(v) for v in fld.axes[0].values)
        units = units or fld.units
    data = np.asarray(images, dtype=np.float64)
    if data.ndim == 2:
        data = data[None]
    z = np.asarray(z, dtype=np.float64)
    if data.ndim not in (3, 4) or data.shape[1] != z.size:
        raise MapkitError(f"images of shape {data.shape} do not match {z.size} depths",
                          field="images", fix="give (component, z, x) or (component, z, y, x)")
    k, nz = data.shape[:2]
    lateral = data.shape[2:]
    names = tuple(names) if names is not None else tuple(f"component {i + 1}" for i in range(k))
    if at is not None:
        idx = tuple(int(i) for i in np.atleast_1d(at))
        if len(idx) != len(lateral) or any(not 0 <= i < n for i, n in zip(idx, lateral)):
            raise MapkitError(f"point {idx} is not a pixel of the {lateral} grid", field="at",
                              fix="give the column (section) or row and column (volume)")
        sel = np.zeros(lateral, bool)
        sel[idx] = True
        where = "pixel " + ", ".join(f"{a}={i}" for a, i in zip(("iy", "ix")[-len(idx):], idx))
    else:
        sel = np.ones(lateral, bool) if region is None else np.asarray(region, bool)
        if sel.shape != lateral:
            raise MapkitError(f"region shape {sel.shape} does not match the {lateral} grid",
                              field="region", fix="draw the region on the same map")
        where = f"mean over {int(sel.sum())} pixels"
    if not sel.any():
        raise MapkitError("the region holds no pixel", field="region", fix="draw a larger region")
    block = data[(slice(None), slice(None)) + np.nonzero(sel)]      # (k, nz, n)
    ok = np.isfinite(block)
    n = ok.sum(axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(ok, block, 0.0).sum(axis=-1) / n
        var = np.where(ok, (block - mean[..., None]) ** 2, 0.0).sum(axis=-1) / np.maximum(n - 1, 1)
    return DepthProfile(z, mean, np.sqrt(var), n.min(axis=0), names, units, where)


@dataclass
class Interface:
    """One located interface: where a component's profile steps (µm, ± standard error)."""

    component: str
    z: float
    z_err: float
    direction: str            # "rises" (present below) or "falls" (absent below)
    blur_sigma: float         # Gaussian depth-response sigma of the fitted edge, µm
    blur_sigma_err: float
    low: float                # plateau levels on either side
    high: float

    @property
    def blur_fwhm(self) -> float:
        return FWHM_PER_SIGMA * self.blur_sigma


@dataclass
class Layer:
    """A component present between two interfaces."""

    component: str
    top: Interface
    bottom: Interface
    thickness: float = field(init=False)
    thickness_err: float = field(init=False)

    def __post_init__(self):
        self.thickness = self.bottom.z - self.top.z
        # independent edges; locate_interfaces replaces this with the fit's covariance
        self.thickness_err = float(np.hypot(self.top.z_err, self.bottom.z_err))


def _edge(z, z0, s):
    return 0.5 * (1.0 + erf((z - z0) / (_SQRT2 * s)))


def _step_model(z, c, h, z0, s):
    return c + h * _edge(z, z0, s)


def _layer_model(z, c, h, z1, z2, s):
    return c + h * (_edge(z, z1, s) - _edge(z, z2, s))


def _crossings(z, p, level):
    """Depths where ``p`` crosses ``level`` (linear interpolation), in order."""
    above = p > level
    out = []
    for i in np.flatnonzero(above[1:] != above[:-1]):
        t = (level - p[i]) / (p[i + 1] - p[i])
        out.append(z[i] + t * (z[i + 1] - z[i]))
    return out


def _fit(model, z, p, p0, name):
    try:
        popt, pcov = curve_fit(model, z, p, p0=p0, maxfev=20000)
    except (RuntimeError, ValueError) as exc:
        raise MapkitError(f"the edge fit of {name!r} did not converge ({exc})", field=name,
                          fix="average over a larger region or check the profile") from None
    err = np.sqrt(np.clip(np.diag(pcov), 0, None))
    if not np.all(np.isfinite(err)):
        raise MapkitError(f"the edge fit of {name!r} is undetermined (too few depths across "
                          "the step)", field=name, fix="scan more depths across the interface")
    return popt, err, pcov


def locate_interfaces(profile: DepthProfile, *, components=None, min_contrast: float = 0.2):
    """Interfaces and layers in each component's profile.

    For each component the profile is classed by where it lies above its half level
    (halfway between its smallest and largest value): above only in the middle, a layer
    (two edges fitted together); above only at the bottom or top, a single step. A
    component whose step is less than ``min_contrast`` of its largest value is skipped.

    Returns ``(interfaces, layers)``: lists of :class:`Interface` (sorted by depth) and
    :class:`Layer`.
    """
    z = np.asarray(profile.z, dtype=np.float64)
    order = np.argsort(z)
    z = z[order]
    interfaces, layers = [], []
    for k, name in enumerate(profile.names):
        if components is not None and name not in components:
            continue
        p = np.asarray(profile.values[k], dtype=np.float64)[order]
        ok = np.isfinite(p)
        zk, p = z[ok], p[ok]
        if p.size < 5:
            continue
        lo, hi = float(np.min(p)), float(np.max(p))
        if hi - lo <= min_contrast * max(abs(hi), abs(lo), 1e-300):
            continue
        half = 0.5 * (lo + hi)
        cross = _crossings(zk, p, half)
        if not cross:
            continue
        top_high, bottom_high = p[0] > half, p[-1] > half
        s0 = max(np.median(np.diff(zk)), 1e-6)
        if top_high == bottom_high and len(cross) >= 2:      # a layer (or a gap)
            sign = -1.0 if top_high else 1.0
            c0 = hi if top_high else lo
            popt, err, pcov = _fit(_layer_model, zk, p,
                                   [c0, sign * (hi - lo), cross[0], cross[-1], s0], name)
            c, h, z1, z2, s = popt
            s = abs(s)
            kind = ("rises", "falls") if h > 0 else ("falls", "rises")
            top = Interface(name, float(z1), float(err[2]), kind[0], float(s), float(err[4]),
                            float(min(c, c + h)), float(max(c, c + h)))
            bottom = Interface(name, float(z2), float(err[3]), kind[1], float(s),
                               float(err[4]), top.low, top.high)
            interfaces += [top, bottom]
            if h > 0:
                layer = Layer(name, top, bottom)
                # the two edges share a fit: use their full covariance for the thickness
                var = pcov[2, 2] + pcov[3, 3] - 2 * pcov[2, 3]
                layer.thickness_err = float(np.sqrt(max(var, 0.0)))
                layers.append(layer)
        elif top_high != bottom_high:                          # one step
            h0 = (hi - lo) * (1.0 if bottom_high else -1.0)
            c0 = lo if bottom_high else hi
            popt, err, _ = _fit(_step_model, zk, p, [c0, h0, cross[len(cross) // 2], s0], name)
            c, h, z0, s = popt
            interfaces.append(Interface(name, float(z0), float(err[2]),
                                        "rises" if h > 0 else "falls", float(abs(s)),
                                        float(err[3]), float(min(c, c + h)),
                                        float(max(c, c + h))))
    interfaces.sort(key=lambda i: i.z)
    return interfaces, layers


def profile_table(profile: DepthProfile, interfaces=(), layers=()) -> str:
    """The profile as CSV text: commented header (where, caution, interfaces), then rows."""
    state = "corrected" if profile.refraction else "nominal (apparent)"
    lines = [f"# depth profile, {profile.where}; depth: {state}",
             f"# caution: {profile.caution}"]
    for i in interfaces:
        lines.append(f"# interface: {i.component} {i.direction} at z = {i.z:.4g} +- "
                     f"{i.z_err:.2g} um (depth blur FWHM {i.blur_fwhm:.3g} um)")
    for lay in layers:
        lines.append(f"# layer: {lay.component} from {lay.top.z:.4g} to {lay.bottom.z:.4g} um, "
                     f"thickness {lay.thickness:.4g} +- {lay.thickness_err:.2g} um")
    unit = f" ({profile.units})" if profile.units else ""
    head = ["z_um"] + [c for n in profile.names for c in (f"{n}{unit}", f"{n}_sd")] + ["n_pixels"]
    lines.append(",".join(h.replace(",", ";") for h in head))
    for j, zj in enumerate(profile.z):
        row = [f"{zj:.6g}"] + [f"{v:.6g}" for k in range(len(profile.names))
                               for v in (profile.values[k, j], profile.sd[k, j])]
        lines.append(",".join(row + [str(int(profile.n_pixels[j]))]))
    return "\n".join(lines) + "\n"


def write_profile_csv(path, profile: DepthProfile, interfaces=(), layers=(), *,
                      overwrite: bool = False):
    """Write :func:`profile_table` atomically (refused if ``path`` exists, unless ``overwrite``)."""
    from ..export.atomic import atomic_path

    with atomic_path(path, overwrite=overwrite) as tmp:
        tmp.write_text(profile_table(profile, interfaces, layers), encoding="utf-8")
    return path
