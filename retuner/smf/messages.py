"""Channel messages and system exclusive between file bytes and mido messages.

Layouts: MIDI 1.0 (status byte, data bytes; pitch bend 14 bits, LSB first, centre 8192) and
"Standard MIDI Files 1.0" (system exclusive as F0 length data; other system messages escaped
as F7 length bytes).
"""

from __future__ import annotations

import heapq
from typing import Iterable, Optional

import mido
from mido.messages.messages import Message

from retuner.errors import RetunerError
from retuner.smf.reader import CHANNEL, DATA_LEN, META_END_OF_TRACK, META_TEMPO, NO_LIMITS, SYSEX, \
    _header, read_varlen, stream_events
from retuner.smf.tempo import DEFAULT_TEMPO, TempoMap
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


#: bytes of a channel message by its status byte (the status byte and its data bytes)
_SIZE = [0] * 128 + [1 + DATA_LEN[s & 0xF0] for s in range(0x80, 0xF0)] + [0] * 16


def _wire_track(data: bytes, start: int, end: int):
    """(tick, raw) of one track's channel messages (with their status byte), system
    exclusive (F0 length data, as in the file) and Set Tempo events, in file order; the
    other events are skipped. For a file read strictly before (our own output, or an input
    converted a moment ago): no checks beyond the layout."""
    pos = start
    tick = 0
    running = 0
    size = _SIZE
    while pos < end:
        b = data[pos]
        pos += 1
        delta = b & 0x7F
        while b & 0x80:
            b = data[pos]
            pos += 1
            delta = (delta << 7) | (b & 0x7F)
        tick += delta
        status = data[pos]
        if status < 0xF0:
            if status & 0x80:
                running = status
                n = size[status]
                yield tick, data[pos:pos + n]
                pos += n
            else:                               # running status
                n = size[running] - 1
                yield tick, bytes((running,)) + data[pos:pos + n]
                pos += n
            continue
        if status == 0xFF:
            mtype = data[pos + 1]
            p = pos + 2
        else:
            mtype = None
            p = pos + 1
        b = data[p]
        p += 1
        length = b & 0x7F
        while b & 0x80:
            b = data[p]
            p += 1
            length = (length << 7) | (b & 0x7F)
        if mtype is None or mtype == META_TEMPO:
            yield tick, data[pos:p + length]
        elif mtype == META_END_OF_TRACK:
            return
        pos = p + length
        running = 0


def wire_stream(data: bytes, path: str = "<output>"):
    """(seconds, bytes) of every channel message and system exclusive of a file, as
    :func:`iter_output_stream` gives them (the same events, order and seconds) but as the
    bytes a synth receives (MIDI 1.0: status byte and data bytes; system exclusive from F0
    to F7) instead of mido messages: the measures read an output of some million events
    with no object per event. For a file already read strictly (our own output, or the input
    of a conversion); a malformed one raises :class:`RetunerError`."""
    h = _header(data, path, NO_LIMITS)
    if len(h.spans) == 1:
        s, e = h.spans[0]
        merged = _wire_track(data, s, e)
    else:
        merged = heapq.merge(*(_wire_track(data, s, e) for s, e in h.spans), key=lambda ev: ev[0])
    tm = TempoMap(h.division, (), h.smpte)
    spt = tm._spt(DEFAULT_TEMPO)
    base_tick, base_sec = 0, 0.0
    smpte = h.smpte
    try:
        for tick, raw in merged:
            status = raw[0]
            if status < 0xF0:
                yield base_sec + (tick - base_tick) * spt, raw
            elif status == 0xF0:
                length, p = read_varlen(raw, 1, len(raw), lambda pos: "")
                body = raw[p:p + length]
                if body.endswith(b"\xF7"):
                    body = body[:-1]
                if any(b > 0x7F for b in body):
                    continue                    # not a message a synth could receive
                yield base_sec + (tick - base_tick) * spt, b"\xF0" + body + b"\xF7"
            elif status == 0xFF and not smpte:
                t = base_sec + (tick - base_tick) * spt
                base_tick, base_sec = tick, t
                spt = tm._spt(int.from_bytes(raw[3:6], "big"))
    except (IndexError, KeyError) as exc:
        raise RetunerError(f"malformed track data ({exc.__class__.__name__})", file=path) from exc
