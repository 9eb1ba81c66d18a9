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


class OutputError(Exception):
    """An output could not be written (a full disk): the CLI prints ``error: <file>: <problem>``.

    Not bad input, so the exit status is 1; the file named is the one being written.

    Examples
    --------
    >>> str(OutputError("out/report.html", "no space left on device"))
    'out/report.html: no space left on device'
    """

    def __init__(self, path: str | Path, problem: str):
        self.path = str(path)
        self.problem = " ".join(str(problem).split())
        super().__init__(f"{self.path}: {self.problem}")

    def __str__(self) -> str:
        return f"{self.path}: {self.problem}"
