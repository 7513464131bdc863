"""Errors as values the user can act on.

Every error a user can cause (a bad profile, config or MIDI file, a bad option)
is a :class:`RetunerError`. Its ``str()`` is one line naming the file, the place
and the field, so the command line can print it and exit with status 2.

Something outside retuner that is not there (yet) -- the MIDI system, a running
daemon -- is :class:`Unavailable`: the same one line, exit status 1, which a
service manager may retry (the unit's ``Restart=on-failure``) and which no
command uses for a mistake. Every command exits with the same status for the
same error because :func:`retuner.cli.main` takes it from here.
"""

from __future__ import annotations


class RetunerError(Exception):
    """A user-facing error: one line, naming file, place and field."""

    exit_status = 2

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


class Unavailable(RetunerError):
    """Something retuner needs is not there (yet): the MIDI system, the daemon. Not a mistake."""

    exit_status = 1
