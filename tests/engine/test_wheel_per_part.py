"""In MPE mode the player's wheel belongs to its part: a wheel on input channel c bends only the
notes that came from c. A zone that holds one part (a converted file gives each part a zone of
its own) carries the part's wheel on its manager channel; a zone that several input channels
play in carries each part's wheel in its own notes' member bends, the manager centred.

Decoded as an MPE synth plays it (tests/synthmodel.py, written from the MIDI 1.0 Detailed
Specification and the MPE specification, The MIDI Association, 2018: a member's note sounds at
key*100 + member bend + manager bend, each bend/8192 * that channel's RPN 0 range; members
default to 48 semitones, the manager to 2). The player's wheel is read the same way: an input
bend w at the input channel's range r (its own RPN 0, 2 semitones until set) means
w/8192 * r cents.

Tolerance: a shared zone's member bend is the tuning's bend plus the wheel in whole bend steps,
each rounded to the nearest step: half a step (4800/16384 = 0.29 c at 48 semitones) for each.
A zone of one part: half a member step for the tuning, half a manager step (200/16384 = 0.012 c
at 2 semitones) for the wheel.

Targets: quarter-comma meantone from its definition (every fifth 1/4 syntonic comma narrow,
chain Eb..G#, A4 = 440 Hz; J. Murray Barbour, Tuning and Temperament, 1951), computed in
tests/temperaments.py, not read from retuner's profile.
"""

from __future__ import annotations

import mido
import pytest

from retuner.adaptive.solver import AdaptiveConfig
from retuner.convert.conversion import ConvertOptions, convert_file
from retuner.engine.core import Engine, EngineConfig
from retuner.measure.report import build_report
from retuner.profiles.profile import load_profile
from synth import note_events, write_midi
from synthmodel import SynthModel
from temperaments import MEANTONE

HALF_STEP_48 = 4800.0 / 16384      # MIDI 1.0: half a bend step at 48 semitones
TOL = 2 * HALF_STEP_48              # the tuning's share and the wheel's, each rounded
HALF_STEP_2 = 200.0 / 16384         # MIDI 1.0: half a bend step at 2 semitones (the manager's)
TOL_ONE_PART = HALF_STEP_48 + HALF_STEP_2


def ON(k, ch):
    return mido.Message("note_on", channel=ch, note=k, velocity=90)


def WHEEL(p, ch):
    return mido.Message("pitchwheel", channel=ch, pitch=p)


def RPN0(semis, ch):
    return [mido.Message("control_change", channel=ch, control=c, value=v)
            for c, v in ((101, 0), (100, 0), (6, semis), (38, 0))]


def wheel_cents(pitch, range_semitones=2.0):
    """MIDI 1.0: a 14-bit bend centred on 8192 spans +-range (signed value / 8192 * range)."""
    return pitch / 8192.0 * range_semitones * 100.0


def play(e, s, t, msgs, tag):
    for m in msgs:
        s.feed(e.feed(t, m), tag)


def pitches(s):
    """{(input channel, key): cents} of what the synth sounds, from the voices' tags."""
    return {(v.tag, v.key): s.pitch(c, v) for c, v in s.sounding()}


@pytest.mark.parametrize("adaptive", [None, AdaptiveConfig()], ids=["static", "adaptive"])
def test_a_wheel_bends_only_its_own_parts_notes(adaptive):
    e = Engine(load_profile("meantone-quarter"), EngineConfig(mode="mpe", adaptive=adaptive))
    s = SynthModel(mpe_manager=e.config.mpe_manager())
    s.feed(e.start(0.0))
    play(e, s, 0.0, [ON(48, 0), ON(55, 0)], tag=0)            # part 1: C3 G3
    play(e, s, 0.01, [ON(64, 1), ON(72, 1)], tag=1)           # part 2: E4 C5
    s.feed(e.tick(0.3))
    before = pitches(s)
    if adaptive is None:
        for (ch, k), c in before.items():
            assert c == pytest.approx(MEANTONE[k], abs=HALF_STEP_48)
    wheels = {0: 0, 1: 0}
    for i, (ch, w) in enumerate([(1, 4096), (1, 8191), (0, -3000), (1, -8192), (0, 2000)]):
        play(e, s, 0.5 + 0.1 * i, [WHEEL(w, ch)], tag=None)
        wheels[ch] = w
        now = pitches(s)
        assert set(now) == set(before)
        for (part, k), c in now.items():
            want = before[(part, k)] + wheel_cents(wheels[part])
            assert c == pytest.approx(want, abs=TOL), (part, k, wheels)
        assert s.bend[e.config.mpe_manager()] == 0          # the manager stays centred
    assert not s.problems
    # a note struck while its part's wheel is moved gets that wheel too, the other part's not
    play(e, s, 1.2, [ON(67, 0)], tag=0)
    play(e, s, 1.21, [ON(76, 1)], tag=1)
    s.feed(e.tick(1.5))
    now = pitches(s)
    if adaptive is None:
        assert now[(0, 67)] == pytest.approx(MEANTONE[67] + wheel_cents(2000), abs=TOL)
        assert now[(1, 76)] == pytest.approx(MEANTONE[76] + wheel_cents(-8192), abs=TOL)
    else:   # adaptive: the tuning is the solver's (within 30 c of 12-EDO, from memory: just
        # intervals lie within about 20 c of 12-EDO); the wheels (+49 c, -200 c) tell them apart
        assert now[(0, 67)] - 6700 - wheel_cents(2000) == pytest.approx(0, abs=30)
        assert now[(1, 76)] - 7600 - wheel_cents(-8192) == pytest.approx(0, abs=30)


def test_a_wheel_beyond_the_members_range_widens_it():
    # input channel 2 sets its wheel to span 60 semitones (RPN 0) and bends all the way up:
    # more than the members' 48; the members' range is widened (RPN 0 again), nothing clamped
    e = Engine(load_profile("meantone-quarter"), EngineConfig(mode="mpe"))
    s = SynthModel(mpe_manager=e.config.mpe_manager())
    s.feed(e.start(0.0))
    play(e, s, 0.0, RPN0(60, 1) + [ON(60, 0), ON(64, 1)], tag=None)
    play(e, s, 0.1, [WHEEL(8191, 1)], tag=None)
    by_key = {v.key: s.pitch(c, v) for c, v in s.sounding()}
    step = max(s.range[c] for c, _ in s.sounding()) / 16384
    assert by_key[60] == pytest.approx(MEANTONE[60], abs=2 * step)
    assert by_key[64] == pytest.approx(MEANTONE[64] + wheel_cents(8191, 60), abs=2 * step)
    assert e.stats["range_widenings"] == 1 and e.stats["wheel_clamps"] == 0
    assert s.bend[0] == 0


def test_convert_two_parts_each_wheel_in_its_own_zone(tmp_path):
    # a file of two parts: each gets a zone of its own (lower: manager 1, upper: manager 16);
    # the first part's wheel dips, then the second part's swells, while both hold a chord
    ev = note_events([(0.1, 3.0, 0, k, 80) for k in (48, 55, 64)] + [(0.1, 3.0, 1, k, 80) for k in (67, 72)])
    wheels = {0: [(0.4 + 0.02 * i, -int(5000 * i / 20)) for i in range(21)],
              1: [(1.0 + 0.05 * i, int(8191 * i / 20)) for i in range(21)]}
    for part, gesture in wheels.items():
        ev += [(t, WHEEL(w, part)) for t, w in gesture]
    src = write_midi(tmp_path / "two.mid", ev)
    opts = ConvertOptions(tuning=load_profile("meantone-quarter"), config=EngineConfig(mode="mpe"))
    res = convert_file(src, tmp_path / "out.mid", opts)
    assert len(res.outputs) == 1
    zones = {0: SynthModel(mpe_manager=0), 15: SynthModel(mpe_manager=15)}
    part_of_zone = {0: 0, 15: 1}                # the first part in the lower zone
    # the output's messages grouped by time (the file's events at one tick arrive together)
    groups: list[tuple[float, list]] = []
    t = 0.0
    for msg in mido.MidiFile(res.outputs[0].path):
        t += msg.time
        if msg.is_meta or not hasattr(msg, "channel"):
            continue
        if not groups or abs(groups[-1][0] - t) > 1e-9:
            groups.append((t, []))
        groups[-1][1].append(msg.copy(time=0))
    checked = 0
    wheel_now = {0: 0, 1: 0}
    for t, msgs in groups:
        for msg in msgs:
            zones[0 if msg.channel <= 7 else 15].one(msg)
        for part, gesture in wheels.items():
            while gesture and gesture[0][0] <= t + 1e-3:
                wheel_now[part] = gesture.pop(0)[1]
        for z, s in zones.items():
            for c, v in s.sounding():
                w = wheel_now[part_of_zone[z]]
                assert s.pitch(c, v) == pytest.approx(MEANTONE[v.key] + wheel_cents(w), abs=TOL_ONE_PART), \
                    (t, z, v.key)
                checked += 1
            # the zone's one part: its wheel on the manager (at 2 semitones, as the input's)
            assert s.bend[z] == wheel_now[part_of_zone[z]]
    assert checked > 100
    assert not zones[0].problems and not zones[15].problems
    # the measures take each part's wheel off as its manager carries it: no motion, and the
    # worst error against profile + wheel within the tuning's half step
    rep = build_report(res, opts)              # one output file: its figures at the top
    assert rep["motion_cents_per_note"] == pytest.approx(0.0, abs=1e-9)
    assert rep["worst_pitch_error_cents"] <= HALF_STEP_48 + 1e-9


def test_one_keyboard_wheel_on_the_manager_then_per_note_when_a_second_plays(caplog):
    # live: one input channel plays, its wheel on the manager; a second input channel joins the
    # zone: the first part's notes keep their pitch (within one member step) and from then on
    # each part's wheel is in its own notes' member bends, the manager centred
    e = Engine(load_profile("meantone-quarter"), EngineConfig(mode="mpe"))
    m = e.config.mpe_manager()
    s = SynthModel(mpe_manager=m)
    s.feed(e.start(0.0))
    play(e, s, 0.0, [ON(60, 0), ON(64, 0)], tag=0)
    play(e, s, 0.1, [WHEEL(3000, 0)], tag=None)
    assert s.bend[m] == 3000                     # manager range 2 = the input's: the value itself
    for (part, k), c in pitches(s).items():
        assert c == pytest.approx(MEANTONE[k] + wheel_cents(3000), abs=TOL_ONE_PART), k
    before = pitches(s)
    with caplog.at_level("DEBUG", logger="retuner.engine.outputs.mpe"):
        play(e, s, 0.2, [ON(67, 1)], tag=1)
    assert any("second input channel" in r.getMessage() for r in caplog.records)
    assert s.bend[m] == 0
    now = pitches(s)
    for key, c in before.items():
        assert now[key] == pytest.approx(c, abs=2 * HALF_STEP_48), key
    assert now[(1, 67)] == pytest.approx(MEANTONE[67], abs=HALF_STEP_48)
    play(e, s, 0.3, [WHEEL(-6000, 1)], tag=None)
    now = pitches(s)
    for (part, k), c in now.items():
        w = 3000 if part == 0 else -6000
        assert c == pytest.approx(MEANTONE[k] + wheel_cents(w), abs=TOL), (part, k)
    assert s.bend[m] == 0 and not s.problems


def test_a_wheel_beyond_the_managers_range_goes_to_the_members():
    # one part whose wheel spans 12 semitones (its RPN 0): beyond the manager's 2, the wheel
    # goes to the members' bends (48 semitones), the manager centred
    e = Engine(load_profile("meantone-quarter"), EngineConfig(mode="mpe"))
    m = e.config.mpe_manager()
    s = SynthModel(mpe_manager=m)
    s.feed(e.start(0.0))
    play(e, s, 0.0, RPN0(12, 0) + [ON(60, 0), ON(67, 0)], tag=0)
    play(e, s, 0.1, [WHEEL(1000, 0)], tag=None)          # 146 c: the manager holds it
    assert s.bend[m] == round(1000 * 1200 / 200)
    play(e, s, 0.2, [WHEEL(4096, 0)], tag=None)          # 600 c: beyond the manager's 200
    assert s.bend[m] == 0
    for (part, k), c in pitches(s).items():
        assert c == pytest.approx(MEANTONE[k] + wheel_cents(4096, 12), abs=TOL), k
    assert not s.problems


def widest_range(path) -> float:
    """The widest pitch bend range (semitones) a file sets with RPN 0 (MIDI 1.0: CC101/100 = 0/0,
    then data entry CC6), the General MIDI default 2 if none."""
    sel, widest = {}, 2.0
    for m in mido.MidiFile(str(path)):
        if m.type == "control_change":
            if m.control in (101, 100):
                sel[(m.channel, m.control)] = m.value
            elif m.control == 6 and sel.get((m.channel, 101)) == 0 and sel.get((m.channel, 100)) == 0:
                widest = max(widest, float(m.value))
    return widest


@pytest.mark.parametrize("mode", ["pool", "mpe"])
def test_merged_parts_each_wheel_is_expression_not_error(tmp_path, mode):
    """--merge-parts: two parts share one pool (or one MPE zone), so an output channel plays
    one part's note now and the other's later. The measures trace each note to its part and
    take that part's wheel off: the report of a file with two wheel gestures then says what
    the tuning does (no motion, worst error within the bend steps), as without the gestures;
    before, the wheels counted as tens of cents of error and motion."""
    notes = [(0.1 + 0.5 * i, 0.5 + 0.5 * i, 0, k, 80) for i, k in enumerate((60, 62, 64, 65, 67, 69))]
    notes += [(0.1 + 1.0 * i, 1.05 + 1.0 * i, 1, k, 80) for i, k in enumerate((48, 43, 45))]
    plain = note_events(notes)
    bent = list(plain) + [(0.0, m) for m in RPN0(12, 1)]                           # the bass bends over 12 semitones
    bent += [(0.3 + 0.02 * i, WHEEL(int(6000 * i / 20), 0)) for i in range(21)]
    bent += [(1.3 + 0.05 * i, WHEEL(-int(4096 * i / 20), 1)) for i in range(21)]
    opts = ConvertOptions(tuning=load_profile("meantone-quarter"), config=EngineConfig(mode=mode),
                          merge_parts=True)
    reps = []
    for name, ev in (("plain", plain), ("bent", bent)):
        src = write_midi(tmp_path / f"{name}.mid", ev)
        reps.append(build_report(convert_file(src, tmp_path / f"{name}-out.mid", opts), opts))
    plain_rep, bent_rep = reps
    # the tuning's share and the wheel's, each within half a step of the widest range sent
    tol = 2 * widest_range(tmp_path / "bent-out.mid") * 100.0 / 16384
    assert bent_rep["wheel_clamps"] == 0
    assert bent_rep["motion_cents_per_note"] == pytest.approx(plain_rep["motion_cents_per_note"], abs=0.01)
    assert bent_rep["worst_pitch_error_cents"] <= tol
    assert bent_rep["impurity_cents"] == pytest.approx(plain_rep["impurity_cents"], abs=0.05)
