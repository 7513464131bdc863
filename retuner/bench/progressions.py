"""The project's own progressions, as timed note events and as MIDI files.

All of these are written for this project (our own scenarios):

* ``comma_pump(rounds)``: I-vi-ii-V-I in C major, 4 voices. Played legato with
  common tones held, pure intervals against the held notes sink the pitch by a
  syntonic comma (81/80, 21.5 cents) each round.
* ``minor_cadences()``: i-iv-V-i cadences in a chain of minor keys.
* ``dominant_chain()``: a chain of dominant sevenths, each resolving as V7 of
  the next (circle of fifths).
* ``chromatic_passage()``: a chromatic bass through diminished sevenths.
* ``CHORALES``: four-part chorale-style settings of public-domain hymn tunes.
  The tunes (Old Hundredth, Louis Bourgeois, Genevan Psalter 1551; Tallis'
  Canon, Thomas Tallis c. 1567; Winchester New, Musikalisches Handbuch,
  Hamburg 1690; St Anne, William Croft 1708) are transcribed from memory, and
  the four-part harmonisations are written out by us in plain chorale style
  (they are not copies of any edition).

Every progression has a legato form (notes of a voice that repeat a key are
held; for block chords, keys common to two chords are held) and a detached
form (every note ends a little before the next chord; nothing is held).

Events are ``(time_seconds, mido.Message)`` sorted by time, note-offs before
note-ons at the same time.
"""

from __future__ import annotations

import itertools
import random
import statistics
import time
from typing import Iterable, Optional, Sequence

import mido

from retuner.engine.attack import CORRECTED
from retuner.engine.core import Engine, EngineConfig
from retuner.engine.drive import Drive, play
from retuner.measure.metrics import NoteTrack, report
from retuner.measure.metrics import added_latency as metrics_added_latency, percentile
from retuner.profiles.profile import load_profile
from retuner.pitch.tuning import Tuning

Event = tuple[float, mido.Message]

# -- block-chord progressions -------------------------------------------------

# I-vi-ii-V-I, voiced so each change keeps the common tones on the same keys:
# I->vi holds E4 and C5, vi->ii holds A4, ii->V holds D5, V->I holds G4.
PUMP_ROUND = [
    (48, 64, 67, 72),  # I   C3 E4 G4 C5
    (45, 64, 69, 72),  # vi  A2 E4 A4 C5
    (50, 65, 69, 74),  # ii  D3 F4 A4 D5
    (43, 59, 67, 74),  # V   G2 B3 G4 D5
]


def comma_pump_chords(rounds: int = 8) -> list[tuple[int, ...]]:
    return PUMP_ROUND * rounds + [PUMP_ROUND[0]]


def _voice_lead(prev: Sequence[int], pcs: Sequence[int], need: Sequence[int]) -> tuple[int, ...]:
    """Upper voices for pitch classes ``pcs``: least total motion from ``prev``.

    Every pitch class in ``need`` must appear; voices stay distinct.
    """
    best = None
    for combo in itertools.product(pcs, repeat=len(prev)):
        if any(n not in combo for n in need):
            continue
        keys = []
        for p, pc in zip(prev, combo):
            k = p + ((pc - p) % 12)
            if k - p > 6:
                k -= 12
            keys.append(k)
        if len(set(keys)) < len(keys):
            continue
        if sorted(keys) != keys:
            continue
        cost = sum(abs(a - b) for a, b in zip(keys, prev))
        if best is None or cost < best[0]:
            best = (cost, tuple(keys))
    assert best is not None
    return best[1]


def _chain(start_upper: Sequence[int], chords: Iterable[tuple[int, Sequence[int], Sequence[int]]],
           bass_lo: int = 40) -> list[tuple[int, ...]]:
    """Chords given as (bass pitch class, chord pitch classes, required classes)."""
    out = []
    upper = tuple(start_upper)
    for bass_pc, pcs, need in chords:
        bass = bass_lo + ((bass_pc - bass_lo) % 12)
        upper = _voice_lead(upper, pcs, need)
        out.append((bass,) + upper)
    return out


def minor_cadence_chords(keys: int = 6) -> list[tuple[int, ...]]:
    """i-iv-V-i in A minor, then in the minor key a fourth higher, and so on."""
    chords = []
    for n in range(keys):
        t = (9 + 5 * n) % 12  # tonic pitch class: A, D, G, C, F, Bb
        i = (t, (t, t + 3, t + 7), (t + 3, t + 7))
        iv = (t + 5, (t + 5, t + 8, t), (t + 8, t))
        v = (t + 7, (t + 7, t + 11, t + 2), (t + 11, t + 2))
        chords += [i, iv, v, i]
    chords = [(b % 12, tuple(p % 12 for p in pcs), tuple(x % 12 for x in need)) for b, pcs, need in chords]
    return _chain((64, 69, 72), chords)


def dominant_chain_chords(length: int = 12) -> list[tuple[int, ...]]:
    """G7 C7 F7 Bb7 ... (root position; the fifth may be left out)."""
    chords = []
    for n in range(length):
        r = (7 - 7 * n) % 12  # G, C, F, Bb, ...
        chords.append((r, (r, (r + 4) % 12, (r + 7) % 12, (r + 10) % 12), ((r + 4) % 12, (r + 10) % 12)))
    t = (r + 5) % 12  # the last dominant resolves to its tonic
    chords.append((t, (t, (t + 4) % 12, (t + 7) % 12), ((t + 4) % 12,)))
    return _chain((59, 62, 65), chords)


def chromatic_passage_chords() -> list[tuple[int, ...]]:
    """C C#dim7 Dm D#dim7 Em F F#dim7 C/G G7 C: a chromatic bass rising."""
    spec = [
        (0, (0, 4, 7), (4,)),
        (1, (1, 4, 7, 10), (4, 10)),
        (2, (2, 5, 9), (5,)),
        (3, (3, 6, 9, 0), (6, 0)),
        (4, (4, 7, 11), (7,)),
        (5, (5, 9, 0), (9,)),
        (6, (6, 9, 0, 3), (9, 3)),
        (7, (0, 4, 7), (4,)),
        (7, (7, 11, 2, 5), (11, 5)),
        (0, (0, 4, 7), (4,)),
    ]
    return _chain((64, 67, 72), spec)


def chord_events(chords: Sequence[Sequence[int]], *, legato: bool = True, seconds: float = 1.0,
                 gap: float = 0.1, velocity: int = 80, channel: int = 0, start: float = 0.0) -> list[Event]:
    """Block chords as note events. Legato: keys common to consecutive chords are held."""
    ev: list[Event] = []
    sounding: set[int] = set()
    t = start
    for chord in chords:
        cs = set(chord)
        if legato:
            for k in sorted(sounding - cs):
                ev.append((t, mido.Message("note_off", note=k, velocity=0, channel=channel)))
            for k in sorted(cs - sounding):
                ev.append((t, mido.Message("note_on", note=k, velocity=velocity, channel=channel)))
            sounding = cs
        else:
            for k in sorted(cs):
                ev.append((t, mido.Message("note_on", note=k, velocity=velocity, channel=channel)))
            for k in sorted(cs):
                ev.append((t + seconds - gap, mido.Message("note_off", note=k, velocity=0, channel=channel)))
        t += seconds
    for k in sorted(sounding):
        ev.append((t, mido.Message("note_off", note=k, velocity=0, channel=channel)))
    return sort_events(ev)


def sort_events(ev: list[Event]) -> list[Event]:
    return sorted(ev, key=lambda e: (e[0], 0 if _is_off(e[1]) else 1, e[1].note if hasattr(e[1], "note") else 0))


def _is_off(m: mido.Message) -> bool:
    return m.type == "note_off" or (m.type == "note_on" and m.velocity == 0)


# -- chorales: voices written out -----------------------------------------------
# Each voice is a list of (key, beats); key None is a rest. Soprano, alto, tenor, bass.
# Note names are turned into keys by _n (C4 = 60).

_PC = {"C": 0, "D": 2, "E": 4, "F": 5, "G": 7, "A": 9, "B": 11}


def _n(name: str) -> int:
    """'F#4' -> 66, 'Bb3' -> 58 (scientific pitch, C4 = 60)."""
    pc = _PC[name[0]]
    i = 1
    while i < len(name) and name[i] in "#b":
        pc += 1 if name[i] == "#" else -1
        i += 1
    return pc + 12 * (int(name[i:]) + 1)


def _voice(text: str) -> list[tuple[Optional[int], float]]:
    """'G4:1 G4:1 F#4:.5' -> [(67, 1.0), (67, 1.0), (66, 0.5)]; 'r:1' is a rest."""
    out = []
    for tok in text.split():
        name, _, beats = tok.partition(":")
        out.append((None if name == "r" else _n(name), float(beats or 1)))
    return out


# Old Hundredth (Genevan Psalter 1551, tune by Louis Bourgeois), G major; melody from
# memory, harmonisation ours. Phrases of 8 notes, first and last of each phrase long.
OLD_HUNDREDTH = {
    "name": "old-hundredth",
    "source": "tune: Old Hundredth, L. Bourgeois, Genevan Psalter 1551 (public domain), melody from memory; "
              "four-part setting written for this project",
    "beats_per_second": 1.5,
    "voices": [
        # soprano
        "G4:2 G4:1 F#4:1 E4:1 D4:1 G4:1 A4:1 B4:2 "
        "B4:2 B4:1 B4:1 A4:1 G4:1 C5:1 B4:1 A4:2 "
        "G4:2 G4:1 F#4:1 E4:1 D4:1 G4:1 A4:1 B4:2 "
        "A4:2 G4:1 E4:1 F#4:1 G4:1 G4:1 F#4:1 G4:2",
        # alto
        "D4:2 D4:1 D4:1 C4:1 B3:1 D4:1 D4:1 D4:2 "
        "D4:2 D4:1 G4:1 F#4:1 G4:1 E4:1 D4:1 D4:2 "
        "D4:2 D4:1 D4:1 C4:1 B3:1 D4:1 D4:1 D4:2 "
        "D4:2 D4:1 C4:1 D4:1 D4:1 E4:1 D4:1 D4:2",
        # tenor
        "B3:2 B3:1 A3:1 G3:1 G3:1 B3:1 F#3:1 G3:2 "
        "G3:2 G3:1 D4:1 D4:1 D4:1 C4:1 G3:1 F#3:2 "
        "B3:2 B3:1 A3:1 G3:1 G3:1 B3:1 F#3:1 G3:2 "
        "F#3:2 G3:1 G3:1 A3:1 B3:1 C4:1 A3:1 B3:2",
        # bass
        "G2:2 G2:1 D3:1 C3:1 G2:1 G2:1 D3:1 G2:2 "
        "G2:2 G3:1 G3:1 D3:1 B2:1 A2:1 B2:1 D3:2 "
        "G2:2 G2:1 D3:1 C3:1 G2:1 G2:1 D3:1 G2:2 "
        "D3:2 E3:1 C3:1 D3:1 G2:1 C3:1 D3:1 G2:2",
    ],
}

# Tallis' Canon (Thomas Tallis, c. 1567), G major; tune from memory, setting ours
# (the tenor follows the melody a bar later as in the tune's canon, freely).
TALLIS_CANON = {
    "name": "tallis-canon",
    "source": "tune: Tallis' Canon, T. Tallis c. 1567 (public domain), melody from memory; "
              "four-part setting written for this project",
    "beats_per_second": 1.6,
    "voices": [
        "G4:1 G4:1 F#4:1 G4:1 G4:1 A4:1 A4:1 B4:1 "
        "G4:1 C5:1 C5:1 B4:1 B4:1 A4:1 A4:1 G4:1 "
        "B4:1 A4:1 G4:1 C5:1 B4:1 A4:1 A4:1 G4:1 "
        "D5:1 B4:1 G4:1 A4:1 B4:1 A4:1 G4:2",
        "D4:1 D4:1 D4:1 D4:1 E4:1 E4:1 D4:1 D4:1 "
        "D4:1 E4:1 E4:1 D4:1 G4:1 F#4:1 D4:1 D4:1 "
        "G4:1 F#4:1 E4:1 E4:1 D4:1 E4:1 D4:1 D4:1 "
        "F#4:1 G4:1 E4:1 E4:1 D4:1 D4:1 D4:2",
        "B3:1 B3:1 A3:1 B3:1 C4:1 C4:1 A3:1 G3:1 "
        "B3:1 G3:1 A3:1 G3:1 D4:1 D4:1 C4:1 B3:1 "
        "D4:1 D4:1 B3:1 A3:1 G3:1 C4:1 B3:1 A3:1 "
        "A3:1 D4:1 C4:1 C4:1 G3:1 F#3:1 B3:2",
        "G2:1 G2:1 D3:1 G2:1 C3:1 A2:1 D3:1 G2:1 "
        "G2:1 C3:1 A2:1 G2:1 G2:1 D3:1 F#2:1 G2:1 "
        "G2:1 D3:1 E3:1 A2:1 B2:1 C3:1 D3:1 D3:1 "
        "D3:1 G2:1 C3:1 A2:1 D3:1 D3:1 G2:2",
    ],
}

# Winchester New (Musikalisches Handbuch, Hamburg 1690, as sung in English hymnals),
# D major; tune from memory, setting ours.
WINCHESTER_NEW = {
    "name": "winchester-new",
    "source": "tune: Winchester New, Musikalisches Handbuch, Hamburg 1690 (public domain), melody from memory; "
              "four-part setting written for this project",
    "beats_per_second": 1.6,
    "voices": [
        "D4:1 A4:1 F#4:1 G4:1 A4:1 B4:1 A4:1 G4:1 F#4:2 r:1 "
        "A4:1 D5:1 C#5:1 B4:1 A4:1 G4:1 F#4:1 E4:2 r:1 "
        "E4:1 F#4:1 G4:1 A4:1 B4:1 A4:1 G4:1 F#4:2 r:1 "
        "A4:1 B4:1 G4:1 E4:1 F#4:1 E4:1 E4:1 D4:2",
        "D4:1 D4:1 D4:1 D4:1 D4:1 D4:1 C#4:1 C#4:1 D4:2 r:1 "
        "F#4:1 F#4:1 E4:1 E4:1 E4:1 D4:1 D4:1 C#4:2 r:1 "
        "C#4:1 D4:1 D4:1 D4:1 D4:1 D4:1 C#4:1 D4:2 r:1 "
        "D4:1 D4:1 D4:1 C#4:1 D4:1 D4:1 C#4:1 A3:2",
        "F#3:1 F#3:1 A3:1 B3:1 A3:1 G3:1 A3:1 A3:1 A3:2 r:1 "
        "A3:1 A3:1 A3:1 G#3:1 A3:1 B3:1 A3:1 A3:2 r:1 "
        "A3:1 A3:1 B3:1 A3:1 G3:1 F#3:1 A3:1 A3:2 r:1 "
        "F#3:1 G3:1 B3:1 A3:1 A3:1 B3:1 A3:1 F#3:2",
        "D3:1 F#3:1 D3:1 B2:1 F#2:1 G2:1 A2:1 A2:1 D3:2 r:1 "
        "D3:1 B2:1 A2:1 E3:1 C#3:1 B2:1 D3:1 A2:2 r:1 "
        "A2:1 D3:1 B2:1 F#2:1 G2:1 D3:1 A2:1 D3:2 r:1 "
        "D3:1 G2:1 E2:1 A2:1 D3:1 G2:1 A2:1 D2:2",
    ],
}

# St Anne (William Croft, 1708), C major; tune from memory, setting ours.
ST_ANNE = {
    "name": "st-anne",
    "source": "tune: St Anne, W. Croft 1708 (public domain), melody from memory; "
              "four-part setting written for this project",
    "beats_per_second": 1.5,
    "voices": [
        "G4:1 E4:1 A4:1 G4:1 C5:1 C5:1 B4:1 C5:2 "
        "G4:1 A4:1 F4:1 E4:1 D4:1 C4:1 B3:1 C4:2 "
        "E4:1 G4:1 G4:1 F#4:1 G4:1 E4:1 A4:1 D4:2 "
        "D5:1 C5:1 A4:1 B4:1 G4:1 A4:1 B4:1 C5:2",
        "E4:1 C4:1 C4:1 D4:1 E4:1 F4:1 D4:1 E4:2 "
        "E4:1 C4:1 C4:1 C4:1 B3:1 A3:1 G3:1 G3:2 "
        "C4:1 D4:1 E4:1 D4:1 D4:1 C4:1 C4:1 B3:2 "
        "F4:1 E4:1 F4:1 F4:1 E4:1 F4:1 F4:1 E4:2",
        "C4:1 G3:1 A3:1 B3:1 G3:1 A3:1 G3:1 G3:2 "
        "C4:1 A3:1 A3:1 G3:1 G3:1 E3:1 F3:1 E3:2 "
        "G3:1 B3:1 C4:1 A3:1 B3:1 G3:1 E3:1 G3:2 "
        "A3:1 G3:1 C4:1 D4:1 C4:1 C4:1 D4:1 C4:2",
        "C3:1 C3:1 F3:1 G3:1 C3:1 F3:1 G3:1 C3:2 "
        "C3:1 F3:1 A2:1 C3:1 G2:1 A2:1 G2:1 C3:2 "
        "C3:1 G2:1 C3:1 D3:1 G2:1 C3:1 C3:1 G2:2 "
        "D3:1 E3:1 F3:1 D3:1 E3:1 F3:1 G3:1 C3:2",
    ],
}

CHORALES = [OLD_HUNDREDTH, TALLIS_CANON, WINCHESTER_NEW, ST_ANNE]


def voices_events(voices: Sequence[str], *, beats_per_second: float = 1.5, legato: bool = True,
                  gap: float = 0.08, velocity: int = 80, channel: int = 0, start: float = 0.0) -> list[Event]:
    """Voices written as text -> note events. Legato: a voice that repeats a key holds it."""
    ev: list[Event] = []
    spb = 1.0 / beats_per_second
    for text in voices:
        beat = 0.0  # whole and half beats add exactly in binary floating point
        notes = _voice(text)
        i = 0
        while i < len(notes):
            key, beats = notes[i]
            dur = beats
            j = i + 1
            if legato and key is not None:
                while j < len(notes) and notes[j][0] == key:
                    dur += notes[j][1]
                    j += 1
            if key is not None:
                on = start + beat * spb
                off = start + (beat + dur) * spb - (0.0 if legato else gap)
                ev.append((on, mido.Message("note_on", note=key, velocity=velocity, channel=channel)))
                ev.append((off, mido.Message("note_off", note=key, velocity=0, channel=channel)))
            beat += dur
            i = j
    return sort_events(_fix_overlaps(ev))


def _fix_overlaps(ev: list[Event]) -> list[Event]:
    """Two voices on one key at once (unison): merge into one note (a keyboard has one key)."""
    ev = sort_events(ev)
    out: list[Event] = []
    depth: dict[int, int] = {}
    for t, m in ev:
        k = m.note
        if _is_off(m):
            depth[k] = depth.get(k, 0) - 1
            if depth[k] == 0:
                out.append((t, m))
        else:
            depth[k] = depth.get(k, 0) + 1
            if depth[k] == 1:
                out.append((t, m))
    return out


def chorale_events(piece: dict, *, legato: bool = True) -> list[Event]:
    return voices_events(piece["voices"], beats_per_second=piece["beats_per_second"], legato=legato)


# -- the catalogue --------------------------------------------------------------

def progression(name: str, *, legato: bool = True, rounds: int = 8) -> list[Event]:
    """Events of a named progression: pump, minor-cadences, dominant-chain, chromatic, or a chorale name."""
    if name == "pump":
        return chord_events(comma_pump_chords(rounds), legato=legato)
    if name == "minor-cadences":
        return chord_events(minor_cadence_chords(), legato=legato)
    if name == "dominant-chain":
        return chord_events(dominant_chain_chords(), legato=legato)
    if name == "chromatic":
        return chord_events(chromatic_passage_chords(), legato=legato)
    for p in CHORALES:
        if p["name"] == name:
            return chorale_events(p, legato=legato)
    raise KeyError(name)


PROGRESSIONS = ["pump", "minor-cadences", "dominant-chain", "chromatic"] + [p["name"] for p in CHORALES]


def to_midifile(events: Sequence[Event], *, ticks_per_beat: int = 480, tempo: int = 500000) -> mido.MidiFile:
    """Events -> a type 0 MIDI file (tempo 120 bpm by default)."""
    mf = mido.MidiFile(type=0, ticks_per_beat=ticks_per_beat)
    tr = mido.MidiTrack()
    mf.tracks.append(tr)
    tr.append(mido.MetaMessage("set_tempo", tempo=tempo, time=0))
    last_tick = 0
    for t, m in events:
        tick = int(round(mido.second2tick(t, ticks_per_beat, tempo)))
        tr.append(m.copy(time=tick - last_tick))
        last_tick = tick
    tr.append(mido.MetaMessage("end_of_track", time=0))
    return mf


# -- running the solver without the engine -------------------------------------------

def simulate(events: Sequence[Event], config=None, reference=None, *, chord_window: Optional[float] = None):
    """Run the adaptive solver over note events directly (no engine, no channels).

    Notes starting within the chord window of a chord's first note are solved
    together (tuned at the window's start, as if the window cost no time).
    Returns a list of :class:`retuner.measure.metrics.NoteTrack` (the ideal output).
    """
    from retuner.adaptive.solver import AdaptiveConfig, AdaptiveSolver  # lazy: numpy, not at start-up

    cfg = config if config is not None else AdaptiveConfig()
    solver = AdaptiveSolver(cfg, reference)
    win = cfg.chord_window if chord_window is None else chord_window
    sounding: dict[int, NoteTrack] = {}
    done: list[NoteTrack] = []
    pending: list[int] = []
    t_first: Optional[float] = None

    def flush(t_solve: float) -> None:
        nonlocal pending, t_first
        if not pending:
            return
        held = [(k, nt.steps[-1][1]) for k, nt in sounding.items() if k not in pending]
        hc, nc = solver.solve(held, pending)
        for (k, _), c in zip(held, hc):
            nt = sounding[k]
            if abs(c - nt.steps[-1][1]) > 1e-12:
                nt.steps.append((t_solve, c))
        for k, c in zip(pending, nc):
            sounding[k] = NoteTrack(k, 0, t_first, steps=[(t_first, c)])
        pending = []
        t_first = None

    for t, m in events:
        if pending and t > t_first + win:
            flush(t_first)
        if m.type not in ("note_on", "note_off"):
            continue
        if _is_off(m):
            if m.note in pending:
                # a note that ends inside the window is still tuned with its chord
                flush(t_first)
            nt = sounding.pop(m.note, None)
            if nt is not None:
                nt.end = t
                done.append(nt)
        else:
            if m.note in sounding:
                nt = sounding.pop(m.note)
                nt.end = t
                done.append(nt)
            if t_first is None:
                t_first = t
            if m.note not in pending:
                pending.append(m.note)
    if pending:
        flush(t_first)
    t_end = events[-1][0] if events else 0.0
    for nt in sounding.values():
        nt.end = t_end
        done.append(nt)
    done.sort(key=lambda n: (n.start, n.key))
    return done


# -- retuner bench --adaptive ---------------------------------------------------------

def run_through_engine(events: Sequence[Event], tuning=None, *, adaptive=None, mode: str = "pool"):
    """Play events through a fresh engine (as the daemon would) and return its output stream."""
    eng = Engine(tuning or Tuning.equal12(), EngineConfig(mode=mode, adaptive=adaptive))
    return play(eng, events)


def _figures(stream) -> dict:
    r = report(stream)
    return {k: r[k] for k in ("impurity_cents", "motion_cents_per_note", "drift_max_cents",
                              "drift_max_any_moment_cents", "late_motion_cents_per_note", "drift_final_cents",
                              "drift_rms_cents", "notes")}


def humanise(events: Sequence[Event], spread: float = 0.025, seed: int = 1) -> list[Event]:
    """The events as a player's hands give them: each note-on and note-off a random
    0..``spread`` seconds late (chord notes no longer start or end together); the same
    ``seed`` gives the same performance."""
    rng = random.Random(seed)
    out = [((t + rng.uniform(0.0, spread)) if m.type in ("note_on", "note_off") else t, m)
           for t, m in events]
    return sort_events(out)


def added_latency(events: Sequence[Event], stream: Sequence[Event]) -> list[float]:
    """Per input note-on: how much later (seconds, in the engine's clock) its note-on left
    (see :func:`retuner.measure.metrics.added_latency`); sorted."""
    ons = lambda evs: [(t, m.note) for t, m in evs if m.type == "note_on" and m.velocity]
    return metrics_added_latency(ons(events), ons(stream))


def live_figures(events: Sequence[Event], tuning, acfg, mode: str = "pool",
                 corrections: Optional[list] = None) -> dict:
    """Figures of one performance played live: the measures, the added latency of every
    note-on (engine clock, ms), the engine's compute per note-on (wall clock, us) and the
    retunes within the attack; ``corrections``, if given, is extended by every note's
    correction within its attack (cents)."""
    eng = Engine(tuning, EngineConfig(mode=mode, adaptive=acfg))
    drive = Drive(eng)
    drive_out: list = [(0.0, m) for m in drive.start(0.0)]
    compute: list[float] = []
    for t, m in events:
        for when, res in drive.due(t):
            drive_out += [(when, x) for x in res]
        t0 = time.perf_counter_ns()
        res = eng.feed(t, m)          # timed on its own: the engine's work for this event
        if m.type == "note_on" and m.velocity:
            compute.append((time.perf_counter_ns() - t0) / 1000.0)
        drive_out += [(t, x) for x in res]
    for when, res in drive.finish():
        drive_out += [(when, x) for x in res]
    f = _figures(drive_out)
    lat = added_latency(events, drive_out)
    compute.sort()
    st = eng.stats
    corr = eng.attack_corrections
    if corrections is not None:
        corrections.extend(corr)
    big = [c for c in corr if c > CORRECTED]
    f.update({"latency_p50_ms": round(1000 * percentile(lat, 50), 3), "latency_p99_ms": round(1000 * percentile(lat, 99), 3),
              "compute_p99_us": round(percentile(compute, 99), 1),
              "attack_retunes_per_note": round(st["attack_retunes"] / max(1, st["notes"]), 3),
              "attack_retune_cents_mean": round(st["attack_retune_cents_total"] / max(1, st["attack_retunes"]), 3),
              # how often the first guess missed: notes whose pitch at the end of their attack lies
              # more than 0.5 c from the pitch they left with, and the median of those corrections
              "attack_corrected_per_note": round(st["attack_corrected_notes"] / max(1, st["notes"]), 4),
              "attack_corrected_median_cents": round(statistics.median(big), 3) if big else 0.0,
              "attack_corrected_notes": st["attack_corrected_notes"],
              # what moved notes already sounding (the motion after the attack), c/note by cause
              "held_motion_by_cause": {k: round(v / max(1, st["notes"]), 4) for k, v in sorted(eng.held_motion.items())}})
    return f


def _average(per: Sequence[dict]) -> dict:
    """The mean of each figure over pieces (causes of held-note motion: per cause)."""
    avg = {k: round(sum(f[k] for f in per) / len(per), 6) for k in per[0]
           if k not in ("notes", "held_motion_by_cause")}
    if "held_motion_by_cause" in per[0]:
        causes = sorted({c for f in per for c in f["held_motion_by_cause"]})
        avg["held_motion_by_cause"] = {c: round(sum(f["held_motion_by_cause"].get(c, 0.0) for f in per) / len(per), 4)
                                       for c in causes}
    return avg


def bench_setups() -> dict:
    """The tunings compared by ``adaptive_bench``: name -> (tuning id, AdaptiveConfig or None)."""
    from retuner.adaptive.solver import AdaptiveConfig  # lazy: numpy, not at start-up
    return {
        "adaptive": ("edo12", AdaptiveConfig()),
        "chord-window": ("edo12", AdaptiveConfig(chord_window=0.02)),
        "edo12": ("edo12", None),
        "meantone-quarter": ("meantone-quarter", None),
        "free": ("edo12", AdaptiveConfig(policy="free+reset", max_drift=1200.0,
                                                        max_motion=1200.0, motion_weight=2.0,
                                                        centre_weight=1.0)),
        "fixed-held": ("edo12", AdaptiveConfig(policy="fixed-held+reset")),
    }


def solver_timing(events: int = 5000, voices: int = 8, seed: int = 1, clock: str = "wall") -> dict:
    """Time of ``AdaptiveSolver.solve`` per event with ``voices`` sounding notes:
    wall clock, or (``clock="cpu"``) this thread's CPU time, steadier on a busy machine.

    Each event releases two of the sounding notes and strikes two new ones (from a
    diatonic set, so the chords are musical), the rest are held at the pitches the
    solver gave them.
    """
    from retuner.adaptive.solver import AdaptiveConfig, AdaptiveSolver  # lazy: numpy, not at start-up

    rng = random.Random(seed)
    solver = AdaptiveSolver(AdaptiveConfig())
    scale = [k for k in range(40, 88) if k % 12 in (0, 2, 4, 5, 7, 9, 11)]
    keys = sorted(rng.sample(scale, voices))
    _, cents = solver.solve([], keys)
    sounding = dict(zip(keys, cents))
    lat = []
    clock_ns = time.thread_time_ns if clock == "cpu" else time.perf_counter_ns
    for _ in range(events):
        for k in rng.sample(sorted(sounding), 2):
            del sounding[k]
        new = rng.sample([k for k in scale if k not in sounding], 2)
        held = list(sounding.items())
        t0 = clock_ns()
        h, n = solver.solve(held, new)
        lat.append(clock_ns() - t0)
        sounding = dict(zip([k for k, _ in held], h))
        sounding.update(zip(new, n))
    lat.sort()

    def pct(q):
        return round(percentile(lat, q) / 1000.0, 1)

    return {"voices": voices, "events": events, "clock": clock, "p50_us": pct(50), "p99_us": pct(99),
            "max_us": round(lat[-1] / 1000.0, 1)}


def adaptive_bench(rounds: int = 8, mode: str = "pool", solver_events: int = 5000, clock: str = "wall") -> dict:
    """Figures for ``retuner bench --adaptive``: the comma pump and the chorales through the
    engine, measured from its output (retuner.measure.metrics), for adaptive mode and for the
    tunings it is compared with; and the solver's time per event with 8 voices."""

    setups = bench_setups()
    pump = progression("pump", legato=True, rounds=rounds)
    out: dict = {"pump": {}, "chorales": {}, "solver": solver_timing(solver_events, clock=clock)}
    for name, (tid, acfg) in setups.items():
        tuning = load_profile(tid)
        out["pump"][name] = _figures(run_through_engine(pump, tuning, adaptive=acfg, mode=mode))
        per = [_figures(run_through_engine(chorale_events(p), tuning, adaptive=acfg, mode=mode))
               for p in CHORALES]
        avg = {k: round(sum(f[k] for f in per) / len(per), 6) for k in per[0] if k != "notes"}
        avg["drift_max_worst_cents"] = max(f["drift_max_cents"] for f in per)
        avg["drift_max_any_moment_worst_cents"] = max(f["drift_max_any_moment_cents"] for f in per)
        avg["pieces"] = len(per)
        out["chorales"][name] = avg
    # played by hand: chord notes and releases spread over 0..25 ms
    edo12 = load_profile("edo12")
    out["humanised"] = {}
    for name in ("adaptive", "chord-window"):
        acfg = setups[name][1]
        hp = live_figures(humanise(pump), edo12, acfg, mode)
        corr: list[float] = []
        per = [live_figures(humanise(chorale_events(p), seed=i + 2), edo12, acfg, mode, corr)
               for i, p in enumerate(CHORALES)]
        avg = _average(per)
        # the first guess over all the chorales' notes (not a mean of the pieces' shares)
        big = [c for c in corr if c > CORRECTED]
        avg["attack_corrected_notes"] = sum(f["attack_corrected_notes"] for f in per)
        avg["attack_notes"] = sum(f["notes"] for f in per)
        avg["attack_corrected_per_note"] = round(avg["attack_corrected_notes"] / max(1, avg["attack_notes"]), 4)
        avg["attack_corrected_median_cents"] = round(statistics.median(big), 3) if big else 0.0
        avg["drift_max_worst_cents"] = max(f["drift_max_cents"] for f in per)
        avg["latency_p99_ms"] = max(f["latency_p99_ms"] for f in per)
        out["humanised"][name] = {"pump": hp, "chorales": avg}
    p = out["pump"]["adaptive"]
    c = out["chorales"]["adaptive"]
    hp, hc = out["humanised"]["adaptive"]["pump"], out["humanised"]["adaptive"]["chorales"]
    out["goals"] = {
        "live_latency_p99<=1ms": max(hp["latency_p99_ms"], hc["latency_p99_ms"]) <= 1.0,
        "live_chorale_impurity<=0.7": hc["impurity_cents"] <= 0.7,
        "live_chorale_late_motion<=0.15": hc["late_motion_cents_per_note"] <= 0.15,
        "live_chorale_drift<=5": hc["drift_max_worst_cents"] <= 5.0,
        "live_pump_impurity<=1.1": hp["impurity_cents"] <= 1.1,
        "live_pump_late_motion<=1.5": hp["late_motion_cents_per_note"] <= 1.5,
        "live_pump_drift<=5": hp["drift_max_cents"] <= 5.0,
        "pump_impurity<=1.0": p["impurity_cents"] <= 1.0,
        "pump_motion<=1.5": p["motion_cents_per_note"] <= 1.5,
        "pump_drift<=5": p["drift_max_cents"] <= 5.0,
        "chorale_impurity<=0.8": c["impurity_cents"] <= 0.8,
        "chorale_motion<=0.3": c["motion_cents_per_note"] <= 0.3,
        "chorale_drift<=5": c["drift_max_worst_cents"] <= 5.0,
        "solver_p99<=150us": out["solver"]["p99_us"] <= 150.0,
    }
    return out


#: the causes of held-note motion (Engine.held_motion) in the bench's words
CAUSE_WORDS = {
    "chord:recentre": "re-centring at a new chord",
    "release:recentre": "re-centring when a note of the last chord ended in the new one's attack",
    "chord:drift-limit": "drift limit at a new chord",
    "release:drift-limit": "drift limit when a note ended",
    "chord:recentre+drift-limit": "re-centring and drift limit at a new chord",
    "release:recentre+drift-limit": "re-centring and drift limit when a note ended",
    "chord:free": "least squares at a new chord", "release:free": "least squares when a note ended",
}


def format_adaptive_bench(res: dict) -> str:
    lines = []
    s = res["solver"]
    lines.append(f"adaptive solver, {s['voices']} voices, {s['events']} events ({s['clock']} clock): "
                 f"p50 {s['p50_us']} us, "
                 f"p99 {s['p99_us']} us, max {s['max_us']} us")
    for title, key in (("comma pump (legato, 4 voices)", "pump"),
                       (f"chorales (average of {len(CHORALES)})", "chorales")):
        lines.append(f"{title}, block chords: impurity c | motion c/note | drift max c (>= 50 ms; "
                     f"any moment) | drift final c")
        for name, f in res[key].items():
            dm = f.get("drift_max_worst_cents", f["drift_max_cents"])
            ds = f.get("drift_max_any_moment_worst_cents", f["drift_max_any_moment_cents"])
            lines.append(f"  {name:22s} {f['impurity_cents']:7.3f} | {f['motion_cents_per_note']:6.3f} | {dm:7.2f} ({ds:6.2f}) | "
                         f"{f['drift_final_cents']:7.2f}")
    lines.append("played by hand (notes and releases spread 0..25 ms): impurity c | motion after the attack "
                 "c/note | drift max c | added latency p50/p99 ms | engine per note-on p99 us | "
                 "retunes in the attack per note (mean c) | notes corrected by more than "
                 f"{CORRECTED} c in their attack (median c)")
    for name, h in res.get("humanised", {}).items():
        for piece, f in (("pump", h["pump"]), ("chorales", h["chorales"])):
            dm = f.get("drift_max_worst_cents", f["drift_max_cents"])
            lines.append(f"  {name + ' ' + piece:22s} {f['impurity_cents']:7.3f} | {f['late_motion_cents_per_note']:6.3f} | {dm:6.2f} | "
                         f"{f['latency_p50_ms']:5.1f}/{f['latency_p99_ms']:5.1f} | {f['compute_p99_us']:7.1f} | "
                         f"{f['attack_retunes_per_note']:.2f} ({f['attack_retune_cents_mean']:.2f}) | "
                         f"{100 * f['attack_corrected_per_note']:.0f} % ({f['attack_corrected_median_cents']:.2f})")
            causes = f.get("held_motion_by_cause") or {}
            if causes:
                lines.append("    sounding notes moved, c/note by cause: " + ", ".join(
                    f"{CAUSE_WORDS.get(c, c)} {v:.3f}" for c, v in sorted(causes.items(), key=lambda cv: -cv[1])))
    lines.append("goals: " + ", ".join(f"{k} {'yes' if v else 'NO'}" for k, v in res["goals"].items()))
    return "\n".join(lines)
