"""The port seam: what the daemon needs from a MIDI system.

The daemon never builds ports itself; it is handed a :class:`PortBackend`:

* retuner.live.alsaseq.AlsaSeqBackend: the ALSA sequencer, through alsa-midi (one client, ports in and out);
* retuner.live.ports.RtMidiBackend: the ALSA sequencer, through python-rtmidi (a client per port), where
  alsa-midi does not load;
* retuner.live.jackmidi.JackBackend: a JACK server, through JACK-Client (one client, ports in and out);
* retuner.live.memory.MemoryBackend: ports in memory, for tests that drive the daemon in-process
  (hotplug, switching, reload, panic) without a MIDI system.

A backend lists the ports of other programs (``inputs()``: ports we can read from, a keyboard;
``outputs()``: ports we can write to, a synth), opens our own ports (virtual, or connected to
one of those by its exact name), and reports changes of the lists to a watcher.
"""

from __future__ import annotations

import contextlib
import logging
import os
import sys
import threading
from typing import Callable, Optional

import mido

Callback = Callable[[mido.Message], None]
ErrorCallback = Callable[[Exception, list], None]


def deliver(raw, callback: Callback, on_error: Optional[ErrorCallback]) -> None:
    """Parse one whole message (as a MIDI library hands it over) and pass it on; bytes that do
    not parse go to ``on_error(exc, data)``. Never raises: it runs on a backend's thread."""
    try:
        # python-rtmidi and JACK deliver one whole message per event (a system exclusive message
        # complete from F0 to F7; the ALSA backend joins the pieces first), so each event parses
        # on its own; anything else is refused
        msg = mido.Message.from_bytes(raw)
        callback(msg)
    except Exception as exc:  # never let bad bytes kill the backend thread
        if on_error is not None:
            try:
                on_error(exc, list(raw))
            except Exception:
                pass


@contextlib.contextmanager
def quiet_library():
    """The JACK and ALSA libraries print to the process's stderr (file descriptor 2) when no
    server or sequencer is there, several lines before our own one-line message. Opening a
    client is quick, so fd 2 goes to /dev/null meanwhile (kept with -v, for debugging)."""
    if logging.getLogger("retuner").isEnabledFor(logging.DEBUG):
        yield
        return
    try:
        sys.stderr.flush()
        saved = os.dup(2)
        devnull = os.open(os.devnull, os.O_WRONLY)
    except OSError:
        yield
        return
    try:
        os.dup2(devnull, 2)
        yield
    finally:
        os.dup2(saved, 2)
        os.close(saved)
        os.close(devnull)


class InputHandle:
    """An open input: calls back for every message until closed."""

    connected_to: Optional[str] = None

    def close(self) -> None:  # pragma: no cover - interface
        raise NotImplementedError


class OutputHandle:
    """An open output: ``send(msg)`` writes at once; ``close()`` delivers what was sent first."""

    connected_to: Optional[str] = None

    def send(self, msg: mido.Message) -> None:  # pragma: no cover - interface
        raise NotImplementedError

    def close(self) -> None:  # pragma: no cover - interface
        raise NotImplementedError


class PortBackend:
    """A MIDI system the daemon can open ports on. ``word`` names it in logs ("alsa", "jack")."""

    word = "?"
    _watcher: Optional[threading.Thread] = None           # the port watcher (see :meth:`watch`)
    _stop: Optional[threading.Event] = None
    on_server_lost: Optional[Callable[[], None]] = None   # called from any thread when the MIDI
                                                          # system itself goes away (a JACK server)

    def client_name(self, base: str, side: str) -> str:
        """Our client's name for one side ("in", "out", "probe")."""
        return f"{base}-{side}"

    def inputs(self) -> list[str]:  # pragma: no cover - interface
        raise NotImplementedError

    def outputs(self) -> list[str]:  # pragma: no cover - interface
        raise NotImplementedError

    def open_input(self, client: str, port: str, *, connect_to: Optional[str],
                   callback: Callback, on_error: Optional[ErrorCallback] = None) -> InputHandle:
        raise NotImplementedError  # pragma: no cover - interface

    def open_output(self, client: str, port: str, *, connect_to: Optional[str]) -> OutputHandle:
        raise NotImplementedError  # pragma: no cover - interface

    def watch(self, interval: float, on_change: Callable[[list[str], list[str]], None]) -> None:
        """Call ``on_change(inputs, outputs)`` with the port lists about every ``interval`` seconds
        (or whenever they change), from any thread, until :meth:`close`. Here: a thread that
        runs :meth:`_looker`'s look every ``interval`` seconds; :meth:`_stop_watching` ends it."""
        if self._watcher is not None:
            return
        look = self._looker(on_change)
        self._stop = stop = threading.Event()

        def run():
            while not stop.wait(interval):
                look()

        self._watcher = threading.Thread(target=run, name="retuner-ports", daemon=True)
        self._watcher.start()

    def _looker(self, on_change: Callable[[list[str], list[str]], None]) -> Callable[[], None]:
        """One look at the port lists, passed to ``on_change``; never raises (it runs on the
        watcher's thread)."""
        raise NotImplementedError  # pragma: no cover - interface

    def _stop_watching(self) -> None:
        """End the watcher thread, if any (waited for at most 2 s)."""
        if self._stop is not None:
            self._stop.set()
        if self._watcher is not None:
            self._watcher.join(2)
            self._watcher = None

    def close(self) -> None:
        """Stop watching and let go of anything opened for listing."""
