"""The JACK server goes away under a running daemon: the daemon exits with status 1 and says so in one
line (a service manager then starts it again, and its start-up waits for a server), instead of running
on deaf. A private server, so stopping it disturbs no other test."""

from __future__ import annotations

import os
import time
import uuid

import mido
import pytest

from jack import JackError, JackServer, TestClient
from jackdaemon import Run, note_ons


def test_daemon_exits_with_status_1_when_the_jack_server_stops(tmp_path, monkeypatch):
    name = f"retuner-loss-{os.getpid()}-{uuid.uuid4().hex[:6]}"
    server = JackServer(name)
    try:
        server.start()
    except JackError as exc:
        pytest.fail(f"JACK server could not start: {exc}", pytrace=False)
    monkeypatch.setenv("JACK_DEFAULT_SERVER", name)
    monkeypatch.setenv("JACK_NO_START_SERVER", "1")
    client = TestClient(f"ls{uuid.uuid4().hex[:6]}")
    run = None
    try:
        server.wait_port(client.out_full)
        server.wait_port(client.in_full)
        run = Run(server, tmp_path, ["--input", client.out_full, "--output", client.in_full,
                                     "--profile", "edo12"], wire_in=False, wire_out=False)
        end = time.monotonic() + 15
        while run.in_port not in server.connections(client.out_full):
            assert time.monotonic() < end, run.daemon.log()[-2000:]
            time.sleep(0.05)
        client.send(mido.Message("note_on", note=60, velocity=80))
        client.wait_for(lambda r: len(note_ons(r)) >= 1)          # it was working
        client.send(mido.Message("note_off", note=60))
        client.close()
        client = None
        server.stop()
        assert run.daemon.wait(15) == 1, run.daemon.log()[-2000:]
        assert "the JACK server stopped: exiting with status 1" in run.daemon.log()
    finally:
        if run is not None:
            run.stop()
        if client is not None:
            client.close()
        server.stop()
