"""Write outputs atomically: a temporary file beside the target, then a rename.

A crash (or a kill) while writing leaves either the previous output or none,
never a half-written file. Inside :func:`output_transaction` the same holds for a whole
folder of outputs: each file is finished in a hidden staging folder beside its target, and
the targets are replaced only when the run ends without error, so a run that fails, is
interrupted or is killed leaves every previous output as it was.
"""

from __future__ import annotations

import contextlib
import contextvars
import functools
import os
import shutil
import tempfile
from pathlib import Path

from ..errors import MapkitError


def check_target(path, *, overwrite: bool) -> Path:
    """Refuse an output path that is a directory, exists (without overwrite) or can't be written."""
    path = Path(path)
    if path.is_dir():
        raise MapkitError("the output path is a directory", file=path,
                          fix="give a file name inside it")
    if path.exists() and not overwrite:
        raise MapkitError("the output file exists", file=path,
                          fix="choose another name or pass --overwrite")
    parent = path.parent if str(path.parent) else Path(".")
    if not parent.is_dir():
        raise MapkitError("the output folder does not exist", file=path,
                          fix=f"create {parent} first")
    if not os.access(parent, os.W_OK):
        raise MapkitError("the output folder is not writable", file=path,
                          fix="choose a folder you can write to")
    return path


@contextlib.contextmanager
def atomic_path(path, *, overwrite: bool = False):
    """Yield a temporary path to write; rename it onto ``path`` on success.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> d = pathlib.Path(tempfile.mkdtemp())
    >>> with atomic_path(d / "out.txt") as tmp:
    ...     _ = tmp.write_text("done")
    >>> (d / "out.txt").read_text()
    'done'
    """
    path = check_target(path, overwrite=overwrite)
    tx = _transaction_of(path)
    if tx is not None:
        with tx.stage(path, overwrite=overwrite) as tmp:
            yield tmp
        return
    with _temporary(path.name, path.parent, path) as tmp:
        yield tmp


@contextlib.contextmanager
def _temporary(name, folder, dest):
    """Yield a new hidden ``.part`` file in ``folder``; rename it to ``dest`` on success."""
    fd, tmp = tempfile.mkstemp(prefix=f".{name}.", suffix=".part", dir=folder)
    os.close(fd)
    umask = os.umask(0)
    os.umask(umask)
    os.chmod(tmp, 0o666 & ~umask)  # mkstemp makes 0600; outputs get ordinary permissions
    tmp = Path(tmp)
    try:
        yield tmp
        os.replace(tmp, dest)
    finally:
        if tmp.exists():
            tmp.unlink()


#: prefix of the hidden folders a transaction stages its files in (one per target folder)
STAGING_PREFIX = ".mapkit-pending-"

_ACTIVE: contextvars.ContextVar[tuple] = contextvars.ContextVar("mapkit_output_transactions",
                                                                 default=())


def _key(path) -> Path:
    return Path(os.path.abspath(path))


class _Transaction:
    """The files written under one folder, finished but not yet put in place."""

    def __init__(self, folder):
        self.folder = _key(folder)
        self.pending: dict[Path, Path] = {}   # target -> finished staged copy, in write order
        self.stages: dict[Path, Path] = {}    # target folder -> its staging folder

    def covers(self, path) -> bool:
        return _key(path).is_relative_to(self.folder)

    @contextlib.contextmanager
    def stage(self, path: Path, *, overwrite: bool):
        key = _key(path)
        if key in self.pending and not overwrite:   # as if the first write were in place
            raise MapkitError("the output file exists", file=path,
                              fix="choose another name or pass --overwrite")
        folder = self.stages.get(key.parent)
        if folder is None:
            folder = Path(tempfile.mkdtemp(prefix=STAGING_PREFIX, dir=key.parent))
            self.stages[key.parent] = folder
        staged = folder / key.name   # the target's own name: readable as what it is
        with _temporary(path.name, folder, staged) as tmp:
            yield tmp
        self.pending.pop(key, None)
        self.pending[key] = staged

    def commit(self):
        try:
            for target, staged in self.pending.items():
                os.replace(staged, target)
        finally:
            self.discard()

    def discard(self):
        for folder in self.stages.values():
            shutil.rmtree(folder, ignore_errors=True)
        self.pending.clear()
        self.stages.clear()


def _transaction_of(path):
    """The outermost open transaction whose folder holds ``path``, or None."""
    return next((tx for tx in _ACTIVE.get() if tx.covers(path)), None)


@contextlib.contextmanager
def output_transaction(folder):
    """Replace the outputs written under ``folder`` only when the block ends without error.

    Inside the block, :func:`atomic_path` finishes every file whose target lies in
    ``folder`` (or below it) in a hidden staging folder beside the target
    (``.mapkit-pending-*``); on a clean exit the targets are replaced, in the order they
    were written (renames only: no work is left to fail), and on an error or an interrupt
    the staged files are deleted and every previous output stays as it was. A killed process
    leaves its staging folder behind and the previous outputs intact. A transaction opened
    inside another one on the same folder joins it. Reading an output back before the end:
    :func:`staged`.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> d = pathlib.Path(tempfile.mkdtemp())
    >>> with atomic_path(d / "a.txt") as tmp:
    ...     _ = tmp.write_text("old")
    >>> try:
    ...     with output_transaction(d):
    ...         with atomic_path(d / "a.txt", overwrite=True) as tmp:
    ...             _ = tmp.write_text("new")
    ...         raise RuntimeError("the run fails after writing a.txt")
    ... except RuntimeError:
    ...     pass
    >>> (d / "a.txt").read_text(), sorted(p.name for p in d.iterdir())
    ('old', ['a.txt'])
    """
    if folder is None or _transaction_of(Path(folder) / "_") is not None:
        yield
        return
    tx = _Transaction(folder)
    token = _ACTIVE.set(_ACTIVE.get() + (tx,))
    try:
        yield
    except BaseException:
        tx.discard()
        raise
    else:
        tx.commit()
    finally:
        _ACTIVE.reset(token)


def all_or_nothing(write):
    """Run ``write(folder, ...)`` as one :func:`output_transaction` on ``folder``."""
    @functools.wraps(write)
    def run(folder, *args, **kwargs):
        with output_transaction(folder):
            return write(folder, *args, **kwargs)
    return run


def staged(path) -> Path:
    """Where the output ``path`` written in the open transaction lies now (``path`` itself
    when none is pending): a run reads back its own outputs through this."""
    tx = _transaction_of(path)
    return tx.pending.get(_key(path), Path(path)) if tx is not None else Path(path)
