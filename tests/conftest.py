"""Shared fixtures: the bundled sample data and its ground truth."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

ROOT = Path(__file__).resolve().parent.parent
SAMPLES = ROOT / "sample_maps"


@pytest.fixture(scope="session")
def sample_dir() -> Path:
    return SAMPLES


@pytest.fixture(scope="session")
def sample_map_path() -> Path:
    return SAMPLES / "tablet_map.h5"


@pytest.fixture(scope="session")
def truth():
    with np.load(SAMPLES / "tablet_truth.npz") as t:
        return {k: t[k] for k in t.files}


@pytest.fixture(scope="session")
def sample_map(sample_map_path):
    from mapkit.read import open_map

    return open_map(sample_map_path).load()


@pytest.fixture(scope="session")
def cleaned(sample_map):
    """The sample map after bad-pixel flagging, spike removal and arPLS baseline removal
    (the bundled recipe, sample_maps/tablet_recipe.toml)."""
    from mapkit.preprocess import flag_bad_pixels, remove_baseline, remove_spikes

    flagged, report = flag_bad_pixels(sample_map)
    despiked, spikes = remove_spikes(flagged)
    corrected = remove_baseline(despiked, method="arpls", lam=1e6)
    return {"flagged": flagged, "report": report, "despiked": despiked, "spikes": spikes,
            "corrected": corrected}


def sha256(path) -> str:
    import hashlib

    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


@pytest.fixture(scope="session", autouse=True)
def sample_digests():
    """Checksums of the bundled inputs before any test runs; every command in the suite
    opens them read-only, so they must be identical when the session ends."""
    before = {p: sha256(p) for p in SAMPLES.rglob("*") if p.is_file()}
    yield before
    after = {p: sha256(p) for p in SAMPLES.rglob("*") if p.is_file()}
    changed = [str(p) for p in before if after.get(p) != before[p]]
    assert not changed, f"input files changed during the tests: {changed}"
