"""Attack mode's first guess (a note's pitch when it leaves, before the rest of its chord
arrives), measured: a note counts as corrected when its pitch at the end of its attack lies
more than 0.5 c from the pitch it left with (``Engine.stats["attack_corrected_notes"]``,
``Engine.attack_corrections``); ``retuner bench --adaptive`` prints the share of such notes and
the median correction for the humanised chorales.

The goal (the project's own): on the project's chorales played by hand (the seeds the bench
uses), most notes need no correction, i.e. fewer than half are corrected. Two rules of the
first guess meet it (``retuner bench --adaptive``: 167 of 390 notes, where the plain solve
against what sounds corrected 199): a held note a step from a new one is taken for the old
note of the new one's voice, about to end, and left out of the new one's context
(``retuner.engine.attack``); a chord solved with nothing held sits as the last chord heard
with its pitch classes sat around its centre (``retuner.adaptive.solver``, item 10).
"""

from __future__ import annotations

import math

import mido
import pytest

from retuner.adaptive.solver import AdaptiveConfig
from retuner.bench.progressions import CHORALES, chorale_events, humanise
from retuner.engine.core import Engine, EngineConfig
from retuner.engine.drive import play
from retuner.pitch.tuning import Tuning

THIRD = 1200 * math.log2(5 / 4)   # the just major third 5/4, 386.314 c (its definition)
FIFTH = 1200 * math.log2(3 / 2)   # the just fifth 3/2, 701.955 c (its definition)
FOURTH = 1200 * math.log2(4 / 3)  # the just fourth 4/3, 498.045 c (its definition)
SIXTH = 1200 * math.log2(5 / 3)   # the just major sixth 5/3, 884.359 c (its definition)


def on(k):
    return mido.Message("note_on", channel=0, note=k, velocity=90)


def off(k):
    return mido.Message("note_off", channel=0, note=k, velocity=0)


def pitch(e, key):
    return next(n["cents"] for n in e.sounding() if n["key"] == key)


def test_a_corrected_note_is_counted_with_its_correction():
    """C alone from silence sounds at its reference pitch (one note, centred: 0 c from 12-EDO);
    E 10 ms later makes a pure third centred on the reference (C +d, E -d with
    2d = 400 - 386.314 c): C is corrected by half the third's distance from 400 c, E (left
    at its final pitch) is not."""
    e = Engine(Tuning.equal12(), EngineConfig(adaptive=AdaptiveConfig()))
    e.start(0.0)
    e.feed(0.0, on(60))
    e.feed(0.01, on(64))
    assert e.stats["attack_corrected_notes"] == 1
    assert e.attack_corrections == [pytest.approx((400 - THIRD) / 2, abs=0.01)]


def test_the_correction_is_where_the_note_ends_not_how_far_it_travelled():
    """C, E and G 10 ms apart from silence: the triad ends pure (5/4, 3/2) and centred on the
    reference, so C goes 0 -> +d -> -m and E -d -> (THIRD - 400) - m, where m is the mean
    deviation of the pure triad built on C at 0 c; each note's correction is its last pitch
    less its first, smaller than the cents it was retuned in all."""
    fifth = FIFTH
    e = Engine(Tuning.equal12(), EngineConfig(adaptive=AdaptiveConfig()))
    e.start(0.0)
    e.feed(0.0, on(60))
    e.feed(0.01, on(64))
    e.feed(0.02, on(67))
    d = (400 - THIRD) / 2
    m = ((THIRD - 400) + (fifth - 700)) / 3
    want = sorted([abs(-m - 0.0), abs((THIRD - 400 - m) - (-d))])
    assert sorted(e.attack_corrections) == [pytest.approx(w, abs=0.01) for w in want]
    assert e.stats["attack_corrected_notes"] == 2
    assert e.stats["attack_retune_cents_total"] > sum(want) + 1.0


def chorale_share():
    corrected = notes = 0
    for i, p in enumerate(CHORALES):
        e = Engine(Tuning.equal12(), EngineConfig(adaptive=AdaptiveConfig()))
        play(e, humanise(chorale_events(p), seed=i + 2))
        corrected += e.stats["attack_corrected_notes"]
        notes += e.stats["notes"]
    return corrected / notes


def test_most_notes_of_the_chorales_played_by_hand_need_no_correction():
    assert chorale_share() < 0.5


def chord_then(*keys):
    """An adaptive engine with ``keys`` struck together at 0 s; and its count of corrected notes."""
    e = Engine(Tuning.equal12(), EngineConfig(adaptive=AdaptiveConfig()))
    e.start(0.0)
    for k in keys:
        e.feed(0.0, on(k))
    return e, e.stats["attack_corrected_notes"]


def test_a_held_note_a_step_below_a_new_one_is_left_out_of_its_first_guess():
    """C4-E4-G4 sound; the top voice moves G4 -> A4 legato (A4 starts, G4 ends 10 ms later).
    A4 is taken for G4's voice moving on: it leaves tuned against what stays (C4: a just major
    sixth 5/3, E4: a just fourth 4/3) and needs no correction when G4 ends. (Tuned against
    G4 as well, it left a comma's compromise away and was corrected by 1.8 c.)"""
    e, before = chord_then(60, 64, 67)
    e.feed(1.0, on(69))
    first = pitch(e, 69)
    e.feed(1.01, off(67))
    e.tick(1.1)            # the held notes' common shift, due when A4's attack is over
    assert e.stats["attack_corrected_notes"] == before
    assert pitch(e, 69) == first
    # near just: the re-centring moves the held notes by a limited shift and leaves the
    # new note the rest (a little impurity, below 1 c)
    assert pitch(e, 69) - pitch(e, 60) == pytest.approx(SIXTH, abs=1.0)
    assert pitch(e, 69) - pitch(e, 64) == pytest.approx(FOURTH, abs=1.0)


def test_a_new_note_a_step_from_two_held_notes_leaves_both_in_its_guess():
    """D4-F4-A4 sound and G4 arrives, a whole tone from F4 and from A4: which voice moved
    is not known, so neither is left out. A4 then ends: G4 was tuned with it as well as
    with D4 and F4 and, the chord being pure, needs no correction (leaving F4 out instead,
    the voice that stays, would have cost one)."""
    e, before = chord_then(62, 65, 69)
    e.feed(1.0, on(67))
    e.feed(1.01, off(69))
    assert e.stats["attack_corrected_notes"] == before


def test_a_chord_heard_before_starts_where_it_sat():
    """C4-E4-G4 struck from silence is pure and centred on the reference: C4 sits at minus
    the mean deviation m of the pure triad built on it (E4 at THIRD - 400, G4 at FIFTH - 700
    from C4, by the ratios' definitions). After a silence the same chord played note by note
    from C4 starts C4 where the whole chord puts it (-m, not at the reference) and corrects
    no note; it ends pure and centred as before."""
    m = ((THIRD - 400) + (FIFTH - 700)) / 3
    e = Engine(Tuning.equal12(), EngineConfig(adaptive=AdaptiveConfig()))
    e.start(0.0)
    for k in (60, 64, 67):
        e.feed(0.0, on(k))
    assert pitch(e, 60) - 6000 == pytest.approx(-m, abs=0.05)
    for k in (60, 64, 67):
        e.feed(0.5, off(k))
    before = e.stats["attack_corrected_notes"]
    e.feed(1.0, on(60))
    assert pitch(e, 60) - 6000 == pytest.approx(-m, abs=0.05)
    e.feed(1.01, on(64))
    e.feed(1.02, on(67))
    assert e.stats["attack_corrected_notes"] == before
    assert pitch(e, 64) - pitch(e, 60) == pytest.approx(THIRD, abs=0.05)
    assert pitch(e, 67) - pitch(e, 60) == pytest.approx(FIFTH, abs=0.05)
    assert pitch(e, 60) - 6000 == pytest.approx(-m, abs=0.05)


def test_bench_reports_the_first_guess():
    from retuner.bench.progressions import adaptive_bench, format_adaptive_bench
    res = adaptive_bench(rounds=2, solver_events=20)
    live = res["humanised"]["adaptive"]["chorales"]
    assert live["attack_corrected_per_note"] == pytest.approx(chorale_share(), abs=1e-4)
    assert live["attack_notes"] == 390 and 0 < live["attack_corrected_notes"] < 390
    assert live["attack_corrected_median_cents"] > 0.5
    assert res["humanised"]["chord-window"]["chorales"]["attack_corrected_per_note"] == 0
    assert "notes corrected by more than 0.5 c in their attack" in format_adaptive_bench(res)


def test_ctl_status_shows_the_notes_corrected():
    from retuner.commands.ctl import _fmt_status
    text = _fmt_status({"counters": {"notes": 4, "attack_retunes": 3, "attack_retune_cents_total": 6.0,
                                     "attack_retune_cents_max": 3.0, "attack_corrected_notes": 2}})
    row = [l for l in text.splitlines() if l.startswith("first guess missed")]
    assert row and "2 notes corrected by more than 0.5 c" in row[0]
    assert "attack corrected notes" not in text
