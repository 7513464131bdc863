"""retuner under PipeWire's JACK layer, with a real PipeWire server (no sound hardware needed).

Facts checked here, as the README states them: retuner's JACK backend (JACK-Client) loads the system's
libjack by its plain name, so without help it reaches no PipeWire server, and pw-jack (which sets
LD_LIBRARY_PATH to PipeWire's libjack) makes it reach PipeWire; preloading PipeWire's libjack
(LD_PRELOAD, ld.so(8): preloaded objects come first in symbol lookup) does too. The test's own client
(python-rtmidi, whose wheel brings its own libjack) still needs the preload. Tuning values: quarter-comma meantone, every fifth 1/4
syntonic comma (81/80) narrow (J. M. Barbour, Tuning and Temperament, 1951); bend per MIDI 1.0
(14-bit, centre 8192, RPN 0 range, default 2 semitones), decoded by tests/jack.py.
"""

from __future__ import annotations

import glob
import json
import math
import os
import shutil
import subprocess
import sys
import time
from pathlib import Path

import mido
import pytest

from retuner.bench.jacklive import stop_child

from jack import Received, decode

TESTS = next(p for p in Path(__file__).resolve().parents if (p / "pyproject.toml").is_file()) / "tests"   # where the helper modules are
SYNT_COMMA = 1200 * math.log2(81 / 80)
MEANTONE_FIFTH = 1200 * math.log2(3 / 2) - SYNT_COMMA / 4


def pipewire_libjack() -> str:
    found = sorted(glob.glob("/usr/lib/*/pipewire-0.3/jack/libjack.so.0")
                   + glob.glob("/usr/lib*/pipewire-0.3/jack/libjack.so.0"))
    if not found:
        pytest.fail("PipeWire's libjack is missing (apt-get install pipewire-jack)", pytrace=False)
    return found[0]


@pytest.fixture
def pipewire(tmp_path):
    """A PipeWire server of our own: its socket in a private XDG_RUNTIME_DIR. Yields the environment
    for clients: that folder, no JACK server name (it would mean a jackd), and PipeWire's libjack."""
    exe = shutil.which("pipewire")
    if exe is None:
        pytest.fail("pipewire is missing (apt-get install pipewire pipewire-jack)", pytrace=False)
    runtime = tmp_path / "run"
    runtime.mkdir(mode=0o700)
    env = {k: v for k, v in os.environ.items() if k not in ("JACK_DEFAULT_SERVER", "LD_PRELOAD")}
    env.update(XDG_RUNTIME_DIR=str(runtime), JACK_NO_START_SERVER="1", XDG_CONFIG_HOME=str(tmp_path))
    log = open(tmp_path / "pipewire.log", "wb")
    proc = subprocess.Popen([exe], env=env, stdout=log, stderr=subprocess.STDOUT, start_new_session=True)
    preload = dict(env, LD_PRELOAD=pipewire_libjack())
    try:
        end = time.monotonic() + 20
        while True:     # ready when a JACK client (jack_lsp through PipeWire's libjack) gets in
            if proc.poll() is not None:
                pytest.fail("pipewire exited: " + (tmp_path / "pipewire.log").read_text()[-2000:])
            r = subprocess.run(["jack_lsp"], env=preload, capture_output=True, text=True, timeout=20)
            if r.returncode == 0:
                break
            assert time.monotonic() < end, "PipeWire did not take a JACK client within 20 s"
            time.sleep(0.1)
        yield env, preload
    finally:
        stop_child(proc, 5)
        log.close()


def _retuner(env, *args):
    return subprocess.run([sys.executable, "-m", "retuner", *args], env=env, capture_output=True, text=True,
                          timeout=60)


# A JACK client of its own process (it needs LD_PRELOAD too): ports pwtester:play and pwtester-rec:record
# (tests/jack.py's TestClient). It prints "ready", then on "play" plays C4, E4, G4, releases them once
# their note-ons came back, and prints what it received as JSON lines.
HELPER = r"""
import json, sys, time
sys.path.insert(0, sys.argv[1])
import mido
from jack import TestClient
c = TestClient("pwtester")
print("ready", flush=True)
sys.stdin.readline()
keys = [60, 64, 67]
for k in keys:
    c.send(mido.Message("note_on", note=k, velocity=90))
ons = lambda got: sorted(r.msg.note for r in got if r.msg.type == "note_on" and r.msg.velocity) == keys
c.wait_for(ons, timeout=20)
for k in keys:
    c.send(mido.Message("note_off", note=k))
offs = lambda got: len([r for r in got if r.msg.type == "note_off" or
                        (r.msg.type == "note_on" and not r.msg.velocity)]) >= 3
c.wait_for(offs, timeout=20)
for r in c.messages():
    print(json.dumps([r.t, r.msg.hex()]), flush=True)
c.close()
"""


def test_pw_jack_and_preloading_pipewires_libjack_both_reach_pipewire(pipewire):
    env, preload = pipewire
    r = _retuner(env, "ports", "--backend", "jack")
    assert r.returncode != 0, ("the system's libjack reached a server without help: is a jackd with the "
                               "default name running on this machine? " + r.stdout)
    assert r.returncode == 1 and "JACK server not running" in r.stderr, r.stderr
    pw_jack = shutil.which("pw-jack")
    assert pw_jack, "pw-jack is missing (it comes with pipewire-jack)"
    r = subprocess.run([pw_jack, sys.executable, "-m", "retuner", "ports", "--backend", "jack", "--json"],
                       env=env, capture_output=True, text=True, timeout=60)
    assert r.returncode == 0, r.stderr
    assert json.loads(r.stdout)["backend"] == "jack"
    r = _retuner(preload, "ports", "--backend", "jack", "--json")
    assert r.returncode == 0, r.stderr
    assert json.loads(r.stdout)["backend"] == "jack"


def test_chord_through_pipewire_arrives_in_quarter_comma_meantone(pipewire, tmp_path):
    env, preload = pipewire
    helper = subprocess.Popen([sys.executable, "-c", HELPER, str(TESTS)], env=preload, stdin=subprocess.PIPE,
                              stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    log_path = tmp_path / "daemon.log"
    daemon = None
    try:
        assert helper.stdout.readline().strip() == "ready", helper.stderr.read()
        with open(log_path, "wb") as log:
            daemon = subprocess.Popen(
                [sys.executable, "-m", "retuner", "run", "--backend", "jack", "--profile", "meantone-quarter",
                 "--input", "pwtester:play", "--output", "pwtester-rec:record", "--no-control-socket"],
                env=preload, stdout=log, stderr=subprocess.STDOUT)
        end = time.monotonic() + 30
        while not all(s in log_path.read_text() for s in ("input: connected", "output: connected")):
            assert daemon.poll() is None, log_path.read_text()
            assert time.monotonic() < end, "retuner did not connect both ports: " + log_path.read_text()
            time.sleep(0.05)
        helper.stdin.write("play\n")
        helper.stdin.flush()
        out, err = helper.communicate(timeout=60)
        assert helper.returncode == 0, err + log_path.read_text()
    finally:
        if helper.poll() is None:
            helper.kill()
        if daemon is not None and daemon.poll() is None:
            daemon.terminate()
            daemon.wait(10)
    received = []
    for line in out.splitlines():
        t, hexbytes = json.loads(line)
        received.append(Received(t, mido.Message.from_hex(hexbytes)))
    notes = {n.key: n.cents for n in decode(received).notes}
    assert sorted(notes) == [60, 64, 67]
    # A4 stays at 6900 c (440 Hz); E is one meantone fifth above A, G two fifths below A (minus octaves),
    # C three fifths below A
    target = {64: 6900 + MEANTONE_FIFTH - 1200, 67: 6900 - 2 * MEANTONE_FIFTH + 1200,
              60: 6900 - 3 * MEANTONE_FIFTH + 1200}
    step = 100 * 2 / 8192
    for key, cents in notes.items():
        assert abs(cents - target[key]) <= step / 2 + 1e-9, (key, cents, target[key])
    # the pure major third C-E (5/4 = 386.314 c) of quarter-comma meantone, as it sounded
    assert abs(notes[64] - notes[60] - 1200 * math.log2(5 / 4)) <= step
