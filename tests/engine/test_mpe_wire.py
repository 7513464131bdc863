"""MPE on the wire, checked against the MPE specification and MIDI 1.0.

Sources:
- MIDI Polyphonic Expression (MPE) specification, v1.0, The MIDI Association, 2018:
  the MPE Configuration Message (MCM) is RPN 6 (CC101 = 0, CC100 = 6) sent on a zone's
  manager channel -- channel 1 for the lower zone, channel 16 for the upper zone -- with
  data entry MSB (CC6) = number of member channels (0 turns the zone off; 1..15); the lower
  zone's members are channels 2..N+1, the upper zone's 15 down to 16-N; default pitch bend
  range 48 semitones on member channels and 2 semitones on the manager channel, changed by
  RPN 0 on a member (applies to all members) or on the manager.
- MIDI 1.0 Detailed Specification: an RPN is selected by CC101 (MSB) and CC100 (LSB) in any
  order; data entry CC6 (MSB) / CC38 (LSB) then set the selected parameter; RPN null
  (127/127) deselects. Pitch bend is 14-bit, centre 8192.

The stream is read by an RPN decoder written out here from those rules, independently of
retuner's encoder.
"""

from __future__ import annotations

import pytest

from retuner.midi import encode


class RpnReader:
    """MIDI 1.0 RPN semantics: which parameter each data entry sets, per channel."""

    def __init__(self):
        self.selected: dict[int, list] = {}
        self.values: dict[tuple[int, tuple[int, int]], list] = {}
        self.log: list[tuple[int, tuple[int, int], int]] = []  # (channel, rpn, data entry MSB)

    def feed(self, msg) -> None:
        if msg.type != "control_change":
            return
        ch = msg.channel
        sel = self.selected.setdefault(ch, [None, None])
        if msg.control == 101:
            sel[0] = msg.value
        elif msg.control == 100:
            sel[1] = msg.value
        elif msg.control in (98, 99):  # an NRPN selection replaces the RPN one
            sel[0] = sel[1] = None
        elif msg.control in (6, 38):
            if None in sel or tuple(sel) == (127, 127):
                return
            num = tuple(sel)
            v = self.values.setdefault((ch, num), [None, None])
            if msg.control == 6:
                v[0] = msg.value
                self.log.append((ch, num, msg.value))
            else:
                v[1] = msg.value

    def feed_all(self, msgs) -> "RpnReader":
        for m in msgs:
            self.feed(m)
        return self

    def final_selection_is_null(self, ch: int) -> bool:
        return tuple(self.selected.get(ch, (127, 127))) == (127, 127)


MCM = (0, 6)   # MPE spec: RPN 6 = MPE Configuration Message
PBS = (0, 0)   # MIDI 1.0: RPN 0 = pitch bend sensitivity


@pytest.mark.parametrize("manager, members", [(0, 15), (0, 7), (15, 15), (15, 3), (0, 0)])
def test_mpe_configuration_message(manager, members):
    msgs = encode.mpe_configuration(manager, members)
    assert all(m.type == "control_change" and m.channel == manager for m in msgs)
    r = RpnReader().feed_all(msgs)
    assert r.log == [(manager, MCM, members)]
    assert r.final_selection_is_null(manager)  # RPN null afterwards (MIDI 1.0 recommendation)


def test_mpe_configuration_bytes_lower_zone():
    # MPE spec MCM for a lower zone of 15 members, channel 1 (status B0): the three data
    # entry messages B0 65 00, B0 64 06, B0 06 0F (CC101 0, CC100 6, CC6 15), then RPN null.
    msgs = encode.mpe_configuration(0, 15)
    raw = [tuple(m.bytes()) for m in msgs]
    assert set(raw[:2]) == {(0xB0, 0x65, 0x00), (0xB0, 0x64, 0x06)}
    assert raw[2] == (0xB0, 0x06, 0x0F)
    assert set(raw[3:]) == {(0xB0, 0x65, 0x7F), (0xB0, 0x64, 0x7F)}


def test_mpe_configuration_bytes_upper_zone():
    # Upper zone: manager channel 16 (status BF).
    raw = [tuple(m.bytes()) for m in encode.mpe_configuration(15, 4)]
    assert (0xBF, 0x06, 0x04) in raw and (0xBF, 0x64, 0x06) in raw and (0xBF, 0x65, 0x00) in raw


@pytest.mark.parametrize("manager, members", [(1, 4), (0, 16), (15, -1)])
def test_mpe_configuration_rejects_bad_zones(manager, members):
    with pytest.raises(ValueError):
        encode.mpe_configuration(manager, members)


def test_member_bend_range_48():
    # RPN 0 with CC6 = 48 semitones (MPE default member range), CC38 = 0 cents.
    r = RpnReader().feed_all(encode.bend_range_rpn(1, 4800.0))
    assert r.values[(1, PBS)] == [48, 0]
    r = RpnReader().feed_all(encode.bend_range_rpn(0, 200.0))
    assert r.values[(0, PBS)] == [2, 0]


def test_bend_at_range_48_within_half_a_step():
    # MIDI 1.0: value - 8192 steps of range/8192; half a step at +-48 semitones = 0.293 cent.
    half_step = 4800.0 / 16384
    for offset in [-4700.0, -1234.567, -0.2, 0.0, 0.15, 11.73, 386.314, 4799.0]:
        v = encode.bend_value(offset, 4800.0)
        assert 0 <= v <= 16383
        assert abs((v - 8192) * 4800.0 / 8192 - offset) <= half_step + 1e-9


# --- the engine's MPE output -------------------------------------------------------------------

import subprocess
import sys

import mido

from retuner.engine.core import Engine, EngineConfig
from retuner.profiles.profile import load_profile
from retuner.pitch.tuning import Tuning


def _start(**cfg):
    return Engine(Tuning.equal12(), EngineConfig(mode="mpe", **cfg)).start(0.0)


@pytest.mark.parametrize("zone, members, manager, member_channels", [
    ("lower", 15, 0, list(range(1, 16))),      # MPE spec: lower zone, manager channel 1
    ("lower", 5, 0, [1, 2, 3, 4, 5]),
    ("upper", 15, 15, list(range(14, -1, -1))),  # upper zone: manager 16, members 15 downwards
    ("upper", 3, 15, [14, 13, 12]),
])
def test_engine_mpe_start(zone, members, manager, member_channels):
    out = _start(mpe_zone=zone, mpe_members=members)
    r = RpnReader().feed_all(out)
    mcm = [e for e in r.log if e[1] == MCM]
    # exactly one MCM, on the manager channel, with the member count
    assert mcm == [(manager, MCM, members)]
    mcm_at = r.log.index(mcm[0])
    for ch in member_channels:
        # MPE spec: member range default 48 semitones, set after the MCM (an MCM resets it)
        assert r.values[(ch, PBS)] == [48, 0], ch
        assert max(i for i, e in enumerate(r.log) if e[0] == ch and e[1] == PBS) > mcm_at
    # manager channel range 2 semitones
    assert r.values[(manager, PBS)] == [2, 0]
    # no RPN is left selected on any channel (MIDI 1.0: RPN null after use)
    for ch in set(m.channel for m in out if hasattr(m, "channel")):
        assert r.final_selection_is_null(ch)
    # bends start centred on every member that gets one
    for m in out:
        if m.type == "pitchwheel":
            assert m.pitch == 0


def test_engine_mpe_zone_wide_messages_on_manager():
    # MPE spec: sustain and program change belong on the manager channel (the player's wheel
    # is its part's: it goes to the members of that part's notes, see test_wheel_per_part.py)
    eng = Engine(Tuning.equal12(), EngineConfig(mode="mpe"))
    eng.start(0.0)
    for i, msg in enumerate([mido.Message("control_change", channel=3, control=64, value=127),
                             mido.Message("program_change", channel=3, program=5)]):
        out = eng.feed(0.1 + i * 0.01, msg)
        assert out and all(m.channel == 0 for m in out), (msg, out)
        assert any(m.type == msg.type for m in out)


def decode_mpe(mf: mido.MidiFile) -> list[dict]:
    """Independent decoder of an MPE stream: each note-on's sounding pitch in cents above
    key 0 = 100 * key + member bend + manager bend (MPE spec: a member's pitch is the sum of
    its own bend and the zone's manager bend), bends scaled by each channel's RPN 0 range."""
    rpn = RpnReader()
    bend = [0] * 16
    manager = None
    notes = []
    tick = 0
    for msg in mido.merge_tracks(mf.tracks):
        tick += msg.time
        if msg.is_meta or msg.type == "sysex":
            continue
        rpn.feed(msg)
        for (ch, num, value) in rpn.log:
            if num == MCM and value > 0:
                manager = ch
        if msg.type == "pitchwheel":
            bend[msg.channel] = msg.pitch
        elif msg.type == "note_on" and msg.velocity > 0:
            def rng(ch):
                semis, cents = rpn.values.get((ch, PBS), [None, None])
                assert semis is not None, f"no RPN 0 on channel {ch + 1} before its first note"
                return semis * 100 + (cents or 0)
            assert manager is not None and msg.channel != manager
            member_range = rng(msg.channel)
            pitch = 100 * msg.note + bend[msg.channel] * member_range / 8192
            pitch += bend[manager] * rng(manager) / 8192
            notes.append({"tick": tick, "key": msg.note, "channel": msg.channel,
                          "cents": pitch, "range": member_range})
    return notes


def test_convert_mpe_decodes_to_profile_within_half_a_bend_step(tmp_path):
    # A short piece of our own: four-part chords in C and A minor, some notes held over.
    tpb = 480
    chords = [(0, [48, 64, 67, 72]), (1, [53, 65, 69, 72]), (2, [55, 62, 67, 71]),
              (3, [57, 64, 69, 72]), (4, [50, 65, 69, 74]), (5, [52, 64, 68, 71]),
              (6, [45, 64, 69, 73]), (7, [48, 60, 64, 67])]
    events = []
    for beat, keys in chords:
        for k in keys:
            events.append((beat * tpb, mido.Message("note_on", note=k, velocity=80)))
            events.append(((beat + 1) * tpb - 10, mido.Message("note_off", note=k, velocity=0)))
    events.sort(key=lambda e: (e[0], e[1].type == "note_on"))
    track = mido.MidiTrack()
    last = 0
    for t, m in events:
        track.append(m.copy(time=t - last))
        last = t
    src = mido.MidiFile(ticks_per_beat=tpb)
    src.tracks.append(track)
    src.save(str(tmp_path / "in.mid"))
    r = subprocess.run([sys.executable, "-m", "retuner", "convert", str(tmp_path / "in.mid"),
                        "-o", str(tmp_path / "out.mid"), "--profile", "werckmeister-3",
                        "--mode", "mpe", "-q"], capture_output=True, text=True, timeout=60)
    assert r.returncode == 0, r.stderr
    notes = decode_mpe(mido.MidiFile(str(tmp_path / "out.mid")))
    tuning = load_profile("werckmeister-3")
    expected = sorted((beat * tpb, k) for beat, keys in chords for k in keys)
    assert sorted((n["tick"], n["key"]) for n in notes) == expected
    half_step = 4800.0 / 16384  # MIDI 1.0 bend step at range 48 semitones, halved: 0.293 cent
    for n in notes:
        assert n["range"] == 4800
        assert abs(n["cents"] - tuning.cents[n["key"]]) <= half_step + 1e-9, n
    # sounding notes never share a member channel (MPE: one note per member channel)
    for tick in {n["tick"] for n in notes}:
        chans = [n["channel"] for n in notes if n["tick"] == tick]
        assert len(chans) == len(set(chans))
