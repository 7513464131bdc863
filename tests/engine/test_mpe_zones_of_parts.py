"""One engine, each part (input channel) in an MPE zone of its own (``EngineConfig.part_zones``, as
file conversion sets it): each zone a pedal and controller domain of its own.

Decoded by the synth model of tests/synthmodel.py, which learns the zones from the MPE
Configuration Message (MPE specification, The MIDI Association, 2018: RPN 6 on the manager, channel
1 for the lower zone and 16 for the upper; messages on the manager channel, pedals and program
included, apply to every note of its zone; a member channel's own all-notes-off to its notes)."""

from __future__ import annotations

import mido
import pytest

from retuner.engine.core import Engine, EngineConfig
from retuner.errors import RetunerError
from retuner.pitch.tuning import Tuning
from keyboard import CC, OFF, ON
from synthmodel import SynthModel

LOWER = (0, 0, (1, 2, 3, 4, 5, 6, 7))
UPPER = (1, 15, (14, 13, 12, 11, 10))


def engine():
    return Engine(Tuning.equal12(), EngineConfig(mode="mpe", part_zones=(LOWER, UPPER)))


def play(e, synth, events):
    for t, m in events:
        synth.feed(e.feed(t, m))


def keys_sounding(synth, channels):
    return sorted(v.key for c in channels for v in synth.voices[c])


def test_each_part_has_its_zone_its_program_and_its_pedal():
    e = engine()
    s = SynthModel(zones=True)
    s.feed(e.start(0.0))
    assert [c for c in range(16) if s.manager_of[c] == 0] == list(range(0, 8))
    assert [c for c in range(16) if s.manager_of[c] == 15] == list(range(10, 16))
    play(e, s, [(0.0, mido.Message("program_change", channel=0, program=40)),
                (0.0, mido.Message("program_change", channel=1, program=42)),
                (0.1, CC(64, 127, ch=0)),                    # the first part's sustain pedal
                (0.2, ON(67, 80, ch=0)), (0.2, ON(48, 80, ch=1)),
                (0.5, OFF(67, ch=0)), (0.5, OFF(48, ch=1))])
    assert s.program[0][2] == 40 and s.program[15][2] == 42
    # the first part's note is held by its own pedal, the second part's is not
    assert keys_sounding(s, LOWER[2]) == [67] and keys_sounding(s, UPPER[2]) == []
    assert s.sustain[0] and not s.sustain[15]
    play(e, s, [(0.6, ON(50, 80, ch=1)), (0.7, CC(123, 0, ch=1))])  # the second part's all-notes-off
    assert keys_sounding(s, UPPER[2]) == [] and keys_sounding(s, LOWER[2]) == [67]
    play(e, s, [(0.8, CC(64, 0, ch=0))])
    assert s.count() == 0 and s.problems == []


def test_a_second_port_is_numbered_16_k_plus_c():
    far = (2, 16, (17, 18, 19))
    e = Engine(Tuning.equal12(), EngineConfig(mode="mpe", part_zones=(LOWER, UPPER, far)))
    out = e.start(0.0)
    assert {m.channel for m in out} >= {0, 15, 16, 17, 18, 19}
    assert max(m.channel for m in out) == 19
    # the MPE Configuration Message of the far zone: RPN 6 on channel 1 of the second port
    far_cc = [(m.control, m.value) for m in out if m.channel == 16 and m.type == "control_change"]
    i = far_cc.index((100, 6))
    assert far_cc[i - 1] == (101, 0) and far_cc[i + 1] == (6, 3)
    res = e.feed(0.1, ON(60, 80, ch=2))
    assert [m.channel for m in res if m.type == "note_on"][0] in (17, 18, 19)


@pytest.mark.parametrize("zones", [
    ((0, 3, (1, 2)),),                        # a manager is channel 1 or 16
    ((0, 0, (1, 2)), (1, 15, (2, 14))),       # a member in two zones
    ((0, 0, (1, 17)),),                       # members on another port than their manager
    ((0, 0, ()),),                            # no member
])
def test_zones_that_cannot_be_are_refused(zones):
    with pytest.raises(RetunerError):
        EngineConfig(mode="mpe", part_zones=zones).validate()


def test_a_widened_member_range_reaches_every_zone():
    """The second part sets its own bend range to 48 semitones and 50 cents (RPN 0, MIDI 1.0: data
    entry MSB semitones, LSB cents) and bends its wheel full up while a note sounds: that is beyond
    its zone manager's range (2 semitones), so its zone takes the wheel into the members' bends, and
    beyond the members' 48 semitones, so the members' range is widened. Every member of every zone must hear the new
    range (RPN 0), or the second zone's notes would be decoded at the old one."""
    e = engine()
    s = SynthModel(zones=True)
    s.feed(e.start(0.0))
    play(e, s, [(0.0, CC(101, 0, ch=1)), (0.0, CC(100, 0, ch=1)), (0.0, CC(6, 48, ch=1)),
                (0.0, CC(38, 50, ch=1)),
                (0.1, ON(60, 80, ch=0)), (0.1, ON(48, 80, ch=1)),
                (0.2, mido.Message("pitchwheel", channel=1, pitch=8191))])
    assert e.stats["range_widenings"] >= 1
    (c,) = [c for c in UPPER[2] if s.voices[c]]
    v = s.voices[c][0]
    want = 4800.0 + 4850.0 * 8191 / 8192          # key 48 plus the full wheel at 48.5 semitones
    assert s.pitch(c, v) == pytest.approx(want, abs=0.5)
    assert s.problems == []
