"""The one error type the project raises for bad input.

Every message is a single line that names the file (and the line, where there is one), so that the
command line can print it as it is and exit with a non-zero status, never with a traceback.
"""

from __future__ import annotations

import os


class InputError(ValueError):
    """Bad input from the user: a file, a line in it, or an argument.

    Parameters
    ----------
    message : str
        What is wrong, in one line.
    path : str or os.PathLike, optional
        The file the problem is in.
    line : int, optional
        1-based line number inside ``path``.

    Examples
    --------
    >>> str(InputError("width must be > 0", path="labels.csv", line=7))
    'labels.csv:7: width must be > 0'
    """

    def __init__(self, message: str, path: str | os.PathLike | None = None, line: int | None = None):
        self.message = " ".join(str(message).split())
        self.path = None if path is None else os.fspath(path)
        self.line = line
        super().__init__(self.__str__())

    def __str__(self) -> str:
        where = ""
        if self.path is not None:
            where = self.path if self.line is None else f"{self.path}:{self.line}"
            where += ": "
        return where + self.message
