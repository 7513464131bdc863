"""What a player's keyboard sends, short to write in a test: note-on, note-off, a controller,
the wheel (mido messages; channels 0-based as in mido)."""

from __future__ import annotations

import mido


def ON(k, v=100, ch=0):
    return mido.Message("note_on", channel=ch, note=k, velocity=v)


def OFF(k, ch=0, v=0):
    return mido.Message("note_off", channel=ch, note=k, velocity=v)


def CC(c, v, ch=0):
    return mido.Message("control_change", channel=ch, control=c, value=v)


def WHEEL(p, ch=0):
    return mido.Message("pitchwheel", channel=ch, pitch=p)
