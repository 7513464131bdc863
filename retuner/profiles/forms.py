"""The ways a profile defines one period of its scale, as a table: form name -> builder.

- ``equal``: ``{steps: 19, period: 2/1}``, n equal steps of a period;
- ``scale``: ``{degrees: [1/1, 16/15, 9/8, ...], period: 2/1}``, every degree above the root,
  the root itself first;
- ``temperament``: ``{start: Eb, fifths: -1/4 syntonic}``, 12 notes as a chain of 11 fifths,
  laid out from C.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from fractions import Fraction
from typing import Callable, Optional

from retuner.pitch.tuning import KEY_NAMES, Interval, chain_of_fifths
from retuner.profiles import values
from retuner.profiles.document import Mapping, Sequence, Where

#: more degrees than anyone plays; bounds the work a file can ask for
MAX_STEPS = 10_000
MAX_SCALE_DEGREES = 1_000
NOTE_PCS = values.NOTE_PCS


@dataclass
class Scale:
    degrees: list[Interval]          # one period, the unison first
    period: Interval
    names: Optional[list[str]]       # default degree names (None: numbers)


def check_fields(sub: Mapping, allowed: set[str], where: Where, prefix: str) -> None:
    for k in sub:
        if k not in allowed:
            raise where.err(f"unknown field (expected one of: {', '.join(sorted(allowed))})",
                            f"{prefix}{k}", sub, k)


def _period(body: Mapping, where: Where, form: str) -> Interval:
    period = values.interval(body.get("period", "2/1"), where, f"{form}.period", body, "period")
    if period.cents <= 0:
        raise where.err(f"the period must be wider than 1/1 (above 0 cents), got {period.cents:.3f} cents",
                        f"{form}.period", body, "period")
    return period


def equal(body: Mapping, where: Where) -> Scale:
    check_fields(body, {"steps", "period"}, where, "equal.")
    if "steps" not in body:
        raise where.err("required field is missing", "equal.steps", body)
    steps = values.whole(body["steps"], where, "equal.steps", body, "steps", 1, MAX_STEPS)
    period = _period(body, where, "equal")
    return Scale([period ** Fraction(i, steps) for i in range(steps)], period, [str(i) for i in range(steps)])


def scale(body: Mapping, where: Where) -> Scale:
    check_fields(body, {"degrees", "period"}, where, "scale.")
    if "degrees" not in body:
        raise where.err("required field is missing", "scale.degrees", body)
    raw = body["degrees"]
    if not isinstance(raw, Sequence) or not raw:
        raise where.err("expected a list of intervals above the root, the root (1/1) first",
                        "scale.degrees", body, "degrees")
    if len(raw) > MAX_SCALE_DEGREES:
        raise where.err(f"at most {MAX_SCALE_DEGREES} degrees, got {len(raw)}", "scale.degrees", body, "degrees")
    first = values.interval(raw[0], where, "scale.degrees[0]", raw, 0)
    if abs(first.cents) > 1e-9:
        raise where.err(f"the list starts with the root itself: write [1/1, {raw[0]}, ...]",
                        "scale.degrees[0]", raw, 0)
    period = _period(body, where, "scale")
    degrees = [Interval()]
    for i in range(1, len(raw)):
        d = values.interval(raw[i], where, f"scale.degrees[{i}]", raw, i)
        if d.cents <= degrees[-1].cents + 1e-9:
            raise where.err(f"degrees must rise: {d.cents:.3f} cents is not above degree {i - 1} "
                            f"({degrees[-1].cents:.3f} cents)", f"scale.degrees[{i}]", raw, i)
        if d.cents >= period.cents - 1e-9:
            raise where.err(f"a degree must lie below the period ({period.cents:.3f} cents), "
                            f"got {d.cents:.3f} cents", f"scale.degrees[{i}]", raw, i)
        degrees.append(d)
    names = list(KEY_NAMES) if len(degrees) == 12 and abs(period.cents - 1200) < 1e-9 else None
    return Scale(degrees, period, names)


def temperament(body: Mapping, where: Where) -> Scale:
    check_fields(body, {"start", "fifths"}, where, "temperament.")
    for req in ("start", "fifths"):
        if req not in body:
            raise where.err("required field is missing", f"temperament.{req}", body)
    start_name = body["start"]
    start_pc = _note_pc(start_name, where, "temperament.start", body, "start")
    raw = body["fifths"]
    if isinstance(raw, Sequence):
        if len(raw) != 11:
            raise where.err(f"a chain of 12 notes has 11 fifths, got {len(raw)}", "temperament.fifths", body, "fifths")
        fifths = [values.fifth(v, where, f"temperament.fifths[{i}]", raw, i) for i, v in enumerate(raw)]
    else:
        fifths = [values.fifth(raw, where, "temperament.fifths", body, "fifths")] * 11
    return Scale(chain_of_fifths(start_pc, fifths), Interval.ratio(2), _chain_names(start_pc, start_name.strip()))


def _note_pc(value, where: Where, field: str, container, key) -> int:
    if isinstance(value, str):
        mt = re.fullmatch(r"([A-G])([#b]*)", value.strip())
        if mt:
            return (NOTE_PCS[mt.group(1)] + mt.group(2).count("#") - mt.group(2).count("b")) % 12
    raise where.err(f"expected a note name like Eb or C#, got {value!r}", field, container, key)


def _chain_names(start_pc: int, start_name: str) -> list[str]:
    """Spell the 12 notes of a chain of fifths starting at ``start_name``."""
    letters = "FCGDAEB"
    acc = start_name[1:].count("#") - start_name[1:].count("b")
    names = [""] * 12
    idx = letters.index(start_name[0])
    for i in range(12):
        pos = idx + i
        a = acc + pos // 7
        names[(start_pc + 7 * i) % 12] = letters[pos % 7] + ("#" * a if a > 0 else "b" * (-a))
    return names


#: form name -> builder; a profile gives exactly one of these fields
FORMS: dict[str, Callable[[Mapping, Where], Scale]] = {
    "equal": equal,
    "scale": scale,
    "temperament": temperament,
}
