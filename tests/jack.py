"""Helpers for tests through a real JACK server (dummy backend, no sound hardware).

- :class:`JackServer` starts ``jackd --no-realtime -n NAME -d dummy -r 48000 -p 128``
  and knows the environment every client needs (``JACK_DEFAULT_SERVER=NAME``,
  ``JACK_NO_START_SERVER=1`` so no client ever starts a server of its own).
- :class:`TestClient` is a MIDI client of our own on that server, written with
  python-rtmidi's JACK API (``rtmidi.API_UNIX_JACK``), that sends and records.
- :class:`Daemon` runs ``python -m retuner run ...`` as a subprocess.
- :func:`decode` turns a recorded output stream back into sounding pitches,
  independently of retuner's own code, from the MIDI 1.0 Detailed Specification:
  pitch bend is 14-bit with centre 8192 (lsb first on the wire); RPN 0 (CC101=0,
  CC100=0) is pitch bend sensitivity, data entry CC6 = semitones, CC38 = cents;
  a note-on with velocity 0 is a note-off.
"""

from __future__ import annotations

import os
import shutil
import signal
import subprocess
import sys
import threading
import time
import contextlib
import uuid
from dataclasses import dataclass, field
from typing import Callable, Iterator, Optional

import mido
import rtmidi

from retuner.bench.jacklive import stop_child

REPO = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


class JackError(RuntimeError):
    pass


class JackServer:
    def __init__(self, name: str, rate: int = 48000, period: int = 128):
        self.name = name
        self.rate = rate
        self.period = period
        self.proc: Optional[subprocess.Popen] = None
        self.log_path = f"/tmp/{name}.jackd.log"

    @property
    def env(self) -> dict[str, str]:
        env = dict(os.environ)
        env["JACK_DEFAULT_SERVER"] = self.name
        env["JACK_NO_START_SERVER"] = "1"
        return env

    def start(self, timeout: float = 10.0) -> None:
        jackd = shutil.which("jackd")
        if jackd is None:
            raise JackError("jackd is not installed (apt-get install jackd2): the JACK tests need it")
        for tool in ("jack_lsp", "jack_connect"):
            if shutil.which(tool) is None:
                raise JackError(f"{tool} is not installed (it comes with jackd2)")
        self._log = open(self.log_path, "wb")
        self.proc = subprocess.Popen(
            [jackd, "--no-realtime", "-S", "-n", self.name, "-d", "dummy",
             "-r", str(self.rate), "-p", str(self.period)],
            stdout=self._log, stderr=subprocess.STDOUT, env=self.env,
            start_new_session=True)
        end = time.monotonic() + timeout
        while time.monotonic() < end:
            if self.proc.poll() is not None:
                raise JackError(f"jackd exited with {self.proc.returncode}: "
                                + open(self.log_path, errors="replace").read()[-2000:])
            r = subprocess.run(["jack_lsp"], env=self.env, capture_output=True, text=True)
            if r.returncode == 0 and "system:" in r.stdout:
                return
            time.sleep(0.1)
        self.stop()
        raise JackError(f"jackd {self.name} did not answer jack_lsp within {timeout} s")

    def stop(self) -> None:
        if self.proc is not None:
            stop_child(self.proc, 5)
        self.proc = None

    def lsp(self) -> list[str]:
        r = subprocess.run(["jack_lsp"], env=self.env, capture_output=True, text=True, timeout=10)
        return [line.strip() for line in r.stdout.splitlines() if line.strip()]

    def connect(self, src: str, dst: str, attempts: int = 6) -> None:
        # jack_connect is a JACK client of its own; on a loaded machine opening it occasionally
        # fails ("Cannot start Jack client listener", or "Cannot open jack_connect client" while
        # the server is busy), so a failure is tried again, waiting longer each time, before it counts
        for i in range(attempts):
            r = subprocess.run(["jack_connect", src, dst], env=self.env, capture_output=True,
                               text=True, timeout=10)
            if r.returncode == 0:
                return
            if dst in self.connections(src):
                return
            time.sleep(0.2 * (i + 1))
        raise JackError(f"jack_connect {src} {dst}: {r.stdout}{r.stderr}")

    def connections(self, port: str) -> list[str]:
        r = subprocess.run(["jack_lsp", "-c", port], env=self.env, capture_output=True, text=True, timeout=10)
        lines = r.stdout.splitlines()
        return [l.strip() for l in lines[1:] if l.startswith((" ", "\t"))]

    def wait_port(self, predicate: Callable[[str], bool] | str, timeout: float = 10.0) -> str:
        if isinstance(predicate, str):
            want = predicate
            predicate = lambda p: p == want  # noqa: E731
        end = time.monotonic() + timeout
        ports: list[str] = []
        while time.monotonic() < end:
            ports = self.lsp()
            for p in ports:
                if predicate(p):
                    return p
            time.sleep(0.05)
        raise JackError(f"no such port after {timeout} s; have {ports}")


@contextlib.contextmanager
def private_server(prefix: str, **kw) -> Iterator["JackServer"]:
    """A JACK server of our own (``JackServer(NAME, **kw)``, NAME from ``prefix``, the process id
    and a random part), named in this process's environment while it runs (so python-rtmidi and
    JACK-Client clients in the tests reach it; ``server.env`` is for subprocesses); a server that
    does not start fails the test."""
    import pytest       # only where a test uses it
    server = JackServer(f"{prefix}-{os.getpid()}-{uuid.uuid4().hex[:6]}", **kw)
    try:
        server.start()
    except JackError as exc:
        pytest.fail(f"JACK server could not start: {exc}", pytrace=False)
    saved = {k: os.environ.get(k) for k in ("JACK_DEFAULT_SERVER", "JACK_NO_START_SERVER")}
    os.environ["JACK_DEFAULT_SERVER"] = server.name
    os.environ["JACK_NO_START_SERVER"] = "1"
    try:
        yield server
    finally:
        server.stop()
        for k, v in saved.items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v


@dataclass
class Received:
    t: float
    msg: mido.Message


class TestClient:
    """A JACK MIDI client: one output port (we play into the daemon) and one input (we record)."""

    __test__ = False  # not a pytest class

    def __init__(self, client_name: str, out_port: str = "play", in_port: str = "record",
                 open_out: bool = True, open_in: bool = True):
        self.client_name = client_name
        self.out_port_name = out_port
        self.in_port_name = in_port
        self.received: list[Received] = []
        self._lock = threading.Lock()
        self._parser = mido.Parser()
        self.midi_out: Optional[rtmidi.MidiOut] = None
        self.midi_in: Optional[rtmidi.MidiIn] = None
        if open_out:
            self.open_out()
        if open_in:
            self.open_in()

    def open_in(self) -> None:
        self.midi_in = rtmidi.MidiIn(rtmidi.API_UNIX_JACK, self.client_name + "-rec")
        self.midi_in.open_virtual_port(self.in_port_name)
        self.midi_in.ignore_types(sysex=False, timing=False, active_sense=True)
        # poll from a thread of ours: a Python callback would run in JACK's process thread and
        # wait there for the interpreter lock, making the client miss JACK's deadline
        self._stop = threading.Event()
        self._reader = threading.Thread(target=self._read_loop, args=(self.midi_in, self._stop), daemon=True)
        self._reader.start()

    def close_in(self) -> None:
        if self.midi_in is not None:
            self._stop.set()
            self._reader.join(1)
            self.midi_in.close_port()
            self.midi_in.delete()
            self.midi_in = None

    # JACK names: "<client>:<port>"
    @property
    def out_full(self) -> str:
        return f"{self.client_name}:{self.out_port_name}"

    @property
    def in_full(self) -> str:
        return f"{self.client_name}-rec:{self.in_port_name}"

    def open_out(self) -> None:
        self.midi_out = rtmidi.MidiOut(rtmidi.API_UNIX_JACK, self.client_name)
        self.midi_out.open_virtual_port(self.out_port_name)

    def close_out(self) -> None:
        if self.midi_out is not None:
            self.midi_out.close_port()
            self.midi_out.delete()
            self.midi_out = None

    def _read_loop(self, midi_in, stop) -> None:
        while not stop.is_set():
            ev = midi_in.get_message()
            if ev is None:
                time.sleep(0.0005)
            else:
                self._on_bytes(ev)

    def _on_bytes(self, event, data=None) -> None:
        raw, _ = event
        now = time.monotonic()
        with self._lock:
            self._parser.feed(raw)
            for msg in self._parser:
                self.received.append(Received(now, msg))

    def send(self, msg: mido.Message) -> float:
        assert self.midi_out is not None
        t = time.monotonic()
        self.midi_out.send_message(msg.bytes())
        return t

    def messages(self) -> list[Received]:
        with self._lock:
            return list(self.received)

    def clear(self) -> None:
        with self._lock:
            self.received.clear()

    def wait_for(self, predicate: Callable[[list[Received]], bool], timeout: float = 5.0) -> list[Received]:
        end = time.monotonic() + timeout
        while True:
            got = self.messages()
            if predicate(got):
                return got
            if time.monotonic() > end:
                raise AssertionError(f"timed out after {timeout} s; received {len(got)} messages: "
                                     + ", ".join(str(r.msg) for r in got[-20:]))
            time.sleep(0.01)

    def close(self) -> None:
        self.close_out()
        self.close_in()


class Daemon:
    """``python -m retuner run ARGS`` in a subprocess, stderr captured to a file."""

    def __init__(self, args: list[str], env: dict[str, str], log_path: str):
        self.args = args
        self.log_path = log_path
        self._log = open(log_path, "wb")
        self.proc = subprocess.Popen([sys.executable, "-m", "retuner", "run", *args],
                                     stdout=self._log, stderr=subprocess.STDOUT, env=env, cwd=REPO)

    def log(self) -> str:
        with open(self.log_path, errors="replace") as fh:
            return fh.read()

    def signal(self, sig: int) -> None:
        self.proc.send_signal(sig)

    def wait(self, timeout: float) -> int:
        return self.proc.wait(timeout)

    def stop(self) -> Optional[int]:
        stop_child(self.proc, 5)
        self._log.close()
        return self.proc.returncode


# ---------------------------------------------------------------- decoding
@dataclass
class Note:
    key: int
    channel: int                 # 0-based, as on the wire
    velocity: int
    t_on: float
    cents: float                 # at its start: 12-EDO key 0 = 0 c, key k = 100 k (A4 = 6900 c)
    t_off: Optional[float] = None
    settled: Optional[float] = None   # its pitch last heard (after any later bend of its channel)

    def __post_init__(self) -> None:
        if self.settled is None:
            self.settled = self.cents


@dataclass
class Decoder:
    """Follows a stream of channel messages the way a receiving synth does (MIDI 1.0)."""

    default_range: float = 2.0   # semitones, the MIDI 1.0 default sensitivity
    bend: dict[int, int] = field(default_factory=dict)
    range: dict[int, float] = field(default_factory=dict)
    _rpn: dict[int, tuple[int, int]] = field(default_factory=dict)
    sounding: dict[tuple[int, int], list[Note]] = field(default_factory=dict)
    notes: list[Note] = field(default_factory=list)
    sustain: dict[int, bool] = field(default_factory=dict)

    def feed(self, t: float, msg: mido.Message) -> None:
        if not hasattr(msg, "channel"):
            return
        ch = msg.channel
        if msg.type == "control_change":
            if msg.control == 101:
                self._rpn[ch] = (msg.value, self._rpn.get(ch, (127, 127))[1])
            elif msg.control == 100:
                self._rpn[ch] = (self._rpn.get(ch, (127, 127))[0], msg.value)
            elif msg.control == 6 and self._rpn.get(ch) == (0, 0):
                self.range[ch] = float(msg.value)
            elif msg.control == 38 and self._rpn.get(ch) == (0, 0):
                semis = int(self.range.get(ch, self.default_range))
                self.range[ch] = semis + msg.value / 100
            elif msg.control in (123, 120):      # all notes off / all sound off
                for k in [k for k in self.sounding if k[0] == ch]:
                    for n in self.sounding.pop(k):
                        n.t_off = t
        elif msg.type == "pitchwheel":
            self.bend[ch] = msg.pitch + 8192
            for (c, k), lst in self.sounding.items():
                if c == ch:
                    for n in lst:
                        n.settled = 100 * k + 100 * self.range.get(ch, self.default_range) * msg.pitch / 8192
        elif msg.type == "note_on" and msg.velocity > 0:
            b = self.bend.get(ch, 8192) - 8192
            cents = 100 * msg.note + 100 * self.range.get(ch, self.default_range) * b / 8192
            n = Note(msg.note, ch, msg.velocity, t, cents)
            self.sounding.setdefault((ch, msg.note), []).append(n)
            self.notes.append(n)
        elif msg.type in ("note_off", "note_on"):
            lst = self.sounding.get((ch, msg.note))
            if lst:
                lst.pop(0).t_off = t
                if not lst:
                    del self.sounding[(ch, msg.note)]

    def stuck(self) -> list[Note]:
        return [n for lst in self.sounding.values() for n in lst]


def decode(received: list[Received], default_range: float = 2.0) -> Decoder:
    d = Decoder(default_range=default_range)
    for r in received:
        d.feed(r.t, r.msg)
    return d


class NotifySocket:
    """A Unix datagram socket standing in for the service manager's $NOTIFY_SOCKET (sd_notify(3))."""

    def __init__(self, path: str):
        import socket as _socket
        self.path = path
        self.sock = _socket.socket(_socket.AF_UNIX, _socket.SOCK_DGRAM)
        self.sock.bind(path)
        self.sock.settimeout(0.1)
        self.messages: list[tuple[float, str]] = []
        self._stop = False
        self._thread = threading.Thread(target=self._run, daemon=True)
        self._thread.start()

    def _run(self) -> None:
        while not self._stop:
            try:
                data = self.sock.recv(4096)
            except OSError:
                continue
            now = time.monotonic()
            for line in data.decode("utf-8", "replace").split("\n"):
                self.messages.append((now, line))

    def lines(self) -> list[str]:
        return [m for _, m in list(self.messages)]

    def wait_for(self, line: str, count: int = 1, timeout: float = 10.0) -> None:
        end = time.monotonic() + timeout
        while time.monotonic() < end:
            if self.lines().count(line) >= count:
                return
            time.sleep(0.01)
        raise AssertionError(f"{line!r} x{count} did not arrive within {timeout} s; got {self.lines()}")

    def close(self) -> None:
        self._stop = True
        self._thread.join(1)
        self.sock.close()
