"""The tuning core against published values.

Sources named beside each check. "from memory" marks a table value recalled rather than read from a
document at hand; every such table value is also recomputed inside the test from the published definition.
"""

import math
from fractions import Fraction

import pretty_midi
import pytest

from retuner.pitch.intervals import JUST_INTERVALS, USUAL, candidates
from retuner.profiles.profile import builtin_dir, load_profile
from retuner.pitch.tuning import (PYTHAGOREAN_COMMA, SCHISMA, SYNTONIC_COMMA, Interval, Tuning, beat_rate,
                            cents_to_hz, hz_to_cents, ratio_to_cents)


def c(ratio: float) -> float:
    """Cents of a frequency ratio, written out independently of the package."""
    return 1200.0 * math.log(ratio, 2)


def test_commas_match_published_values():
    # Barbour, Tuning and Temperament (1951): syntonic comma 81/80 = 21.506 c, Pythagorean comma
    # 3^12/2^19 = 23.460 c; the schisma is their difference, 1.954 c (handbook values).
    assert ratio_to_cents(SYNTONIC_COMMA) == pytest.approx(21.506, abs=0.0005)
    assert ratio_to_cents(PYTHAGOREAN_COMMA) == pytest.approx(23.460, abs=0.0005)
    assert ratio_to_cents(SCHISMA) == pytest.approx(1.954, abs=0.0005)
    assert SCHISMA == Fraction(32805, 32768)


def test_pure_intervals_match_handbook_values():
    # Handbook values (common practice): pure fifth 701.955 c, pure major third 386.314 c.
    assert ratio_to_cents(Fraction(3, 2)) == pytest.approx(701.955, abs=0.0005)
    assert ratio_to_cents(Fraction(5, 4)) == pytest.approx(386.314, abs=0.0005)


def test_quarter_comma_fifth_is_exact_and_published():
    # Barbour (1951): the quarter-comma meantone fifth is 696.578 c; exactly 5**(1/4).
    fifth = Interval.ratio(Fraction(3, 2)) * Interval.ratio(SYNTONIC_COMMA) ** Fraction(-1, 4)
    assert fifth.primes == ((5, Fraction(1, 4)),)
    assert fifth.cents == pytest.approx(696.578, abs=0.0005)
    assert fifth.cents == pytest.approx(c(5 ** 0.25), abs=1e-9)


def test_iso16_reference_and_middle_c():
    # ISO 16: A4 = 440 Hz. 12-EDO C4 = 440 * 2**(-9/12) = 261.626 Hz (handbook value).
    t = Tuning.equal12()
    assert t.hz(69) == pytest.approx(440.0, abs=1e-9)
    assert t.hz(60) == pytest.approx(261.626, abs=0.0005)
    assert cents_to_hz(hz_to_cents(1234.5)) == pytest.approx(1234.5)


def test_edo12_against_pretty_midi():
    # pretty_midi.note_number_to_hz is a general-purpose reference library (PyPI).
    t = load_profile("edo12")
    for k in range(128):
        assert t.hz(k) == pytest.approx(pretty_midi.note_number_to_hz(k), rel=1e-12)
        assert t.cents[k] == pytest.approx(100.0 * k, abs=1e-9)


# Cents of C..B above C, from memory of the tables in Barbour (1951) and common reference tables.
PUBLISHED_TABLES = {
    "pythagorean": [0, 113.685, 203.910, 294.135, 407.820, 498.045, 611.730, 701.955, 815.640, 905.865,
                    996.090, 1109.775],
    "meantone-quarter": [0, 76.049, 193.157, 310.265, 386.314, 503.422, 579.471, 696.578, 772.627, 889.735,
                         1006.843, 1082.892],
    "werckmeister-3": [0, 90.225, 192.180, 294.135, 390.225, 498.045, 588.270, 696.090, 792.180, 888.270,
                       996.090, 1092.180],
    "kirnberger-3": [0, 90.225, 193.157, 294.135, 386.314, 498.045, 590.224, 696.578, 792.180, 889.735,
                     996.090, 1088.269],
    "vallotti": [0, 94.135, 196.090, 298.045, 392.180, 501.955, 592.180, 698.045, 796.090, 894.135, 1000.000,
                 1090.225],
    "young-2": [0, 90.225, 196.090, 294.135, 392.180, 498.045, 588.270, 698.045, 792.180, 894.135, 996.090,
                1090.225],
}

SYN = c(81 / 80)
PYT = c(3 ** 12 / 2 ** 19)
SCH = PYT - SYN
P5 = c(1.5)
# Published definitions: for each fifth of the chain Eb-Bb-F-C-G-D-A-E-B-F#-C#-G#, how much it is narrowed.
DEFINITIONS = {
    # Barbour (1951): eleven pure fifths.
    "pythagorean": [0] * 11,
    # Aron (1523) / Barbour (1951): every fifth narrowed by 1/4 syntonic comma.
    "meantone-quarter": [SYN / 4] * 11,
    "meantone-sixth": [SYN / 6] * 11,
    # Werckmeister (1691): C-G, G-D, D-A, B-F# narrowed by 1/4 Pythagorean comma.
    "werckmeister-3": [0, 0, 0, PYT / 4, PYT / 4, PYT / 4, 0, 0, PYT / 4, 0, 0],
    # Kirnberger (1779): C-G-D-A-E by 1/4 syntonic comma, F#-C# by a schisma.
    "kirnberger-3": [0, 0, 0, SYN / 4, SYN / 4, SYN / 4, SYN / 4, 0, 0, SCH, 0],
    # Vallotti (1779): F-C-G-D-A-E-B by 1/6 Pythagorean comma.
    "vallotti": [0, 0] + [PYT / 6] * 6 + [0, 0, 0],
    # Young (1800), his second temperament: C-G-D-A-E-B-F# by 1/6 Pythagorean comma.
    "young-2": [0, 0, 0] + [PYT / 6] * 6 + [0, 0],
}
CHAIN = [3, 10, 5, 0, 7, 2, 9, 4, 11, 6, 1, 8]  # Eb Bb F C G D A E B F# C# G#


def chain_cents(narrowing):
    """Pitch classes above C from the definition, by plain float arithmetic in cents."""
    pos = [0.0]
    for n in narrowing:
        pos.append(pos[-1] + P5 - n)
    c_pos = pos[CHAIN.index(0)]
    out = [0.0] * 12
    for pc, p in zip(CHAIN, pos):
        out[pc] = (p - c_pos) % 1200.0
    return out


@pytest.mark.parametrize("pid", sorted(DEFINITIONS))
def test_temperaments_match_their_published_definition(pid):
    expected = chain_cents(DEFINITIONS[pid])
    if pid in PUBLISHED_TABLES:
        # the definition reproduces the published table (to its 3 decimals)
        assert expected == pytest.approx(PUBLISHED_TABLES[pid], abs=0.0006)
    t = load_profile(pid)
    # laid out from C, then shifted so A4 = 440 Hz: every key matches to 0.001 cent
    shift = 6900.0 - (6000.0 + expected[9])
    for k in range(128):
        want = 100.0 * (k - k % 12) + expected[k % 12] + shift
        assert t.cents[k] == pytest.approx(want, abs=0.001), (pid, k)
    assert t.hz(69) == pytest.approx(440.0)


def test_just_scales_have_pure_triads():
    t = load_profile("just-5limit")
    pc = [t.cents[60 + i] - t.cents[60] for i in range(12)]
    for root, third, fifth in ((0, 4, 7), (5, 9, 12), (7, 11, 14)):  # C-E-G, F-A-C, G-B-D
        lo = pc[root % 12] + 1200 * (root // 12)
        th = pc[third % 12] + 1200 * (third // 12)
        fi = pc[fifth % 12] + 1200 * (fifth // 12)
        assert th - lo == pytest.approx(c(5 / 4), abs=1e-9)
        assert fi - lo == pytest.approx(c(3 / 2), abs=1e-9)
    seven = load_profile("just-7limit")
    assert seven.cents[70] - seven.cents[60] == pytest.approx(c(7 / 4), abs=1e-9)


@pytest.mark.parametrize("pid,steps,period", [("edo19", 19, 2), ("edo31", 31, 2), ("edo53", 53, 2),
                                              ("bohlen-pierce", 13, 3)])
def test_equal_divisions_consecutive_keys(pid, steps, period):
    # Default key map: consecutive keys play consecutive steps, key 69 at 440 Hz.
    t = load_profile(pid)
    assert t.hz(69) == pytest.approx(440.0)
    for k in range(127):
        assert t.hz(k + 1) / t.hz(k) == pytest.approx(period ** (1 / steps), rel=1e-12)
    assert t.hz(69 + steps) == pytest.approx(440.0 * period)


def test_beat_rate_worked_example_by_hand():
    # 12-EDO C4-E4: f1 = 261.626 Hz, f2 = 329.628 Hz; near 5:4 the 5th partial of C (1308.13 Hz)
    # and the 4th partial of E (1318.51 Hz) beat: |4*329.628 - 5*261.626| = 10.38 Hz (by hand).
    assert beat_rate(261.626, 329.628, 5, 4) == pytest.approx(10.382, abs=0.001)
    # a pure fifth does not beat
    assert beat_rate(200.0, 300.0, 3, 2) == 0.0


def test_interval_exactness():
    assert Interval.ratio("5/4").as_fraction == Fraction(5, 4)
    assert (Interval.ratio(3) / Interval.ratio(2)).as_fraction == Fraction(3, 2)
    assert (Interval.ratio(2) ** Fraction(1, 12)).as_fraction is None
    with pytest.raises(ValueError):
        Interval.ratio(0)


# Handbook cents of the usual just intervals (common practice; from memory, each recomputed here
# from its ratio with plain floats): the table must hold these ratios under these names.
HANDBOOK_JUST = {
    "unison": (1.0, 0.0), "minor second": (16 / 15, 111.731), "major second": (9 / 8, 203.910),
    "minor third": (6 / 5, 315.641), "major third": (5 / 4, 386.314), "fourth": (4 / 3, 498.045),
    "tritone": (45 / 32, 590.224), "fifth": (3 / 2, 701.955), "minor sixth": (8 / 5, 813.686),
    "major sixth": (5 / 3, 884.359), "minor seventh": (9 / 5, 1017.596), "major seventh": (15 / 8, 1088.269),
    "harmonic seventh": (7 / 4, 968.826), "septimal minor third": (7 / 6, 266.871),
    "septimal tritone": (7 / 5, 582.512),
}


def test_just_interval_table_against_handbook_values():
    by_name = {j.name: j for j in JUST_INTERVALS}
    for name, (ratio, cents) in HANDBOOK_JUST.items():
        assert c(ratio) == pytest.approx(cents, abs=0.0005), name
        assert float(by_name[name].ratio) == pytest.approx(ratio, rel=1e-12), name
    for j in JUST_INTERVALS:
        # every ratio lies within a quarter tone and a bit of its class's 12-EDO size
        assert abs(c(float(j.ratio)) - 100 * j.steps) < 50, j
    # the usual choice of each class is its 5-limit one; consonances as impurity counts them
    assert [USUAL[s].ratio for s in (0, 3, 4, 5, 7, 8, 9)] == [Fraction(1), Fraction(6, 5), Fraction(5, 4),
                                                             Fraction(4, 3), Fraction(3, 2), Fraction(8, 5),
                                                             Fraction(5, 3)]
    assert all(j.prime_limit <= 5 for js in candidates(5).values() for j in js)
    # 7-limit: the 4:5:6:7 chord's 7/4 and 7/5 lead their classes; 7/6 is an alternative to 6/5
    seven = candidates(7)
    assert seven[10][0].ratio == Fraction(7, 4) and seven[6][0].ratio == Fraction(7, 5)
    assert [j.ratio for j in seven[3]] == [Fraction(6, 5), Fraction(7, 6)]


# Every built-in profile against its published definition, all 128 keys, recomputed here with plain
# floats. Layout for all of them: consecutive keys play consecutive degrees, C4 (key 60) the root,
# A4 (key 69) at 440 Hz (ISO 16).
JUST_DEFINITIONS = {
    # the syntonic-diatonic just scale on C with its usual chromatic notes (Barbour 1951, ch. 5)
    "just-5limit": [1, 16 / 15, 9 / 8, 6 / 5, 5 / 4, 4 / 3, 45 / 32, 3 / 2, 8 / 5, 5 / 3, 9 / 5, 15 / 8],
    # a 12-note 7-limit just scale on C (common practice): 7/4 on Bb, 7/5, 8/7, 15/14
    "just-7limit": [1, 15 / 14, 8 / 7, 6 / 5, 5 / 4, 4 / 3, 7 / 5, 3 / 2, 8 / 5, 5 / 3, 7 / 4, 15 / 8],
}
EQUAL_DEFINITIONS = {   # id -> (steps, period): n equal steps of the period (common practice)
    "edo12": (12, 2), "edo19": (19, 2), "edo31": (31, 2), "edo53": (53, 2),
    # Bohlen (1978), Pierce and colleagues (1989): 13 equal steps of the tritave 3:1
    "bohlen-pierce": (13, 3),
}


def expected_keys(pid):
    """The 128 key pitches (cents above key 0 of 12-EDO) from the published definition."""
    if pid in EQUAL_DEFINITIONS:
        steps, period = EQUAL_DEFINITIONS[pid]
        return [6900.0 + (k - 69) * c(period) / steps for k in range(128)]
    if pid in JUST_DEFINITIONS:
        pcs = [c(r) for r in JUST_DEFINITIONS[pid]]
    else:
        pcs = chain_cents(DEFINITIONS[pid])
    rel = [1200.0 * ((k - 60) // 12) + pcs[(k - 60) % 12] for k in range(128)]
    return [r - rel[69] + 6900.0 for r in rel]


def builtin_ids():
    return sorted(p.stem for p in builtin_dir().glob("*.yaml"))


@pytest.mark.parametrize("pid", builtin_ids())
def test_every_builtin_plays_its_published_definition(pid):
    assert pid in DEFINITIONS or pid in JUST_DEFINITIONS or pid in EQUAL_DEFINITIONS, \
        f"{pid}: add its published definition to this test"
    t = load_profile(pid)
    want = expected_keys(pid)
    for k in range(128):
        assert t.cents[k] == pytest.approx(want[k], abs=1e-6), (pid, k)
