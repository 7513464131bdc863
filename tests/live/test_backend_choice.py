"""``--backend auto`` (the default): the ALSA sequencer when its device opens, else a JACK server
that is already running, else one line with the commands that start a JACK server with its dummy
driver, and exit status 1 (something outside that is not there) from every command.

The JACK command line is jackd's own (jackd(1): ``--no-realtime``, ``-n`` server name, ``-d dummy``
driver with ``-r`` rate and ``-p`` period); the test runs the commands the line gives and checks
that retuner then finds the server."""

from __future__ import annotations

import os
import shlex
import signal
import subprocess
import sys
import time
import uuid

import rtmidi

from jack import Daemon
from retuner.live import ports


def _alsa_usable() -> bool:
    # what this machine offers, found with python-rtmidi directly (not through retuner)
    if not os.access(ports.SEQ_DEVICE, os.R_OK | os.W_OK):
        return False
    try:
        rtmidi.MidiOut(rtmidi.API_LINUX_ALSA, "test-probe").delete()
        return True
    except Exception:
        return False


EXPECTED = "alsa" if _alsa_usable() else "jack"


def _retuner(*args, env):
    return subprocess.run([sys.executable, "-m", "retuner", *args], capture_output=True, text=True,
                          timeout=60, env=env)


def test_ports_picks_the_running_jack_server_when_there_is_no_alsa_sequencer(jack_server, jack_client, tmp_path):
    env = dict(jack_server.env, XDG_CONFIG_HOME=str(tmp_path))
    env.pop("JACK_NO_START_SERVER")          # auto must not need it to leave servers alone
    r = _retuner("ports", "--json", env=env)
    assert r.returncode == 0, r.stderr
    import json
    listed = json.loads(r.stdout)
    assert listed["backend"] == EXPECTED
    if EXPECTED == "jack":
        assert jack_client.out_full in listed["sources"]
        assert jack_client.in_full in listed["destinations"]


def test_run_picks_the_running_jack_server(jack_server, tmp_path):
    name = f"auto{uuid.uuid4().hex[:6]}"
    env = dict(jack_server.env, XDG_CONFIG_HOME=str(tmp_path), XDG_RUNTIME_DIR=str(tmp_path))
    d = Daemon(["--virtual", "--client-name", name, "--no-control-socket"], env, str(tmp_path / "d.log"))
    try:
        if EXPECTED == "jack":
            jack_server.wait_port(f"{name}:in")
            jack_server.wait_port(f"{name}:out")
        else:
            deadline = time.monotonic() + 10
            while "input: our own port" not in d.log() and time.monotonic() < deadline:
                time.sleep(0.05)
        assert f"({EXPECTED})" in d.log()
    finally:
        assert d.stop() == 0, d.log()


def test_no_midi_system_gives_the_commands_that_start_one_and_they_work(tmp_path):
    if EXPECTED == "alsa":
        raise AssertionError("this machine has an ALSA sequencer: run this test where it has none")
    server = f"retuner-auto-{os.getpid()}-{uuid.uuid4().hex[:4]}"
    env = dict(os.environ, JACK_DEFAULT_SERVER=server, XDG_CONFIG_HOME=str(tmp_path),
               XDG_RUNTIME_DIR=str(tmp_path))
    env.pop("JACK_NO_START_SERVER", None)    # looking must not start a server either
    listing = _retuner("ports", env=env)
    daemon = _retuner("run", "--virtual", "--no-control-socket", env=env)
    for r in (listing, daemon):
        assert r.returncode == 1, r.stderr
        lines = r.stderr.strip().splitlines()
        assert len(lines) == 1, r.stderr
        assert lines[0].startswith("retuner: backend: no MIDI system"), r.stderr
    assert listing.stdout == ""
    # no server was started by looking
    lsp = subprocess.run(["jack_lsp"], env=dict(env, JACK_NO_START_SERVER="1"), capture_output=True, text=True)
    assert lsp.returncode != 0
    # the commands given start a server that retuner then finds
    command = lines[0].split(": ", 2)[-1].rsplit(": ", 1)[-1]
    assert command.endswith(" &")
    argv = shlex.split(command[:-2])
    assert argv[0] == "jackd" and ["-n", server] == argv[argv.index("-n"):argv.index("-n") + 2]
    assert argv[argv.index("-d"):] == ["-d", "dummy", "-r", "48000", "-p", "128"]
    log = open(tmp_path / "jackd.log", "wb")
    proc = subprocess.Popen(argv, env=env, stdout=log, stderr=subprocess.STDOUT, start_new_session=True)
    try:
        deadline = time.monotonic() + 30        # a loaded machine starts jackd slowly
        while True:
            r = _retuner("ports", "--json", env=env)
            if r.returncode == 0 or time.monotonic() > deadline:
                break
            time.sleep(0.2)
        assert r.returncode == 0, (r.stderr, (tmp_path / "jackd.log").read_text(errors="replace")[-1500:])
        assert '"backend": "jack"' in r.stdout
    finally:
        proc.send_signal(signal.SIGTERM)
        proc.wait(10)
        log.close()


def test_alsa_insisted_on_with_no_sequencer_is_one_line_naming_the_device(tmp_path):
    # libasound prints lines of its own when the sequencer does not open; the user gets ours only
    if EXPECTED == "alsa":
        raise AssertionError("this machine has an ALSA sequencer: run this test where it has none")
    env = dict(os.environ, XDG_CONFIG_HOME=str(tmp_path), XDG_RUNTIME_DIR=str(tmp_path))
    for r in (_retuner("ports", "--backend", "alsa", env=env),
              _retuner("run", "--virtual", "--backend", "alsa", "--no-control-socket", env=env)):
        assert r.returncode == 1, r.stderr
        lines = r.stderr.strip().splitlines()
        assert len(lines) == 1, r.stderr
        assert lines[0].startswith("retuner: backend: cannot open the alsa MIDI system") \
            and "/dev/snd/seq" in lines[0], r.stderr
