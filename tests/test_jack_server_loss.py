"""The JACK server goes away under a running daemon and comes back: the daemon keeps running, and
when a server of the same name returns with the named ports it reconnects and notes flow again, as
when a device is unplugged and plugged back. A private server, so stopping it disturbs no other test."""

from __future__ import annotations

import os
import time
import uuid

import mido
import pytest

from jack import JackError, JackServer, TestClient
from jackdaemon import Run, note_ons


def _wait(pred, timeout, what):
    end = time.monotonic() + timeout
    while not pred():
        assert time.monotonic() < end, what()
        time.sleep(0.05)


def test_daemon_reconnects_when_the_jack_server_returns(tmp_path, monkeypatch):
    name = f"retuner-loss-{os.getpid()}-{uuid.uuid4().hex[:6]}"
    server = JackServer(name)
    try:
        server.start()
    except JackError as exc:
        pytest.fail(f"JACK server could not start: {exc}", pytrace=False)
    monkeypatch.setenv("JACK_DEFAULT_SERVER", name)
    monkeypatch.setenv("JACK_NO_START_SERVER", "1")
    tc = f"ls{uuid.uuid4().hex[:6]}"
    client = TestClient(tc)
    run = None
    try:
        server.wait_port(client.out_full)
        server.wait_port(client.in_full)
        run = Run(server, tmp_path, ["--input", client.out_full, "--output", client.in_full,
                                     "--profile", "edo12"],
                  wire_in=False, wire_out=False)
        _wait(lambda: run.in_port in server.connections(client.out_full), 15, lambda: run.daemon.log()[-2000:])
        client.send(mido.Message("note_on", note=60, velocity=80))
        client.wait_for(lambda r: len(note_ons(r)) >= 1)
        client.send(mido.Message("note_off", note=60))
        client.close()
        client = None
        server.stop()
        _wait(lambda: "JACK server stopped" in run.daemon.log(), 15, lambda: run.daemon.log()[-2000:])
        assert run.daemon.proc.poll() is None                    # still running
        server.start()
        client = TestClient(tc)
        _wait(lambda: run.in_port in server.connections(client.out_full)
              and client.in_full in server.connections(run.out_port), 20, lambda: run.daemon.log()[-2000:])
        client.clear()
        client.send(mido.Message("note_on", note=64, velocity=80))
        got = client.wait_for(lambda r: len(note_ons(r)) >= 1)
        assert note_ons(got)[0].msg.note == 64
        assert run.daemon.proc.poll() is None
    finally:
        if run is not None:
            run.stop()
        if client is not None:
            client.close()
        server.stop()
