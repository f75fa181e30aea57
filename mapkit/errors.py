"""The one error type that means "the user's input is wrong".

Every user mistake (a missing file, a bad dataset, a recipe with an unknown
step) is raised as :class:`MapkitError`; the command line prints it as one
line and exits with status 2. Anything else that escapes is a bug in mapkit
and exits with status 1.
"""

from __future__ import annotations


class MapkitError(Exception):
    """A user-facing problem with an input, a parameter or an output path.

    Parameters
    ----------
    problem : str
        What is wrong, in plain words.
    file : str or path-like, optional
        The file concerned.
    field : str, optional
        The dataset, column, parameter or option concerned.
    fix : str, optional
        What the user can do about it.

    Examples
    --------
    >>> str(MapkitError("values are not monotonic", file="a.h5",
    ...                 field="/entry/map/raman_shift", fix="sort the axis"))
    'a.h5: /entry/map/raman_shift: values are not monotonic; sort the axis'
    """

    def __init__(self, problem: str, *, file=None, field: str | None = None,
                 fix: str | None = None):
        self.problem = problem
        self.file = None if file is None else str(file)
        self.field = field
        self.fix = fix
        super().__init__(str(self))

    def __str__(self) -> str:
        head = ": ".join(p for p in (self.file, self.field) if p)
        text = f"{head}: {self.problem}" if head else self.problem
        if self.fix:
            text += f"; {self.fix}"
        # One line, always: the CLI prints this verbatim.
        return " ".join(text.split())


class DataError(MapkitError, ValueError):
    """A :class:`MapkitError` about the data given to an estimator (too few spectra or
    standards, too few channels, a parameter the data cannot support).

    It is also a ``ValueError``, the type scikit-learn's tools (pipelines, search,
    ``check_estimator``) expect for data an estimator cannot use; the command line
    treats it as any other :class:`MapkitError` (one line, exit 2).

    Examples
    --------
    >>> isinstance(DataError("too few spectra", field="X"), (MapkitError, ValueError))
    True
    """


#: what a full disk, a quota, a read-only disk or missing permission means for the user
_SPACE_FIX = "free space there or write the results to another disk (--out)"
_ENVIRONMENT = {"ENOSPC": ("no space left on the device", _SPACE_FIX),
                "EDQUOT": ("the disk quota is exhausted", _SPACE_FIX),
                "EROFS": ("the disk is read-only", "write the results elsewhere (--out)"),
                "EACCES": ("permission denied", "check the file's permissions, or write the "
                           "results where you may (--out)"),
                "EPERM": ("the operation is not permitted", "check the file's permissions, or "
                          "write the results where you may (--out)")}


def environment_error(exc: OSError, *, staging: str | None = None,
                      where=None) -> MapkitError | None:
    """The :class:`MapkitError` for an operating-system refusal the user can act on (full
    disk, quota, read-only disk, permission), naming the file; None for anything else.

    ``staging``: the name prefix of the folder outputs are finished in; a path inside one is
    reported as the output folder it belongs to, and a hidden ``.NAME.xxxx.part`` file as
    ``NAME``. ``where``: the file or folder to name when the error names none (a failed
    write or close carries no file name).

    Examples
    --------
    >>> import errno
    >>> str(environment_error(OSError(errno.ENOSPC, "No space left", "out/results.h5")))
    'out/results.h5: no space left on the device; free space there or write the results to another disk (--out)'
    >>> str(environment_error(OSError(errno.ENOSPC, "No space left"), where="out"))
    'out: no space left on the device; free space there or write the results to another disk (--out)'
    """
    import errno
    import re

    text = str(exc)
    code = getattr(exc, "errno", None)
    if code is None:          # HDF5 reports the error number in its message only
        found = re.search(r"errno = (\d+)", text)
        code = int(found.group(1)) if found else None
    name = errno.errorcode.get(code) if code is not None else None
    if name not in _ENVIRONMENT:
        return None
    path = getattr(exc, "filename", None)
    if path is None:          # HDF5: "filename = '...', file descriptor" or "name = '...', errno"
        found = (re.search(r"filename = '(.+?)', file descriptor", text)
                 or re.search(r"\bname = '(.+?)', errno", text)
                 or re.search(r"filename = '([^']+)'", text))
        path = found.group(1) if found else None
    if path is not None:
        path = str(path)
        if staging:           # an output being finished: name its folder
            path = re.sub("/" + re.escape(staging) + r"[^/]*/.*$", "", path)
        path = re.sub(r"(^|/)\.([^/]+)\.[^./]+\.part$", r"\1\2", path)   # .NAME.xxxx.part
    elif where is not None:
        path = str(where)
    problem, fix = _ENVIRONMENT[name]
    return MapkitError(problem, file=path, fix=fix)
