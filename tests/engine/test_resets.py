"""System resets: the set-up follows the reset, and the player's state is reset as a synth's.

Sources of the reset messages (system exclusive data between F0 and F7; the byte values are
from memory, as written in those documents):

* GM System On 7E 7F 09 01: General MIDI System Level 1 specification (MMA, 1991);
* GM2 System On 7E 7F 09 03: General MIDI 2 specification (MMA, 1999);
* GS Reset 41 10 42 12 40 00 7F 00 41: Roland's GS format documents (the checksum 41 is
  Roland's rule: 128 minus the sum of address and data modulo 128);
* XG System On 43 10 4C 00 00 7E 00: Yamaha's XG specification.

After any of them a General MIDI synth is at pitch bend range 2 semitones, wheel centred,
pedals up, RPN null (GM 1: "the power-up defaults"); reset all controllers (CC121) centres
the wheel and lifts the pedals but keeps the bend range (MMA Recommended Practice RP-015,
from memory). The outputs are decoded below by a small GM synth model written from those
rules and the MIDI 1.0 Detailed Specification (RPN 0 pitch bend sensitivity; 14-bit bend,
centre 8192) and the MPE specification (2018: the MPE Configuration Message, RPN 6 on the
manager channel, sets the member channels' range to 48 semitones), not by retuner's decoder.

Targets: quarter-comma meantone from its definition (every fifth 5^(1/4), so four fifths
make a pure major third 5/4; chain Eb..G#; J. Murray Barbour, Tuning and Temperament, 1951),
A4 = 440 Hz (ISO 16).
"""

from __future__ import annotations

import math

import mido
import pytest

from retuner.convert.conversion import ConvertOptions, convert_file
from retuner.engine.core import Engine, EngineConfig
from retuner.measure import metrics
from retuner.midi.resets import SYSEX_RESETS, system_reset, system_reset_raw
from retuner.profiles.profile import load_profile
from synth import cents, measure_pitch, note_events, render, write_midi

RESETS_FROM_DOCUMENTS = {
    "GM System On": [0x7E, 0x7F, 0x09, 0x01],
    "GM2 System On": [0x7E, 0x7F, 0x09, 0x03],
    "GS Reset": [0x41, 0x10, 0x42, 0x12, 0x40, 0x00, 0x7F, 0x00, 0x41],
    "XG System On": [0x43, 0x10, 0x4C, 0x00, 0x00, 0x7E, 0x00],
}


def meantone_cents(key: int) -> float:
    """Quarter-comma meantone, fifth 5^(1/4) (Barbour 1951), chain Eb..G#, A4 = 440 Hz."""
    fifth = 1200 * math.log2(5 ** 0.25)
    pos = {0: 0, 7: 1, 2: 2, 9: 3, 4: 4, 11: 5, 6: 6, 1: 7, 8: 8, 5: -1, 10: -2, 3: -3}
    above_c = {pc: (p * fifth) % 1200.0 for pc, p in pos.items()}
    octave, pc = divmod(key, 12)
    return 1200 * octave + above_c[pc] + (6900 - (1200 * 5 + above_c[9]))


class GMSynth:
    """What a GM synth does with pitch: RPN 0, MPE configuration, wheel, resets."""

    def __init__(self):
        self.reset()
        self.heard: list[tuple[int, int, float, float]] = []   # (channel, key, cents, range)
        self.sounding: dict[tuple[int, int], bool] = {}

    def reset(self):
        self.range = [200.0] * 16
        self.bend = [0] * 16
        self.rpn = [(127, 127)] * 16
        self.sounding = {}

    def pitch(self, c, key):
        return 100.0 * key + self.bend[c] / 8192.0 * self.range[c]

    def one(self, m):
        if (m.type == "sysex" and list(m.data) in RESETS_FROM_DOCUMENTS.values()) or m.type == "reset":
            self.reset()
            return
        if not hasattr(m, "channel"):
            return
        c = m.channel
        if m.type == "note_on" and m.velocity:
            self.sounding[(c, m.note)] = True
            self.heard.append((c, m.note, self.pitch(c, m.note), self.range[c]))
        elif m.type in ("note_on", "note_off"):
            self.sounding.pop((c, m.note), None)
        elif m.type == "pitchwheel":
            self.bend[c] = m.pitch
            for (ch, k) in self.sounding:
                if ch == c:
                    self.heard.append((c, k, self.pitch(c, k), self.range[c]))
        elif m.type == "control_change":
            cc, v = m.control, m.value
            if cc == 101:
                self.rpn[c] = (v, self.rpn[c][1])
            elif cc == 100:
                self.rpn[c] = (self.rpn[c][0], v)
            elif cc == 6 and self.rpn[c] == (0, 0):
                self.range[c] = 100.0 * v
            elif cc == 38 and self.rpn[c] == (0, 0):
                self.range[c] = 100.0 * (self.range[c] // 100) + v
            elif cc == 6 and self.rpn[c] == (0, 6) and c in (0, 15):
                members = range(1, 1 + v) if c == 0 else range(15 - v, 15)
                for mc in members:
                    self.range[mc] = 4800.0
                self.range[c] = 200.0
            elif cc == 121:
                self.bend[c] = 0
                self.rpn[c] = (127, 127)


def play_file(path) -> GMSynth:
    s = GMSynth()
    for m in mido.MidiFile(str(path)):    # tracks merged in time order, as a player plays them
        s.one(m)
    return s


def test_reset_table_matches_the_documents():
    for name, data in RESETS_FROM_DOCUMENTS.items():
        assert list(SYSEX_RESETS[name]) == data
        assert system_reset(mido.Message("sysex", data=data)) == name
        raw = bytes([0xF0, len(data) + 1] + data + [0xF7])      # as it stands in a file
        assert system_reset_raw(raw) == name
    # Roland checksum of the GS reset: address 40 00 7F + data 00 -> (128 - sum % 128) % 128
    gs = RESETS_FROM_DOCUMENTS["GS Reset"]
    assert (128 - sum(gs[4:8]) % 128) % 128 == gs[8]
    assert system_reset(mido.Message("reset")) == "System Reset"
    assert system_reset(mido.Message("sysex", data=[0x7E, 0x7F, 0x09, 0x02])) is None   # GM off
    assert system_reset(mido.Message("sysex", data=[0x7E, 0x7F, 0x08, 0x01])) is None   # MTS


CHORDS = [(60, 64, 67), (65, 69, 72), (67, 71, 74), (60, 64, 67)]


def reset_file(path, reset_name):
    """A reset at tick 0 in the part's own track (as sequencers write it), a program change,
    then four triads on channel 1."""
    ev = [(0.0, mido.Message("sysex", data=RESETS_FROM_DOCUMENTS[reset_name])),
          (0.01, mido.Message("program_change", channel=0, program=0))]
    notes = []
    for i, chord in enumerate(CHORDS):
        for k in chord:
            notes.append((0.1 + 0.5 * i, 0.55 + 0.5 * i, 0, k, 90))
    return write_midi(path, ev + note_events(notes))


@pytest.mark.parametrize("reset_name", list(RESETS_FROM_DOCUMENTS))
@pytest.mark.parametrize("config", [EngineConfig(bend_range=12.0), EngineConfig(mode="mpe")],
                         ids=["bend-range-12", "mpe"])
def test_file_reset_is_followed_by_the_setup(tmp_path, reset_name, config):
    src = reset_file(tmp_path / "in.mid", reset_name)
    out = tmp_path / "out.mid"
    convert_file(src, out, ConvertOptions(tuning=load_profile("meantone-quarter"), config=config))
    s = play_file(out)
    assert len({(c, k) for c, k, _, _ in s.heard}) >= 3
    assert sum(1 for _ in s.heard) >= 12
    for c, k, cents, rng in s.heard:
        # within half a bend step of its profile pitch, at the range the synth really has
        assert abs(cents - meantone_cents(k)) <= rng / 8192 / 2 + 1e-9, (c, k, cents, rng)


def test_retuner_decoder_hears_the_reset():
    # the report decodes as a synth hears: a set-up sent BEFORE a reset is undone by it
    tu = load_profile("meantone-quarter")
    e = Engine(tu, EngineConfig(bend_range=12.0))
    stream = [(0.0, m) for m in e.start(0.0)]
    stream.append((0.0, mido.Message("sysex", data=RESETS_FROM_DOCUMENTS["GM System On"])))
    stream += [(0.1, m) for m in e.feed(0.1, mido.Message("note_on", note=64, velocity=90))]
    (n,) = metrics.decode(stream).notes
    bend = next(m.pitch for _, m in stream if m.type == "pitchwheel" and m.channel == n.channel and m.pitch)
    assert n.pitch == pytest.approx(6400 + bend / 8192 * 200.0)     # range 2 after the reset
    assert abs(n.pitch - meantone_cents(64)) > 2.0       # E is 3.4 c flat in meantone


def _wheel_cents(s: GMSynth, e: Engine, t: float, msgs) -> list[float]:
    for m in msgs:
        s.one(m)
    return [s.pitch(c, k) for (c, k) in s.sounding]


@pytest.mark.parametrize("reset", [mido.Message("sysex", data=RESETS_FROM_DOCUMENTS["GS Reset"]),
                                   mido.Message("reset")], ids=["GS", "system-reset"])
def test_live_reset_resets_the_players_state(reset):
    tu = load_profile("meantone-quarter")
    e = Engine(tu, EngineConfig(bend_range=12.0))
    s = GMSynth()
    for m in e.start(0.0):
        s.one(m)
    # the player: input bend range 12 (RPN 0), wheel up, sustain down, a note held
    for m in (mido.Message("control_change", control=101, value=0),
              mido.Message("control_change", control=100, value=0),
              mido.Message("control_change", control=6, value=12),
              mido.Message("pitchwheel", pitch=4096),
              mido.Message("control_change", control=64, value=127),
              mido.Message("note_on", note=60, velocity=90)):
        for o in e.feed(0.0, m):
            s.one(o)
    out = e.feed(0.1, reset)
    assert out[0] == reset                  # the reset reaches the synth first, the set-up after
    for m in out:
        s.one(m)
    assert e.sounding() == [] and s.range[1] == 1200.0
    # a note after the reset: wheel centred (the synth's is), at its profile pitch
    (p,) = _wheel_cents(s, e, 0.2, e.feed(0.2, mido.Message("note_on", note=64, velocity=90)))
    assert abs(p - meantone_cents(64)) <= 1200 / 8192 / 2
    # pedal up after the reset: the note-off ends the note (no sustain is kept for it)
    e.feed(0.3, mido.Message("note_off", note=64))
    assert e.sounding() == []
    # the input's bend range is back at 2 semitones: a full wheel up is +200 c
    (p,) = _wheel_cents(s, e, 0.4, e.feed(0.4, mido.Message("note_on", note=64, velocity=90))
                        + e.feed(0.5, mido.Message("pitchwheel", pitch=8191)))
    assert p - meantone_cents(64) == pytest.approx(200.0 * 8191 / 8192, abs=1200 / 8192)
    # the RPN selection was reset too: a data entry alone no longer sets the wheel range
    out = e.feed(0.6, mido.Message("control_change", control=6, value=12))
    (p,) = _wheel_cents(s, e, 0.6, out + e.feed(0.7, mido.Message("pitchwheel", pitch=8191)))
    assert p - meantone_cents(64) == pytest.approx(200.0 * 8191 / 8192, abs=1200 / 8192)


def test_reset_all_controllers_keeps_the_input_bend_range():
    # RP-015: CC121 centres the wheel and lifts the pedals; the bend range (RPN 0) stays
    tu = load_profile("meantone-quarter")
    e = Engine(tu, EngineConfig(bend_range=24.0))
    s = GMSynth()
    for m in e.start(0.0):
        s.one(m)
    msgs = []
    for m in (mido.Message("control_change", control=101, value=0),
              mido.Message("control_change", control=100, value=0),
              mido.Message("control_change", control=6, value=12),
              mido.Message("pitchwheel", pitch=4096),
              mido.Message("control_change", control=64, value=127),
              mido.Message("note_on", note=60, velocity=90),
              mido.Message("control_change", control=121, value=0)):
        msgs += e.feed(0.0, m)
    for m in msgs:
        s.one(m)
    (p,) = [s.pitch(c, k) for (c, k) in s.sounding]
    assert abs(p - meantone_cents(60)) <= 2400 / 8192 / 2            # wheel centred
    for m in e.feed(0.1, mido.Message("pitchwheel", pitch=4096)):
        s.one(m)
    (p,) = [s.pitch(c, k) for (c, k) in s.sounding]
    assert p - meantone_cents(60) == pytest.approx(600.0, abs=2400 / 8192)   # still 12 semitones
    for m in e.feed(0.2, mido.Message("note_off", note=60)):
        s.one(m)
    assert e.sounding() == []                                         # the pedal was lifted


# -- a real synth -----------------------------------------------------------------------------
# One note at a time (so no other note's partials fall in the read window), on the piano
# (program 0 reads steadiest), over pitch classes where meantone departs most from 12-EDO.
MELODY = [60, 68, 63, 66, 70, 64]
NOTE_S, GAP_S, READ_FROM, READ_S = 1.8, 0.2, 0.1, 1.5


@pytest.mark.parametrize("config", [EngineConfig(bend_range=12.0), EngineConfig(mode="mpe"),
                                    EngineConfig(mode="mts")], ids=["bend-range-12", "mpe", "mts"])
def test_fluidsynth_plays_a_reset_file_in_tune(tmp_path, config):
    """FluidSynth (a real GM synth) renders a file with a GM System On at tick 0, converted:
    each note against the same key rendered from the untuned file (same program, velocity
    and read window) must differ by its meantone deviation within 1.5 c (FluidSynth plays
    bends at 127/128 of their size and truncates to whole cents, and honours MIDI Tuning
    Standard single note changes on channels that selected the tuning program with RPN 3:
    /work/shared/README.md)."""
    ev = [(0.0, mido.Message("sysex", data=RESETS_FROM_DOCUMENTS["GM System On"])),
          (0.01, mido.Message("program_change", channel=0, program=0))]
    notes = [(0.5 + i * (NOTE_S + GAP_S), 0.5 + i * (NOTE_S + GAP_S) + NOTE_S, 0, k, 96)
             for i, k in enumerate(MELODY)]
    src = write_midi(tmp_path / "in.mid", ev + note_events(notes))
    out = tmp_path / "out.mid"
    convert_file(src, out, ConvertOptions(tuning=load_profile("meantone-quarter"), config=config))
    ref_wav = render(src, tmp_path / "ref.wav")
    out_wav = render(out, tmp_path / "out.wav")
    for on, _, _, k, _ in notes:
        want = meantone_cents(k) - 100.0 * k
        f_ref = measure_pitch(ref_wav, on + READ_FROM, READ_S, expected_hz=440.0 * 2 ** ((k - 69) / 12))
        f_out = measure_pitch(out_wav, on + READ_FROM, READ_S, expected_hz=f_ref * 2 ** (want / 1200))
        assert abs(cents(f_out, f_ref) - want) <= 1.5, (k, cents(f_out, f_ref), want)
