"""One rule for which notes sound, whoever reads the presses: the engine's press queues, the
file side's note tracker (channel planning, retuner fit) and the lookahead planner's reading of
a file must agree note for note on the same stream of presses, releases and pedals.

What the rule is comes from MIDI 1.0 (Detailed Specification: a note-on with velocity 0 is a
note-off; Damper Pedal CC64 and Sostenuto CC66, 0..63 off and 64..127 on, sostenuto holding the
notes whose keys were down when it went down; All Sound Off CC120 ends every note, All Notes
Off CC123 releases every key while the damper still holds) and, for pairing presses with
releases of one key first in first out with a lost note-off costing at most one note, from the
engine's own documented rule (retuner/engine/notes.py); the checks of each part of the rule
are in test_notes_drive.py and test_engine.py. Here the three users are held against each
other on random streams that include repeated presses of a key and releases with no press.
"""

from __future__ import annotations

import random
from collections import Counter

import mido
import pytest

from retuner.convert.lookahead import extract_notes
from retuner.engine.core import Engine, EngineConfig
from retuner.engine.notes import NoteTracker
from retuner.pitch.tuning import Tuning
from retuner.smf.reader import CHANNEL

KEYS = (60, 62, 64, 65)


def random_stream(seed: int, n: int = 400) -> list[bytes]:
    """Raw channel messages on channel 0: presses and releases of a few keys (so keys are
    struck again while down and released when not down), both pedals, now and then all
    notes off or all sound off."""
    rng = random.Random(seed)
    out = []
    for _ in range(n):
        r = rng.random()
        key = rng.choice(KEYS)
        if r < 0.35:
            out.append(bytes((0x90, key, rng.randint(1, 127))))
        elif r < 0.55:
            out.append(bytes((0x80, key, 64)))
        elif r < 0.70:
            out.append(bytes((0x90, key, 0)))          # velocity 0: a note-off (MIDI 1.0)
        elif r < 0.82:
            out.append(bytes((0xB0, 64, rng.choice((0, 63, 64, 127)))))
        elif r < 0.94:
            out.append(bytes((0xB0, 66, rng.choice((0, 63, 64, 127)))))
        elif r < 0.97:
            out.append(bytes((0xB0, 123, 0)))
        else:
            out.append(bytes((0xB0, 120, 0)))
    return out


def through_engine(stream, times) -> list[Counter]:
    eng = Engine(Tuning.equal12(), EngineConfig())
    eng.start(0.0)
    seen = []
    for raw, t in zip(stream, times):
        eng.feed(t, mido.Message.from_bytes(raw))
        seen.append(Counter(n["key"] for n in eng.sounding()))
    assert eng.stats["steals"] == 0           # a stolen note would end early for another reason
    return seen


def through_tracker(stream) -> list[Counter]:
    tracker = NoteTracker(sostenuto=True)
    seen = []
    for raw in stream:
        if raw[0] == 0x90 and raw[2]:
            tracker.note_on(0, raw[1], raw[1])
        elif raw[0] in (0x80, 0x90):
            tracker.note_off(0, raw[1])
        else:
            tracker.control(0, raw[1], raw[2])
        seen.append(Counter(tracker.remaining()))
    return seen


def through_lookahead(stream, times) -> list[Counter]:
    merged = [(i, 0, CHANNEL, raw) for i, raw in enumerate(stream)]
    # one event more, later, so that no note's end is the end of the file
    merged.append((len(stream), 0, CHANNEL, bytes((0xB0, 7, 100))))
    secs = list(times) + [times[-1] + 1.0]
    notes = extract_notes(merged, secs, frozenset(), Tuning.equal12())
    return [Counter(n.key for n in notes if n.on <= t < n.end) for t in times]


@pytest.mark.parametrize("seed", range(8))
def test_the_same_stream_sounds_the_same_notes_through_every_user_of_the_rule(seed):
    stream = random_stream(seed)
    times = [0.01 * i for i in range(len(stream))]
    engine = through_engine(stream, times)
    tracker = through_tracker(stream)
    lookahead = through_lookahead(stream, times)
    assert sum(len(c) for c in engine) > len(stream) // 2    # the stream keeps notes sounding
    for i, raw in enumerate(stream):
        assert engine[i] == tracker[i] == lookahead[i], (i, raw.hex(), engine[i], tracker[i], lookahead[i])


def test_the_comparison_sees_a_different_rule():
    """A tracker without sostenuto (as the channel planning counts) differs on a stream where
    the sostenuto pedal holds a note: so the comparison above can fail."""
    stream = [bytes((0x90, 60, 90)), bytes((0xB0, 66, 127)), bytes((0x80, 60, 0)), bytes((0x90, 62, 90))]
    plain = NoteTracker()
    for raw in stream:
        if raw[0] == 0x90 and raw[2]:
            plain.note_on(0, raw[1], raw[1])
        elif raw[0] == 0x80:
            plain.note_off(0, raw[1])
        else:
            plain.control(0, raw[1], raw[2])
    times = [0.01 * i for i in range(len(stream))]
    assert through_engine(stream, times)[-1] == Counter({60: 1, 62: 1}) != Counter(plain.remaining())
