"""Sample data: the invented tablet map bundled with mapkit."""

from __future__ import annotations

from pathlib import Path


def tablet_sample():
    from mapkit.samples import sample_dir

    from ._reader import read_layers

    path = Path(sample_dir()) / "tablet_map.h5"
    return read_layers(str(path))
