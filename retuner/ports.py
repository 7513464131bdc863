"""MIDI ports: choosing the backend, listing, matching names, opening.

retuner talks to the ALSA sequencer (the default) or to a JACK server through
python-rtmidi, the library behind mido's ``mido.backends.rtmidi`` backend; the
bytes that arrive are parsed into :class:`mido.Message` objects and messages
go out as ``msg.bytes()``. python-rtmidi is used directly (not through
``mido.open_input``) because only it lets us name our client and port when we
connect to somebody else's port, so users find ``retuner`` in their patchbay.

Names a user gives (``--input``, ``--output``) match a port when they are:

1. the port's exact name;
2. the port's name without ALSA's trailing ``client:port`` numbers
   (``"Digital Piano:Digital Piano MIDI 1 20:0"`` -> ``"Digital Piano:Digital Piano MIDI 1"``),
   which change when a device is plugged into another socket;
3. a shell-style pattern (``*``, ``?``, ``[...]``), matched without regard to case;
4. otherwise a part of the name, without regard to case.

The first port (in the order the backend lists them) that matches wins.
"""

from __future__ import annotations

import fnmatch
import logging
import re
import threading
from dataclasses import dataclass
from typing import Callable, Optional, Sequence

import mido
import rtmidi

from .errors import RetunerError

log = logging.getLogger("retuner.ports")

# backend word -> (python-rtmidi API, the equivalent mido backend name)
BACKENDS = {
    "alsa": (rtmidi.API_LINUX_ALSA, "mido.backends.rtmidi/LINUX_ALSA"),
    "jack": (rtmidi.API_UNIX_JACK, "mido.backends.rtmidi/UNIX_JACK"),
}
_MIDO_NAMES = {v[1]: k for k, v in BACKENDS.items()}

_ALSA_NUMBERS = re.compile(r"\s+\d+:\d+$")


def backend_word(name: str) -> str:
    """Normalise ``alsa``/``jack`` or a mido backend name to ``alsa``/``jack``."""
    word = _MIDO_NAMES.get(name, name).lower()
    if word not in BACKENDS:
        raise RetunerError(f"unknown backend {name!r} (use alsa or jack)", field="backend")
    return word


def _api(backend: str) -> int:
    word = backend_word(backend)
    api = BACKENDS[word][0]
    if api not in rtmidi.get_compiled_api():
        raise RetunerError(f"this python-rtmidi has no {word} support", field="backend")
    return api


def _rt_error(exc: Exception, what: str, backend: str) -> RetunerError:
    word = backend_word(backend)
    hint = (" (is a JACK server running? set JACK_DEFAULT_SERVER for a named one)"
            if word == "jack" else " (is /dev/snd/seq there? the ALSA sequencer needs it)")
    return RetunerError(f"{what}: {exc}{hint}", field="backend")


def _new_in(backend: str, client_name: str) -> rtmidi.MidiIn:
    try:
        return rtmidi.MidiIn(_api(backend), client_name)
    except rtmidi.SystemError as exc:  # type: ignore[attr-defined]
        raise _rt_error(exc, f"cannot open the {backend_word(backend)} MIDI system", backend) from exc


def _new_out(backend: str, client_name: str) -> rtmidi.MidiOut:
    try:
        return rtmidi.MidiOut(_api(backend), client_name)
    except rtmidi.SystemError as exc:  # type: ignore[attr-defined]
        raise _rt_error(exc, f"cannot open the {backend_word(backend)} MIDI system", backend) from exc


def strip_alsa_numbers(name: str) -> str:
    return _ALSA_NUMBERS.sub("", name)


def match_port(spec: str, names: Sequence[str], exclude: Sequence[str] = ()) -> Optional[str]:
    """The first name in ``names`` that ``spec`` matches (see the module doc), or None.

    Names that start with one of ``exclude`` (our own clients) are never matched."""
    cand = [n for n in names if not any(n.startswith(e) for e in exclude)]
    if spec in cand:
        return spec
    for n in cand:
        if strip_alsa_numbers(n) == spec:
            return n
    low = spec.lower()
    if any(c in spec for c in "*?["):
        for n in cand:
            if fnmatch.fnmatchcase(n.lower(), low) or fnmatch.fnmatchcase(strip_alsa_numbers(n).lower(), low):
                return n
        return None
    for n in cand:
        if low in n.lower():
            return n
    return None


class PortLister:
    """Lists the ports of one backend; keeps its two probe clients open between calls.

    ``inputs()`` are the ports retuner can read from (other programs' outputs),
    ``outputs()`` the ports it can write to. Thread-safe."""

    def __init__(self, backend: str, client_name: str = "retuner-probe"):
        self.backend = backend_word(backend)
        self._lock = threading.Lock()
        self._in = _new_in(self.backend, client_name)
        self._out = _new_out(self.backend, client_name)

    def inputs(self) -> list[str]:
        with self._lock:
            return list(self._in.get_ports())

    def outputs(self) -> list[str]:
        with self._lock:
            return list(self._out.get_ports())

    def close(self) -> None:
        with self._lock:
            for rt in (self._in, self._out):
                try:
                    rt.delete()
                except Exception:  # pragma: no cover - teardown
                    pass


def list_ports(backend: str) -> tuple[list[str], list[str]]:
    """(inputs, outputs) as the backend names them."""
    lister = PortLister(backend)
    try:
        return lister.inputs(), lister.outputs()
    finally:
        lister.close()


@dataclass
class PortSpec:
    """What to open on one side: a virtual port of our own, or somebody else's port by name."""

    virtual: bool
    name: Optional[str] = None        # the user's name or pattern (not virtual)


def _index_of(rt, name: str) -> int:
    # look the name up in this very client's list: another client's list may be in another order
    names = rt.get_ports()
    if name not in names:
        raise RetunerError(f"port {name!r} is gone")
    return names.index(name)


class InputPort:
    """An open input; ``callback(msg)`` runs on the backend's thread for every parsed message.

    ``on_error(exc, data)`` is called (also on that thread) for bytes that do not parse."""

    def __init__(self, backend: str, client_name: str, port_name: str, *,
                 connect_to: Optional[str] = None,
                 callback: Callable[[mido.Message], None],
                 on_error: Optional[Callable[[Exception, list], None]] = None):
        self.backend = backend_word(backend)
        self.connected_to = connect_to
        self._callback = callback
        self._on_error = on_error
        self._parser = mido.Parser()
        self._rt = _new_in(self.backend, client_name)
        try:
            if connect_to is None:
                self._rt.open_virtual_port(port_name)
            else:
                self._rt.open_port(_index_of(self._rt, connect_to), port_name)
            # deliver system exclusive and timing clock, drop active sensing
            self._rt.ignore_types(sysex=False, timing=False, active_sense=True)
            self._rt.set_callback(self._on_bytes)
        except RetunerError:
            self._rt.delete()
            raise
        except Exception as exc:
            self._rt.delete()
            raise _rt_error(exc, f"cannot open input {connect_to or port_name!r}", self.backend) from exc
        self.closed = False

    def _on_bytes(self, event, data=None) -> None:
        raw, _delta = event
        try:
            if raw and raw[0] < 0xF0 and len(raw) <= 3:
                msg = mido.Message.from_bytes(raw)
                self._callback(msg)
                return
            # system exclusive (possibly long) and other system messages
            self._parser.feed(raw)
            for msg in self._parser:
                self._callback(msg)
        except Exception as exc:  # never let bad bytes kill the backend thread
            if self._on_error is not None:
                try:
                    self._on_error(exc, list(raw))
                except Exception:
                    pass

    def close(self) -> None:
        if self.closed:
            return
        self.closed = True
        try:
            self._rt.cancel_callback()
            self._rt.close_port()
            self._rt.delete()
        except Exception as exc:  # pragma: no cover - teardown
            log.debug("closing input: %s", exc)


class OutputPort:
    """An open output; ``send(msg)`` writes at once."""

    def __init__(self, backend: str, client_name: str, port_name: str, *,
                 connect_to: Optional[str] = None):
        self.backend = backend_word(backend)
        self.connected_to = connect_to
        self._rt = _new_out(self.backend, client_name)
        try:
            if connect_to is None:
                self._rt.open_virtual_port(port_name)
            else:
                self._rt.open_port(_index_of(self._rt, connect_to), port_name)
        except RetunerError:
            self._rt.delete()
            raise
        except Exception as exc:
            self._rt.delete()
            raise _rt_error(exc, f"cannot open output {connect_to or port_name!r}", self.backend) from exc
        self.closed = False

    def send(self, msg: mido.Message) -> None:
        self._rt.send_message(msg.bytes())

    def close(self) -> None:
        if self.closed:
            return
        self.closed = True
        try:
            self._rt.close_port()
            self._rt.delete()
        except Exception as exc:  # pragma: no cover - teardown
            log.debug("closing output: %s", exc)
