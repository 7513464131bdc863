"""Adaptive mode tunes a file's parts together as one harmony, each part on its own instrument.

A four-part chorale of our own, one voice per channel, each part with its own program (GM
programs: choir aahs 52, voice oohs 53, oboe 68, bassoon 70). Impurity is the time-weighted
distance of consonant pairs from just (6/5, 5/4, 4/3, 3/2, 8/5, 5/3 and octaves; the just
ratios are the handbook values); in 12-EDO such a chorale is several cents impure, tuned as one
harmony it must come out within 1 cent. Every note must sound on a channel whose program (as
a GM synth keeps it: the last program change on that channel, MIDI 1.0) is its part's.
"""

from __future__ import annotations

import mido
from retuner.adaptive.solver import AdaptiveConfig
from retuner.convert.conversion import ConvertOptions, convert_file
from retuner.engine.core import EngineConfig
from retuner.measure import report
from retuner.pitch.tuning import Tuning
from synth import note_events, write_midi

PROGRAMS = {0: 52, 1: 53, 2: 68, 3: 70}
# soprano, alto, tenor, bass per chord (I IV V I vi ii V I in C, root-position and first-inversion triads)
CHORDS = [(72, 67, 64, 48), (72, 69, 65, 53), (71, 67, 62, 55), (72, 67, 64, 48),
          (72, 69, 64, 57), (74, 69, 65, 50), (74, 67, 62, 55), (72, 67, 64, 48)]


def chorale(path):
    ev = [(0.0, mido.Message("program_change", channel=ch, program=p)) for ch, p in PROGRAMS.items()]
    notes = []
    for i, chord in enumerate(CHORDS):
        for ch, k in enumerate(chord):
            notes.append((0.2 + 0.8 * i, 0.2 + 0.8 * i + 0.78, ch, k, 80))
    return write_midi(path, ev + note_events(notes))


def convert(tmp_path, apart):
    src = chorale(tmp_path / "chorale.mid")
    out = tmp_path / ("apart.mid" if apart else "together.mid")
    opts = ConvertOptions(tuning=Tuning.equal12(), config=EngineConfig(adaptive=AdaptiveConfig()),
                          parts_apart=apart)
    res = convert_file(src, out, opts)
    return out, report.build_report(res, opts)


def test_parts_are_tuned_as_one_harmony_on_their_own_instruments(tmp_path):
    out, rep = convert(tmp_path, apart=False)
    assert rep["notes"] == 4 * len(CHORDS)
    assert rep["impurity_cents"] <= 1.0
    assert rep["steals"] == 0
    # the group's spare channels are shared out: a channel rests 4 chords (3.2 s) between
    # notes, longer than the release time (2 s), so nothing is re-bent while it rings
    assert rep["ringing_retunes"] == 0
    assert rep["parts_tuned"] == "together"
    assert "parts tuned together as one harmony" in report.text_summary(rep)
    # every note on a channel carrying its part's program: the keys tell the parts apart here
    part_of_key = {}
    for chord in CHORDS:
        for ch, k in enumerate(chord):
            part_of_key.setdefault(k, set()).add(ch)
    prog = {}
    n = 0
    for m in mido.MidiFile(str(out)):
        if m.type == "program_change":
            prog[m.channel] = m.program
        elif m.type == "note_on" and m.velocity:
            n += 1
            assert prog.get(m.channel) in {PROGRAMS[p] for p in part_of_key[m.note]}, m
    assert n == 4 * len(CHORDS)


def test_parts_apart_are_each_tuned_alone(tmp_path):
    # each part alone is a melody: no harmony to tune, so the chorale stays near 12-EDO
    _, apart = convert(tmp_path, apart=True)
    _, together = convert(tmp_path, apart=False)
    assert apart["parts_tuned"] == "apart"
    assert apart["impurity_cents"] > 5.0
    assert together["impurity_cents"] < apart["impurity_cents"] - 4.0


# four parts, four notes each, of one major triad (I IV V I in C, by its root): 16 notes at once,
# more than the 15 channels one port has beside the drums' channel 10, so pool mode writes two
# files. Each part holds two of the triad's tones (in two octaves), so only the parts together
# make the chord: tuned apart, each part's pair is just but centred on its own
SPLIT_ROOTS = [0, 5, 7, 0]
SPLIT_TONES = {0: (4, 7, 16, 19), 1: (0, 7, 12, 19), 2: (0, 4, 12, 16), 3: (0, 7, 12, 19)}
SPLIT_BASE = {0: 60, 1: 48, 2: 48, 3: 36}
SPLIT_VELOCITY = {0: 71, 1: 72, 2: 73, 3: 74}      # a note's velocity tells its part


def split_piece(path):
    ev = [(0.0, mido.Message("program_change", channel=ch, program=p)) for ch, p in PROGRAMS.items()]
    notes = [(0.2 + 0.8 * i, 0.9 + 0.8 * i, ch, SPLIT_BASE[ch] + root + d, SPLIT_VELOCITY[ch])
             for i, root in enumerate(SPLIT_ROOTS) for ch in PROGRAMS for d in SPLIT_TONES[ch]]
    return write_midi(path, ev + note_events(notes))


def test_parts_split_over_two_files_are_still_one_harmony(tmp_path):
    """Pool mode writes parts that need more channels than one port has to several files, and one
    engine plays them all (its output channel 16 k + c is channel c of file k): the files played
    together, a port each, are one harmony, each part on its own program; tuned apart, each
    part's chord is just but the parts' chords are centred each on its own."""
    src = split_piece(tmp_path / "wide.mid")

    def run(apart):
        opts = ConvertOptions(tuning=Tuning.equal12(), config=EngineConfig(adaptive=AdaptiveConfig()),
                              parts_apart=apart)
        res = convert_file(src, tmp_path / ("apart.mid" if apart else "together.mid"), opts)
        return res, report.build_report(res, opts)

    res, rep = run(False)
    assert len(res.outputs) == 2 and res.one_harmony
    assert rep["parts_tuned"] == "together"
    assert "parts tuned together as one harmony" in report.text_summary(rep)
    apart_res, apart = run(True)
    assert not apart_res.one_harmony and apart["parts_tuned"] == "apart"
    # impurity across both files (they sound together): within 1 c of just, against the parts
    # tuned apart and 12-EDO (a 12-EDO major third is 13.7 c from 5/4: common practice)
    assert rep["impurity_cents"] <= 1.0
    assert apart["impurity_cents"] > rep["impurity_cents"] + 1.0
    assert rep["steals"] == 0
    # the engine's counters are the whole conversion's: at the top of the report, not per file
    assert all(f["ringing_retunes"] is None and f["attack_retunes"] is None for f in rep["files"])
    assert rep["ringing_retunes"] == sum(o.stats.get("ringing_retunes", 0) for o in res.outputs)
    assert rep["bends_sent"] == sum(f["bends_sent"] for f in rep["files"]) > 0
    # every note on a channel that carries its own part's program (the last program change on the
    # channel, as a GM synth keeps it: MIDI 1.0), each file on channels 1..16 of its own port
    seen = set()
    for o in res.outputs:
        program = [0] * 16
        for m in mido.merge_tracks(mido.MidiFile(o.path).tracks):
            if m.type == "program_change":
                program[m.channel] = m.program
            elif m.type == "note_on" and m.velocity:
                part = {v: p for p, v in SPLIT_VELOCITY.items()}[m.velocity]
                assert program[m.channel] == PROGRAMS[part], (o.path, m)
                seen.add(part)
    assert seen == set(PROGRAMS)


def test_merged_parts_are_said_to_share_the_channels(tmp_path):
    src = chorale(tmp_path / "chorale.mid")
    opts = ConvertOptions(tuning=Tuning.equal12(), config=EngineConfig(adaptive=AdaptiveConfig()), merge_parts=True)
    rep = report.build_report(convert_file(src, tmp_path / "merged.mid", opts), opts)
    assert rep["parts_tuned"] == "together" and rep["parts_share_channels"] is True
    text = report.text_summary(rep)
    assert "sharing the output channels" in text and "each on its own channels" not in text
