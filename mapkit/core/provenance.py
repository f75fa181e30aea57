"""Provenance: which step ran, with which parameters and library versions."""

from __future__ import annotations

import datetime as _dt
import json
import platform
from dataclasses import dataclass, field
from importlib import metadata

_KEY_LIBRARIES = ("mapkit", "numpy", "scipy", "scikit-learn", "h5py", "dask",
                  "matplotlib", "tifffile")


def library_versions() -> dict[str, str]:
    """Versions of Python, mapkit and the libraries whose numbers we report.

    Examples
    --------
    >>> v = library_versions()
    >>> sorted(k for k in ("numpy", "scipy", "h5py") if k in v)
    ['h5py', 'numpy', 'scipy']
    """
    versions = {"python": platform.python_version()}
    for name in _KEY_LIBRARIES:
        try:
            versions[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            if name == "mapkit":
                from .._version import __version__
                versions[name] = __version__
    return versions


def _jsonable(value):
    """Parameters as plain JSON types, so they round-trip through HDF5 attributes."""
    if isinstance(value, dict):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_jsonable(v) for v in value]
    if hasattr(value, "tolist"):  # numpy scalars and arrays
        return value.tolist()
    if isinstance(value, (str, int, float, bool)) or value is None:
        return value
    return str(value)


@dataclass(frozen=True)
class Step:
    """One processing step as recorded in a map's provenance.

    Examples
    --------
    >>> s = Step("baseline_als", {"lam": 1e5, "p": 0.01})
    >>> Step.from_json(s.to_json()) == s
    True
    """

    name: str
    parameters: dict = field(default_factory=dict)
    timestamp: str = field(default_factory=lambda: _dt.datetime.now(
        _dt.timezone.utc).isoformat(timespec="seconds"))

    def __post_init__(self):
        object.__setattr__(self, "parameters", _jsonable(self.parameters))

    def to_json(self) -> str:
        return json.dumps({"name": self.name, "parameters": self.parameters,
                           "timestamp": self.timestamp}, sort_keys=True)

    @classmethod
    def from_json(cls, text: str) -> "Step":
        d = json.loads(text)
        return cls(d["name"], d.get("parameters", {}), d.get("timestamp", ""))
