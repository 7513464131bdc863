"""Which notes sound: the one rule for pairing presses and releases and for the pedals.

The engine (its press queues, :mod:`retuner.engine.core`), the file side (:class:`NoteTracker`:
the converter's channel planning, ``retuner fit``, the lookahead planner) all follow this rule,
from the code below and nowhere else:

* **Pairing** (:func:`release`): presses and releases of one key pair first in, first out, per
  channel and key (a key struck twice before its first release sounds twice; the first release
  ends the first press). A lost note-off costs at most one note: a press that outlived a
  release of its key is *stale* (that release may have been its own, taken by an older press
  whose note-off was lost). When the next release of that key comes while a newer press waits
  behind the stale ones, the stale presses end together with the newer press (whose release
  it is), so the queue is in step again from the key's second release after the loss. The
  price: of three or more overlapping presses of one key on one channel (merged keyboards, a
  file's overlapping doubled notes) with a new press between two of their releases, the newer
  press ends early, at the same moment as the stale one.
* **Pedals** (:class:`Pedals`, per *domain*: a channel, a part, or whatever the caller groups
  pedals by): while the sustain pedal (CC64, MIDI 1.0: value >= 64 is down) is down, a
  released note sounds on until the pedal goes up; the sostenuto pedal (CC66, MIDI 1.0) holds
  the notes whose keys were down when it went down (*caught*), until it goes up.
* All sound off (CC120) ends every note of the domain at once; all notes off (CC123) and the
  mode messages (CC124..127) release every key of the domain, and the pedals still hold what
  they hold (MIDI 1.0: All Notes Off acts as a note-off for each note).

A press is any object with the attributes ``stale``, ``down`` and ``sost`` (the engine's
:class:`~retuner.engine.allocator.Note`, or the tracker's own wrapper of a caller's value).
"""

from __future__ import annotations

from collections import deque
from typing import Any, Hashable

from retuner.midi import encode as E

SUSTAIN, SOSTENUTO = E.CC_SUSTAIN, E.CC_SOSTENUTO
ALL_OFF = frozenset((E.CC_ALL_SOUND_OFF, E.CC_ALL_NOTES_OFF) + E.CC_MODE_NOTES_OFF)


def release(q: deque) -> list:
    """A release of the key whose presses wait in ``q`` (oldest first, not empty): takes out
    and returns the presses it ends, oldest first; the last is the press whose release it is,
    the ones before it stale presses whose own releases were lost."""
    first = q.popleft()
    if not q:
        return [first]
    if first.stale and not q[-1].stale:
        ended = [first]
        while q[0].stale:
            ended.append(q.popleft())
        ended.append(q.popleft())
    else:
        ended = [first]
    for p in q:
        p.stale = True
    return ended


class Pedals:
    """Sustain and sostenuto per domain: which is down, and whether a released press sounds on."""

    __slots__ = ("sustain", "sostenuto")

    def __init__(self) -> None:
        self.sustain: dict[Hashable, bool] = {}       # domain -> down
        self.sostenuto: dict[Hashable, bool] = {}     # domain -> down

    def holds(self, dom: Hashable, press: Any) -> Any:
        """Does a pedal of ``dom`` keep the released ``press`` sounding? (true or false)"""
        return self.sustain.get(dom) or (press.sost and self.sostenuto.get(dom))

    def let_go(self, dom: Hashable, released: list) -> list:
        """Of ``released`` (presses of ``dom`` whose keys are up, held so far), those no pedal
        holds any more: :meth:`holds` for many at once, with no call per press."""
        if self.sustain.get(dom):
            return []
        if self.sostenuto.get(dom):
            return [p for p in released if not p.sost]
        return released

    def sustain_to(self, dom: Hashable, value: int) -> bool:
        """The sustain pedal of ``dom`` moved to ``value``: True if it went up (the notes it held
        and nothing else holds stop)."""
        was = self.sustain.get(dom, False)
        down = self.sustain[dom] = value >= E.PEDAL_ON
        return was and not down

    def sostenuto_to(self, dom: Hashable, value: int) -> int:
        """The sostenuto pedal of ``dom`` moved to ``value``: 1 if it went down (the caller marks
        the presses of ``dom`` whose keys are down as caught, ``sost``), -1 if it went up (the
        notes it held and nothing else holds stop; then no press stays caught), else 0."""
        was = self.sostenuto.get(dom, False)
        down = self.sostenuto[dom] = value >= E.PEDAL_ON
        if down and not was:
            return 1
        return -1 if was and not down else 0

    def up(self, dom: Hashable) -> None:
        """Both pedals of ``dom`` up at once (reset all controllers)."""
        self.sustain[dom] = False
        self.sostenuto[dom] = False


class _Press:
    __slots__ = ("value", "stale", "down", "sost")

    def __init__(self, value: Any):
        self.value = value
        self.stale = False
        self.down = True
        self.sost = False


class NoteTracker:
    """Sounding notes per domain, for whoever reads a whole stream (see the module docstring).

    Each note-on stores a value of the caller's (a note object, a bend, a start time); every
    call returns the values that stop sounding with it. Keys pair per domain and key (the
    domain is the channel when pedals go by channel). With ``sostenuto=False`` CC66 holds
    nothing."""

    __slots__ = ("_keys", "_held", "_count", "pedals", "sostenuto")

    def __init__(self, *, sostenuto: bool = False):
        self.sostenuto = sostenuto
        self.pedals = Pedals()
        self._keys: dict[tuple[Hashable, int], deque] = {}    # (domain, key) -> presses, oldest first
        self._held: dict[Hashable, list] = {}                 # domain -> released, held by a pedal
        self._count: dict[Hashable, int] = {}

    def sounding(self, dom: Hashable) -> int:
        """How many notes of ``dom`` sound (keys down and notes held by a pedal)."""
        return self._count.get(dom, 0)

    def note_on(self, dom: Hashable, key: int, value: Any) -> None:
        q = self._keys.get((dom, key))
        if q is None:
            q = self._keys[(dom, key)] = deque()
        q.append(_Press(value))
        self._count[dom] = self._count.get(dom, 0) + 1

    def note_off(self, dom: Hashable, key: int) -> list[tuple[Any, bool]]:
        """A release of ``key``: each press it ends (oldest first, see :func:`release`; none
        if no press of the key is down) with whether it stops sounding now (False when a
        pedal holds it)."""
        q = self._keys.get((dom, key))
        if not q:
            return []
        ended = release(q)
        if not q:
            del self._keys[(dom, key)]
        out = []
        for p in ended:
            p.down = False
            if self.pedals.holds(dom, p):
                self._held.setdefault(dom, []).append(p)
                out.append((p.value, False))
            else:
                self._count[dom] -= 1
                out.append((p.value, True))
        return out

    def control(self, dom: Hashable, control: int, value: int) -> list:
        """A controller on ``dom``: the values that stop sounding with it."""
        pedals = self.pedals
        if control == SUSTAIN:
            return self._let_go(dom) if pedals.sustain_to(dom, value) else []
        if control == SOSTENUTO and self.sostenuto:
            step = pedals.sostenuto_to(dom, value)
            if step > 0:
                for (d, _), q in self._keys.items():
                    if d == dom:
                        for p in q:
                            p.sost = True
            elif step < 0:
                ended = self._let_go(dom)
                for (d, _), q in self._keys.items():
                    if d == dom:
                        for p in q:
                            p.sost = False
                for p in self._held.get(dom, ()):
                    p.sost = False
                return ended
            return []
        if control == E.CC_ALL_SOUND_OFF:
            return self.all_off(dom)
        if control in ALL_OFF:
            return self.release_all(dom)
        return []

    def _let_go(self, dom: Hashable) -> list:
        """Pedal-held notes no pedal holds any more."""
        held = self._held.get(dom)
        if not held:
            return []
        ended = self.pedals.let_go(dom, held)
        if ended:
            if ended is held:
                del self._held[dom]
            else:
                gone = {id(p) for p in ended}
                self._held[dom] = [p for p in held if id(p) not in gone]
            self._count[dom] -= len(ended)
        return [p.value for p in ended]

    def release_all(self, dom: Hashable) -> list:
        """Every key of ``dom`` released at once (all notes off): the values that stop now,
        oldest press first per key; the pedals still hold what they hold."""
        ended = []
        for k in [k for k in self._keys if k[0] == dom]:
            for p in self._keys.pop(k):
                p.down = False
                if self.pedals.holds(dom, p):
                    self._held.setdefault(dom, []).append(p)
                else:
                    ended.append(p.value)
        self._count[dom] = self._count.get(dom, 0) - len(ended)
        return ended

    def all_off(self, dom: Hashable) -> list:
        """Every note of ``dom`` stops (keys down and pedal-held: all sound off), pedal-held
        first, then oldest press first per key."""
        ended = [p.value for p in self._held.pop(dom, [])]
        for k in [k for k in self._keys if k[0] == dom]:
            ended.extend(p.value for p in self._keys.pop(k))
        self._count[dom] = 0
        return ended

    def remaining(self) -> list:
        """Every value still sounding (any domain)."""
        out = [p.value for q in self._keys.values() for p in q]
        for held in self._held.values():
            out.extend(p.value for p in held)
        return out
