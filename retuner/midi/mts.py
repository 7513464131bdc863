"""MIDI Tuning Standard (MTS) bytes: frequency data, single note tuning change, bulk tuning dump.

Sources (the layouts below follow them; protocol numbers live in the tables, once):

* MIDI Tuning Standard, MIDI Manufacturers Association, 1992, as printed in the
  *Complete MIDI 1.0 Detailed Specification* (MMA, document version 96.1), section
  "MIDI Tuning" (the "Bulk Tuning Dump", "Single Note Tuning Change (Real-Time)"
  and "Frequency data format" parts).
* MIDI Tuning Extensions, MMA CA-020 (1998): "Bank and Dump Extensions" -- the bank
  forms (sub-ID#2 03, 04, 07) and the non-real-time single note tuning change.

Frequency data (three data bytes ``xx yy zz``)::

    xx       semitone: the 12-EDO key (A4 = 440 Hz) at or below the pitch, unit 100 cents
    yy zz    14-bit fraction above that key, unit 100/16384 cent (0.0061 cent),
             yy = upper 7 bits, zz = lower 7 bits
    7F 7F 7F reserved: "no change"

so the encodable range is 00 00 00 (8.1758 Hz, key 0) .. 7F 7F 7E (about 13289.7 Hz).
Pitches here are given in **cents above key 0 of 12-EDO**, as everywhere in retuner.
Encoding rounds to the nearest fraction step (ties upward), carries into the
semitone, and clamps to the encodable range; :func:`encode_frequency_checked`
tells whether clamping happened.

Bulk tuning dump checksum: the MMA's MIDI Tuning text gives it as "XOR of 7E,
<device ID>, nn, tt, <388 bytes>" (nn = the sub-IDs 08 01; the byte count is a
known slip of that text, discussed on the tuning mailing list in June 2003, since
16 name + 384 frequency bytes follow tt), and the MIDI Tuning Standard summary
shipped with TiMidity++ (doc "readme.mts") states it as "XOR of all bytes excluding
F0, F7, and chksum". Both mean: every byte after F0 up to and including the last
frequency data byte, masked to 7 bits (``& 0x7F``) so it is a data byte.

Return shape of :func:`single_note_tuning_change`: **always a list** of
``mido.Message('sysex')``, one message per at most 127 key changes (the count
byte ``ll`` is a 7-bit data byte). ``mido`` sysex messages carry the bytes
between F0 and F7; ``msg.bytes()`` gives the full F0 ... F7 form.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Iterable, Optional, Sequence, Union

import mido

# ---------------------------------------------------------------------------
# Protocol numbers (MIDI 1.0 Detailed Specification: Universal System Exclusive;
# MIDI Tuning Standard; CA-020 extensions)
# ---------------------------------------------------------------------------
SYSEX_START = 0xF0
SYSEX_END = 0xF7
UNIVERSAL_NON_REALTIME = 0x7E
UNIVERSAL_REALTIME = 0x7F
DEVICE_ALL = 0x7F  # "all devices" (broadcast) device ID
SUB_ID1_TUNING = 0x08  # sub-ID#1 = "MIDI Tuning Standard"

# sub-ID#2 of the MIDI Tuning Standard messages.
SUB_ID2 = {
    "bulk_dump_request": 0x00,
    "bulk_dump": 0x01,
    "single_note": 0x02,  # real-time only (MTS 1992)
    "bulk_dump_request_bank": 0x03,  # CA-020
    "key_based_dump": 0x04,  # CA-020: bulk dump with bank byte
    "scale_octave_1byte_dump": 0x05,  # CA-020
    "scale_octave_2byte_dump": 0x06,  # CA-020
    "single_note_bank": 0x07,  # CA-020: real-time (7F) or non-real-time (7E)
    "scale_octave_1byte": 0x08,
    "scale_octave_2byte": 0x09,
}
SUB_ID2_NAMES = {v: k for k, v in SUB_ID2.items()}

# Registered Parameter Numbers for selecting a tuning on a channel
# (MIDI 1.0 Detailed Specification, "Registered Parameter Numbers"): (CC101, CC100).
RPN_TUNING_PROGRAM = (0, 3)  # tuning program change, data entry MSB = program
RPN_TUNING_BANK = (0, 4)  # tuning bank select, data entry MSB = bank
RPN_NULL = (127, 127)
CC_RPN_MSB = 101
CC_RPN_LSB = 100
CC_DATA_ENTRY_MSB = 6

# Frequency data
FRACTION_STEPS = 1 << 14  # 16384 steps per semitone
CENTS_PER_STEP = 100.0 / FRACTION_STEPS  # 0.006103515625 cent
NO_CHANGE = (0x7F, 0x7F, 0x7F)
MAX_UNITS = 127 * FRACTION_STEPS + (FRACTION_STEPS - 2)  # 7F 7F 7E
MIN_CENTS = 0.0
MAX_CENTS = MAX_UNITS * CENTS_PER_STEP  # 12799.99389648... cents
MAX_CHANGES_PER_MESSAGE = 127  # ll is a data byte
NAME_LENGTH = 16
NUM_KEYS = 128
BULK_DUMP_LENGTH = 1 + 1 + 1 + 2 + 1 + NAME_LENGTH + 3 * NUM_KEYS + 1 + 1  # 408 bytes, F0..F7


def _data_byte(value: int, what: str) -> int:
    v = int(value)
    if not 0 <= v <= 0x7F:
        raise ValueError(f"{what} must be 0..127, got {value!r}")
    return v


# ---------------------------------------------------------------------------
# Frequency data
# ---------------------------------------------------------------------------
def encode_frequency_checked(cents: float) -> tuple[tuple[int, int, int], bool]:
    """Encode a pitch (cents above key 0 of 12-EDO) -> ((xx, yy, zz), clamped).

    Rounds to the nearest 100/16384 cent (ties upward), carrying into the
    semitone; clamps to 00 00 00 .. 7F 7F 7E (never the reserved 7F 7F 7F).
    ``clamped`` is True when the pitch lay outside the encodable range.
    """
    c = float(cents)
    if math.isnan(c):
        raise ValueError("cannot encode NaN cents")
    if math.isinf(c):
        units = MAX_UNITS if c > 0 else 0
        return _split(units), True
    units = math.floor(c / CENTS_PER_STEP + 0.5)
    clamped = False
    if units < 0:
        units, clamped = 0, True
    elif units > MAX_UNITS:
        units, clamped = MAX_UNITS, True
    return _split(units), clamped


def _split(units: int) -> tuple[int, int, int]:
    semitone, frac = divmod(units, FRACTION_STEPS)
    return semitone, frac >> 7, frac & 0x7F


def encode_frequency(cents: Optional[float]) -> tuple[int, int, int]:
    """(semitone, msb, lsb) for a pitch in cents above key 0; None -> 7F 7F 7F (no change)."""
    if cents is None:
        return NO_CHANGE
    return encode_frequency_checked(cents)[0]


def decode_frequency(data: Sequence[int]) -> Optional[float]:
    """Three frequency data bytes -> cents above key 0 of 12-EDO; 7F 7F 7F -> None (no change)."""
    if len(data) != 3:
        raise ValueError(f"frequency data is 3 bytes, got {len(data)}")
    xx, yy, zz = (_data_byte(b, "frequency data byte") for b in data)
    if (xx, yy, zz) == NO_CHANGE:
        return None
    return (xx * FRACTION_STEPS + (yy << 7) + zz) * CENTS_PER_STEP


# ---------------------------------------------------------------------------
# Single note tuning change
# ---------------------------------------------------------------------------
def single_note_tuning_change(
    changes: Iterable[tuple[int, Optional[float]]],
    *,
    device: int = DEVICE_ALL,
    program: int = 0,
    bank: Optional[int] = None,
    realtime: bool = True,
) -> list[mido.Message]:
    """Single note tuning change messages for ``changes`` = [(key, cents or None), ...].

    Layouts (between F0 and F7):

    * real-time, no bank (MTS 1992):        7F dev 08 02 tt ll [kk xx yy zz]*ll
    * with bank (CA-020), real-time:         7F dev 08 07 bb tt ll [kk xx yy zz]*ll
    * with bank (CA-020), non-real-time:     7E dev 08 07 bb tt ll [kk xx yy zz]*ll

    The 1992 message exists only in real-time form, so ``realtime=False`` uses the
    bank form with bank 0 when no bank is given. ``cents=None`` sends 7F 7F 7F.
    Always returns a list: more than 127 changes are split over several messages,
    in the given order. An empty ``changes`` gives an empty list.
    """
    device = _data_byte(device, "device ID")
    program = _data_byte(program, "tuning program")
    if bank is None and not realtime:
        bank = 0
    header = [UNIVERSAL_REALTIME if realtime else UNIVERSAL_NON_REALTIME, device, SUB_ID1_TUNING]
    if bank is None:
        header += [SUB_ID2["single_note"], program]
    else:
        header += [SUB_ID2["single_note_bank"], _data_byte(bank, "tuning bank"), program]
    items = []
    for key, cents in changes:
        items.append((_data_byte(key, "key"),) + encode_frequency(cents))
    out = []
    for i in range(0, len(items), MAX_CHANGES_PER_MESSAGE):
        chunk = items[i:i + MAX_CHANGES_PER_MESSAGE]
        data = list(header) + [len(chunk)]
        for item in chunk:
            data.extend(item)
        out.append(mido.Message("sysex", data=data))
    return out


# ---------------------------------------------------------------------------
# Bulk tuning dump
# ---------------------------------------------------------------------------
def checksum(data: Iterable[int]) -> int:
    """XOR of the bytes, masked to 7 bits (MTS bulk tuning dump checksum)."""
    cs = 0
    for b in data:
        cs ^= b
    return cs & 0x7F


def _name_bytes(name: str) -> list[int]:
    raw = []
    for ch in name[:NAME_LENGTH]:
        o = ord(ch)
        raw.append(o if 0x20 <= o <= 0x7E else ord("?"))
    raw += [0x20] * (NAME_LENGTH - len(raw))
    return raw


def bulk_tuning_dump(
    cents_128: Sequence[Optional[float]],
    name: str,
    *,
    device: int = DEVICE_ALL,
    program: int = 0,
) -> bytes:
    """Bulk tuning dump, F0 .. F7 (408 bytes)::

        F0 7E dev 08 01 tt <name: 16 ASCII> [xx yy zz]*128 cs F7

    ``cents_128[k]`` is key k's pitch in cents above key 0 (None -> 7F 7F 7F, no
    change); pitches out of range are clamped (see :func:`bulk_tuning_dump_checked`).
    The name is cut or padded with spaces to 16 characters; characters outside
    printable ASCII become '?'.
    """
    return bulk_tuning_dump_checked(cents_128, name, device=device, program=program)[0]


def bulk_tuning_dump_checked(
    cents_128: Sequence[Optional[float]],
    name: str,
    *,
    device: int = DEVICE_ALL,
    program: int = 0,
) -> tuple[bytes, list[int]]:
    """As :func:`bulk_tuning_dump`, also returning the keys whose pitch was clamped."""
    if len(cents_128) != NUM_KEYS:
        raise ValueError(f"a bulk tuning dump has {NUM_KEYS} keys, got {len(cents_128)}")
    body = [UNIVERSAL_NON_REALTIME, _data_byte(device, "device ID"), SUB_ID1_TUNING,
            SUB_ID2["bulk_dump"], _data_byte(program, "tuning program")]
    body += _name_bytes(name)
    clamped_keys = []
    for key, c in enumerate(cents_128):
        if c is None:
            body.extend(NO_CHANGE)
            continue
        fd, clamped = encode_frequency_checked(c)
        if clamped:
            clamped_keys.append(key)
        body.extend(fd)
    body.append(checksum(body))
    return bytes([SYSEX_START] + body + [SYSEX_END]), clamped_keys


# ---------------------------------------------------------------------------
# Tuning program selection on a channel (RPN 3 / RPN 4)
# ---------------------------------------------------------------------------
def tuning_select(channel: int, program: int, bank: Optional[int] = None) -> list[mido.Message]:
    """Control changes selecting tuning ``program`` (and ``bank``) on a channel (0-based).

    RPN 4 (tuning bank select) first when a bank is given, then RPN 3 (tuning
    program change), each as CC101/CC100 + data entry MSB (CC6), then RPN null.
    """
    out: list[mido.Message] = []

    def rpn(num: tuple[int, int], value: int) -> None:
        out.append(mido.Message("control_change", channel=channel, control=CC_RPN_MSB, value=num[0]))
        out.append(mido.Message("control_change", channel=channel, control=CC_RPN_LSB, value=num[1]))
        out.append(mido.Message("control_change", channel=channel, control=CC_DATA_ENTRY_MSB, value=value))

    if bank is not None:
        rpn(RPN_TUNING_BANK, _data_byte(bank, "tuning bank"))
    rpn(RPN_TUNING_PROGRAM, _data_byte(program, "tuning program"))
    out.append(mido.Message("control_change", channel=channel, control=CC_RPN_MSB, value=RPN_NULL[0]))
    out.append(mido.Message("control_change", channel=channel, control=CC_RPN_LSB, value=RPN_NULL[1]))
    return out


# ---------------------------------------------------------------------------
# Parsing
# ---------------------------------------------------------------------------
@dataclass
class MtsMessage:
    """A decoded MIDI Tuning Standard message.

    ``kind``: "bulk_dump" or "single_note" (bank and non-real-time forms included).
    ``changes``: (key, cents or None) pairs in message order; for a bulk dump all
    128 keys in order. ``checksum_ok`` is None for messages without a checksum.
    """

    kind: str
    realtime: bool
    device: int
    program: int
    bank: Optional[int] = None
    name: Optional[str] = None
    changes: list[tuple[int, Optional[float]]] = field(default_factory=list)
    checksum_ok: Optional[bool] = None

    @property
    def cents(self) -> dict[int, Optional[float]]:
        return dict(self.changes)


SysexLike = Union[bytes, bytearray, Sequence[int], mido.Message]


def _sysex_body(data: SysexLike) -> list[int]:
    if isinstance(data, mido.Message):
        if data.type != "sysex":
            raise ValueError(f"not a system exclusive message: {data.type}")
        return list(data.data)
    raw = list(data)
    if raw and raw[0] == SYSEX_START:
        raw = raw[1:]
    if raw and raw[-1] == SYSEX_END:
        raw = raw[:-1]
    return raw


def is_mts(data: SysexLike) -> bool:
    """True if this system exclusive message is a MIDI Tuning Standard message."""
    try:
        body = _sysex_body(data)
    except ValueError:
        return False
    return len(body) >= 4 and body[0] in (UNIVERSAL_NON_REALTIME, UNIVERSAL_REALTIME) \
        and body[2] == SUB_ID1_TUNING


def parse_sysex(data: SysexLike) -> MtsMessage:
    """Decode a bulk tuning dump or single note tuning change.

    Accepts raw bytes with or without F0/F7, or a ``mido`` sysex message.
    Raises ValueError for anything else or for a malformed message.
    """
    body = _sysex_body(data)
    if len(body) < 5 or body[0] not in (UNIVERSAL_NON_REALTIME, UNIVERSAL_REALTIME) \
            or body[2] != SUB_ID1_TUNING:
        raise ValueError("not a MIDI Tuning Standard message")
    if any(b > 0x7F for b in body):
        raise ValueError("status byte inside a system exclusive message")
    realtime = body[0] == UNIVERSAL_REALTIME
    device, sub2 = body[1], body[3]
    kind = SUB_ID2_NAMES.get(sub2)
    if kind in ("bulk_dump", "key_based_dump"):
        if realtime:
            raise ValueError("a bulk tuning dump is a non-real-time message")
        pos = 4
        bank = None
        if kind == "key_based_dump":
            bank = body[pos]
            pos += 1
        program = body[pos]
        pos += 1
        need = pos + NAME_LENGTH + 3 * NUM_KEYS + 1
        if len(body) != need:
            raise ValueError(f"bulk tuning dump has {len(body)} data bytes, expected {need}")
        name = bytes(body[pos:pos + NAME_LENGTH]).decode("ascii")
        pos += NAME_LENGTH
        changes = []
        for key in range(NUM_KEYS):
            changes.append((key, decode_frequency(body[pos:pos + 3])))
            pos += 3
        ok = checksum(body[:pos]) == body[pos]
        return MtsMessage("bulk_dump", False, device, program, bank, name, changes, ok)
    if kind in ("single_note", "single_note_bank"):
        pos = 4
        bank = None
        if kind == "single_note_bank":
            bank = body[pos]
            pos += 1
        elif not realtime:
            raise ValueError("sub-ID#2 02 (single note tuning change) is a real-time message")
        program, count = body[pos], body[pos + 1]
        pos += 2
        if len(body) != pos + 4 * count:
            raise ValueError(f"single note tuning change announces {count} changes, "
                             f"has {(len(body) - pos) / 4:g}")
        changes = []
        for _ in range(count):
            changes.append((body[pos], decode_frequency(body[pos + 1:pos + 4])))
            pos += 4
        return MtsMessage("single_note", realtime, device, program, bank, None, changes, None)
    raise ValueError(f"unsupported MIDI Tuning Standard message (sub-ID#2 {sub2:02X})")
