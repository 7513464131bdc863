"""The JACK backend's work in each period: in C when it was built at install, else in Python.

JACK calls a client's process callback once every period on a thread of its own. What retuner does
there is the same in both ways (:data:`PERIODS`):

* write what the engine sent since the last period into each out port, at the start of the period
  (an event its buffer has no room for waits for the next period), and
* read what arrived on each in port and hand each message to that input's callback (the daemon
  then stamps it, queues it and wakes its engine thread).

So a note-on that arrives in one period goes out, retuned, in the next one, either way.

``native`` (:class:`NativePeriod`): ``jackcycle.c``, compiled when retuner is installed (setuptools,
as an optional extension: with no C compiler the install goes on without it). A period runs no
Python: arriving events go into a ring and an eventfd wakes a reader thread of ours, which
hands them on; what the engine sends goes into a ring per out port. An idle period costs what JACK
costs any client with a process callback (its thread woken once a period) and a few C calls.

``python`` (:class:`PythonPeriod`): the process callback is a Python function (cffi calls it on
JACK's thread, taking the interpreter lock every period): about twice the idle cost, same latency.

:func:`choose` takes ``native`` when the library is there and JACK-Client's libjack handle serves
it, else ``python``.
"""

from __future__ import annotations

import collections
import glob
import importlib.machinery
import logging
import os
import threading
import time
from typing import Callable, Optional

from retuner.live.backend import Callback, ErrorCallback, deliver

log = logging.getLogger("retuner.live.jackcycle")

SLOTS = 16                 # ports of each direction a native period serves (jackcycle.c: SLOTS)
RING = 1 << 16             # bytes in each of its rings (jackcycle.c: RING)
LARGEST = RING // 2 - 4    # the largest event a ring takes (jackcycle.c: LARGEST)
SEND_WAIT = 2.0            # seconds a send waits for room in a full out ring before it fails

_CDEF = """
void *jackcycle_new(void *const calls[5], int wake_fd);
void jackcycle_free(void *c);
int jackcycle_process(uint32_t frames, void *arg);
void jackcycle_set(void *c, int is_input, int slot, void *port);
int jackcycle_send(void *c, int slot, const uint8_t *data, uint32_t size);
uint32_t jackcycle_queued(void *c, int slot);
uint32_t jackcycle_take(void *c, uint8_t *into, uint32_t room, int *slot);
uint64_t jackcycle_periods(void *c);
uint64_t jackcycle_dropped(void *c);
"""
_LIBRARY: Optional[tuple] = None


def library_path() -> Optional[str]:
    """The compiled ``jackcycle.c`` beside this module (``_jackcycle`` with Python's extension
    suffix, as setuptools names it), or None when it was not built."""
    here = os.path.dirname(os.path.abspath(__file__))
    for suffix in importlib.machinery.EXTENSION_SUFFIXES:
        path = os.path.join(here, "_jackcycle" + suffix)
        if os.path.exists(path):
            return path
    found = sorted(glob.glob(os.path.join(here, "_jackcycle*.so")))
    return found[0] if found else None


def library():
    """``(ffi, lib)`` of the compiled period, or None when it was not built or does not load."""
    global _LIBRARY
    if _LIBRARY is None:
        path = library_path()
        loaded: tuple = ()
        if path is not None:
            try:
                import cffi  # noqa: PLC0415 - JACK-Client's own dependency

                ffi = cffi.FFI()
                ffi.cdef(_CDEF)
                loaded = (ffi, ffi.dlopen(path))
            except (ImportError, OSError, AttributeError) as exc:
                log.warning("the JACK backend's compiled period does not load (%s); it runs in Python", exc)
        _LIBRARY = loaded
    return _LIBRARY or None


class PythonPeriod:
    """A period's work as a Python function (see the module's text)."""

    word = "python"

    def __init__(self, jack):
        self._lib, self._ffi = jack._lib, jack._ffi
        self._event = self._ffi.new("jack_midi_event_t*")
        self._lock = threading.Lock()     # taken by the period and while a table of ports changes
        self._inputs: list = []           # (port pointer, callback, on_error)
        self._outputs: list = []          # (port pointer, deque of bytes)
        self.periods = 0                  # periods run (a drain waits on it)

    def install(self, client) -> None:
        """Set the process callback of a JACK-Client client (not yet active)."""
        client.set_process_callback(self._process_callback())

    def _process_callback(self) -> Callable[[int], None]:
        """The process callback, with everything it uses bound beforehand: libjack is called
        directly (cffi), with the port pointers kept at registration and the period's ``frames``.
        An idle period costs one lock and four C calls."""
        lib, ffi, event = self._lib, self._ffi, self._event
        get, clear = lib.jack_port_get_buffer, lib.jack_midi_clear_buffer
        write, count, take = lib.jack_midi_event_write, lib.jack_midi_get_event_count, lib.jack_midi_event_get
        acquire, release = self._lock.acquire, self._lock.release   # held elsewhere only to change
        me = self                                                   # the port tables, never across a JACK call

        def process(frames: int) -> None:
            acquire()
            try:
                for ptr, queue in me._outputs:
                    buf = get(ptr, frames)
                    clear(buf)                    # every period, before any write (JACK MIDI API)
                    while queue:
                        data = queue[0]
                        if write(buf, 0, data, len(data)):
                            break                 # no room left in this period's buffer
                        queue.popleft()
                for ptr, callback, on_error in me._inputs:
                    buf = get(ptr, frames)
                    n = count(buf)
                    for i in range(n):
                        if take(event, buf, i):
                            break
                        deliver(ffi.buffer(event.buffer, event.size)[:], callback, on_error)
                me.periods += 1
            except Exception:  # noqa: BLE001 - an exception here would make JACK drop the client
                pass
            finally:
                release()
        return process

    def add_input(self, ptr, callback: Callback, on_error: Optional[ErrorCallback]) -> object:
        with self._lock:
            self._inputs.append((ptr, callback, on_error))
        return ptr

    def add_output(self, ptr) -> "_Queue":
        queue = _Queue()
        with self._lock:
            self._outputs.append((ptr, queue.deque))
        queue.key = ptr
        return queue

    def remove(self, key, *, live: bool) -> None:
        """Take a port out of the period's reach (before it is unregistered)."""
        with self._lock:
            self._inputs[:] = [e for e in self._inputs if e[0] != key]
            self._outputs[:] = [e for e in self._outputs if e[0] != key]

    def close(self) -> None:
        with self._lock:
            self._inputs.clear()
            self._outputs.clear()

    release = close


class _Queue:
    """What one out port has still to write: the Python period's deque."""

    def __init__(self):
        self.deque: collections.deque = collections.deque()
        self.key = None

    def send(self, data: bytes) -> None:
        self.deque.append(data)

    def queued(self) -> bool:
        return bool(self.deque)


class NativePeriod:
    """A period's work in C (``jackcycle.c``; see the module's text)."""

    word = "native"

    def __init__(self, jack, loaded=None):
        self._ffi, self._lib = loaded or library()
        self._jack = jack
        jffi, jlib = jack._ffi, jack._lib
        calls = [self._ffi.cast("void*", int(jffi.cast("uintptr_t", getattr(jlib, name))))
                 for name in ("jack_port_get_buffer", "jack_midi_get_event_count", "jack_midi_event_get",
                              "jack_midi_clear_buffer", "jack_midi_event_write")]
        self._wake = os.eventfd(0, os.EFD_CLOEXEC)     # JACK's thread writes it when events came in
        self._state = self._lib.jackcycle_new(calls, self._wake)
        if self._state == self._ffi.NULL:
            os.close(self._wake)
            raise MemoryError("no memory for the JACK backend's rings")
        self._inputs: dict[int, tuple] = {}            # slot -> (callback, on_error)
        self._outputs: dict[int, NativeQueue] = {}     # slot -> its queue
        self._lock = threading.Lock()                  # the two tables
        self._stop = False
        self._reader: Optional[threading.Thread] = None
        self._callback = None                          # kept alive as long as JACK may call it

    @property
    def periods(self) -> int:
        return int(self._lib.jackcycle_periods(self._state))

    def install(self, client) -> None:
        """Make ``jackcycle_process`` the process callback of a JACK-Client client (not yet
        active), with our state as its argument, and start the reader thread."""
        jffi, jlib, ffi = self._jack._ffi, self._jack._lib, self._ffi
        process = int(ffi.cast("uintptr_t", self._lib.jackcycle_process))
        self._callback = jffi.cast("JackProcessCallback", process)
        arg = jffi.cast("void*", int(ffi.cast("uintptr_t", self._state)))
        if jlib.jack_set_process_callback(client._ptr, self._callback, arg):
            raise RuntimeError("JACK refused the process callback")
        self._reader = threading.Thread(target=self._read, name="retuner-jack-in", daemon=True)
        self._reader.start()

    def _read(self) -> None:
        """Wait on the eventfd (no polling); hand every event in the ring to its input's callback."""
        ffi, take, state = self._ffi, self._lib.jackcycle_take, self._state
        into, slot = ffi.new("uint8_t[]", LARGEST), ffi.new("int*")
        while True:
            os.eventfd_read(self._wake)
            if self._stop:
                return
            while True:
                n = take(state, into, LARGEST, slot)
                if n == 0:
                    break
                entry = self._inputs.get(slot[0])
                if entry is not None:
                    deliver(ffi.buffer(into, n)[:], *entry)

    def _free_slot(self, table: dict) -> int:
        for s in range(SLOTS):
            if s not in table:
                return s
        raise RuntimeError(f"at most {SLOTS} ports of each direction on one JACK client")

    def add_input(self, ptr, callback: Callback, on_error: Optional[ErrorCallback]) -> object:
        with self._lock:
            slot = self._free_slot(self._inputs)
            self._inputs[slot] = (callback, on_error)
        self._lib.jackcycle_set(self._state, 1, slot, self._port(ptr))
        return ("in", slot)

    def add_output(self, ptr) -> "NativeQueue":
        with self._lock:
            slot = self._free_slot(self._outputs)
            queue = self._outputs[slot] = NativeQueue(self, slot)
        self._lib.jackcycle_set(self._state, 0, slot, self._port(ptr))
        return queue

    def _port(self, ptr):
        return self._ffi.cast("void*", int(self._jack._ffi.cast("uintptr_t", ptr)))

    def remove(self, key, *, live: bool) -> None:
        """Take a port out of the period's reach; when periods run (``live``), wait until the
        period that may have been using it is over (two periods begun, at most a second), so it
        can be unregistered."""
        side, slot = key
        self._lib.jackcycle_set(self._state, 1 if side == "in" else 0, slot, self._ffi.NULL)
        if live:
            seen, end = self.periods, time.monotonic() + 1.0
            while self.periods < seen + 2 and time.monotonic() < end:
                time.sleep(0.0005)
        with self._lock:
            (self._inputs if side == "in" else self._outputs).pop(slot, None)

    def close(self) -> None:
        """Stop the reader thread (the client is closed by then: no period runs any more)."""
        for slot in list(self._inputs):
            self._lib.jackcycle_set(self._state, 1, slot, self._ffi.NULL)
        for slot in list(self._outputs):
            self._lib.jackcycle_set(self._state, 0, slot, self._ffi.NULL)
        if self._reader is not None and not self._stop:
            self._stop = True
            os.eventfd_write(self._wake, 1)
            self._reader.join(2)

    def release(self) -> None:
        """Free the rings, once JACK can no longer call the period (its client closed)."""
        self.close()
        if self._state is not None and (self._reader is None or not self._reader.is_alive()):
            self._lib.jackcycle_free(self._state)
            self._state = None
            os.close(self._wake)


class NativeQueue:
    """What one out port has still to write: its ring in the native period."""

    def __init__(self, period: NativePeriod, slot: int):
        self._period = period
        self.key = ("out", slot)
        self._slot = slot
        self._lock = threading.Lock()            # one writer at a time (the ring has one producer)

    def send(self, data: bytes) -> None:
        p = self._period
        if len(data) > LARGEST:
            raise ValueError(f"a MIDI event of {len(data)} bytes is larger than the JACK backend takes ({LARGEST})")
        with self._lock:
            end = None
            while p._lib.jackcycle_send(p._state, self._slot, data, len(data)):
                end = end or time.monotonic() + SEND_WAIT
                if time.monotonic() > end:
                    raise ConnectionError("the JACK output is not being read (no process cycle)")
                time.sleep(0.0005)

    def queued(self) -> bool:
        return self._period._lib.jackcycle_queued(self._period._state, self._slot) > 0


PERIODS = {"native": NativePeriod, "python": PythonPeriod}


def choose(jack, asked: Optional[str] = None):
    """The period for a client of ``jack`` (JACK-Client's module): the one ``asked`` for, else
    ``native`` when the compiled library loads and ``jack`` has libjack's calls, else ``python``."""
    if asked is None:
        native = library() is not None and hasattr(jack._lib, "jack_set_process_callback")
        asked = "native" if native else "python"
    return PERIODS[asked](jack)
