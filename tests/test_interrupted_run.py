"""A run that fails, is interrupted or is killed part-way leaves the previous outputs intact.

Each output is finished under a temporary name and renamed onto its target; a rename within
one file system replaces the target atomically (IEEE Std 1003.1-2017, rename()). Within a run
the targets are replaced only once every output is finished (``export.atomic``), so the
previous ``results.h5`` and the rest of its bundle survive a failure anywhere in the writing.
"""

from __future__ import annotations

import shutil
import subprocess
import sys
import textwrap
from pathlib import Path

import h5py
import numpy as np
import pytest

from mapkit import RamanMap
from mapkit.cli import main
from mapkit.core.result import Axis, Field, Result
from mapkit.export.atomic import STAGING_PREFIX, atomic_path, output_transaction, staged

from .conftest import sha256


def _digests(folder):
    return {p.relative_to(folder): sha256(p) for p in folder.rglob("*") if p.is_file()}


def _analyse_args(sample_map_path, out):
    return ["analyse", str(sample_map_path), "--out", str(out), "--quiet", "--overwrite",
            "--component-method", "nmf", "--class-method", "kmeans", "--components", "3"]


@pytest.fixture(scope="module")
def previous(sample_map_path, tmp_path_factory):
    """A finished run's outputs, and their checksums."""
    out = tmp_path_factory.mktemp("previous")
    assert main(_analyse_args(sample_map_path, out)) == 0
    return out, _digests(out)


class _FailOnThirdTiff:
    """Let two TIFFs be written, then fail as ``exc`` would (a bug, a Ctrl-C): the new
    results file and table are finished by then."""

    def __init__(self, real, out, exc):
        self.real, self.out, self.exc, self.calls = real, out, exc, 0
        self.seen_staged = None

    def __call__(self, *args, **kwargs):
        self.calls += 1
        if self.calls == 3:
            # the new results file is complete, waiting beside the old one
            self.seen_staged = sorted(p.relative_to(self.out).as_posix()
                                      for p in self.out.glob(f"{STAGING_PREFIX}*/*"))
            raise self.exc
        return self.real(*args, **kwargs)


@pytest.mark.parametrize("exc, status", [(RuntimeError("disk on fire"), 1),
                                         (KeyboardInterrupt(), 130)])
def test_failed_overwrite_leaves_the_previous_bundle(previous, sample_map_path, tmp_path,
                                                     monkeypatch, exc, status):
    import mapkit.export.bundle as bundle

    old, before = previous
    out = tmp_path / "out"
    shutil.copytree(old, out)
    fail = _FailOnThirdTiff(bundle.write_tiff, out, exc)
    monkeypatch.setattr(bundle, "write_tiff", fail)
    assert main(_analyse_args(sample_map_path, out)) == status
    assert fail.calls == 3
    staged_names = [n.rsplit("/", 1)[1] for n in fail.seen_staged]
    assert "results.h5" in staged_names and len(staged_names) >= 4, fail.seen_staged
    # every previous file byte for byte, nothing added (no staging folder, no .part file)
    assert _digests(out) == before
    assert sorted(p.name for p in out.iterdir()) == sorted(str(k) for k in before)
    with h5py.File(out / "results.h5", "r") as f:
        assert f["/entry/map/intensity"].shape[0] > 0


@pytest.mark.parametrize("style", ["posix", "hdf5", "unnamed"])
def test_full_disk_is_told_in_one_line_and_leaves_the_previous_bundle(
        previous, sample_map_path, tmp_path, monkeypatch, capsys, style):
    """A full disk is not a bug: one line naming the output folder (not the staging file)
    and what to do, status 2, the previous outputs kept. HDF5 reports the error number and
    the file in its message only (``errno = 28``, ``filename = '...'``)."""
    import errno

    import mapkit.export.bundle as bundle

    old, before = previous
    out = tmp_path / "out"
    shutil.copytree(old, out)
    part = out / f"{STAGING_PREFIX}x1" / "cube_classes_labels.tif.part"
    # a write() or close() that fails names no file (style "unnamed", as writing to a full
    # disk raises it): the command's output folder is named then
    exc = {"posix": OSError(errno.ENOSPC, "No space left on device", str(part)),
           "hdf5": OSError(f"Can't close file (file write failed: filename = '{part}', "
                           "file descriptor = 3, errno = 28, error message = 'No space left "
                           "on device')"),
           "unnamed": OSError(errno.ENOSPC, "No space left on device")}[style]
    monkeypatch.setattr(bundle, "write_tiff", _FailOnThirdTiff(bundle.write_tiff, out, exc))
    assert main(_analyse_args(sample_map_path, out)) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1, err
    assert err[0].startswith(f"mapkit: error: {out}: no space left on the device; "), err[0]
    assert STAGING_PREFIX not in err[0] and "--out" in err[0]
    assert _digests(out) == before


def test_killed_run_leaves_the_previous_bundle(previous, sample_map_path, tmp_path):
    """SIGKILL (an out-of-memory kill) after the new results file is finished: no cleanup
    runs, and the previous outputs are still the ones in place."""
    old, before = previous
    out = tmp_path / "out"
    shutil.copytree(old, out)
    code = textwrap.dedent(f"""
        import os, signal
        import mapkit.export.bundle as bundle
        from mapkit.cli import main
        real, calls = bundle.write_tiff, [0]
        def killed(*args, **kwargs):
            calls[0] += 1
            if calls[0] == 3:
                os.kill(os.getpid(), signal.SIGKILL)
            return real(*args, **kwargs)
        bundle.write_tiff = killed
        main({_analyse_args(sample_map_path, out)!r})
    """)
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert r.returncode == -9, r.stderr
    now = _digests(out)
    assert {k: v for k, v in now.items() if len(k.parts) == 1} == before
    # what the killed run had finished lies in its staging folder, never over the old files
    stages = [p for p in out.iterdir() if p.name.startswith(STAGING_PREFIX)]
    assert all(k.parts[0] == stages[0].name for k in now if len(k.parts) > 1)
    assert len(stages) == 1 and (stages[0] / "results.h5").is_file()


def _map_and_result():
    rng = np.random.default_rng(0)
    m = RamanMap(rng.random((4, 5, 9)).astype(np.float32), raman_shift=np.linspace(200, 1800, 9),
                 x=np.arange(5.0), y=np.arange(4.0))
    img = Field("abundance", rng.random((2, 4, 5)),
                (Axis("component", np.array(["a", "b"])), Axis("y", m.y, "um"),
                 Axis("x", m.x, "um")))
    return m, Result("unmixing", "nnls", {}, {"abundance": img})


def test_write_bundle_alone_is_all_or_nothing(tmp_path, monkeypatch):
    """The library call, without the command around it: a bundle that fails part-way leaves
    the previous one."""
    import mapkit.export.bundle as bundle

    m, r = _map_and_result()
    first = bundle.write_bundle(tmp_path, m, [r], stem="s", figures=True)
    assert len(first) >= 4
    before = _digests(tmp_path)
    m2 = RamanMap(m.intensity * 2, raman_shift=m.raman_shift, x=m.x, y=m.y)
    real = bundle.save_image_figure

    def fail(*args, **kwargs):
        raise OSError("no space left on device")

    monkeypatch.setattr(bundle, "save_image_figure", fail)
    with pytest.raises(OSError):
        bundle.write_bundle(tmp_path, m2, [r], stem="s", overwrite=True, figures=True)
    assert _digests(tmp_path) == before
    monkeypatch.setattr(bundle, "save_image_figure", real)
    bundle.write_bundle(tmp_path, m2, [r], stem="s", overwrite=True, figures=True)
    with h5py.File(tmp_path / "results.h5", "r") as f:
        np.testing.assert_array_equal(f["/entry/map/intensity"][...], m.intensity * 2)
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".")]


def test_a_run_reads_back_what_it_wrote(tmp_path):
    """Inside a run, an output finished but not yet in place is read from where it waits;
    a second write of the same file without overwrite is refused, as outside a run."""
    from mapkit import MapkitError
    from mapkit.export import write_map
    from mapkit.read import open_map

    m, _ = _map_and_result()
    target = tmp_path / "cube.h5"
    with output_transaction(tmp_path):
        write_map(target, m)
        assert not target.exists()
        assert staged(target) != target and staged(target).name == "cube.h5"
        np.testing.assert_array_equal(open_map(target).load().intensity, m.intensity)
        with pytest.raises(MapkitError, match="exists"):
            with atomic_path(target) as tmp:
                tmp.write_text("second")
        # a file outside the run's folder is written at once
        other = tmp_path.parent / f"{tmp_path.name}_elsewhere.txt"
        with atomic_path(other, overwrite=True) as tmp:
            tmp.write_text("now")
        assert other.read_text() == "now"
    assert target.exists() and staged(target) == target
    assert sorted(p.name for p in tmp_path.iterdir()) == ["cube.h5"]


def _calibrate_args(sample_dir, out):
    return ["calibrate", str(sample_dir / "calibration_standards.csv"), "--library",
            str(sample_dir / "library"), "--recipe", str(sample_dir / "tablet_recipe.toml"),
            "--model", "quadratic", "--out", str(out), "--overwrite"]


def test_failed_calibration_leaves_the_previous_model(sample_dir, tmp_path, monkeypatch):
    """The model is written before its figure: a failure at the figure must not leave a new
    model beside the old recipe and figure."""
    import mapkit.export.figures as figures

    out = tmp_path / "model"
    assert main(_calibrate_args(sample_dir, out)) == 0
    before = _digests(out)
    # a different model (another curve) is to replace it, and fails at its figure
    args = _calibrate_args(sample_dir, out)
    args[args.index("quadratic")] = "linear"

    def fail(*a, **k):
        raise OSError("no space left on device")

    monkeypatch.setattr(figures, "save_calibration_figure", fail)
    assert main(args) != 0
    assert _digests(out) == before
    monkeypatch.undo()
    assert main(args) == 0
    assert _digests(out)[Path("quant_model.json")] != before[Path("quant_model.json")]


def test_failed_batch_leaves_the_previous_batch(sample_dir, tmp_path, monkeypatch):
    """A batch that fails on its second map leaves every file of the previous batch."""
    import mapkit.export.bundle as bundle

    model = tmp_path / "model"
    assert main(_calibrate_args(sample_dir, model)) == 0
    maps = tmp_path / "maps"
    maps.mkdir()
    for lot in ("lot_A", "lot_B"):
        shutil.copy(sample_dir / "blend_map.h5", maps / f"{lot}.h5")
    out = tmp_path / "batch"
    args = ["batch", str(maps), "--model-file", str(model / "quant_model.json"), "--library",
            str(sample_dir / "library"), "--out", str(out), "--no-figures", "--overwrite"]
    assert main(args) == 0
    before = _digests(out)
    real, calls = bundle.write_bundle, [0]

    def second_fails(*a, **k):
        calls[0] += 1
        if calls[0] == 2:
            raise OSError("no space left on device")
        return real(*a, **k)

    monkeypatch.setattr(bundle, "write_bundle", second_fails)
    assert main(args) != 0
    assert calls[0] == 2
    assert _digests(out) == before
