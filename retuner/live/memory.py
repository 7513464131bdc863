"""MIDI ports in memory: a backend for driving the daemon in-process, without a MIDI system.

A test plays the part of the other programs: it plugs and unplugs their ports
(:meth:`MemoryBackend.plug`, :meth:`MemoryBackend.unplug`), plays into a port
(:meth:`MemoryBackend.play`, as bytes, so they are parsed as a real input parses
them) and reads what reached a port (:meth:`MemoryBackend.received`). Our own
virtual ports are named ``client:port`` as on JACK. Port-list changes reach the
watcher at once, on the calling thread, so a test needs no waiting.
"""

from __future__ import annotations

import threading
from typing import Callable, Optional

import mido

from retuner.errors import RetunerError
from retuner.live.backend import InputHandle, OutputHandle, PortBackend, deliver


class MemoryInput(InputHandle):
    def __init__(self, backend: "MemoryBackend", name: str, connect_to: Optional[str], callback, on_error):
        self.backend = backend
        self.name = name                    # our own port's name
        self.connected_to = connect_to
        self.callback = callback
        self.on_error = on_error
        self.closed = False

    def close(self) -> None:
        if not self.closed:
            self.closed = True
            self.backend._closed(self)


class MemoryOutput(OutputHandle):
    def __init__(self, backend: "MemoryBackend", name: str, connect_to: Optional[str]):
        self.backend = backend
        self.name = name
        self.connected_to = connect_to
        self.closed = False

    def send(self, msg: mido.Message) -> None:
        if self.closed:
            raise RetunerError(f"output {self.name} is closed")
        self.backend._carry(self, msg)

    def close(self) -> None:
        if not self.closed:
            self.closed = True
            self.backend._closed(self)


class MemoryBackend(PortBackend):
    """Ports of other programs (named by the test) and ours, all in memory. Thread-safe."""

    word = "memory"

    def __init__(self, inputs=(), outputs=()):
        self._lock = threading.RLock()
        self._sources = list(inputs)       # ports we can read from (a keyboard's)
        self._sinks = list(outputs)        # ports we can write to (a synth's)
        self._open: list = []
        self._wires: dict[str, list[mido.Message]] = {}
        self._watch: Optional[Callable[[list[str], list[str]], None]] = None

    # ---------------------------------------------------------------- the daemon's side
    def inputs(self) -> list[str]:
        with self._lock:
            return list(self._sources)

    def outputs(self) -> list[str]:
        with self._lock:
            return list(self._sinks)

    def open_input(self, client, port, *, connect_to, callback, on_error=None) -> MemoryInput:
        with self._lock:
            if connect_to is not None and connect_to not in self._sources:
                raise RetunerError(f"port {connect_to!r} is gone")
            h = MemoryInput(self, f"{client}:{port}", connect_to, callback, on_error)
            self._open.append(h)
            return h

    def open_output(self, client, port, *, connect_to) -> MemoryOutput:
        with self._lock:
            if connect_to is not None and connect_to not in self._sinks:
                raise RetunerError(f"port {connect_to!r} is gone")
            h = MemoryOutput(self, f"{client}:{port}", connect_to)
            self._open.append(h)
            return h

    def watch(self, interval, on_change) -> None:
        self._watch = on_change

    def close(self) -> None:
        self._watch = None

    def _closed(self, handle) -> None:
        with self._lock:
            if handle in self._open:
                self._open.remove(handle)

    def _carry(self, h: MemoryOutput, msg: mido.Message) -> None:
        with self._lock:
            if h.connected_to is None:
                self._wires.setdefault(h.name, []).append(msg)
            elif h.connected_to in self._sinks:      # a vanished port swallows what is sent
                self._wires.setdefault(h.connected_to, []).append(msg)

    # ---------------------------------------------------------------- the test's side
    def plug(self, name: str, *, output: bool) -> None:
        """Another program's port appears (``output``: one we can write to)."""
        with self._lock:
            (self._sinks if output else self._sources).append(name)
        self._changed()

    def unplug(self, name: str) -> None:
        with self._lock:
            for lst in (self._sources, self._sinks):
                if name in lst:
                    lst.remove(name)
        self._changed()

    def _changed(self) -> None:
        fn = self._watch
        if fn is not None:
            fn(self.inputs(), self.outputs())

    def play(self, name: str, *msgs, raw: Optional[list] = None) -> None:
        """Another program sends into ``name`` (its own port, or our virtual input)."""
        with self._lock:
            targets = [h for h in self._open if isinstance(h, MemoryInput)
                       and (h.connected_to == name or (h.connected_to is None and h.name == name))]
        for h in targets:
            if raw is not None:
                deliver(raw, h.callback, h.on_error)
            for m in msgs:
                deliver(m.bytes(), h.callback, h.on_error)

    def received(self, name: str) -> list[mido.Message]:
        """What reached port ``name`` (a program's port we connected to, or our virtual output)."""
        with self._lock:
            return list(self._wires.get(name, []))

    def clear(self, name: Optional[str] = None) -> None:
        with self._lock:
            if name is None:
                self._wires.clear()
            else:
                self._wires.pop(name, None)

    def open_ports(self) -> list[str]:
        """Our own ports that are open now."""
        with self._lock:
            return [h.name for h in self._open]
