"""A model of a JACK server and of the part of JACK-Client retuner's JACK backend uses.

Tests put it where retuner/live/jackmidi.py finds JACK-Client (``jackmidi._MODULE``, what
``jack_module()`` returns once loaded) and its clock where jackmidi waits (its ``time``): time is the
model's own and moves only when someone sleeps or the test turns it; a process cycle runs every
``CYCLE`` seconds of it except while the cycle is late. Every run is the same: no server, no threads
of JACK's, no timing. What the model copies of JACK-Client 0.5.7 (``jack.py``, read in the installed
package) and of libjack is said beside each class.
"""

from __future__ import annotations

import threading
import types

import mido
import pytest

from retuner.cli import build_parser
from retuner.commands import run as run_cmd
from retuner.live import jackmidi
from retuner.live.daemon import Daemon

CYCLE = 128 / 48000       # one process cycle: 128 frames at 48 kHz (the dummy driver the JACK tests start)
BUFFER_EVENTS = 16        # the model's room for events in one cycle's port buffer: its own choice, far
                          # below a real buffer's, so that the release burst needs several cycles


class ModelError(Exception):
    """The model's ``jack.JackError``."""


class JackModel:
    """A JACK server and the part of JACK-Client retuner uses, as far as ports, cycles and closing go.

    ``module`` is the fake ``jack`` module (``Client``, ``MidiPort``, ``JackError``). A cycle runs every
    active client's process callback once, in the order of the connections (a source's client before
    the clients it feeds); just before its callback, each input port's buffer gets what the output
    ports connected to it hold at that moment. A port unregistered or a client deactivated loses its
    connections; what was never written to a port buffer is not the model's to keep."""

    def __init__(self):
        self.now = 0.0
        self.next_cycle = CYCLE
        self.late_until = float("-inf")
        self.cycles = 0
        self.clients: list[FakeClient] = []           # in the order they were activated
        self.ports: dict[str, FakePort] = {}          # full name -> registered port
        self.links: list[tuple[str, str]] = []        # (source, destination), in the order made
        self.lock = threading.RLock()
        self.module = types.SimpleNamespace(Client=self._client, MidiPort=FakePort, JackError=ModelError,
                                            _lib=FakeLib(), _ffi=FakeFFI(), __name__="jack (model)")

    def _client(self, name, use_exact_name=False, no_start_server=False, servername=None, session_id=None):
        return FakeClient(self, name)

    # ---------------------------------------------------------------- time
    def stall(self, seconds: float) -> None:
        """No process cycle for ``seconds`` from now (a late cycle on a loaded machine)."""
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

    def time_module(self):
        """What jackmidi sees as ``time``: sleeping moves the model's clock."""
        return types.SimpleNamespace(monotonic=lambda: self.now, perf_counter=lambda: self.now,
                                     sleep=self.advance)

    # ---------------------------------------------------------------- cycles
    def _order(self) -> list["FakeClient"]:
        left = [c for c in self.clients if c.active]
        done: list[FakeClient] = []
        while left:
            def feeds(c):       # the clients whose output ports are connected to c's input ports
                return {self.ports[s].client for s, d in self.links
                        if s in self.ports and d in self.ports and self.ports[d].client is c} - {c}
            ready = [c for c in left if feeds(c) <= set(done)]
            pick = ready[0] if ready else left[0]     # a loop in the graph: activation order
            done.append(pick)
            left.remove(pick)
        return done

    def _cycle(self) -> None:
        self.cycles += 1
        for client in self._order():
            for port in client.own_ports():
                if port.is_input:
                    port.buffer = [e for s, d in self.links if d == port.name and s in self.ports
                                   for e in self.ports[s].buffer]
            if client.process is not None:
                client.in_cycle = True
                try:
                    client.process(128)
                except Exception:   # as JACK-Client: a callback that raised is not called again
                    client.process = None
                finally:
                    client.in_cycle = False

    def names(self) -> list[str]:
        return list(self.ports)


class FakeClient:
    """``jack.Client``: ports registered, a process and a shutdown callback, activate, connect, close."""

    def __init__(self, model: JackModel, name: str):
        self.model = model
        self.name = name
        self.midi_inports = FakePorts(self, is_input=True)
        self.midi_outports = FakePorts(self, is_input=False)
        self.process = None
        self.on_shutdown = None
        self.active = False
        self.closed = False
        self.in_cycle = False

    def own_ports(self) -> list["FakePort"]:
        return list(self.midi_inports) + list(self.midi_outports)

    def set_process_callback(self, callback) -> None:
        if self.active:
            raise ModelError("the process callback cannot be set while the client is active")
        self.process = callback

    def set_shutdown_callback(self, callback) -> None:
        self.on_shutdown = callback

    def activate(self) -> None:
        with self.model.lock:
            self.active = True
            if self not in self.model.clients:
                self.model.clients.append(self)

    def deactivate(self, ignore_errors=True) -> None:
        with self.model.lock:
            self.active = False
            if self in self.model.clients:
                self.model.clients.remove(self)
            mine = {p.name for p in self.own_ports()}
            self.model.links = [(s, d) for s, d in self.model.links if s not in mine and d not in mine]

    def close(self, ignore_errors=True) -> None:
        if self.closed:
            return
        self.deactivate()
        for port in self.own_ports():
            port.unregister()
        self.closed = True

    def connect(self, source, destination) -> None:
        src = source.name if isinstance(source, FakePort) else source
        dst = destination.name if isinstance(destination, FakePort) else destination
        with self.model.lock:
            if src not in self.model.ports or dst not in self.model.ports:
                raise ModelError(f"Error connecting {src!r} -> {dst!r}")
            if (src, dst) in self.model.links:
                raise ModelError(f"Connection {src!r} -> {dst!r} already exists")
            self.model.links.append((src, dst))

    def get_ports(self, name_pattern="", is_audio=False, is_midi=False, is_input=False, is_output=False,
                  **flags) -> list["FakePort"]:
        with self.model.lock:
            return [p for p in self.model.ports.values()
                    if (not is_input or p.is_input) and (not is_output or not p.is_input)]


class FakePorts(list):
    """``Client.midi_inports`` / ``midi_outports``: a list with ``register(shortname)``."""

    def __init__(self, client: FakeClient, *, is_input: bool):
        super().__init__()
        self.client, self.is_input = client, is_input

    def register(self, shortname: str, is_terminal=False, is_physical=False) -> "FakePort":
        port = FakePort(self.client, shortname, self.is_input)
        with self.client.model.lock:
            if port.name in self.client.model.ports:
                raise ModelError(f"Error registering {port.name!r}")
            self.client.model.ports[port.name] = port
        self.append(port)
        return port


class FakePort:
    """``jack.OwnMidiPort``: one cycle's buffer of events."""

    def __init__(self, client: FakeClient, shortname: str, is_input: bool):
        self.client = client
        self.name = f"{client.name}:{shortname}"
        self.is_input = is_input
        self.is_output = not is_input
        self.buffer: list[bytes] = []
        self._ptr = self             # what the libjack calls are given (``jack._lib`` above)

    def clear_buffer(self) -> None:
        self.buffer = []

    def write_midi_event(self, time: int, event) -> None:
        if not self.client.in_cycle:
            raise ModelError("a MIDI event can only be written in the process callback")
        if len(self.buffer) >= BUFFER_EVENTS:
            raise ModelError("Error writing MIDI event")
        self.buffer.append(bytes(event))

    def incoming_midi_events(self):
        for data in self.buffer:
            yield 0, memoryview(data)

    def unregister(self) -> None:
        """At once, as JACK-Client's ``unregister``: out of the lists, its connections gone."""
        model = self.client.model
        ports = self.client.midi_inports if self.is_input else self.client.midi_outports
        if self in ports:
            ports.remove(self)
        with model.lock:
            model.ports.pop(self.name, None)
            model.links = [(s, d) for s, d in model.links if self.name not in (s, d)]
        self.buffer = []


ENOBUFS = 105     # what jack_midi_event_write returns when the buffer is full (Linux errno)


class FakeLib:
    """The libjack calls of the process callback (``jack._lib``): a port's "buffer" is the port."""

    @staticmethod
    def jack_port_get_buffer(port: FakePort, frames: int) -> FakePort:
        return port

    @staticmethod
    def jack_midi_clear_buffer(port: FakePort) -> None:
        port.clear_buffer()

    @staticmethod
    def jack_midi_event_write(port: FakePort, time: int, data, size: int) -> int:
        try:
            port.write_midi_event(time, bytes(data)[:size])
        except ModelError:
            if not port.client.in_cycle:
                raise
            return ENOBUFS
        return 0

    @staticmethod
    def jack_midi_get_event_count(port: FakePort) -> int:
        return len(port.buffer)

    @staticmethod
    def jack_midi_event_get(event, port: FakePort, index: int) -> int:
        data = port.buffer[index]
        event.time, event.buffer, event.size = 0, data, len(data)
        return 0


class FakeFFI:
    @staticmethod
    def new(ctype: str):
        return types.SimpleNamespace(time=0, buffer=b"", size=0)

    @staticmethod
    def buffer(data: bytes, size: int) -> bytes:
        return bytes(data[:size])


# -------------------------------------------------------------------- the rig
@pytest.fixture
def model(monkeypatch):
    """A :class:`JackModel` where jackmidi finds JACK-Client, its clock where jackmidi waits."""
    m = JackModel()
    monkeypatch.setattr(jackmidi, "_MODULE", m.module)     # where jack_module() finds JACK-Client
    monkeypatch.setattr(jackmidi, "time", m.time_module())   # where JackOutput.drain waits
    return m


class Keys:
    """A keyboard: a JACK client whose process callback writes what was pressed since the last cycle."""

    def __init__(self, model: JackModel, to: str):
        self.model = model
        self.pending: list[bytes] = []
        self.sent: list[tuple[int, bytes]] = []      # (model cycle, event) as written
        self.client = model.module.Client("keys")
        self.port = self.client.midi_outports.register("out")
        self.client.set_process_callback(self._process)
        self.client.activate()
        self.client.connect(self.port, to)

    def _process(self, frames: int) -> None:
        self.port.clear_buffer()
        while self.pending:
            data = self.pending.pop(0)
            self.port.write_midi_event(0, data)
            self.sent.append((self.model.cycles, data))

    def press(self, keys) -> None:
        self.pending += [bytes(mido.Message("note_on", note=k, velocity=80).bytes()) for k in keys]


class Synth:
    """A synth: a JACK client that keeps every event its input port got."""

    def __init__(self, model: JackModel, source: str):
        self.model = model
        self.got: list[mido.Message] = []
        self.heard: list[tuple[int, mido.Message]] = []   # (model cycle, message) as read
        self.client = model.module.Client("synth")
        self.port = self.client.midi_inports.register("in")
        self.client.set_process_callback(self._process)
        self.client.activate()
        self.client.connect(source, self.port)

    def _process(self, frames: int) -> None:
        for _, data in self.port.incoming_midi_events():
            m = mido.Message.from_bytes(bytes(data))
            self.got.append(m)
            self.heard.append((self.model.cycles, m))

    def sounding(self) -> list[tuple[int, int]]:
        """(channel, key) of every note that had a note-on and no note-off of its own since (a
        note-on with velocity 0 is a note-off: MIDI 1.0 Detailed Specification). All Notes Off
        does not count: each note must get its own note-off."""
        on: dict[tuple[int, int], int] = {}
        for m in self.got:
            if m.type == "note_on" and m.velocity > 0:
                on[(m.channel, m.note)] = on.get((m.channel, m.note), 0) + 1
            elif m.type in ("note_on", "note_off") and on.get((m.channel, m.note)):
                on[(m.channel, m.note)] -= 1
        return sorted(k for k, n in on.items() for _ in range(n))


def model_daemon(tmp_path, monkeypatch, model: JackModel, *options: str) -> Daemon:
    """The real daemon on the real JACK backend over the model, its clock the model's; ``options``
    are more of ``retuner run``'s options."""
    monkeypatch.setenv("XDG_RUNTIME_DIR", str(tmp_path / "xdg"))
    (tmp_path / "config.yaml").write_text("")
    args = build_parser().parse_args(["run", "--virtual", "--no-control-socket", "--status-interval", "0",
                                      "--profile", "edo12", "--backend", "jack",
                                      "--config", str(tmp_path / "config.yaml"), *options])
    settings = run_cmd.settings_loader(args)()
    d = Daemon(settings, backend=jackmidi.JackBackend("retuner"), clock=lambda: model.now)
    d.start()
    return d
