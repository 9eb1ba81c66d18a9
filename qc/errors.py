"""Errors that plexwash reports to users as one line, without a traceback."""

from __future__ import annotations

from pathlib import Path


class InputError(ValueError):
    """Bad input from the user: a file, a setting or a command-line value.

    The CLI prints ``error: <file>: <problem>`` and exits with status 2.

    Parameters
    ----------
    path : str or Path
        The file (or recipe key, or option) the problem is in.
    problem : str
        What is wrong, in one short line.

    Examples
    --------
    >>> err = InputError("roi.tiff", "file is empty")
    >>> str(err)
    'roi.tiff: file is empty'
    """

    def __init__(self, path: str | Path, problem: str):
        self.path = str(path)
        self.problem = " ".join(str(problem).split())
        super().__init__(f"{self.path}: {self.problem}")
