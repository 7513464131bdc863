"""Through a real JACK server (dummy driver): a note-on comes back from the daemon one period after it
went in, in adaptive mode as in a static tuning.

JACK runs every client's process callback once per period, a source's client before the clients it
feeds (common practice of every JACK server; the keyboard and the synth here are two clients, so the
daemon's client runs between them). The daemon reads a note-on in the period it arrives and writes its
answer at the start of the next one (retuner/live/jackmidi.py), so the count is one period in both
plays. The periods are counted in JACK's own frame clock, not timed: the server here has long periods
(2048 frames at 48 kHz, 42.7 ms) so that the daemon's work, well under a millisecond a note-on (see
``retuner bench`` and ``retuner bench --jack`` for the figures at 128 frames, and
tests/live/test_jack_cycles.py for the exact count over a model of JACK), always fits in one. A chord
window longer than a period shows that the count can fail.
"""

from __future__ import annotations

import sys
from pathlib import Path

import pytest

from jack import private_server
from retuner.bench import jacklive

REPO = next(p for p in Path(__file__).resolve().parents if (p / "pyproject.toml").is_file())
RATE, PERIOD = 48000, 2048
NOTES = 12


@pytest.fixture(scope="module")
def long_periods():
    with private_server("retuner-period", rate=RATE, period=PERIOD) as server:
        yield server


def periods(adaptive: bool, *extra: str) -> dict:
    fig = jacklive._one(sys.executable, str(REPO), adaptive, 0.2, NOTES, RATE, PERIOD, extra)
    assert "error" not in fig, fig
    assert fig["notes_back"] == NOTES
    return fig["latency_periods"]


@pytest.mark.parametrize("adaptive", [False, True], ids=["static", "adaptive"])
def test_a_note_on_comes_back_one_period_after_it_went_in(long_periods, adaptive):
    p = periods(adaptive)
    assert p["median"] == 1 and p["max"] == 1, p


def test_a_chord_window_longer_than_a_period_shows_in_the_count(long_periods):
    p = periods(True, "--chord-window", "100 ms")       # 100 ms: more than two periods of 42.7 ms
    assert p["median"] >= 3, p
