"""Channel messages and system exclusive between file bytes and mido messages.

Layouts: MIDI 1.0 (status byte, data bytes; pitch bend 14 bits, LSB first, centre 8192) and
"Standard MIDI Files 1.0" (system exclusive as F0 length data; other system messages escaped
as F7 length bytes).
"""

from __future__ import annotations

from typing import Iterable, Optional

import mido
from mido.messages.messages import Message

from retuner.smf.reader import CHANNEL, NO_LIMITS, SYSEX, read_varlen, stream_events
from retuner.smf.writer import varlen

#: mido message types by status high nibble.
TYPES = {0x80: "note_off", 0x90: "note_on", 0xA0: "polytouch", 0xB0: "control_change",
         0xC0: "program_change", 0xD0: "aftertouch", 0xE0: "pitchwheel"}


def raw_to_message(raw: bytes) -> Message:
    """A channel message's bytes -> mido Message (fast: no per-field checks; bytes are validated)."""
    status = raw[0]
    hi = status & 0xF0
    ch = status & 0x0F
    m = Message.__new__(Message)
    d = vars(m)
    t = TYPES[hi]
    d["type"] = t
    d["channel"] = ch
    if hi == 0x80 or hi == 0x90:
        d["note"] = raw[1]
        d["velocity"] = raw[2]
    elif hi == 0xB0:
        d["control"] = raw[1]
        d["value"] = raw[2]
    elif hi == 0xE0:
        d["pitch"] = (raw[1] | (raw[2] << 7)) - 8192
    elif hi == 0xC0:
        d["program"] = raw[1]
    elif hi == 0xD0:
        d["value"] = raw[1]
    else:  # polytouch
        d["note"] = raw[1]
        d["value"] = raw[2]
    d["time"] = 0
    return m


def message_to_raw(m: Message) -> bytes:
    """An engine output message -> bytes as written in a file track."""
    t = m.type
    if t == "note_on":
        return bytes((0x90 | m.channel, m.note, m.velocity))
    if t == "note_off":
        return bytes((0x80 | m.channel, m.note, m.velocity))
    if t == "pitchwheel":
        v = m.pitch + 8192
        return bytes((0xE0 | m.channel, v & 0x7F, v >> 7))
    if t == "control_change":
        return bytes((0xB0 | m.channel, m.control, m.value))
    if t == "sysex":
        body = bytes(m.data) + b"\xF7"
        return b"\xF0" + varlen(len(body)) + body
    b = bytes(m.bytes())
    if b[0] < 0xF0:
        return b
    # other system messages cannot stand in a file as such: SMF 1.0 escape (F7 length bytes)
    return b"\xF7" + varlen(len(b)) + b


def is_channel_raw(raw: bytes) -> bool:
    return raw[0] < 0xF0


def iter_output_stream(data: bytes, path: str = "<output>", channels: Optional[Iterable[int]] = None):
    """(seconds, mido message) of every channel message and system exclusive of a file we
    wrote, in time order (the file's own tempo map), made as they are read: a caller that
    decodes as it goes keeps no more than one message. The input limits do not apply: an
    output holds more events than its input."""
    keep = None if channels is None else set(channels)
    to_message = raw_to_message
    for t, tick, ti, kind, raw in stream_events(data, path, NO_LIMITS):
        if kind == CHANNEL:
            if keep is None or (raw[0] & 0x0F) in keep:
                yield t, to_message(raw)
        elif kind == SYSEX and raw[0] == 0xF0:
            length, p = read_varlen(raw, 1, len(raw), lambda pos: "")
            body = raw[p:p + length]
            if body.endswith(b"\xF7"):
                body = body[:-1]
            try:
                msg = mido.Message("sysex", data=body)
            except ValueError:
                continue
            yield t, msg


def output_stream(data: bytes, path: str = "<output>", channels: Optional[Iterable[int]] = None) -> list:
    """:func:`iter_output_stream` as a list."""
    return list(iter_output_stream(data, path, channels))
