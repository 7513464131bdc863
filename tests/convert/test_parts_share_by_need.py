"""Parts tuned together get the output channels by need, not in equal shares.

An arrangement of our own in C major (I vi IV V I ii V I, one chord every 2.2 s): piano legato
3-note chords (each chord ends as the next begins), strings in 2-note chords, a one-note bass
and a one-note flute, 4 parts in the 15 channels of the default pool (channel 10 kept for drums).
In adaptive mode every note has a bend of its own, so a part playing n notes at once needs 2n
channels for each chord to find idle ones (the chord before still rings for the release time,
2 s, shorter than a chord). Shared out equally the piano gets 4 and re-bends ringing channels;
shared by need (piano 6, strings 4, bass 2, flute 2, the spare one in proportion) nothing is
re-bent while it rings. Every note must also keep its own part's program (as a GM synth keeps
it: the last program change on its channel, MIDI 1.0), and the harmony stays just (impurity
from retuner.measure.metrics through the report, at most 1 c).
"""

from __future__ import annotations

import mido
from retuner.adaptive.solver import AdaptiveConfig
from retuner.convert.conversion import ConvertOptions, convert_file
from retuner.engine.core import EngineConfig
from retuner.measure import report
from retuner.pitch.tuning import Tuning
from synth import note_events, write_midi

PIANO, STRINGS, BASS, FLUTE = 0, 1, 2, 3
PROGRAMS = {PIANO: 0, STRINGS: 48, BASS: 32, FLUTE: 73}       # GM: piano, strings, bass, flute
VELOCITY = {PIANO: 70, STRINGS: 60, BASS: 80, FLUTE: 75}      # a note's part told by its velocity
BEAT = 2.2
PIANO_CHORDS = [(60, 64, 67), (60, 64, 69), (60, 65, 69), (59, 62, 67),
                (60, 64, 67), (62, 65, 69), (59, 62, 67), (60, 64, 67)]
STRING_CHORDS = [(48, 55), (45, 52), (48, 53), (47, 55), (48, 55), (50, 57), (47, 55), (48, 55)]
BASS_KEYS = [36, 45, 41, 43, 36, 38, 43, 36]
FLUTE_KEYS = [76, 76, 77, 74, 79, 77, 74, 72]


def arrangement(path, flute=None):
    """The four parts; ``flute``: (start, end, key) of another flute line (default: a note a chord)."""
    ev = [(0.0, mido.Message("program_change", channel=c, program=p)) for c, p in PROGRAMS.items()]
    notes = []
    for i in range(len(PIANO_CHORDS)):
        t0, t1 = 0.2 + BEAT * i, 0.2 + BEAT * (i + 1)
        notes += [(t0, t1, PIANO, k, VELOCITY[PIANO]) for k in PIANO_CHORDS[i]]
        notes += [(t0, t1, STRINGS, k, VELOCITY[STRINGS]) for k in STRING_CHORDS[i]]
        notes.append((t0, t1, BASS, BASS_KEYS[i], VELOCITY[BASS]))
        if flute is None:
            notes.append((t0, t1 - 0.05, FLUTE, FLUTE_KEYS[i], VELOCITY[FLUTE]))
    notes += [(a, b, FLUTE, k, VELOCITY[FLUTE]) for a, b, k in flute or ()]
    write_midi(path, ev + note_events(notes))
    return len(notes)


def test_channels_are_shared_out_by_need_when_parts_are_tuned_together(tmp_path):
    n = arrangement(tmp_path / "four.mid")
    out = tmp_path / "out.mid"
    opts = ConvertOptions(tuning=Tuning.equal12(), config=EngineConfig(adaptive=AdaptiveConfig()))
    rep = report.build_report(convert_file(tmp_path / "four.mid", out, opts), opts)
    assert rep["parts_tuned"] == "together"
    assert rep["notes"] == n
    assert rep["steals"] == 0
    assert rep["ringing_retunes"] == 0
    assert rep["impurity_cents"] <= 1.0
    prog, chans = {}, {p: set() for p in PROGRAMS}
    part_of = {v: p for p, v in VELOCITY.items()}
    for m in mido.MidiFile(str(out)):
        if m.type == "program_change":
            prog[m.channel] = m.program
        elif m.type == "note_on" and m.velocity:
            part = part_of[m.velocity]
            assert prog.get(m.channel) == PROGRAMS[part], m
            chans[part].add(m.channel)
    # the piano (3 notes at once) plays on at least 6 channels, the bass on at most 3
    assert len(chans[PIANO]) >= 6
    assert len(chans[BASS]) <= 3
    assert not any(chans[p] & chans[q] for p in PROGRAMS for q in PROGRAMS if p < q)


def test_a_quick_melody_gets_a_channel_for_each_note_still_ringing(tmp_path):
    """The arrangement above with a quicker flute line, a note every second: with the two channels
    that twice its one note at a time gives it, each note would come back to a channel released
    1 s before, still ringing (release time 2 s, the default), and re-bend it (adaptive mode:
    every note a bend of its own). The flute wishes for as many channels as notes sound or ring
    at one of its note-ons (itself and the two before it: 3); the 15 channels then go piano 6,
    strings 4, bass 2, flute 3, and nothing is re-bent while it rings."""
    line = [72, 74, 76, 77, 79, 77, 76, 74, 72, 71, 72, 74, 76, 74, 72, 71, 72]
    arrangement(tmp_path / "melody.mid", flute=[(0.2 + 1.0 * j, 0.2 + 1.0 * j + 0.95, k) for j, k in enumerate(line)])
    opts = ConvertOptions(tuning=Tuning.equal12(), config=EngineConfig(adaptive=AdaptiveConfig()))
    res = convert_file(tmp_path / "melody.mid", tmp_path / "out.mid", opts)
    rep = report.build_report(res, opts)
    assert rep["parts_tuned"] == "together" and rep["steals"] == 0
    assert rep["ringing_retunes"] == 0
    assert len(res.outputs[0].channels[FLUTE]) >= 3
