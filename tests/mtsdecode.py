"""Decoding MIDI Tuning Standard messages from their bytes, independently of retuner's code."""

from __future__ import annotations


def parse_single_note(m):
    """Decode a single note tuning change from its bytes, written from the MIDI Tuning
    Standard (MMA, 1992; bank form from CA-020), single note tuning change:
      F0 7F <dev> 08 02 <program> <count> [<key> xx yy zz]* F7     (real-time)
      F0 7F|7E <dev> 08 07 <bank> <program> <count> [<key> xx yy zz]* F7
    frequency = xx semitones + (yy*128 + zz) / 16384 semitone above key 0."""
    b = m.bytes()
    assert b[0] == 0xF0 and b[-1] == 0xF7 and b[3] == 0x08
    body = b[1:-1]
    rt, dev, sub2 = body[0], body[1], body[3]
    if sub2 == 0x02:
        bank, prog, count, rest = None, body[4], body[5], body[6:]
    else:
        assert sub2 == 0x07
        bank, prog, count, rest = body[4], body[5], body[6], body[7:]
    assert len(rest) == 4 * count
    keys = {}
    for i in range(count):
        k, xx, yy, zz = rest[4 * i:4 * i + 4]
        keys[k] = (xx + (yy * 128 + zz) / 16384) * 100.0
    return {"realtime": rt == 0x7F, "device": dev, "bank": bank, "program": prog, "keys": keys}
