"""A real synth (FluidSynth) plays MIDI Tuning Standard output at the profile's pitches.

Truth: the pitch measured in the synth's audio. Each retuned note is compared with the
same key rendered untuned with the same program (0, piano), velocity and read window, so
the soundfont's off-nominal samples cancel; the difference must match the profile's
deviation from 12-EDO within 1.5 cents (FluidSynth truncates pitch to whole cents, so a
correct file reads 0..1 cent flat; see /work/shared/README.md).

Werckmeister III: A. Werckmeister, Musicalische Temperatur (1691), as tabulated in
J. M. Barbour, Tuning and Temperament (1951): C-G, G-D, D-A and B-F# narrowed by 1/4
Pythagorean comma, the other fifths pure. The expected deviations are recomputed here
from that definition (A4 = 440 Hz, ISO 16), not taken from retuner.
"""

from __future__ import annotations

import math
import wave

import mido
import numpy as np
import pytest

from retuner.midi import mts
from retuner.profiles.profile import load_profile
from synth import (cents, key_hz, measure_pitch, note_events, read_wav, render, write_midi)

PYTH_COMMA = 1200 * math.log2(3 ** 12 / 2 ** 19)  # 23.460 c
PURE_FIFTH = 1200 * math.log2(3 / 2)  # 701.955 c


def werckmeister3_deviation(pitch_class: int) -> float:
    """Cents from 12-EDO of a pitch class (0 = C) in Werckmeister III, with A at 0."""
    # chain of fifths from C: C G D A E B F# C# G# D# A# F; tempered: C-G, G-D, D-A, B-F#
    tempered = {0, 1, 2, 5}  # index of the fifth in the chain starting at C
    pos = {}
    c = 0.0
    pc = 0
    for i in range(12):
        pos[pc] = c % 1200.0
        c += PURE_FIFTH - (PYTH_COMMA / 4 if i in tempered else 0.0)
        pc = (pc + 7) % 12
    dev = {p: (v - 100 * p + 600) % 1200 - 600 for p, v in pos.items()}
    return dev[pitch_class] - dev[9]


def test_werckmeister_definition_matches_profile():
    # the profile the MTS output is built from agrees with the published definition
    t = load_profile("werckmeister-3")
    for k in range(48, 84):
        assert t.cents[k] - 100 * k == pytest.approx(werckmeister3_deviation(k % 12), abs=0.001)


def test_measure_pitch_on_a_known_sine(tmp_path):
    # The measurement alone, on a signal whose frequency we set: a decaying 441.3 Hz sine
    # plus a weaker 3rd partial, 48 kHz, 16-bit. Hann + zero padding + parabolic peak.
    rate = 48000
    t = np.arange(int(3.0 * rate)) / rate
    x = (0.5 * np.sin(2 * np.pi * 441.3 * t) + 0.2 * np.sin(2 * np.pi * 3 * 441.3 * t)) * np.exp(-t)
    path = tmp_path / "sine.wav"
    with wave.open(str(path), "wb") as w:
        w.setnchannels(2)
        w.setsampwidth(2)
        w.setframerate(rate)
        pcm = np.round(x * 32767).astype("<i2")
        w.writeframes(np.repeat(pcm, 2).tobytes())
    assert read_wav(path)[0] == rate
    f = measure_pitch(path, 0.2, 1.5, expected_hz=440.0)
    assert abs(cents(f, 441.3)) < 0.02
    assert abs(cents(measure_pitch(path, 0.2, 1.5, expected_hz=1320.0), 3 * 441.3)) < 0.02


def test_plain_piano_note_and_a_known_bend(tmp_path):
    # A4 on the piano, untuned and with a pitch bend of +2048 at the default range of
    # +-2 semitones (MIDI 1.0: centre 8192, 8192 steps = 2 semitones -> +50 cents).
    ev = note_events([(0.0, 2.0, 0, 69, 100), (2.5, 4.5, 1, 69, 100)])
    ev.append((2.4, mido.Message("pitchwheel", channel=1, pitch=2048)))
    midi = write_midi(tmp_path / "a4.mid", ev)
    wav = render(midi, tmp_path / "a4.wav")
    ref = measure_pitch(wav, 0.1, 1.5, expected_hz=440.0)
    bent = measure_pitch(wav, 2.6, 1.5, expected_hz=440.0 * 2 ** (50 / 1200))
    # ISO 16: A4 = 440 Hz; the soundfont's sample is a few cents off nominal (README: up to ~12)
    assert abs(cents(ref, 440.0)) < 15.0
    # FluidSynth plays a bend at 127/128 of its size and truncates to whole cents
    # (README, measured): 50 * 127/128 = 49.61 -> 49 .. 49.61 cents.
    assert 50 * 127 / 128 - 1.0 - 0.2 <= cents(bent, ref) <= 50 * 127 / 128 + 0.2


# A short melody of our own (single line, so no other note's partials fall in the window),
# touching the pitch classes where Werckmeister III departs most from 12-EDO.
MELODY = [60, 64, 67, 69, 71, 72, 66, 61, 65, 63, 70, 68, 62, 57]
NOTE_S = 1.8
GAP_S = 0.2
READ_FROM = 0.1
READ_S = 1.5


def _melody_events(with_mts: bool, tuning=None, channel: int = 0, velocity: int = 96):
    ev = [(0.0, mido.Message("program_change", channel=channel, program=0))]
    if with_mts:
        # the channel selects tuning program 0 (RPN 3), then all 128 keys are sent once,
        # as a static profile does at start (MTS single note tuning change, real-time)
        for m in mts.tuning_select(channel, 0):
            ev.append((0.0, m))
        for m in mts.single_note_tuning_change(list(enumerate(tuning.cents)), device=0x7F, program=0):
            ev.append((0.05, m))
    notes = []
    for i, key in enumerate(MELODY):
        on = 0.5 + i * (NOTE_S + GAP_S)
        notes.append((on, on + NOTE_S, channel, key, velocity))
    return ev + note_events(notes), notes


def test_mts_built_from_mts_module_plays_werckmeister3(tmp_path):
    tuning = load_profile("werckmeister-3")
    ev_ref, notes = _melody_events(False)
    ev_mts, _ = _melody_events(True, tuning)
    ref_wav = render(write_midi(tmp_path / "ref.mid", ev_ref), tmp_path / "ref.wav")
    mts_wav = render(write_midi(tmp_path / "mts.mid", ev_mts), tmp_path / "mts.wav")
    errors = []
    for on, _, _, key, _ in notes:
        target = werckmeister3_deviation(key % 12)
        f_ref = measure_pitch(ref_wav, on + READ_FROM, READ_S, expected_hz=key_hz(key))
        f_mts = measure_pitch(mts_wav, on + READ_FROM, READ_S, expected_hz=key_hz(key + target / 100))
        errors.append((key, round(cents(f_mts, f_ref) - target, 3)))
    print("corrected pitch errors (key, cents):", errors)
    bad = [e for e in errors if abs(e[1]) > 1.5]
    assert not bad, f"corrected pitch errors (key, cents): {errors}"


def _mts_table(path) -> dict[int, float]:
    """Key -> cents as the synth's key table ends up after every MTS message in the file,
    decoded here by hand from the layout of the MIDI Tuning Standard, 'Single Note Tuning
    Change' (real-time: F0 7F dev 08 02 prog count [key xx yy zz]... F7; bank form 08 07 with
    the bank before the program); frequency data = semitone xx plus (yy*128 + zz) / 16384 of
    a semitone above 8.1758 Hz; 7F 7F 7F = no change."""
    table: dict[int, float] = {}
    for msg in mido.MidiFile(str(path)):
        if msg.type != "sysex":
            continue
        d = list(msg.data)
        if d[:1] != [0x7F] or d[2] != 0x08 or d[3] not in (0x02, 0x07):
            continue
        assert d[1] in (0, 0x7F)
        body = d[4:] if d[3] == 0x02 else d[5:]
        prog, count, rest = body[0], body[1], body[2:]
        assert prog == 0 and len(rest) == 4 * count
        for i in range(count):
            key, xx, yy, zz = rest[4 * i:4 * i + 4]
            if (xx, yy, zz) != (0x7F, 0x7F, 0x7F):
                table[key] = 100.0 * (xx + (yy * 128 + zz) / 16384.0)
    return table


def test_convert_mode_mts_plays_werckmeister3_on_fluidsynth(tmp_path):
    import subprocess
    import sys

    tuning = load_profile("werckmeister-3")
    ev_ref, notes = _melody_events(False)
    src = write_midi(tmp_path / "piece.mid", ev_ref)
    out = tmp_path / "piece-mts.mid"
    r = subprocess.run([sys.executable, "-m", "retuner", "convert", str(src), "-o", str(out),
                        "--profile", "werckmeister-3", "--mode", "mts", "-q"],
                       capture_output=True, text=True, timeout=60)
    assert r.returncode == 0, r.stderr
    # on the wire: every played key's table entry is its profile pitch within half a unit
    table = _mts_table(out)
    for _, _, _, key, _ in notes:
        assert abs(table[key] - tuning.cents[key]) <= 100 / 16384 / 2 + 1e-9
    # and through the synth: untuned input vs MTS output, same key, program, velocity, window
    ref_wav = render(src, tmp_path / "ref.wav")
    mts_wav = render(out, tmp_path / "mts.wav")
    errors = []
    for on, _, _, key, _ in notes:
        target = werckmeister3_deviation(key % 12)
        f_ref = measure_pitch(ref_wav, on + READ_FROM, READ_S, expected_hz=key_hz(key))
        f_mts = measure_pitch(mts_wav, on + READ_FROM, READ_S, expected_hz=key_hz(key + target / 100))
        errors.append((key, round(cents(f_mts, f_ref) - target, 3)))
    print("convert --mode mts, corrected pitch errors (key, cents):", errors)
    bad = [e for e in errors if abs(e[1]) > 1.5]
    assert not bad, f"corrected pitch errors (key, cents): {errors}"
