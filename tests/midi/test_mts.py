"""MIDI Tuning Standard bytes, checked against the standard's own definitions.

Source for every layout and worked example below, unless a check says otherwise:
MIDI Tuning Standard (MIDI Manufacturers Association, 1992), in the Complete MIDI 1.0
Detailed Specification (MMA, document version 96.1), section "MIDI Tuning":
  - "Frequency data format": xx = semitone (12-EDO key at A4 = 440 Hz, 100-cent units),
    yy zz = 14-bit fraction of a semitone in units of 100/16384 cent (0.0061 cent),
    7F 7F 7F reserved for "no change";
  - "Bulk Tuning Dump": F0 7E <device ID> 08 01 tt <16-character name> [xx yy zz]*128 cs F7,
    cs = XOR of 7E, <device ID>, 08, 01, tt and the 16 + 384 following bytes, as a data byte;
  - "Single Note Tuning Change (Real-Time)": F0 7F <device ID> 08 02 tt ll [kk xx yy zz]*ll F7.
MIDI Tuning Extensions, MMA CA-020 ("Bank and Dump Extensions"): single note tuning change
with bank select, F0 7F|7E <device ID> 08 07 bb tt ll [kk xx yy zz]*ll F7.

Worked examples are computed by hand in the comments (cents above key 0 of 12-EDO:
key k of 12-EDO = 100*k cents; one fraction unit = 100/16384 cent, so 1 cent = 163.84 units).
"""

from __future__ import annotations

import functools
import math
import operator

import mido
import pytest
from hypothesis import given, settings, strategies as st

from retuner.midi import mts

HALF_STEP_CENTS = 100.0 / 16384 / 2  # half a fraction unit: the rounding bound, 0.00305 cent


def hz_from_frequency_data(xx: int, yy: int, zz: int) -> float:
    """The MTS definition written out independently: 440 Hz * 2**((semitones - 69) / 12)."""
    semitones = xx + ((yy << 7) | zz) / 16384.0
    return 440.0 * 2.0 ** ((semitones - 69) / 12.0)


# --- frequency data: worked examples -----------------------------------------------------------

@pytest.mark.parametrize("cents, expected", [
    # MTS frequency data table: "45 00 00 = 440.0000 Hz" (A4, key 69 = 6900 c).
    (6900.0, (0x45, 0x00, 0x00)),
    # MTS frequency data table: "00 00 00 = 8.1758 Hz" (key 0, 0 c).
    (0.0, (0x00, 0x00, 0x00)),
    # MTS table: "3C 00 00 = 261.6256 Hz" (middle C, key 60).
    (6000.0, (0x3C, 0x00, 0x00)),
    # by hand: A4 + 1 cent: 163.84 units -> 164 = 1*128 + 36 -> 45 01 24.
    (6901.0, (0x45, 0x01, 0x24)),
    # by hand: a quarter tone above C4: 50 c = 8192 units = 64*128 + 0 -> 3C 40 00.
    (6050.0, (0x3C, 0x40, 0x00)),
    # by hand: one unit below A4: 6900 - 100/16384 c -> 44 7F 7F (MTS table: 439.9984 Hz).
    (6900.0 - 100.0 / 16384, (0x44, 0x7F, 0x7F)),
    # by hand: 0.0001 c below key 61 rounds up to 16384 units of key 60, which carries -> 3D 00 00.
    (6099.9999, (0x3D, 0x00, 0x00)),
    # by hand: top of the encodable range 7F 7F 7E = 127*16384 + 16382 units = 12799.98779 c.
    (127 * 100 + 16382 * 100.0 / 16384, (0x7F, 0x7F, 0x7E)),
])
def test_encode_worked_examples(cents, expected):
    assert mts.encode_frequency(cents) == expected
    assert mts.encode_frequency_checked(cents) == (expected, False)


@pytest.mark.parametrize("data, hz", [
    # Entries of the MTS frequency data table that agree with the definition to 4 decimals
    # (the table's "00 00 01 = 8.2104 Hz" and "7F 7F 7E = 13289.7300 Hz" entries do not, a
    # known erratum, from memory; we check the definition).
    ((0x00, 0x00, 0x00), 8.1758),
    ((0x01, 0x00, 0x00), 8.6620),
    ((0x0C, 0x00, 0x00), 16.3516),
    ((0x3C, 0x00, 0x00), 261.6256),
    ((0x44, 0x7F, 0x7F), 439.9984),
    ((0x45, 0x00, 0x00), 440.0000),
    ((0x45, 0x00, 0x01), 440.0016),
])
def test_decode_against_mts_table(data, hz):
    cents = mts.decode_frequency(data)
    got = 440.0 * 2.0 ** ((cents - 6900.0) / 1200.0)
    assert got == pytest.approx(hz, abs=0.00006)
    assert got == pytest.approx(hz_from_frequency_data(*data), rel=1e-12)


def test_top_of_range_is_about_13289_hz():
    # MTS: the range ends at 7F 7F 7E; the definition gives 13289.65 Hz (the table prints 13289.73).
    hz = hz_from_frequency_data(0x7F, 0x7F, 0x7E)
    cents = mts.decode_frequency((0x7F, 0x7F, 0x7E))
    assert 440.0 * 2.0 ** ((cents - 6900.0) / 1200.0) == pytest.approx(hz, rel=1e-12)
    assert 13289.6 < hz < 13289.8


def test_no_change_is_reserved():
    # MTS: 7F 7F 7F = "no change"; never produced for a pitch, decoded as None.
    assert mts.decode_frequency((0x7F, 0x7F, 0x7F)) is None
    assert mts.encode_frequency(None) == (0x7F, 0x7F, 0x7F)
    for cents in (12799.99, 12799.995, 12800.0, 13000.0, 1e9, math.inf):
        data, _ = mts.encode_frequency_checked(cents)
        assert data != (0x7F, 0x7F, 0x7F)


@pytest.mark.parametrize("cents, expected, clamped", [
    (-5.0, (0, 0, 0), True),          # below 8.1758 Hz
    (-math.inf, (0, 0, 0), True),
    (-0.001, (0, 0, 0), False),       # within half a unit of 00 00 00: plain rounding
    (12800.0, (0x7F, 0x7F, 0x7E), True),   # key 128 would need 7F 7F 7F + 1 unit's worth
    (12799.995, (0x7F, 0x7F, 0x7E), True),  # rounds to 7F 7F 7F (reserved): clamped
    (12799.99, (0x7F, 0x7F, 0x7E), False),  # 2097150.4 units -> 7F 7F 7E
])
def test_clamping_is_reported(cents, expected, clamped):
    assert mts.encode_frequency_checked(cents) == (expected, clamped)


def test_nan_is_refused():
    with pytest.raises(ValueError):
        mts.encode_frequency(float("nan"))


@settings(max_examples=300, deadline=None)
@given(st.floats(min_value=0.0, max_value=12799.98779296875, allow_nan=False))
def test_round_trip_within_half_a_unit(cents):
    data = mts.encode_frequency(cents)
    assert all(0 <= b <= 0x7F for b in data)
    assert abs(mts.decode_frequency(data) - cents) <= HALF_STEP_CENTS + 1e-9
    # and independently of the decoder, via the Hz definition
    assert abs(1200 * math.log2(hz_from_frequency_data(*data) / 440.0) + 6900 - cents) <= HALF_STEP_CENTS + 1e-7


# --- single note tuning change ------------------------------------------------------------------

def test_single_note_realtime_layout():
    # MTS: F0 7F <dev> 08 02 tt ll [kk xx yy zz] F7; A4 (key 69) -> 440 Hz, broadcast device 7F.
    msgs = mts.single_note_tuning_change([(69, 6900.0)])
    assert [m.bytes() for m in msgs] == [[0xF0, 0x7F, 0x7F, 0x08, 0x02, 0x00, 0x01,
                                          0x45, 0x45, 0x00, 0x00, 0xF7]]
    assert msgs[0].type == "sysex"


def test_single_note_chord_in_one_message():
    # Key 60 -> 1/4 tone up (3C 40 00), key 64 -> 14 c flat of 12-EDO E4: 6386 c = 63 + 86 c:
    # 86 * 163.84 = 14090.24 -> 14090 = 110*128 + 10 -> 3F 6E 0A. Device 0, program 5.
    msgs = mts.single_note_tuning_change([(60, 6050.0), (64, 6386.0)], device=0, program=5)
    assert [m.bytes() for m in msgs] == [[0xF0, 0x7F, 0x00, 0x08, 0x02, 0x05, 0x02,
                                          0x3C, 0x3C, 0x40, 0x00,
                                          0x40, 0x3F, 0x6E, 0x0A, 0xF7]]


def test_single_note_bank_forms():
    # CA-020: 08 07 bb tt ll ..., real-time (7F) and non-real-time (7E) header.
    rt = mts.single_note_tuning_change([(60, 6050.0)], device=0x10, program=5, bank=2)
    assert rt[0].bytes() == [0xF0, 0x7F, 0x10, 0x08, 0x07, 0x02, 0x05, 0x01,
                             0x3C, 0x3C, 0x40, 0x00, 0xF7]
    nrt = mts.single_note_tuning_change([(60, 6050.0)], device=0x10, program=5, bank=2, realtime=False)
    assert nrt[0].bytes() == [0xF0, 0x7E, 0x10, 0x08, 0x07, 0x02, 0x05, 0x01,
                              0x3C, 0x3C, 0x40, 0x00, 0xF7]
    # The 1992 message (08 02) is real-time only: non-real-time without a bank uses bank 0.
    nrt0 = mts.single_note_tuning_change([(60, 6050.0)], realtime=False)
    assert nrt0[0].bytes()[:8] == [0xF0, 0x7E, 0x7F, 0x08, 0x07, 0x00, 0x00, 0x01]


def test_single_note_no_change_entry():
    msgs = mts.single_note_tuning_change([(12, None)])
    assert msgs[0].bytes()[7:11] == [12, 0x7F, 0x7F, 0x7F]


def test_single_note_split_at_127_changes():
    # ll is a data byte (0..127): 128 keys need two messages, in order.
    changes = [(k, 100.0 * k) for k in range(128)]
    msgs = mts.single_note_tuning_change(changes)
    assert len(msgs) == 2
    assert msgs[0].data[5] == 127 and msgs[1].data[5] == 1
    assert len(msgs[0].data) == 6 + 4 * 127
    decoded = []
    for m in msgs:
        decoded += mts.parse_sysex(m).changes
    assert decoded == [(k, pytest.approx(100.0 * k, abs=1e-9)) for k in range(128)]
    assert mts.single_note_tuning_change([]) == []


@pytest.mark.parametrize("kwargs", [dict(device=128), dict(program=-1), dict(bank=200)])
def test_single_note_rejects_out_of_range_bytes(kwargs):
    with pytest.raises(ValueError):
        mts.single_note_tuning_change([(60, 6000.0)], **kwargs)
    with pytest.raises(ValueError):
        mts.single_note_tuning_change([(128, 6000.0)])


# --- bulk tuning dump ---------------------------------------------------------------------------

def independent_checksum(dump: bytes) -> int:
    # MTS "Bulk Tuning Dump": XOR of 7E, <device ID>, 08 01, tt, then the 16 name and 384 data
    # bytes, i.e. everything between F0 and the checksum; a data byte, so masked to 7 bits.
    assert dump[0] == 0xF0 and dump[-1] == 0xF7
    return functools.reduce(operator.xor, dump[1:-2], 0) & 0x7F


def test_bulk_dump_layout_edo12():
    cents = [100.0 * k for k in range(128)]
    dump = mts.bulk_tuning_dump(cents, "edo12", device=0x01, program=0x10)
    assert isinstance(dump, bytes)
    # F0 7E dev 08 01 tt + 16 name + 128*3 + cs + F7 = 6 + 16 + 384 + 2 = 408 bytes
    assert len(dump) == 408
    assert list(dump[:6]) == [0xF0, 0x7E, 0x01, 0x08, 0x01, 0x10]
    assert dump[6:22] == b"edo12           "
    for k in range(128):
        assert list(dump[22 + 3 * k:25 + 3 * k]) == [k, 0, 0]  # 12-EDO: xx = key, fraction 0
    assert dump[-2] == independent_checksum(dump)
    assert dump[-1] == 0xF7
    assert all(b <= 0x7F for b in dump[1:-1])


def test_bulk_dump_checksum_by_hand():
    # All keys "no change" (7F 7F 7F, 384 bytes: an even count XORs to 0), name 16 spaces
    # (0x20 x 16 -> 0), device 7F, program 0: cs = 7E ^ 7F ^ 08 ^ 01 ^ 00 = 0x08.
    dump = mts.bulk_tuning_dump([None] * 128, "")
    assert dump[-2] == 0x7E ^ 0x7F ^ 0x08 ^ 0x01 ^ 0x00 == 0x08


def test_bulk_dump_name_cut_and_padded():
    dump = mts.bulk_tuning_dump([0.0] * 128, "a-very-long-tuning-name")
    assert dump[6:22] == b"a-very-long-tuni"
    assert mts.parse_sysex(dump).name == "a-very-long-tuni"


def test_bulk_dump_clamped_keys_reported():
    cents = [100.0 * k for k in range(128)]
    cents[0] = -30.0
    cents[127] = 12850.0
    dump, clamped = mts.bulk_tuning_dump_checked(cents, "x")
    assert clamped == [0, 127]
    assert list(dump[22:25]) == [0, 0, 0]
    assert list(dump[22 + 3 * 127:25 + 3 * 127]) == [0x7F, 0x7F, 0x7E]


def test_bulk_dump_needs_128_keys():
    with pytest.raises(ValueError):
        mts.bulk_tuning_dump([0.0] * 127, "x")


def test_parse_detects_bad_checksum():
    dump = bytearray(mts.bulk_tuning_dump([100.0 * k for k in range(128)], "t"))
    assert mts.parse_sysex(bytes(dump)).checksum_ok is True
    dump[-2] ^= 0x01
    assert mts.parse_sysex(bytes(dump)).checksum_ok is False


@pytest.mark.parametrize("raw", [
    b"\xF0\x7E\x7F\x09\x01\x00\xF7",               # not sub-ID#1 08
    b"\xF0\x43\x10\x4C\x00\xF7",                   # a manufacturer's message
    b"\xF0\x7F\x7F\x08\x02\x00\x02\x45\x45\x00\x00\xF7",  # announces 2 changes, has 1
    b"\xF0\x7E\x7F\x08\x01\x00" + b" " * 16 + b"\xF7",    # truncated dump
])
def test_parse_rejects_malformed(raw):
    with pytest.raises(ValueError):
        mts.parse_sysex(raw)


def test_parse_accepts_mido_message_and_bare_bytes():
    msg = mts.single_note_tuning_change([(69, 6900.0)])[0]
    a = mts.parse_sysex(msg)
    b = mts.parse_sysex(bytes(msg.bytes()))
    c = mts.parse_sysex(bytes(msg.data))
    assert a == b == c
    assert a.kind == "single_note" and a.realtime and a.device == 0x7F and a.changes == [(69, 6900.0)]
    assert mts.is_mts(msg) and not mts.is_mts(mido.Message("sysex", data=[0x43, 1, 2]))


def test_tuning_select_rpn_3_and_4():
    # MIDI 1.0 Detailed Specification, Registered Parameter Numbers: 00 03 = tuning program
    # change, 00 04 = tuning bank select (value in data entry MSB, CC6); RPN null = 7F 7F.
    msgs = mts.tuning_select(2, program=5, bank=1)
    assert [(m.channel, m.control, m.value) for m in msgs] == [
        (2, 101, 0), (2, 100, 4), (2, 6, 1),
        (2, 101, 0), (2, 100, 3), (2, 6, 5),
        (2, 101, 127), (2, 100, 127),
    ]
