"""The map type and provenance."""

import numpy as np
import pytest

from mapkit import MapkitError, RamanMap, Step
from mapkit.core import library_versions


def small(**kw):
    args = dict(raman_shift=[100.0, 200.0, 300.0], x=[0.0, 2.0], y=[0.0, 2.0, 4.0])
    args.update(kw)
    return RamanMap(np.arange(18, dtype=float).reshape(3, 2, 3), **args)


def test_axes_travel_with_the_data():
    m = small()
    assert m.dims == ("y", "x", "raman_shift")
    assert m.shape == (3, 2, 3)
    assert m.pixel_size == (2.0, 2.0)
    assert m.spectrum(2, 1).tolist() == [15.0, 16.0, 17.0]
    assert m.spectra().shape == (6, 3)
    assert not m.mask.any()


@pytest.mark.parametrize("kw, words", [
    (dict(raman_shift=[100.0, 200.0]), "axis has 2 values but the cube has 3"),
    (dict(raman_shift=[100.0, 100.0, 300.0]), "duplicated value 100"),
    (dict(raman_shift=[100.0, 300.0, 200.0]), "not monotonic"),
    (dict(raman_shift=[100.0, np.nan, 300.0]), "NaN"),
    (dict(x=[0.0]), "axis has 1 values but the cube has 2"),
    (dict(mask=np.zeros((2, 2), bool)), "mask shape"),
    (dict(laser_wavelength=-5), "laser wavelength"),
])
def test_bad_axes_give_one_line_errors(kw, words):
    with pytest.raises(MapkitError) as err:
        small(**kw)
    assert words in str(err.value)
    assert "\n" not in str(err.value)


def test_wrong_rank_is_refused():
    with pytest.raises(MapkitError, match="3 axes"):
        RamanMap(np.zeros((4, 5)), raman_shift=np.arange(5.0), x=[0.0], y=np.arange(4.0))


def test_decreasing_shift_axis_is_accepted():
    m = small(raman_shift=[300.0, 200.0, 100.0])
    assert m.raman_shift[0] == 300.0


def test_derive_appends_provenance_and_keeps_input():
    m = small()
    before = np.array(m.intensity)
    m2 = m.derive(m.intensity * 2, Step("double", {"factor": 2}))
    assert [s.name for s in m2.provenance] == ["double"]
    assert m2.provenance[0].parameters == {"factor": 2}
    np.testing.assert_array_equal(m.intensity, before)
    assert m.provenance == ()


def test_versions_are_recorded():
    v = library_versions()
    for lib in ("python", "mapkit", "numpy", "scipy", "scikit-learn", "h5py"):
        assert v.get(lib), lib


def test_step_parameters_become_plain_json():
    s = Step("x", {"a": np.float32(1.5), "b": np.arange(3), "c": (1, 2)})
    assert s.parameters == {"a": 1.5, "b": [0, 1, 2], "c": [1, 2]}


def test_input_digest_is_sha256_read_once_and_renewed_when_the_file_changes(tmp_path,
                                                                           monkeypatch):
    # SHA-256 as FIPS 180-4 defines it (reference: Python's hashlib over the bytes); a map of
    # several GB is read once per run for it (the results file and the report both name it,
    # a background reading may run ahead), and a changed file gets its new digest
    import hashlib
    import os

    import mapkit.export.nexus as nexus

    path = tmp_path / "map.bin"
    path.write_bytes(b"abc" * 100_000)
    opened = []
    real_open = open

    def counting_open(p, *a, **k):
        opened.append(str(p))
        return real_open(p, *a, **k)

    monkeypatch.setattr(nexus, "open", counting_open, raising=False)
    nexus.hash_in_background([path]).join()
    first = nexus.file_sha256(path)
    assert first == hashlib.sha256(path.read_bytes()).hexdigest()
    assert nexus.file_sha256(str(path)) == first and len(opened) == 1
    path.write_bytes(b"abd" * 100_000)
    st = path.stat()
    os.utime(path, ns=(st.st_atime_ns, st.st_mtime_ns + 10**9))   # a later modification
    assert nexus.file_sha256(path) == hashlib.sha256(path.read_bytes()).hexdigest() != first
    assert len(opened) == 2
    missing = tmp_path / "gone.bin"
    nexus.hash_in_background([missing]).join()        # the background reading stays quiet
    with pytest.raises(FileNotFoundError):
        nexus.file_sha256(missing)
