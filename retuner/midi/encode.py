"""The wire: pitch bend and RPN messages, written down once as data.

Every protocol number the engine sends lives in the tables below, with its
source. Channels are 0-based here (as in mido); users see 1..16.

Pitch bend (MIDI 1.0 Detailed Specification, "Pitch Bend Change"): a 14-bit
value 0..16383 whose centre 8192 means "no bend"; the synth maps the distance
from the centre linearly onto its pitch bend range (RPN 0, "Pitch Bend
Sensitivity", semitones in data entry MSB and cents in data entry LSB), so that
8192 steps above the centre would be the full range up and 8192 steps below it
the full range down (the top value 16383 is one step short of the full range).

Formula used by :func:`bend_value`::

    value = 8192 + round(8192 * offset_cents / (range_cents * scale)),
    clamped to 0..16383

and its inverse, :func:`bend_cents`::

    cents = (value - 8192) * range_cents / 8192

``scale`` is the synth correction: a synth that plays a bend at ``scale`` times
its specified size (one common synth plays it at 127/128) is sent a bend
``1/scale`` times larger, so it sounds at the intended pitch. A pitch is exact to
within half a bend step, ``range_cents / 16384`` (0.0122 cent at +-2 semitones,
0.293 cent at +-48).
"""

from __future__ import annotations

from typing import Optional, Sequence

import mido
from mido.messages.messages import Message

# ---------------------------------------------------------------------------
# Protocol numbers (tables)
# ---------------------------------------------------------------------------
#: Registered parameter numbers as (CC101 value = MSB, CC100 value = LSB).
#: MIDI 1.0 Detailed Specification, "Registered Parameter Numbers" table
#: (RPN 0 pitch bend sensitivity, 3 tuning program change, 4 tuning bank select;
#: 127/127 = RPN null); RPN 6 = MPE Configuration Message (MPE specification,
#: The MIDI Association, 2018).
RPN: dict[str, tuple[int, int]] = {
    "pitch_bend_sensitivity": (0, 0),
    "fine_tuning": (0, 1),
    "coarse_tuning": (0, 2),
    "tuning_program": (0, 3),
    "tuning_bank": (0, 4),
    "modulation_depth": (0, 5),
    "mpe_configuration": (0, 6),
    "null": (127, 127),
}
RPN_PITCH_BEND_SENSITIVITY = RPN["pitch_bend_sensitivity"]
RPN_TUNING_PROGRAM = RPN["tuning_program"]
RPN_TUNING_BANK = RPN["tuning_bank"]
RPN_MPE_CONFIGURATION = RPN["mpe_configuration"]
RPN_NULL = RPN["null"]

#: Control change numbers (MIDI 1.0 Detailed Specification, "Control Number
#: Assignments" and "Channel Mode Messages").
CC: dict[str, int] = {
    "bank_select_msb": 0,
    "modulation": 1,
    "data_entry_msb": 6,
    "volume": 7,
    "pan": 10,
    "expression": 11,
    "bank_select_lsb": 32,
    "data_entry_lsb": 38,
    "sustain": 64,
    "sostenuto": 66,
    "data_increment": 96,
    "data_decrement": 97,
    "nrpn_lsb": 98,
    "nrpn_msb": 99,
    "rpn_lsb": 100,
    "rpn_msb": 101,
    "all_sound_off": 120,
    "reset_all_controllers": 121,
    "all_notes_off": 123,
}
CC_DATA_ENTRY_MSB = CC["data_entry_msb"]
CC_DATA_ENTRY_LSB = CC["data_entry_lsb"]
CC_SUSTAIN = CC["sustain"]
CC_SOSTENUTO = CC["sostenuto"]
CC_DATA_INCREMENT = CC["data_increment"]
CC_DATA_DECREMENT = CC["data_decrement"]
CC_NRPN_LSB = CC["nrpn_lsb"]
CC_NRPN_MSB = CC["nrpn_msb"]
CC_RPN_LSB = CC["rpn_lsb"]
CC_RPN_MSB = CC["rpn_msb"]
CC_ALL_SOUND_OFF = CC["all_sound_off"]
CC_RESET_ALL_CONTROLLERS = CC["reset_all_controllers"]
CC_ALL_NOTES_OFF = CC["all_notes_off"]
#: Omni off/on, mono on, poly on (124..127) also turn all notes off (MIDI 1.0).
CC_MODE_NOTES_OFF = (124, 125, 126, 127)
CC_BANK_MSB = CC["bank_select_msb"]
CC_BANK_LSB = CC["bank_select_lsb"]
CC_MODULATION = CC["modulation"]
CC_EXPRESSION = CC["expression"]

#: The controllers that shape a channel's sound and stay set (its *dress*, with the program):
#: the continuous controllers 0..31 with their LSBs 32..63 (bank select, modulation, volume,
#: pan, expression, ...) and 70..95 (sound controllers, effects depths), but not data entry
#: (6, 38, 96..101: RPN and NRPN), the pedals and switches (64..69) or the channel mode
#: messages (120..127). MIDI 1.0 Detailed Specification, "Control Number Assignments".
DRESS_CCS = frozenset(c for c in list(range(0, 64)) + list(range(70, 96))
                      if c not in (CC_DATA_ENTRY_MSB, CC_DATA_ENTRY_LSB))
#: Values a synth starts with (GM2 specification, "Default values": volume 100, pan 64
#: (centre), expression 127; everything else 0, program 0, bank 0/0).
DRESS_DEFAULTS: dict[int, int] = {CC["volume"]: 100, CC["pan"]: 64, CC_EXPRESSION: 127}
#: What Reset All Controllers (CC121) sets among the dress controllers (RP-015, MIDI
#: Manufacturers Association: modulation 0, expression 127; volume, pan, bank, program,
#: sound and effects controllers are kept).
RESET_ALL_CONTROLLERS_SETS: dict[int, int] = {CC_MODULATION: 0, CC_EXPRESSION: 127}

#: 14-bit pitch bend (MIDI 1.0 Detailed Specification).
BEND_CENTRE = 8192
BEND_MIN = 0
BEND_MAX = 16383
#: A pedal (switch controller) reads as "on" from this value up (MIDI 1.0: 0-63 off, 64-127 on).
PEDAL_ON = 64

#: MPE specification (The MIDI Association, 2018): default pitch bend range of
#: member channels and of the manager channel, in semitones.
MPE_MEMBER_RANGE = 48
MPE_MANAGER_RANGE = 2


# ---------------------------------------------------------------------------
# Fast message construction
# ---------------------------------------------------------------------------
def msg(type_: str, **fields) -> Message:
    """A mido message built without mido's per-field checks (the hot path).

    Costs about a fifth of ``mido.Message(...)``; callers pass valid values
    only (every value here comes from clamped arithmetic or from an already
    valid input message). Fields must be given in mido's order.
    """
    m = Message.__new__(Message)
    d = vars(m)
    d["type"] = type_
    d.update(fields)
    d["time"] = 0
    return m


_new = Message.__new__


def note_on(channel: int, note: int, velocity: int) -> Message:
    m = _new(Message)
    d = m.__dict__
    d["type"] = "note_on"
    d["channel"] = channel
    d["note"] = note
    d["velocity"] = velocity
    d["time"] = 0
    return m


def note_off(channel: int, note: int, velocity: int = 0) -> Message:
    m = _new(Message)
    d = m.__dict__
    d["type"] = "note_off"
    d["channel"] = channel
    d["note"] = note
    d["velocity"] = velocity
    d["time"] = 0
    return m


def control_change(channel: int, control: int, value: int) -> Message:
    m = _new(Message)
    d = m.__dict__
    d["type"] = "control_change"
    d["channel"] = channel
    d["control"] = control
    d["value"] = value
    d["time"] = 0
    return m


def pitchwheel(channel: int, value: int) -> Message:
    """Pitch bend message for an unsigned 14-bit ``value`` (mido stores it signed)."""
    m = _new(Message)
    d = m.__dict__
    d["type"] = "pitchwheel"
    d["channel"] = channel
    d["pitch"] = value - BEND_CENTRE
    d["time"] = 0
    return m


def with_channel(m: Message, channel: int) -> Message:
    """A copy of channel message ``m`` on another channel (fast)."""
    out = _new(Message)
    d = out.__dict__
    d.update(m.__dict__)
    d["channel"] = channel
    return out


def on_channels(m: Message, channels) -> list[Message]:
    """Copies of channel message ``m`` on each of ``channels`` (fast)."""
    src = m.__dict__
    out = []
    for c in channels:
        x = _new(Message)
        d = x.__dict__
        d.update(src)
        d["channel"] = c
        out.append(x)
    return out


# ---------------------------------------------------------------------------
# RPN
# ---------------------------------------------------------------------------
def rpn(channel: int, number: Sequence[int], value_msb: int,
        value_lsb: Optional[int] = None) -> list[Message]:
    """Set a registered parameter: CC101 = MSB, CC100 = LSB, CC6 = value MSB,
    [CC38 = value LSB], then RPN null (CC101 = 127, CC100 = 127) so a stray
    data entry cannot change the parameter later (MIDI 1.0 Detailed
    Specification, "Registered Parameter Numbers")."""
    for v in (value_msb, value_lsb if value_lsb is not None else 0, number[0], number[1], channel):
        if not isinstance(v, int):
            raise TypeError("rpn() takes integers")
    if not (0 <= channel <= 15):
        raise ValueError(f"channel {channel} out of range 0..15")
    for v in (number[0], number[1], value_msb) + ((value_lsb,) if value_lsb is not None else ()):
        if not (0 <= v <= 127):
            raise ValueError(f"data byte {v} out of range 0..127")
    out = [control_change(channel, CC_RPN_MSB, number[0]),
           control_change(channel, CC_RPN_LSB, number[1]),
           control_change(channel, CC_DATA_ENTRY_MSB, value_msb)]
    if value_lsb is not None:
        out.append(control_change(channel, CC_DATA_ENTRY_LSB, value_lsb))
    out.append(control_change(channel, CC_RPN_MSB, RPN_NULL[0]))
    out.append(control_change(channel, CC_RPN_LSB, RPN_NULL[1]))
    return out


def bend_range_rpn(channel: int, range_cents: float, whole_semitones: bool = False) -> list[Message]:
    """RPN 0 (pitch bend sensitivity) announcing ``range_cents``: semitones in
    data entry MSB (CC6), cents in data entry LSB (CC38) unless
    ``whole_semitones`` (for synths that ignore the cents part; the range is then
    whole semitones and CC38 is left out). ``channel`` may name a channel of a
    further port (see :func:`on_port`)."""
    semis, cents = split_range(range_cents, whole_semitones)
    return on_port(rpn(channel % 16, RPN_PITCH_BEND_SENSITIVITY, semis, None if whole_semitones else cents), channel)


def on_port(msgs: list[Message], channel: int) -> list[Message]:
    """Messages written for channel ``channel % 16`` moved to the port of ``channel``: an
    engine whose output channels span several ports (file conversion: one port per output
    file) numbers channel c of port k ``16 k + c``."""
    base = channel - channel % 16
    return [with_channel(m, m.channel + base) for m in msgs] if base else msgs


def split_range(range_cents: float, whole_semitones: bool = False) -> tuple[int, int]:
    """(semitones, cents) of a bend range as RPN 0 carries it (cents 0..99)."""
    c = int(round(range_cents))
    if whole_semitones:
        c = int(round(range_cents / 100.0)) * 100
    semis, cents = divmod(c, 100)
    if not (0 <= semis <= 127):
        raise ValueError(f"pitch bend range {range_cents} cents cannot be sent with RPN 0")
    return semis, cents


def mpe_configuration(manager: int, members: int) -> list[Message]:
    """MPE Configuration Message: RPN 6 on the manager channel (0 = lower zone,
    15 = upper zone, of any port: see :func:`on_port`), data entry MSB = number of member channels (0 turns the
    zone off). MPE specification (The MIDI Association, 2018)."""
    if manager < 0 or manager % 16 not in (0, 15):
        raise ValueError("an MPE manager channel is channel 1 or 16")
    if not (0 <= members <= 15):
        raise ValueError("an MPE zone has 0..15 member channels")
    return on_port(rpn(manager % 16, RPN_MPE_CONFIGURATION, members), manager)


# ---------------------------------------------------------------------------
# Pitch bend arithmetic
# ---------------------------------------------------------------------------
def bend_value(offset_cents: float, range_cents: float, scale: float = 1.0) -> int:
    """The unsigned 14-bit bend that raises a note by ``offset_cents``.

    ``value = 8192 + round(8192 * offset_cents / (range_cents * scale))``,
    clamped to 0..16383. ``scale`` is the synth correction (the fraction of the
    specified bend size the synth actually plays; 1.0 for a correct synth).
    """
    v = BEND_CENTRE + round(BEND_CENTRE * offset_cents / (range_cents * scale))
    if v < BEND_MIN:
        return BEND_MIN
    if v > BEND_MAX:
        return BEND_MAX
    return v


def bend_cents(value: int, range_cents: float) -> float:
    """Cents a correct synth bends for unsigned 14-bit ``value`` at ``range_cents``:
    ``(value - 8192) * range_cents / 8192``."""
    return (value - BEND_CENTRE) * range_cents / BEND_CENTRE


def reachable(offset_cents: float, range_cents: float, scale: float = 1.0) -> bool:
    """Whether ``offset_cents`` lies within the bend range (exactly, before clamping)."""
    v = BEND_CENTRE + round(BEND_CENTRE * offset_cents / (range_cents * scale))
    return BEND_MIN <= v <= BEND_MAX


def is_valid(m: mido.Message) -> bool:
    """Whether a message re-parses from its bytes to an equal message."""
    try:
        return mido.Message.from_bytes(m.bytes()) == m
    except (ValueError, TypeError):
        return False
