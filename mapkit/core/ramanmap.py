"""The map type: a cube of spectra with its named, unit-carrying axes."""

from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np

from ..errors import MapkitError
from .provenance import Step

#: Axis order of every intensity cube in mapkit. Readers that meet another
#: order transpose on the way in; nothing downstream guesses.
DIMS = ("y", "x", "raman_shift")
UNITS = {"y": "um", "x": "um", "raman_shift": "1/cm", "laser_wavelength": "nm"}


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


@dataclass(frozen=True, eq=False)
class RamanMap:
    """A hyperspectral Raman map.

    Parameters
    ----------
    intensity : ndarray or dask array, shape (ny, nx, n_shift)
        Counts (or any linear intensity) in the order ``DIMS = (y, x, raman_shift)``.
    raman_shift : array, shape (n_shift,)
        Raman shift of each channel in cm⁻¹, strictly monotonic.
    x, y : array
        Stage positions of the columns and rows in µm.
    mask : bool array, shape (ny, nx), optional
        ``True`` marks a bad pixel (dead, saturated, non-finite) that no
        decomposition may use.
    laser_wavelength : float, optional
        Excitation wavelength in nm (vacuum), when known.
    provenance : tuple of Step
        Every step that made this map, oldest first.
    source : str, optional
        The file it was read from, for error messages.

    Examples
    --------
    >>> m = RamanMap(np.ones((2, 3, 4)), raman_shift=[100., 200., 300., 400.],
    ...              x=[0., 1., 2.], y=[0., 1.])
    >>> m.shape, m.n_pixels, m.pixel_size
    ((2, 3, 4), 6, (1.0, 1.0))
    >>> m.spectrum(1, 2).tolist()
    [1.0, 1.0, 1.0, 1.0]
    """

    intensity: object
    raman_shift: np.ndarray
    x: np.ndarray
    y: np.ndarray
    mask: np.ndarray | None = None
    laser_wavelength: float | None = None
    provenance: tuple = field(default_factory=tuple)
    source: str | None = None

    def __post_init__(self):
        data = self.intensity
        if not hasattr(data, "shape") or not hasattr(data, "dtype"):
            data = np.asarray(data)
        if len(data.shape) != 3:
            raise MapkitError(f"intensity must have 3 axes {DIMS}, got shape {tuple(data.shape)}",
                              file=self.source, field="intensity",
                              fix="state the axis order when reading a cube of another rank")
        if not np.issubdtype(data.dtype, np.number) or np.issubdtype(data.dtype, np.complexfloating):
            raise MapkitError(f"intensity has non-real dtype {data.dtype}", file=self.source,
                              field="intensity", fix="store intensities as integers or floats")
        ny, nx, ns = data.shape
        set_ = object.__setattr__
        set_(self, "intensity", data)
        set_(self, "raman_shift", check_axis(self.raman_shift, name="raman_shift", length=ns,
                                             source=self.source))
        set_(self, "x", check_axis(self.x, name="x", length=nx, source=self.source))
        set_(self, "y", check_axis(self.y, name="y", length=ny, source=self.source))
        mask = np.zeros((ny, nx), bool) if self.mask is None else np.asarray(self.mask, bool)
        if mask.shape != (ny, nx):
            raise MapkitError(f"mask shape {mask.shape} does not match the map {(ny, nx)}",
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
    dims = DIMS

    @property
    def shape(self) -> tuple[int, int, int]:
        return tuple(int(n) for n in self.intensity.shape)

    @property
    def n_pixels(self) -> int:
        return self.shape[0] * self.shape[1]

    @property
    def pixel_size(self) -> tuple[float, float]:
        """(dy, dx) step in µm; 1.0 along an axis with a single position."""
        def step(a):
            return float(abs(np.median(np.diff(a)))) if a.size > 1 else 1.0
        return step(self.y), step(self.x)

    @property
    def is_lazy(self) -> bool:
        """True when the cube is a Dask array (not yet read into memory)."""
        return not isinstance(self.intensity, np.ndarray)

    # -- data access ----------------------------------------------------------
    def spectrum(self, iy: int, ix: int) -> np.ndarray:
        """One pixel's spectrum, read without loading the cube."""
        return np.asarray(self.intensity[int(iy), int(ix), :])

    def spectra(self) -> np.ndarray:
        """All spectra as a 2-D (n_pixels, n_shift) array in memory (row-major pixels)."""
        return np.asarray(self.load().intensity).reshape(self.n_pixels, self.shape[2])

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
        ny, nx, ns = self.shape
        lo, hi = sorted((self.raman_shift[0], self.raman_shift[-1]))
        return (f"RamanMap({ny} x {nx} pixels, {ns} channels {lo:.1f}-{hi:.1f} 1/cm, "
                f"pixel {self.pixel_size[1]:g} x {self.pixel_size[0]:g} um, "
                f"{int(self.mask.sum())} masked, {len(self.provenance)} steps"
                f"{', lazy' if self.is_lazy else ''})")
