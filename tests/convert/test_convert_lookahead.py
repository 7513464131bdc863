"""Lookahead adaptive tuning against live emulation (`--adaptive` alone) on the project's
progressions (retuner.bench.progressions), measured with retuner.measure.metrics from the OUTPUT files.

Definitions of the measures, as retuner.measure.metrics states them (impurity: time-weighted
mean distance of consonant pairs from just; motion: cents moved by sounding notes per note;
drift: largest absolute mean deviation from 12-EDO of the sounding notes)."""

from __future__ import annotations

import io
import json
import subprocess
import sys

import mido
import pytest

from retuner.convert import arrange
from retuner.convert import conversion
from retuner.smf import messages
from retuner.smf import reader
from retuner.smf import writer
from retuner.measure import metrics
from retuner.adaptive.solver import AdaptiveConfig
from retuner.engine.core import EngineConfig
from retuner.bench.progressions import PROGRESSIONS, progression, to_midifile
from retuner.pitch.tuning import Tuning


def _song(name, legato):
    buf = io.BytesIO()
    to_midifile(progression(name, legato=legato)).save(file=buf)
    return reader.parse_smf(buf.getvalue(), f"{name}.mid")


def _measure(song, lookahead):
    cfg = EngineConfig(adaptive=AdaptiveConfig())
    res = conversion.convert_song(song, "out.mid", conversion.ConvertOptions(Tuning.equal12(), cfg, lookahead=lookahead))
    assert len(res.outputs) == 1
    stream = messages.output_stream(res.outputs[0].data)
    rep = metrics.report(stream, exclude_channels=(9,))
    return rep, res.outputs[0].data


@pytest.mark.parametrize("name", PROGRESSIONS)
def test_lookahead_beats_live_on_legato_progressions(name):
    song = _song(name, legato=True)
    live, _ = _measure(song, False)
    la, data = _measure(song, True)
    assert la["notes"] == live["notes"]
    assert la["impurity_cents"] <= live["impurity_cents"] + 1e-3
    # strictly better on drift; on motion strictly better where live moves notes at all
    assert la["drift_max_cents"] < live["drift_max_cents"]
    # and within the adaptive settings' drift limit (to a bend step, 200/8192 c: MIDI 1.0)
    assert la["drift_max_cents"] <= AdaptiveConfig().max_drift + 200 / 8192
    # no held note steps further than the settings allow per event (policy "limited")
    dec = metrics.decode(messages.output_stream(data), exclude_channels=(9,))
    steps = [abs(b[1] - a[1]) for nt in dec.notes for a, b in zip(nt.steps, nt.steps[1:])]
    assert max(steps, default=0.0) <= AdaptiveConfig().max_motion + 200 / 8192
    if live["motion_cents_per_note"] > 0.01:
        assert la["motion_cents_per_note"] < live["motion_cents_per_note"]
    else:
        assert la["motion_cents_per_note"] <= live["motion_cents_per_note"] + 1e-3


@pytest.mark.parametrize("name", PROGRESSIONS)
def test_lookahead_no_worse_on_detached_progressions(name):
    song = _song(name, legato=False)
    live, _ = _measure(song, False)
    la, _ = _measure(song, True)
    for k in ("impurity_cents", "motion_cents_per_note", "drift_max_cents"):
        assert la[k] <= live[k] + 1e-3, k


def test_lookahead_keeps_ticks_and_places_bends_before_note_ons():
    """Every note keeps its tick; a note's bend is sent before its note-on, on a silent channel,
    not at the note-on's tick (except at tick 0, where nothing can come earlier)."""
    song = _song("pump", legato=True)
    la, data = _measure(song, True)
    out = reader.parse_smf(data)
    ev = out.tracks[0].events
    # ticks of note-ons are the input's
    ins = sorted((t, r[1]) for t, k, r in song.tracks[0].events if k == reader.CHANNEL and r[0] & 0xF0 == 0x90 and r[2])
    outs = sorted((t, r[1]) for t, k, r in ev if k == reader.CHANNEL and r[0] & 0xF0 == 0x90 and r[2])
    assert ins == outs
    late = 0
    sounding = [0] * 16
    for (t1, k1, r1), (t2, k2, r2) in zip(ev, ev[1:]):
        if r2[0] & 0xF0 == 0x90 and r2[2] and r1[0] == (0xE0 | (r2[0] & 15)) and t1 == t2 and t2 > 0:
            late += 1
    assert late == 0
    # and no bend ever changes a channel while a note sounds on it, except planned re-centring:
    # every such bend comes at another note's onset (a segment boundary)
    onsets = {t for t, _ in ins}
    for t, k, r in ev:
        st = r[0] & 0xF0
        c = r[0] & 15
        if st == 0x90 and r[2]:
            sounding[c] += 1
        elif st in (0x80, 0x90):
            sounding[c] -= 1
        elif st == 0xE0 and sounding[c] > 0:
            assert t in onsets


def test_cli_lookahead_report(tmp_path):
    src = tmp_path / "pump.mid"
    to_midifile(progression("pump", legato=True)).save(src)
    rep = tmp_path / "r.json"
    r = subprocess.run([sys.executable, "-m", "retuner", "convert", src, "-o", tmp_path / "o.mid",
                        "--adaptive", "--lookahead", "--report", rep], capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    d = json.loads(rep.read_text())
    assert d["lookahead"] is True
    assert d["notes"] == sum(1 for m in mido.MidiFile(src).tracks[0] if m.type == "note_on" and m.velocity)
    r2 = subprocess.run([sys.executable, "-m", "retuner", "convert", src, "-o", tmp_path / "o2.mid",
                         "--lookahead"], capture_output=True, text=True)
    assert r2.returncode == 2 and "--adaptive" in r2.stderr


def test_convert_adaptive_is_the_live_engine_on_the_same_performance(tmp_path):
    """`convert --adaptive` == the engine driven live: the times a live player of the file
    would produce (mido's own playback times, seconds from its tempo handling) fed to a fresh
    engine with timers honoured give the same messages, each at the file position of its time."""
    from retuner.engine.core import Engine

    src = tmp_path / "pump.mid"
    mf = to_midifile(progression("pump", legato=True, rounds=2))
    # a tempo change half way, so the clock is not a plain scale of ticks
    tr = mf.tracks[0]
    tick = 0
    for i, m in enumerate(tr):
        tick += m.time
        if tick >= 4 * 960:
            tr.insert(i, mido.MetaMessage("set_tempo", tempo=800000, time=0))
            break
    mf.save(src)
    dst = tmp_path / "out.mid"
    r = subprocess.run([sys.executable, "-m", "retuner", "convert", src, "-o", dst, "--adaptive", "-q"],
                       capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    # live: mido plays the file (delta seconds), the engine gets those times
    eng = Engine(Tuning.equal12(), EngineConfig(adaptive=AdaptiveConfig()))
    live = [(0.0, m) for m in eng.start(0.0)]
    t = 0.0
    for m in mido.MidiFile(src):
        t += m.time
        if m.is_meta:
            continue
        d = eng.next_deadline()
        while d is not None and d <= t:
            live += [(d, x) for x in eng.tick(d)]
            d = eng.next_deadline()
        live += [(t, x) for x in eng.feed(t, m)]
    d = eng.next_deadline()
    while d is not None:
        live += [(d, x) for x in eng.tick(d)]
        d = eng.next_deadline()
    # the file: every channel message with its time in seconds (mido's playback again)
    got = []
    t = 0.0
    for m in mido.MidiFile(dst):
        t += m.time
        if not m.is_meta:
            got.append((t, m))
    assert [bytes(m.bytes()) for _, m in got] == [bytes(m.bytes()) for _, m in live]
    # times agree within half a tick (a timer's output lands on the nearest tick)
    half_tick = 0.8 / 480 / 2 + 1e-9  # a tick at 800000 us per beat, 480 ticks per beat
    for (ta, _), (tb, _) in zip(got, live):
        assert abs(ta - tb) <= half_tick


@pytest.mark.parametrize("mode", ["mpe", "mts"])
def test_lookahead_beats_live_in_mpe_and_mts_modes(mode):
    """At +-48 semitones (MPE) a bend step is 0.59 c, so the plan's small re-centring moves are
    quantised; MTS carries pitches in 100/16384 c steps. The comparison still holds, measured
    from the output."""
    song = _song("pump", legato=True)
    cfg = EngineConfig(mode=mode, adaptive=AdaptiveConfig())
    reps = {}
    for la in (False, True):
        res = conversion.convert_song(song, "out.mid", conversion.ConvertOptions(Tuning.equal12(), cfg, lookahead=la))
        notes = []
        for o in res.outputs:
            notes += metrics.decode(messages.output_stream(o.data), exclude_channels=(9,)).notes
        reps[la] = (metrics.impurity(notes)[0], metrics.motion(notes), metrics.drift(notes)["max"])
    live, la = reps[False], reps[True]
    assert la[0] <= live[0] + 1e-3
    assert la[1] < live[1]
    assert la[2] < live[2]


def test_move_bends_early_rules():
    """A note's bend goes back to when its channel fell silent (note-off + release time), never
    before the channel's previous bend or a reset all controllers (CC121 resets the bend, MIDI 1.0),
    and stays at the note-on when the channel still rings."""
    from retuner.convert.lookahead import move_bends_early

    song = reader.parse_smf(writer.serialize(0, 480, [([(0, b"\xFF\x51\x03\x07\xA1\x20")], 0)]))  # 120 bpm

    def run(extra, release):
        evs = [(0, b"\x90\x3C\x40"), (96, b"\x80\x3C\x00")] + extra + [(2000, b"\xE0\x00\x50"), (2000, b"\x90\x3E\x40")]
        evs.sort(key=lambda e: e[0])
        tracks = [(evs, 3000)]
        move_bends_early(song, tracks, release)
        return [t for t, r in tracks[0][0] if r[0] == 0xE0][-1]

    # release 0.1 s = 96 ticks at 120 bpm, 480 ticks per beat: silent from tick 192
    assert run([], 0.1) == 192
    assert run([(500, b"\xB0\x79\x00")], 0.1) == 501
    assert run([(700, b"\xE0\x00\x40")], 0.1) == 700
    assert run([], 10.0) == 2000


# -- the planner's linear programme, against independent solutions ---------------------------

def test_l1_solve_weighted_median():
    """One pitch pulled by absolute-value terms: the minimiser of sum c_p |x - b_p| is the
    weighted median of the b_p (a fact of L1 fitting, common practice); with the centre row on
    that pitch priced above the pull, the pitch goes to the reference instead."""
    import numpy as np
    from retuner.convert.lookahead import l1_solve

    b = [3.0, -2.0, 7.0, 1.0, 5.0]
    c = [1.0, 1.0, 1.0, 2.5, 1.0]   # weighted median: 1.0 (weights below it 1.0, above it 3.0)
    x, D = l1_solve(1, [-1] * 5, [0] * 5, np.array(b), np.array(c), [], np.zeros(0), 0.0, 0.0)
    assert x[0] == pytest.approx(1.0, abs=2e-3)
    # drift row |x - 0| <= D priced at 10 > the total pull of 6.5: the pitch stays at 0
    x, D = l1_solve(1, [-1] * 5, [0] * 5, np.array(b), np.array(c), [[0]], np.zeros(1), 10.0, 0.0)
    assert x[0] == pytest.approx(0.0, abs=2e-3) and D == pytest.approx(0.0, abs=2e-3)
    # and a hard cap below the weighted median holds
    x, D = l1_solve(1, [-1] * 5, [0] * 5, np.array(b), np.array(c), [[0]], np.zeros(1), 0.0, 0.0, cap=0.5)
    assert abs(x[0]) <= 0.5 + 1e-9 and x[0] == pytest.approx(0.5, abs=2e-3)


def test_l1_solve_agrees_with_brute_force():
    """Three pitches (a held note before the window, a pair, a chord's centre): the programme's
    optimum equals the minimum over a fine grid of the objective written out independently."""
    import numpy as np
    from retuner.convert.lookahead import l1_solve

    rng = np.random.default_rng(7)
    for _ in range(3):
        # x0 held from before (|x0 - f|), pair x1 - x0 ~ t01, pair x2 - x1 ~ t12, motion x2 ~ x0
        f, t01, t12 = rng.uniform(-6, 6, 3)
        c = rng.uniform(0.2, 1.0, 4)
        ti = [-1, 0, 1, 0]
        tj = [0, 1, 2, 2]
        tb = np.array([f, t01, t12, 0.0])
        rows = [[0, 1, 2], [1, 2]]
        r = np.array([0.0, 0.5])
        beta, floor = float(rng.uniform(0.1, 1.5)), 0.3
        x, D = l1_solve(3, ti, tj, tb, c, rows, r, beta, floor)

        def objective(X0, X1, X2):
            cost = (c[0] * abs(X0 - f) + c[1] * abs(X1 - X0 - t01) + c[2] * abs(X2 - X1 - t12)
                    + c[3] * abs(X2 - X0))
            drift = np.maximum(np.maximum(abs((X0 + X1 + X2) / 3 - 0.0), abs((X1 + X2) / 2 - 0.5)), floor)
            return cost + beta * drift

        got = objective(*x)
        # grid search: coarse over the whole range, then fine around the coarse minimum
        g = np.arange(-15, 15.01, 0.25)
        vals = objective(*np.meshgrid(g, g, g, indexing="ij", sparse=True))
        centre = [g[i] for i in np.unravel_index(np.argmin(vals), vals.shape)]
        fine = [np.arange(cc - 0.5, cc + 0.505, 0.01) for cc in centre]
        grid_min = min(float(np.min(vals)),
                       float(np.min(objective(*np.meshgrid(*fine, indexing="ij", sparse=True)))))
        # no grid point beats the programme's optimum (and x is a point, so it cannot beat the
        # true optimum): they agree to the solver's tolerance
        assert got <= grid_min + 2e-3
        assert D >= floor - 1e-9


def test_mixture_of_plans_is_no_worse_than_its_parts():
    """choose() relies on the measures being convex in the planned pitches: the output of a
    mixture of two plans measures no worse than the mixture of their measures (up to a bend
    step, 200/8192 c at the default range: MIDI 1.0 pitch bend, 14 bits)."""
    from retuner.convert import lookahead

    song = _song("pump", legato=True)
    cfg = EngineConfig(adaptive=AdaptiveConfig())
    merged = reader.merged_events(song)
    secs = reader.event_seconds(song, merged)
    groups = arrange.plan_groups(song, merged, secs, Tuning.equal12(), cfg)
    tun = Tuning.equal12()

    def measure(plan):
        outs = conversion._render(song, merged, secs, groups, tun, cfg, "out.mid", plan)
        return lookahead.measure_outputs(outs, cfg, messages.output_stream)

    p1 = lookahead.plan_song(song, merged, secs, tun, cfg, motion_value=1.0, drift_value=0.1)
    p2 = lookahead.plan_song(song, merged, secs, tun, cfg, motion_value=2.0, drift_value=0.1)
    m1, m2 = measure(p1), measure(p2)
    assert m1 != m2
    step = 200 / 8192
    for w in (0.3, 0.7):
        mix = lookahead.Plan(p1.notes, p1.onsets, w * p1.values + (1 - w) * p2.values, p1.release_time)
        mm = measure(mix)
        for k in m1:
            assert mm[k] <= w * m1[k] + (1 - w) * m2[k] + step, k


def test_lookahead_keeps_the_drift_limit():
    """The plan never lets the centre stray beyond the adaptive settings' max_drift (measured
    from the output, to a bend step), even where live playing of the comma pump needs more."""
    song = _song("pump", legato=True)
    cfg = EngineConfig(adaptive=AdaptiveConfig(max_drift=1.5))
    res = conversion.convert_song(song, "out.mid", conversion.ConvertOptions(Tuning.equal12(), cfg, lookahead=True))
    rep = metrics.report(messages.output_stream(res.outputs[0].data), exclude_channels=(9,))
    assert rep["drift_max_cents"] <= 1.5 + 200 / 8192


def test_lookahead_lone_note_sits_at_the_reference():
    """A file of one note: no pairs, no motion; the plan puts it at 12-EDO (A4 = 440 Hz is the
    reference, ISO 16), decoded from the output within a bend step (MIDI 1.0: 200/8192 c)."""
    mf = mido.MidiFile()
    tr = mido.MidiTrack()
    mf.tracks.append(tr)
    tr.append(mido.Message("note_on", note=64, velocity=64, time=0))
    tr.append(mido.Message("note_off", note=64, time=480))
    buf = io.BytesIO()
    mf.save(file=buf)
    song = reader.parse_smf(buf.getvalue(), "one.mid")
    res = conversion.convert_song(song, "out.mid", conversion.ConvertOptions(
        Tuning.equal12(), EngineConfig(adaptive=AdaptiveConfig()), lookahead=True))
    dec = metrics.decode(messages.output_stream(res.outputs[0].data))
    assert len(dec.notes) == 1
    assert abs(dec.notes[0].pitch - 6400.0) <= 200 / 8192
