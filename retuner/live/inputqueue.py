"""The daemon's MIDI input queue: bounded, with an overload policy that never leaves a note stuck.

MIDI waits here, apart from signals and control commands (which the daemon's own queue carries
and the main loop serves first), so a flood of input can delay neither a panic nor SIGTERM, and
memory stays bounded however fast the input comes.

When the queue holds ``capacity`` messages:

* a *release* (note-off, a note-on with velocity 0, a pedal going up: CC64/66/67 below 64, All
  Sound Off, Reset All Controllers, All Notes Off: CC120/121/123, the wheel back at centre) is
  always kept: room is made by dropping the oldest waiting note-on (its note-off, waiting or
  still to come, is dropped with it: nothing sounded), else the oldest other message; only past
  twice the capacity, with nothing else left to drop, would a release be lost (counted apart);
* a note-on is dropped, and so is its note-off when it comes;
* anything else (controllers, wheel, pressure) is dropped.

Controller numbers and the velocity-0 rule: MIDI 1.0 Detailed Specification.
"""

from __future__ import annotations

import threading
from collections import Counter, deque
import mido

_PEDALS = (64, 66, 67)                 # sustain, sostenuto, soft
_RELEASING_CC = (120, 121, 123)        # all sound off, reset all controllers, all notes off


def is_release(msg: mido.Message) -> bool:
    typ = msg.type
    if typ == "note_off":
        return True
    if typ == "note_on":
        return msg.velocity == 0
    if typ == "control_change":
        c = msg.control
        return (c in _PEDALS and msg.value < 64) or c in _RELEASING_CC
    if typ == "pitchwheel":
        return msg.pitch == 0
    return False


def _ends_note(msg: mido.Message) -> bool:
    return msg.type == "note_off" or (msg.type == "note_on" and msg.velocity == 0)


class InputQueue:
    """(time, message) pairs from the backend's thread to the engine thread. Thread-safe."""

    def __init__(self, capacity: int = 2048):
        self.capacity = capacity
        self.limit = 2 * capacity              # releases may use the room up to here
        self._q: deque = deque()
        self._lock = threading.Lock()
        self._owed: Counter = Counter()        # (channel, key): note-offs of dropped note-ons
        self.dropped: Counter = Counter()      # "note_on", "other", "release"

    def __len__(self) -> int:
        return len(self._q)

    def put(self, t: float, msg: mido.Message) -> bool:
        """Queue ``msg``; True when the queue was empty (the consumer must be woken)."""
        with self._lock:
            q = self._q
            was_empty = not q
            if is_release(msg):
                if _ends_note(msg):
                    k = (msg.channel, msg.note)
                    if self._owed[k]:
                        # its note-on was dropped: nothing sounds, nothing to end
                        self._owed[k] -= 1
                        if not self._owed[k]:
                            del self._owed[k]
                        return False
                if len(q) >= self.capacity and not self._make_room() and len(q) >= self.limit:
                    self.dropped["release"] += 1
                    return False
                q.append((t, msg))
                return was_empty
            if len(q) >= self.capacity:
                if msg.type == "note_on":
                    self._owed[(msg.channel, msg.note)] += 1
                    self.dropped["note_on"] += 1
                else:
                    self.dropped["other"] += 1
                return False
            q.append((t, msg))
            return was_empty

    def _make_room(self) -> bool:
        """Drop the oldest waiting note-on (with its waiting note-off), else the oldest message
        that is not a release. False when only releases wait."""
        q = self._q
        other = None
        for i, (_, m) in enumerate(q):
            if m.type == "note_on" and m.velocity:
                del q[i]
                self.dropped["note_on"] += 1
                k = (m.channel, m.note)
                for j in range(i, len(q)):
                    n = q[j][1]
                    if _ends_note(n) and (n.channel, n.note) == k:
                        del q[j]
                        break
                else:
                    self._owed[k] += 1
                return True
            if other is None and not is_release(m):
                other = i
        if other is not None:
            del q[other]
            self.dropped["other"] += 1
            return True
        return False

    def take(self, n: int) -> list:
        """Up to ``n`` waiting (time, message) pairs, oldest first."""
        with self._lock:
            q = self._q
            k = min(n, len(q))
            return [q.popleft() for _ in range(k)]

    def clear(self) -> int:
        """Discard what waits (a panic); returns how many. Note-ons dropped before stay owed."""
        with self._lock:
            n = len(self._q)
            self._q.clear()
            return n

    def total_dropped(self) -> int:
        return sum(self.dropped.values())

    def counts(self) -> dict:
        with self._lock:
            return {k: self.dropped.get(k, 0) for k in ("note_on", "other", "release")}

