"""MPE and MIDI Tuning Standard output modes of the engine."""

from __future__ import annotations

import mido
import pytest

from retuner.midi import encode as E
from retuner.engine.core import Engine, EngineConfig
from retuner.profiles.profile import load_profile
from retuner.pitch.tuning import Tuning

from keyboard import CC, OFF, ON, WHEEL
from mtsdecode import parse_single_note
from synthmodel import SynthModel


# ---------------------------------------------------------------------------
# MPE
# ---------------------------------------------------------------------------
def mpe(tuning=None, **kw):
    e = Engine(tuning or load_profile("edo31"), EngineConfig(mode="mpe", **kw))
    s = SynthModel(mpe_manager=e.config.mpe_manager())
    s.feed(e.start(0.0))
    return e, s


def rpn_values(out, channel):
    """{(msb, lsb): data entry MSB} set on a channel, read as a receiver would."""
    sel, vals = None, {}
    for m in out:
        if m.type != "control_change" or m.channel != channel:
            continue
        if m.control == 101:
            sel = (m.value, None)
        elif m.control == 100 and sel is not None:
            sel = (sel[0], m.value)
        elif m.control == 6 and sel is not None:
            vals[sel] = m.value
    return vals


def test_mpe_start_lower_zone():
    e = Engine(Tuning.equal12(), EngineConfig(mode="mpe", passthrough=()))
    out = e.start(0.0)
    # MPE specification (The MIDI Association, 2018): the MPE Configuration Message is
    # RPN 6 on the manager channel (channel 1 = lower zone), data entry MSB = member count.
    assert [m.bytes() for m in out[:3]] == [[0xB0, 101, 0], [0xB0, 100, 6], [0xB0, 6, 15]]
    # member channels 2..16 get a pitch bend range of 48 semitones, the manager 2 (RPN 0)
    for c in range(1, 16):
        assert rpn_values(out, c)[(0, 0)] == 48
    assert rpn_values(out, 0)[(0, 0)] == 2


@pytest.mark.parametrize("zone,members,manager", [("lower", list(range(1, 9)), 0),
                                                  ("upper", list(range(14, 9, -1)), 15)])
def test_mpe_default_zone_leaves_drum_channel_outside(zone, members, manager):
    """With the default passthrough channel 10 (drums), the zone stops short of it, so an
    MPE synth never takes drum notes for member notes: lower zone members 2..9, upper 15..11."""
    e = Engine(Tuning.equal12(), EngineConfig(mode="mpe", mpe_zone=zone))
    out = e.start(0.0)
    assert [m.bytes() for m in out[:3]] == [[0xB0 | manager, 101, 0], [0xB0 | manager, 100, 6],
                                           [0xB0 | manager, 6, len(members)]]
    assert [c for c in range(16) if rpn_values(out, c).get((0, 0)) == 48] == sorted(members)
    assert 9 not in e.config.mpe_member_channels()


def test_mpe_start_upper_zone():
    e = Engine(Tuning.equal12(), EngineConfig(mode="mpe", mpe_zone="upper", mpe_members=7))
    out = e.start(0.0)
    assert [m.bytes() for m in out[:3]] == [[0xBF, 101, 0], [0xBF, 100, 6], [0xBF, 6, 7]]
    members = [c for c in range(16) if rpn_values(out, c).get((0, 0)) == 48]
    assert members == list(range(8, 15))      # channels 9..15 (1-based), below the manager 16
    assert rpn_values(out, 15)[(0, 0)] == 2


@pytest.mark.parametrize("profile", ["edo31", "meantone-quarter", "bohlen-pierce"])
def test_mpe_pitches_within_half_step_at_range_48(profile):
    tu = load_profile(profile)
    e, s = mpe(tu)
    for k in tu.mapped_keys():
        s.feed(e.feed(k * 0.01, ON(k)))
        (c, v), = s.last_on
        assert c != 0 and v.key == k                  # on a member, from its own key
        assert abs(s.pitch(c, v) - tu.cents[k]) <= 4800 / 16384 + 1e-9
        s.feed(e.feed(k * 0.01 + 0.005, OFF(k)))
    assert not s.problems


def test_mpe_never_shares_a_member():
    e, s = mpe(load_profile("meantone-quarter"))
    a = e.feed(0.0, ON(60))[-1].channel
    b = e.feed(0.0, ON(72))[-1].channel     # same bend as 60, still its own member
    assert a != b


def test_mpe_zone_messages_on_manager():
    e, s = mpe()
    for m in (CC(64, 127), CC(66, 127), CC(1, 40), CC(7, 100),
              mido.Message("program_change", channel=0, program=5),
              mido.Message("aftertouch", channel=0, value=20)):
        out = e.feed(0.0, m)
        assert [x.channel for x in out] == [0], m
        assert out[0].bytes()[1:] == m.bytes()[1:]
    # the zone holds one part: its wheel goes on the manager channel, whose range (2 semitones)
    # is the input's (2 semitones until set, MIDI 1.0), so the value passes unchanged
    assert e.feed(0.1, WHEEL(1234)) == [WHEEL(1234)]


def test_mpe_poly_pressure_becomes_member_channel_pressure():
    e, s = mpe()
    ch = e.feed(0.0, ON(60))[-1].channel
    out = e.feed(0.1, mido.Message("polytouch", channel=0, note=60, value=77))
    assert out == [E.msg("aftertouch", channel=ch, value=77)]


def test_mpe_wheel_of_the_one_part_on_the_manager():
    tu = load_profile("edo31")
    e, s = mpe(tu)
    out = e.feed(0.0, ON(60)) + e.feed(0.0, ON(64)) + e.feed(0.1, WHEEL(4096))
    s.feed(out)
    # one input channel in the zone: its wheel is the manager's bend, the members carry the tuning
    assert [m for m in out if m.type == "pitchwheel" and m.channel == 0] == [WHEEL(4096)]
    for c, v in s.sounding():
        # half the wheel at range 2 = +100 c (MIDI 1.0 bend); a member's bend plus the manager's
        # (MPE specification 2018): half a step at 48 semitones and half a step at 2
        assert abs(s.pitch(c, v) - (tu.cents[v.key] + 100.0)) <= 4800 / 16384 + 200 / 16384 + 1e-9


def test_mpe_wheel_in_the_members_once_a_second_channel_plays():
    tu = load_profile("edo31")
    e, s = mpe(tu)
    s.feed(e.feed(0.0, ON(60)) + e.feed(0.1, WHEEL(4096)))
    assert s.bend[0] == 4096
    out = e.feed(0.2, mido.Message("note_on", channel=1, note=64, velocity=90))
    s.feed(out)
    assert s.bend[0] == 0                       # the manager back at centre
    s.feed(e.feed(0.3, mido.Message("pitchwheel", channel=1, pitch=-4096)))
    want = {60: tu.cents[60] + 100.0, 64: tu.cents[64] - 100.0}
    for c, v in s.sounding():
        # each note on its own member: half a step of 48 semitones for the tuning and the wheel
        assert abs(s.pitch(c, v) - want[v.key]) <= 2 * 4800 / 16384 + 1e-9, v.key
    assert not s.problems


def test_mpe_steal_when_members_exhausted():
    e, s = mpe(load_profile("meantone-quarter"), mpe_members=2)
    s.feed(e.feed(0.0, ON(60)) + e.feed(0.1, ON(62)))
    out = e.feed(0.2, ON(64))
    s.feed(out)
    assert out[0].type == "note_off" and out[0].note == 60     # oldest held, note-off first
    assert e.stats["steals"] == 1 and s.count() == 2 and not s.problems


def test_mpe_passthrough_channel_is_not_used_as_member():
    e, s = mpe(Tuning.equal12())
    used = set()
    for k in range(40, 60):
        used.add(e.feed(k, ON(k))[-1].channel)
    assert 9 not in used and 0 not in used


# ---------------------------------------------------------------------------
# MIDI Tuning Standard
# ---------------------------------------------------------------------------
def mts(tuning=None, **kw):
    e = Engine(tuning or load_profile("werckmeister-3"), EngineConfig(mode="mts", **kw))
    return e, e.start(0.0)


def test_mts_start_selects_tuning_and_sends_all_keys():
    tu = load_profile("werckmeister-3")
    e, out = mts(tu)
    for c in range(16):
        vals = rpn_values(out, c)
        if c == 9:
            assert vals == {}      # the passthrough channel is left alone
        else:
            # MIDI 1.0: RPN 4 tuning bank select, RPN 3 tuning program change
            assert vals[(0, 4)] == 0 and vals[(0, 3)] == 0
    tuned = {}
    for m in out:
        if m.type == "sysex":
            p = parse_single_note(m)
            assert p["realtime"] and p["device"] == 0x7F and p["program"] == 0 and p["bank"] is None
            tuned.update(p["keys"])
    assert sorted(tuned) == list(range(128))
    for k, c in tuned.items():
        assert abs(c - tu.cents[k]) <= 100 / 16384 / 2 + 1e-9


def test_mts_bank_form_and_options():
    e, out = mts(mts_bank=3, mts_program=5, mts_device=0x10, mts_realtime=False)
    sx = [parse_single_note(m) for m in out if m.type == "sysex"]
    assert sx and all(p["bank"] == 3 and p["program"] == 5 and p["device"] == 0x10 and not p["realtime"]
                      for p in sx)
    assert rpn_values(out, 0) == {(0, 4): 3, (0, 3): 5}
    # bank select comes before the program change (the program change activates the bank)
    cc = [(m.control, m.value) for m in out if m.type == "control_change" and m.channel == 0]
    assert cc.index((100, 4)) < cc.index((100, 3))


def test_mts_notes_stay_on_input_channels_without_bends():
    e, out = mts()
    for ch in (0, 3):
        o = e.feed(0.0, ON(60, ch=ch))
        assert o == [ON(60, ch=ch)]
    assert e.feed(0.1, WHEEL(500, ch=3)) == [WHEEL(500, ch=3)]
    assert e.feed(0.1, CC(64, 127, ch=3)) == [CC(64, 127, ch=3)]
    assert e.feed(0.2, OFF(60, ch=3)) == [OFF(60, ch=3)]


def test_mts_switch_retunes_silent_keys_now_and_sounding_keys_at_next_note_on():
    a, b = load_profile("werckmeister-3"), load_profile("meantone-quarter")
    e, _ = mts(a)
    e.feed(0.0, ON(64))
    out = e.set_tuning(b, 0.1)
    keys = {}
    for m in out:
        keys.update(parse_single_note(m)["keys"])
    assert 64 not in keys and 60 in keys and abs(keys[60] - b.cents[60]) < 0.01
    e.feed(0.2, OFF(64))
    out = e.feed(0.3, ON(64))
    assert out[-1] == ON(64) and len(out) == 2
    p = parse_single_note(out[0])
    assert list(p["keys"]) == [64] and abs(p["keys"][64] - b.cents[64]) < 0.01
    assert e.feed(0.4, ON(60)) == [ON(60)]   # already tuned: nothing extra


def test_mts_unmapped_key_dropped():
    cents = [100.0 * k for k in range(128)]
    cents[50] = None
    e, out = mts(Tuning.from_cents("holes", cents))
    keys = {}
    for m in out:
        if m.type == "sysex":
            keys.update(parse_single_note(m)["keys"])
    assert 50 not in keys and len(keys) == 127
    assert e.feed(0.0, ON(50)) == [] and e.feed(0.1, OFF(50)) == []


def test_mts_release_all():
    e, _ = mts()
    e.feed(0.0, ON(60, ch=2))
    out = e.release_all(0.1)
    assert out[0] == E.note_off(2, 60, 0)
    chans = {m.channel for m in out if m.type == "control_change" and m.control == 123}
    assert chans == {c for c in range(16) if c != 9}


def test_mpe_reconfigure_wheel_range_rescales_the_wheel():
    e, s = mpe(Tuning.equal12())
    s.feed(e.feed(0.0, ON(60)) + e.feed(0.0, WHEEL(2048)))   # a quarter of the wheel: 50 c at 2 semitones
    out = e.reconfigure(e.config.replace(wheel_range=4.0), 0.1)
    s.feed(out)
    (c, v), = s.sounding()
    assert s.pitch(c, v) == pytest.approx(6000.0 + 100.0, abs=200 / 16384)   # now 100 c (12-EDO: no tuning share)
    assert s.bend[0] == 4096                   # on the manager (one part): 100 c of its 200


def test_mts_key_struck_twice_is_ended_first():
    e, _ = mts()
    e.feed(0.0, ON(60))
    out = e.feed(0.1, ON(60))                   # merged inputs: the same key again
    assert out == [E.note_off(0, 60, 0), ON(60)]
    assert e.feed(0.2, OFF(60)) == []           # the first press's note-off: already ended
    assert e.feed(0.3, OFF(60)) == [OFF(60)]
    assert e.sounding() == []
