"""``mapkit depth-profile``: abundance or band profiles against depth, layer interfaces and
thickness, from a depth section or a volume.

The profile is taken at a point or averaged over a region, from reference unmixing
(``--library``) or a band (``--band``); interfaces are located by error-function edge fits
(:mod:`mapkit.quantify.depth`). Depths stay nominal (apparent) unless ``--n-sample`` asks
for the paraxial refraction correction; either way the caution is printed and written.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from .errors import MapkitError


def _span(text: str):
    import argparse

    try:
        parts = [float(v) for v in text.split(":")]
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not LO:HI in um") from None
    if len(parts) != 2 or parts[0] >= parts[1]:
        raise argparse.ArgumentTypeError(f"{text!r} is not LO:HI in um with LO below HI")
    return tuple(parts)


def add_parsers(sub, add_read_options, open_kwargs, band_type):
    """Register ``depth-profile`` (read options, the open-kwargs builder and the band
    argument type are passed in by :mod:`mapkit.cli`)."""
    p = sub.add_parser("depth-profile", help="profiles against depth, layer interfaces and "
                                             "thickness of a depth section or volume")
    p.add_argument("map", help="depth section or volume (mapkit .h5, HDF5 with --dataset and "
                               "--axes naming z, or a text table with a z column)")
    what = p.add_mutually_exclusive_group(required=True)
    what.add_argument("--library", help="folder of reference spectra: profiles of their "
                                        "abundances (NNLS unmixing with baseline terms)")
    what.add_argument("--band", type=band_type, action="append",
                      help="[NAME:]LO-HI in 1/cm: the band's area against depth (repeatable)")
    p.add_argument("--at", type=float, nargs="+", metavar="UM",
                   help="a point: X (section) or X Y (volume) in um; default: the mean over "
                        "the region")
    p.add_argument("--x-range", type=_span, metavar="LO:HI", help="region: x from LO to HI um")
    p.add_argument("--y-range", type=_span, metavar="LO:HI", help="region (volume): y range in um")
    p.add_argument("--n-sample", type=float, help="refractive index of the sample: correct "
                                                  "depths by the paraxial scaling n_sample / "
                                                  "n_immersion (an approximation; off by default)")
    p.add_argument("--n-immersion", type=float, default=1.0,
                   help="refractive index of the objective's immersion medium (1.0: air)")
    p.add_argument("--surface", default="auto", metavar="UM|auto",
                   help="nominal depth of the sample surface for the correction (auto: the "
                        "shallowest located interface)")
    p.add_argument("--recipe", help="TOML recipe of cleaning steps applied first (default none:"
                                    " the unmixing fits its own baseline)")
    p.add_argument("--out", default="mapkit-output", help="folder for the outputs")
    p.add_argument("--overwrite", action="store_true", help="replace existing outputs")
    p.add_argument("--no-figures", action="store_true", help="skip the section figure")
    add_read_options(p)
    p.set_defaults(func=cmd_depth_profile, open_kwargs=open_kwargs)


def _nearest(values, want, name, source):
    values = np.asarray(values)
    if not (values.min() - _half(values) <= want <= values.max() + _half(values)):
        raise MapkitError(f"{name} = {want:g} um lies outside the map ({values.min():g} to "
                          f"{values.max():g} um)", file=source, field="--at",
                          fix=f"give a {name} inside the map")
    return int(np.argmin(np.abs(values - want)))


def _half(values):
    return 0.5 * float(np.median(np.abs(np.diff(values)))) if values.size > 1 else 0.5


def _images(m, a):
    """(names, image stack (k, nz, …), units) of what to profile."""
    if a.library:
        import warnings

        from .read import read_library
        from .reduce.unmix import ReferenceUnmixing

        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            result = ReferenceUnmixing(read_library(a.library)).fit(m).result(m)
        for w in caught:
            print(f"notice    {w.message}")
        f = result.fields["abundance"]
        return [str(v) for v in f.axes[0].values], np.asarray(f.data), f.units
    from .reduce.bands import band_image

    names, imgs = [], []
    for name, lo, hi in a.band:
        f = band_image(m, lo, hi).fields["image"]
        names.append(name)
        imgs.append(f.data)
    return names, np.stack(imgs), "counts*1/cm"


def cmd_depth_profile(a):
    from .export.atomic import check_target
    from .export.section import save_section_figure
    from .quantify.depth import depth_profile, locate_interfaces, write_profile_csv
    from .read import open_map

    out = Path(a.out)
    if out.exists() and not out.is_dir():
        raise MapkitError("the output path is a file, not a folder", file=out, field="--out",
                          fix="give a folder for the outputs")
    csv_path, fig_path = out / "depth_profile.csv", out / "depth_section.png"
    for p in (csv_path, fig_path):
        if out.is_dir():
            check_target(p, overwrite=a.overwrite)
    m = open_map(a.map, **a.open_kwargs(a))
    if m.z is None or m.dims[0] != "z" or m.shape[0] < 2:
        raise MapkitError(f"the map is a {m.kind} without a depth axis", file=m.source,
                          field="z", fix="read a depth section or volume (a z column, --axes "
                                         "naming z with --z-dataset, or a stack of maps)")
    if a.recipe:
        from .preprocess.recipe import Recipe

        m, _ = Recipe.from_file(a.recipe).apply(m.load())
    else:
        m = m.load()
    names, images, units = _images(m, a)
    lateral = m.spatial_dims[1:]                      # ("x",) or ("y", "x")
    at = region = None
    if a.at is not None:
        if len(a.at) != len(lateral):
            raise MapkitError(f"--at gives {len(a.at)} values, the {m.kind} needs "
                              f"{' '.join(lateral[::-1]).upper()}", field="--at",
                              fix="give X for a section, X Y for a volume (um)")
        want = dict(zip(("x", "y"), a.at))
        at = tuple(_nearest(m.coords(n), want[n], n, m.source) for n in lateral)
    else:
        region = np.ones(tuple(m.coords(n).size for n in lateral), bool)
        for n, span in (("x", a.x_range), ("y", a.y_range)):
            if span is not None and n in lateral:
                c = m.coords(n)
                sel = (c >= span[0]) & (c <= span[1])
                shape = [1] * len(lateral)
                shape[lateral.index(n)] = c.size
                region &= sel.reshape(shape)
        good = ~m.mask.any(axis=0) if m.mask.any() else np.ones_like(region)
        region &= good
    profile = depth_profile(images, m.z, names=names, units=units, at=at, region=region)
    interfaces, layers = locate_interfaces(profile)
    if a.n_sample is not None:
        if a.surface == "auto":
            if not interfaces:
                raise MapkitError("no interface was located to place the surface", field="--surface",
                                  fix="give the surface's nominal depth with --surface UM")
            surface = interfaces[0].z
        else:
            try:
                surface = float(a.surface)
            except ValueError:
                raise MapkitError(f"--surface {a.surface!r} is not a depth in um or auto",
                                  field="--surface", fix="give e.g. --surface 0") from None
        profile = profile.corrected(n_sample=a.n_sample, n_immersion=a.n_immersion,
                                    surface=surface)
        interfaces, layers = locate_interfaces(profile)
    out.mkdir(parents=True, exist_ok=True)
    write_profile_csv(csv_path, profile, interfaces, layers, overwrite=a.overwrite)
    state = "corrected" if profile.refraction else "nominal"
    print(f"depth profile ({profile.where}, {state} depths) -> {csv_path}")
    for i in interfaces:
        print(f"interface {i.component} {i.direction} at z = {i.z:.3f} +- {i.z_err:.3f} um "
              f"(blur FWHM {i.blur_fwhm:.2f} um)")
    for lay in layers:
        print(f"layer     {lay.component}: {lay.thickness:.3f} +- {lay.thickness_err:.3f} um "
              f"({lay.top.z:.3f} to {lay.bottom.z:.3f} um)")
    if not interfaces:
        print("interface none located (no step above the contrast threshold)")
    print(f"caution   {profile.caution}")
    if not a.no_figures:
        plane = images[0]
        if plane.ndim == 3:          # a volume: the x–z plane through the point or region
            iy = at[0] if at is not None else int(np.flatnonzero(region.any(axis=1))[0])
            plane = plane[:, iy]
        save_section_figure(fig_path, plane, m.x, profile.z, label=f"{names[0]} ({units})",
                            profile=profile, interfaces=interfaces,
                            corrected=profile.refraction is not None, overwrite=a.overwrite)
        print(f"figure    {fig_path}")
    return 0
