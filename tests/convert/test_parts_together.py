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
from data import midigen
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


def test_the_summary_says_apart_when_engines_of_their_own_played_the_parts(tmp_path):
    """Pool mode splits parts that need more channels than one port has (three parts of
    8-note chords) into files with an engine each: asked for one harmony, the summary must not
    claim it; it says why and what would keep the parts together."""
    src = tmp_path / "wide.mid"
    midigen.wide_arrangement(src)
    opts = ConvertOptions(tuning=Tuning.equal12(), config=EngineConfig(adaptive=AdaptiveConfig()))
    res = convert_file(src, tmp_path / "pool.mid", opts)
    rep = report.build_report(res, opts)
    assert not res.one_harmony and len(res.outputs) > 1
    assert rep["parts_tuned"] == "apart"
    assert "more channels than one port" in rep["parts_apart_why"] and "--merge-parts" in rep["parts_apart_why"]
    text = report.text_summary(rep)
    assert "parts tuned apart" in text and "parts tuned together" not in text
    # the same piece in one file of the chorale: one engine, one harmony
    _, pool = convert(tmp_path, apart=False)
    assert pool["parts_tuned"] == "together" and "parts_apart_why" not in pool


def test_merged_parts_are_said_to_share_the_channels(tmp_path):
    src = chorale(tmp_path / "chorale.mid")
    opts = ConvertOptions(tuning=Tuning.equal12(), config=EngineConfig(adaptive=AdaptiveConfig()), merge_parts=True)
    rep = report.build_report(convert_file(src, tmp_path / "merged.mid", opts), opts)
    assert rep["parts_tuned"] == "together" and rep["parts_share_channels"] is True
    text = report.text_summary(rep)
    assert "sharing the output channels" in text and "each on its own channels" not in text
