"""The system resets a General MIDI synth obeys, and telling them apart.

After any of these a synth is back at its power-on state: pitch bend range 2
semitones, wheel centred, pedals up, RPN null, no tuning program selected, and
every note silenced. Whatever set-up an engine sent before the reset (bend
ranges, MPE configuration, MTS tuning selection and key table) is gone and has to
be sent again after it.

Byte values (system exclusive data without F0 and F7), from memory; they are
checked in the tests against the documents named there:

* GM System On: universal non-real-time (7E), device 7F (all), sub-ID 09 (General
  MIDI), 01 (GM 1 on) -- General MIDI System Level 1 (MMA, 1991);
* GM2 System On: the same with 03 (GM 2 on) -- General MIDI 2 (MMA, 1999);
* GS Reset: Roland (41), device 10, model 42 (GS), DT1 (12), address 40 00 7F,
  data 00, checksum 41 -- Roland GS format documents;
* XG System On: Yamaha (43), parameter change to device 0 (10), model 4C (XG),
  address 00 00 7E, data 00 -- Yamaha XG specification.

The System Reset status byte (FF, a live message only: in a file FF starts a meta
event) resets a device as well (MIDI 1.0 Detailed Specification).
"""

from __future__ import annotations

from typing import Any, Optional

#: name -> system exclusive data (without F0 and F7)
SYSEX_RESETS: dict[str, bytes] = {
    "GM System On": bytes((0x7E, 0x7F, 0x09, 0x01)),
    "GM2 System On": bytes((0x7E, 0x7F, 0x09, 0x03)),
    "GS Reset": bytes((0x41, 0x10, 0x42, 0x12, 0x40, 0x00, 0x7F, 0x00, 0x41)),
    "XG System On": bytes((0x43, 0x10, 0x4C, 0x00, 0x00, 0x7E, 0x00)),
}

SYSTEM_RESET = "System Reset"

_BY_DATA = {data: name for name, data in SYSEX_RESETS.items()}


def _same_reset(data: bytes) -> Optional[str]:
    name = _BY_DATA.get(data)
    if name is not None:
        return name
    if len(data) >= 4 and data[0] == 0x7E and data[2] == 0x09 and data[3] in (0x01, 0x03):
        # GM / GM2 System On addressed to one device ID rather than to all
        return "GM System On" if data[3] == 0x01 else "GM2 System On"
    if len(data) == 9 and data[0] == 0x41 and data[2:] == SYSEX_RESETS["GS Reset"][2:]:
        return "GS Reset"       # another device ID (Roland: 10..1F)
    if len(data) == 7 and data[0] == 0x43 and data[1] & 0xF0 == 0x10 and data[2:] == SYSEX_RESETS["XG System On"][2:]:
        return "XG System On"   # another device number (Yamaha: 1n)
    return None


def system_reset(msg: Any) -> Optional[str]:
    """The reset ``msg`` (a mido message) is, by name, or None when it is none."""
    typ = msg.type
    if typ == "reset":
        return SYSTEM_RESET
    if typ == "sysex":
        return _same_reset(bytes(msg.data))
    return None


def system_reset_bytes(raw) -> Optional[str]:
    """The same for a message as a synth receives it (MIDI 1.0): System Reset (FF), or system
    exclusive from F0 to F7; None for anything else."""
    if not raw:
        return None
    if raw[0] == 0xFF and len(raw) == 1:
        return SYSTEM_RESET
    if raw[0] == 0xF0 and raw[-1] == 0xF7:
        return _same_reset(bytes(raw[1:-1]))
    return None


def system_reset_raw(raw: bytes) -> Optional[str]:
    """The same for a system exclusive event as it stands in a Standard MIDI File
    (F0, length, data, F7); None for anything else."""
    if not raw or raw[0] != 0xF0:
        return None
    pos = 1
    while pos < len(raw) and raw[pos] & 0x80:    # the length (variable-length quantity)
        pos += 1
    body = raw[pos + 1:]
    if body.endswith(b"\xF7"):
        body = body[:-1]
    return _same_reset(bytes(body))
