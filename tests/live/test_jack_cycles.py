"""A note-on leaves in the JACK period after the one it came in, in adaptive mode as in a static tuning.

JACK runs every client's process callback once per period, a source's client before the clients it
feeds (JACK's process graph; common practice of every JACK server). retuner's callback reads what
arrived and writes what its engine sent since the last period (retuner/live/jackmidi.py), so the
least any relay of this kind can add is one period. Here the periods are counted, not timed: the
real daemon on the real JACK backend runs over the model of JACK (tests/jackmodel.py), whose
cycles run only when the test turns its clock, and the daemon handles what arrived between two
cycles (``Daemon.step``). A chord played by hand (notes 0 to 24 ms apart) must come out note by note,
each one period after it came in; a chord window, which waits for the rest of the chord, shows that
the count can fail. How long the engine takes per note-on (well inside a period) is measured by
``retuner bench`` and ``retuner bench --jack`` (project rule: no timed tests).
"""

from __future__ import annotations

import mido
import pytest

from jackmodel import CYCLE, Keys, Synth, model, model_daemon  # noqa: F401

#: (key, period it is pressed in): a C major chord played by hand, 0, 8 and 24 ms apart, then a
#: melody note once it settled; the first period is well after the daemon's set-up went out (the
#: model's port buffer takes 16 events a period, the set-up of 16 channels needs several periods)
HAND = [(60, 30), (64, 33), (67, 39), (72, 70)]


def _periods_taken(tmp_path, monkeypatch, model, *options: str) -> dict[int, int]:
    d = model_daemon(tmp_path, monkeypatch, model, *options)
    try:
        synth = Synth(model, "retuner:out")
        keys = Keys(model, "retuner:in")
        for period in range(110):
            keys.press([k for k, at in HAND if at == period])
            model.advance(CYCLE)
            d.step(wait=False)
        came = {data[1]: c for c, data in keys.sent if data[0] & 0xF0 == 0x90}
        left = {}
        for c, m in synth.heard:
            if m.type == "note_on" and m.velocity and m.note not in left:
                left[m.note] = c
        assert sorted(came) == sorted(k for k, _ in HAND)
        assert sorted(left) == sorted(came), "a note-on did not come out"
        return {k: left[k] - came[k] for k in came}
    finally:
        d.shutdown()


@pytest.mark.parametrize("options", [(), ("--adaptive",), ("--adaptive", "--profile", "edo12")],
                         ids=["static", "adaptive", "adaptive-edo12-centre"])
def test_every_note_on_leaves_one_period_after_it_came(tmp_path, monkeypatch, model, options):
    assert _periods_taken(tmp_path, monkeypatch, model, *options) == {k: 1 for k, _ in HAND}


def test_a_chord_window_holds_the_note_ons_back(tmp_path, monkeypatch, model):
    """The same count with a 20 ms chord window: the first notes wait for it (20 ms = 7.5 periods of
    128 frames at 48 kHz), so the check above would fail."""
    taken = _periods_taken(tmp_path, monkeypatch, model, "--adaptive", "--chord-window", "0.02")
    assert taken[60] >= 20e-3 / CYCLE
    assert max(taken.values()) > 1
