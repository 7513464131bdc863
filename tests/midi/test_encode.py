"""Wire encodings: bend formula, RPN layout, MPE configuration message."""

import mido
import pretty_midi
import pytest

from retuner.midi import encode as E


def test_rpn_numbers_match_midi_spec():
    # MIDI 1.0 Detailed Specification, "Registered Parameter Numbers" table:
    # 00/00 pitch bend sensitivity, 00/01 fine tuning, 00/02 coarse tuning,
    # 00/03 tuning program change, 00/04 tuning bank select, 7F/7F null.
    assert E.RPN["pitch_bend_sensitivity"] == (0, 0)
    assert E.RPN["fine_tuning"] == (0, 1)
    assert E.RPN["coarse_tuning"] == (0, 2)
    assert E.RPN["tuning_program"] == (0, 3)
    assert E.RPN["tuning_bank"] == (0, 4)
    assert E.RPN["null"] == (127, 127)
    # MPE specification (The MIDI Association, 2018): MPE Configuration Message is RPN 00/06.
    assert E.RPN["mpe_configuration"] == (0, 6)


def test_cc_numbers_match_midi_spec():
    # MIDI 1.0 Detailed Specification, control number assignments / channel mode messages.
    assert (E.CC_DATA_ENTRY_MSB, E.CC_DATA_ENTRY_LSB) == (6, 38)
    assert (E.CC_SUSTAIN, E.CC_SOSTENUTO) == (64, 66)
    assert (E.CC_RPN_LSB, E.CC_RPN_MSB) == (100, 101)
    assert (E.CC_NRPN_LSB, E.CC_NRPN_MSB) == (98, 99)
    assert (E.CC_ALL_SOUND_OFF, E.CC_RESET_ALL_CONTROLLERS, E.CC_ALL_NOTES_OFF) == (120, 121, 123)


def test_rpn_layout_ends_with_null():
    out = E.rpn(3, (0, 0), 2, 0)
    assert [(m.type, m.channel, m.control, m.value) for m in out] == [
        ("control_change", 3, 101, 0), ("control_change", 3, 100, 0),
        ("control_change", 3, 6, 2), ("control_change", 3, 38, 0),
        ("control_change", 3, 101, 127), ("control_change", 3, 100, 127)]
    out = E.rpn(0, (0, 3), 5)
    assert [m.control for m in out] == [101, 100, 6, 101, 100]
    for m in out:
        assert mido.Message.from_bytes(m.bytes()) == m


def test_rpn_rejects_bad_values():
    with pytest.raises(ValueError):
        E.rpn(16, (0, 0), 2)
    with pytest.raises(ValueError):
        E.rpn(0, (0, 0), 128)


def test_bend_range_rpn_cents_and_whole_semitones():
    out = E.bend_range_rpn(0, 250.0)
    assert [m.value for m in out[2:4]] == [2, 50]
    out = E.bend_range_rpn(0, 250.0, whole_semitones=True)
    assert [m.control for m in out] == [101, 100, 6, 101, 100]


def test_mpe_configuration_message_layout():
    # MPE specification (The MIDI Association, 2018), MPE Configuration Message:
    # on the manager channel (1 = lower zone, 16 = upper), CC101 = 0, CC100 = 6,
    # CC6 = number of member channels.
    out = E.mpe_configuration(0, 15)
    assert [m.bytes() for m in out[:3]] == [[0xB0, 101, 0], [0xB0, 100, 6], [0xB0, 6, 15]]
    out = E.mpe_configuration(15, 7)
    assert [m.bytes() for m in out[:3]] == [[0xBF, 101, 0], [0xBF, 100, 6], [0xBF, 6, 7]]
    with pytest.raises(ValueError):
        E.mpe_configuration(3, 4)


@pytest.mark.parametrize("offset", [-200.0, -150.3, -13.686, -0.01, 0.0, 5.0, 41.06, 99.9, 199.0])
@pytest.mark.parametrize("rng", [200.0, 1200.0, 4800.0])
def test_bend_value_against_pretty_midi(offset, rng):
    v = E.bend_value(offset, rng)
    # pretty_midi takes the signed value (mido's 'pitch'): semitones = range * pitch / 8192
    semis = pretty_midi.pitch_bend_to_semitones(v - 8192, semitone_range=rng / 100.0)
    if -rng <= offset < rng * 8191 / 8192:
        assert abs(semis * 100.0 - offset) <= rng / 16384 + 1e-9  # half a bend step
    assert abs(E.bend_cents(v, rng) - semis * 100.0) < 1e-9
    # and back through pretty_midi's inverse
    assert pretty_midi.semitones_to_pitch_bend(semis, semitone_range=rng / 100.0) == v - 8192


def test_bend_value_clamps_and_centre():
    assert E.bend_value(0.0, 200.0) == 8192
    assert E.bend_value(200.0, 200.0) == 16383  # one step short of the range: clamped
    assert E.bend_value(-200.0, 200.0) == 0
    assert E.bend_value(-500.0, 200.0) == 0
    assert E.bend_value(500.0, 200.0) == 16383


def test_bend_scale_compensates_a_short_bend():
    # a synth playing bends at 127/128 of their size: send 128/127 times more
    v = E.bend_value(100.0, 200.0, scale=127 / 128)
    played = E.bend_cents(v, 200.0) * 127 / 128
    assert abs(played - 100.0) <= 200.0 / 16384
    assert v != E.bend_value(100.0, 200.0)


def test_fast_messages_equal_mido_messages():
    assert E.note_on(3, 60, 100) == mido.Message("note_on", channel=3, note=60, velocity=100)
    assert E.pitchwheel(2, 0) == mido.Message("pitchwheel", channel=2, pitch=-8192)
    assert E.pitchwheel(2, 16383).bytes() == [0xE2, 0x7F, 0x7F]
    m = E.with_channel(mido.Message("control_change", channel=0, control=7, value=90), 5)
    assert m == mido.Message("control_change", channel=5, control=7, value=90)
