"""Synthetic performances of our own, seeded and deterministic, for ``retuner bench`` and the
tests: one place that makes them.

* :func:`generate_performance`: a live keyboard performance as (seconds, message): diatonic
  harmony in changing keys, played by two hands with human timing (chord notes spread over
  up to 30 ms, velocities vary), block chords of up to 8 voices, broken chords and a melody
  over chords, the sustain pedal changed after each chord ("legato pedalling"), and
  occasional wheel bends on melody notes.
* :func:`arrangement_tracks`: a file-sized arrangement as tracks of (tick, bytes): a piano
  part (chords of 1..4 notes, sustain pedal, some wheel), a bass part and drums.
* :func:`piano_tracks`: a piano-like file: a three-note chord each bar held by the pedal and
  a melody over it, never more than ``voices`` notes sounding at once (pedal included).
* :func:`performance`: a performance by name: the generated one, one of the project's
  progressions (:mod:`retuner.bench.progressions`) repeated, or one registered with
  :func:`register_performance`.

Tick-based tracks are written with :func:`file_bytes` (retuner's own writer; tests that need
an independent writer write the same events with mido).
"""

from __future__ import annotations

import math
import random
from typing import Callable, Iterable, Sequence

import mido

from retuner.bench import progressions
from retuner.smf.writer import serialize

Event = tuple[float, mido.Message]
TPB = 480

MAJOR = (0, 2, 4, 5, 7, 9, 11)
MINOR = (0, 2, 3, 5, 7, 8, 11)    # harmonic minor: a leading tone for V
# chord degrees (0-based scale steps) and how often they come
PROGRESSION_STEPS = ((0, 5), (3, 3), (4, 4), (5, 2), (1, 2), (2, 1))


def _chord(scale: Sequence[int], tonic: int, degree: int, seventh: bool) -> list[int]:
    """Pitch classes of a diatonic triad (or seventh chord) on ``degree``."""
    n = 4 if seventh else 3
    return [(tonic + scale[(degree + 2 * i) % 7]) % 12 for i in range(n)]


def _voicing(pcs: Sequence[int], lo: int, hi: int, voices: int, rng: random.Random) -> list[int]:
    """``voices`` keys in [lo, hi] taking the pitch classes in turn, upwards, bass first."""
    keys: list[int] = []
    k = lo + (pcs[0] - lo) % 12
    i = 0
    while len(keys) < voices and k <= hi:
        keys.append(k)
        i += 1
        nxt = pcs[i % len(pcs)]
        k = k + 1 + (nxt - k - 1) % 12
        if rng.random() < 0.15:
            k += 12 if k + 12 <= hi else 0
    return keys


def generate_performance(n_note_events: int = 10000, seed: int = 1, *, pedal: bool = True,
                         wheel: bool = True, channel: int = 0) -> list[Event]:
    """A seeded performance with at least ``n_note_events`` note-ons plus note-offs."""
    rng = random.Random(seed)
    ev: list[Event] = []
    t = 0.5
    count = 0
    tonic = rng.randrange(12)
    scale = MAJOR
    beat = 0.6
    degrees = [d for d, w in PROGRESSION_STEPS for _ in range(w)]

    def note(t0: float, dur: float, key: int, vel: int) -> None:
        nonlocal count
        key = max(21, min(108, key))
        ev.append((t0, mido.Message("note_on", channel=channel, note=key, velocity=vel)))
        off_vel = rng.choice((0, 0, 64))
        if off_vel == 0 and rng.random() < 0.5:
            m = mido.Message("note_on", channel=channel, note=key, velocity=0)
        else:
            m = mido.Message("note_off", channel=channel, note=key, velocity=off_vel)
        ev.append((t0 + dur, m))
        count += 2

    while count < n_note_events:
        # a phrase of 8 chords in one key, then maybe a change of key
        if rng.random() < 0.3:
            tonic = (tonic + rng.choice((5, 7, 9, 3))) % 12
            scale = MINOR if rng.random() < 0.3 else MAJOR
        texture = rng.choice(("block", "broken", "melody", "melody"))
        beat = rng.uniform(0.35, 0.7)
        for bar in range(8):
            deg = 0 if bar in (0, 7) else (4 if bar == 6 else rng.choice(degrees))
            seventh = deg == 4 and rng.random() < 0.5 or rng.random() < 0.15
            pcs = _chord(scale, tonic, deg, seventh)
            bar_len = 4 * beat
            if pedal and bar > 0:
                # legato pedalling: up just after the new chord, down again soon after
                ev.append((t + rng.uniform(0.03, 0.08),
                           mido.Message("control_change", channel=channel, control=64, value=0)))
                ev.append((t + rng.uniform(0.12, 0.2),
                           mido.Message("control_change", channel=channel, control=64,
                                        value=rng.randrange(100, 128))))
            if texture == "block":
                n = rng.randrange(4, 9)
                keys = _voicing(pcs, 36 + rng.randrange(8), 88, n, rng)
                for rep in range(2):
                    t0 = t + rep * 2 * beat
                    for k in keys:
                        note(t0 + rng.uniform(0, 0.03), 2 * beat * rng.uniform(0.7, 1.0), k,
                             rng.randrange(45, 110))
            elif texture == "broken":
                keys = _voicing(pcs, 36 + rng.randrange(8), 84, rng.randrange(5, 9), rng)
                step = bar_len / (2 * len(keys))
                for rep in range(2):
                    for i, k in enumerate(keys):
                        note(t + (rep * len(keys) + i) * step + rng.uniform(0, 0.01),
                             step * rng.uniform(1.0, 3.0), k, rng.randrange(40, 100))
            else:
                left = _voicing(pcs, 40 + rng.randrange(6), 66, rng.randrange(3, 5), rng)
                for k in left:
                    note(t + rng.uniform(0, 0.03), bar_len * rng.uniform(0.8, 0.98), k, rng.randrange(40, 80))
                # melody: scale notes, chord tones on strong beats
                m_keys = [60 + 12 + (tonic + s) % 12 - 12 + 12 * (rng.random() < 0.4) for s in scale]
                n_mel = rng.choice((4, 4, 8, 6))
                step = bar_len / n_mel
                for i in range(n_mel):
                    if i % 2 == 0:
                        pc = rng.choice(pcs)
                        k = 72 + (pc - 72) % 12 - (12 if rng.random() < 0.3 else 0)
                    else:
                        k = rng.choice(m_keys)
                    t0 = t + i * step + rng.uniform(0, 0.012)
                    dur = step * rng.uniform(0.85, 1.1)
                    note(t0, dur, k, rng.randrange(60, 115))
                    if wheel and rng.random() < 0.08:
                        # a wheel bend on this note: up and back over ~300 ms
                        depth = rng.randrange(800, 4000)
                        for j in range(1, 13):
                            v = int(depth * math.sin(math.pi * j / 12))
                            ev.append((t0 + 0.02 + j * 0.025,
                                       mido.Message("pitchwheel", channel=channel, pitch=v)))
                        ev.append((t0 + 0.02 + 13 * 0.025, mido.Message("pitchwheel", channel=channel, pitch=0)))
            t += bar_len
        if pedal:
            ev.append((t + 0.05, mido.Message("control_change", channel=channel, control=64, value=0)))
        t += rng.uniform(0.3, 1.0)
    return sort_events(ev)


def _is_off(m: mido.Message) -> bool:
    return m.type == "note_off" or (m.type == "note_on" and m.velocity == 0)


def sort_events(ev: Iterable[Event]) -> list[Event]:
    """By time; at equal times note-offs first (a repeated key is released before it is struck again)."""
    return sorted(ev, key=lambda e: (e[0], 0 if _is_off(e[1]) else 1))


_REGISTRY: dict[str, Callable[..., list[Event]]] = {"generated": generate_performance}


def register_performance(name: str, fn: Callable[..., list[Event]]) -> None:
    """Make a performance available to ``retuner bench --performance NAME``.
    ``fn(n_note_events=..., seed=...)`` returns sorted (t, msg) events."""
    _REGISTRY[name] = fn


def performance_names() -> list[str]:
    return list(_REGISTRY) + [n for n in progressions.PROGRESSIONS if n not in _REGISTRY]


def performance(name: str = "generated", n_note_events: int = 10000, seed: int = 1) -> list[Event]:
    """A named performance. Progressions are repeated (shifted in time) until
    they hold ``n_note_events`` note events."""
    if name in _REGISTRY:
        return _REGISTRY[name](n_note_events=n_note_events, seed=seed)
    one = progressions.progression(name)
    if not one:
        return []
    span = one[-1][0] + 1.0
    out: list[Event] = []
    rep = 0
    notes = 0
    per = sum(1 for _, m in one if m.type in ("note_on", "note_off"))
    while notes < n_note_events and per:
        out += [(t + rep * span, m) for t, m in one]
        notes += per
        rep += 1
    return out


# -- files: tracks of (tick, bytes) ---------------------------------------------------

def arrangement_tracks(events: int, seed: int = 1, wheel: bool = True) -> list[tuple[list, int]]:
    """About ``events`` events of an arrangement: a conductor track, a piano part (chords of
    1..4 notes, sustain pedal, some wheel), a bass part and drums; [(events, end tick)]."""
    rnd = random.Random(seed)
    piano: list = []
    bass: list = []
    drums: list = []
    tick = 0
    n = 0
    scale = [0, 2, 4, 5, 7, 9, 11]
    while n < events:
        root = 48 + rnd.choice(scale)
        size = rnd.randint(1, 4)
        keys = sorted({root + 12 + rnd.choice(scale) + 12 * rnd.randint(0, 1) for _ in range(size)})
        length = rnd.choice((120, 240, 480))
        for k in keys:
            piano.append((tick, bytes((0x90, k, rnd.randint(40, 110)))))
            piano.append((tick + length - 10, bytes((0x80, k, 0))))
        bass.append((tick, bytes((0x91, root - 12, 90))))
        bass.append((tick + length - 5, bytes((0x81, root - 12, 0))))
        drums.append((tick, bytes((0x99, 36 if rnd.random() < 0.5 else 42, 100))))
        drums.append((tick + 60, bytes((0x89, 36, 0))))
        n += 2 * len(keys) + 4
        if rnd.random() < 0.05:
            piano.append((tick, bytes((0xB0, 64, 127))))
            piano.append((tick + length, bytes((0xB0, 64, 0))))
            n += 2
        if wheel and rnd.random() < 0.05:
            for i in range(4):
                v = 8192 + (i - 2) * 500
                piano.append((tick + i * 20, bytes((0xE0, v & 0x7F, v >> 7))))
            piano.append((tick + 100, bytes((0xE0, 0, 64))))
            n += 5
        tick += length
    tracks = [([(0, b"\xFF\x51\x03\x07\xA1\x20"), (0, b"\xFF\x58\x04\x04\x02\x18\x08")], tick)]
    for evs in (piano, bass, drums):
        evs.sort(key=lambda e: e[0])
        tracks.append((evs, tick + TPB))
    return tracks


def piano_tracks(messages: int, seed: int = 1, voices: int = 7) -> list[tuple[list, int]]:
    """A piano-like type 0 file of about ``messages`` channel messages: each bar a chord of
    three notes and a melody of up to ``voices - 3`` notes over it, the sustain pedal down
    after the chord and up before the next one, so at most ``voices`` notes sound at once
    (keys down and held by the pedal); [(events, end tick)]."""
    rnd = random.Random(seed)
    scale = (0, 2, 4, 5, 7, 9, 11)
    ev: list = []
    tick = 0
    tonic = 60
    while len(ev) < messages:
        if rnd.random() < 0.1:
            tonic = 55 + rnd.randrange(12)
        deg = rnd.randrange(7)
        chord = sorted({tonic - 12 + scale[(deg + 2 * i) % 7] + 12 * ((deg + 2 * i) // 7) for i in range(3)})
        bar = 4 * TPB
        ev.append((tick, bytes((0xB0, 64, 0))))                       # pedal up: the last bar ends
        for k in chord:
            ev.append((tick + 1, bytes((0x90, k, rnd.randint(40, 90)))))
        ev.append((tick + 30, bytes((0xB0, 64, 127))))                # pedal down: the chord rings on
        for k in chord:
            ev.append((tick + bar // 2, bytes((0x80, k, 64))))
        n_mel = rnd.randint(1, voices - 3)
        step = bar // n_mel
        for i in range(n_mel):
            k = tonic + 12 + rnd.choice(scale) - 12 * (rnd.random() < 0.3)
            on = tick + 1 + i * step + rnd.randrange(5)
            ev.append((on, bytes((0x90, k, rnd.randint(50, 110)))))
            ev.append((min(on + step - 10, tick + bar - 2), bytes((0x80, k, 0))))
        tick += bar
    ev.append((tick, bytes((0xB0, 64, 0))))
    ev.sort(key=lambda e: e[0])                                       # stable: order at a tick kept
    return [([(0, b"\xFF\x51\x03\x07\xA1\x20")] + ev, tick + TPB)]


def file_bytes(tracks: Sequence[tuple[list, int]], tpb: int = TPB) -> bytes:
    """A Standard MIDI File (type 1 for several tracks, 0 for one) of ``tracks``."""
    return serialize(0 if len(tracks) == 1 else 1, tpb, tracks)


def write_file(path: str, tracks: Sequence[tuple[list, int]], tpb: int = TPB) -> int:
    """Write ``tracks`` as a file; returns the number of events written."""
    with open(path, "wb") as fh:
        fh.write(file_bytes(tracks, tpb))
    return sum(len(evs) for evs, _ in tracks)
