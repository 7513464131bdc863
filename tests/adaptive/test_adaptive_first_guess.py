"""Attack mode's first guess (a note's pitch when it leaves, before the rest of its chord
arrives), measured: a note counts as corrected when its pitch at the end of its attack lies
more than 0.5 c from the pitch it left with (``Engine.stats["attack_corrected_notes"]``,
``Engine.attack_corrections``); ``retuner bench --adaptive`` prints the share of such notes and
the median correction for the humanised chorales.

The goal (the project's own, open): on the project's chorales played by hand (the seeds the
bench uses), most notes need no correction, i.e. fewer than half are corrected. Today's guess
misses about half (``retuner bench --adaptive``: 199 of 390 notes, median 3.18 c); the test of
the goal is marked as an expected failure (strict: it fails once the goal is met, so the mark
goes then).
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


def on(k):
    return mido.Message("note_on", channel=0, note=k, velocity=90)


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
    fifth = 1200 * math.log2(3 / 2)   # the just fifth 3/2, 701.955 c (its definition)
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


@pytest.mark.xfail(strict=True, reason="open goal: today's first guess corrects about half the notes")
def test_most_notes_of_the_chorales_played_by_hand_need_no_correction():
    assert chorale_share() < 0.5


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
