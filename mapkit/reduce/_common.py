"""Helpers shared by the reduction methods: good-pixel spectra in, images out.

Every estimator takes either a :class:`~mapkit.core.ramanmap.RamanMap` (its unmasked
pixels are the spectra; outputs are images on the map's grid) or a plain array of spectra
(n_spectra, n_shift), one spectrum per row and no mask (outputs are rows, one per
spectrum), so the same estimator works on a whole map, on a block of its pixels and in
scikit-learn's pipelines, searches and cross-validation (:func:`spectra_in`,
:func:`rows_out`).
"""

from __future__ import annotations

import numpy as np

from ..core.ramanmap import RamanMap
from ..core.result import Axis
from ..errors import DataError, MapkitError


def good_spectra(m: RamanMap, *, what: str) -> tuple[np.ndarray, np.ndarray]:
    """(spectra of unmasked pixels as float64, their flat pixel indices); masked pixels never enter."""
    flat = m.spectra().astype(np.float64)
    good = np.flatnonzero(~m.mask.ravel())
    if good.size == 0:
        raise MapkitError(f"every pixel is masked; {what} has nothing to work on",
                          file=m.source, field="mask", fix="check the map's bad-pixel mask")
    # every pixel good (most blocks): the float64 copy itself, not a second one
    return (flat if good.size == flat.shape[0] else flat[good]), good


def to_images(m: RamanMap, values: np.ndarray, good: np.ndarray, fill=np.nan) -> np.ndarray:
    """Scatter per-good-pixel rows (n_good, k) back into images (k, *spatial shape), fill
    elsewhere: (k, ny, nx) for a map, (k, nz, nx) for a section, (k, nz, ny, nx) for a volume."""
    spatial = m.shape[:-1]
    values = np.asarray(values)
    k = values.shape[1] if values.ndim == 2 else 1
    out = np.full((m.n_pixels, k), fill, dtype=np.result_type(values.dtype, np.asarray(fill).dtype))
    out[good] = values.reshape(good.size, k)
    return out.T.reshape(k, *spatial)


def image_axes(m: RamanMap) -> tuple[Axis, ...]:
    """The spatial axes of the map's images in µm: (y, x), (z, x) or (z, y, x)."""
    return tuple(Axis(name, m.coords(name), "um") for name in m.spatial_dims)


def shift_axis(m: RamanMap) -> Axis:
    return Axis("raman_shift", m.raman_shift, "1/cm")


def spectra_in(est, X, *, what: str, reset: bool):
    """The spectra an estimator works on, from a map or from a plain array.

    Parameters
    ----------
    est : estimator
        Gets ``n_features_in_`` (and ``feature_names_in_`` for a data frame) when
        ``reset``; otherwise array input is checked against them.
    X : RamanMap or array-like (n_spectra, n_shift)
        A map (its unmasked pixels are the spectra) or spectra as rows (no mask),
        validated by scikit-learn's ``validate_data`` (finite, dense, 2-D, float64).
    what : str
        The method's name, for the error when every pixel of a map is masked.
    reset : bool
        True in ``fit``, False in ``transform``/``predict`` (and later ``partial_fit``).

    Returns
    -------
    spectra : array (n, n_shift) float64
    rows : int array (n,)
        Flat pixel index of each spectrum (for an array: 0 … n − 1).
    m : RamanMap or None
        The map, or None for array input (outputs stay rows, see :func:`rows_out`).
    """
    if isinstance(X, RamanMap):
        spectra, good = good_spectra(X, what=what)
        if reset:
            est.n_features_in_ = spectra.shape[1]
        return spectra, good, X
    from sklearn.utils.validation import validate_data

    spectra = validate_data(est, X, reset=reset, dtype=np.float64)
    return spectra, np.arange(spectra.shape[0]), None


def rows_out(values, rows, m: RamanMap | None, fill=np.nan):
    """Per-spectrum results (n, k) as images (k, ny, nx) of map ``m``, or as rows when
    the input was an array (``m`` None)."""
    return np.asarray(values) if m is None else to_images(m, values, rows, fill)


def axis_of(m: RamanMap | None, n_shift: int, raman_shift=None) -> np.ndarray:
    """The shift axis of the spectra: the map's, else the one given, else the channel index.

    Only polynomial baseline terms (and references on an axis) need it; the Legendre
    basis is scaled to the axis' range, so on an evenly spaced axis the channel index
    gives the same terms as the axis in cm⁻¹.
    """
    if m is not None:
        return m.raman_shift
    if raman_shift is None:
        return np.arange(n_shift, dtype=float)
    s = np.asarray(raman_shift, float).ravel()
    if s.size != n_shift:
        raise DataError(f"raman_shift has {s.size} values for spectra of {n_shift} channels",
                        field="raman_shift", fix="give one shift value per column")
    return s


def check_components(n: int, m, n_good: int, name="n_components"):
    """``n`` components or classes must be a positive integer that the data support.

    ``m`` is the map, or the number of channels (columns) for array input.
    """
    if not isinstance(n, (int, np.integer)) or n < 1:
        raise MapkitError(f"{name} = {n!r} must be a positive integer", field=name,
                          fix="choose 2-10 for a typical map")
    if isinstance(m, RamanMap):
        limit = min(m.shape[-1], n_good)
        if n > limit:
            raise DataError(f"{name} = {n} exceeds what the map supports ({m.shape[-1]} "
                            f"channels, {n_good} good pixels)", file=m.source, field=name,
                            fix=f"choose at most {limit}")
        return
    limit = min(int(m), n_good)
    if n > limit:
        raise DataError(f"{name} = {n} exceeds what the spectra support ({int(m)} feature(s) "
                        f"or channels, {n_good} sample(s) or spectra)", field=name,
                        fix=f"choose at most {limit}")


def check_baseline_room(n_terms: int, n_shift: int, name: str):
    """Baseline terms must leave channels to fit: ``n_terms`` polynomials span all of
    ``n_shift`` channels when ``n_terms >= n_shift``, and every spectrum projects to zero."""
    if n_terms >= n_shift:
        raise DataError(f"{n_terms} baseline term(s) span all {n_shift} feature(s) (channels): "
                        "nothing is left for the components", field=name,
                        fix="use a lower baseline order or more channels")


def float64_tags(tags):
    """scikit-learn tags of an estimator that computes in float64 whatever it is given."""
    if getattr(tags, "transformer_tags", None) is not None:
        tags.transformer_tags.preserves_dtype = ["float64"]
    return tags
