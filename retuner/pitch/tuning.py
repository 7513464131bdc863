"""Pitch arithmetic and the key -> pitch map of one tuning.

Pitches of keys are expressed in **cents above key 0 of 12-EDO** (so in 12-EDO
key k sounds at exactly 100*k cents) and in Hz. Key 0 of 12-EDO at the standard
reference (ISO 16: A4 = key 69 = 440 Hz) is 440 * 2**(-69/12) = 8.1758 Hz.

Intervals stay exact until the final conversion to cents: an :class:`Interval`
is a product of rational powers of primes (a "monzo" with fractional
exponents) plus, only where a profile gives a value in cents, a float part.
A quarter-comma meantone fifth, 3/2 * (81/80)**(-1/4), is therefore held as
{2: -1, 3: 1} * {2: 4/4, 3: -4/4, 5: 1/4} = {3: 0, 5: 1/4}, i.e. exactly 5**(1/4).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from fractions import Fraction
from typing import Iterable, Mapping, Optional, Sequence

A4_KEY = 69
A4_HZ = 440.0  # ISO 16
KEY0_HZ = A4_HZ * 2.0 ** (-A4_KEY / 12.0)
NUM_KEYS = 128

SHARP_NAMES = ("C", "C#", "D", "D#", "E", "F", "F#", "G", "G#", "A", "A#", "B")
# Names of the 12 pitch classes as usually spelled on a keyboard laid out from C.
KEY_NAMES = ("C", "C#", "D", "Eb", "E", "F", "F#", "G", "G#", "A", "Bb", "B")


#: the largest prime a ratio may contain: factoring is trial division, and a ratio with a prime
#: factor of 20 digits would take hours (just intonation uses primes up to 31 or so)
MAX_PRIME = 9973


def _primes_to(n: int) -> list[int]:
    sieve = bytearray([1]) * (n + 1)
    sieve[0:2] = b"\0\0"
    for i in range(2, int(n ** 0.5) + 1):
        if sieve[i]:
            sieve[i * i::i] = bytearray(len(sieve[i * i::i]))
    return [i for i in range(n + 1) if sieve[i]]


_SMALL_PRIMES = _primes_to(MAX_PRIME)


def _factorize_bounded(n: int) -> dict[int, int]:
    """Prime factors of n, all at most MAX_PRIME (ValueError otherwise); at most a few thousand steps."""
    out: dict[int, int] = {}
    for p in _SMALL_PRIMES:
        if p * p > n:
            break
        while n % p == 0:
            out[p] = out.get(p, 0) + 1
            n //= p
    if n > 1:
        if n > MAX_PRIME:
            raise ValueError(f"a ratio may have no prime factor above {MAX_PRIME}")
        out[n] = out.get(n, 0) + 1
    return out


def _factorize(n: int) -> dict[int, int]:
    out: dict[int, int] = {}
    d = 2
    while d * d <= n:
        while n % d == 0:
            out[d] = out.get(d, 0) + 1
            n //= d
        d += 1 if d == 2 else 2
    if n > 1:
        out[n] = out.get(n, 0) + 1
    return out


@dataclass(frozen=True)
class Interval:
    """An exact interval: prod(p ** e for p, e in primes) * 2**(extra_cents/1200).

    ``primes`` maps primes to Fraction exponents. ``extra_cents`` is used only for
    intervals a profile gives in cents.
    """

    primes: tuple[tuple[int, Fraction], ...] = ()
    extra_cents: float = 0.0

    @staticmethod
    def _norm(d: Mapping[int, Fraction]) -> tuple[tuple[int, Fraction], ...]:
        return tuple(sorted((p, Fraction(e)) for p, e in d.items() if e != 0))

    @classmethod
    def ratio(cls, r: Fraction | int | str) -> "Interval":
        r = Fraction(r)
        if r <= 0:
            raise ValueError("a ratio must be greater than 0")
        d: dict[int, Fraction] = {}
        for p, e in _factorize_bounded(r.numerator).items():
            d[p] = d.get(p, Fraction(0)) + e
        for p, e in _factorize_bounded(r.denominator).items():
            d[p] = d.get(p, Fraction(0)) - e
        return cls(cls._norm(d))

    @classmethod
    def cents_value(cls, c: float) -> "Interval":
        return cls((), float(c))

    def __mul__(self, other: "Interval") -> "Interval":
        d = dict(self.primes)
        for p, e in other.primes:
            d[p] = d.get(p, Fraction(0)) + e
        return Interval(self._norm(d), self.extra_cents + other.extra_cents)

    def __truediv__(self, other: "Interval") -> "Interval":
        return self * other ** -1

    def __pow__(self, k: Fraction | int) -> "Interval":
        k = Fraction(k)
        return Interval(self._norm({p: e * k for p, e in self.primes}), self.extra_cents * float(k))

    @property
    def cents(self) -> float:
        return 1200.0 * sum(float(e) * math.log2(p) for p, e in self.primes) + self.extra_cents

    @property
    def as_fraction(self) -> Optional[Fraction]:
        """The exact rational value, or None when the interval is irrational."""
        if self.extra_cents or any(e.denominator != 1 for _, e in self.primes):
            return None
        out = Fraction(1)
        for p, e in self.primes:
            out *= Fraction(p) ** int(e)
        return out

    def __str__(self) -> str:
        f = self.as_fraction
        return str(f) if f is not None else f"{self.cents:.3f}c"


# Commas, exact (common practice; values checked in tests against published cents).
SYNTONIC_COMMA = Fraction(81, 80)
PYTHAGOREAN_COMMA = Fraction(3 ** 12, 2 ** 19)
SCHISMA = PYTHAGOREAN_COMMA / SYNTONIC_COMMA  # 32805/32768
COMMAS: dict[str, Fraction] = {
    "syntonic": SYNTONIC_COMMA,
    "pythagorean": PYTHAGOREAN_COMMA,
    "schisma": SCHISMA,
}
PURE_FIFTH = Fraction(3, 2)


def ratio_to_cents(r: float | Fraction) -> float:
    """1200 * log2(r)."""
    if isinstance(r, Fraction):
        return Interval.ratio(r).cents
    return 1200.0 * math.log2(r)


def cents_to_ratio(c: float) -> float:
    return 2.0 ** (c / 1200.0)


def cents_to_hz(c: float) -> float:
    """Hz of a pitch given in cents above key 0 of 12-EDO at A4 = 440 Hz."""
    return KEY0_HZ * 2.0 ** (c / 1200.0)


def hz_to_cents(hz: float) -> float:
    return 1200.0 * math.log2(hz / KEY0_HZ)


def beat_rate(f_low: float, f_high: float, p: int, q: int) -> float:
    """Beat rate in Hz of two tones near the ratio p:q (upper:lower).

    The p-th partial of the lower tone (p*f_low) and the q-th partial of the
    upper tone (q*f_high) nearly coincide; they beat at the difference of their
    frequencies: |q*f_high - p*f_low|.
    """
    return abs(q * f_high - p * f_low)


def nearest_simple_ratio(cents: float, max_denominator: int = 32, tolerance: float = 15.0,
                         prime_limit: int = 7) -> Optional[Fraction]:
    """The ratio within ``tolerance`` cents that best combines closeness and simplicity, or None.

    Only ratios of primes up to ``prime_limit`` (7-limit by default) count as simple.
    Score = error in cents + 2 * log2(p*q) (the Tenney height of p/q); lowest wins.
    """
    best: Optional[Fraction] = None
    best_key = None
    for q in range(1, max_denominator + 1):
        p = round(q * cents_to_ratio(cents))
        if p <= 0:
            continue
        r = Fraction(p, q)
        if r.denominator != q or max(_factorize(p * q) or {1: 1}) > prime_limit:
            continue
        err = abs(ratio_to_cents(r) - cents)
        if err <= tolerance:
            key = (err + 2.0 * math.log2(r.numerator * r.denominator), err)
            if best_key is None or key < best_key:
                best, best_key = r, key
    return best


def rounded(x: float, digits: int = 3) -> float:
    """``x`` rounded for display, without a minus sign on a value that rounds to zero."""
    return round(x, digits) + 0.0


def note_name(key: int) -> str:
    """Scientific pitch name of a key: 60 -> C4, 69 -> A4 (common practice)."""
    return f"{KEY_NAMES[key % 12]}{key // 12 - 1}"


@dataclass(frozen=True)
class Degree:
    """One degree of a scale: its name and its interval above the root."""

    name: str
    interval: Interval

    @property
    def cents(self) -> float:
        return self.interval.cents


@dataclass
class Tuning:
    """The pitch every MIDI key must sound at, in cents above key 0 of 12-EDO.

    ``cents[k]`` is None for an unmapped key. ``degrees`` and ``period`` describe
    one period of the scale (for display); ``root`` is the key that plays degree 0.
    """

    id: str
    cents: tuple[Optional[float], ...]
    description: str = ""
    source: str = ""
    degrees: tuple[Degree, ...] = ()
    period: Interval = field(default_factory=lambda: Interval.ratio(2))
    root: int = 60
    key_degree: tuple[Optional[tuple[int, int]], ...] = ()  # key -> (period number, degree index)

    def __post_init__(self) -> None:
        if len(self.cents) != NUM_KEYS:
            raise ValueError("a tuning needs exactly 128 keys")

    # -- construction ------------------------------------------------------
    @classmethod
    def from_cents(cls, id: str, cents: Sequence[Optional[float]], **kw) -> "Tuning":
        return cls(id=id, cents=tuple(None if c is None else float(c) for c in cents), **kw)

    @classmethod
    def equal12(cls, id: str = "edo12") -> "Tuning":
        degrees = tuple(Degree(KEY_NAMES[i], Interval.ratio(2) ** Fraction(i, 12)) for i in range(12))
        return cls(id=id, cents=tuple(100.0 * k for k in range(NUM_KEYS)),
                   description="12 equal divisions of the octave", degrees=degrees,
                   key_degree=tuple(divmod(k - 60, 12) for k in range(NUM_KEYS)))

    # -- queries -------------------------------------------------------------
    def target(self, key: int) -> Optional[float]:
        """Cents above key 0 of 12-EDO that ``key`` must sound at, or None if unmapped."""
        return self.cents[key]

    def hz(self, key: int) -> Optional[float]:
        c = self.cents[key]
        return None if c is None else cents_to_hz(c)

    def deviation(self, key: int) -> Optional[float]:
        """Cents from the key's own 12-EDO pitch (what a pitch bend must add)."""
        c = self.cents[key]
        return None if c is None else c - 100.0 * key

    @property
    def size(self) -> int:
        return len(self.degrees) if self.degrees else 12

    @property
    def is_twelve(self) -> bool:
        return self.size == 12 and abs(self.period.cents - 1200.0) < 1e-9

    def mapped_keys(self) -> list[int]:
        return [k for k in range(NUM_KEYS) if self.cents[k] is not None]

    def shifted(self, cents: float, id: Optional[str] = None) -> "Tuning":
        """The same tuning with every key moved by ``cents`` (reference pitch change)."""
        return Tuning(id=id or self.id, cents=tuple(None if c is None else c + cents for c in self.cents),
                      description=self.description, source=self.source, degrees=self.degrees,
                      period=self.period, root=self.root, key_degree=self.key_degree)

    def with_reference_hz(self, hz: float, key: int = A4_KEY) -> "Tuning":
        """Shift the whole keyboard so that ``key`` sounds at ``hz``."""
        c = self.cents[key]
        if c is None:
            raise ValueError(f"key {key} is unmapped")
        return self.shifted(hz_to_cents(hz) - c)


def build_keyboard(degrees: Sequence[Interval], period: Interval, key_degrees: Sequence[Optional[int]], *,
                   reference_key: int, reference_hz: float,
                   ) -> tuple[list[Optional[float]], list[Optional[tuple[int, int]]]]:
    """Lay a scale out on the 128 keys.

    ``degrees`` is one period of the scale, starting with the unison. ``key_degrees[k]`` is the
    degree key k plays, counted on through the periods (with n degrees, degree n is the unison
    one period up and -1 the last degree one period down), or None for a silent key. The whole
    keyboard is then shifted so ``reference_key`` sounds at ``reference_hz``.
    Returns (cents per key, (period number, degree) per key).
    """
    n = len(degrees)
    rel: list[Optional[float]] = [None] * NUM_KEYS
    where: list[Optional[tuple[int, int]]] = [None] * NUM_KEYS
    pc = period.cents
    deg_cents = [d.cents for d in degrees]
    for k, d in enumerate(key_degrees):
        if d is None:
            continue
        rep, idx = divmod(d, n)
        rel[k] = rep * pc + deg_cents[idx]
        where[k] = (rep, idx)
    ref = rel[reference_key]
    if ref is None:
        raise ValueError(f"the reference key {reference_key} is silent")
    shift = hz_to_cents(reference_hz) - ref
    return [None if c is None else c + shift for c in rel], where


def chain_of_fifths(start_index: int, fifths: Iterable[Interval]) -> list[Interval]:
    """The 12 pitch classes of a chain of fifths, as intervals above C, reduced to one octave.

    ``start_index`` is the pitch class (0 = C) of the chain's first note; ``fifths``
    the 11 fifths in chain order. C is placed at 1/1 and the chain is laid around it.
    """
    fifths = list(fifths)
    if len(fifths) != 11:
        raise ValueError("a chain of 12 notes has 11 fifths")
    octave = Interval.ratio(2)
    pos = [Interval()]
    for f in fifths:
        pos.append(pos[-1] * f)
    # pitch class of chain element i
    pcs = [(start_index + 7 * i) % 12 for i in range(12)]
    if 0 not in pcs:
        raise ValueError("the chain does not contain C")
    c_at = pos[pcs.index(0)]
    out: list[Optional[Interval]] = [None] * 12
    for i, pcl in enumerate(pcs):
        iv = pos[i] / c_at
        # reduce into [0, 1200) by whole octaves
        k = math.floor(iv.cents / 1200.0 + 1e-12)
        iv = iv / octave ** k
        if out[pcl] is not None:
            raise ValueError("the chain names a pitch class twice")
        out[pcl] = iv
    return out  # type: ignore[return-value]
