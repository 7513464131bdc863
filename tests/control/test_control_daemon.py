"""The control socket, ``retuner ctl`` and ``retuner watch`` against a real daemon on the JACK fixture.

`retuner run` is a subprocess on a private JACK server (dummy backend); a JACK MIDI test client plays
into it and records what comes out; the test speaks to the daemon's control socket.

Sources for the checks:
- pitch decoding (key + bend/8192 * range, RPN 0, note-on velocity 0 = note-off): MIDI 1.0 Detailed
  Specification; tests/jack.py decodes independently of retuner's code;
- Werckmeister III C-E = 390.225 c and Vallotti C-E = 4 * (701.955 - 23.460/6) - 2400 = 392.18 c:
  computed here from their definitions (Barbour, Tuning and Temperament, 1951);
- 12-EDO at A4 = 440 Hz (ISO 16): C4 = 261.626 Hz, E4 = 329.628 Hz; the beat rate of two tones near
  p:q is |q*f2 - p*f1| (common practice): C4-E4 near 5:4 beats at |4*329.628 - 5*261.626| = 10.38 Hz.
"""

from __future__ import annotations

import json
import re
import math
import os
import shutil
import socket
import stat
import subprocess
import sys
import tempfile
import threading
import time
import uuid
from fractions import Fraction

import mido
import pytest

from jack import Daemon, JackError, NotifySocket, decode
from retuner.control.client import ControlClient
from retuner.pitch.tuning import ratio_to_cents

FIFTH = ratio_to_cents(Fraction(3, 2))
PYTH = ratio_to_cents(Fraction(3 ** 12, 2 ** 19))
HALF_STEP = 200.0 / 8192 / 2          # half a 14-bit bend step at range 2 semitones, in cents


def werckmeister3() -> dict[int, float]:
    """Key -> cents (A4 = 6900) of Werckmeister III from its definition (Barbour 1951): chain of fifths
    Eb Bb F C G D A E B F# C# G#; C-G, G-D, D-A and B-F# narrowed by 1/4 Pythagorean comma, others pure."""
    chain = [3, 10, 5, 0, 7, 2, 9, 4, 11, 6, 1, 8]
    narrow = {(0, 7), (7, 2), (2, 9), (11, 6)}
    pos = {3: 0.0}
    for x, y in zip(chain, chain[1:]):
        pos[y] = pos[x] + FIFTH - (PYTH / 4 if (x, y) in narrow else 0.0)
    above_a = {p: (c - pos[9]) % 1200.0 for p, c in pos.items()}     # cents above A, within an octave
    out = {}
    for k in range(128):
        a_below = 6900.0 + 1200.0 * ((k - 69 - (k - 69) % 12) // 12)   # the A at or below key k
        out[k] = a_below + above_a[k % 12]
    return out


class Run:
    def __init__(self, jack_server, client, args):
        self.dir = tempfile.mkdtemp(prefix="rtd")        # short: Unix socket paths are limited
        self.sock = os.path.join(self.dir, "retuner", "control.sock")
        self.client_name = f"retuner-c{uuid.uuid4().hex[:6]}"
        self.notify = NotifySocket(os.path.join(self.dir, "notify.sock"))
        env = dict(jack_server.env)
        env["NOTIFY_SOCKET"] = self.notify.path
        env["XDG_CONFIG_HOME"] = os.path.join(self.dir, "cfg")
        env["XDG_RUNTIME_DIR"] = self.dir
        env.pop("JOURNAL_STREAM", None)
        self.daemon = Daemon(["--backend", "jack", "--client-name", self.client_name, "--virtual", *args],
                             env, os.path.join(self.dir, "daemon.log"))
        try:
            self.notify.wait_for("READY=1", timeout=15)
        except AssertionError:
            self.daemon.stop()
            raise AssertionError("daemon never became ready:\n" + self.daemon.log()[-3000:])
        end = time.monotonic() + 10
        while not os.path.exists(self.sock):
            assert time.monotonic() < end, "no control socket:\n" + self.daemon.log()[-3000:]
            time.sleep(0.02)
        for src, dst in ((client.out_full, f"{self.client_name}:in"),
                         (f"{self.client_name}:out", client.in_full)):
            for attempt in range(3):      # jack_connect is itself a JACK client; it can fail to attach
                try:
                    jack_server.connect(src, dst)
                    break
                except JackError:
                    if attempt == 2:
                        raise
                    time.sleep(0.3)
        self.env = env

    def ctl(self, *args, timeout=20):
        return subprocess.run([sys.executable, "-m", "retuner", "ctl", "--control-socket", self.sock, *args],
                              capture_output=True, text=True, timeout=timeout, env=self.env)

    def stop(self):
        rc = self.daemon.stop()
        self.notify.close()
        shutil.rmtree(self.dir, ignore_errors=True)
        return rc


@pytest.fixture
def run_daemon(jack_server, jack_client):
    runs = []

    def start(*args):
        r = Run(jack_server, jack_client, list(args))
        runs.append(r)
        return r
    yield start
    for r in runs:
        r.stop()


def ons(recs):
    return [r for r in recs if r.msg.type == "note_on" and r.msg.velocity > 0]


def offs(recs):
    return [r for r in recs if r.msg.type == "note_off" or (r.msg.type == "note_on" and r.msg.velocity == 0)]


def press(client, keys):
    for k in keys:
        client.send(mido.Message("note_on", note=k, velocity=80))
        time.sleep(0.004)


def lift(client, keys):
    for k in keys:
        client.send(mido.Message("note_off", note=k, velocity=0))


def chord_cents(client, keys) -> dict[int, float]:
    """Play keys, wait until they sound, return key -> decoded cents; then release and wait."""
    n0 = len(ons(client.messages()))
    m0 = len(offs(client.messages()))
    press(client, keys)
    client.wait_for(lambda r: len(ons(r)) >= n0 + len(keys))
    d = decode(client.messages())
    got = {n.key: n.settled for n in d.notes[n0:]}   # as it sounds once its chord has settled
    lift(client, keys)
    client.wait_for(lambda r: len(offs(r)) >= m0 + len(keys))
    return got


def test_socket_and_every_command_on_the_daemon(run_daemon, jack_client):
    run = run_daemon("--profile", "werckmeister-3")
    assert stat.S_IMODE(os.stat(run.sock).st_mode) == 0o600
    assert stat.S_IMODE(os.stat(os.path.dirname(run.sock)).st_mode) == 0o700

    r = run.ctl("status")
    assert r.returncode == 0, r.stderr
    assert "werckmeister-3" in r.stdout
    # an aligned table of plain words: one label column, no raw counter keys, ports and state
    rows = r.stdout.rstrip("\n").splitlines()
    width = len(re.match(r"^(.*?)  +\S", rows[0]).group(0)) - 1
    assert all(len(row) > width and row[width - 2:width] == "  " and row[width] != " " for row in rows), rows
    labels = {row[:width].strip() for row in rows}
    assert {"profile", "concert pitch", "state", "input port", "output port", "sounding"} <= labels
    assert not any("_" in label for label in labels), labels
    assert re.search(r"^state +running for ", r.stdout, re.M)
    assert re.search(r"^output port +our own port$", r.stdout, re.M)
    st = json.loads(run.ctl("--json", "status").stdout)
    assert st["ok"] and st["profile"] == "werckmeister-3" and st["adaptive"] is False
    assert json.loads(run.ctl("status", "--json").stdout)["profile"] == "werckmeister-3"
    pr = json.loads(run.ctl("--json", "profiles").stdout)
    assert {"edo12", "vallotti", "werckmeister-3"} <= {p["id"] for p in pr["profiles"]}

    n = chord_cents(jack_client, [60, 64])
    # Werckmeister III C-E, four fifths less two octaves
    # (C-G, G-D, D-A narrowed by 1/4 Pythagorean comma, A-E pure): 390.225 c
    assert n[64] - n[60] == pytest.approx(4 * FIFTH - 3 * PYTH / 4 - 2400, abs=2 * HALF_STEP)

    r = run.ctl("load", "vallotti")
    assert r.returncode == 0 and "vallotti" in r.stdout, r.stderr
    n = chord_cents(jack_client, [60, 64])
    assert n[64] - n[60] == pytest.approx(4 * (FIFTH - PYTH / 6) - 2400, abs=2 * HALF_STEP)

    r = run.ctl("load", "no-such-tuning")
    assert r.returncode == 2 and len(r.stderr.strip().splitlines()) == 1 and "no-such-tuning" in r.stderr

    r = run.ctl("concert-pitch", "442")
    assert r.returncode == 0, r.stderr
    n = chord_cents(jack_client, [69])
    # A4 at 442 Hz: 6900 + 1200*log2(442/440) cents above key 0 of 12-EDO at 440 (ISO 16)
    assert n[69] == pytest.approx(6900 + 1200 * math.log2(442 / 440), abs=HALF_STEP + 1e-9)

    assert run.ctl("load", "just-5limit").returncode == 0
    assert run.ctl("concert-pitch", "440").returncode == 0
    n = chord_cents(jack_client, [62, 69])
    assert n[69] - n[62] == pytest.approx(ratio_to_cents(Fraction(40, 27)), abs=2 * HALF_STEP)  # D-A wolf on C
    r = run.ctl("transpose", "2")
    assert r.returncode == 0, r.stderr
    n = chord_cents(jack_client, [62, 66, 69])
    assert n[69] - n[62] == pytest.approx(FIFTH, abs=2 * HALF_STEP)                # just on D now
    assert n[66] - n[62] == pytest.approx(ratio_to_cents(Fraction(5, 4)), abs=2 * HALF_STEP)
    assert run.ctl("transpose", "0").returncode == 0

    assert run.ctl("load", "edo12").returncode == 0
    r = run.ctl("adaptive", "on")
    assert r.returncode == 0 and "adaptive on" in r.stdout, r.stdout + r.stderr
    n = chord_cents(jack_client, [60, 64, 67])
    # adaptive just intonation: a major triad from silence is 4:5:6 (pure thirds
    # and fifth, as the solver's 5-limit table has them)
    assert n[64] - n[60] == pytest.approx(ratio_to_cents(Fraction(5, 4)), abs=0.1)
    assert n[67] - n[60] == pytest.approx(FIFTH, abs=0.1)
    r = run.ctl("adaptive", "on", "--set", "policy=nonsense")
    assert r.returncode == 2
    assert run.ctl("adaptive", "off").returncode == 0
    n = chord_cents(jack_client, [60, 64])
    assert n[64] - n[60] == pytest.approx(400.0, abs=2 * HALF_STEP)

    # panic: every held note is released
    m0 = len(offs(jack_client.messages()))
    n0 = len(ons(jack_client.messages()))
    press(jack_client, [48, 60, 64, 67])
    jack_client.wait_for(lambda r: len(ons(r)) >= n0 + 4)
    r = run.ctl("panic")
    assert r.returncode == 0 and "released 4" in r.stdout, r.stdout + r.stderr
    jack_client.wait_for(lambda r: len(offs(r)) >= m0 + 4)
    assert decode(jack_client.messages()).stuck() == []
    lift(jack_client, [48, 60, 64, 67])           # the player lets go later: nothing breaks

    # malformed and unknown requests: error replies, the daemon plays on unchanged
    s = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    s.settimeout(10)
    s.connect(run.sock)
    f = s.makefile("rwb")
    for line in (b"{oops\n", b"{\"cmd\": \"reboot\"}\n", b"[]\n", b"{\"cmd\": \"load\", \"profile\": 3}\n"):
        f.write(line)
        f.flush()
        rep = json.loads(f.readline())
        assert rep["ok"] is False and rep["error"]
    s.close()
    st2 = json.loads(run.ctl("--json", "status").stdout)
    assert st2["profile"] == "edo12" and st2["adaptive"] is False and st2["concert_pitch_hz"] == 440.0
    n = chord_cents(jack_client, [60, 67])
    assert n[67] - n[60] == pytest.approx(700.0, abs=2 * HALF_STEP)
    assert "Traceback" not in run.daemon.log()


def test_subscribe_events_from_the_daemon(run_daemon, jack_client):
    run = run_daemon("--profile", "edo12")
    with ControlClient(run.sock) as c:
        snap = c.request("subscribe")
        assert snap["ok"] and snap["notes"] == []
        press(jack_client, [60, 64])
        seen = {}
        while len(seen) < 2:
            ev = c.read()
            if ev["event"] == "note_on":
                seen[ev["key"]] = ev
        assert seen[60]["cents"] == pytest.approx(6000.0, abs=HALF_STEP)
        assert seen[64]["hz"] == pytest.approx(329.628, abs=0.001)     # 12-EDO E4 at A4 = 440 Hz
        lift(jack_client, [60, 64])
        gone = set()
        while gone != {60, 64}:
            ev = c.read()
            if ev["event"] == "note_off":
                gone.add(ev["key"])
    r = run.ctl("subscribe", "--count", "1")
    assert r.returncode == 0


CLIENTS_SCRIPT = r"""
import json, socket, sys, threading
from retuner.control.client import ControlClient
path = sys.argv[1]
sleeper = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
sleeper.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 4096)
sleeper.connect(path)
sleeper.sendall(b'{"cmd": "subscribe"}\n')            # and never reads
flooder = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
flooder.connect(path)
flood = threading.Thread(target=lambda: flooder.sendall(b'{"cmd": "status"}\n' * 2000), daemon=True)
flood.start()
errors = []
def client(i):
    try:
        with ControlClient(path, timeout=30) as c:
            for j in range(3):
                r = c.request("status", id=i * 10 + j)
                if not (r["ok"] and r["id"] == i * 10 + j and r["profile"] == "werckmeister-3"):
                    errors.append(f"{i}: {r}")
            if c.request("nope")["ok"]:
                errors.append(f"{i}: unknown command accepted")
    except Exception as exc:
        errors.append(f"{i}: {exc!r}")
threads = [threading.Thread(target=client, args=(i,)) for i in range(100)]
for t in threads:
    t.start()
print("started", flush=True)
for t in threads:
    t.join(60)
print(json.dumps(errors), flush=True)
sys.stdin.read()                                      # hold the two rude connections open until told
"""


def test_hundred_clients_a_non_reader_and_a_flooder_do_not_disturb_the_daemon(run_daemon, jack_client):
    run = run_daemon("--profile", "werckmeister-3")
    # the clients run in their own process, as real clients do (and so they do not compete for this
    # process's interpreter lock with the JACK recording callback)
    clients = subprocess.Popen([sys.executable, "-c", CLIENTS_SCRIPT, run.sock], stdin=subprocess.PIPE,
                               stdout=subprocess.PIPE, text=True, env=run.env)
    try:
        assert clients.stdout.readline().strip() == "started"
        # meanwhile the music goes on: 40 notes, each at its Werckmeister pitch, none stuck
        W3 = werckmeister3()
        keys = [48 + (i * 7) % 36 for i in range(40)]
        n0 = len(ons(jack_client.messages()))
        for k in keys:
            press(jack_client, [k])
            time.sleep(0.01)
            lift(jack_client, [k])
        try:
            jack_client.wait_for(lambda r: len(ons(r)) >= n0 + len(keys), timeout=15)
        except AssertionError as exc:
            st = json.loads(run.ctl("--json", "status").stdout)
            raise AssertionError(f"{exc}\ndaemon counters: {st['counters']}") from None
        errors = json.loads(clients.stdout.readline())
        assert errors == []
        d = decode(jack_client.messages())
        played = d.notes[n0:]
        assert [n.key for n in played] == keys
        for n in played:
            assert abs(n.cents - W3[n.key]) <= HALF_STEP + 1e-9, (n.key, n.cents, W3[n.key])
        jack_client.wait_for(lambda r: decode(r).stuck() == [])
        st = json.loads(run.ctl("--json", "status").stdout)
        assert st["ok"] and st["control"]["connections"] >= 102
        assert st["control"]["subscribers"] >= 1
    finally:
        clients.stdin.close()
        clients.wait(20)
    assert "Traceback" not in run.daemon.log()


def ctl_no_daemon(*args, env=None):
    return subprocess.run([sys.executable, "-m", "retuner", "ctl", *args], capture_output=True, text=True,
                          timeout=30, env=env)


def test_ctl_without_a_daemon_exits_1_with_one_line(tmp_path):
    env = dict(os.environ)
    env["XDG_RUNTIME_DIR"] = str(tmp_path)
    r = ctl_no_daemon("status", env=env)
    assert r.returncode == 1 and r.stdout == ""
    assert len(r.stderr.strip().splitlines()) == 1 and "no daemon is running" in r.stderr
    # a socket file left behind by a daemon that died: still "no daemon"
    d = tmp_path / "retuner"
    d.mkdir()
    dead = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    dead.bind(str(d / "control.sock"))
    dead.close()
    for args in (["status"], ["panic"], ["load", "edo12"], ["--json", "profiles"]):
        r = ctl_no_daemon(*args, env=env)
        assert r.returncode == 1, args
        assert len(r.stderr.strip().splitlines()) == 1 and "no daemon is running" in r.stderr


# ----------------------------------------------------------------------------- watch

def held_chord_daemon(run_daemon, jack_client):
    run = run_daemon("--profile", "edo12")
    n0 = len(ons(jack_client.messages()))
    press(jack_client, [60, 64, 67])
    jack_client.wait_for(lambda r: len(ons(r)) >= n0 + 3)
    return run


def check_watch_text(text: str) -> None:
    # hand calculation, 12-EDO at A4 = 440 Hz: C4 = 261.626 Hz, E4 = 329.628 Hz, G4 = 391.995 Hz
    lines = [" ".join(l.split()) for l in text.splitlines()]
    assert "PROFILE edo12" in " ".join(lines)
    assert "C4 60 +0.00 261.63" in lines
    assert "E4 64 +0.00 329.63" in lines
    assert "G4 67 +0.00 392.00" in lines
    # C4-E4 near 5:4: |4*329.628 - 5*261.626| = 10.38 Hz; 400 - 386.31 = +13.69 c
    assert "C4-E4 major third 400.00 5/4 +13.69 10.38" in lines
    # C4-G4 near 3:2: |2*391.995 - 3*261.626| = 0.89 Hz
    assert "C4-G4 fifth 700.00 3/2 -1.96 0.89" in lines
    # E4-G4 near 6:5: |5*391.995 - 6*329.628| = 17.79 Hz
    assert "E4-G4 minor third 300.00 6/5 -15.64 17.79" in lines


def test_watch_once_shows_the_held_chord(run_daemon, jack_client):
    run = held_chord_daemon(run_daemon, jack_client)
    r = subprocess.run([sys.executable, "-m", "retuner", "watch", "--control-socket", run.sock, "--once"],
                       capture_output=True, text=True, timeout=30, env=run.env)
    assert r.returncode == 0, r.stderr
    check_watch_text(r.stdout)
    lift(jack_client, [60, 64, 67])


def test_watch_in_a_captured_terminal(run_daemon, jack_client):
    tmux = shutil.which("tmux")
    assert tmux, "tmux is needed to capture the full-screen view (apt-get install tmux)"
    run = held_chord_daemon(run_daemon, jack_client)
    session = f"rtw{uuid.uuid4().hex[:6]}"
    sock = os.path.join(run.dir, "tmux.sock")
    env = dict(run.env)
    env["TERM"] = "xterm"
    env.pop("TMUX", None)
    cmd = f"{sys.executable} -m retuner watch --socket {run.sock}"
    subprocess.run([tmux, "-S", sock, "new-session", "-d", "-s", session, "-x", "120", "-y", "40", cmd],
                   check=True, env=env, timeout=20)
    try:
        text = ""
        end = time.monotonic() + 15
        while time.monotonic() < end:
            text = subprocess.run([tmux, "-S", sock, "capture-pane", "-p", "-t", session],
                                  capture_output=True, text=True, env=env, timeout=10).stdout
            if "C4-E4" in text and "G4" in text:
                break
            time.sleep(0.1)
        check_watch_text(text)
        # a live change shows up: release E4, the view follows
        lift(jack_client, [64])
        end = time.monotonic() + 10
        while time.monotonic() < end:
            text = subprocess.run([tmux, "-S", sock, "capture-pane", "-p", "-t", session],
                                  capture_output=True, text=True, env=env, timeout=10).stdout
            if "C4-E4" not in text and "SOUNDING 2" in text:
                break
            time.sleep(0.05)
        assert "C4-E4" not in text and "SOUNDING 2" in text, text
        subprocess.run([tmux, "-S", sock, "send-keys", "-t", session, "q"], env=env, timeout=10)
    finally:
        subprocess.run([tmux, "-S", sock, "kill-server"], env=env, timeout=10, capture_output=True)
        lift(jack_client, [60, 67])


def test_reload_keeps_a_live_switch_unless_the_config_changes_its_tuning(run_daemon, jack_client):
    """A teacher switches tunings live, then the service is reloaded (SIGHUP): the live choice
    stays while the config's tuning is unchanged; a config that names another tuning wins."""
    import signal
    cfg_dir = tempfile.mkdtemp(prefix="rtc")
    cfg = os.path.join(cfg_dir, "c.yaml")
    with open(cfg, "w") as fh:
        fh.write("profile: werckmeister-3\n")
    r = run_daemon("--config", cfg)
    try:
        assert r.ctl("load", "pythagorean").returncode == 0
        r.daemon.signal(signal.SIGHUP)
        r.notify.wait_for("READY=1", count=2)
        st = json.loads(r.ctl("status", "--json").stdout)
        assert st["profile"] == "pythagorean"
        with open(cfg, "w") as fh:
            fh.write("profile: vallotti\n")
        r.daemon.signal(signal.SIGHUP)
        r.notify.wait_for("READY=1", count=3)
        st = json.loads(r.ctl("status", "--json").stdout)
        assert st["profile"] == "vallotti"
    finally:
        shutil.rmtree(cfg_dir, ignore_errors=True)
