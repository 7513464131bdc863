"""The compiled period (retuner/live/jackcycle.c) called directly, with libjack's five MIDI calls played
by Python functions (cffi callbacks): every run the same, no server, no threads.

What the stand-in does is what libjack's MIDI API promises (jack/midiport.h, JACK 1.9 API documentation):
``jack_midi_clear_buffer`` must be called on an output buffer every period before writing;
``jack_midi_event_write`` returns non-zero (ENOBUFS) when the event does not fit in this period's buffer;
``jack_midi_event_get`` fills ``time``, ``size`` and ``buffer`` of the ``index``-th event of an input buffer.
"""

from __future__ import annotations

import os

import cffi
import pytest

from retuner.live import jackcycle

IN, OUT = 1, 2                       # the stand-in's port "pointers"


class FakeJack:
    """libjack's MIDI calls: one input port with events to hand over, one output port whose buffer
    takes ``room`` events a period."""

    def __init__(self, room: int = 1000):
        self.ffi = ffi = cffi.FFI()
        ffi.cdef("typedef struct { uint32_t time; size_t size; uint8_t *buffer; } midi_event;")
        ffi.cdef(jackcycle._CDEF)                # the library's own declarations
        path = jackcycle.library_path()
        assert path is not None, "the compiled period was not built (gcc and libc6-dev at install)"
        self.lib = ffi.dlopen(path)
        self.room = room
        self.arriving: list[bytes] = []         # the input buffer of the period to come
        self.written: list[bytes] = []          # everything the output port got, in order
        self.periods: list[list[bytes]] = []    # what it got in each period
        self.cleared = 0
        self._keep = []
        cb = [
            ffi.callback("void *(void *, uint32_t)", lambda port, frames: port),
            ffi.callback("uint32_t (void *)", self._count),
            ffi.callback("int (midi_event *, void *, uint32_t)", self._get),
            ffi.callback("void (void *)", self._clear),
            ffi.callback("int (void *, uint32_t, const uint8_t *, size_t)", self._write),
        ]
        self._callbacks = cb
        self.wake = os.eventfd(0, os.EFD_NONBLOCK | os.EFD_CLOEXEC)
        self.state = self.lib.jackcycle_new([ffi.cast("void *", c) for c in cb], self.wake)

    def _count(self, buf):
        assert int(self.ffi.cast("uintptr_t", buf)) == IN
        return len(self.arriving)

    def _get(self, event, buf, index):
        data = self.ffi.new("uint8_t[]", self.arriving[index])
        self._keep.append(data)
        event.time, event.size, event.buffer = 0, len(self.arriving[index]), data
        return 0

    def _clear(self, buf):
        assert int(self.ffi.cast("uintptr_t", buf)) == OUT
        self.cleared += 1
        self.periods.append([])

    def _write(self, buf, time, data, size):
        assert self.periods, "written before the buffer was cleared in this period"
        if len(self.periods[-1]) >= self.room or len(self.written) > 100_000:
            return 105                             # ENOBUFS
        got = bytes(self.ffi.buffer(data, size))
        self.periods[-1].append(got)
        self.written.append(got)
        return 0

    # ------------------------------------------------------------------ driving it
    def open(self, *, inp=True, out=True):
        p = self.ffi.cast
        if inp:
            self.lib.jackcycle_set(self.state, 1, 0, p("void *", IN))
        if out:
            self.lib.jackcycle_set(self.state, 0, 0, p("void *", OUT))

    def period(self, arriving=()):
        self.arriving = [bytes(a) for a in arriving]
        assert self.lib.jackcycle_process(128, self.state) == 0
        self.arriving = []
        self._keep.clear()

    def send(self, data: bytes) -> int:
        return self.lib.jackcycle_send(self.state, 0, data, len(data))

    def take_all(self) -> list[tuple[int, bytes]]:
        into, slot = self.ffi.new("uint8_t[]", 1 << 16), self.ffi.new("int *")
        got = []
        while len(got) < 20_000 and (n := self.lib.jackcycle_take(self.state, into, 1 << 16, slot)):
            got.append((slot[0], bytes(self.ffi.buffer(into, n))))
        return got

    def woken(self) -> int:
        try:
            return os.eventfd_read(self.wake)
        except BlockingIOError:
            return 0

    def close(self):
        self.lib.jackcycle_free(self.state)
        os.close(self.wake)


@pytest.fixture
def jack():
    j = FakeJack()
    yield j
    j.close()


def note(i: int) -> bytes:
    return bytes([0x90 | (i % 16), 36 + i % 60, 1 + i % 126])


def test_what_is_sent_goes_out_in_order_across_the_rings_end(jack):
    jack.open()
    sent = []
    for i in range(40_000):                 # 7 bytes a record: the 64 KiB ring wraps round four times
        sent.append(note(i))
        assert jack.send(sent[-1]) == 0
        if i % 500 == 499:
            jack.period()
    jack.period()
    assert jack.written == sent
    assert jack.lib.jackcycle_queued(jack.state, 0) == 0


def test_an_event_that_does_not_fit_waits_for_the_next_period_in_order():
    jack = FakeJack(room=3)
    try:
        jack.open()
        sent = [note(i) for i in range(10)]
        for s in sent:
            jack.send(s)
        for _ in range(3):
            jack.period()
        assert [len(p) for p in jack.periods] == [3, 3, 3]
        jack.period()
        assert [len(p) for p in jack.periods] == [3, 3, 3, 1]
        assert jack.written == sent
        assert jack.cleared == 4                 # the buffer is cleared every period
    finally:
        jack.close()


def test_an_output_buffer_is_cleared_every_period_even_with_nothing_to_write(jack):
    jack.open()
    for _ in range(5):
        jack.period()
    assert jack.cleared == 5 and jack.written == []
    assert jack.lib.jackcycle_periods(jack.state) == 5


def test_a_system_exclusive_message_goes_whole_though_it_wraps_round(jack):
    # a MIDI Tuning Standard bulk tuning dump is 408 bytes from F0 to F7 (MIDI Tuning Standard,
    # MMA 1992: 128 notes of 3 bytes, name, header and checksum)
    dump = bytes([0xF0, 0x7E, 0x7F, 0x08, 0x01, 0x00]) + bytes(401) + bytes([0xF7])
    assert len(dump) == 408
    jack.open()
    for i in range(9300):                   # bring the ring's position near its end
        jack.send(note(i))
        if i % 1000 == 999:
            jack.period()
    jack.period()
    for _ in range(300):
        assert jack.send(dump) == 0
        jack.period()
    assert jack.written[-300:] == [dump] * 300


def test_a_full_out_ring_refuses_and_takes_again_once_written(jack):
    jack.open()
    n = 0
    while n < 20_000 and jack.send(note(n)) == 0:
        n += 1
    assert 9000 < n < 9400                  # 65536 bytes / (4-byte head + 3 bytes)
    jack.period()                           # 1000 events go out: room for them
    assert jack.send(note(n)) == 0
    for _ in range(20):
        if not jack.lib.jackcycle_queued(jack.state, 0):
            break
        jack.period()
    assert jack.written == [note(i) for i in range(n + 1)]


def test_too_large_or_empty_events_are_refused(jack):
    jack.open()
    assert jack.send(bytes(jackcycle.LARGEST + 1)) == -1
    assert jack.send(b"") == -1
    assert jack.send(bytes(jackcycle.LARGEST)) == 0


def test_what_arrives_is_handed_over_in_order_and_wakes_the_reader(jack):
    jack.open()
    jack.period()
    assert jack.woken() == 0                # an idle period wakes nobody
    jack.period([note(1), note(2)])
    jack.period([bytes([0xF0, 1, 2, 3, 0xF7])])
    assert jack.woken() == 2                # one wake a period that heard something
    assert jack.take_all() == [(0, note(1)), (0, note(2)), (0, bytes([0xF0, 1, 2, 3, 0xF7]))]
    assert jack.take_all() == []


def test_arrivals_beyond_the_ring_are_dropped_and_counted(jack):
    jack.open()
    burst = [note(i) for i in range(10_000)]
    jack.period(burst)
    kept = jack.take_all()
    dropped = jack.lib.jackcycle_dropped(jack.state)
    assert len(kept) + dropped == len(burst) and dropped > 0
    assert [d for _, d in kept] == burst[:len(kept)]
    jack.period([note(3)])                  # and the ring takes again once read
    assert jack.take_all() == [(0, note(3))]


def test_a_port_taken_away_is_not_touched(jack):
    jack.open()
    jack.send(note(1))
    jack.lib.jackcycle_set(jack.state, 0, 0, jack.ffi.NULL)
    jack.lib.jackcycle_set(jack.state, 1, 0, jack.ffi.NULL)
    jack.period([note(2)])                   # _count / _clear would see a call: none comes
    assert jack.cleared == 0 and jack.written == [] and jack.take_all() == []
    jack.open(inp=False)                     # the slot again: its ring starts empty
    jack.period()
    assert jack.written == []
