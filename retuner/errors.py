"""Errors as values the user can act on.

Every error a user can cause (a bad profile, config or MIDI file, a bad option)
is a :class:`RetunerError`. Its ``str()`` is one line naming the file, the place
and the field, so the command line can print it and exit with status 2.
"""

from __future__ import annotations


class RetunerError(Exception):
    """A user-facing error: one line, naming file, place and field."""

    def __init__(self, message: str, *, file: str | None = None,
                 line: int | None = None, field: str | None = None):
        super().__init__(message)
        self.message = message
        self.file = file
        self.line = line
        self.field = field

    def __str__(self) -> str:
        where = ""
        if self.file:
            where = str(self.file)
            if self.line is not None:
                where += f":{self.line}"
            where += ": "
        field = f"{self.field}: " if self.field else ""
        return f"{where}{field}{self.message}"
