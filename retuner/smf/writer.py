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


def serialize(fmt: int, division_header: int, tracks: Sequence[tuple[list, int]]) -> bytes:
    """SMF bytes from tracks given as (events [(tick, raw)] in non-decreasing tick order, end tick)."""
    out = [b"MThd", (6).to_bytes(4, "big"), fmt.to_bytes(2, "big"), len(tracks).to_bytes(2, "big"),
           division_header.to_bytes(2, "big")]
    vl = _VARLEN_CACHE
    for events, end_tick in tracks:
        parts = []
        app = parts.append
        last = 0
        for tick, raw in events:
            d = tick - last
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
