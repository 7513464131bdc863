"""Files keep every note at its tick in adaptive mode; ``convert --live`` plays a file as the
daemon hears it live and says how late its notes left.

Ticks and times are read back with mido (an outside reader); a rolled chord (ticks 0, 3, 6)
must stay rolled, and a chord window, which only ``--live`` may use, delays notes by up to
its length (the setting's definition).
"""

from __future__ import annotations

import json
import subprocess
import sys

import mido
import pytest

from retuner.bench.progressions import CHORALES, chorale_events, humanise, to_midifile


def cli(*args):
    return subprocess.run([sys.executable, "-m", "retuner", *args], capture_output=True, text=True, timeout=120)


def rolled_file(path):
    """A rolled C major chord (ticks 0, 3, 6 at 480 ticks a beat, 120 bpm), then G7 in a block."""
    mf = mido.MidiFile(ticks_per_beat=480)
    tr = mido.MidiTrack()
    mf.tracks.append(tr)
    ev = [(0, "note_on", 60), (3, "note_on", 64), (6, "note_on", 67),
          (960, "note_off", 60), (960, "note_off", 64), (960, "note_off", 67),
          (960, "note_on", 55), (960, "note_on", 59), (960, "note_on", 62), (960, "note_on", 65),
          (1920, "note_off", 55), (1920, "note_off", 59), (1920, "note_off", 62), (1920, "note_off", 65)]
    last = 0
    for tick, typ, key in ev:
        tr.append(mido.Message(typ, note=key, velocity=80 if typ == "note_on" else 0, time=tick - last))
        last = tick
    mf.save(path)
    return ev


def note_on_ticks(path):
    out = []
    for tr in mido.MidiFile(path).tracks:
        t = 0
        for m in tr:
            t += m.time
            if m.type == "note_on" and m.velocity:
                out.append((t, m.note))
    return sorted(out)


def test_adaptive_file_keeps_every_note_at_its_tick(tmp_path):
    src = tmp_path / "rolled.mid"
    ev = rolled_file(src)
    out = tmp_path / "out.mid"
    r = cli("convert", str(src), "-o", str(out), "--adaptive", "-q")
    assert r.returncode == 0, r.stderr
    assert note_on_ticks(out) == sorted((t, k) for t, typ, k in ev if typ == "note_on")


def test_a_chord_window_without_live_is_refused_in_one_line(tmp_path):
    src = tmp_path / "rolled.mid"
    rolled_file(src)
    r = cli("convert", str(src), "-o", str(tmp_path / "out.mid"), "--adaptive", "--chord-window", "0.02")
    assert r.returncode == 2
    assert len(r.stderr.strip().splitlines()) == 1 and "--chord-window" in r.stderr and "--live" in r.stderr
    assert not (tmp_path / "out.mid").exists()


def test_live_shows_the_added_latency_of_the_setting(tmp_path):
    """A file played by hand (notes spread over 0..25 ms): with the chord window the notes leave
    up to 20 ms late, with the default (no window) at once."""
    src = tmp_path / "hand.mid"
    to_midifile(humanise(chorale_events(CHORALES[1]), seed=4)).save(src)
    rep_w, rep_a = tmp_path / "w.json", tmp_path / "a.json"
    r = cli("convert", str(src), "-o", str(tmp_path / "w.mid"), "--adaptive", "--live",
            "--chord-window", "0.02", "--report", str(rep_w))
    assert r.returncode == 0, r.stderr
    assert "added latency per note-on" in r.stdout
    w = json.loads(rep_w.read_text())["added_latency_ms"]
    assert 0.0 < w["p50"] <= 20.0 + 1.0 and w["max"] <= 20.0 + 1.0    # a tick is ~1 ms here
    r = cli("convert", str(src), "-o", str(tmp_path / "a.mid"), "--adaptive", "--live", "--report", str(rep_a))
    assert r.returncode == 0, r.stderr
    a = json.loads(rep_a.read_text())
    assert a["added_latency_ms"]["max"] == 0.0
    assert a["attack_retunes"] > 0
    # every note sounded in both (none was released while it waited)
    assert a["added_latency_ms"]["notes"] == json.loads(rep_w.read_text())["added_latency_ms"]["notes"]
