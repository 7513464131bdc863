"""The project's progressions: harmony, voice leading, legato/detached forms, MIDI files.

Sources: chord spellings (I-vi-ii-V-I in C major, i-iv-V-i in minor keys, dominant
sevenths, diminished sevenths) are common practice; the comma pump's syntonic comma
81/80 = 21.506 c per round is common practice; the MIDI file is read back with
pretty_midi (a reference library) and mido.
"""

from __future__ import annotations

import io
import math
from fractions import Fraction

import pretty_midi
import pytest

from retuner.bench import progressions as P

SYNTONIC = 1200 * math.log2(81 / 80)


def sounding_at(events, t):
    """Keys sounding at time t (after all events at <= t)."""
    snd = set()
    for te, m in events:
        if te > t:
            break
        if m.type == "note_on" and m.velocity > 0:
            snd.add(m.note)
        elif m.type in ("note_off", "note_on"):
            snd.discard(m.note)
    return snd


def pcs(keys):
    return {k % 12 for k in keys}


def test_pump_chords_and_held_common_tones():
    chords = P.comma_pump_chords(2)
    want = [{0, 4, 7}, {9, 0, 4}, {2, 5, 9}, {7, 11, 2}]  # I vi ii V in C major
    for i, c in enumerate(chords):
        assert len(c) == 4 and pcs(c) == want[i % 4]
    ev = P.chord_events(chords, legato=True)
    # every chord change keeps its common tones sounding: no note-off for a kept key
    for i in range(1, len(chords)):
        t = float(i)
        at = [m for te, m in ev if te == t]
        common = set(chords[i - 1]) & set(chords[i])
        assert common, "a comma pump keeps at least one common tone"
        assert not any(m.note in common for m in at)
        offs = [j for j, m in enumerate(at) if m.type == "note_off"]
        ons = [j for j, m in enumerate(at) if m.type == "note_on"]
        assert max(offs) < min(ons)   # releases before new notes
        assert sounding_at(ev, t + 0.5) == set(chords[i])
    # 4 notes to start, then 2 + 3 + 3 + 3 new notes per round
    n_on = sum(1 for _, m in ev if m.type == "note_on")
    assert n_on == 4 + 11 * 2


def test_pump_with_pure_intervals_against_held_notes_loses_a_comma_per_round():
    # tune by hand: each new note pure (5-limit triad ratios) against the chord it joins
    chords = P.comma_pump_chords(1)
    # ratios of chord members above the root: major 1, 5/4, 3/2; minor 1, 6/5, 3/2
    shapes = {(0, 4, 7): [Fraction(1), Fraction(5, 4), Fraction(3, 2)],
              (0, 3, 7): [Fraction(1), Fraction(6, 5), Fraction(3, 2)]}
    roots = [0, 9, 2, 7, 0]
    pitch: dict[int, float] = {}
    first_c = None
    for chord, root in zip(chords, roots):
        quality = (0, 4, 7) if pcs(chord) == {root, (root + 4) % 12, (root + 7) % 12} else (0, 3, 7)
        held = [k for k in chord if k in pitch]
        # root pitch implied by a held note (or C = 0 at the start)
        if held:
            h = held[0]
            deg = quality.index((h - root) % 12)
            root_c = pitch[h] - 1200 * math.log2(shapes[quality][deg]) - 100 * ((h - root) % 12) \
                + 100 * ((h - root) % 12)
            root_key = h - ((h - root) % 12)
        else:
            root_key = min(k for k in chord if k % 12 == root)
            root_c = 100.0 * root_key
        new_pitch = {}
        for k in chord:
            deg = quality.index((k - root_key) % 12)
            octs = (k - root_key) // 12
            new_pitch[k] = root_c + 1200 * math.log2(shapes[quality][deg]) + 1200 * octs
        pitch = new_pitch
        if first_c is None:
            first_c = pitch[48]
    assert abs((first_c - pitch[48]) - SYNTONIC) < 1e-6


def test_detached_forms_hold_nothing():
    for chords in (P.comma_pump_chords(2), P.minor_cadence_chords(), P.dominant_chain_chords(),
                   P.chromatic_passage_chords()):
        ev = P.chord_events(chords, legato=False, seconds=1.0, gap=0.1)
        for i in range(1, len(chords)):
            assert sounding_at(ev, i - 0.05) == set()
            assert sounding_at(ev, i + 0.5) == set(chords[i])


def test_minor_cadences_are_i_iv_v_i():
    chords = P.minor_cadence_chords(3)
    for n in range(3):
        t = (9 + 5 * n) % 12
        i, iv, v, i2 = chords[4 * n:4 * n + 4]
        assert pcs(i) == pcs(i2) == {t, (t + 3) % 12, (t + 7) % 12}
        assert pcs(iv) == {(t + 5) % 12, (t + 8) % 12, t}
        assert pcs(v) == {(t + 7) % 12, (t + 11) % 12, (t + 2) % 12}   # raised leading tone
        assert all(c[0] % 12 == r for c, r in zip((i, iv, v), (t, (t + 5) % 12, (t + 7) % 12)))


def test_dominant_chain_resolves_down_a_fifth_each_time():
    chords = P.dominant_chain_chords(8)
    for a, b in zip(chords[:7], chords[1:8]):
        r = a[0] % 12
        assert pcs(a) <= {r, (r + 4) % 12, (r + 7) % 12, (r + 10) % 12}
        assert {(r + 4) % 12, (r + 10) % 12} <= pcs(a)   # third and seventh present
        assert b[0] % 12 == (r + 5) % 12
    assert all(len(set(c)) == 4 for c in chords)


def test_chromatic_passage_has_a_chromatic_bass():
    chords = P.chromatic_passage_chords()
    bass = [c[0] % 12 for c in chords]
    assert bass[:7] == [0, 1, 2, 3, 4, 5, 6]
    dim7 = [c for c in chords if len(pcs(c)) == 4 and all(((b - a) % 12) == 3 for a, b in
                                                           zip(sorted(pcs(c)), sorted(pcs(c))[1:]))]
    assert len(dim7) == 3


@pytest.mark.parametrize("piece", P.CHORALES, ids=lambda p: p["name"])
def test_chorale_voices_line_up(piece):
    lengths = [sum(b for _, b in P._voice(v)) for v in piece["voices"]]
    assert len(set(lengths)) == 1
    ev = P.chorale_events(piece)
    ons = [m for _, m in ev if m.type == "note_on"]
    assert ons and all(36 <= m.note <= 81 for m in ons)   # choir ranges, roughly
    # never more than four notes at once
    snd: set[int] = set()
    for _, m in ev:
        if m.type == "note_on" and m.velocity:
            snd.add(m.note)
            assert len(snd) <= 4
        else:
            snd.discard(m.note)
    # soprano is the highest voice wherever it sounds (voices do not cross above it)
    sop = P._voice(piece["voices"][0])
    others = [P._voice(v) for v in piece["voices"][1:]]

    def at(voice, beat):
        b = 0.0
        for k, d in voice:
            if b <= beat < b + d:
                return k
            b += d
        return None

    beat = 0.0
    while beat < lengths[0]:
        s = at(sop, beat)
        if s is not None:
            assert all((at(o, beat) or 0) <= s for o in others)
        beat += 0.5


def test_note_names():
    assert P._n("C4") == 60 and P._n("A4") == 69 and P._n("F#3") == 54 and P._n("Bb2") == 46


def test_midi_file_reads_back_with_pretty_midi():
    ev = P.progression("pump", rounds=2)
    mf = P.to_midifile(ev)
    buf = io.BytesIO()
    mf.save(file=buf)
    pm = pretty_midi.PrettyMIDI(io.BytesIO(buf.getvalue()))
    notes = sorted((round(n.start, 3), n.pitch) for inst in pm.instruments for n in inst.notes)
    ons = sorted((round(t, 3), m.note) for t, m in ev if m.type == "note_on")
    assert notes == ons


def test_legato_chorale_holds_repeated_notes_detached_does_not():
    piece = P.OLD_HUNDREDTH
    leg = P.chorale_events(piece, legato=True)
    det = P.chorale_events(piece, legato=False)
    n_leg = sum(1 for _, m in leg if m.type == "note_on")
    n_det = sum(1 for _, m in det if m.type == "note_on")
    assert n_leg < n_det
    assert all(m.type != "note_on" or t >= 0 for t, m in det)
