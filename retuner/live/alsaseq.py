"""The ALSA backend: one sequencer client with an ``in`` and an ``out`` port, through alsa-midi.

alsa-midi (PyPI ``alsa-midi``, module ``alsa_midi``) wraps libasound's sequencer API through cffi, so
one client of ours holds both ports, as on JACK: ``retuner:in`` (client 128, port 0, say) and
``retuner:out`` (port 1). python-rtmidi opens one client per port, so it would show two clients;
it stays the fallback when alsa-midi does not load (:func:`retuner.live.ports.make_backend`).

Names are given as python-rtmidi gives them, so that matching, listings and the user's names are the
same with either library: ``"client name:port name client:port"`` (``"Midi Through:Midi Through
Port-0 14:0"``); a name matches without the trailing numbers (retuner.live.ports).

Threads
-------
A reader thread of ours waits in ``poll(2)`` on the sequencer's file descriptor and on an eventfd
that :meth:`AlsaSeqBackend.close` writes; every MIDI event that arrived goes, as bytes, to the
callback of the input port it arrived at. The sequencer's own notices (a connection made or
undone) are not MIDI and are left out. A system exclusive message longer than the sequencer's
event size can come in pieces (from a hardware port: the kernel passes it on as it arrives); they
are joined before they are handed on. Sending (any thread) and the
port tables take a lock; the sequencer delivers at once (no queue of ours).
"""

from __future__ import annotations

import errno
import logging
import os
import select
import threading
import time
from typing import Callable, Optional

import mido

from retuner.live.backend import (Callback, ErrorCallback, InputHandle, OutputHandle, PortBackend, deliver,
                                  quiet_library)

log = logging.getLogger("retuner.live.alsaseq")

_MODULE = None
SEND_PATIENCE = 1.0        # seconds a send waits for a destination whose input is full (see _send)
PORT_NUMBERS = {True: 0, False: 1}     # writable (our in) -> port number, readable (our out) -> port number


def alsa_module():
    """alsa-midi's module, or ImportError (OSError when libasound does not load)."""
    global _MODULE
    if _MODULE is None:
        import alsa_midi  # noqa: PLC0415 - loaded only when the ALSA backend is used

        _MODULE = alsa_midi
    return _MODULE


def port_name(info) -> str:
    """A port's name as python-rtmidi gives it: ``client:port client_id:port_id``."""
    return f"{info.client_name}:{info.name} {info.client_id}:{info.port_id}"


class _Sysex:
    """Joins the pieces of a system exclusive message (F0 ... F7) that come as several events."""

    def __init__(self):
        self.parts: list[bytes] = []

    def feed(self, data: bytes) -> Optional[bytes]:
        """The whole message once its last piece came; None meanwhile."""
        if data[:1] == b"\xf0":
            self.parts = [data]
        else:
            self.parts.append(data)
        if data[-1:] == b"\xf7":
            whole, self.parts = b"".join(self.parts), []
            return whole
        return None


class AlsaSeqInput(InputHandle):
    def __init__(self, owner: "AlsaSeqBackend", port, connect_to: Optional[str], callback: Callback,
                 on_error: Optional[ErrorCallback]):
        self._owner = owner
        self._port = port
        self.connected_to = connect_to
        self.callback, self.on_error = callback, on_error
        self.sysex = _Sysex()
        self.closed = False

    def take(self, data: bytes) -> None:
        """One event's bytes (the reader thread)."""
        if not data:
            return
        first = data[0]
        if first == 0xF0 or (first < 0x80 and self.sysex.parts):
            whole = self.sysex.feed(data)              # a piece of a system exclusive message
            if whole is not None:
                deliver(whole, self.callback, self.on_error)
            return
        if first < 0x80:
            return                                     # a piece whose start never came
        if first < 0xF8:
            self.sysex.parts = []                      # a status byte ends an unfinished one (MIDI 1.0)
        deliver(data, self.callback, self.on_error)    # real-time bytes may come between pieces

    def close(self) -> None:
        if not self.closed:
            self.closed = True
            self._owner._close_port(self._port, self._owner._inputs)


class AlsaSeqOutput(OutputHandle):
    """``send(msg)`` hands the bytes to the sequencer at once."""

    def __init__(self, owner: "AlsaSeqBackend", port, connect_to: Optional[str]):
        self._owner = owner
        self._port = port
        self.connected_to = connect_to
        self.closed = False

    def send(self, msg: mido.Message) -> None:
        if self.closed:
            raise ConnectionError("the ALSA output is closed")
        self._owner._send(self._port, bytes(msg.bytes()))

    def close(self) -> None:
        if not self.closed:
            self.closed = True
            self._owner._close_port(self._port, self._owner._outputs)


class AlsaSeqBackend(PortBackend):
    """The ALSA sequencer through one client of our own (named as the daemon's client name, e.g.
    ``retuner``) with the ports ``in`` and ``out``: ``retuner:in`` and ``retuner:out``.

    ``error(exc, what)`` turns a failure to reach the sequencer into the exception to raise."""

    word = "alsa"

    def __init__(self, base: str = "retuner", *, error: Optional[Callable[[Exception, str], Exception]] = None):
        self.base = base
        self._error = error or (lambda exc, what: RuntimeError(f"{what}: {exc}"))
        self._lock = threading.RLock()         # the client's calls but input, and the port tables
        self._client = None
        self._inputs: dict[int, AlsaSeqInput] = {}     # our port id -> input
        self._outputs: dict[int, AlsaSeqOutput] = {}
        self._reader: Optional[threading.Thread] = None
        self._wake: Optional[int] = None

    def client_name(self, base: str, side: str) -> str:
        return base if side in ("in", "out") else f"{base}-{side}"

    # ------------------------------------------------------------------ the client
    def _live(self, name: Optional[str] = None):
        with self._lock:
            if self._client is None:
                try:
                    alsa = alsa_module()
                    with quiet_library():          # libasound's own lines when there is no sequencer
                        self._client = alsa.SequencerClient(name or self.base)
                except Exception as exc:  # noqa: BLE001 - no sequencer, no libasound, no module
                    raise self._error(exc, "cannot open the alsa MIDI system") from exc
            return self._client

    def _ports(self, *, readable: bool) -> list:
        """The sequencer's MIDI ports we can read from (``readable``) or write to, in its own order."""
        alsa = alsa_module()
        kinds = alsa.PortType.MIDI_GENERIC | alsa.PortType.SYNTH | alsa.PortType.APPLICATION
        with self._lock:
            infos = self._live().list_ports(input=readable, output=not readable, type=alsa.PortType.ANY,
                                            include_no_export=False, sort=False)
        return [p for p in infos if p.type & kinds]

    def inputs(self) -> list[str]:
        return [port_name(p) for p in self._ports(readable=True)]

    def outputs(self) -> list[str]:
        return [port_name(p) for p in self._ports(readable=False)]

    def _find(self, name: str, *, readable: bool):
        for p in self._ports(readable=readable):
            if port_name(p) == name:
                return p
        raise LookupError(f"port {name!r} is gone")

    def _create(self, client_name: str, port: str, *, writable: bool):
        alsa = alsa_module()
        caps = (alsa.PortCaps.WRITE | alsa.PortCaps.SUBS_WRITE) if writable else \
            (alsa.PortCaps.READ | alsa.PortCaps.SUBS_READ)
        kind = alsa.PortType.MIDI_GENERIC | alsa.PortType.APPLICATION
        client = self._live(client_name)
        with self._lock:
            try:           # in is port 0 and out port 1, whichever opens first (README's aconnect lines)
                return client.create_port(port, caps=caps, type=kind, port_id=PORT_NUMBERS[writable])
            except Exception:  # noqa: BLE001 - that number is taken: the next free one
                return client.create_port(port, caps=caps, type=kind)

    # ------------------------------------------------------------------ ports
    def _open(self, client: str, port: str, connect_to: Optional[str], *, writable: bool):
        """Our port (``writable``: an input), connected to ``connect_to`` when that is given."""
        ours = self._create(client, port, writable=writable)
        try:
            if connect_to is not None:
                with self._lock:
                    theirs = self._find(connect_to, readable=writable)
                    (ours.connect_from if writable else ours.connect_to)(theirs)
        except Exception as exc:
            self._drop(ours)
            side = "input" if writable else "output"
            raise self._error(exc, f"cannot open {side} {connect_to or port!r}") from exc
        return ours

    def open_input(self, client, port, *, connect_to, callback, on_error=None) -> AlsaSeqInput:
        ours = self._open(client, port, connect_to, writable=True)
        handle = AlsaSeqInput(self, ours, connect_to, callback, on_error)
        with self._lock:
            self._inputs[ours.port_id] = handle
            self._start_reader()
        return handle

    def open_output(self, client, port, *, connect_to) -> AlsaSeqOutput:
        ours = self._open(client, port, connect_to, writable=False)
        handle = AlsaSeqOutput(self, ours, connect_to)
        with self._lock:
            self._outputs[ours.port_id] = handle
        return handle

    def _drop(self, port) -> None:
        try:
            with self._lock:
                port.close()
        except Exception as exc:  # noqa: BLE001 - teardown
            log.debug("closing an ALSA port: %s", exc)

    def _close_port(self, port, table: dict) -> None:
        with self._lock:
            table.pop(port.port_id, None)
        self._drop(port)

    def _send(self, port, data: bytes) -> None:
        """Deliver one message now, waiting at most ``SEND_PATIENCE`` for room. A destination that
        takes no more events (a synth that stopped reading: its input is full) must not hold the
        engine thread: alsa-midi's blocking client would wait for ever there, with our lock held
        (seen on a real sequencer: after 199 events to a client that never read, the send and
        every listing hung). So the base class's calls, which do not wait, are used, and after
        the patience what is still ours to send is dropped and the send fails, as python-rtmidi's
        does (the daemon logs it and goes on)."""
        alsa = alsa_module()
        base = alsa.client.SequencerClientBase
        event = alsa.MidiBytesEvent(data)
        with self._lock:
            client = self._client
            if client is None:
                raise ConnectionError("the ALSA client is closed")
            deadline = time.monotonic() + SEND_PATIENCE
            queued = False
            while True:
                try:
                    if not queued:
                        base.event_output(client, event, port=port)
                        queued = True
                    base.drain_output(client)
                    return
                except alsa.ALSAError as exc:
                    if exc.errnum != -errno.EAGAIN:
                        raise
                left = deadline - time.monotonic()
                if left <= 0:
                    client.drop_output()            # not delivered late either
                    raise TimeoutError(f"the destination took no events for {SEND_PATIENCE:g} s "
                                       f"(its input is full): message dropped")
                waiting = select.poll()
                waiting.register(client._fd, select.POLLOUT)   # alsa-midi's own descriptor, as the reader uses
                waiting.poll(min(left, 0.05) * 1000)

    # ------------------------------------------------------------------ the reader thread
    def _start_reader(self) -> None:
        if self._reader is None:
            self._wake = os.eventfd(0, os.EFD_CLOEXEC)
            self._reader = threading.Thread(target=self._read, args=(self._client, self._wake),
                                             name="retuner-alsa-in", daemon=True)
            self._reader.start()

    def _read(self, client, wake: int) -> None:
        """Wait for the sequencer or for the stop; hand each MIDI event to its input."""
        alsa = alsa_module()
        poller = select.poll()
        poller.register(client._fd, select.POLLIN)     # alsa-midi's own descriptor of the sequencer
        poller.register(wake, select.POLLIN)
        while True:
            ready = {fd for fd, _ in poller.poll()}
            if wake in ready:
                return
            while True:
                try:
                    ev = client.event_input(prefer_bytes=True, timeout=0.001)
                except Exception as exc:  # noqa: BLE001 - the reader never dies on one bad event
                    log.debug("reading the ALSA sequencer: %s", exc)
                    break
                if ev is None:
                    break
                if not isinstance(ev, alsa.MidiBytesEvent):
                    continue                            # the sequencer's notices: not MIDI
                dest = getattr(ev, "dest", None)
                handle = self._inputs.get(getattr(dest, "port_id", None))
                if handle is None and len(self._inputs) == 1:
                    handle = next(iter(self._inputs.values()))
                if handle is not None and not handle.closed:
                    handle.take(bytes(ev.midi_bytes))

    def _looker(self, on_change):
        def look():
            try:
                on_change(self.inputs(), self.outputs())
            except Exception as exc:  # noqa: BLE001 - backend trouble: log, keep watching
                log.debug("listing ports: %s", exc)
        return look

    def close(self) -> None:
        self._stop_watching()
        reader, wake = self._reader, self._wake
        if reader is not None and wake is not None:
            os.eventfd_write(wake, 1)
            reader.join(2)
        with self._lock:
            for table in (self._inputs, self._outputs):
                for handle in list(table.values()):
                    handle.closed = True
                    self._drop(handle._port)
                table.clear()
            if self._client is not None:
                try:
                    self._client.close()
                except Exception as exc:  # noqa: BLE001 - teardown
                    log.debug("closing the ALSA client: %s", exc)
                self._client = None
        if wake is not None:
            os.close(wake)
        self._reader = self._wake = None
