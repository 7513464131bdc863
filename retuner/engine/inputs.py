"""What the player is doing, as the engine tracks it from the input.

* **Press queues**: each (input channel, key) keeps its presses first in, first
  out, paired with note-offs (or note-ons with velocity 0) by the one rule of
  :mod:`retuner.engine.notes` (a lost note-off costs at most one note); a
  note-off ends its press on the channel and key that press was sent on,
  whatever happened since (pedals, repeated presses, profile switches). A stolen
  press keeps its place, so its own note-off sends nothing; an all-notes-off or
  all-sound-off from the input forgets every press of its domain (the keyboard
  sends no note-offs for what it cleared).
* **Pedals** (sustain, sostenuto), per pedal domain (the output mode says which
  input channels form a domain): :class:`retuner.engine.notes.Pedals`, the same
  rule as the file side's.
* The **wheel** per input channel (a wheel bends only its own channel's notes
  where the output mode can keep them apart).
* The input's **RPN selection** per channel: an input RPN 0 (pitch bend
  sensitivity) sets that channel's wheel range (the cents its full wheel spans;
  ``wheel_range`` from the config until the input sets one) instead of reaching
  the synth; data entry for the other RPNs the engine manages (tuning program
  and bank, MPE configuration) is dropped.
* The **dress** per input channel: its last program, bank and sound-shaping
  controllers (see :mod:`retuner.engine.dress`), kept by the output mode that
  dresses its channels per part.
"""

from __future__ import annotations

from collections import deque
from typing import Any, Callable, Optional

from retuner.midi import encode as E
from retuner.engine.allocator import Note
from retuner.engine.notes import Pedals

#: RPNs whose data entry from the input is the engine's, not the synth's
MANAGED_RPNS = {E.RPN_PITCH_BEND_SENSITIVITY, E.RPN_TUNING_PROGRAM, E.RPN_TUNING_BANK,
                E.RPN_MPE_CONFIGURATION}
DATA_CCS = (E.CC_DATA_ENTRY_MSB, E.CC_DATA_ENTRY_LSB, E.CC_DATA_INCREMENT, E.CC_DATA_DECREMENT)


class InputState:
    """Press queues, pedals, wheel and RPN selection of the input (see the module docstring)."""

    def __init__(self, wheel_range_semitones: float):
        self.presses: dict[tuple[int, int], deque] = {}
        self.pedals = Pedals()
        self.sustain = self.pedals.sustain       # domain -> down (read by the output modes)
        self.sostenuto = self.pedals.sostenuto   # domain -> down
        self.wheel: dict[int, int] = {}          # input channel -> signed bend -8192..8191
        self.wheel_range = wheel_range_semitones * 100.0   # cents a full wheel spans (default)
        self.wheel_ranges: dict[int, float] = {}  # input channel -> cents, as its RPN 0 set it
        self.rpn: dict[int, Any] = {}            # input channel -> (msb, lsb) or "nrpn"
        self.dress: dict[int, dict] = {}         # input channel -> {program / controller: value}

    # ------------------------------------------------------------------ presses
    # (a press is queued and taken by the engine's note-on and note-off handling itself,
    # the hot path; what else happens to the queues is here)
    def sounding_press(self, ch: int, key: int) -> Optional[Note]:
        """The latest press of ``ch``/``key`` that sounds (not waiting in the chord window)."""
        q = self.presses.get((ch, key))
        if not q:
            return None
        for n in reversed(q):
            if n.alive and not n.pending:
                return n
        return None

    def forget(self, n: Note) -> None:
        q = self.presses.get((n.in_ch, n.in_key))
        if q is not None:
            try:
                q.remove(n)
            except ValueError:
                pass
            if not q:
                del self.presses[(n.in_ch, n.in_key)]

    def forget_domain(self, in_domain: Callable[[int], bool]) -> None:
        """Forget every press on the input channels ``in_domain`` accepts."""
        for k in [k for k in self.presses if in_domain(k[0])]:
            del self.presses[k]

    def take_all(self) -> dict:
        """Every press queue (the input is gone); none are kept (the dict is emptied in
        place: the engine holds it)."""
        q = dict(self.presses)
        self.presses.clear()
        return q

    # ------------------------------------------------------------------ wheel
    def range_of(self, ch: int) -> float:
        """The cents input channel ``ch``'s full wheel spans."""
        return self.wheel_ranges.get(ch, self.wheel_range)

    def wheel_cents(self, ch: int) -> float:
        """Where input channel ``ch``'s wheel bends its notes, in cents."""
        return self.wheel.get(ch, 0) / 8192.0 * self.range_of(ch)

    # ------------------------------------------------------------------ RPN
    def rpn_data(self, ch: int, cc: int, value: int) -> bool:
        """Track the input's RPN selection; take data entry for the RPNs the engine
        manages (RPN 0 sets the assumed wheel range). True if taken."""
        if cc == E.CC_RPN_MSB:
            sel = self.rpn.get(ch)
            lsb = sel[1] if isinstance(sel, tuple) else 127
            self.rpn[ch] = (value, lsb)
        elif cc == E.CC_RPN_LSB:
            sel = self.rpn.get(ch)
            msb = sel[0] if isinstance(sel, tuple) else 127
            self.rpn[ch] = (msb, value)
        elif cc in (E.CC_NRPN_MSB, E.CC_NRPN_LSB):
            self.rpn[ch] = "nrpn"
        elif cc in DATA_CCS:
            sel = self.rpn.get(ch)
            if sel in MANAGED_RPNS:
                if sel == E.RPN_PITCH_BEND_SENSITIVITY:
                    semis, cents = divmod(int(round(self.range_of(ch))), 100)
                    if cc == E.CC_DATA_ENTRY_MSB:
                        semis = value
                    elif cc == E.CC_DATA_ENTRY_LSB:
                        cents = min(value, 99)
                    else:
                        return True                  # increment / decrement: not followed
                    self.wheel_ranges[ch] = semis * 100.0 + cents
                return True
        return False


class PassthroughNotes:
    """Notes the player sounds on passthrough channels (drums, by default): the engine
    passes them untouched but keeps count, so panic and a lost input can end them, and a
    layout change that takes their channel into retuning still lets their note-offs
    through (``orphaned``: notes of channels that are no longer passed through)."""

    def __init__(self) -> None:
        self.held: dict[tuple[int, int], int] = {}        # (channel, key) -> presses sounding
        self.orphaned: dict[tuple[int, int], int] = {}    # the same, channel no longer passthrough

    def track(self, msg: Any) -> None:
        """A channel message passed through on a passthrough channel."""
        typ = msg.type
        if typ == "note_on" and msg.velocity:
            k = (msg.channel, msg.note)
            self.held[k] = self.held.get(k, 0) + 1
        elif typ == "note_off" or typ == "note_on":
            _take(self.held, (msg.channel, msg.note))
        elif typ == "control_change" and (msg.control == E.CC_ALL_SOUND_OFF or msg.control == E.CC_ALL_NOTES_OFF
                                          or msg.control in E.CC_MODE_NOTES_OFF):
            for k in [k for k in self.held if k[0] == msg.channel]:
                del self.held[k]

    def take_orphan(self, ch: int, key: int) -> bool:
        """A note-off on a retuned channel: True if it ends a note started while the
        channel was passed through (then it goes to the synth as it is)."""
        return _take(self.orphaned, (ch, key))

    def relayout(self, passthrough: frozenset) -> None:
        """The passthrough channels are now ``passthrough``."""
        both = dict(self.orphaned)
        for k, n in self.held.items():
            both[k] = both.get(k, 0) + n
        self.held.clear()
        self.orphaned.clear()
        for k, n in both.items():
            (self.held if k[0] in passthrough else self.orphaned)[k] = n

    def release(self) -> list:
        """A note-off for every press still sounding; forget them."""
        out = []
        for src in (self.held, self.orphaned):
            for (ch, key), n in src.items():
                out.extend(E.note_off(ch, key, 0) for _ in range(n))
            src.clear()
        return out

    def forget(self) -> None:
        self.held.clear()
        self.orphaned.clear()


def _take(counts: dict, k: tuple[int, int]) -> bool:
    n = counts.get(k)
    if not n:
        return False
    if n == 1:
        del counts[k]
    else:
        counts[k] = n - 1
    return True
