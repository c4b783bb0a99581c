"""The one error type for bad input, and its friends.

Library code raises :class:`InputError` whenever something the user gave us
(a manifest, a tile, a config, a build folder) is wrong. The CLI turns it into
one line and a non-zero exit status; a traceback is shown only with ``--debug``.
"""
from __future__ import annotations

from pathlib import Path


class InputError(ValueError):
    """Bad input, with the place it was found and the reason.

    Parameters
    ----------
    reason : str
        What is wrong, in words a user can act on.
    file : str or Path, optional
        The file the problem was found in.
    row : int, optional
        1-based line number in that file (the header is line 1).
    section : int, optional
        The section the problem concerns.
    """

    def __init__(self, reason: str, *, file: str | Path | None = None,
                 row: int | None = None, section: int | None = None):
        self.reason = reason
        self.file = None if file is None else str(file)
        self.row = row
        self.section = section
        super().__init__(self.one_line())

    def one_line(self) -> str:
        """Return ``file:row: section N: reason`` with the parts that are known."""
        where = []
        if self.file is not None:
            where.append(self.file if self.row is None else f"{self.file}:{self.row}")
        if self.section is not None:
            where.append(f"section {self.section}")
        return ": ".join(where + [self.reason])


class BuildFolderError(InputError):
    """The build folder is in a state that forbids the requested action."""
