"""The chord window of adaptive mode: notes gathered to be solved together, and
the note-offs and pedal changes delayed with them.

Note-ons are gathered for the window's length (seconds) from the first note-on of a group,
then solved together. A note-off for a note still waiting in the window cancels
it: nothing is sent.

Note-offs and pedal changes (sustain, sostenuto) of the notes that sound are
delayed by the same window: the new chord is delayed by up to the window, so the
old one ends that much later too. Legato stays legato (no moment where a held
common tone sounds alone between two chords that were played one into the
other), pedalling keeps its order relative to the keys, and each note keeps its
played length. Delayed events are applied in the order they arrived, each at its
time plus the window; when a window closes at the same moment, they come first.
"""

from __future__ import annotations

from collections import deque
from typing import Any, Optional

import mido

from retuner.engine.allocator import Note


class ChordWindow:
    """Pending notes, delayed events and the window's deadline."""

    def __init__(self) -> None:
        self.pending: list[Note] = []
        # (due, input channel, note or None for a pedal change, message)
        self.deferred: deque[tuple[float, int, Any, mido.Message]] = deque()
        self.deadline: Optional[float] = None
        self.applying = False     # a delayed pedal change is being applied now

    def gather(self, note: Note, t: float, window: float) -> None:
        note.pending = True
        self.pending.append(note)
        if self.deadline is None:
            self.deadline = t + window

    def cancel(self, note: Note) -> None:
        """``note`` ended while waiting: it will not sound."""
        note.pending = False
        note.alive = False
        self.pending.remove(note)
        if not self.pending:
            self.deadline = None

    def close(self) -> list[Note]:
        """The window closes: its notes that are still wanted, no longer pending."""
        pend = [n for n in self.pending if n.alive]
        self.pending = []
        self.deadline = None
        for n in pend:
            n.pending = False
        return pend

    def drop_pending(self) -> None:
        """Forget the waiting notes (they never sounded)."""
        for n in self.pending:
            n.alive = False
            n.pending = False
        self.pending = []
        self.deadline = None

    def delay(self, due: float, ch: int, note: Optional[Note], msg: mido.Message) -> None:
        self.deferred.append((due, ch, note, msg))
