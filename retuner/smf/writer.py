"""Writing Standard MIDI Files, byte-exact: every event's bytes as given, no running status.

"Standard MIDI Files 1.0": a header chunk (format, track count, division as read) and one
MTrk chunk per track, each event after its delta time as a variable-length quantity, each
track closed by End of Track (FF 2F 00) at the track's end tick.
"""

from __future__ import annotations

from typing import Sequence


def _encode_varlen(n: int) -> bytes:
    out = [n & 0x7F]
    n >>= 7
    while n:
        out.append((n & 0x7F) | 0x80)
        n >>= 7
    return bytes(reversed(out))


_VARLEN_CACHE = [_encode_varlen(i) for i in range(4096)]


def varlen(n: int) -> bytes:
    """A variable-length quantity (SMF 1.0: 7 bits a byte, high bit set on all but the last)."""
    return _VARLEN_CACHE[n] if n < 4096 else _encode_varlen(n)


class TrackBytes:
    """A track written as its events come: delta time and bytes of each, appended to one
    buffer (a few bytes an event, where a list of (tick, bytes) costs a hundred). An event
    earlier than the last one is written at the last one's tick (a delta is never negative)."""

    __slots__ = ("body", "last", "count")

    def __init__(self) -> None:
        self.body = bytearray()
        self.last = 0
        self.count = 0

    def append(self, event: tuple[int, bytes]) -> None:
        tick, raw = event
        d = tick - self.last
        if d > 0:
            self.body += _VARLEN_CACHE[d] if d < 4096 else _encode_varlen(d)
            self.last = tick
        else:
            self.body.append(0)
        self.body += raw
        self.count += 1

    def extend(self, events) -> None:
        for ev in events:
            self.append(ev)

    def __len__(self) -> int:
        return self.count


def serialize(fmt: int, division_header: int, tracks: Sequence[tuple[list, int]]) -> bytes:
    """SMF bytes from tracks given as (events, end tick): events a list of (tick, raw) in
    non-decreasing tick order (an earlier one is written at the tick before it), or a
    :class:`TrackBytes`."""
    out = [b"MThd", (6).to_bytes(4, "big"), fmt.to_bytes(2, "big"), len(tracks).to_bytes(2, "big"),
           division_header.to_bytes(2, "big")]
    vl = _VARLEN_CACHE
    for events, end_tick in tracks:
        if isinstance(events, TrackBytes):
            body = bytes(events.body) + varlen(max(end_tick - events.last, 0)) + b"\xFF\x2F\x00"
            out += [b"MTrk", len(body).to_bytes(4, "big"), body]
            continue
        parts = []
        app = parts.append
        last = 0
        for tick, raw in events:
            d = tick - last
            if d < 0:
                d = 0
                tick = last
            app(vl[d] if d < 4096 else _encode_varlen(d))
            app(raw)
            last = tick
        d = max(end_tick - last, 0)
        app(varlen(d))
        app(b"\xFF\x2F\x00")
        body = b"".join(parts)
        out.append(b"MTrk")
        out.append(len(body).to_bytes(4, "big"))
        out.append(body)
    return b"".join(out)
