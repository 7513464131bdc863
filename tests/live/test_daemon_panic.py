"""Panic silences the synth whatever retuner believes; outages and passthrough leave nothing hanging.
In-process (tests/daemonrig.py: ports in memory, a clock the test moves).

Sources: MIDI 1.0 Detailed Specification: CC64 sustain (damper) and CC66 sostenuto, 0 = up (values
0-63 are off); CC123 All Notes Off and CC120 All Sound Off (channel mode messages, value 0); a note-on
with velocity 0 is a note-off; All Notes Off does not end notes held by a sustain pedal, so the pedal
goes up first (MIDI 1.0, channel mode messages: "notes ... sustained by the pedal remain on until the
pedal is released", from memory).
"""

from __future__ import annotations

import signal

import mido

from daemonrig import KEYS, SYNTH, Rig, cc, note_off, note_on
from retuner.control.protocol import Command

ALL = range(16)


def silenced(msgs: list[mido.Message], channels=ALL, sound_off: bool = False) -> bool:
    """Every channel got pedals up (CC64 0, CC66 0) and, after the pedal, All Notes Off (CC123 0);
    All Sound Off (CC120 0) as well when ``sound_off``."""
    for ch in channels:
        ccs = [m.control for m in msgs if m.type == "control_change" and m.channel == ch and m.value == 0]
        if 64 not in ccs or 66 not in ccs or 123 not in ccs:
            return False
        last_all_off = len(ccs) - 1 - ccs[::-1].index(123)
        if ccs.index(64) > last_all_off:
            return False
        if sound_off and 120 not in ccs:
            return False
    return True


def explicit_off(msgs, ch: int, key: int) -> bool:
    return any(m.channel == ch and m.note == key and (m.type == "note_off" or m.velocity == 0)
               for m in msgs if m.type in ("note_on", "note_off"))


def test_ctl_panic_silences_every_channel_even_with_nothing_tracked():
    """After a crash and restart retuner knows of nothing, yet the synth may still sound."""
    r = Rig("profile: edo12\n", control=True)
    try:
        r.backend.clear()
        reply = r.daemon.control.apply(Command("panic", {}))
        assert reply["released"] == 0
        assert silenced(r.sent())
        assert not any(m.type == "control_change" and m.control == 120 for m in r.sent())
    finally:
        r.close()


def test_all_sound_off_only_where_the_user_allows_it():
    r = Rig("profile: edo12\npanic_all_sound_off: true\n", control=True)
    try:
        r.backend.clear()
        r.daemon.control.apply(Command("panic", {}))
        assert silenced(r.sent(), sound_off=True)
    finally:
        r.close()


def test_sigterm_silences_every_channel_and_ends_tracked_notes():
    r = Rig("profile: edo12\n")
    r.play(note_on(60), note_on(64))
    r.backend.clear()
    assert r.signal(signal.SIGTERM) is True
    sent = r.sent()
    assert silenced(sent)
    held = [n for n in r.decode().notes]
    assert not held or all(n.t_off is not None for n in held)
    r.close()


def test_start_up_silences_before_the_setup():
    r = Rig("profile: edo12\n")
    try:
        sent = r.sent()
        first_rpn = next(i for i, m in enumerate(sent) if m.type == "control_change" and m.control == 101)
        assert silenced(sent[:first_rpn])
    finally:
        r.close()


def test_output_reconnect_gets_the_panic_set_then_the_setup_and_no_ghost_pedal():
    r = Rig("profile: edo12\n")
    try:
        r.play(cc(64, 127), note_on(60))
        r.backend.unplug(SYNTH)
        r.pump()
        r.play(note_off(60), cc(64, 0))          # the pedal goes up while the synth is away
        r.backend.clear()
        r.backend.plug(SYNTH, output=True)
        r.pump()
        sent = r.sent()
        first_rpn = next(i for i, m in enumerate(sent) if m.type == "control_change" and m.control == 101)
        assert silenced(sent[:first_rpn])
        assert not [m for m in sent if m.type == "control_change" and m.control == 64 and m.value >= 64]
        r.play(note_on(62), note_off(62))
        assert not [m for m in r.sent() if m.type == "control_change" and m.control == 64 and m.value >= 64]
    finally:
        r.close()


def test_a_pedal_held_through_an_outage_is_sent_again():
    r = Rig("profile: edo12\n")
    try:
        r.backend.unplug(SYNTH)
        r.pump()
        r.play(cc(64, 127))                      # pressed while the synth is away
        r.backend.clear()
        r.backend.plug(SYNTH, output=True)
        r.pump()
        assert [m for m in r.sent() if m.type == "control_change" and m.control == 64 and m.value >= 64]
    finally:
        r.close()


PASS = "profile: edo12\nengine: {passthrough: [10]}\n"       # channel 10 (wire 9) passes unchanged


def test_passthrough_notes_are_released_by_panic():
    r = Rig(PASS, control=True)
    try:
        r.play(note_on(36, channel=9), note_on(60))
        assert [m for m in r.sent() if m.type == "note_on" and m.channel == 9]
        r.backend.clear()
        reply = r.daemon.control.apply(Command("panic", {}))
        assert explicit_off(r.sent(), 9, 36)
        assert reply["released"] == 2
    finally:
        r.close()


def test_passthrough_notes_are_released_by_sigterm():
    r = Rig(PASS)
    r.play(note_on(36, channel=9))
    r.backend.clear()
    r.signal(signal.SIGTERM)
    assert explicit_off(r.sent(), 9, 36)
    r.close()


def test_passthrough_notes_are_released_when_the_input_is_lost():
    r = Rig(PASS)
    try:
        r.play(note_on(36, channel=9), note_on(38, channel=9), note_off(38, channel=9))
        r.backend.clear()
        r.backend.unplug(KEYS)
        r.pump()
        assert explicit_off(r.sent(), 9, 36)
        assert not explicit_off(r.sent(), 9, 38)       # already ended: no second note-off
    finally:
        r.close()


def test_passthrough_notes_are_released_when_a_reload_removes_the_passthrough():
    r = Rig(PASS)
    try:
        r.play(note_on(36, channel=9))
        r.write_config("profile: edo12\nengine: {passthrough: []}\n")
        r.backend.clear()
        r.signal(signal.SIGHUP)
        assert explicit_off(r.sent(), 9, 36)
    finally:
        r.close()
