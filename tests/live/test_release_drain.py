"""The release burst of a stopping daemon reaches the synth even when JACK's process cycle is late.

What JACK-Client does, read in the installed package's own code (JACK-Client 0.5.7, ``jack.py``; it
reaches the system's libjack through cffi, ``_ffi.dlopen``, one C call per method, nothing kept between):

* retuner's process callback (retuner/live/jackmidi.py) calls libjack through JACK-Client's own
  cffi handle (``jack._lib``): ``jack_midi_event_write`` on ``jack_port_get_buffer(port, frames)``
  writes straight into the port's buffer of the process cycle in progress and returns non-zero
  (ENOBUFS) when the event does not fit. Nothing keeps a queue but retuner (``JackOutput``'s deque,
  emptied by that callback).
* ``OwnPort.unregister()`` takes the port out of the client's port list and calls
  ``jack_port_unregister`` at once; it waits for no cycle. ``Client.deactivate()`` calls
  ``jack_deactivate`` (out of the process graph, every connection of the client's ports removed)
  and ``Client.close()`` calls ``jack_client_close``.
* A process callback that raises is not called again (``Client.set_process_callback``'s text).

So whatever the deque still holds when the port is unregistered never goes out, and while JACK's
process cycle is late nothing is written at all: the note-offs of a shutdown would be lost and
notes would hang on the synth, unless ``JackOutput.drain`` waits (at most its ``timeout``) until
the deque is written and two more cycles ran, before the port closes.

These tests use a model of that JACK behaviour (tests/jackmodel.py: a fake ``jack`` module with its
own clock; every run is the same, no server, no timing). The daemon is the real one, on the real
JACK backend (``jackmidi.JackBackend``), stopped by SIGTERM while the cycle is late.
"""

from __future__ import annotations

import inspect
import signal

import pytest

from jackmodel import BUFFER_EVENTS, CYCLE, JackModel, Keys, Synth, model, model_daemon  # noqa: F401
from retuner.live import jackmidi

DRAIN_TIMEOUT = inspect.signature(jackmidi.JackOutput.drain).parameters["timeout"].default


PLAYED = [48, 52, 55, 60, 64, 67, 72, 76]


def _play_and_stop(tmp_path, monkeypatch, model: JackModel, late: float):
    """Eight notes sound on the synth; then SIGTERM while the cycle is ``late`` seconds late, and the
    daemon shuts down. Returns the synth, the model time the shutdown took and what the synth got
    during it."""
    d = model_daemon(tmp_path, monkeypatch, model)
    try:
        assert sorted(model.names()) == ["retuner:in", "retuner:out"]
        synth = Synth(model, "retuner:out")
        keys = Keys(model, "retuner:in")
        keys.press(PLAYED)
        for _ in range(1000):
            if len(synth.sounding()) == len(PLAYED):
                break
            model.advance(CYCLE)
            d.step(wait=False)
        assert len(synth.sounding()) == len(PLAYED), "the notes did not reach the synth"
        model.stall(late)
        d.post_signal(signal.SIGTERM)
        assert d.step(wait=False) is True
        t0, before = model.now, len(synth.got)
        d.shutdown()
        took = model.now - t0
        assert "retuner:out" not in model.names()        # the port did close
        return synth, took, synth.got[before:]
    finally:
        d.shutdown()


@pytest.mark.parametrize("late", [0.0, 0.6, 1.5])
def test_sigterm_release_burst_reaches_the_synth_though_the_cycle_is_late(tmp_path, monkeypatch, model, late):
    """Every sounding note gets its note-off, though the process cycle is ``late`` seconds late when
    SIGTERM comes (the burst also needs several cycles: it is more than one buffer holds)."""
    synth, took, burst = _play_and_stop(tmp_path, monkeypatch, model, late)
    assert synth.sounding() == []
    assert late <= took <= DRAIN_TIMEOUT       # the drain waited out the late cycle, within its bound
    assert len(burst) > BUFFER_EVENTS          # and the burst did not fit in one cycle


@pytest.mark.parametrize("late", [0.6, 1.5])
def test_without_the_drain_the_late_cycle_loses_the_note_offs(tmp_path, monkeypatch, model, late):
    """The same run with ``JackOutput.drain`` returning at once: the port closes before a late cycle
    writes the burst, and the note-offs are lost (the check above would fail)."""
    monkeypatch.setattr(jackmidi.JackOutput, "drain", lambda self, timeout=DRAIN_TIMEOUT: True)
    synth, took, burst = _play_and_stop(tmp_path, monkeypatch, model, late)
    assert synth.sounding() != []
    assert burst == [] and took < late


def test_a_cycle_that_never_comes_does_not_hold_the_exit(tmp_path, monkeypatch, model):
    """A server that never runs another cycle: the daemon's shutdown gives up after the drain's bound
    (of the model's clock, plus the one poll step past it) and closes the port."""
    synth, took, burst = _play_and_stop(tmp_path, monkeypatch, model, float("inf"))
    assert DRAIN_TIMEOUT <= took <= DRAIN_TIMEOUT + CYCLE
    assert len(synth.sounding()) == len(PLAYED)               # nothing went out: nothing could
