"""Which notes sound: note-ons and note-offs paired per key, held on by the pedals.

A pure, sans-I/O tracker, kept per *domain* (a channel, a part, or whatever the caller
groups notes by). Each note-on stores a value of the caller's (a note object, a bend, a
start time); the tracker says when that value stops sounding:

* presses and releases of one key in one domain pair first in, first out (a key struck
  twice before its first release sounds twice; the first release ends the first press);
* while the sustain pedal (CC64, MIDI 1.0: value >= 64 is down) is down, a released note
  sounds on until the pedal goes up;
* with ``sostenuto=True`` the sostenuto pedal (CC66, MIDI 1.0) holds the notes whose keys
  were down when it went down, until it goes up;
* all notes off / all sound off and the mode messages (CC120, CC123..127: MIDI 1.0 channel
  mode messages) end every note of the domain at once.

Every call returns the values that stop sounding with it.
"""

from __future__ import annotations

from typing import Any, Hashable

SUSTAIN, SOSTENUTO = 64, 66
ALL_OFF = frozenset((120, 123, 124, 125, 126, 127))


class NoteTracker:
    """Sounding notes per domain (see the module docstring)."""

    __slots__ = ("_keys", "_held", "_sus", "_sost", "_caught", "_count", "sostenuto")

    def __init__(self, *, sostenuto: bool = False):
        self.sostenuto = sostenuto
        self._keys: dict[tuple[Hashable, int], list] = {}     # (domain, key) -> values, oldest first
        self._held: dict[Hashable, list] = {}                 # domain -> released, held by a pedal
        self._sus: dict[Hashable, bool] = {}
        self._sost: dict[Hashable, bool] = {}
        self._caught: dict[Hashable, set] = {}                # domain -> id(value) caught by sostenuto
        self._count: dict[Hashable, int] = {}

    def sounding(self, dom: Hashable) -> int:
        """How many notes of ``dom`` sound (keys down and notes held by a pedal)."""
        return self._count.get(dom, 0)

    def note_on(self, dom: Hashable, key: int, value: Any) -> None:
        self._keys.setdefault((dom, key), []).append(value)
        self._count[dom] = self._count.get(dom, 0) + 1

    def note_off(self, dom: Hashable, key: int) -> tuple[Any, bool]:
        """Release the oldest press of ``key``: (its value or None if none is down, whether
        it stops sounding now; False when a pedal holds it)."""
        q = self._keys.get((dom, key))
        if not q:
            return None, False
        v = q.pop(0)
        if not q:
            del self._keys[(dom, key)]
        if self._sus.get(dom) or (self.sostenuto and id(v) in self._caught.get(dom, ())):
            self._held.setdefault(dom, []).append(v)
            return v, False
        self._count[dom] -= 1
        return v, True

    def control(self, dom: Hashable, control: int, value: int) -> list:
        """A controller on ``dom``: the values that stop sounding with it."""
        if control == SUSTAIN:
            down = value >= 64
            was = self._sus.get(dom, False)
            self._sus[dom] = down
            return self._let_go(dom) if was and not down else []
        if control == SOSTENUTO and self.sostenuto:
            down = value >= 64
            was = self._sost.get(dom, False)
            self._sost[dom] = down
            if down and not was:
                self._caught[dom] = {id(v) for (d, _), q in self._keys.items() if d == dom for v in q}
                return []
            if was and not down:
                self._caught.pop(dom, None)
                return self._let_go(dom)
            return []
        if control in ALL_OFF:
            return self.all_off(dom)
        return []

    def _let_go(self, dom: Hashable) -> list:
        """Pedal-held notes no pedal holds any more."""
        held = self._held.get(dom)
        if not held:
            return []
        if self._sus.get(dom):
            return []
        caught = self._caught.get(dom, ()) if self.sostenuto and self._sost.get(dom) else ()
        ended = [v for v in held if id(v) not in caught]
        if ended:
            self._held[dom] = [v for v in held if id(v) in caught]
            self._count[dom] -= len(ended)
        return ended

    def all_off(self, dom: Hashable) -> list:
        """Every note of ``dom`` stops (keys down and pedal-held), oldest press first per key."""
        ended = list(self._held.pop(dom, []))
        for k in [k for k in self._keys if k[0] == dom]:
            ended.extend(self._keys.pop(k))
        self._caught.pop(dom, None)
        self._count[dom] = 0
        return ended

    def remaining(self) -> list:
        """Every value still sounding (any domain)."""
        out = [v for q in self._keys.values() for v in q]
        for held in self._held.values():
            out.extend(held)
        return out
