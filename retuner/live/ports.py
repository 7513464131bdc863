"""MIDI ports: choosing the backend, listing, matching names, opening.

retuner talks to the ALSA sequencer through alsa-midi (retuner.live.alsaseq) and to a JACK server
through JACK-Client (retuner.live.jackmidi): one client with the ports ``in`` and ``out`` either way;
:func:`make_backend` picks one. Where alsa-midi does not load, python-rtmidi (the library behind
mido's ``mido.backends.rtmidi`` backend) serves the ALSA sequencer here, with a client per port. The bytes that
arrive are parsed into :class:`mido.Message` objects and messages go out as ``msg.bytes()``.
python-rtmidi is used directly (not through ``mido.open_input``) because only it lets us name our
client and port when we connect to somebody else's port, so users find ``retuner`` in their
patchbay.

Names a user gives (``--input``, ``--output``) match a port when they are:

1. the port's exact name;
2. the port's name without ALSA's trailing ``client:port`` numbers
   (``"Digital Piano:Digital Piano MIDI 1 20:0"`` -> ``"Digital Piano:Digital Piano MIDI 1"``),
   which change when a device is plugged into another socket;
3. a shell-style pattern (``*``, ``?``, ``[...]``), matched without regard to case;
4. otherwise a part of the name, without regard to case.

Backend ``auto`` (the default, :func:`choose_backend`) takes the ALSA sequencer when
``/dev/snd/seq`` can be opened, else a JACK server that is already running (looked for without
starting one), else stops with one line (exit status 1) giving the commands that start a JACK
server with its dummy driver, for set-ups with no sound hardware.

The first port (in the order the backend lists them) that matches wins. When none does, the
daemon logs the closest existing names once (:func:`closest`) and keeps waiting for it.
"""

from __future__ import annotations

import difflib
import fnmatch
import logging
import os
import re
import shutil
import threading
from dataclasses import dataclass
from typing import Callable, Optional, Sequence

import mido
import rtmidi

from retuner.errors import RetunerError, Unavailable
from retuner.live import alsaseq, jackmidi
from retuner.live.backend import InputHandle, OutputHandle, PortBackend, deliver, quiet_library

log = logging.getLogger("retuner.live.ports")

# backend word -> (python-rtmidi API, the equivalent mido backend name)
BACKENDS = {
    "alsa": (rtmidi.API_LINUX_ALSA, "mido.backends.rtmidi/LINUX_ALSA"),
    "jack": (rtmidi.API_UNIX_JACK, "mido.backends.rtmidi/UNIX_JACK"),
}
_MIDO_NAMES = {v[1]: k for k, v in BACKENDS.items()}
AUTO = "auto"
CHOICES = (AUTO, "alsa", "jack")          # what --backend and the config's ``backend`` accept
SEQ_DEVICE = "/dev/snd/seq"               # the ALSA sequencer's device

_ALSA_NUMBERS = re.compile(r"\s+\d+:\d+$")


def backend_word(name: str) -> str:
    """Normalise ``auto``/``alsa``/``jack`` or a mido backend name to ``auto``/``alsa``/``jack``."""
    word = _MIDO_NAMES.get(name, name).lower()
    if word not in CHOICES:
        raise RetunerError(f"unknown backend {name!r} (use auto, alsa or jack)", field="backend")
    return word


def _opens(api: int) -> bool:
    """Whether a client of this python-rtmidi API can be opened now (and it is closed again)."""
    if api not in rtmidi.get_compiled_api():
        return False
    try:
        with _quiet_library():
            rt = rtmidi.MidiOut(api, "retuner-probe")
    except Exception:  # noqa: BLE001 - any failure means "not there"
        return False
    rt.delete()
    return True


def _alsa_opens() -> bool:
    """Whether an alsa-midi client opens on the ALSA sequencer now (it is closed again)."""
    try:
        with _quiet_library():
            client = alsaseq.alsa_module().SequencerClient("retuner-probe")
    except Exception:  # noqa: BLE001 - any failure means "not there"
        return False
    client.close()
    return True


def jack_start_commands(environ=None) -> str:
    """The commands that start a JACK server with its dummy driver (no sound hardware needed),
    under the server name the environment asks for, if any."""
    env = os.environ if environ is None else environ
    name = env.get("JACK_DEFAULT_SERVER")
    server = f"jackd --no-realtime{f' -n {name}' if name else ''} -d dummy -r 48000 -p 128 &"
    return server if shutil.which("jackd") else f"apt-get install jackd2 && {server}"


def choose_backend(backend: str) -> str:
    """``alsa`` or ``jack``: the one asked for, or for ``auto`` the ALSA sequencer when its device
    opens, else a JACK server already running. No JACK server is started to find out
    (``JACK_NO_START_SERVER`` is set while looking). Neither there: :class:`Unavailable`, one line
    with the commands that start a JACK server with the dummy driver."""
    word = backend_word(backend)
    if word != AUTO:
        return word
    if os.access(SEQ_DEVICE, os.R_OK | os.W_OK) and (_alsa_opens() or _opens(rtmidi.API_LINUX_ALSA)):
        return "alsa"
    saved = os.environ.get("JACK_NO_START_SERVER")
    os.environ["JACK_NO_START_SERVER"] = "1"
    try:
        if jackmidi.server_running():
            return "jack"
    finally:
        if saved is None:
            del os.environ["JACK_NO_START_SERVER"]
        else:
            os.environ["JACK_NO_START_SERVER"] = saved
    raise Unavailable(f"no MIDI system: no ALSA sequencer ({SEQ_DEVICE}) and no JACK server running; "
                      f"with no sound hardware, start a JACK server with its dummy driver: "
                      f"{jack_start_commands()}", field="backend")


def _api(backend: str) -> int:
    word = choose_backend(backend)
    api = BACKENDS[word][0]
    if api not in rtmidi.get_compiled_api():
        raise Unavailable(f"this python-rtmidi has no {word} support", field="backend")
    return api


def _rt_error(exc: Exception, what: str, backend: str) -> Unavailable:
    word = backend_word(backend)
    hint = (f" (is a JACK server running? set JACK_DEFAULT_SERVER for a named one; with no sound "
            f"hardware: {jack_start_commands()})"
            if word == "jack" else f" (is {SEQ_DEVICE} there? the ALSA sequencer needs it; --backend auto "
            f"takes a JACK server when there is none)")
    return Unavailable(f"{what}: {exc}{hint}", field="backend")


_quiet_library = quiet_library        # fd 2 quiet while a client opens (retuner.live.backend)


def _new_in(backend: str, client_name: str, queue_size: int = 1024) -> rtmidi.MidiIn:
    try:
        with _quiet_library():
            return rtmidi.MidiIn(_api(backend), client_name, queue_size)
    except rtmidi.SystemError as exc:  # type: ignore[attr-defined]
        raise _rt_error(exc, f"cannot open the {backend_word(backend)} MIDI system", backend) from exc


def _new_out(backend: str, client_name: str) -> rtmidi.MidiOut:
    try:
        with _quiet_library():
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


def closest(spec: str, names: Sequence[str], exclude: Sequence[str] = (), n: int = 3) -> list[str]:
    """The ``n`` names most like ``spec`` (a misspelt name, a pattern that matches nothing),
    best first, without regard to case or ALSA's client:port numbers."""
    cand = [x for x in names if not any(x.startswith(e) for e in exclude)]
    want = spec.lower().strip("*?[]")

    def likeness(name: str) -> float:
        plain = strip_alsa_numbers(name).lower()
        whole = difflib.SequenceMatcher(None, want, plain).ratio()
        # a name given as part of a longer one ("Piano" for "Stage Piano:MIDI Out"): its best part
        parts = max((difflib.SequenceMatcher(None, want, p).ratio() for p in re.split(r"[:\s]+", plain) if p),
                    default=0.0)
        return max(whole, parts)
    return sorted(cand, key=lambda x: -likeness(x))[:n]


def closest_hint(spec: str, names: Sequence[str], exclude: Sequence[str] = ()) -> str:
    """For the "no such port" line: "; closest: 'a', 'b'" or "; there are no ports"."""
    near = closest(spec, names, exclude)
    if not near:
        return "; there are no ports at all yet"
    return "; closest existing: " + ", ".join(repr(x) for x in near)


class PortLister:
    """Lists the ports of one backend; keeps its two probe clients open between calls.

    ``inputs()`` are the ports retuner can read from (other programs' outputs),
    ``outputs()`` the ports it can write to. Thread-safe."""

    def __init__(self, backend: str, client_name: str = "retuner-probe"):
        self.backend = choose_backend(backend)
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


def is_own(name: str, base: str = "retuner") -> bool:
    """Whether a listed port is one of a retuner daemon's own (client ``BASE``; ALSA through
    python-rtmidi: clients ``BASE-in``/``BASE-out``)."""
    return name.startswith((f"{base}-", f"{base}:"))


def alsa_midi_loads() -> bool:
    """Whether alsa-midi (and libasound under it) loads."""
    try:
        alsaseq.alsa_module()
    except (ImportError, OSError):
        return False
    return True


def make_backend(backend: str, base: str = "retuner") -> PortBackend:
    """The backend a daemon named ``base`` uses: one client ``base`` with the ports ``in`` and
    ``out``, on the ALSA sequencer through alsa-midi or on a JACK server through JACK-Client. Where
    alsa-midi does not load, the ALSA sequencer through python-rtmidi (a client per port)."""
    word = choose_backend(backend)
    if word == "jack":
        return jackmidi.JackBackend(base, error=lambda exc, what: _rt_error(exc, what, "jack"))
    if alsa_midi_loads():
        return alsaseq.AlsaSeqBackend(base, error=lambda exc, what: _rt_error(exc, what, "alsa"))
    log.info("alsa-midi does not load: python-rtmidi serves the ALSA sequencer, with a client per port")
    return RtMidiBackend(word, f"{base}-probe")


def list_ports(backend: str, base: str = "retuner-probe") -> tuple[list[str], list[str]]:
    """(inputs, outputs) as the backend names them."""
    lister = make_backend(backend, base)
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


class InputPort(InputHandle):
    """An open ALSA input; ``callback(msg)`` runs on python-rtmidi's input thread for every parsed
    message. ``on_error(exc, data)`` is called (also on that thread) for bytes that do not parse.

    (JACK is served by retuner.live.jackmidi: a python-rtmidi callback would run on JACK's process
    thread, which would then wait for Python's interpreter lock, and closing the port, which holds
    that lock while it waits for the process cycle, could hang.)"""

    def __init__(self, backend: str, client_name: str, port_name: str, *,
                 connect_to: Optional[str] = None,
                 callback: Callable[[mido.Message], None],
                 on_error: Optional[Callable[[Exception, list], None]] = None):
        self.backend = choose_backend(backend)
        self.connected_to = connect_to
        self._callback = callback
        self._on_error = on_error
        self._rt = _new_in(self.backend, client_name, queue_size=4096)
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
        deliver(event[0], self._callback, self._on_error)

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


class OutputPort(OutputHandle):
    """An open ALSA output; ``send(msg)`` writes at once (the sequencer delivers it at once too)."""

    def __init__(self, backend: str, client_name: str, port_name: str, *,
                 connect_to: Optional[str] = None):
        self.backend = choose_backend(backend)
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


class RtMidiBackend(PortBackend):
    """The ALSA sequencer, through python-rtmidi (:func:`make_backend` gives JACK to
    retuner.live.jackmidi).

    Client names: python-rtmidi opens one client per port (a MidiIn or a MidiOut each), so each
    side has a client of its own: "retuner-in:in" and "retuner-out:out"."""

    def __init__(self, backend: str, probe_name: str = "retuner-probe"):
        self.word = choose_backend(backend)
        self._probe_name = probe_name
        self._lister: Optional[PortLister] = None
        self._lock = threading.Lock()

    def _list(self) -> PortLister:
        with self._lock:
            if self._lister is None:
                self._lister = PortLister(self.word, self._probe_name)
            return self._lister

    def inputs(self) -> list[str]:
        return self._list().inputs()

    def outputs(self) -> list[str]:
        return self._list().outputs()

    def open_input(self, client, port, *, connect_to, callback, on_error=None) -> InputPort:
        return InputPort(self.word, client, port, connect_to=connect_to, callback=callback,
                         on_error=on_error)

    def open_output(self, client, port, *, connect_to) -> OutputPort:
        return OutputPort(self.word, client, port, connect_to=connect_to)

    def _looker(self, on_change):
        lister = self._list()

        def look():
            try:
                on_change(lister.inputs(), lister.outputs())
            except Exception as exc:  # pragma: no cover - backend trouble
                log.debug("listing ports: %s", exc)
        return look

    def close(self) -> None:
        self._stop_watching()
        with self._lock:
            if self._lister is not None:
                self._lister.close()
                self._lister = None
