"""A toy output mode, to show that adding a mode is one module plus one table entry.

``nearest``: each note sounds on its own input channel, on the 12-EDO key nearest
to its pitch, without any bend or set-up (a synth that cannot be retuned at all
gets the best a plain keyboard can do). Pedals, controllers, the wheel, pressure
and program changes pass as they are. It is a test fixture, not a mode for users.
"""

from __future__ import annotations

from retuner.engine.allocator import NoteTable
from retuner.engine.outputs.base import OutputMode
from retuner.midi import encode as E


class NearestKeyMode(OutputMode):
    name = "nearest"
    summary = "the nearest 12-EDO key, no bend (a toy)"
    per_note_bend = False
    keeps_input_channels = True
    takes_input_rpn = False
    reconfigures_lightly = False

    @classmethod
    def part_channels(cls, config):
        return list(range(16))

    def __init__(self, config, inputs, stats):
        super().__init__(config, inputs, stats)
        self.table = NoteTable(range(16))
        self.passthrough = frozenset(config.passthrough)

    def place(self, cents, key):
        return min(127, max(0, round(cents / 100.0))), E.BEND_CENTRE

    def setup(self, t, tuning):
        return []

    def zone(self, dom, msg):
        return [msg]

    def channel_mode(self, dom, msg):
        return [msg]

    def all_channels(self):
        return [c for c in range(16) if c not in self.passthrough]

    def sound(self, t, note, out):
        note.out_ch = note.in_ch
        for old in list(self.table.notes[note.in_ch]):
            if old.down and old.out_key == note.out_key:   # one key held once per channel
                out.append(E.note_off(old.out_ch, old.out_key, 0))
                old.alive = False
                self.table.remove(old, t)
        self.table.add(note.out_ch, note, t)
        out.append(E.note_on(note.out_ch, note.out_key, note.velocity))
        self.stats["note_ons_out"] += 1

    def sound_solved(self, t, held, held_cents, new, new_cents, out):
        for n, c in zip(new, new_cents):        # held notes cannot move without a bend
            n.cents = float(c)
            n.out_key, n.bend = self.place(n.cents, n.in_key)
            self.sound(t, n, out)

    def note_off(self, note, msg):
        return E.note_off(note.out_ch, note.out_key, getattr(msg, "velocity", 0))

    def poly_pressure(self, msg, note):
        if note is None:
            return []
        return [E.msg("polytouch", channel=note.out_ch, note=note.out_key, value=msg.value)]

    def wheel(self, t, dom, msg, out):
        out.append(msg)

    def sounding_cents(self, note):
        return 100.0 * note.out_key
