"""A part's *dress*: what makes an input channel's notes sound as its own instrument.

The dress of a channel is its program, its bank (select MSB and LSB) and the controllers that
shape its sound and stay set (volume, pan, expression, modulation and the other continuous
controllers; not the pedals, RPN/NRPN data entry or channel mode messages: see
``retuner.midi.encode.DRESS_CCS``). The engine keeps the last dress each input channel set
(:class:`retuner.engine.inputs.InputState`); the pool mode keeps what each output channel
wears, and dresses a channel again for another part before that part's note sounds on it
(:mod:`retuner.engine.outputs.pool`). A value a part never set is the synth's default
(``retuner.midi.encode.DRESS_DEFAULTS``).
"""

from __future__ import annotations

from typing import Any, Optional, Union

import mido

from retuner.midi import encode as E

#: the key of the program in a dress (the controllers are keyed by their numbers)
PROGRAM = "program"
Key = Union[int, str]
_BANK = (E.CC_BANK_MSB, E.CC_BANK_LSB)


def dress_key(msg: Any) -> Optional[Key]:
    """The dress entry ``msg`` sets (None: it is no part of a dress)."""
    typ = msg.type
    if typ == "program_change":
        return PROGRAM
    if typ == "control_change" and msg.control in E.DRESS_CCS:
        return msg.control
    return None


def dress_value(msg: Any) -> int:
    return msg.program if msg.type == "program_change" else msg.value


def default(key: Key) -> int:
    return 0 if key == PROGRAM else E.DRESS_DEFAULTS.get(key, 0)


def reset_all_controllers(dress: dict) -> None:
    """What Reset All Controllers does to a dress (RP-015)."""
    for k, v in E.RESET_ALL_CONTROLLERS_SETS.items():
        if k in dress:
            dress[k] = v


def redress(channel: int, have: dict, want: dict) -> tuple[list[mido.Message], dict]:
    """The messages that change output ``channel`` from dress ``have`` to dress ``want``,
    and the dress it wears then. Only what differs is sent: the bank first (bank select
    takes effect at the next program change, so a changed bank sends the program too),
    then the program, then the controllers in number order."""
    out: list[mido.Message] = []
    keys = set(have) | set(want)
    now = {k: want.get(k, default(k)) for k in keys}

    def differs(k: Key) -> bool:
        return have.get(k, default(k)) != now.get(k, default(k))

    bank = any(differs(k) for k in _BANK)
    if bank:
        for k in _BANK:
            out.append(E.control_change(channel, k, now.get(k, default(k))))
    if bank or differs(PROGRAM):
        out.append(E.msg("program_change", channel=channel, program=now.get(PROGRAM, 0)))
    for k in sorted(k for k in keys if k != PROGRAM and k not in _BANK):
        if differs(k):
            out.append(E.control_change(channel, k, now[k]))
    return out, now
