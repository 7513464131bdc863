"""Adding an output mode is one module plus one table entry: the toy mode of
``nearest_key_mode.py`` is registered in ``MODES`` by the test and then works in
config validation, the engine, the command line's ``--mode`` and file conversion,
with no other change.

Pitches are checked against the definition of 19-EDO (1200/19 cents a step; the
built-in profile puts A4, key 69, on its 12-EDO pitch: 6900 c above key 0) and
messages against MIDI 1.0 (note-on 0x9n, note-off 0x8n, n the channel)."""

from __future__ import annotations

import mido
import pytest

from nearest_key_mode import NearestKeyMode
from retuner import cli
from retuner.engine.core import Engine, EngineConfig
from retuner.engine.outputs import MODES
from retuner.errors import RetunerError
from retuner.profiles.profile import load_profile

STEP_19 = 1200.0 / 19


def edo19_cents(key: int) -> float:
    return 6900.0 + (key - 69) * STEP_19


def nearest(key: int) -> int:
    return round(edo19_cents(key) / 100.0)


@pytest.fixture
def toy(monkeypatch):
    monkeypatch.setitem(MODES, NearestKeyMode.name, NearestKeyMode)
    return NearestKeyMode


def test_unknown_until_registered():
    with pytest.raises(RetunerError) as ei:
        EngineConfig(mode="nearest").validate()
    assert ei.value.field == "mode"


def test_engine_plays_the_registered_mode(toy):
    e = Engine(load_profile("edo19"), EngineConfig(mode="nearest"))
    assert e.start(0.0) == []
    keys = (43, 60, 64, 67, 72)
    out = []
    for i, k in enumerate(keys):
        out += e.feed(0.01 * i, mido.Message("note_on", channel=2, note=k, velocity=90))
    ons = [m for m in out if m.type == "note_on"]
    assert [m.bytes() for m in ons] == [[0x92, nearest(k), 90] for k in keys]
    # key 43 of 19-EDO is 5257.9 c: the nearest 12-EDO key is 53 (not its own key, 43)
    assert nearest(43) == 53
    assert sorted(d["cents"] for d in e.sounding()) == sorted(100.0 * nearest(k) for k in keys)
    # controllers stay on their channel; the note-off reaches the key the note sounds on
    assert [m.bytes() for m in e.feed(0.1, mido.Message("control_change", channel=2, control=64, value=127))] \
        == [[0xB2, 64, 127]]
    off = e.feed(0.2, mido.Message("note_off", channel=2, note=43, velocity=0))
    assert [m.bytes() for m in off] == [[0x82, 53, 0]]
    # panic: the pedal goes up and all-notes-off reaches every channel but the passthrough one
    rel = e.release_all(0.3)
    assert [0xB2, 64, 0] in [m.bytes() for m in rel]
    assert sorted(m.channel for m in rel if m.type == "control_change" and m.control == 123) \
        == [c for c in range(16) if c != 9]
    assert e.sounding() == []


def test_command_line_and_file_conversion_read_the_table(toy, tmp_path):
    args = cli.build_parser().parse_args(["convert", "in.mid", "-o", "out.mid", "--mode", "nearest"])
    assert args.mode == "nearest"
    src, dst = tmp_path / "in.mid", tmp_path / "out.mid"
    mf = mido.MidiFile(type=0)
    tr = mido.MidiTrack()
    for k in (60, 64, 67):
        tr.append(mido.Message("note_on", channel=0, note=k, velocity=80, time=0))
    for i, k in enumerate((60, 64, 67)):
        tr.append(mido.Message("note_off", channel=0, note=k, velocity=0, time=480 if i == 0 else 0))
    mf.tracks.append(tr)
    mf.save(src)
    assert cli.main(["convert", str(src), "-o", str(dst), "--profile", "edo19", "--mode", "nearest", "-q"]) == 0
    got = [m for m in mido.MidiFile(dst) if m.type in ("note_on", "note_off")]
    assert [(m.type, m.channel, m.note) for m in got if m.type == "note_on"] == \
        [("note_on", 0, nearest(k)) for k in (60, 64, 67)]
    assert sorted(m.note for m in got if m.type == "note_off") == sorted(nearest(k) for k in (60, 64, 67))
