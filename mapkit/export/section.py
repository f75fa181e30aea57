"""Figures of depth sections: the x–z image at true aspect with both scale bars, and the
depth profile beside it with the located interfaces."""

from __future__ import annotations

import numpy as np

from .atomic import atomic_path
from .figures import QUANTITY_CMAP, _figure, robust_limits, section_scale_bars


def save_section_figure(path, image, x, z, *, label: str = "", profile=None, interfaces=(),
                        title: str = "", corrected: bool = False, overwrite: bool = False,
                        dpi: int = 150):
    """Save an x–z section (``image`` (nz, nx), depth downward) with x and z scale bars.

    The image is drawn at true aspect (1 µm in x as long as 1 µm in z) on the depth axis
    given; ``corrected`` only changes the wording (nominal depths are marked apparent).
    With ``profile`` (a :class:`~mapkit.quantify.depth.DepthProfile`) the profile is drawn
    beside it on the same depth axis, with each interface in ``interfaces`` as a line.
    Returns the path and the two bar lengths ``(x_um, z_um)``.
    """
    img = np.asarray(image, dtype=float)
    x, z = np.asarray(x, float), np.asarray(z, float)
    dx = abs(x[1] - x[0]) if x.size > 1 else 1.0
    dz = abs(z[1] - z[0]) if z.size > 1 else 1.0
    extent = (x[0] - dx / 2, x[-1] + dx / 2, z[-1] + dz / 2, z[0] - dz / 2)
    z_label = "corrected" if corrected else "apparent"
    fig = _figure(figsize=(8.6 if profile is not None else 5.4, 4.6), layout="constrained")
    if profile is not None:
        ax, side = fig.subplots(1, 2, width_ratios=(3, 2), sharey=True)
    else:
        ax, side = fig.add_subplot(), None
    lo, hi = robust_limits(img)
    im = ax.imshow(np.ma.masked_invalid(img), extent=extent, cmap=QUANTITY_CMAP,
                   interpolation="nearest", vmin=lo, vmax=hi, aspect="equal")
    im.cmap.set_bad("#bbbbbb")
    # below the image: beside it the bar would crowd the profile panel
    fig.colorbar(im, ax=ax, shrink=0.8, location="bottom").set_label(label)
    ax.set_xlabel("x (µm)")
    ax.set_ylabel(f"depth z (µm, {z_label})")
    bars = section_scale_bars(ax, extent, z_label)
    ax.set_title(title, fontsize=10)
    if side is not None:
        for k, name in enumerate(profile.names):
            side.plot(profile.values[k], profile.z, label=name)
        for i in interfaces:
            side.axhline(i.z, color="#555555", lw=0.8, ls="--",
                         label=f"{i.component} {i.direction}: {i.z:.2f} ± {i.z_err:.2f} µm")
        side.set_xlabel(profile.units or "value")
        side.legend(fontsize=7, frameon=True, framealpha=0.85, loc="best")
        side.set_title(profile.where, fontsize=9)
    fig.suptitle(profile.caution if profile is not None else
             ("depths apparent (nominal), not corrected for refraction" if not corrected
              else "depths corrected (paraxial n ratio): validate against a known thickness"),
             fontsize=7, color="#444444")
    with atomic_path(path, overwrite=overwrite) as tmp:
        fig.savefig(tmp, dpi=dpi, format=str(path).rsplit(".", 1)[-1])
    return path, bars
