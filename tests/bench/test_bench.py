"""retuner bench: the generated performance and the figures (no timing asserted here:
timing goals are read from the bench's output, never tested)."""

from __future__ import annotations

import json
import subprocess
import sys

from retuner.bench.performance import generate_performance, performance, performance_names
from retuner.bench.timing import JSON_KEYS, measure
from retuner.engine.core import EngineConfig
from retuner.profiles.profile import load_profile

from synthmodel import SynthModel


def is_on(m):
    return m.type == "note_on" and m.velocity > 0


def test_generated_performance_is_big_seeded_and_varied():
    ev = generate_performance(10000, seed=3)
    assert ev == generate_performance(10000, seed=3)
    assert ev != generate_performance(10000, seed=4)
    notes = [m for _, m in ev if m.type in ("note_on", "note_off")]
    assert len(notes) >= 10000
    assert any(m.type == "control_change" and m.control == 64 for _, m in ev)
    assert any(m.type == "pitchwheel" and m.pitch != 0 for _, m in ev)
    assert [t for t, _ in ev] == sorted(t for t, _ in ev)
    # chords: note-ons starting within 30 ms of a group's first; at most 8 voices, and some reach 8
    sizes, group, t0 = [], 0, None
    for t, m in ev:
        if not is_on(m):
            continue
        if t0 is None or t - t0 > 0.03:
            if group:
                sizes.append(group)
            group, t0 = 0, t
        group += 1
    assert max(sizes) == 8
    # every note-on is released again (the player lets go of every key)
    held = {}
    for _, m in ev:
        if is_on(m):
            held[m.note] = held.get(m.note, 0) + 1
        elif m.type in ("note_on", "note_off"):
            held[m.note] -= 1
            assert held[m.note] >= 0
    assert all(v == 0 for v in held.values())


def test_bench_figures_meet_economy_goals_with_a_twelve_note_profile():
    res = measure(load_profile("meantone-quarter"), EngineConfig(), generate_performance(10000, seed=1))
    assert set(JSON_KEYS) <= set(res)
    assert res["note_events"] >= 10000
    assert res["messages_per_note_on"] <= 1.15          # goal: a bend for at most one note-on in seven
    assert res["ringing_retunes_below_pool"] == 0       # goal: no audible slide while the pool has room
    assert res["steals"] == 0
    assert 0 < res["p50_us"] <= res["p99_us"] <= res["max_us"]


def test_bench_keeps_output_that_releases_everything():
    res = measure(load_profile("werckmeister-3"), EngineConfig(), generate_performance(2000, seed=2),
                  keep_output=True)
    s = SynthModel()
    s.feed([m for _, m in res["output"]])
    assert not s.problems and s.count() == 0


def test_progressions_can_be_benched():
    names = performance_names()
    assert "generated" in names and "pump" in names
    ev = performance("pump", n_note_events=500)
    assert sum(1 for _, m in ev if m.type in ("note_on", "note_off")) >= 500


def test_cli_json_prints_exactly_the_documented_keys():
    r = subprocess.run([sys.executable, "-m", "retuner", "bench", "--json", "--events", "1500"],
                       capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    d = json.loads(r.stdout)
    assert list(d) == ["p50_us", "p99_us", "max_us", "messages_per_note_on", "ringing_retunes", "steals"]


def test_cli_text_and_bad_performance():
    r = subprocess.run([sys.executable, "-m", "retuner", "bench", "--events", "1000", "--mode", "mpe"],
                       capture_output=True, text=True, timeout=120)
    assert r.returncode == 0 and "p99" in r.stdout and "steals" in r.stdout
    r = subprocess.run([sys.executable, "-m", "retuner", "bench", "--performance", "nope"],
                       capture_output=True, text=True, timeout=120)
    assert r.returncode == 2 and len(r.stderr.strip().splitlines()) == 1
