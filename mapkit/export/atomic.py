"""Write outputs atomically: a temporary file beside the target, then a rename.

A crash (or a kill) while writing leaves either the previous output or none,
never a half-written file.
"""

from __future__ import annotations

import contextlib
import os
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
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=path.parent)
    os.close(fd)
    umask = os.umask(0)
    os.umask(umask)
    os.chmod(tmp, 0o666 & ~umask)  # mkstemp makes 0600; outputs get ordinary permissions
    tmp = Path(tmp)
    try:
        yield tmp
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()
