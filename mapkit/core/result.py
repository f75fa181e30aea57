"""Results: images and spectra with their physical axes, ready to write as NXdata."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np


@dataclass(frozen=True)
class Axis:
    """A named coordinate axis with units (``um``, ``1/cm``, or ``""`` for labels)."""

    name: str
    values: np.ndarray
    units: str = ""


@dataclass(frozen=True, eq=False)
class Field:
    """One NXdata block: a signal array, its axes in order, units and optional errors.

    Examples
    --------
    >>> img = Field("band_area", np.zeros((2, 3)),
    ...             (Axis("y", np.arange(2.)), Axis("x", np.arange(3.))), "counts 1/cm")
    >>> img.is_image
    True
    """

    signal: str
    data: np.ndarray
    axes: tuple
    units: str = ""
    errors: np.ndarray | None = None
    long_name: str = ""
    extras: dict = field(default_factory=dict)

    def __post_init__(self):
        data = np.asarray(self.data)
        object.__setattr__(self, "data", data)
        if len(self.axes) != data.ndim:
            raise ValueError(f"{self.signal}: {data.ndim}-D data with {len(self.axes)} axes")
        for ax, n in zip(self.axes, data.shape):
            if len(ax.values) != n:
                raise ValueError(f"{self.signal}: axis {ax.name} has {len(ax.values)} values, data {n}")

    @property
    def axis_names(self) -> tuple[str, ...]:
        return tuple(a.name for a in self.axes)

    @property
    def is_image(self) -> bool:
        """True when the last two axes are (y, x) or, for a depth section, (z, x): a map or a
        stack of maps (a volume's ``(z, y, x)`` counts too; see ``is_volume``)."""
        return self.axis_names[-2:] in (("y", "x"), ("z", "x"))

    @property
    def is_volume(self) -> bool:
        """True when the last three axes are (z, y, x)."""
        return self.axis_names[-3:] == ("z", "y", "x")


@dataclass(frozen=True, eq=False)
class Result:
    """The output of one method: named fields plus the method's parameters."""

    name: str
    method: str
    parameters: dict
    fields: dict
    summary: dict = field(default_factory=dict)
