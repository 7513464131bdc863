"""The engine's adaptive-mode hook: chord window, held-note motion, cancelling,
no sharing, MTS chord messages; with a small fake solver, and end to end with the
real solver (major triad from silence comes out 4:5:6)."""

from __future__ import annotations

import math

import mido
import pytest

from retuner.adaptive.solver import AdaptiveConfig
from retuner.engine.core import Engine, EngineConfig
from retuner.pitch.tuning import Tuning

from keyboard import OFF, ON
from mtsdecode import parse_single_note
from synthmodel import SynthModel


class FakeSolver:
    """New notes: 12-EDO plus 5 cents per note already in the chord; held notes
    move up by 2 cents at each solve. Records every call."""

    instances: list["FakeSolver"] = []

    def __init__(self, config, reference):
        self.config, self.reference = config, reference
        self.calls, self.released, self.contexts = [], [], []
        FakeSolver.instances.append(self)

    def reset(self):
        self.calls.append(("reset",))

    def release(self, keys):
        self.released.append(sorted(keys))

    def solve(self, held, new, *, t, part):
        self.calls.append(("solve", list(held), list(new)))
        self.contexts.append((t, part))
        return [c + 2.0 for _, c in held], [100.0 * k + 5.0 * i for i, k in enumerate(new)]


@pytest.fixture
def fake():
    FakeSolver.instances = []
    return FakeSolver


def engine(mode="pool", window=0.02, solver=None, **kw):
    e = Engine(Tuning.equal12(), EngineConfig(mode=mode, adaptive=AdaptiveConfig(chord_window=window), **kw),
               solver=solver)
    s = SynthModel(mpe_manager=e.config.mpe_manager() if mode == "mpe" else None)
    s.feed(e.start(0.0))
    return e, s


def test_notes_in_window_are_solved_together(fake):
    e, s = engine(solver=fake)
    assert e.feed(0.000, ON(60)) == []
    assert e.feed(0.006, ON(64)) == []
    assert e.feed(0.013, ON(67)) == []
    assert e.next_deadline() == pytest.approx(0.02)    # opened by the first note
    assert e.tick(0.019) == []
    out = e.tick(0.02)
    s.feed(out)
    assert [m.note for m in out if m.type == "note_on"] == [60, 64, 67]
    solver = fake.instances[-1]
    assert [c for c in solver.calls if c[0] == "solve"] == [("solve", [], [60, 64, 67])]
    assert solver.contexts == [(pytest.approx(0.02), 0)]     # solved as of the window's close
    for (c, v), want in zip(sorted(s.sounding(), key=lambda cv: cv[1].key), (6000.0, 6405.0, 6710.0)):
        assert abs(s.pitch(c, v) - want) <= 200 / 16384
    assert e.next_deadline() is None


def test_feed_after_deadline_flushes_first(fake):
    e, s = engine(solver=fake)
    e.feed(0.0, ON(60))
    out = e.feed(0.05, ON(72))          # the first window closed at 0.02
    assert [m.note for m in out if m.type == "note_on"] == [60]
    assert e.next_deadline() == pytest.approx(0.07)
    assert [m.note for m in e.tick(0.07) if m.type == "note_on"] == [72]


def test_held_notes_move_before_new_notes_sound(fake):
    e, s = engine(solver=fake)
    s.feed(e.feed(0.0, ON(60)) + e.tick(0.02))
    out = e.feed(0.5, ON(64)) + e.tick(0.52)
    s.feed(out)
    solver = fake.instances[-1]
    assert solver.calls[-1] == ("solve", [(60, 6000.0)], [64])
    types = [m.type for m in out]
    assert types.index("pitchwheel") < types.index("note_on")
    ch60 = next(c for c, v in s.sounding() if v.key == 60)
    assert out[0].channel == ch60                       # the held note's bend comes first
    pitches = {v.key: s.pitch(c, v) for c, v in s.sounding()}
    assert abs(pitches[60] - 6002.0) <= 200 / 16384     # moved by the solver's 2 cents
    assert abs(pitches[64] - 6400.0) <= 200 / 16384


def test_note_off_in_window_cancels_cleanly(fake):
    e, s = engine(solver=fake)
    assert e.feed(0.0, ON(60)) == []
    assert e.feed(0.01, OFF(60)) == []
    assert e.next_deadline() is None
    assert e.tick(1.0) == []
    e.feed(0.02, ON(62))
    e.feed(0.025, ON(65))
    e.feed(0.03, OFF(62))
    out = e.tick(0.04)
    assert [m.note for m in out if m.type == "note_on"] == [65]
    assert fake.instances[-1].calls[-1] == ("solve", [], [65])


def test_adaptive_notes_never_share_a_channel(fake):
    e, s = engine(solver=fake)
    out = e.feed(0.0, ON(60)) + e.tick(0.02) + e.feed(1.0, ON(72)) + e.tick(1.02)
    chans = [m.channel for m in out if m.type == "note_on"]
    assert len(set(chans)) == 2


def test_solver_told_which_notes_ended(fake):
    e, s = engine(solver=fake)
    e.feed(0.0, ON(60))
    e.feed(0.0, ON(64))
    e.tick(0.02)
    e.feed(0.5, OFF(60))
    e.feed(0.6, ON(67))
    e.tick(0.62)
    assert fake.instances[-1].released == [[60]]


def test_zero_window_solves_at_once(fake):
    e, s = engine(solver=fake, window=0.0)
    out = e.feed(0.0, ON(60))
    assert [m.type for m in out][-1] == "note_on"
    assert e.stats["note_on_messages"] == len(out)    # counted once


def test_set_adaptive_off_sounds_waiting_notes(fake):
    e, s = engine(solver=fake)
    e.feed(0.0, ON(60))
    out = e.set_adaptive(None, 0.01)
    assert [m.note for m in out if m.type == "note_on"] == [60]
    assert e.feed(0.1, ON(62))[-1].type == "note_on"   # static again: at once
    assert e.next_deadline() is None


def test_mts_adaptive_one_message_per_chord_before_note_ons(fake):
    e, _ = engine(solver=fake, mode="mts")
    e.feed(0.0, ON(60))
    e.tick(0.02)
    e.feed(0.5, ON(64))
    e.feed(0.51, ON(67))
    out = e.tick(0.52)
    assert [m.type for m in out] == ["sysex", "note_on", "note_on"]
    p = parse_single_note(out[0])
    # the moved held note and the new notes whose key is not yet at its target
    # (64 gets 6400.0, where the 12-EDO start left it: not sent again)
    assert sorted(p["keys"]) == [60, 67]
    assert abs(p["keys"][60] - 6002.0) < 0.01 and abs(p["keys"][67] - 6705.0) < 0.01


def test_release_all_drops_waiting_notes(fake):
    e, s = engine(solver=fake)
    e.feed(0.0, ON(60))
    out = e.release_all(0.01)
    assert not any(m.type == "note_on" for m in out)
    assert e.tick(1.0) == [] and e.next_deadline() is None


@pytest.mark.parametrize("mode", ["pool", "mpe"])
def test_real_solver_major_triad_is_just(mode):
    """End to end: a C major triad struck from silence decodes to 4:5:6 (5/4 = 386.314 c,
    3/2 = 701.955 c, common practice) within the bend resolution."""
    e, s = engine(mode=mode)
    for i, k in enumerate((60, 64, 67)):
        s.feed(e.feed(i * 0.005, ON(k)))
    s.feed(e.tick(0.05))
    p = {v.key: s.pitch(c, v) for c, v in s.sounding()}
    step = e.bend_range_cents / 16384
    assert abs((p[64] - p[60]) - 1200 * math.log2(5 / 4)) <= 2 * step
    assert abs((p[67] - p[60]) - 1200 * math.log2(3 / 2)) <= 2 * step


class ShortSolver(FakeSolver):
    """Answers for only the first new note; NaN for held notes (a misbehaving solver)."""

    def solve(self, held, new, **context):
        self.calls.append(("solve", list(held), list(new)))
        return [float("nan") for _ in held], [100.0 * k + 7.0 for k in new[:1]]


class BrokenSolver(FakeSolver):
    def solve(self, held, new, **context):
        raise RuntimeError("boom")


@pytest.mark.parametrize("cls", [ShortSolver, BrokenSolver])
def test_misbehaving_solver_never_loses_a_note(cls):
    e, s = engine(solver=cls, pool=(0, 1, 2))
    for k in (60, 64, 67, 72):
        s.feed(e.feed(0.0, ON(k)))
    s.feed(e.tick(0.02))
    # three channels, four notes: the oldest is stolen; the rest sound at the profile's pitch
    assert sorted(v.key for _, v in s.sounding()) == [64, 67, 72]
    for c, v in s.sounding():
        assert abs(s.pitch(c, v) - 100.0 * v.key) <= 200 / 16384
    for k in (60, 64, 67, 72):
        s.feed(e.feed(0.5, OFF(k)))
    s.feed(e.tick(0.5 + 0.02))   # adaptive mode delays note-offs by the chord window
    assert s.count() == 0 and not s.problems


class KeySolver(FakeSolver):
    """Every key its own small deviation (k % 7 cents): every note needs its own bend."""

    def solve(self, held, new, **context):
        self.calls.append(("solve", list(held), list(new)))
        return [c for _, c in held], [100.0 * k + k % 7 for k in new]


def test_late_tick_gives_the_same_output():
    """The chord is placed as of its deadline: a daemon ticking late (or a file
    converter ticking exactly) sends the same messages and counts the same."""
    outs = []
    for tick_at in (0.52, 2.9):
        e, s = engine(solver=KeySolver, pool=(0,), release_time=2.0)
        seq = e.feed(0.0, ON(60)) + e.tick(0.02) + e.feed(0.1, OFF(60)) + e.feed(0.5, ON(62))
        seq += e.tick(tick_at)
        outs.append([m.bytes() for m in seq])
        # at the deadline 0.52 the only channel still rings (released at 0.1): a ringing retune
        assert e.stats["ringing_retunes"] == 1
    assert outs[0] == outs[1]


def test_legato_chord_change_never_leaves_a_common_tone_alone(fake):
    """Note-offs are delayed by the chord window like the note-ons they make way for:
    a chord played into the next one at the same moment changes in one step at the
    window's close, note-offs first (common practice: legato means no gap)."""
    e, s = engine(solver=fake)
    for k in (60, 64, 67):
        s.feed(e.feed(0.0, ON(k)))
    s.feed(e.tick(0.02))
    # at 1.0 s the player lifts E and G and plays F and A; C is held (I -> IV6/4)
    t = 1.0
    assert e.feed(t, OFF(64)) == [] and e.feed(t, OFF(67)) == []
    assert e.feed(t, ON(65)) == [] and e.feed(t, ON(69)) == []
    assert e.next_deadline() == pytest.approx(t + 0.02)
    assert sorted(v.key for _, v in s.sounding()) == [60, 64, 67]   # nothing changed yet
    out = e.tick(t + 0.02)
    kinds = [(m.type, m.note) for m in out if m.type in ("note_on", "note_off")]
    assert kinds[:2] == [("note_off", 64), ("note_off", 67)]
    assert sorted(k for typ, k in kinds[2:]) == [65, 69]
    s.feed(out)
    assert sorted(v.key for _, v in s.sounding()) == [60, 65, 69]


def test_release_gap_is_kept_and_pedal_order_kept(fake):
    """A note-off 5 ms before the next note-on stays 5 ms before it; a pedal pressed
    after a key was let go does not catch that key (events keep their order)."""
    e, s = engine(solver=fake)
    s.feed(e.feed(0.0, ON(60)))
    s.feed(e.tick(0.02))
    s.feed(e.feed(0.500, OFF(60)))
    assert e.next_deadline() == pytest.approx(0.52)
    sus_on = mido_cc(64, 127)
    s.feed(e.feed(0.505, sus_on))
    s.feed(e.feed(0.505, ON(62)))
    out = e.tick(0.52)
    assert [(m.type, m.note) for m in out if m.type.startswith("note")] == [("note_off", 60)]
    s.feed(out)
    out = e.tick(0.525)
    assert [m for m in out if m.type == "control_change" and m.control == 64]   # pedal, then the chord
    s.feed(out)
    assert [v.key for _, v in s.sounding()] == [62]
    # with the pedal down, the next release keeps its note (sustained) until the pedal lifts
    s.feed(e.feed(1.0, OFF(62)))
    s.feed(e.tick(1.02))
    assert [v.key for _, v in s.sounding()] == [62]
    s.feed(e.feed(1.5, mido_cc(64, 0)))
    s.feed(e.tick(1.52))
    assert s.count() == 0


def mido_cc(control, value, channel=0):
    import mido
    return mido.Message("control_change", channel=channel, control=control, value=value)


def edo19_pitch(key):
    """19-EDO (1200/19 cents a step) with A4 (key 69) at 6900 c, as the built-in profile."""
    return 6900.0 + (key - 69) * 1200.0 / 19


def test_adaptive_refuses_a_profile_that_is_not_twelve_notes():
    """The solver's interval table is per 12-EDO interval class: with another scale it
    would pull notes to the wrong intervals. Asked for at the start: one line, naming
    the profile and the setting."""
    from retuner.errors import RetunerError
    from retuner.profiles.profile import load_profile
    with pytest.raises(RetunerError) as ei:
        Engine(load_profile("edo19"), EngineConfig(adaptive=AdaptiveConfig()))
    assert ei.value.field == "adaptive"
    text = str(ei.value)
    assert "edo19" in text and "\n" not in text


def test_command_line_refuses_adaptive_with_edo19(tmp_path):
    import subprocess
    import sys
    src = tmp_path / "in.mid"
    mf = mido.MidiFile()
    tr = mido.MidiTrack()
    tr += [mido.Message("note_on", note=60, velocity=90), mido.Message("note_off", note=60, time=480)]
    mf.tracks.append(tr)
    mf.save(src)
    r = subprocess.run([sys.executable, "-m", "retuner", "convert", str(src), "-o", str(tmp_path / "o.mid"),
                        "--profile", "edo19", "--adaptive"], capture_output=True, text=True)
    assert r.returncode == 2
    assert len(r.stderr.strip().splitlines()) == 1 and "edo19" in r.stderr
    assert not (tmp_path / "o.mid").exists()


@pytest.mark.parametrize("mode", ["pool", "mts"])
def test_switching_to_edo19_while_adaptive_plays_the_profile(mode):
    """A running daemon switched to a 19-note profile must not die and must not play
    12-EDO: adaptive mode rests while that profile is in force (its notes at the profile's
    own pitches: key 43 at 5257.9 c by the definition of 19-EDO), and comes back with
    the next 12-note profile (a C major triad from silence 4:5:6 again)."""
    from retuner.profiles.profile import load_profile
    e, s = engine(mode=mode)
    assert e.adaptive
    s.feed(e.set_tuning(load_profile("edo19"), 0.0))
    assert not e.adaptive
    s.feed(e.feed(0.1, ON(43)))
    s.feed(e.tick(0.2))
    if mode == "pool":
        (c, v), = s.sounding()
        assert abs(s.pitch(c, v) - edo19_pitch(43)) <= 200 / 8192
    else:
        assert abs(e.sounding()[0]["cents"] - edo19_pitch(43)) < 0.01
    s.feed(e.feed(0.3, OFF(43)))
    s.feed(e.set_tuning(Tuning.equal12(), 1.0))
    assert e.adaptive
    for k in (60, 64, 67):
        e.feed(2.0, ON(k))
    e.tick(2.05)
    p = {d["key"]: d["cents"] for d in e.sounding()}
    assert abs((p[64] - p[60]) - 1200 * math.log2(5 / 4)) < 0.1
    assert abs((p[67] - p[60]) - 1200 * math.log2(3 / 2)) < 0.1
