"""The control socket against the control server alone, driving a real (sans-I/O) engine.

A small "engine thread" here plays the daemon's part exactly as retuner/daemon.py
does: it feeds MIDI to a real retuner.engine.core.Engine, ticks it, drains
``server.serve_pending()`` and calls ``EngineControl.observe``. The tests speak
JSON lines over a real Unix socket. (The same commands against the real daemon
on the JACK fixture are in test_control_daemon.py.)
"""

from __future__ import annotations

import json
import re
import math
import os
import queue
import shutil
import socket
import stat
import tempfile
import threading
import time

import mido
import pytest

from retuner.control.client import ControlClient
from retuner.control.commands import EngineControl, EngineHost
from retuner.control.protocol import COMMANDS, default_socket_path
from retuner.control.server import ControlServer
from retuner.engine.core import Engine, EngineConfig
from retuner.errors import RetunerError
from retuner.live.session import Session
from retuner.profiles.profile import list_profiles, load_profile
from retuner.pitch.tuning import ratio_to_cents
from fractions import Fraction

BEND_STEP = 200.0 / 8192     # cents per bend step at the default range of 2 semitones (MIDI 1.0 spec)


class Rig:
    """Engine + EngineControl + ControlServer, with an engine thread like the daemon's."""

    def __init__(self, profile: str = "werckmeister-3", path: str | None = None, config=None):
        self.dir = tempfile.mkdtemp(prefix="rtc")
        self.path = path or os.path.join(self.dir, "retuner", "control.sock")
        self.engine = Engine(load_profile(profile), config or EngineConfig())
        self.out: list[mido.Message] = []
        self.midi: "queue.SimpleQueue" = queue.SimpleQueue()
        self.calls: "queue.SimpleQueue" = queue.SimpleQueue()
        host = EngineHost(session=Session(self.engine), emit=self.out.extend, clock=time.monotonic)
        self.ctl = EngineControl(host)
        self.server = ControlServer(self.path, self.ctl)
        self.ctl.server = self.server
        self.server.start()
        self.out.extend(self.engine.start(time.monotonic()))
        self.stop = False
        self.thread = threading.Thread(target=self._loop, daemon=True)
        self.thread.start()

    def _loop(self) -> None:
        while not self.stop:
            now = time.monotonic()
            try:
                while True:
                    msg = self.midi.get_nowait()
                    self.out.extend(self.engine.feed(now, msg))
            except queue.Empty:
                pass
            try:
                while True:
                    fn = self.calls.get_nowait()
                    fn()
            except queue.Empty:
                pass
            dl = self.engine.next_deadline()
            if dl is not None and dl <= now:
                self.out.extend(self.engine.tick(now))
            self.server.serve_pending()
            self.ctl.observe(now)
            time.sleep(0.001)

    def play(self, *keys: int, on: bool = True) -> None:
        for k in keys:
            self.midi.put(mido.Message("note_on" if on else "note_off", note=k, velocity=80 if on else 0))

    def on_engine(self, fn) -> None:
        """Run fn on the engine thread and wait for it."""
        done = threading.Event()
        self.calls.put(lambda: (fn(), done.set()))
        assert done.wait(10)

    def notes(self) -> dict[int, float]:
        """Sounding key -> cents, from a subscribe snapshot over the socket."""
        with ControlClient(self.path) as c:
            r = c.request("subscribe")
        assert r["ok"], r
        return {n["key"]: n["cents"] for n in r["notes"]}

    def wait_notes(self, keys, timeout: float = 5.0) -> dict[int, float]:
        end = time.monotonic() + timeout
        while True:
            n = self.notes()
            if set(n) == set(keys):
                return n
            assert time.monotonic() < end, f"sounding {sorted(n)}, want {sorted(keys)}"
            time.sleep(0.01)

    def close(self) -> None:
        self.stop = True
        self.thread.join(5)
        self.server.close()
        shutil.rmtree(self.dir, ignore_errors=True)


@pytest.fixture
def rig():
    r = Rig()
    try:
        yield r
    finally:
        r.close()


def raw(path: str) -> socket.socket:
    s = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    s.settimeout(10)
    s.connect(path)
    return s


def read_line(s: socket.socket, buf: bytearray) -> dict:
    while b"\n" not in buf:
        data = s.recv(65536)
        assert data, "connection closed"
        buf += data
    nl = buf.index(b"\n")
    line = bytes(buf[:nl])
    del buf[:nl + 1]
    return json.loads(line)


# --------------------------------------------------------------------------- socket


def test_socket_permissions_default_path(monkeypatch):
    base = tempfile.mkdtemp(prefix="rtx")
    try:
        monkeypatch.setenv("XDG_RUNTIME_DIR", base)
        path = default_socket_path()
        assert str(path) == os.path.join(base, "retuner", "control.sock")
        os.makedirs(os.path.join(base, "retuner"), mode=0o755)   # a folder left too open is tightened
        os.chmod(os.path.join(base, "retuner"), 0o755)
        srv = ControlServer(None, EngineControl(EngineHost(session=None, emit=list))).start()
        try:
            assert stat.S_ISSOCK(os.stat(path).st_mode)
            assert stat.S_IMODE(os.stat(path).st_mode) == 0o600
            assert stat.S_IMODE(os.stat(path.parent).st_mode) == 0o700
            # a second server on the same live socket is refused, the first keeps it
            with pytest.raises(RetunerError, match="already listening"):
                ControlServer(path, EngineControl(EngineHost(session=None, emit=list))).start()
            assert os.path.exists(path)
        finally:
            srv.close()
        assert not os.path.exists(path)      # removed on close
    finally:
        shutil.rmtree(base, ignore_errors=True)


def test_stale_socket_is_replaced_and_new_folder_is_private():
    base = tempfile.mkdtemp(prefix="rtx")
    try:
        path = os.path.join(base, "sub", "ctl.sock")
        os.makedirs(os.path.dirname(path))
        dead = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
        dead.bind(path)
        dead.close()                                   # a leftover of a daemon that died
        srv = ControlServer(path, EngineControl(EngineHost(session=None, emit=list))).start()
        try:
            assert stat.S_IMODE(os.stat(path).st_mode) == 0o600
            with ControlClient(path) as c:
                r = c.request("nonsense")
            assert r["ok"] is False and "unknown command" in r["error"]
        finally:
            srv.close()
        fresh = os.path.join(base, "new", "retuner", "c.sock")
        srv = ControlServer(fresh, EngineControl(EngineHost(session=None, emit=list))).start()
        try:
            assert stat.S_IMODE(os.stat(os.path.dirname(fresh)).st_mode) == 0o700
        finally:
            srv.close()
        # a "retuner" folder that is a link somewhere else is refused (someone could have planted it)
        os.symlink(base, os.path.join(base, "retuner"))
        with pytest.raises(RetunerError, match="not ours"):
            ControlServer(os.path.join(base, "retuner", "c.sock"),
                          EngineControl(EngineHost(session=None, emit=list))).start()
        with open(os.path.join(base, "plain"), "w") as fh:
            fh.write("x")
        with pytest.raises(RetunerError, match="not a socket"):
            ControlServer(os.path.join(base, "plain"), EngineControl(EngineHost(session=None, emit=list))).start()
    finally:
        shutil.rmtree(base, ignore_errors=True)


# --------------------------------------------------------------------------- commands


def test_status_and_profiles(rig):
    with ControlClient(rig.path) as c:
        st = c.request("status", id=7)
        assert st["ok"] and st["id"] == 7 and st["cmd"] == "status"
        assert st["profile"] == "werckmeister-3" and st["adaptive"] is False
        assert st["concert_pitch_hz"] is None and st["transpose_semitones"] == 0
        assert "notes" in st["counters"] and st["sounding"] == 0
        pr = c.request("profiles")
    assert pr["ok"]
    assert [p["id"] for p in pr["profiles"]] == [p.id for p in list_profiles()]
    assert "werckmeister-3" in {p["id"] for p in pr["profiles"]}


def test_load_switches_new_notes_and_keeps_sounding_ones(rig):
    rig.play(60)
    before = rig.wait_notes([60])[60]
    # Werckmeister III: C is 11.73 c above 12-EDO C when A = 440 (Barbour 1951, table; from memory)
    assert before - 6000 == pytest.approx(11.73, abs=0.05)
    with ControlClient(rig.path) as c:
        r = c.request("load", profile="vallotti")
    assert r["ok"] and r["profile"] == "vallotti"
    rig.play(64)
    n = rig.wait_notes([60, 64])
    assert n[60] == before                       # a sounding note keeps its pitch
    # Vallotti C-E: four fifths narrowed by 1/6 Pythagorean comma, less two octaves
    # (definition: Vallotti 1779 via Barbour 1951): 4*(701.955 - 23.460/6) - 2400 = 392.18 c
    pyth = ratio_to_cents(Fraction(3 ** 12, 2 ** 19))
    want_e = 4 * (ratio_to_cents(Fraction(3, 2)) - pyth / 6) - 2400
    c_vallotti = load_profile("vallotti").cents[60]
    assert n[64] - c_vallotti == pytest.approx(want_e, abs=BEND_STEP)
    with ControlClient(rig.path) as c:
        bad = c.request("load", profile="no-such-profile")
        st = c.request("status")
    assert bad["ok"] is False and "no-such-profile" in bad["error"]
    assert st["profile"] == "vallotti"


def test_reference_sets_a4(rig):
    with ControlClient(rig.path) as c:
        r = c.request("concert_pitch", hz=442.0)
        assert r["ok"] and r["concert_pitch_hz"] == 442.0
        rig.play(69)
        n = rig.wait_notes([69])
        # cents of 442 Hz above key 0 of 12-EDO at A4 = 440 Hz (ISO 16): 6900 + 1200*log2(442/440)
        assert n[69] == pytest.approx(6900 + 1200 * math.log2(442 / 440), abs=BEND_STEP)
        for bad in ({"hz": "loud"}, {"hz": 5}, {"hz": True}, {}):
            e = c.request("concert_pitch", **bad)
            assert e["ok"] is False, bad
        assert c.request("status")["concert_pitch_hz"] == 442.0


def test_transpose_moves_the_root():
    rig = Rig("just-5limit")
    try:
        fifth = ratio_to_cents(Fraction(3, 2))
        rig.play(62, 69)
        n = rig.wait_notes([62, 69])
        # just intonation on C: D = 9/8, A = 5/3, so D-A is 40/27, a comma short of a fifth
        assert n[69] - n[62] == pytest.approx(ratio_to_cents(Fraction(40, 27)), abs=2 * BEND_STEP)
        rig.play(62, 69, on=False)
        rig.wait_notes([])
        with ControlClient(rig.path) as c:
            r = c.request("transpose", semitones=2)
        assert r["ok"] and r["transpose_semitones"] == 2
        rig.play(62, 66, 69)
        n = rig.wait_notes([62, 66, 69])
        # the scale now starts on D: D-F#-A is a pure 4:5:6 triad
        assert n[69] - n[62] == pytest.approx(fifth, abs=2 * BEND_STEP)
        assert n[66] - n[62] == pytest.approx(ratio_to_cents(Fraction(5, 4)), abs=2 * BEND_STEP)
        # A4 still sounds at its reference pitch (key 69 = 440 Hz in the profile)
        assert n[69] == pytest.approx(6900.0, abs=BEND_STEP)
        rig.play(62, 66, 69, on=False)
        rig.wait_notes([])
        with ControlClient(rig.path) as c:
            assert c.request("transpose", semitones=2, cents=10.0)["ok"]
            for bad in ({"semitones": 1.5}, {"semitones": 99}, {"cents": "x"}, {}):
                assert c.request("transpose", **bad)["ok"] is False, bad
        rig.play(69)
        n = rig.wait_notes([69])
        assert n[69] == pytest.approx(6910.0, abs=BEND_STEP)
    finally:
        rig.close()


def test_adaptive_on_and_off(rig):
    third = ratio_to_cents(Fraction(5, 4))
    with ControlClient(rig.path) as c:
        bad = c.request("adaptive", on=True, settings={"policy": "whatever"})
        assert bad["ok"] is False
        assert c.request("adaptive", on="yes")["ok"] is False
        assert c.request("status")["adaptive"] is False
        r = c.request("adaptive", on=True, settings={"chord_window": 0.01})
        assert r["ok"] and r["adaptive"] is True
    rig.play(60, 64, 67)
    n = rig.wait_notes([60, 64, 67])
    # adaptive just intonation: a major triad struck from silence is 4:5:6 (its pure
    # thirds and fifth, as the solver's 5-limit table has them)
    assert n[64] - n[60] == pytest.approx(third, abs=2 * BEND_STEP)
    rig.play(60, 64, 67, on=False)
    rig.wait_notes([])
    with ControlClient(rig.path) as c:
        assert c.request("adaptive", on=False)["adaptive"] is False
    rig.play(60, 64)
    n = rig.wait_notes([60, 64])
    # back to Werckmeister III: C-E = 390.225 c (Barbour 1951; from memory)
    assert n[64] - n[60] == pytest.approx(390.225, abs=2 * BEND_STEP)


def test_panic_releases_everything(rig):
    rig.play(60, 64, 67)
    rig.wait_notes([60, 64, 67])
    start = len(rig.out)
    with ControlClient(rig.path) as c:
        r = c.request("panic")
    assert r["ok"] and r["released"] == 3
    assert rig.notes() == {}
    offs = {(m.channel, m.note) for m in rig.out[start:]
            if m.type == "note_off" or (m.type == "note_on" and m.velocity == 0)}
    assert {k for _, k in offs} == {60, 64, 67}
    # all notes off (CC 123, MIDI 1.0 channel mode message) on the channels used
    assert any(m.type == "control_change" and m.control == 123 for m in rig.out[start:])


def test_subscribe_streams_note_and_counter_events(rig):
    with ControlClient(rig.path) as c:
        snap = c.request("subscribe")
        assert snap["ok"] and snap["notes"] == []
        rig.play(60, 67)
        got: dict[int, dict] = {}
        kinds = set()
        while len(got) < 2 or "counters" not in kinds:
            ev = c.read()
            kinds.add(ev["event"])
            if ev["event"] == "note_on":
                got[ev["key"]] = ev
        # Werckmeister III C-G: a fifth narrowed by 1/4 Pythagorean comma, 696.09 c (Barbour; from memory)
        assert got[67]["cents"] - got[60]["cents"] == pytest.approx(696.09, abs=2 * BEND_STEP)
        assert got[60]["hz"] == pytest.approx(261.626 * 2 ** (11.73 / 1200), abs=0.02)
        rig.play(60, on=False)
        while True:
            ev = c.read()
            if ev["event"] == "note_off":
                assert ev["key"] == 60
                break
        c.send({"cmd": "load", "profile": "edo12"})
        while True:
            ev = c.read()
            if ev.get("event") == "profile":
                assert ev["profile"] == "edo12"
                break


def test_malformed_and_unknown_requests_change_nothing(rig):
    rig.play(60)
    rig.wait_notes([60])
    s = raw(rig.path)
    buf = bytearray()
    with ControlClient(rig.path) as c:
        before = c.request("status")
    bad_lines = [
        b"{not json\n", b"[1, 2]\n", b"\"status\"\n", b"{}\n", b"{\"cmd\": 5}\n",
        b"{\"cmd\": \"explode\"}\n", b"{\"cmd\": \"status\", \"extra\": 1}\n",
        b"{\"cmd\": \"load\"}\n", b"{\"cmd\": \"load\", \"profile\": 12}\n",
        b"{\"cmd\": \"load\", \"profile\": \"../../etc/passwd\"}\n",
        b"{\"cmd\": \"panic\", \"now\": true}\n", b"\xff\xfe\n",
        b"{\"cmd\": \"status\", \"id\": [1]}\n",
    ]
    for line in bad_lines:
        s.sendall(line)
        r = read_line(s, buf)
        assert r["ok"] is False and r["error"], line
    s.sendall(b"{\"cmd\": \"status\", \"id\": \"x\"}\n")
    after = read_line(s, buf)
    s.close()
    assert after["ok"] and after["id"] == "x"
    for k in ("profile", "concert_pitch_hz", "transpose_semitones", "transpose_cents", "adaptive", "sounding"):
        assert after[k] == before[k], k
    assert after["counters"] == before["counters"]
    assert set(COMMANDS) == {"status", "profiles", "load", "adaptive", "concert_pitch", "reference", "transpose",
                             "panic", "subscribe"}


def test_too_long_line_is_refused_and_closed(rig):
    s = raw(rig.path)
    buf = bytearray()
    s.sendall(b"{\"cmd\": \"status\", \"x\": \"" + b"a" * (ControlServer.MAX_LINE + 10))
    r = read_line(s, buf)
    assert r["ok"] is False and "longer than" in r["error"]
    assert s.recv(10) == b""          # closed by the server
    s.close()


def test_half_closed_client_still_gets_its_reply(rig):
    s = raw(rig.path)
    s.sendall(b"{\"cmd\": \"status\"}\n")
    s.shutdown(socket.SHUT_WR)
    buf = bytearray()
    assert read_line(s, buf)["profile"] == "werckmeister-3"
    s.close()


def test_a_subscriber_that_never_reads_costs_bounded_memory(rig):
    slow = raw(rig.path)
    slow.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 4096)
    slow.sendall(b"{\"cmd\": \"subscribe\"}\n")
    end = time.monotonic() + 10
    while rig.server.subscribers < 1:
        assert time.monotonic() < end, "subscription not registered"
        time.sleep(0.005)
    total = 50000

    def burst():
        for i in range(total):
            rig.server.publish({"event": "test", "n": i})
    rig.on_engine(burst)       # the engine thread publishes; it must come back (never blocks)
    # the server stays responsive to others
    with ControlClient(rig.path) as c:
        st = c.request("status")
    assert st["ok"]
    end = time.monotonic() + 10
    def dropped():
        st = rig.server.stats()
        return st["events_dropped"] + st["central_dropped"]
    while dropped() == 0 and time.monotonic() < end:
        time.sleep(0.01)
    stats = rig.server.stats()
    assert dropped() > 0
    assert stats["subscribers"] == 1
    # queued per client never exceeds the bound
    for c in list(rig.server._clients.values()):
        assert c.events <= ControlServer.SUBSCRIBER_QUEUE
    # when it finally reads, it gets the subscribe reply first and then the newest events, in order
    slow.settimeout(10)
    buf = bytearray()
    first = read_line(slow, buf)
    assert first["ok"] and first["cmd"] == "subscribe"
    ns = []
    while True:
        ev = read_line(slow, buf)
        if ev["event"] == "test":
            ns.append(ev["n"])
            if ev["n"] == total - 1:
                break
    assert ns == sorted(ns) and len(ns) < total
    slow.close()


def test_a_flooding_client_is_throttled_and_loses_no_reply(rig):
    flood = raw(rig.path)
    n = 800          # more than the burst a client may send at once (ControlServer.CLIENT_BURST)
    payload = b"{\"cmd\": \"status\"}\n" * n
    sender = threading.Thread(target=flood.sendall, args=(payload,), daemon=True)
    sender.start()
    # while it floods (and does not read), another client is served and the queue stays bounded
    for _ in range(20):
        with ControlClient(rig.path) as c:
            assert c.request("status")["ok"]
        assert len(rig.server._pending) <= ControlServer.MAX_INFLIGHT * 2
    buf = bytearray()
    got = 0
    while got < n:
        r = read_line(flood, buf)
        assert r["ok"] and r["cmd"] == "status"
        got += 1
    sender.join(10)
    flood.close()
    assert rig.server.stats()["throttled"] > 0      # the rate limit held it back (and lost nothing)


def test_hundred_concurrent_clients(rig):
    errors: list[str] = []
    barrier = threading.Barrier(100)

    def client(i: int) -> None:
        try:
            with ControlClient(rig.path, timeout=20) as c:
                barrier.wait(20)
                for j in range(5):
                    r = c.request("status", id=i * 10 + j)
                    if not (r["ok"] and r["id"] == i * 10 + j):
                        errors.append(f"{i}: {r}")
                r = c.request("profiles")
                if not r["ok"]:
                    errors.append(f"{i}: {r}")
                r = c.request("bogus")
                if r["ok"]:
                    errors.append(f"{i}: bogus accepted")
        except Exception as exc:  # noqa: BLE001
            errors.append(f"{i}: {exc!r}")

    threads = [threading.Thread(target=client, args=(i,)) for i in range(100)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(60)
    assert errors == []
    assert rig.server.stats()["connections"] >= 100


def test_engine_errors_become_error_replies(rig):
    class Boom(Exception):
        pass

    def bad_set_tuning(*a, **k):
        raise Boom("synth on fire")
    real = rig.engine.set_tuning
    rig.on_engine(lambda: setattr(rig.engine, "set_tuning", bad_set_tuning))
    try:
        with ControlClient(rig.path) as c:
            r = c.request("load", profile="vallotti")
            assert r["ok"] is False and "synth on fire" in r["error"]
            st = c.request("status")
        assert st["profile"] == "werckmeister-3"
    finally:
        rig.on_engine(lambda: setattr(rig.engine, "set_tuning", real))


def test_commands_are_served_in_small_batches_and_the_loop_is_woken_for_the_rest():
    """The engine thread applies at most `limit` commands per call and asks to be woken for the rest."""
    base = tempfile.mkdtemp(prefix="rtb")
    wakes = []
    engine = Engine(load_profile("edo12"), EngineConfig())
    ctl = EngineControl(EngineHost(session=Session(engine), emit=list))
    srv = ControlServer(os.path.join(base, "c.sock"), ctl, on_command=lambda: wakes.append(1))
    ctl.server = srv
    srv.start()
    try:
        socks = [raw(str(srv.path)) for _ in range(5)]
        for s in socks:
            s.sendall(b"{\"cmd\": \"status\"}\n" * ControlServer.MAX_INFLIGHT)
        end = time.monotonic() + 10
        while len(srv._pending) < 5 * ControlServer.MAX_INFLIGHT:
            assert time.monotonic() < end
            time.sleep(0.005)
        before = len(wakes)
        assert srv.serve_pending(limit=16) == 16
        assert len(srv._pending) == 5 * ControlServer.MAX_INFLIGHT - 16
        assert len(wakes) == before + 1            # woken again for the rest
        while srv.serve_pending(limit=16):
            pass
        assert len(wakes) == before + 2            # once more after the second batch, none after the last
        for s in socks:
            buf = bytearray()
            for _ in range(ControlServer.MAX_INFLIGHT):
                assert read_line(s, buf)["ok"]
            s.close()
    finally:
        srv.close()
        shutil.rmtree(base, ignore_errors=True)


def test_adaptive_on_starts_from_the_daemons_own_settings():
    from retuner.adaptive.solver import AdaptiveConfig
    mine = AdaptiveConfig.from_dict({"policy": "fixed-held", "max_drift": 3.0})
    rig = Rig("edo12", config=EngineConfig(adaptive=mine))
    try:
        with ControlClient(rig.path) as c:
            assert c.request("status")["adaptive"] is True          # as the daemon started
            assert c.request("adaptive", on=False)["adaptive"] is False
            assert rig.engine.config.adaptive is None
            assert c.request("adaptive", on=True)["adaptive"] is True
            got = rig.engine.config.adaptive
            assert (got.policy, got.max_drift) == ("fixed-held", 3.0)   # not the library defaults
            assert c.request("adaptive", on=True, settings={"max_drift": 4.0})["ok"]
            got = rig.engine.config.adaptive
            assert (got.policy, got.max_drift) == ("fixed-held", 4.0)
            assert c.request("adaptive", on=True, settings={"bogus": 1})["ok"] is False
            assert rig.engine.config.adaptive.max_drift == 4.0
    finally:
        rig.close()


def test_watch_plain_prints_a_frame_when_the_view_changes(rig):
    import subprocess
    import sys
    rig.play(60, 64)
    rig.wait_notes([60, 64])
    end = time.monotonic() + 10
    while rig.server.subscribers:                  # wait_notes' own subscriptions have ended
        assert time.monotonic() < end
        time.sleep(0.01)
    p = subprocess.Popen([sys.executable, "-m", "retuner", "watch", "--control-socket", rig.path, "--plain",
                          "--frames", "2"], stdout=subprocess.PIPE, text=True)
    try:
        end = time.monotonic() + 10
        while rig.server.subscribers < 1:          # the view is subscribed
            assert time.monotonic() < end
            time.sleep(0.01)
        rig.play(67)
        out, _ = p.communicate(timeout=20)
    finally:
        if p.poll() is None:
            p.kill()
    assert p.returncode == 0
    frames = [f for f in out.split("-" * 40) if f.strip()]
    assert len(frames) == 2
    assert "SOUNDING 2" in frames[0] and "G4" not in frames[0]
    assert "SOUNDING 3" in frames[1] and "C4-G4" in frames[1]


def test_ctl_commands_against_the_server(rig):
    import subprocess
    import sys

    def ctl(*args):
        return subprocess.run([sys.executable, "-m", "retuner", "ctl", "--control-socket", rig.path, *args],
                              capture_output=True, text=True, timeout=30)
    r = ctl("transpose", "10c")
    assert r.returncode == 0 and "+10.00 c" in r.stdout, r.stdout + r.stderr
    rig.play(69)
    assert rig.wait_notes([69])[69] - load_profile("werckmeister-3").cents[69] == pytest.approx(10.0, abs=BEND_STEP)
    r = ctl("transpose", "1.5")                     # neither whole semitones nor cents
    assert r.returncode == 2 and len(r.stderr.strip().splitlines()) == 1
    r = ctl("concert-pitch", "5000")                    # refused by the daemon: exit 2, one line
    assert r.returncode == 2 and "concert_pitch" in r.stderr and len(r.stderr.strip().splitlines()) == 1
    r = ctl("--json", "concert-pitch", "5000")
    assert r.returncode == 2 and json.loads(r.stdout)["ok"] is False
    r = ctl("profiles")
    assert r.returncode == 0 and "werckmeister-3" in r.stdout and "vallotti" in r.stdout
    r = ctl("adaptive", "on", "--set", "max_drift=4", "--set", "policy=fixed-held")
    assert r.returncode == 0 and "adaptive on" in r.stdout
    assert rig.engine.config.adaptive.max_drift == 4.0
    r = ctl("adaptive", "on", "--set", "nonsense")
    assert r.returncode == 2
    # a duration takes its unit as in the config file: 30 ms is 0.03 s
    r = ctl("adaptive", "on", "--set", "attack_time=30 ms")
    assert r.returncode == 0, r.stdout + r.stderr
    assert rig.engine.config.adaptive.attack_time == pytest.approx(0.03)
    r = ctl("adaptive", "on", "--set", "attack_time=30 parsecs")
    assert r.returncode == 2 and "adaptive.attack_time" in r.stderr and len(r.stderr.strip().splitlines()) == 1
    r = ctl("status")
    assert r.returncode == 0 and re.search(r"^adaptive +on$", r.stdout, re.M) and "werckmeister-3" in r.stdout


def test_panic_counts_notes_held_by_the_pedal(rig):
    """Keys up, sustain pedal (CC64) down: the notes still sound, so panic releases them and says
    so; the pedal is lifted on the output (CC64 0) and all notes off (CC123) is sent (MIDI 1.0)."""
    rig.midi.put(mido.Message("control_change", control=64, value=127))
    rig.play(60, 67)
    rig.wait_notes([60, 67])
    rig.play(60, 67, on=False)
    time.sleep(0.1)
    assert set(rig.notes()) == {60, 67}          # held by the pedal
    start = len(rig.out)
    with ControlClient(rig.path) as c:
        r = c.request("panic")
    assert r["ok"] and r["released"] == 2
    assert rig.notes() == {}
    after = rig.out[start:]
    assert any(m.type == "control_change" and m.control == 64 and m.value == 0 for m in after)
    assert any(m.type == "control_change" and m.control == 123 for m in after)


# --------------------------------------------------------------------------- faults
def test_an_empty_line_gets_a_reply(rig):
    s = raw(rig.path)
    buf = bytearray()
    for line in (b"\n", b"   \r\n"):
        s.sendall(line)
        r = read_line(s, buf)
        assert r["ok"] is False and "empty" in r["error"]
    s.sendall(b"{\"cmd\": \"status\", \"id\": 3}\n")          # and the connection still serves
    assert read_line(s, buf)["id"] == 3
    s.close()


def test_deeply_nested_json_gets_a_reply_and_no_traceback(rig, caplog):
    s = raw(rig.path)
    buf = bytearray()
    for depth in (2_000, 10_000):         # both within MAX_LINE
        s.sendall(b"[" * depth + b"]" * depth + b"\n")
        r = read_line(s, buf)
        assert r["ok"] is False and "nested" in r["error"]
        s.sendall(b"{\"a\":" * depth + b"1" + b"}" * depth + b"\n")
        r = read_line(s, buf)
        assert r["ok"] is False and "nested" in r["error"]
    s.close()
    assert not [rec for rec in caplog.records if rec.exc_info]


def test_panic_gets_in_with_every_connection_taken(rig):
    """The server holds MAX_CLIENTS connections and keeps one more slot for a panic."""
    held = []
    try:
        end = time.monotonic() + 20
        for i in range(ControlServer.MAX_CLIENTS):
            if i % 64 == 0:       # the listen backlog is smaller: let the server accept them first
                while rig.server.stats()["clients"] < i:
                    assert time.monotonic() < end
                    time.sleep(0.01)
            held.append(raw(rig.path))
        while rig.server.stats()["clients"] < ControlServer.MAX_CLIENTS:
            assert time.monotonic() < end
            time.sleep(0.01)
        with ControlClient(rig.path) as c:
            r = c.request("panic")
        assert r["ok"] is True and r["cmd"] == "panic"
        # the engine thread applied it: every output channel got All Notes Off (MIDI 1.0, CC123)
        assert {m.channel for m in list(rig.out) if m.type == "control_change" and m.control == 123} \
            >= set(rig.engine.config.pool)
        # anything else through the reserved slot: a reason, then the connection is closed
        s = raw(rig.path)
        buf = bytearray()
        s.sendall(b"{\"cmd\": \"status\"}\n")
        r = read_line(s, buf)
        assert r["ok"] is False and "panic" in r["error"]
        assert s.recv(10) == b""
        s.close()
    finally:
        for s in held:
            s.close()


def test_a_socket_folder_not_ours_is_refused(tmp_path):
    other = tmp_path / "theirs"
    other.mkdir(mode=0o700)
    os.chown(other, 65534, 65534)          # nobody's (the tests run as root here)
    with pytest.raises(RetunerError, match="not ours"):
        ControlServer(str(other / "c.sock"), EngineControl(EngineHost(session=None, emit=list))).start()
    shared = tmp_path / "shared"
    shared.mkdir()
    os.chmod(shared, 0o1777)               # like /tmp
    with pytest.raises(RetunerError, match="writable by other users"):
        ControlServer(str(shared / "c.sock"), EngineControl(EngineHost(session=None, emit=list))).start()
