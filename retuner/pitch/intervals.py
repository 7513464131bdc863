"""The one table of just intervals: each interval class (semitones above the lower note, mod 12)
with the just ratios it is heard against, their names, and which of them count as consonances.

Every place that needs a just ratio (the adaptive solver, the measures, the fit, the report, the
terminal view, ``show``) reads this table and picks its own selection from it; nothing else writes
a just ratio down. The ratios are the usual choices of 5-limit just intonation, with the 7-limit
ones (the intervals of a 4:5:6:7 dominant seventh chord) added (common practice; see Barbour,
Tuning and Temperament, 1951, ch. 5, and any handbook table of just intervals).
"""

from __future__ import annotations

from dataclasses import dataclass
from fractions import Fraction


@dataclass(frozen=True)
class JustInterval:
    steps: int             # interval class: semitones above the lower note, 0..11
    ratio: Fraction        # upper:lower
    name: str              # as a teacher says it
    short: str             # as a score labels it
    consonant: bool = False   # one of the consonances impurity counts (the first choice of its class only)
    first_in_7_limit: bool = False   # displaces the 5-limit first choice in the 7-limit table

    @property
    def prime_limit(self) -> int:
        n, p, largest = self.ratio.numerator * self.ratio.denominator, 2, 1
        while n > 1:
            while n % p == 0:
                n, largest = n // p, p
            p += 1
        return largest


F = Fraction
#: In each class the 5-limit ratios come in order of preference (the first is the usual choice).
JUST_INTERVALS: tuple[JustInterval, ...] = (
    JustInterval(0, F(1, 1), "unison", "P1", consonant=True),
    JustInterval(1, F(16, 15), "minor second", "m2"),
    JustInterval(2, F(9, 8), "major second", "M2"),
    JustInterval(2, F(10, 9), "minor whole tone", "M2"),
    JustInterval(3, F(6, 5), "minor third", "m3", consonant=True),
    JustInterval(3, F(7, 6), "septimal minor third", "m3"),
    JustInterval(4, F(5, 4), "major third", "M3", consonant=True),
    JustInterval(5, F(4, 3), "fourth", "P4", consonant=True),
    JustInterval(6, F(7, 5), "septimal tritone", "TT", first_in_7_limit=True),
    JustInterval(6, F(45, 32), "tritone", "TT"),
    JustInterval(6, F(64, 45), "diminished fifth", "TT"),
    JustInterval(6, F(10, 7), "greater septimal tritone", "TT"),
    JustInterval(7, F(3, 2), "fifth", "P5", consonant=True),
    JustInterval(8, F(8, 5), "minor sixth", "m6", consonant=True),
    JustInterval(9, F(5, 3), "major sixth", "M6", consonant=True),
    JustInterval(10, F(7, 4), "harmonic seventh", "m7", first_in_7_limit=True),
    JustInterval(10, F(9, 5), "minor seventh", "m7"),
    JustInterval(10, F(16, 9), "lesser minor seventh", "m7"),
    JustInterval(11, F(15, 8), "major seventh", "M7"),
)
del F


def candidates(limit: int = 5) -> dict[int, tuple[JustInterval, ...]]:
    """Interval class -> its just intervals within the prime limit (5 or 7), first choice first."""
    out: dict[int, list[JustInterval]] = {c: [] for c in range(12)}
    for j in JUST_INTERVALS:
        if j.prime_limit <= limit:
            out[j.steps].append(j)
    if limit >= 7:
        for c, js in out.items():
            out[c] = sorted(js, key=lambda j: not j.first_in_7_limit)   # stable: the rest keep their order
    return {c: tuple(js) for c, js in out.items()}


def usual(steps: int) -> JustInterval:
    """The usual (5-limit, first) just interval of a class."""
    return candidates(5)[steps % 12][0]


#: interval class -> the usual just interval, for all twelve classes
USUAL: dict[int, JustInterval] = {c: usual(c) for c in range(12)}
#: interval class -> just ratio, for the consonances impurity counts (0, 3, 4, 5, 7, 8, 9)
CONSONANT_RATIOS: dict[int, Fraction] = {j.steps: j.ratio for j in JUST_INTERVALS if j.consonant}

#: the number of a simple interval (second .. seventh) by interval class, to name its compound
#: an octave up: the number plus 7 (a third and an octave is a tenth; common practice)
_NUMBERS = {1: 2, 2: 2, 3: 3, 4: 3, 5: 4, 7: 5, 8: 6, 9: 6, 10: 7, 11: 7}
_ORDINALS = {9: "ninth", 10: "tenth", 11: "eleventh", 12: "twelfth", 13: "thirteenth", 14: "fourteenth"}


def interval_name(semitones: int, compact: bool = False) -> str:
    """The name of an interval of ``semitones`` (0 or more) in words, as a teacher says it: the
    usual name of its class (major third, fifth), the compound names one octave up (major
    tenth, twelfth), octave and double octave, and wider ones as the simple interval plus
    octaves ("major third + 2 octaves"; ``compact``: "major third +2 oct", for a narrow
    screen). Common practice (any harmony handbook's table of compound intervals)."""
    if semitones < 0:
        raise ValueError("an interval's size in semitones is 0 or more")
    octaves, steps = divmod(semitones, 12)
    simple = USUAL[steps].name
    if steps == 0 and octaves <= 2:
        return ("unison", "octave", "double octave")[octaves]
    if octaves == 0:
        return simple
    if octaves == 1 and steps in _NUMBERS:
        quality = simple.rsplit(" ", 1)[0] + " " if " " in simple else ""
        return quality + _ORDINALS[_NUMBERS[steps] + 7]
    if steps == 0:
        return f"{octaves} octaves"
    if compact:
        return f"{simple} +{octaves} oct"
    return f"{simple} + {octaves} octave" + ("s" if octaves > 1 else "")
