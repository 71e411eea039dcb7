"""recon's own error for bad input: one line, naming where and what was expected."""

from __future__ import annotations

from pathlib import Path

__all__ = ["InputError"]


class InputError(ValueError):
    """Bad input: a mission file, a log or an orbit file that recon cannot use.

    The message is one line: ``FILE[:LINE]: [key 'KEY': ]expected ..., got ...``. The CLI prints it
    and exits with status 2.

    Parameters
    ----------
    message : str
        What was expected and what was found.
    file : str or Path, optional
        The file that holds the problem.
    line : int, optional
        1-based line number in that file (the header counts as line 1 in a CSV).
    key : str, optional
        Dotted mission-file key (``magnetometer.unit``) or CSV column name.
    """

    def __init__(self, message: str, file: str | Path | None = None, line: int | None = None,
                 key: str | None = None):
        # always one line; runs of spaces are kept (a TLE's columns must stay aligned in the message)
        self.message = " ".join(part.strip() for part in str(message).splitlines() if part.strip())
        self.file = None if file is None else str(file)
        self.line = line
        self.key = key
        super().__init__(self._format())

    def _format(self) -> str:
        where = ""
        if self.file is not None:
            where = self.file if self.line is None else f"{self.file}:{self.line}"
            where += ": "
        elif self.line is not None:
            where = f"line {self.line}: "
        what = f"key '{self.key}': " if self.key else ""
        return f"{where}{what}{self.message}"
