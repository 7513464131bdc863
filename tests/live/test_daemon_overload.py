"""Overload: control and signals never wait behind MIDI; a full input queue drops note-ons, never a
note-off or a pedal-up; drops are counted and logged. In-process (tests/daemonrig.py): these check
order and priority, not wall time (the times under load are measured through JACK by
tools/jack_overload.py).

Sources: MIDI 1.0 Detailed Specification: a note-on with velocity 0 is a note-off; CC64 sustain,
values 0-63 are off."""

from __future__ import annotations

import signal
import threading
import time

from daemonrig import Rig, cc, note_off, note_on
from retuner.commands import ctl as ctl_cmd
from retuner.control.client import ControlClient


def burst(pairs: int, channels: int = 8) -> list:
    """Notes struck and released, spread over keys and channels, as a flood of input."""
    out = []
    for i in range(pairs):
        ch, key = i % channels, 36 + (i // channels) % 48
        out += [note_on(key, ch), note_off(key, ch)]
    return out


def test_sigterm_goes_before_midi_already_waiting():
    r = Rig("profile: edo12\n")
    r.send(*burst(600))
    r.daemon.post_signal(signal.SIGTERM)
    assert r.daemon.step(wait=False) is True        # the first turn of the loop stops it
    r.stopped = True
    assert r.daemon.engine.stats["notes"] < 600     # the waiting MIDI was not all played first
    assert r.decode().stuck() == []
    r.close()


def test_panic_goes_before_midi_already_waiting_and_discards_it():
    r = Rig("profile: edo12\n", control=True)
    try:
        r.send(*burst(600))
        replies = []
        t = threading.Thread(target=lambda: replies.append(ControlClient(r.socket_path).request("panic")))
        t.start()
        end = time.monotonic() + 10
        while not r.daemon.control_server.has_pending():      # the server thread has queued it
            assert time.monotonic() < end
            time.sleep(0.001)
        r.daemon.step(wait=False)
        t.join(10)
        assert replies and replies[0]["ok"] is True
        assert r.daemon.engine.stats["notes"] < 600
        r.pump()
        assert r.daemon.engine.stats["notes"] < 600     # what waited before the panic never sounds
        assert r.decode().stuck() == []
    finally:
        r.close()


def test_a_full_queue_drops_note_ons_and_keeps_every_release():
    r = Rig("profile: edo12\n", capacity=64)
    try:
        msgs = [cc(64, 127, ch) for ch in range(4)]
        msgs += [note_on(40 + i % 40, i % 4) for i in range(200)]           # far more than fit
        msgs += [note_off(40 + i % 40, i % 4) for i in range(200)]
        msgs += [cc(64, 0, ch) for ch in range(4)]
        r.send(*msgs)
        r.pump()
        d = r.decode()
        assert d.notes                                   # some notes got through ...
        assert d.stuck() == []                           # ... and every one of them was released
        for ch in {n.channel for n in d.notes}:
            pedal = [m.value for m in r.sent() if m.type == "control_change" and m.control == 64
                     and m.channel == ch]
            assert pedal and pedal[-1] == 0              # no pedal left down
        dropped = r.daemon.status()["input_dropped"]
        assert dropped["note_on"] > 0 and dropped["release"] == 0
        assert "dropped" in r.daemon._status_text()
        shown = ctl_cmd._fmt_status({**r.daemon.status(), "counters": {}})      # what 'retuner ctl status' prints
        assert f"{dropped['note_on']} note-ons" in shown and "0 releases" in shown
        assert r.log.count("input overload") == 1
    finally:
        r.close()


def test_the_overload_line_is_logged_at_most_once_a_second():
    r = Rig("profile: edo12\n", capacity=16)
    try:
        for _ in range(3):
            r.send(*burst(50))
            r.pump()
            r.clock.advance(0.3)
        r.pump()
        assert r.log.count("input overload") == 1
        r.clock.advance(1.0)
        r.send(*burst(50))
        r.pump()
        r.clock.advance(1.0)
        r.pump()
        assert r.log.count("input overload") == 2
    finally:
        r.close()


def test_the_queue_policy_message_by_message():
    from retuner.live.inputqueue import InputQueue
    q = InputQueue(capacity=4)
    assert q.put(0.0, note_on(60)) is True               # was empty: wake the engine thread
    for k in (61, 62, 63):
        assert q.put(0.0, note_on(k)) is False
    q.put(0.0, note_on(64))                              # full: dropped ...
    q.put(0.0, note_off(64))                             # ... and so is its note-off
    q.put(0.0, note_off(61))                             # a release makes room: the oldest
    q.put(0.0, cc(64, 0))                                # note-on goes (60), then 61 with its note-off
    kept = [(m.type, getattr(m, "note", None)) for _, m in q.take(10)]
    assert kept == [("note_on", 62), ("note_on", 63), ("control_change", None)]
    assert q.counts() == {"note_on": 3, "other": 0, "release": 0}
    q.put(0.0, note_off(60))                             # 60's note-on was dropped: owed, swallowed
    q.put(0.0, note_off(62))                             # 62 was played: its note-off goes through
    assert [m.note for _, m in q.take(10)] == [62]
    # only releases waiting: they are kept up to twice the capacity
    for k in range(8):
        q.put(0.0, note_off(k))
    assert len(q) == 8 and q.counts()["release"] == 0
    q.put(0.0, note_off(99))
    assert q.counts()["release"] == 1
