"""Bend-pool engine rules, one test per rule (issue 3)."""

import mido
import pytest

from retuner import encode as E
from retuner.engine import Engine, EngineConfig
from retuner.profile import load_profile
from retuner.tuning import Tuning

ON = lambda k, v=100, ch=0: mido.Message("note_on", channel=ch, note=k, velocity=v)
OFF = lambda k, ch=0: mido.Message("note_off", channel=ch, note=k, velocity=0)
CC = lambda c, v, ch=0: mido.Message("control_change", channel=ch, control=c, value=v)


def decode(engine, note_msg, bends):
    """Pitch in cents of an output note: key*100 + bend/8192*range (MIDI 1.0 bend semantics)."""
    return note_msg.note * 100 + (bends[note_msg.channel] - 8192) / 8192 * engine.bend_range_cents


def test_start_announces_range_on_every_pool_channel():
    e = Engine(Tuning.equal12(), EngineConfig())
    out = e.start(0.0)
    rpn_chans = sorted({m.channel for m in out if m.type == "control_change"})
    assert rpn_chans == [c for c in range(16) if c != 9]  # default pool: all but channel 10
    ch0 = [m for m in out if m.type == "control_change" and m.channel == 0]
    # RPN 0 (MIDI 1.0 Detailed Specification): 101/100 = 0/0, CC6 = 2 semitones, CC38 = 0, then null
    assert [(m.control, m.value) for m in ch0] == [(101, 0), (100, 0), (6, 2), (38, 0), (101, 127), (100, 127)]


def test_meantone_chord_decodes_to_profile():
    tu = load_profile("meantone-quarter")
    e = Engine(tu)
    e.start(0.0)
    bends = {}
    notes = []
    for i, k in enumerate((60, 64, 67, 72)):
        for m in e.feed(i * 0.01, ON(k)):
            if m.type == "pitchwheel":
                bends[m.channel] = m.pitch + 8192
            elif m.type == "note_on":
                notes.append(m)
    for m in notes:
        bends.setdefault(m.channel, 8192)
    for m, k in zip(notes, (60, 64, 67, 72)):
        assert abs(decode(e, m, bends) - tu.cents[k]) <= 200 / 16384
