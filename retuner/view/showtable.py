"""The tables ``retuner show`` prints: degrees of a tuning and the sizes and beat rates of its thirds and fifths."""

from __future__ import annotations

from dataclasses import dataclass
from fractions import Fraction
from typing import Optional

from retuner.pitch.intervals import USUAL, interval_name
from retuner.pitch.tuning import KEY_NAMES, Tuning, beat_rate, cents_to_ratio, nearest_simple_ratio, ratio_to_cents

# The intervals a teacher compares, with the just ratio each is heard against (upper:lower = p:q).
CHECKED_INTERVALS = tuple((interval_name(s), s, USUAL[s].ratio) for s in (4, 3, 7))   # major third, minor third, fifth


@dataclass
class DegreeRow:
    index: int
    name: str
    cents: float           # above the root
    from_edo12: float      # the degree's key as it sounds, against that key's own 12-EDO pitch (no folding)
    ratio: Optional[Fraction]   # exact ratio, or the nearest simple ratio (``exact`` False)
    hz: Optional[float]
    exact: bool = False          # True when ``ratio`` is the degree's exact value


@dataclass
class IntervalRow:
    lower: str
    kind: str
    upper: str
    cents: float
    deviation: float        # from the just ratio
    just: Fraction
    beat_hz: float


def degree_rows(t: Tuning, octave: int = 4) -> list[DegreeRow]:
    rows = []
    root_key = t.root + 12 * (octave - 4) if t.is_twelve else t.root
    root_period = t.key_degree[root_key][0] if t.key_degree and t.key_degree[root_key] else 0
    for i, deg in enumerate(t.degrees):
        c = deg.cents
        key = _key_of(t, i, root_period)
        hz = t.hz(key) if key is not None else None
        if key is not None:
            # as the key sounds (concert pitch applied), against the same key in 12-EDO: an
            # edo19 key can sound several semitones from it, and is shown so
            dev = t.cents[key] - 100.0 * key
        else:
            dev = c - 100.0 * (i if t.is_twelve else round(c / 100.0))
        exact = deg.interval.as_fraction
        rows.append(DegreeRow(i, deg.name, c, dev, exact if exact is not None else nearest_ratio(c),
                              hz, exact is not None))
    return rows


def nearest_ratio(cents: float) -> Fraction:
    """The simple ratio nearest to ``cents``: a 5-limit one within 15 cents when there is one,
    else a 7-limit one (within 15, then 50 cents), else the nearest ratio with a denominator up
    to 128, so that every degree has one."""
    for limit, tolerance in ((5, 15.0), (7, 15.0), (7, 50.0)):
        r = nearest_simple_ratio(cents, tolerance=tolerance, prime_limit=limit)
        if r is not None:
            return r
    return Fraction(cents_to_ratio(cents)).limit_denominator(128)


def _key_of(t: Tuning, degree: int, period: int) -> Optional[int]:
    """The key that plays ``degree`` in period number ``period`` (None when no key does)."""
    for k, where in enumerate(t.key_degree):
        if where == (period, degree):
            return k
    return None


def format_ratio(r: Fraction) -> str:
    return f"{r.numerator}/{r.denominator}"


def interval_rows(t: Tuning, octave: int = 4) -> list[IntervalRow]:
    """From every key of one octave: major third, minor third, fifth (12-note tunings only)."""
    rows = []
    base = 12 * (octave + 1)
    for pc in range(12):
        lo = base + pc
        for kind, steps, just in CHECKED_INTERVALS:
            hi = lo + steps
            if not (0 <= hi < 128) or t.cents[lo] is None or t.cents[hi] is None:
                continue
            size = t.cents[hi] - t.cents[lo]
            f1, f2 = t.hz(lo), t.hz(hi)
            rows.append(IntervalRow(KEY_NAMES[pc], kind, KEY_NAMES[hi % 12], size,
                                    size - ratio_to_cents(just), just,
                                    beat_rate(f1, f2, just.numerator, just.denominator)))
    return rows
