"""The player's wheel is kept: its own bend range, its full travel, its own channel's notes.

The output is decoded here as a synth hears it, from the MIDI 1.0 Detailed Specification:
14-bit pitch bend centred on 8192, scaled by the channel's pitch bend sensitivity (RPN 0:
CC101 = 0, CC100 = 0, data entry CC6 = semitones, CC38 = cents; 2 semitones until set), so a
note on key k sounds at ``100*k + bend/8192*range`` cents. The player's wheel is read the same
way: the input's own RPN 0 sets the range its wheel spans (2 semitones by default).

Targets: quarter-comma meantone from its definition (fifth 5^(1/4), so the major third C-E is
the pure 5/4; J. Murray Barbour, Tuning and Temperament, 1951); just intervals 5/4 and 3/2.
"""

from __future__ import annotations

import logging
import math

import mido
import pytest

from retuner.adaptive.solver import AdaptiveConfig
from retuner.convert.conversion import ConvertOptions, convert_file
from retuner.engine.core import Engine, EngineConfig
from retuner.measure import report
from retuner.profiles.profile import load_profile
from synth import note_events, write_midi

FIFTH_MEANTONE = 1200 * math.log2(5 ** 0.25)      # 696.578 c
THIRD_PURE = 1200 * math.log2(5 / 4)              # 386.314 c
FIFTH_PURE = 1200 * math.log2(3 / 2)              # 701.955 c


def ON(k, ch=0):
    return mido.Message("note_on", channel=ch, note=k, velocity=90)


def WHEEL(p, ch=0):
    return mido.Message("pitchwheel", channel=ch, pitch=p)


def CC(c, v, ch=0):
    return mido.Message("control_change", channel=ch, control=c, value=v)


def RPN0(semis, ch=0):
    return [CC(101, 0, ch), CC(100, 0, ch), CC(6, semis, ch), CC(38, 0, ch)]


class Synth:
    """Pitch as a synth hears it (see the module docstring)."""

    def __init__(self):
        self.range = [200.0] * 16
        self.bend = [0] * 16
        self.rpn = [(127, 127)] * 16
        self.sounding: dict[tuple[int, int], int] = {}     # (channel, key) -> input tag

    def feed(self, msgs, tag=0):
        for m in msgs:
            if not hasattr(m, "channel"):
                continue
            c = m.channel
            if m.type == "note_on" and m.velocity:
                self.sounding[(c, m.note)] = tag
            elif m.type in ("note_on", "note_off"):
                self.sounding.pop((c, m.note), None)
            elif m.type == "pitchwheel":
                self.bend[c] = m.pitch
            elif m.type == "control_change":
                if m.control == 101:
                    self.rpn[c] = (m.value, self.rpn[c][1])
                elif m.control == 100:
                    self.rpn[c] = (self.rpn[c][0], m.value)
                elif m.control == 6 and self.rpn[c] == (0, 0):
                    self.range[c] = 100.0 * m.value
                elif m.control == 38 and self.rpn[c] == (0, 0):
                    self.range[c] = 100.0 * (self.range[c] // 100) + m.value

    def pitches(self, tag=None):
        """{key: cents} of the sounding notes (of one input tag)."""
        return {k: 100.0 * k + self.bend[c] / 8192.0 * self.range[c]
                for (c, k), tg in self.sounding.items() if tag is None or tg == tag}

    def step(self):
        return max(self.range[c] for c, _ in self.sounding) / 8192.0


def run(e, s, t, msgs, tag=0):
    for m in msgs:
        s.feed(e.feed(t, m), tag)


@pytest.mark.parametrize("up", [8191, -8192])
def test_full_wheel_keeps_a_tempered_triad(up):
    # the defaults: output range 2 semitones, wheel range 2; C is +10.3 c in meantone
    tu = load_profile("meantone-quarter")
    e, s = Engine(tu, EngineConfig()), Synth()
    s.feed(e.start(0.0))
    run(e, s, 0.0, [ON(60), ON(64), ON(67)])
    run(e, s, 0.1, [WHEEL(up)])
    p = s.pitches()
    tol = 2 * s.step()
    assert p[64] - p[60] == pytest.approx(THIRD_PURE, abs=tol)         # pure third kept
    assert p[67] - p[60] == pytest.approx(FIFTH_MEANTONE, abs=tol)     # tempered fifth kept
    assert p[60] - tu.cents[60] == pytest.approx(up / 8192 * 200.0, abs=tol)   # the full wheel
    assert e.stats["wheel_clamps"] == 0


def test_full_wheel_keeps_a_just_triad_in_adaptive_mode():
    tu = load_profile("meantone-quarter")
    e, s = Engine(tu, EngineConfig(adaptive=AdaptiveConfig())), Synth()
    s.feed(e.start(0.0))
    run(e, s, 0.0, [ON(60), ON(64), ON(67)])
    for d in (0.2, 0.4):
        s.feed(e.tick(d))
    run(e, s, 0.5, [WHEEL(8191)])
    p = s.pitches()
    tol = 2 * s.step() + 0.5
    assert p[64] - p[60] == pytest.approx(THIRD_PURE, abs=tol)
    assert p[67] - p[60] == pytest.approx(FIFTH_PURE, abs=tol)


@pytest.mark.parametrize("adaptive", [None, AdaptiveConfig()], ids=["static", "adaptive"])
def test_a_wheel_bends_only_its_own_channel(adaptive):
    tu = load_profile("meantone-quarter")
    e, s = Engine(tu, EngineConfig(adaptive=adaptive)), Synth()
    s.feed(e.start(0.0))
    run(e, s, 0.0, [ON(60, 0), ON(67, 0)], tag=0)
    run(e, s, 0.0, [ON(64, 1), ON(72, 1)], tag=1)       # 72: same bend as 60 in meantone
    s.feed(e.tick(0.3))
    before, before1 = s.pitches(0), s.pitches(1)
    run(e, s, 0.5, [WHEEL(4096, 1)])                    # input channel 2: half its wheel
    assert s.pitches(0) == pytest.approx(before, abs=1e-9)           # channel 1's notes stay
    after = s.pitches(1)
    for k in (64, 72):
        assert after[k] - before1[k] == pytest.approx(100.0, abs=2 * s.step())


def test_file_with_its_own_bend_range_bends_all_the_way(tmp_path):
    # a part sets RPN 0 = 12 semitones and bends +6 semitones (wheel at 4096 of 8192)
    ev = [(0.0, m) for m in RPN0(12)]
    ev += note_events([(0.1, 1.0, 0, 57, 90)])
    ev += [(0.5, WHEEL(4096))]
    src = write_midi(tmp_path / "in.mid", ev)
    out = tmp_path / "out.mid"
    tu = load_profile("meantone-quarter")
    opts = ConvertOptions(tuning=tu, config=EngineConfig())
    res = convert_file(src, out, opts)
    summary = report.text_summary(report.build_report(res, opts))
    assert "bend range was widened 1 time" in summary
    s = Synth()
    seen = []
    for m in mido.MidiFile(str(out)):
        s.feed([m])
        if s.sounding:
            seen.append((s.pitches()[57], s.step()))
    assert seen[0][0] == pytest.approx(tu.cents[57], abs=seen[0][1])
    assert seen[-1][0] - tu.cents[57] == pytest.approx(600.0, abs=2 * seen[-1][1])     # not +200


def test_a_clamp_that_cannot_be_avoided_is_counted_and_said_once(caplog):
    # the input's wheel spans 127 semitones: the output range cannot be any wider
    tu = load_profile("meantone-quarter")
    e, s = Engine(tu, EngineConfig()), Synth()
    s.feed(e.start(0.0))
    run(e, s, 0.0, RPN0(127) + [ON(60)])                # C: +10.3 c
    with caplog.at_level(logging.WARNING):
        run(e, s, 0.1, [WHEEL(8191)])
        run(e, s, 0.2, [WHEEL(8100), WHEEL(8191)])
    assert e.stats["wheel_clamps"] >= 2
    assert sum("cut short" in r.getMessage() for r in caplog.records) == 1
