"""The one drive loop: feed timed events to an engine and call its timers on time.

The engine is sans-I/O: it never reads a clock, so whoever drives it must call
``engine.tick(d)`` at each deadline ``d = engine.next_deadline()`` that comes before the next
input event, and once more after the last event for timers still open (a chord window, a
release). :class:`Drive` does exactly that for one engine; :func:`play` drives a whole
performance and returns the output stream with the time each message left.
"""

from __future__ import annotations

from typing import Any, Iterable, Iterator, Optional

#: timers run after the last event at most this many times (an engine whose deadline keeps
#: coming back would otherwise keep the loop alive)
MAX_TRAILING_TIMERS = 10000


class Drive:
    """Drives one engine (anything with start/feed/tick/next_deadline)."""

    __slots__ = ("engine",)

    def __init__(self, engine: Any):
        self.engine = engine

    def start(self, t: float = 0.0) -> list:
        return self.engine.start(t)

    def due(self, t: float) -> Iterator[tuple[float, list]]:
        """(deadline, output) for every timer due at or before ``t``, in time order. A deadline
        that does not move on after its tick ends the round (it is tried again later)."""
        e = self.engine
        d = e.next_deadline()
        while d is not None and d <= t:
            yield d, e.tick(d)
            d2 = e.next_deadline()
            if d2 is not None and d2 <= d:
                return
            d = d2

    def feed(self, t: float, msg: Any) -> Iterator[tuple[float, list]]:
        """The timers due before ``t``, then the answer to ``msg`` at ``t``."""
        yield from self.due(t)
        yield t, self.engine.feed(t, msg)

    def finish(self) -> Iterator[tuple[float, list]]:
        """Timers still open after the last event, each at its deadline."""
        e = self.engine
        d = e.next_deadline()
        n = 0
        while d is not None and n < MAX_TRAILING_TIMERS:
            yield d, e.tick(d)
            n += 1
            d2 = e.next_deadline()
            if d2 is not None and d2 <= d:
                return
            d = d2


def play(engine: Any, events: Iterable[tuple[float, Any]], *, start: Optional[float] = 0.0) -> list:
    """Drive ``engine`` through ``events`` [(t, message)] in time order; return its output
    [(t, message)]: set-up at ``start`` (None: no set-up), answers at their event's time,
    timer output at the timer's deadline."""
    drive = Drive(engine)
    out: list = []
    if start is not None:
        out += [(start, m) for m in drive.start(start)]
    for t, msg in events:
        for when, res in drive.feed(t, msg):
            out += [(when, m) for m in res]
    for when, res in drive.finish():
        out += [(when, m) for m in res]
    return out
