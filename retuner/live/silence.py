"""Silencing a synth whatever we believe sounds on it, and the notes retuner passes through.

Panic (the control socket's ``panic``, SIGTERM/SIGINT, start-up, an output that comes back)
cannot rely on what the engine believes: after a crash and restart, or an outage, notes and
pedals may sound that nobody remembers. So on top of the note-offs for what is tracked, every
one of the 16 channels gets its pedals up (CC64 and CC66 = 0; notes held by a pedal ignore All
Notes Off until it goes up) and then All Notes Off (CC123); All Sound Off (CC120, which also cuts
release tails and reverb) only where the user allows it (config ``panic_all_sound_off``).
Controller numbers: MIDI 1.0 Detailed Specification (retuner.midi.encode).

The engine passes messages on passthrough channels unchanged and keeps no account of them,
so :class:`PassthroughNotes` does, from what was actually sent: panic, SIGTERM, a lost input
and a reload that changes the passthrough channels release them.
"""

from __future__ import annotations

from collections import Counter
from typing import Iterable, Optional

import mido

from retuner.midi.encode import (CC_ALL_NOTES_OFF, CC_ALL_SOUND_OFF, CC_SOSTENUTO, CC_SUSTAIN,
                                 control_change, note_off)

CHANNELS = range(16)


def pedals_up(channels: Iterable[int] = CHANNELS) -> list[mido.Message]:
    out = []
    for c in channels:
        out.append(control_change(c, CC_SUSTAIN, 0))
        out.append(control_change(c, CC_SOSTENUTO, 0))
    return out


def all_notes_off(channels: Iterable[int] = CHANNELS, sound_off: bool = False,
                  already: Iterable[mido.Message] = ()) -> list[mido.Message]:
    """All Notes Off (and All Sound Off when ``sound_off``) on ``channels``, except where
    ``already`` holds the same message."""
    done = {(m.channel, m.control) for m in already
            if m.type == "control_change" and m.control in (CC_ALL_NOTES_OFF, CC_ALL_SOUND_OFF)}
    out = []
    for c in channels:
        if sound_off and (c, CC_ALL_SOUND_OFF) not in done:
            out.append(control_change(c, CC_ALL_SOUND_OFF, 0))
        if (c, CC_ALL_NOTES_OFF) not in done:
            out.append(control_change(c, CC_ALL_NOTES_OFF, 0))
    return out


class PassthroughNotes:
    """Notes and pedals sounding on passthrough channels, counted from what was sent."""

    def __init__(self):
        self.notes: Counter = Counter()           # (channel, key) -> presses sounding
        self.pedals: set[tuple[int, int]] = set()  # (channel, controller) held down

    def __len__(self) -> int:
        return sum(self.notes.values())

    def sent(self, msg: mido.Message) -> None:
        typ = msg.type
        if typ == "note_on" and msg.velocity:
            self.notes[(msg.channel, msg.note)] += 1
        elif typ in ("note_off", "note_on"):
            k = (msg.channel, msg.note)
            if self.notes[k] > 1:
                self.notes[k] -= 1
            else:
                self.notes.pop(k, None)
        elif typ == "control_change":
            if msg.control in (CC_SUSTAIN, CC_SOSTENUTO):
                if msg.value >= 64:
                    self.pedals.add((msg.channel, msg.control))
                else:
                    self.pedals.discard((msg.channel, msg.control))
            elif msg.control in (CC_ALL_NOTES_OFF, CC_ALL_SOUND_OFF):
                for k in [k for k in self.notes if k[0] == msg.channel]:
                    del self.notes[k]

    def release(self, channels: Optional[Iterable[int]] = None) -> list[mido.Message]:
        """Note-offs for the notes sounding (on ``channels``, default all), then their pedals up;
        forgets them."""
        chans = None if channels is None else set(channels)
        out = []
        for (c, key), n in sorted(self.notes.items()):
            if chans is None or c in chans:
                out += [note_off(c, key, 0)] * n
        for (c, ctl) in sorted(self.pedals):
            if chans is None or c in chans:
                out.append(control_change(c, ctl, 0))
        self.forget(chans)
        return out

    def forget(self, channels: Optional[set] = None) -> None:
        if channels is None:
            self.notes.clear()
            self.pedals.clear()
            return
        for k in [k for k in self.notes if k[0] in channels]:
            del self.notes[k]
        self.pedals = {p for p in self.pedals if p[0] not in channels}
