"""The ``mts`` output mode: the MIDI Tuning Standard tunes the synth's key table.

Notes stay on their input channels (a key struck again while still held on its
channel is ended first, so each note-off stops exactly one note); each input
channel is a pedal and controller domain of its own, and controllers, the
wheel, pressure, program changes and channel mode messages pass as they are.
The key table is tuned with single note tuning changes (see
:mod:`retuner.midi.mts`): all 128 keys at start, then, before any note-on whose
key is not tuned to its target (after a profile switch while the key sounded,
or in adaptive mode), one message for all the keys of that chord. At start
every non-passthrough channel selects the tuning with RPN 4 (tuning bank select;
bank 0 when no bank is set) and RPN 3 (tuning program change). Any change of
settings releases everything and sets up again.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Optional, Sequence

import mido

from retuner.midi import encode as E
from retuner.midi import mts as tuning_messages
from retuner.engine.allocator import Note, NoteTable
from retuner.engine.outputs.base import OutputMode, effective_range


@dataclass(frozen=True)
class MTSSettings:
    device: int
    program: int
    bank: Optional[int]          # None: single note change without bank
    realtime: bool
    passthrough: frozenset
    bend_range: float            # semitones: what the engine reports as the bend range
    whole_semitone_range: bool

    @classmethod
    def from_config(cls, cfg: Any) -> "MTSSettings":
        return cls(device=cfg.mts_device, program=cfg.mts_program, bank=cfg.mts_bank,
                   realtime=cfg.mts_realtime, passthrough=frozenset(cfg.passthrough),
                   bend_range=cfg.bend_range, whole_semitone_range=cfg.whole_semitone_range)


class MTSMode(OutputMode):
    name = "mts"
    summary = "MIDI Tuning Standard (notes stay on their channels)"
    per_note_bend = False
    keeps_input_channels = True
    takes_input_rpn = False
    reconfigures_lightly = False

    @classmethod
    def part_channels(cls, config: Any) -> list[int]:
        return list(range(16))

    def __init__(self, config: Any, inputs: Any, stats: dict):
        super().__init__(config, inputs, stats)
        self.settings = s = MTSSettings.from_config(config)
        self.range_cents = effective_range(s.bend_range, s.whole_semitone_range)
        self.table = NoteTable(range(16))      # the notes sounding on each input channel
        self.sent: list[Optional[tuple[int, int, int]]] = [None] * 128   # each key's frequency data

    def place(self, cents: float, key: int) -> tuple[int, int]:
        return key, E.BEND_CENTRE

    def sounding_cents(self, note: Note) -> float:
        enc = self.sent[note.in_key]
        return tuning_messages.decode_frequency(enc) if enc is not None else note.cents

    def changes(self, changes: Sequence[tuple[int, float]]) -> list[mido.Message]:
        """Single note tuning changes for the keys whose frequency data changes."""
        todo = []
        for k, c in changes:
            enc = tuning_messages.encode_frequency(c)
            if self.sent[k] != enc:
                self.sent[k] = enc
                todo.append((k, c))
        if not todo:
            return []
        s = self.settings
        return tuning_messages.single_note_tuning_change(todo, device=s.device, program=s.program,
                                                         bank=s.bank, realtime=s.realtime)

    def setup(self, t: float, tuning: Any) -> list[mido.Message]:
        s = self.settings
        out: list[mido.Message] = []
        for c in range(16):
            if c in s.passthrough:
                continue
            out += E.rpn(c, E.RPN_TUNING_BANK, s.bank or 0)
            out += E.rpn(c, E.RPN_TUNING_PROGRAM, s.program)
        self.sent = [None] * 128
        cents = tuning.cents
        out += self.changes([(k, cents[k]) for k in range(128) if cents[k] is not None])
        return out

    def retuned(self, tuning: Any, sounding: Sequence[Note]) -> list[mido.Message]:
        busy = {n.in_key for n in sounding}
        return self.changes([(k, tuning.cents[k]) for k in range(128)
                             if tuning.cents[k] is not None and k not in busy])

    # ------------------------------------------------------------------ notes
    def strike(self, t: float, notes: Sequence[Note], moved: Sequence[tuple[int, float]], out: list) -> None:
        """Tune the keys of ``moved`` and of ``notes`` in one message, then strike ``notes``."""
        out += self.changes(list(moved) + [(n.in_key, n.cents) for n in notes])
        table = self.table
        for n in notes:
            n.out_ch = n.in_ch
            n.out_key = n.in_key
            # a key pressed again while still down on this channel (merged inputs): end the
            # first press before striking again, so each note-off stops exactly one note;
            # the first press stays in its press queue, dead, to take the first note-off
            for old in list(table.notes[n.in_ch]):
                if old.down and old.out_key == n.out_key:
                    out.append(E.note_off(n.in_ch, n.out_key, 0))
                    old.alive = False
                    table.remove(old, t)
            table.add(n.in_ch, n, t)
            out.append(E.note_on(n.in_ch, n.in_key, n.velocity))
            self.stats["note_ons_out"] += 1

    def sound(self, t: float, note: Note, out: list) -> None:
        self.strike(t, [note], [], out)

    def sound_solved(self, t: float, held: Sequence[Note], held_cents: Sequence[float],
                     new: Sequence[Note], new_cents: Sequence[float], out: list) -> None:
        moved = []
        for n, c in zip(held, held_cents):
            if c != n.cents:
                n.cents = float(c)
                moved.append((n.in_key, n.cents))
        for n, c in zip(new, new_cents):
            n.cents = float(c)
        self.strike(t, new, moved, out)

    def note_off(self, note: Note, msg: mido.Message) -> mido.Message:
        return msg

    # ------------------------------------------------------------------ controllers
    def zone(self, dom: int, msg: mido.Message) -> list[mido.Message]:
        return [msg] if msg.channel == dom else [E.with_channel(msg, dom)]

    def channel_mode(self, dom: int, msg: mido.Message) -> list[mido.Message]:
        return [msg]

    def all_channels(self) -> list[int]:
        return [c for c in range(16) if c not in self.settings.passthrough]

    def poly_pressure(self, msg: mido.Message, note) -> list[mido.Message]:
        return [msg]

    def wheel(self, t: float, dom: int, msg: mido.Message, out: list) -> None:
        out.append(msg)

    def output_lost(self) -> None:
        self.sent = [None] * 128
