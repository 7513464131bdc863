"""The note tracker and the drive loop of the engine package.

Sources: MIDI 1.0 Detailed Specification: Damper Pedal (sustain, CC64) and Sostenuto (CC66),
values 0..63 off and 64..127 on; with the damper down, released notes sound on until it goes
up; sostenuto holds only the notes whose keys were down when it went down; All Notes Off
(CC123) and the channel mode messages (CC124..127) and All Sound Off (CC120) end every note;
a note-on with velocity 0 is a note-off. The drive loop follows the engine contract of the
project's DEVELOPERS.md: tick(d) at each next_deadline() d before the next event.
"""

from __future__ import annotations

import mido
import pytest

from retuner.adaptive.solver import AdaptiveConfig
from retuner.engine.core import Engine, EngineConfig
from retuner.engine.drive import Drive, play
from retuner.engine.notes import NoteTracker
from retuner.pitch.tuning import Tuning


def test_presses_pair_first_in_first_out_and_the_damper_holds():
    n = NoteTracker()
    n.note_on(0, 60, "a")
    n.note_on(0, 60, "b")          # the same key struck again before its release
    assert n.sounding(0) == 2
    assert n.note_off(0, 60) == [("a", True)]
    assert n.control(0, 64, 64) == []       # damper down (64 is on)
    assert n.note_off(0, 60) == [("b", False)]
    assert n.sounding(0) == 1               # held by the damper
    assert n.note_off(0, 60) == []
    assert n.control(0, 64, 63) == ["b"]    # 63 is off: the held note ends
    assert n.sounding(0) == 0


def test_sostenuto_holds_only_the_keys_down_when_it_went_down():
    n = NoteTracker(sostenuto=True)
    n.note_on(1, 48, "bass")
    n.control(1, 66, 127)
    n.note_on(1, 72, "melody")              # struck after the pedal: not held
    assert n.note_off(1, 48) == [("bass", False)]
    assert n.note_off(1, 72) == [("melody", True)]
    n.control(1, 64, 127)                   # damper down too
    assert n.control(1, 66, 0) == []        # the damper still holds the bass
    assert n.control(1, 64, 0) == ["bass"]
    # without sostenuto tracking CC66 holds nothing (as the converter counts today)
    m = NoteTracker()
    m.note_on(0, 48, "x")
    m.control(0, 66, 127)
    assert m.note_off(0, 48) == [("x", True)]


def test_all_sound_off_ends_everything_of_the_domain():
    n = NoteTracker()
    n.note_on(0, 60, "a")
    n.control(0, 64, 127)
    n.note_on(0, 64, "b")
    n.note_off(0, 64)                       # held by the damper
    n.note_on(1, 67, "other channel")
    assert sorted(n.control(0, 120, 0)) == ["a", "b"]
    assert n.sounding(0) == 0 and n.sounding(1) == 1
    assert n.remaining() == ["other channel"]


@pytest.mark.parametrize("cc", [123, 124, 125, 126, 127])
def test_all_notes_off_and_mode_messages_release_every_key_the_damper_still_holds(cc):
    """All Notes Off and the mode messages act as a note-off for every key (MIDI 1.0: with the
    damper down the notes sound on until it goes up)."""
    n = NoteTracker()
    n.note_on(0, 60, "a")
    n.note_on(0, 62, "c")
    assert n.control(0, cc, 0) == ["a", "c"]    # damper up: they end at once
    n.control(0, 64, 127)
    n.note_on(0, 64, "b")
    n.note_on(1, 67, "other channel")
    assert n.control(0, cc, 0) == []            # released, held by the damper
    assert n.sounding(0) == 1 and n.note_off(0, 64) == []   # its key is no longer down
    assert n.control(0, 64, 0) == ["b"]
    assert n.remaining() == ["other channel"]


def test_a_lost_note_off_costs_at_most_one_note():
    """Presses of one key: a, then b while a is down; a's note-off is lost, so the first
    release ends a, the second b (which outlived a release: stale). A new press c comes while b
    is stale: c's release ends b too (b's own release was lost), and the queue is in step
    again: a later press d ends with its own release."""
    n = NoteTracker()
    n.note_on(0, 60, "a")
    n.note_on(0, 60, "b")
    assert n.note_off(0, 60) == [("a", True)]
    n.note_on(0, 60, "c")
    assert n.note_off(0, 60) == [("b", True), ("c", True)]
    n.note_on(0, 60, "d")
    assert n.note_off(0, 60) == [("d", True)]
    assert n.remaining() == []


def _on(k):
    return mido.Message("note_on", note=k, velocity=90)


def test_drive_ticks_each_deadline_before_the_next_event_and_after_the_last():
    """Adaptive engine, chord window 20 ms: a note at 0 s opens a window that closes at
    0.02 s; the drive must tick there (before the note at 0.1 s), and after the last event
    tick the window that note opened (0.12 s). Output times are the deadlines."""
    eng = Engine(Tuning.equal12(), EngineConfig(adaptive=AdaptiveConfig(chord_window=0.02)))
    out = play(eng, [(0.0, _on(60)), (0.1, _on(64))])
    ons = [(round(t, 6), m.note) for t, m in out if m.type == "note_on"]
    assert ons == [(0.02, 60), (0.12, 64)]
    assert eng.next_deadline() is None


def test_drive_due_stops_at_the_event_time():
    eng = Engine(Tuning.equal12(), EngineConfig(adaptive=AdaptiveConfig(chord_window=0.02)))
    d = Drive(eng)
    d.start(0.0)
    assert list(d.feed(0.0, _on(60))) == [(0.0, [])]
    assert list(d.due(0.019)) == []                  # not yet
    got = list(d.due(0.5))
    assert [t for t, _ in got] == [pytest.approx(0.02)]
    assert [m.note for m in got[0][1] if m.type == "note_on"] == [60]
    assert list(d.finish()) == []
