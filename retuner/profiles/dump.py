"""A profile written out in the current form, for programs that make profiles (``retuner fit``).

Every interval is written with its kind (``5/4``, ``386.313714 cents``), so what is written reads
back to the same pitches.
"""

from __future__ import annotations

import json
from fractions import Fraction
from typing import Optional, Sequence, Union

from retuner.pitch.tuning import Interval
from retuner.profiles.values import format_concert_pitch, format_interval

Value = Union[Interval, Fraction, int, float]


def _value(v: Value) -> str:
    """Exact ratios as p/q, floats as cents (six decimals: a millionth of a cent)."""
    if isinstance(v, Interval):
        return format_interval(v)
    if isinstance(v, (Fraction, int)) and not isinstance(v, bool):
        f = Fraction(v)
        return f"{f.numerator}/{f.denominator}"
    return f"{float(v):.6f} cents"


def _runs(runs: Sequence[tuple[int, int, int]]) -> str:
    parts = []
    for k0, k1, d0 in runs:
        parts.append(f"{k0}: {d0}" if k0 == k1 else f"{k0} to {k1}: {d0} to {d0 + k1 - k0}")
    return "{" + ", ".join(parts) + "}"


def dump_profile(*, id: str, description: str, source: str = "", comments: Sequence[str] = (),
                 equal: Optional[tuple[int, Value]] = None,
                 scale: Optional[Sequence[Value]] = None, period: Value = Fraction(2),
                 temperament: Optional[tuple[str, Union[str, Sequence[str]]]] = None,
                 runs: Optional[Sequence[tuple[int, int, int]]] = None, repeat: Optional[int] = None,
                 within: Optional[tuple[int, int]] = None,
                 concert_pitch: Optional[tuple[int, float]] = None,
                 names: Optional[Sequence[str]] = None) -> str:
    """Profile YAML text. Give exactly one of ``equal`` (steps, period), ``scale`` (the degrees,
    the root first; with ``period``) or ``temperament`` (start note, fifths). ``runs`` are
    (first key, last key, first degree); ``concert_pitch`` is (key, Hz)."""
    if sum(x is not None for x in (equal, scale, temperament)) != 1:
        raise ValueError("give exactly one of equal, scale, temperament")
    lines = [f"id: {id}", f"description: {json.dumps(description)}"]
    if source:
        lines.append(f"source: {json.dumps(source)}")
    lines += [f"# {c}" for c in comments]
    if equal is not None:
        lines.append(f"equal: {{steps: {int(equal[0])}, period: {_value(equal[1])}}}")
    elif scale is not None:
        lines += ["scale:", f"  degrees: [{', '.join(_value(d) for d in scale)}]", f"  period: {_value(period)}"]
    else:
        start, fifths = temperament  # type: ignore[misc]
        lines += ["temperament:", f"  start: {start}"]
        if isinstance(fifths, str):
            lines.append(f"  fifths: {fifths}")
        else:
            lines.append("  fifths:")
            lines += [f"    - {f}" for f in fifths]
    if names is not None:
        lines.append(f"names: [{', '.join(json.dumps(n) for n in names)}]")
    if runs is not None or within is not None:
        lines.append("layout:")
        if runs is not None:
            lines.append(f"  runs: {_runs(runs)}")
        if repeat is not None:
            lines.append(f"  repeat: {repeat}")
        if within is not None:
            lines.append(f"  within: {within[0]} to {within[1]}")
    if concert_pitch is not None:
        lines.append(f"concert_pitch: {format_concert_pitch(*concert_pitch)}")
    return "\n".join(lines) + "\n"
