"""In MPE mode, adaptive tuning tunes a file's parts together as one harmony, each part in a zone of
its own (its program, controllers, pedals and wheel on the zone's manager channel, its notes on the
zone's members).

The data: a four-part chorale of our own in G major (a string quartet, one voice per channel, GM
programs violin 40, viola 41, cello 42, contrabass 43; each part at a velocity of its own, so a
note in the output tells its part), with drums on channel 10 and, in the two-part piece, a GM
System On in the middle.

Checks, against sources outside retuner:
* the MPE Configuration Message (RPN 6 on the manager channel, channel 1 for the lower zone and
  16 for the upper, data entry = member count) and RPN 0 on the members (MPE specification, The
  MIDI Association, 2018), decoded by the synth model of tests/synthmodel.py, which learns the
  zones from that message as an MPE synth does; a member's note sounds with its zone manager's
  program (MPE specification 2018: manager-channel messages apply to the whole zone);
* every note the engine sounds, at every step, decoded by that model at the pitch the engine
  meant (within half a member bend step at 48 semitones, 4800/16384 c), and the files written
  hold exactly those messages (each on its own port's file);
* impurity of the whole harmony (retuner.measure.metrics through the report: consonant pairs
  against 6/5, 5/4, 4/3, 3/2, 8/5, 5/3 and octaves) at most 1 c, against 12-EDO's several cents
  (its thirds and sixths lie 14 to 16 c from just: common practice) and ``--parts-apart``;
* drums byte for byte (MIDI 1.0: channel 10 passes through), in the first file only.
"""

from __future__ import annotations

import subprocess
import sys

import mido
import pytest

from retuner.adaptive.solver import AdaptiveConfig
from retuner.convert import conversion
from retuner.convert.conversion import ConvertOptions, convert_file
from retuner.engine.core import EngineConfig
from retuner.measure import report
from retuner.pitch.tuning import Tuning
from synth import note_events, write_midi
from synthmodel import SynthModel

PROGRAMS = {0: 40, 1: 41, 2: 42, 3: 43}            # violin, viola, cello, contrabass
VELOCITY = {0: 71, 1: 72, 2: 73, 3: 74}
PART_OF_VELOCITY = {v: p for p, v in VELOCITY.items()}
# (soprano, alto, tenor, bass) per chord, G major: I IV V I vi ii V I
CHORDS = [(74, 71, 67, 43), (76, 72, 67, 48), (74, 69, 66, 50), (74, 71, 67, 43),
          (71, 67, 64, 52), (72, 69, 64, 45), (69, 66, 62, 50), (71, 67, 62, 43)]
BEAT = 0.75
GM_ON = mido.Message("sysex", data=[0x7E, 0x7F, 0x09, 0x01])      # GM System On (GM 1, MMA 1991)
HALF_MEMBER_STEP = 4800 / 16384 + 1e-9


def chorale(path, parts=(0, 1, 2, 3), reset_at=None, bass_wheel=False):
    ev = [(0.0, mido.Message("program_change", channel=p, program=PROGRAMS[p])) for p in parts]
    if bass_wheel:
        # the bass bends its third note up a semitone (half of the default 2-semitone wheel
        # range: 4096 of 8192, MIDI 1.0) and back
        ev += [(0.2 + BEAT * 2 + 0.2, mido.Message("pitchwheel", channel=3, pitch=4096)),
               (0.2 + BEAT * 2 + 0.5, mido.Message("pitchwheel", channel=3, pitch=0))]
    notes = []
    for i, chord in enumerate(CHORDS):
        for p in parts:
            notes.append((0.2 + BEAT * i, 0.2 + BEAT * i + 0.72, p, chord[p], VELOCITY[p]))
        notes.append((0.2 + BEAT * i, 0.3 + BEAT * i, 9, 36 if i % 2 == 0 else 38, 100))   # drums
    if reset_at is not None:
        # the synth is reset between two chords; the programs come again after it
        t = 0.2 + BEAT * reset_at - 0.01
        ev.append((t - 0.01, GM_ON))
        ev += [(t, mido.Message("program_change", channel=p, program=PROGRAMS[p])) for p in parts]
    return write_midi(path, ev + note_events(notes))


class Recorder:
    """An engine as the converter drives it, recording every answer and what then sounds."""

    def __init__(self, engine, log):
        self.engine = engine
        self.log = log

    def __getattr__(self, name):
        return getattr(self.engine, name)

    def _rec(self, out):
        self.log.append((list(out), self.engine.sounding()))
        return out

    def start(self, t):
        return self._rec(self.engine.start(t))

    def feed(self, t, msg):
        return self._rec(self.engine.feed(t, msg))

    def tick(self, t):
        return self._rec(self.engine.tick(t))

    def synth_reset(self, t):
        self.log.append(("reset", None))
        return self._rec(self.engine.synth_reset(t))


def convert(tmp_path, src, name, monkeypatch=None, **kw):
    logs = []
    if monkeypatch is not None:
        make = conversion._make_engine

        def recording(tuning, config, plan=None):
            logs.append([])
            return Recorder(make(tuning, config, plan), logs[-1])

        monkeypatch.setattr(conversion, "_make_engine", recording)
    adaptive = kw.pop("adaptive", True)
    opts = ConvertOptions(tuning=Tuning.equal12(),
                          config=EngineConfig(mode="mpe", adaptive=AdaptiveConfig() if adaptive else None), **kw)
    res = convert_file(src, tmp_path / name, opts)
    if monkeypatch is not None:
        monkeypatch.undo()
    return res, report.build_report(res, opts), logs


def on_port(m):
    """(port, message on channel 0..15): output channel 16 k + c is channel c of file k."""
    d = {k: v for k, v in vars(m).items() if k != "type"}
    d["channel"] = m.channel & 15
    return m.channel >> 4, mido.Message(m.type, **d)


def replay(log, ports):
    """Feed what the engine answered to one zone-learning synth model per port (a GM System On
    where the file reset the synth); after every answer each note the engine says is sounding
    must sound there, at the pitch the engine meant, with its part's program. Returns the
    messages per port."""
    synths = [SynthModel(zones=True) for _ in range(ports)]
    sent = [[] for _ in range(ports)]
    for out, sounding in log:
        if out == "reset":
            for s in synths:
                s.one(GM_ON)
            continue
        for m in out:
            k, msg = on_port(m)
            synths[k].one(msg)
            sent[k].append(msg)
        for n in sounding:
            k, c = n["channel"] >> 4, n["channel"] & 15
            s = synths[k]
            vs = [v for v in s.voices[c] if v.key == n["out_key"]]
            assert vs, n
            assert abs(s.pitch(c, vs[0]) - n["cents"]) <= HALF_MEMBER_STEP, n
            assert vs[0].program[2] == PROGRAMS[n["in_channel"]], n
    for s in synths:
        assert s.problems == []
    return sent, synths


def file_messages(path):
    """The channel messages of a written file in order, drums left out; the drums apart."""
    mine, drums = [], []
    tick = 0
    for m in mido.MidiFile(path).tracks[0]:
        tick += m.time
        if m.is_meta or m.type == "sysex":
            continue
        (drums if m.channel == 9 else mine).append((tick, m) if m.channel == 9 else m)
    return mine, [(t, bytes(m.bytes())) for t, m in drums]


def programs_per_note(path):
    """Every note-on of a written file with the program it sounds with, decoded by the zone-learning
    synth model: [(part told by the velocity, program)]."""
    s = SynthModel(zones=True)
    out = []
    for m in mido.MidiFile(path).tracks[0]:
        if m.is_meta:
            continue
        s.one(m)
        if m.type == "note_on" and m.velocity and m.channel != 9:
            out.append((PART_OF_VELOCITY[m.velocity], s.voices[m.channel][-1].program[2]))
    return out, s


def test_four_parts_in_mpe_are_one_harmony_each_in_a_zone_of_its_own(tmp_path, monkeypatch):
    src = chorale(tmp_path / "quartet.mid")
    res, rep, logs = convert(tmp_path, src, "mpe.mid", monkeypatch)
    # one engine plays all four parts: two zones a port, so two files
    assert len(logs) == 1 and len(res.outputs) == 2 and res.one_harmony
    assert [o.parts for o in res.outputs] == [[0, 1], [2, 3]]
    assert rep["parts_tuned"] == "together" and "parts_apart_why" not in rep
    text = report.text_summary(rep)
    assert "parts tuned together as one harmony" in text and "parts tuned apart" not in text
    # the whole harmony (both files sounding together) within 1 c of just; 12-EDO and the parts
    # tuned apart (each part alone is a melody) several cents off
    _, edo, _ = convert(tmp_path, src, "edo.mid", adaptive=False)
    _, apart, _ = convert(tmp_path, src, "apart.mid", parts_apart=True)
    assert apart["parts_tuned"] == "apart"
    assert rep["impurity_cents"] <= 1.0
    assert edo["impurity_cents"] > 5.0 and apart["impurity_cents"] > 5.0
    assert rep["impurity_cents"] < apart["impurity_cents"] - 4.0
    assert rep["steals"] == 0
    # every note at the pitch the engine meant, with its part's program; the files hold exactly
    # what the engine sent, each port's messages in its own file
    sent, _ = replay(logs[0], 2)
    for k, o in enumerate(res.outputs):
        mine, drums = file_messages(o.path)
        assert [bytes(m.bytes()) for m in mine] == [bytes(m.bytes()) for m in sent[k]]
        # drums byte for byte, at their ticks, in the first file only (the files sound together)
        assert drums == (file_messages(src)[1] if k == 0 else []) and file_messages(src)[1]
        notes, synth = programs_per_note(o.path)
        assert sorted({p for p, _ in notes}) == o.parts
        assert len(notes) == len(CHORDS) * 2
        assert all(prog == PROGRAMS[p] for p, prog in notes)
        # file 1: lower zone for its first part, upper zone for its second
        first, second = o.parts
        lower = [c for c in range(16) if synth.manager_of[c] == 0 and c != 0]
        upper = [c for c in range(16) if synth.manager_of[c] == 15 and c != 15]
        assert set(o.channels[first]) <= set(lower) and set(o.channels[second]) <= set(upper)
        assert 9 not in lower + upper


def test_two_parts_one_engine_both_zones_set_up_again_after_a_gm_reset(tmp_path, monkeypatch):
    src = chorale(tmp_path / "duo.mid", parts=(0, 3), reset_at=4)
    res, rep, logs = convert(tmp_path, src, "duo-out.mid", monkeypatch)
    assert len(logs) == 1 and len(res.outputs) == 1 and res.one_harmony and res.outputs[0].engines == 1
    out = res.outputs[0]
    mine, drums = file_messages(out.path)
    assert drums == file_messages(src)[1]
    sent, _ = replay(logs[0], 1)
    assert [bytes(m.bytes()) for m in mine] == [bytes(m.bytes()) for m in sent[0]]
    # the set-up at the start and again right after the reset: MPE Configuration Message on
    # both managers (lower zone 7 members 2..8; upper zone 5 members 15..11, stopping short of
    # the drums on channel 10), RPN 0 = 48 semitones on every member, 2 on the managers
    stream = mido.MidiFile(out.path).tracks[0]
    msgs = [m for m in stream if not m.is_meta]
    resets = [i for i, m in enumerate(msgs) if m.type == "sysex"]
    assert len(resets) == 1
    for part in (msgs[:resets[0]], msgs[resets[0] + 1:]):
        s = SynthModel(zones=True)
        first_note = next(i for i, m in enumerate(part) if m.type == "note_on" and m.channel != 9)
        for m in part[:first_note]:
            s.one(m)
        assert [c for c in range(16) if s.manager_of[c] == 0] == list(range(0, 8))
        assert [c for c in range(16) if s.manager_of[c] == 15] == list(range(10, 16))
        for c in range(1, 8):
            assert s.range[c] == 4800.0
        for c in range(10, 15):
            assert s.range[c] == 4800.0
        assert s.range[0] == s.range[15] == 200.0
        cc = [(m.channel, m.control, m.value) for m in part[:first_note] if m.type == "control_change"]
        for manager, members in ((0, 7), (15, 5)):
            k = cc.index((manager, 100, 6))
            assert cc[k - 1] == (manager, 101, 0) and cc[k + 1] == (manager, 6, members)
        for c in list(range(1, 8)) + list(range(10, 15)):
            k = cc.index((c, 100, 0))
            assert cc[k - 1] == (c, 101, 0) and cc[k + 1] == (c, 6, 48)
    # the soprano in the lower zone, the bass in the upper; each with its program
    notes, _ = programs_per_note(out.path)
    assert len(notes) == 2 * len(CHORDS) and all(prog == PROGRAMS[p] for p, prog in notes)
    assert set(out.channels[0]) <= set(range(1, 8)) and set(out.channels[3]) <= set(range(10, 15))
    assert rep["impurity_cents"] <= 1.0


def test_parts_apart_keep_an_engine_each(tmp_path, monkeypatch):
    src = chorale(tmp_path / "quartet.mid")
    res, rep, logs = convert(tmp_path, src, "apart.mid", monkeypatch, parts_apart=True)
    assert len(logs) == 4 and not res.one_harmony and rep["parts_tuned"] == "apart"
    assert "parts_apart_why" not in rep


@pytest.mark.parametrize("how", ["live", "lookahead"])
def test_live_and_lookahead_play_the_mpe_parts_as_one_harmony(tmp_path, how):
    """``--live`` (a chord window, as the daemon) and ``--lookahead`` (the plan as the solver):
    one engine for the four parts, within 1 c of just; every note-on at its input tick."""
    src = chorale(tmp_path / "quartet.mid")
    acfg = AdaptiveConfig(chord_window=0.03) if how == "live" else AdaptiveConfig()
    opts = ConvertOptions(tuning=Tuning.equal12(), config=EngineConfig(mode="mpe", adaptive=acfg),
                          **{how: True})
    res = convert_file(src, tmp_path / f"{how}.mid", opts)
    rep = report.build_report(res, opts)
    assert res.one_harmony and len(res.outputs) == 2 and rep["parts_tuned"] == "together"
    assert rep["impurity_cents"] <= 1.0
    ticks_in = {}
    tick = 0
    for m in mido.MidiFile(src).tracks[0]:
        tick += m.time
        if m.type == "note_on" and m.velocity and m.channel != 9:
            ticks_in.setdefault(m.channel, []).append(tick)
    for o in res.outputs:
        notes, _ = programs_per_note(o.path)
        assert all(prog == PROGRAMS[p] for p, prog in notes)
        tick = 0
        ticks_out = {}
        for m in mido.MidiFile(o.path).tracks[0]:
            tick += m.time
            if m.type == "note_on" and m.velocity and m.channel != 9:
                ticks_out.setdefault(PART_OF_VELOCITY[m.velocity], []).append(tick)
        delay = 0 if how == "lookahead" else round(0.03 * 2 * 960)      # the window, in ticks (120 bpm)
        for p in o.parts:
            assert len(ticks_out[p]) == len(ticks_in[p])
            assert all(0 <= b - a <= delay for a, b in zip(ticks_in[p], ticks_out[p]))


def test_a_parts_wheel_goes_to_its_own_zones_manager_and_is_no_tuning_motion(tmp_path):
    """MPE specification 2018: a bend on the manager channel applies to every note of its zone. The
    bass (part 4, the upper zone of the second file) bends with its own wheel: the bend goes to
    that zone's manager (channel 16) alone, and the report counts it as the player's expression,
    not as motion or drift of the tuning."""
    src = chorale(tmp_path / "quartet.mid", bass_wheel=True)
    res, rep, _ = convert(tmp_path, src, "wheel.mid")
    assert res.one_harmony and [o.parts for o in res.outputs] == [[0, 1], [2, 3]]
    wheels = [[(m.channel, m.pitch) for m in mido.MidiFile(o.path).tracks[0] if m.type == "pitchwheel"
               and m.channel in (0, 15)] for o in res.outputs]
    assert all(p == 0 for _, p in wheels[0])               # the first file's managers stay centred
    assert (15, 4096) in wheels[1] and wheels[1][-1] == (15, 0) and all(c == 15 for c, p in wheels[1] if p)
    second = rep["files"][1]
    assert second["late_motion_cents_per_note"] < 1.0 and second["drift_max_cents"] < 6.0
    assert rep["impurity_cents"] <= 1.0


def test_three_parts_the_third_alone_in_the_second_file_still_one_harmony(tmp_path, monkeypatch):
    src = chorale(tmp_path / "trio.mid", parts=(0, 1, 3))
    res, rep, logs = convert(tmp_path, src, "trio-out.mid", monkeypatch)
    assert len(logs) == 1 and res.one_harmony and [o.parts for o in res.outputs] == [[0, 1], [3]]
    sent, synths = replay(logs[0], 2)
    for k, o in enumerate(res.outputs):
        assert [bytes(m.bytes()) for m in file_messages(o.path)[0]] == [bytes(m.bytes()) for m in sent[k]]
    # the second file: the bass alone in a lower zone (members 2..8)
    assert [c for c in range(16) if synths[1].manager_of[c] == 0] == list(range(0, 8))
    assert not any(synths[1].manager_of[c] == 15 for c in range(16))
    assert set(res.outputs[1].channels[3]) <= set(range(1, 8))
    assert rep["impurity_cents"] <= 1.0


def test_the_command_line_says_the_files_are_one_harmony(tmp_path):
    src = chorale(tmp_path / "quartet.mid")
    r = subprocess.run([sys.executable, "-m", "retuner", "convert", str(src), "-o", str(tmp_path / "o.mid"),
                        "--mode", "mpe", "--adaptive", "-q"], capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    assert "o-part1.mid, o-part2.mid" in r.stderr and "tuned as one harmony" in r.stderr
    r = subprocess.run([sys.executable, "-m", "retuner", "convert", str(src), "-o", str(tmp_path / "a.mid"),
                        "--mode", "mpe", "--adaptive", "--parts-apart", "-q"], capture_output=True, text=True,
                       timeout=120)
    assert r.returncode == 0 and "a-part1.mid" in r.stderr and "one harmony" not in r.stderr
