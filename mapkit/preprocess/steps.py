"""Map-level shortcuts for the common steps (each runs the registry's step of that name)."""

from __future__ import annotations

from ..core.ramanmap import RamanMap
from .registry import run_step


def flag_bad_pixels(m: RamanMap, *, saturation: float | None = None, max_fraction: float = 0.5):
    """Mask non-finite, dead and saturated pixels; returns (map, report of counts)."""
    out, extra = run_step(m, "mask_bad_pixels", {"saturation": float(saturation or 0.0),
                                                 "max_fraction": max_fraction})
    return out, extra["report"]


def remove_spikes(m: RamanMap, *, threshold: float = 8.0, grow: float = 3.0):
    """Replace cosmic-ray spikes (spatial-neighbour test); returns (map, spike mask)."""
    out, extra = run_step(m, "despike", {"method": "neighbours", "threshold": threshold,
                                         "grow": grow})
    return out, extra["spikes"]


def remove_baseline(m: RamanMap, *, method: str = "als", **params):
    """Subtract a baseline (``method`` als, arpls, airpls, modpoly or rolling); returns the map."""
    out, _ = run_step(m, "baseline", {"method": method, **params})
    return out


def normalise_map(m: RamanMap, *, method: str = "vector"):
    """Normalise every spectrum; masked pixels stay zero."""
    return run_step(m, "normalise", {"method": method})[0]
