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
