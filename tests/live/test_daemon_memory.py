"""The daemon's switching, reload, hotplug, panic and set-up logic, in-process: ports in memory and a
clock the test moves (tests/daemonrig.py). The same paths run end to end through JACK in
test_daemon_jack.py.

Sources: MIDI 1.0 Detailed Specification (RPN 0 = pitch bend sensitivity: CC101 0, CC100 0, CC6
semitones; 14-bit bend, centre 8192; CC64 sustain, CC123 all notes off; a note-on with velocity 0 is
a note-off); temperaments from their published definitions (tests/temperaments.py).
"""

from __future__ import annotations

import math
import signal

import mido
import pytest

from daemonrig import KEYS, SYNTH, Rig, cc, note_off, note_on
from retuner.control.protocol import Command
from temperaments import EDO12, MEANTONE, W3, half_step


def rpn0_sent(msgs) -> bool:
    """Pitch bend sensitivity (RPN 0) announced on some channel: CC101 0, CC100 0, then CC6."""
    sel: dict[int, tuple] = {}
    for m in msgs:
        if m.type != "control_change":
            continue
        if m.control == 101:
            sel[m.channel] = (m.value, sel.get(m.channel, (127, 127))[1])
        elif m.control == 100:
            sel[m.channel] = (sel.get(m.channel, (127, 127))[0], m.value)
        elif m.control == 6 and sel.get(m.channel) == (0, 0):
            return True
    return False


@pytest.fixture
def rig():
    r = Rig("profile: werckmeister-3\n")
    try:
        yield r
    finally:
        r.close()


def test_chord_sounds_at_the_profile_pitch(rig):
    rig.play(note_on(60), note_on(64), note_on(67))
    notes = rig.decode().stuck()
    assert sorted(n.key for n in notes) == [60, 64, 67]
    for n in notes:
        assert abs(n.cents - W3[n.key]) <= half_step(2)


def test_output_vanishes_and_returns_with_the_setup(rig):
    rig.play(note_on(60), note_on(64))
    rig.backend.unplug(SYNTH)
    rig.pump()
    assert rig.daemon.outp is None
    assert rig.log.count("is gone") == 1
    rig.backend.clear()
    rig.backend.plug(SYNTH, output=True)
    rig.pump()
    assert rig.daemon.outp is not None and rig.daemon.outp.connected_to == SYNTH
    assert rpn0_sent(rig.sent())                     # the set-up again, before any note
    rig.play(note_on(67))
    (n,) = [n for n in rig.decode().notes if n.key == 67]
    assert abs(n.cents - W3[67]) <= half_step(2)


def test_input_vanishes_its_notes_are_released_and_it_comes_back(rig):
    rig.play(note_on(60), note_on(64), note_on(67))
    assert len(rig.decode().stuck()) == 3
    rig.backend.unplug(KEYS)
    rig.pump()
    assert rig.daemon.inp is None
    assert rig.decode().stuck() == []
    rig.backend.plug(KEYS, output=False)
    rig.pump()
    assert rig.daemon.inp is not None and rig.daemon.inp.connected_to == KEYS
    rig.play(note_on(62))
    assert [n.key for n in rig.decode().stuck()] == [62]


def test_program_change_and_ab_switch():
    r = Rig("profile: werckmeister-3\n"
            "profiles: [edo12, meantone-quarter, werckmeister-3]\n"
            "switch: {channel: 16, ab_cc: 80, ab: [meantone-quarter, edo12]}\n")
    try:
        r.play(note_on(64))
        # program change 2 (wire value 1) on channel 16 (wire 15) selects the 2nd profile
        r.play(mido_program(1, channel=15), note_on(68))
        d = r.decode()
        assert abs(d.notes[0].cents - W3[64]) <= half_step(2)       # the held note kept its pitch
        assert abs(d.notes[1].cents - MEANTONE[68]) <= half_step(2)
        assert not [m for m in r.sent() if m.type == "program_change"]
        # A/B pressed: meantone-quarter -> edo12; pressed again: back
        r.play(cc(80, 127, 15), cc(80, 0, 15), note_on(70))
        r.play(cc(80, 127, 15), note_on(75))
        d = r.decode()
        assert abs(d.notes[2].cents - EDO12[70]) <= half_step(2)
        assert abs(d.notes[3].cents - MEANTONE[75]) <= half_step(2)
        assert r.log.count("profile: meantone-quarter (program change 2)") == 1
    finally:
        r.close()


def mido_program(program: int, channel: int):
    return mido.Message("program_change", program=program, channel=channel)


def test_sighup_reloads_the_config_and_a_broken_one_keeps_the_old(rig):
    rig.write_config("profile: meantone-quarter\n")
    assert rig.signal(signal.SIGHUP) is False
    rig.play(note_on(68))
    (n,) = rig.decode().stuck()
    assert abs(n.cents - MEANTONE[68]) <= half_step(2)
    rig.write_config("profile: [not, a, profile\n")
    rig.signal(signal.SIGHUP)
    assert rig.log.count("reload failed") == 1
    rig.play(note_on(63))
    assert abs([n for n in rig.decode().stuck() if n.key == 63][0].cents - MEANTONE[63]) <= half_step(2)


def test_sigterm_releases_every_note_and_stops(rig):
    rig.play(note_on(60), note_on(64), cc(64, 127), note_on(67), note_off(67))
    assert rig.signal(signal.SIGTERM) is True
    d = rig.decode()
    assert d.stuck() == []
    assert d.notes and all(n.t_off is not None for n in d.notes)


def test_setup_is_sent_again_after_a_quiet_spell_on_our_own_port():
    """Our own output port cannot see who connects: after a quiet spell the set-up is sent again
    before the next note, but never while something sounds or rings."""
    r = Rig("profile: werckmeister-3\nsetup_refresh: 1\n", named=False)
    try:
        assert rpn0_sent(r.sent())
        r.backend.clear()
        r.play(note_on(64))
        assert [m.type for m in r.sent()][-1] == "note_on"
        assert not rpn0_sent(r.sent())           # just started: no quiet spell yet
        r.play(note_off(64))
        r.wait(0.5)
        r.play(note_on(65), note_off(65))
        assert not rpn0_sent(r.sent())           # 0.5 s of quiet is not enough
        r.wait(5.0)
        r.backend.clear()
        r.play(note_on(67))
        sent = r.sent()
        first_note = next(i for i, m in enumerate(sent) if m.type == "note_on")
        assert rpn0_sent(sent[:first_note])
        (n,) = r.decode().stuck()
        assert abs(n.cents - W3[67]) <= half_step(2)
    finally:
        r.close()


def test_reference_pitch_check():
    # the tables the checks above use: quarter-comma meantone's major third C-E is pure (5/4)
    assert MEANTONE[64] - MEANTONE[60] == pytest.approx(1200 * math.log2(5 / 4), abs=1e-9)


def test_a_misspelt_port_lists_the_closest_names_once_and_keeps_waiting():
    others = ("Midi Through:Port-0", "Drum Pads:Out 1", KEYS, "Pedal Board:MIDI Out")
    r = Rig("profile: edo12\n", inputs=others, input_name="Stage Pinao")
    try:
        lines = [line for line in r.log.lines if "no such port" in line]
        assert len(lines) == 1 and "Stage Pinao" in lines[0]
        assert f"closest existing: {KEYS!r}" in lines[0]          # the likest name first
        r.backend.plug("Sequencer:Out", output=False)      # the lists change: no second line
        r.pump()
        assert r.log.count("no such port") == 1
        assert r.daemon.inp is None
        r.backend.plug("Stage Pinao 2:MIDI Out", output=False)   # a port of that name appears
        r.pump()
        assert r.daemon.inp is not None and r.daemon.inp.connected_to == "Stage Pinao 2:MIDI Out"
    finally:
        r.close()


def test_a_transpose_from_the_control_socket_survives_a_program_change():
    """The session owns the tuning in force: switching profile by program change keeps the cents
    shift given over the control socket (A4 = 440 Hz, ISO 16, in both profiles; +10 c on top)."""
    r = Rig("profile: edo12\nprofiles: [edo12, just-5limit]\nswitch: {channel: 16}\n", control=True)
    try:
        reply = r.daemon.control.apply(Command("transpose", {"cents": 10.0}))
        assert reply["transpose_cents"] == 10.0
        r.play(mido_program(1, channel=15), note_on(69))
        (n,) = r.decode().stuck()
        assert abs(n.cents - (6900.0 + 10.0)) <= half_step(2)
        assert r.daemon.control.status()["profile"] == "just-5limit"
    finally:
        r.close()
