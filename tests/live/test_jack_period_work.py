"""The JACK backend's two ways of doing a period's work (retuner/live/jackcycle.py: in C, as built at
install, or in Python) pass MIDI alike through a real JACK server (jackd2, dummy driver), and the C
one runs no Python while nothing happens.

A JACK client's MIDI output reaches the clients connected to it in the same period, and an event that
a port buffer has no room for must wait (jack/midiport.h: ``jack_midi_event_write`` fails with ENOBUFS);
JACK's MIDI port buffers hold a period's worth of bytes (common practice of jackd2: 4 bytes a frame).
"""

from __future__ import annotations

import threading
import time
import uuid

import mido
import pytest

from retuner.live import jackcycle
from retuner.live.jackmidi import JackBackend

PERIODS = list(jackcycle.PERIODS)


def test_the_compiled_period_is_built_and_chosen(jack_server):
    # the README's commands install gcc and libc6-dev, so the install builds it: missing is a failure
    assert jackcycle.library() is not None, "the compiled period was not built (gcc, libc6-dev at install)"
    backend = JackBackend()
    try:
        backend.inputs()
        assert backend._client.period.word == "native"
    finally:
        backend.close()


def _ours(jack_server, jack_client, period):
    """Our ports on a backend with the given period, connected to the test client."""
    name = f"pw{uuid.uuid4().hex[:6]}"
    backend = JackBackend(name, period=period)
    got: list[mido.Message] = []
    inp = backend.open_input(name, "in", connect_to=jack_client.out_full, callback=got.append)
    out = backend.open_output(name, "out", connect_to=jack_client.in_full)
    assert backend._client.period.word == period
    return backend, inp, out, got


def _wait(predicate, timeout=10.0):
    end = time.monotonic() + timeout
    while not predicate():
        assert time.monotonic() < end, "timed out"
        time.sleep(0.01)


@pytest.mark.parametrize("period", PERIODS)
def test_messages_pass_both_ways_whole_and_in_order(jack_server, jack_client, period):
    backend, inp, out, got = _ours(jack_server, jack_client, period)
    try:
        # in: notes, a wheel, and a bulk tuning dump (408 bytes: MIDI Tuning Standard)
        dump = mido.Message("sysex", data=[0x7E, 0x7F, 0x08, 0x01, 0x00] + [0] * 401)
        played = [mido.Message("note_on", channel=i % 16, note=40 + i % 40, velocity=90) for i in range(60)]
        played += [mido.Message("pitchwheel", pitch=1234), dump]
        for m in played:
            jack_client.send(m)
            time.sleep(0.001)
        _wait(lambda: len(got) >= len(played))
        assert got == played
        # out: more than one period's buffer holds (40 at most of 3 bytes in 512 bytes), then the dump
        sent = [mido.Message("note_on", channel=i % 16, note=30 + i % 70, velocity=1 + i % 120)
                for i in range(400)] + [dump]
        for m in sent:
            out.send(m)
        _wait(lambda: len(jack_client.messages()) >= len(sent))
        assert [r.msg for r in jack_client.messages()] == sent
    finally:
        inp.close()
        out.close()
        backend.close()


@pytest.mark.parametrize("period", PERIODS)
def test_a_port_closed_and_opened_again_carries_nothing_old(jack_server, jack_client, period):
    backend, inp, out, got = _ours(jack_server, jack_client, period)
    try:
        out.send(mido.Message("note_on", note=60, velocity=1))
        assert out.drain()
        out.close()
        out = backend.open_output(backend.base, "out", connect_to=jack_client.in_full)
        out.send(mido.Message("note_on", note=61, velocity=2))
        _wait(lambda: len(jack_client.messages()) >= 2)
        time.sleep(0.05)
        assert [r.msg.note for r in jack_client.messages()] == [60, 61]
    finally:
        inp.close()
        out.close()
        backend.close()


def _switches(thread: threading.Thread) -> int:
    """How often a thread of ours gave up the CPU of its own accord (it waits: proc(5), status)."""
    with open(f"/proc/self/task/{thread.native_id}/status") as fh:
        line = next(l for l in fh if l.startswith("voluntary_ctxt_switches"))
    return int(line.split()[1])


def test_while_nothing_happens_no_python_runs_for_the_periods(jack_server, jack_client):
    backend, inp, out, got = _ours(jack_server, jack_client, "native")
    try:
        period = backend._client.period
        reader = next(t for t in threading.enumerate() if t.name == "retuner-jack-in")
        n0, s0 = period.periods, _switches(reader)
        _wait(lambda: period.periods >= n0 + 200)          # 200 idle periods (about half a second)
        assert _switches(reader) == s0                        # the reader slept through them all
        jack_client.send(mido.Message("note_on", note=64, velocity=50))
        _wait(lambda: got)
        assert _switches(reader) > s0                         # and woke for the one note
    finally:
        inp.close()
        out.close()
        backend.close()
