"""Is our standard error connected to the systemd journal?

systemd.exec(5), "Environment variables in spawned processes": ``$JOURNAL_STREAM`` is set when
standard output or standard error is connected to the journal; it holds the device and inode numbers of
that stream, in decimal, separated by a colon. A process should compare them with ``fstat()`` of its
standard error before it switches to the journal's native format: a variable inherited by a child whose
stderr is something else (a terminal started from a service, a redirect) must not count.
"""

from __future__ import annotations

import os
from typing import Mapping


def journal_stream(environ: Mapping[str, str]) -> tuple[int, int] | None:
    """(device, inode) from ``$JOURNAL_STREAM``, or None when it is unset or malformed."""
    dev, sep, ino = environ.get("JOURNAL_STREAM", "").partition(":")
    if not sep:
        return None
    try:
        return int(dev, 10), int(ino, 10)
    except ValueError:
        return None


def stream_is_journal(stream, environ: Mapping[str, str] | None = None) -> bool:
    """True when ``stream`` (a file object or a descriptor) is the one ``$JOURNAL_STREAM`` names."""
    want = journal_stream(os.environ if environ is None else environ)
    if want is None:
        return False
    try:
        fd = stream if isinstance(stream, int) else stream.fileno()
        st = os.fstat(fd)
    except (AttributeError, OSError, ValueError):    # io.UnsupportedOperation is both of the last two
        return False
    return (st.st_dev, st.st_ino) == want
