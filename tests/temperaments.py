"""Temperaments computed here from their published definitions, independently of retuner's code.

Sources: Werckmeister III: A. Werckmeister, Musicalische Temperatur (1691), as tabulated by
J. M. Barbour, Tuning and Temperament (1951): C-G, G-D, D-A and B-F# narrowed by 1/4 Pythagorean
comma, the other fifths pure; quarter-comma meantone (Aron 1523, Barbour ch. 3): every fifth 1/4
syntonic comma narrow, chain Eb..G#; both tuned so that A4 = 440 Hz (ISO 16). Pure fifth 3/2,
Pythagorean comma 3^12/2^19, syntonic comma 81/80, computed from the ratios. Bend steps: MIDI 1.0
Detailed Specification (14-bit pitch bend, 8192 steps span the range).
"""

from __future__ import annotations

import math

FIFTH = 1200 * math.log2(3 / 2)
PYTH_COMMA = 1200 * math.log2(3 ** 12 / 2 ** 19)
SYNT_COMMA = 1200 * math.log2(81 / 80)


def chain_pitch_classes(start_pc: int, fifths: list[float]) -> dict[int, float]:
    """Pitch class -> cents above C (0..1200) of a chain of 12 notes from ``start_pc``."""
    pos = [0.0]
    for f in fifths:
        pos.append(pos[-1] + f)
    pcs = [(start_pc + 7 * i) % 12 for i in range(12)]
    c = pos[pcs.index(0)]
    return {pc: (p - c) % 1200.0 for pc, p in zip(pcs, pos)}


def keyboard_target(pcs: dict[int, float]) -> dict[int, float]:
    """Key -> cents above key 0 of 12-EDO, with A4 (key 69) at exactly 6900 c (440 Hz)."""
    shift = 900.0 - pcs[9]
    return {k: 1200 * (k // 12) + pcs[k % 12] + shift for k in range(128)}


# Werckmeister III from Eb: Eb-Bb, Bb-F, F-C pure; C-G, G-D, D-A tempered; A-E, E-B pure; B-F# tempered;
# F#-C#, C#-G# pure
W3 = keyboard_target(chain_pitch_classes(3, [FIFTH] * 3 + [FIFTH - PYTH_COMMA / 4] * 3 + [FIFTH] * 2
                                          + [FIFTH - PYTH_COMMA / 4] + [FIFTH] * 2))
MEANTONE = keyboard_target(chain_pitch_classes(3, [FIFTH - SYNT_COMMA / 4] * 11))
EDO12 = {k: 100.0 * k for k in range(128)}


def half_step(range_semitones: float) -> float:
    """Half of one 14-bit bend step in cents (MIDI 1.0: 8192 steps span the range)."""
    return 100.0 * range_semitones / 8192 / 2


def assert_bent_to_meantone(decoded, msgs, keys) -> None:
    """Each key in ``keys`` sounded once, after the bend range (RPN 0, 2 semitones in pool mode) and
    with its own bend sent just before its note-on, at quarter-comma meantone's pitch within half a
    bend step; and E4 and C4 are not at 12-EDO (they lie several cents off it in meantone, A4 on it).
    ``decoded``: tests/jack.py's Decoder fed with ``msgs`` (mido messages, in order)."""
    notes = {n.key: n for n in decoded.notes}
    assert sorted(notes) == sorted(keys), msgs
    for key in keys:
        n = notes[key]
        assert decoded.range.get(n.channel) == 2.0, f"no bend range announced on channel {n.channel + 1}"
        i = next(i for i, m in enumerate(msgs) if m.type == "note_on" and m.note == key and m.velocity)
        before = [m for m in msgs[:i] if getattr(m, "channel", None) == n.channel]
        assert before and before[-1].type == "pitchwheel", before[-3:]
        assert abs(n.cents - MEANTONE[key]) <= half_step(2), (key, n.cents, MEANTONE[key])
    assert all(abs(notes[k].cents - 100 * k) > 3 for k in (64, 60) if k in notes)
