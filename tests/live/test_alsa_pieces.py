"""The ALSA backend joins a system exclusive message that comes in several sequencer events.

The sequencer hands a hardware port's system exclusive bytes on in pieces as they arrive (the kernel's
bridge from raw MIDI to the sequencer sends what it has; from memory of Linux sound/core/seq/seq_midi.c,
common practice of ALSA), while a program's own message comes whole (tests/live/test_alsa_vm.py).
A message from F0 to F7 is what the daemon needs whole (MIDI 1.0: a system exclusive message ends with
EOX, F7; a status byte other than a real-time one ends it too)."""

from __future__ import annotations

from retuner.live.alsaseq import AlsaSeqInput


class _Owner:
    _inputs: dict = {}


def _input():
    got, bad = [], []
    handle = AlsaSeqInput(_Owner(), port=None, connect_to=None, callback=lambda m: got.append(list(m.bytes())),
                          on_error=lambda exc, data: bad.append(data))
    return handle, got, bad


def test_pieces_of_a_bulk_tuning_dump_are_handed_on_whole_once():
    dump = bytes([0xF0, 0x7E, 0x7F, 0x08, 0x01, 0x00] + [i % 128 for i in range(401)] + [0xF7])
    handle, got, bad = _input()
    for start in range(0, len(dump), 256):
        handle.take(dump[start:start + 256])
    assert got == [list(dump)] and bad == []


def test_messages_around_the_pieces_pass_as_they_are():
    handle, got, bad = _input()
    handle.take(bytes([0x90, 60, 100]))
    handle.take(bytes([0xF0, 0x7D, 1, 2]))
    handle.take(bytes([3, 4, 0xF7]))
    handle.take(bytes([0x80, 60, 0]))
    assert got == [[0x90, 60, 100], [0xF0, 0x7D, 1, 2, 3, 4, 0xF7], [0x80, 60, 0]]


def test_a_piece_with_no_start_is_not_a_message():
    handle, got, bad = _input()
    handle.take(bytes([3, 4, 0xF7]))            # its F0 never came (the port was connected late)
    handle.take(bytes([0x90, 61, 90]))
    assert got == [[0x90, 61, 90]]


def test_a_status_byte_ends_an_unfinished_message_and_passes_real_time_bytes_between_pieces():
    handle, got, bad = _input()
    handle.take(bytes([0xF0, 0x7D, 1]))
    handle.take(bytes([0xF8]))                  # timing clock between pieces (MIDI 1.0 real-time)
    handle.take(bytes([2, 0xF7]))
    handle.take(bytes([0xF0, 0x7D, 5]))         # cut short: a note-on's status byte ends it
    handle.take(bytes([0x90, 62, 80]))
    handle.take(bytes([6, 0xF7]))               # the rest is no message any more
    assert got == [[0xF8], [0xF0, 0x7D, 1, 2, 0xF7], [0x90, 62, 80]]
