"""Shared fixtures. The JACK server is a real part: when jackd is missing the tests FAIL."""

from __future__ import annotations

import uuid

import pytest

from jack import TestClient, private_server  # tests/ is on sys.path (rootdir conftest)


@pytest.fixture(scope="session")
def jack_server():
    """A private JACK server (dummy backend, 48 kHz, 128-frame periods) for the whole session.

    Started as ``jackd --no-realtime -S -n NAME -d dummy -r 48000 -p 128``. ``-S`` (synchronous
    mode) makes the server wait for every client in each cycle: without it, on a loaded machine
    (measured here: two CPUs busy with other test runs, hundreds of "client was not finished"
    xruns per minute) a client descheduled past its 2.7 ms deadline loses the MIDI events of that
    cycle, and the tests would fail at random for reasons outside retuner.

    ``JACK_DEFAULT_SERVER`` names it in this process's environment (so python-rtmidi clients
    in the tests reach it) and in ``server.env`` for subprocesses."""
    with private_server("retuner-test") as server:
        yield server


@pytest.fixture
def jack_client(jack_server):
    """A test client on the JACK server with a 'play' output and a 'record' input."""
    client = TestClient(f"tc{uuid.uuid4().hex[:6]}")
    jack_server.wait_port(client.out_full)
    jack_server.wait_port(client.in_full)
    try:
        yield client
    finally:
        client.close()


@pytest.fixture
def runs():
    """Every ``jackdaemon.Run`` a test appends here is stopped when the test ends."""
    started = []
    yield started
    for r in started:
        r.stop()
