"""The JACK backend: one JACK client with an ``in`` and an ``out`` MIDI port, through JACK-Client.

JACK-Client (PyPI ``JACK-Client``, module ``jack``) calls the system's libjack through cffi, so it
reaches a real JACK server and, run under ``pw-jack`` (or with PipeWire's libjack preloaded),
PipeWire's JACK layer. cffi releases Python's global interpreter lock around every C call, so
closing a port or the client (which waits for the process cycle in progress) can never deadlock
with a process callback that waits for that lock.

Periods
-------
JACK calls the client's process callback once every period on its own thread; what it does there is
retuner.live.jackcycle's: in C when that was built at install, else in Python, the same either way.
It writes what the engine sent since the last period into the out port and hands what arrived on
the in port to the input's callback (the daemon then stamps it, queues it and wakes its engine
thread: no polling anywhere). So a note-on that arrives in one period goes out, retuned, in the
next one. A port being closed is first taken out of the period's reach, then unregistered.

Server gone
-----------
When the JACK server stops, JACK calls our shutdown callback: the client is marked dead (its ports
list nothing, sending fails) and ``on_server_lost`` is called; the daemon then exits with status 1,
so a service manager starts it again, and its start-up waits for a server. (Opening a new client in
the same process right after a server stopped was seen to list no ports at times.)
"""

from __future__ import annotations

import importlib.machinery
import importlib.util
import logging
import os
import sys
import threading
import time
from typing import Callable, Optional

from retuner.live import jackcycle
from retuner.live.backend import (Callback, ErrorCallback, InputHandle, OutputHandle, PortBackend,
                                  quiet_library)

log = logging.getLogger("retuner.live.jackmidi")

_MODULE = None


def jack_module():
    """JACK-Client's ``jack`` module. Loaded under a name of our own when another module called
    ``jack`` comes first on ``sys.path`` (the tests' own helper module ``tests/jack.py`` does)."""
    global _MODULE
    if _MODULE is not None:
        return _MODULE
    try:
        import jack as mod  # noqa: PLC0415 - loaded only when the JACK backend is used
    except ImportError:
        mod = None
    if mod is None or not all(hasattr(mod, a) for a in ("Client", "MidiPort", "_lib", "_ffi")):
        shadow = os.path.dirname(os.path.abspath(getattr(mod, "__file__", "") or "")) if mod else None
        path = [p for p in sys.path if os.path.abspath(p or ".") != shadow]
        spec = importlib.machinery.PathFinder.find_spec("jack", path)
        if spec is None or spec.loader is None:
            raise ImportError("the JACK backend needs JACK-Client (pip install JACK-Client)")
        mod = importlib.util.module_from_spec(spec)
        sys.modules["retuner_jack_client"] = mod
        spec.loader.exec_module(mod)
    _MODULE = mod
    return mod


class JackUnavailable(Exception):
    """No JACK server answered (or libjack is missing); the text is JACK-Client's."""


def open_client(name: str):
    """A JACK client (not activated) that never starts a server; :class:`JackUnavailable` if none runs."""
    try:
        jack = jack_module()
    except (ImportError, OSError) as exc:
        raise JackUnavailable(str(exc)) from exc
    try:
        with quiet_library():
            return jack.Client(name, no_start_server=True)
    except jack.JackError as exc:
        raise JackUnavailable(f"JACK server not running or cannot be reached ({exc})") from exc


def server_running() -> bool:
    """Whether a JACK server answers (a client is opened and closed again; none is started)."""
    try:
        client = open_client("retuner-probe")
    except JackUnavailable:
        return False
    client.close()
    return True


class _Client:
    """One open JACK client and its ports; the process and shutdown callbacks run here."""

    def __init__(self, name: str, on_lost: Optional[Callable[[], None]] = None, period: Optional[str] = None):
        self.jack = jack_module()
        self.on_lost = on_lost
        self.client = open_client(name)
        self.name = self.client.name
        self.dead = False
        self.active = False                    # activated with the first port: a client that only
        #                                        lists ports costs nothing per period
        self.period = jackcycle.choose(self.jack, period)
        self.period.install(self.client)
        self.client.set_shutdown_callback(self._shutdown)
        if jackcycle.library() is not None:
            log.debug("JACK client %s: each period runs in %s", self.name,
                      "C" if self.period.word == "native" else "Python")
        else:
            log.info("JACK client %s: each period runs in Python, as retuner was installed without a C "
                     "compiler (apt-get install gcc libc6-dev, then install retuner again: about half "
                     "the idle CPU)", self.name)

    @property
    def periods(self) -> int:
        """Periods run so far (a drain waits on it)."""
        return self.period.periods

    # --------------------------------------------------------------- JACK's threads
    def _shutdown(self, status, reason) -> None:
        self.dead = True
        log.warning("the JACK server stopped (%s)", reason)
        if self.on_lost is not None:
            self.on_lost()

    # --------------------------------------------------------------- ports
    def register(self, kind: str, port_name: str, connect_to: Optional[str]):
        ports = self.client.midi_inports if kind == "in" else self.client.midi_outports
        port = ports.register(port_name)
        if not self.active:
            self.client.activate()
            self.active = True
        if connect_to is not None:
            try:
                if kind == "in":
                    self.client.connect(connect_to, port)
                else:
                    self.client.connect(port, connect_to)
            except Exception:
                port.unregister()
                raise
        return port

    def detach(self, key, port) -> None:
        """Take a port out of the period's reach, then unregister it."""
        self.period.remove(key, live=self.active and not self.dead)
        if not self.dead:
            try:
                port.unregister()
            except Exception as exc:  # noqa: BLE001 - teardown
                log.debug("unregistering %s: %s", port, exc)

    def names(self, *, is_input: bool) -> list[str]:
        if self.dead:
            return []
        return [p.name for p in self.client.get_ports(is_midi=True, is_input=is_input,
                                                      is_output=not is_input)]

    def close(self) -> None:
        self.period.close()
        try:
            if self.active and not self.dead:
                self.client.deactivate()
            self.client.close()
        except Exception as exc:  # noqa: BLE001 - teardown
            log.debug("closing the JACK client: %s", exc)
            return
        self.period.release()                  # JACK calls the period no more


class JackInput(InputHandle):
    def __init__(self, owner: _Client, port_name: str, connect_to: Optional[str], callback: Callback,
                 on_error: Optional[ErrorCallback]):
        self._owner = owner
        self.connected_to = connect_to
        self._port = owner.register("in", port_name, connect_to)
        self.name = self._port.name
        self._key = owner.period.add_input(self._port._ptr, callback, on_error)
        self.closed = False

    def close(self) -> None:
        if self.closed:
            return
        self.closed = True
        self._owner.detach(self._key, self._port)


class JackOutput(OutputHandle):
    """``send(msg)`` queues the bytes; the next period writes them to the port."""

    def __init__(self, owner: _Client, port_name: str, connect_to: Optional[str]):
        self._owner = owner
        self.connected_to = connect_to
        self._port = owner.register("out", port_name, connect_to)
        self.name = self._port.name
        self._queue = owner.period.add_output(self._port._ptr)
        self.closed = False

    def send(self, msg) -> None:
        if self._owner.dead:
            raise ConnectionError("the JACK server stopped")
        self._queue.send(bytes(msg.bytes()))

    def drain(self, timeout: float = 2.0) -> bool:
        """Wait until what was sent has been written out in a process cycle, and one more cycle
        has begun (so every client connected has read it). False after ``timeout`` seconds."""
        owner = self._owner
        end = time.monotonic() + timeout
        while self._queue.queued() and not owner.dead:
            if time.monotonic() > end:
                log.debug("the output did not drain within %.1f s", timeout)
                return False
            time.sleep(0.0005)
        seen = owner.periods
        while owner.periods < seen + 2 and not owner.dead:
            if time.monotonic() > end:
                return False
            time.sleep(0.0005)
        return not self._queue.queued()

    def close(self) -> None:
        if self.closed:
            return
        self.closed = True
        self.drain()
        self._owner.detach(self._queue.key, self._port)


class JackBackend(PortBackend):
    """A JACK server through one client of our own (named as the daemon's client name, e.g.
    ``retuner``) with the ports ``in`` and ``out``: ``retuner:in`` and ``retuner:out``.

    ``error(exc, what)`` turns a failure to reach the server into the exception to raise (the
    port module's one-line message with the commands that start a server)."""

    word = "jack"

    def __init__(self, base: str = "retuner", *, error: Optional[Callable[[Exception, str], Exception]] = None,
                 period: Optional[str] = None):
        self.base = base
        self.period = period                   # a word of jackcycle.PERIODS, or None: the best there is
        self._error = error or (lambda exc, what: RuntimeError(f"{what}: {exc}"))
        self._lock = threading.RLock()
        self._client: Optional[_Client] = None

    def client_name(self, base: str, side: str) -> str:
        return base if side in ("in", "out") else f"{base}-{side}"

    def _live(self, name: Optional[str] = None) -> _Client:
        """The open client (a new one when there is none, or the server it knew stopped)."""
        with self._lock:
            if self._client is not None and self._client.dead:
                _close_apart(self._client)
                self._client = None
            if self._client is None:
                try:
                    self._client = _Client(name or self.base, lambda: self.on_server_lost and self.on_server_lost(),
                                           self.period)
                except JackUnavailable as exc:
                    raise self._error(exc, "cannot open the jack MIDI system") from exc
            return self._client

    def inputs(self) -> list[str]:
        return self._live().names(is_input=False)

    def outputs(self) -> list[str]:
        return self._live().names(is_input=True)

    def open_input(self, client, port, *, connect_to, callback, on_error=None) -> JackInput:
        owner = self._live(client)
        try:
            return JackInput(owner, port, connect_to, callback, on_error)
        except Exception as exc:
            raise self._error(exc, f"cannot open input {connect_to or port!r}") from exc

    def open_output(self, client, port, *, connect_to) -> JackOutput:
        owner = self._live(client)
        try:
            return JackOutput(owner, port, connect_to)
        except Exception as exc:
            raise self._error(exc, f"cannot open output {connect_to or port!r}") from exc

    def _looker(self, on_change):
        last = None

        def look():
            nonlocal last
            try:
                with self._lock:
                    client = self._live()
                if last is not None and client is not last:
                    # a new client (the server stopped and came back before a look found it
                    # gone): ports opened on the old one are gone even if their names returned
                    on_change([], [])
                last = client
                on_change(client.names(is_input=False), client.names(is_input=True))
            except Exception as exc:  # noqa: BLE001 - no server (yet): its ports are gone
                log.debug("listing ports: %s", exc)
                on_change([], [])
        return look

    def close(self) -> None:
        self._stop_watching()
        with self._lock:
            if self._client is not None:
                if self._client.dead:
                    _close_apart(self._client)
                else:
                    self._client.close()
                self._client = None


def _close_apart(client: _Client, wait: float = 2.0) -> None:
    """Close a client whose server stopped, before a new client is opened (libjack cleans up the
    clients a stopped server left when the next one opens, and a new client opened meanwhile was
    seen to list no ports); on a thread of its own, waited for at most ``wait`` seconds, so that a
    close that blocks cannot stop the port watcher."""
    th = threading.Thread(target=client.close, name="retuner-jack-close", daemon=True)
    th.start()
    th.join(wait)
