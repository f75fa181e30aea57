"""The map type: a cube of spectra with its named, unit-carrying axes."""

from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np

from ..errors import MapkitError
from .provenance import Step

#: Axis order of every intensity cube in mapkit. Readers that meet another
#: order transpose on the way in; nothing downstream guesses.
DIMS = ("y", "x", "raman_shift")
#: A depth section: rows are depths (µm along the optical axis), columns x.
SECTION_DIMS = ("z", "x", "raman_shift")
#: A volume: depth, then the (y, x) plane.
VOLUME_DIMS = ("z", "y", "x", "raman_shift")
UNITS = {"z": "um", "y": "um", "x": "um", "raman_shift": "1/cm", "laser_wavelength": "nm"}
#: Shown wherever depth values are reported (confocal depth scales are nominal).
DEPTH_CAUTION = ("depth values are apparent (nominal stage depth) unless corrected for "
                 "refraction and validated against a known thickness")


def check_axis(values, *, name: str, length: int | None = None, source=None,
               field_path: str | None = None, monotonic: bool = True) -> np.ndarray:
    """Return ``values`` as a float64 1-D axis, or raise a one-line error.

    An axis must be finite, the right length and (for ``monotonic=True``)
    strictly increasing or strictly decreasing: duplicated or unsorted shift
    values make every band integral and interpolation ambiguous.
    """
    where = field_path or name
    arr = np.asarray(values, dtype=np.float64)
    if arr.ndim != 1:
        raise MapkitError(f"axis must be one-dimensional, got shape {arr.shape}",
                          file=source, field=where, fix="store the axis as a 1-D array")
    if arr.size == 0:
        raise MapkitError("axis is empty", file=source, field=where,
                          fix="store at least one value")
    if length is not None and arr.size != length:
        raise MapkitError(f"axis has {arr.size} values but the cube has {length} along it",
                          file=source, field=where,
                          fix="store one value per cube element along this axis")
    if not np.all(np.isfinite(arr)):
        raise MapkitError("axis holds NaN or infinite values", file=source, field=where,
                          fix="replace them with the true positions")
    if monotonic and arr.size > 1:
        d = np.diff(arr)
        if np.any(d == 0):
            i = int(np.flatnonzero(d == 0)[0])
            raise MapkitError(f"axis has a duplicated value {arr[i]:g} at index {i}",
                              file=source, field=where, fix="remove or average duplicated channels")
        if not (np.all(d > 0) or np.all(d < 0)):
            i = int(np.flatnonzero(np.sign(d) != np.sign(d[0]))[0])
            raise MapkitError(f"axis is not monotonic (turns at index {i + 1})",
                              file=source, field=where, fix="sort the channels by shift")
    return arr


def _step(a) -> float:
    return float(abs(np.median(np.diff(a)))) if a.size > 1 else 1.0


@dataclass(frozen=True, eq=False)
class RamanMap:
    """A hyperspectral Raman map.

    Parameters
    ----------
    intensity : ndarray or dask array
        Counts (or any linear intensity). Shape ``(ny, nx, n_shift)`` in the order
        ``DIMS = (y, x, raman_shift)`` for an area map or a line scan (one row, ``ny = 1``);
        ``(nz, nx, n_shift)`` for a depth section (``SECTION_DIMS``: give ``z`` with one
        value per row and ``y`` with one value, the section's position); ``(nz, ny, nx,
        n_shift)`` for a volume (``VOLUME_DIMS``).
    raman_shift : array, shape (n_shift,)
        Raman shift of each channel in cm⁻¹, strictly monotonic.
    x, y : array
        Stage positions of the columns and rows in µm.
    mask : bool array, shape ``intensity.shape[:-1]``, optional
        ``True`` marks a bad pixel (dead, saturated, non-finite) that no
        decomposition may use.
    laser_wavelength : float, optional
        Excitation wavelength in nm (vacuum), when known.
    provenance : tuple of Step
        Every step that made this map, oldest first.
    source : str, optional
        The file it was read from, for error messages.
    z : array, optional
        Nominal (stage) depth in µm of each depth row (section, volume), or one value (an
        area map at one depth). Depths are apparent unless corrected for refraction
        (:mod:`mapkit.quantify.depth`).

    Examples
    --------
    >>> m = RamanMap(np.ones((2, 3, 4)), raman_shift=[100., 200., 300., 400.],
    ...              x=[0., 1., 2.], y=[0., 1.])
    >>> m.shape, m.n_pixels, m.pixel_size
    ((2, 3, 4), 6, (1.0, 1.0))
    >>> m.spectrum(1, 2).tolist()
    [1.0, 1.0, 1.0, 1.0]
    >>> s = RamanMap(np.ones((3, 2, 4)), raman_shift=[100., 200., 300., 400.],
    ...              x=[0., 1.], y=[5.], z=[0., 2., 4.])
    >>> s.dims, s.kind, s.pixel_size
    (('z', 'x', 'raman_shift'), 'section', (2.0, 1.0))
    """

    intensity: object
    raman_shift: np.ndarray
    x: np.ndarray
    y: np.ndarray
    mask: np.ndarray | None = None
    laser_wavelength: float | None = None
    provenance: tuple = field(default_factory=tuple)
    source: str | None = None
    z: np.ndarray | None = None

    def __post_init__(self):
        data = self.intensity
        if not hasattr(data, "shape") or not hasattr(data, "dtype"):
            data = np.asarray(data)
        if len(data.shape) not in (3, 4):
            raise MapkitError(f"intensity must have 3 axes {DIMS} (or 4 {VOLUME_DIMS}), got "
                              f"shape {tuple(data.shape)}", file=self.source, field="intensity",
                              fix="state the axis order when reading a cube of another rank")
        if not np.issubdtype(data.dtype, np.number) or np.issubdtype(data.dtype, np.complexfloating):
            raise MapkitError(f"intensity has non-real dtype {data.dtype}", file=self.source,
                              field="intensity", fix="store intensities as integers or floats")
        set_ = object.__setattr__
        ns = data.shape[-1]
        nz = None if self.z is None else np.size(self.z)
        if len(data.shape) == 4:
            dims = VOLUME_DIMS
            if self.z is None:
                raise MapkitError("a 4-D cube needs its depth axis z", file=self.source,
                                  field="z", fix="give one depth in um per cube layer")
        elif nz is not None and nz == data.shape[0] and nz > 1 and np.size(self.y) == 1:
            dims = SECTION_DIMS
        else:
            dims = DIMS
            if nz is not None and nz != 1:
                raise MapkitError(f"z has {nz} values for a (y, x) map: give one value (the "
                                  "map's depth), or a section's y as a single value",
                                  file=self.source, field="z",
                                  fix="give z one value per depth row and y one value")
        set_(self, "_dims", dims)
        sizes = dict(zip(dims, data.shape))
        spatial = tuple(int(n) for n in data.shape[:-1])
        set_(self, "intensity", data)
        set_(self, "raman_shift", check_axis(self.raman_shift, name="raman_shift", length=ns,
                                             source=self.source))
        set_(self, "x", check_axis(self.x, name="x", length=sizes["x"], source=self.source))
        set_(self, "y", check_axis(self.y, name="y", length=sizes.get("y", 1),
                                   source=self.source))
        if self.z is not None:
            set_(self, "z", check_axis(self.z, name="z", length=sizes.get("z", 1),
                                       source=self.source))
        mask = np.zeros(spatial, bool) if self.mask is None else np.asarray(self.mask, bool)
        if mask.shape != spatial:
            raise MapkitError(f"mask shape {mask.shape} does not match the map {spatial}",
                              file=self.source, field="mask", fix="store one flag per pixel")
        set_(self, "mask", mask)
        if self.laser_wavelength is not None:
            lw = float(self.laser_wavelength)
            if not (100.0 <= lw <= 20000.0):
                raise MapkitError(f"laser wavelength {lw:g} nm is outside 100-20000 nm",
                                  file=self.source, field="laser_wavelength",
                                  fix="give the excitation wavelength in nm")
            set_(self, "laser_wavelength", lw)
        set_(self, "provenance", tuple(self.provenance))

    # -- shape and geometry ---------------------------------------------------
    @property
    def dims(self) -> tuple[str, ...]:
        """Axis names of the cube: ``DIMS``, ``SECTION_DIMS`` or ``VOLUME_DIMS``."""
        return self._dims

    @property
    def spatial_dims(self) -> tuple[str, ...]:
        return self._dims[:-1]

    @property
    def shape(self) -> tuple[int, ...]:
        return tuple(int(n) for n in self.intensity.shape)

    @property
    def n_pixels(self) -> int:
        return int(np.prod(self.shape[:-1]))

    @property
    def kind(self) -> str:
        """``"map"``, ``"line"`` (one spatial axis with more than one position),
        ``"section"`` (z, x) or ``"volume"`` (z, y, x)."""
        if self._dims == VOLUME_DIMS:
            return "volume"
        if sum(n > 1 for n in self.shape[:-1]) == 1:
            return "line"
        return "section" if self._dims == SECTION_DIMS else "map"

    def coords(self, name: str) -> np.ndarray:
        """Positions in µm along spatial axis ``name`` (``"z"``, ``"y"`` or ``"x"``)."""
        values = {"x": self.x, "y": self.y, "z": self.z}.get(name)
        if values is None:
            raise MapkitError(f"the map has no {name} axis", file=self.source, field=name,
                              fix="read the map with its depth axis")
        return values

    @property
    def pixel_size(self) -> tuple[float, float]:
        """(row step, dx) in µm of the image plane (rows are y, or z for a section);
        1.0 along an axis with a single position. A volume's depth step is ``z_step``."""
        return _step(self.coords(self._dims[-3])), _step(self.x)

    @property
    def spacing(self) -> tuple[float, ...]:
        """Step in µm along every spatial axis, in cube order ((dy, dx), (dz, dx) or
        (dz, dy, dx)); 1.0 along an axis with a single position."""
        return tuple(_step(self.coords(n)) for n in self.spatial_dims)

    @property
    def z_step(self) -> float | None:
        """Depth step in µm (``None`` without a depth axis)."""
        return None if self.z is None else _step(self.z)

    @property
    def is_lazy(self) -> bool:
        """True when the cube is a Dask array (not yet read into memory)."""
        return not isinstance(self.intensity, np.ndarray)

    # -- data access ----------------------------------------------------------
    def spectrum(self, *index: int) -> np.ndarray:
        """One pixel's spectrum (``iy, ix``; ``iz, iy, ix`` for a volume), read without
        loading the cube."""
        return np.asarray(self.intensity[tuple(int(i) for i in index) + (slice(None),)])

    def spectra(self) -> np.ndarray:
        """All spectra as a 2-D (n_pixels, n_shift) array in memory (row-major pixels)."""
        return np.asarray(self.load().intensity).reshape(self.n_pixels, self.shape[-1])

    def load(self) -> "RamanMap":
        """The same map with its cube read into memory."""
        if not self.is_lazy:
            return self
        return replace(self, intensity=np.asarray(self.intensity.compute()
                                                  if hasattr(self.intensity, "compute")
                                                  else self.intensity[...]))

    # -- derivation -----------------------------------------------------------
    def derive(self, intensity, step: Step, *, raman_shift=None, mask=None) -> "RamanMap":
        """A new map from a processing step; the step is appended to provenance."""
        return replace(self, intensity=intensity,
                       raman_shift=self.raman_shift if raman_shift is None else raman_shift,
                       mask=self.mask if mask is None else mask,
                       provenance=self.provenance + (step,))

    def __repr__(self) -> str:
        ns = self.shape[-1]
        lo, hi = sorted((self.raman_shift[0], self.raman_shift[-1]))
        size = " x ".join(str(n) for n in self.shape[:-1])
        kind = "" if self.kind == "map" else f"{self.kind} {','.join(self.spatial_dims)}: "
        return (f"RamanMap({kind}{size} pixels, {ns} channels {lo:.1f}-{hi:.1f} 1/cm, "
                f"pixel {self.pixel_size[1]:g} x {self.pixel_size[0]:g} um, "
                f"{int(self.mask.sum())} masked, {len(self.provenance)} steps"
                f"{', lazy' if self.is_lazy else ''})")
