"""One entry point that opens any map file mapkit understands."""

from __future__ import annotations

from pathlib import Path

from ..core.ramanmap import RamanMap
from ..errors import MapkitError

_TEXT = (".csv", ".tsv", ".txt", ".dat")
_HDF5 = (".h5", ".hdf5", ".nxs", ".nx5")
#: file suffixes treated as maps when a folder is processed
MAP_SUFFIXES = _HDF5 + _TEXT


def open_map(path, *, dataset: str | None = None, axes=None, shift: str | None = None,
             x: str | None = None, y: str | None = None, pixel_size: float | None = None,
             laser_wavelength: float | None = None, block_bytes: int | None = None,
             position_tolerance: float | None = None, z: str | None = None) -> RamanMap:
    """Open a map lazily from a mapkit NeXus file, any HDF5 dataset, or a text table.

    Parameters
    ----------
    path : path-like
    dataset, axes, shift, x, y, pixel_size
        For a cube in an arbitrary HDF5 file: the dataset path, its axis order
        (e.g. ``"x,y,raman_shift"``), the shift-axis dataset, and the position
        datasets (or a pixel size in µm). Not used for mapkit files or tables.
        A 2-D dataset ``(pixel, raman_shift)`` with one x and one y position per
        spectrum is read too (``axes="pixel,raman_shift"``).
    z : str, optional
        For a depth section (``axes="z,x,raman_shift"`` in any order) or a volume
        (``"z,y,x,raman_shift"``): the dataset of nominal depths in µm.
    laser_wavelength : float, optional
        Excitation wavelength in nm, when the file does not record it (needed to convert
        a shift dataset whose ``units`` are nm).
    position_tolerance : float, optional
        For text tables and 2-D datasets: snap per-spectrum positions that jitter by up
        to this many µm onto a grid (reported in :func:`read_notes`).
    block_bytes : int, optional
        For a mapkit file: read the cube in blocks of about this size (whole-cube passes)
        instead of one file chunk at a time (single-pixel reads).
    """
    from ..export.atomic import staged
    from .hdf5 import read_hdf5_dataset
    from .nexus import read_nexus_map
    from .table import read_table

    p = staged(path)   # an output of this run, finished but not yet put in place: read that
    if not p.exists():
        raise MapkitError("file not found", file=p, fix="check the path")
    if dataset is not None:
        if axes is None or shift is None:
            raise MapkitError("reading a cube by dataset path needs its axis order and shift axis",
                              file=p, field=dataset,
                              fix="pass --axes (e.g. y,x,raman_shift) and --shift-dataset PATH")
        return read_hdf5_dataset(p, dataset, axes=axes, shift_path=shift, x_path=x, y_path=y,
                                 pixel_size=pixel_size, laser_wavelength=laser_wavelength,
                                 position_tolerance=position_tolerance, z_path=z)
    if p.suffix.lower() in _TEXT:
        return read_table(p, laser_wavelength=laser_wavelength,
                          position_tolerance=position_tolerance)
    m = read_nexus_map(p, block_bytes=block_bytes)
    if laser_wavelength is not None and m.laser_wavelength is None:
        from dataclasses import replace
        m = replace(m, laser_wavelength=laser_wavelength)
    return m


def read_steps(notes, path) -> tuple:
    """Provenance ``read`` steps for the notes of a reader (``None`` entries skipped)."""
    from ..core.provenance import Step

    return tuple(Step("read", {"note": n, "source": str(path)}) for n in notes if n)


def read_notes(m) -> list[str]:
    """What the reader converted, snapped or could not confirm when it read ``m``.

    Only the notes of this read count: a map written by mapkit keeps the notes of the
    file it was converted from in its provenance, but they are not repeated.

    Examples
    --------
    >>> from mapkit.core.provenance import Step
    >>> class M:
    ...     source = "scan.csv"
    ...     provenance = (Step("read", {"note": "x snapped", "source": "scan.csv"}),
    ...                   Step("read", {"note": "older", "source": "raw.h5"}), Step("crop", {}))
    >>> read_notes(M())
    ['x snapped']
    """
    return [s.parameters["note"] for s in m.provenance
            if s.name == "read" and "note" in s.parameters
            and s.parameters.get("source") == str(m.source)]
