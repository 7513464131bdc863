"""The values a profile is written in, each carrying its kind.

- An interval is a ratio written with a slash (``5/4``, ``2/1``) or cents written with the word
  (``386.314 cents``, ``-100 cents``). A bare number (``700``, ``386.314``) is refused: the
  message shows both ways to write it.
- A key is a MIDI key number (``60``) or a key name in scientific pitch notation (``C4``,
  ``F#3``, ``Bb2``; C4 = key 60). A run of keys or degrees is ``FIRST to LAST``.
- A frequency carries its unit: ``440 Hz``.

Limits keep every value cheap to compute: a ratio's terms have at most MAX_DIGITS digits and no
prime factor above MAX_PRIME (factoring a huge prime would take hours), a tempering fraction at
most 4 digits a term.
"""

from __future__ import annotations

import math
import re
from fractions import Fraction
from typing import Any, Optional

from retuner.pitch.tuning import COMMAS, MAX_PRIME, NUM_KEYS, Interval
from retuner.profiles.document import Where

MAX_DIGITS = 30
#: cents written in a profile stay within 100 octaves either way
MAX_CENTS = 120_000.0
NOTE_PCS = {"C": 0, "D": 2, "E": 4, "F": 5, "G": 7, "A": 9, "B": 11}

_RATIO = re.compile(r"([+-]?)(\d+)\s*/\s*(\d+)")
_CENTS = re.compile(r"([+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?)\s*cents")
_NUMBER = re.compile(r"[+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?")
_KEY_NAME = re.compile(r"([A-G])([#b]?)(-1|\d)")
_HZ = re.compile(r"(\d+(?:\.\d*)?|\.\d+)\s*Hz")
_TEMPERING = re.compile(r"([+-]?\d{1,4}(?:/\d{1,4})?)\s+([a-z]+)")


def both_ways(number: Any) -> str:
    """How to write a bare number as cents or as a ratio (for the error line)."""
    text = str(number).strip()
    if text.isdigit() and int(text) > 0:
        return f"write {int(text)}/1 for the ratio {int(text)}:1, or {text} cents"
    return f"write {text} cents, or a ratio with a slash like 5/4"


def interval(value: Any, where: Where, field: str, container: Any, key: Any) -> Interval:
    """A ratio ``p/q`` or ``N cents``."""
    if isinstance(value, bool) or value is None:
        raise where.err(f"expected a ratio like 3/2 or cents like 701.955 cents, got {value!r}",
                        field, container, key)
    if isinstance(value, (int, float)):
        raise where.err(f"a bare number {value!r} has no kind: {both_ways(value)}", field, container, key)
    if not isinstance(value, str):
        raise where.err(f"expected a ratio like 3/2 or cents like 701.955 cents, got {value!r}",
                        field, container, key)
    s = value.strip()
    m = _RATIO.fullmatch(s)
    if m:
        sign, num, den = m.groups()
        if len(num) > MAX_DIGITS or len(den) > MAX_DIGITS:
            raise where.err(f"a ratio's terms have at most {MAX_DIGITS} digits", field, container, key)
        if int(den) == 0:
            raise where.err("a ratio's denominator must not be 0", field, container, key)
        if sign == "-" or int(num) == 0:
            raise where.err(f"a ratio must be greater than 0, got {s} (a downward interval "
                            "is written in cents, like -100 cents)", field, container, key)
        try:
            return Interval.ratio(Fraction(int(num), int(den)))
        except ValueError as exc:   # a prime factor above MAX_PRIME
            raise where.err(str(exc), field, container, key) from None
    m = _CENTS.fullmatch(s)
    if m:
        c = float(m.group(1))
        if not math.isfinite(c) or abs(c) > MAX_CENTS:
            raise where.err(f"cents must lie within ±{MAX_CENTS:.0f} cents, got {s}", field, container, key)
        return Interval.cents_value(c)
    if _NUMBER.fullmatch(s):
        raise where.err(f"a bare number {s} has no kind: {both_ways(s)}", field, container, key)
    m = re.fullmatch(r"([+-]?[\d.]+)\s*(c|cent|ct)", s)
    if m:
        raise where.err(f"write cents with the word: {m.group(1)} cents", field, container, key)
    raise where.err(f"expected a ratio like 3/2 or cents like 701.955 cents, got {value!r}",
                    field, container, key)


def format_interval(iv: Interval) -> str:
    """An interval as a profile writes it (exact ratio, else cents)."""
    f = iv.as_fraction
    return f"{f.numerator}/{f.denominator}" if f is not None else f"{iv.cents:.6f} cents"


def fifth(value: Any, where: Where, field: str, container: Any, key: Any) -> Interval:
    """One fifth of a temperament: ``pure``, a tempering like ``-1/4 syntonic`` (narrowed by a
    quarter of the syntonic comma), or an interval (``696.578 cents``, ``3/2``)."""
    pure = Interval.ratio(Fraction(3, 2))
    if isinstance(value, str):
        s = value.strip()
        if s == "pure":
            return pure
        m = _TEMPERING.fullmatch(s)
        if m:
            comma = m.group(2)
            if comma not in COMMAS:
                raise where.err(f"unknown comma {comma!r} (known: {', '.join(COMMAS)})", field, container, key)
            part = m.group(1)
            if part.endswith("/0"):
                raise where.err(f"a fraction's denominator must not be 0, got {s!r}", field, container, key)
            return pure * Interval.ratio(COMMAS[comma]) ** Fraction(part)
        if not (_RATIO.fullmatch(s) or _CENTS.fullmatch(s) or _NUMBER.fullmatch(s)):
            raise where.err("expected 'pure', a tempering like '-1/4 syntonic', or an interval like "
                            f"696.578 cents; got {value!r}", field, container, key)
    return interval(value, where, field, container, key)


def key_number(value: Any, where: Where, field: str, container: Any, key: Any) -> int:
    """A MIDI key: a number 0..127 or a name like C4 (key 60), F#3, Bb2, G9 (key 127)."""
    if isinstance(value, int) and not isinstance(value, bool):
        k = value
    elif isinstance(value, str) and value.strip().isdigit():
        k = int(value.strip())
    elif isinstance(value, str) and _KEY_NAME.fullmatch(value.strip()):
        letter, acc, octave = _KEY_NAME.fullmatch(value.strip()).groups()
        k = 12 * (int(octave) + 1) + NOTE_PCS[letter] + (acc == "#") - (acc == "b")
    else:
        raise where.err(f"expected a key number 0..127 or a key name like C4, got {value!r}",
                        field, container, key)
    if not 0 <= k < NUM_KEYS:
        raise where.err(f"a key must be between 0 and {NUM_KEYS - 1} (C-1 to G9), got {value!r}",
                        field, container, key)
    return k


def split_run(value: Any) -> Optional[tuple[str, str]]:
    """``'21 to 108'`` -> ('21', '108'); a single value -> None."""
    if isinstance(value, str):
        parts = re.fullmatch(r"\s*(\S+)\s+to\s+(\S+)\s*", value)
        if parts:
            return parts.group(1), parts.group(2)
    return None


def key_run(value: Any, where: Where, field: str, container: Any, key: Any) -> tuple[int, int]:
    """A key or a run of keys ``FIRST to LAST`` -> (first, last), first <= last."""
    run = split_run(value)
    if run is None:
        k = key_number(value, where, field, container, key)
        return k, k
    lo = key_number(run[0], where, field, container, key)
    hi = key_number(run[1], where, field, container, key)
    if lo > hi:
        raise where.err(f"a run of keys goes upwards: {value!r} starts above where it ends", field, container, key)
    return lo, hi


def degree_number(value: Any, where: Where, field: str, container: Any, key: Any) -> int:
    if isinstance(value, int) and not isinstance(value, bool):
        d = value
    elif isinstance(value, str) and re.fullmatch(r"\s*[+-]?\d{1,6}\s*", value):
        d = int(value)
    else:
        raise where.err(f"expected a degree number like 0, 7 or -1, or a run like 0 to 11; got {value!r}",
                        field, container, key)
    if abs(d) > 1_000_000:
        raise where.err("a degree number must lie within ±1000000", field, container, key)
    return d


def degree_run(value: Any, where: Where, field: str, container: Any, key: Any) -> tuple[int, Optional[int]]:
    """A degree (the first of a run) or a run of degrees ``FIRST to LAST`` -> (first, last or None)."""
    run = split_run(value)
    if run is None:
        return degree_number(value, where, field, container, key), None
    return (degree_number(run[0], where, field, container, key),
            degree_number(run[1], where, field, container, key))


def concert_pitch(value: Any, where: Where, field: str, container: Any, key: Any) -> tuple[int, float]:
    """``A4 = 440 Hz`` (or ``key 69 = 440 Hz``): which key sounds at which frequency."""
    if isinstance(value, str) and "=" in value:
        left, _, right = value.partition("=")
        left = left.strip()
        if left.startswith("key "):
            left = left[4:].strip()
        k = key_number(left, where, field, container, key)
        m = _HZ.fullmatch(right.strip())
        if m:
            hz = float(m.group(1))
            if not 1.0 <= hz <= 20000.0:
                raise where.err(f"the frequency must be between 1 Hz and 20000 Hz, got {right.strip()}",
                                field, container, key)
            return k, hz
    raise where.err(f"expected a key and its frequency like A4 = 440 Hz, got {value!r}", field, container, key)


def format_concert_pitch(key: int, hz: float) -> str:
    return f"{key_name(key)} = {float(hz)!r} Hz"


def key_name(key: int) -> str:
    """Key name as profiles write it: sharps, scientific octave (60 -> C4)."""
    names = ("C", "C#", "D", "D#", "E", "F", "F#", "G", "G#", "A", "A#", "B")
    return f"{names[key % 12]}{key // 12 - 1}"


def check_text(value: Any, where: Where, field: str, container: Any, one_line: bool) -> str:
    if not isinstance(value, str) or (one_line and (not value.strip() or "\n" in value.strip())):
        raise where.err("expected one line of text" if one_line else "expected text", field, container, field)
    return value.strip()


def whole(value: Any, where: Where, field: str, container: Any, key: Any, lo: int, hi: int) -> int:
    if isinstance(value, bool) or not isinstance(value, int):
        raise where.err(f"expected a whole number, got {value!r}", field, container, key)
    if not lo <= value <= hi:
        raise where.err(f"must be between {lo} and {hi}, got {value}", field, container, key)
    return value

