"""The release burst of a stopping daemon reaches the synth even when JACK's process cycle is late.

Under JACK, python-rtmidi's output only queues what we send (a ring buffer); the bytes go out in
the client's next process cycle, once per process cycle. Closing the port unregisters it, and whatever
is still queued then never goes out. python-rtmidi's own close waits for one more cycle, but at
most one second (RtMidi.cpp, the JACK output's port close: sem_post, then sem_timedwait with
"wait max one second", then jack_port_unregister; the wheel installed here links sem_timedwait).
So a cycle later than retuner's own wait before closing plus that second loses the note-offs of
a shutdown: notes hang on the synth.

These tests put a model of that JACK behaviour (:class:`FakeJack`) under retuner.live.ports, in
place of python-rtmidi, with a clock of its own that only moves when ports.py sleeps: every
run is the same, no server and no timing. The daemon is the real one, on the real rtmidi backend
code (retuner.live.ports.RtMidiBackend), stopped by SIGTERM while the cycle is late.
"""

from __future__ import annotations

import signal
import threading
import time as _time
import types

import mido
import pytest

from jack import Decoder
from retuner.cli import build_parser
from retuner.commands import run as run_cmd
from retuner.live import ports
from retuner.live.daemon import Daemon

CYCLE = 128 / 48000         # one JACK process cycle: 128 frames at 48 kHz (the dummy driver the tests start)
LIBRARY_CLOSE_WAIT = 1.0     # python-rtmidi's own wait for a cycle when an output port closes


class FakeJack:
    """A JACK server and python-rtmidi's JACK ports, as far as sending and closing go.

    Time is the model's own (``now``); cycles run every ``CYCLE`` seconds when time moves, except while
    the process cycle is late (:meth:`stall`). In a cycle every output port hands everything
    queued to its connections (rtmidi's process callback empties its ring buffer); a port that
    is unregistered drops what is still queued."""

    def __init__(self):
        self.now = 0.0
        self.next_cycle = CYCLE
        self.late_until = float("-inf")
        self.ports: dict[str, object] = {}           # full name -> FakeOut / FakeIn
        self.links: list[tuple[str, str]] = []       # (source, destination)
        self.lock = threading.RLock()
        self.owner = threading.current_thread()

    # ---------------------------------------------------------------- time
    def stall(self, seconds: float) -> None:
        """No process cycle for ``seconds`` (a late cycle on a loaded machine)."""
        with self.lock:
            self.late_until = self.now + seconds

    def advance(self, seconds: float) -> None:
        with self.lock:
            end = self.now + seconds
            while self.next_cycle <= end:
                self.now = max(self.now, self.next_cycle)
                if self.now >= self.late_until:
                    self._cycle()
                self.next_cycle += CYCLE
            self.now = end

    def _cycle(self) -> None:
        outs = [p for p in self.ports.values() if isinstance(p, FakeOut)]
        for p in outs:
            events, p.ring = p.ring, []
            for src, dst in self.links:
                if src == p.full and dst in self.ports:
                    self.ports[dst].arrive(events)
            if p.needpost:
                p.needpost, p.cleanup = False, True

    def time_module(self):
        """What ports.py sees as ``time``: sleeping moves the model's clock (on the thread that
        owns it; a reader thread of an input only naps)."""
        def sleep(seconds):
            if threading.current_thread() is self.owner:
                self.advance(seconds)
            else:
                _time.sleep(0.0005)
        return types.SimpleNamespace(monotonic=lambda: self.now, sleep=sleep,
                                     perf_counter=lambda: self.now)

    # ---------------------------------------------------------------- listing
    def sources(self) -> list[str]:
        with self.lock:
            return [n for n, p in self.ports.items() if isinstance(p, FakeOut)]

    def sinks(self) -> list[str]:
        with self.lock:
            return [n for n, p in self.ports.items() if isinstance(p, FakeIn)]

    def rtmidi_module(self):
        jack = self

        class MidiOut(FakeOut):
            def __init__(self, api=None, name="client"):
                super().__init__(jack, name)

        class MidiIn(FakeIn):
            def __init__(self, api=None, name="client", queue_size=1024):
                super().__init__(jack, name)

        return types.SimpleNamespace(MidiOut=MidiOut, MidiIn=MidiIn, SystemError=RuntimeError,
                                     API_UNIX_JACK=ports.rtmidi.API_UNIX_JACK,
                                     API_LINUX_ALSA=ports.rtmidi.API_LINUX_ALSA,
                                     get_compiled_api=lambda: [ports.rtmidi.API_UNIX_JACK])


class FakeOut:
    def __init__(self, jack: FakeJack, client: str):
        self.jack, self.client = jack, client
        self.full = None
        self.ring: list[list[int]] = []
        self.needpost = self.cleanup = False

    def get_ports(self) -> list[str]:
        return self.jack.sinks()

    def open_virtual_port(self, name: str) -> None:
        with self.jack.lock:
            self.full = f"{self.client}:{name}"
            self.jack.ports[self.full] = self

    def open_port(self, index: int, name: str) -> None:
        dst = self.get_ports()[index]
        self.open_virtual_port(name)
        with self.jack.lock:
            self.jack.links.append((self.full, dst))

    def send_message(self, data) -> None:
        with self.jack.lock:
            if self.full is not None:
                self.ring.append(list(data))

    def close_port(self) -> None:
        """As python-rtmidi's JACK output closes: wait for one more cycle, at most one second,
        then unregister the port (what is still queued is lost)."""
        if self.full is None:
            return
        with self.jack.lock:
            self.needpost, self.cleanup = True, False
        waited = 0.0
        while not self.cleanup and waited < LIBRARY_CLOSE_WAIT:
            self.jack.advance(CYCLE / 4)
            waited += CYCLE / 4
        with self.jack.lock:
            self.jack.ports.pop(self.full, None)
            self.jack.links = [(s, d) for s, d in self.jack.links if self.full not in (s, d)]
            self.ring = []
            self.full = None

    def delete(self) -> None:
        self.close_port()


class FakeIn:
    def __init__(self, jack: FakeJack, client: str):
        self.jack, self.client = jack, client
        self.full = None
        self.queue: list[list[int]] = []
        self.skip_active_sense = True
        self.callback = None
        self.got: list[list[int]] = []              # everything that ever arrived (for the test)

    def get_ports(self) -> list[str]:
        return self.jack.sources()

    def open_virtual_port(self, name: str) -> None:
        with self.jack.lock:
            self.full = f"{self.client}:{name}"
            self.jack.ports[self.full] = self

    def open_port(self, index: int, name: str = "in") -> None:
        src = self.get_ports()[index]
        self.open_virtual_port(name)
        with self.jack.lock:
            self.jack.links.append((src, self.full))

    def ignore_types(self, sysex=True, timing=True, active_sense=True) -> None:
        self.skip_active_sense = active_sense

    def arrive(self, events) -> None:
        for e in events:
            if e == [0xFE] and self.skip_active_sense:
                continue
            self.got.append(e)
            self.queue.append(e)

    def get_message(self):
        with self.jack.lock:
            return (self.queue.pop(0), 0.0) if self.queue else None

    def set_callback(self, fn, data=None) -> None:
        self.callback = fn

    def cancel_callback(self) -> None:
        self.callback = None

    def close_port(self) -> None:
        with self.jack.lock:
            if self.full is not None:
                self.jack.ports.pop(self.full, None)
                self.jack.links = [(s, d) for s, d in self.jack.links if self.full not in (s, d)]
                self.full = None

    def delete(self) -> None:
        self.close_port()


@pytest.fixture
def jack(monkeypatch):
    model = FakeJack()
    monkeypatch.setattr(ports, "rtmidi", model.rtmidi_module())
    monkeypatch.setattr(ports, "time", model.time_module())
    return model


def _decode(events) -> Decoder:
    d = Decoder()
    for i, e in enumerate(events):
        d.feed(float(i), mido.Message.from_bytes(e))
    return d


def _daemon(tmp_path, monkeypatch, jack: FakeJack):
    monkeypatch.setenv("XDG_RUNTIME_DIR", str(tmp_path / "xdg"))
    (tmp_path / "config.yaml").write_text("")
    args = build_parser().parse_args(["run", "--virtual", "--no-control-socket", "--status-interval", "0",
                                      "--profile", "edo12", "--backend", "jack",
                                      "--config", str(tmp_path / "config.yaml")])
    settings = run_cmd.settings_loader(args)()
    d = Daemon(settings, backend=ports.RtMidiBackend("jack"))
    d.start()
    return d


def _run_until(daemon: Daemon, done, jack: FakeJack, timeout: float = 10.0) -> None:
    """Turn the daemon's loop (and the model's cycles) until ``done()``; the input's reader
    thread is a real thread, so this waits in real time, bounded."""
    end = _time.monotonic() + timeout
    while not done():
        assert _time.monotonic() < end, "the daemon did not get there"
        jack.advance(CYCLE)
        daemon.step(wait=False)
        _time.sleep(0.001)


@pytest.mark.parametrize("late", [0.0, 0.6, 1.5])
def test_sigterm_release_burst_reaches_the_synth_though_the_cycle_is_late(tmp_path, monkeypatch, jack, late):
    """Eight notes sound; SIGTERM arrives while the process cycle is ``late`` seconds late: the
    synth still gets a note-off for every one (the 1.5 s case is later than python-rtmidi's own
    one-second wait at close plus the fixed 0.25 s retuner used to wait: there the burst was lost)."""
    d = _daemon(tmp_path, monkeypatch, jack)
    try:
        synth = jack.rtmidi_module().MidiIn(None, "synth")
        synth.open_port(jack.sources().index("retuner-out:out"), "in")
        keys = jack.rtmidi_module().MidiOut(None, "keys")
        keys.open_port(jack.sinks().index("retuner-in:in"), "out")
        played = [48, 52, 55, 60, 64, 67, 72, 76]
        for k in played:
            keys.send_message(mido.Message("note_on", note=k, velocity=80).bytes())
        _run_until(d, lambda: len(_decode(synth.got).stuck()) == len(played), jack)
        # the keys' port goes first, so only the daemon's own output is left queued
        keys.close_port()
        jack.stall(late)
        d.post_signal(signal.SIGTERM)
        assert d.step(wait=False) is True
        d.shutdown()
        assert _decode(synth.got).stuck() == []
        assert "retuner-out:out" not in jack.sources()     # and the port did close
    finally:
        d.shutdown()


def test_a_cycle_that_never_comes_does_not_hold_the_exit(jack):
    """A server that never runs another cycle: closing gives up within a few seconds (of the
    model's clock) instead of hanging the daemon's exit."""
    out = ports.OutputPort("jack", "retuner-out", "out")
    synth = jack.rtmidi_module().MidiIn(None, "synth")
    synth.open_port(jack.sources().index("retuner-out:out"), "in")
    out.send(mido.Message("note_off", note=60))
    jack.stall(float("inf"))
    t0 = jack.now
    out.close()
    assert jack.now - t0 <= 4.0
    assert "retuner-out:out" not in jack.sources()
