"""``retuner bench``: play a generated performance through the engine, in-process,
and measure it.

Figures (``measure``):

* ``p50_us``, ``p99_us``, ``max_us``: wall time of each ``engine.feed`` /
  ``engine.tick`` call in microseconds (``time.perf_counter_ns``), over every
  input event;
* ``messages_per_note_on``: messages the engine sent in answer to note-ons
  (the note-on itself, the bends it needed, note-offs of stolen notes; in
  adaptive mode also the held notes' motion), divided by the note-ons it
  accepted. Messages that answer pedals, the wheel and other controllers are
  counted in ``messages_out`` but not here;
* ``ringing_retunes``, ``steals``: engine counters; also
  ``ringing_retunes_below_pool`` — ringing retunes that happened while fewer
  notes sounded than the pool has channels (the goal is zero).

The performance (``generate_performance``, seeded, deterministic) is written
for this project: diatonic harmony in changing keys, played by two hands with
human timing (chord notes spread over up to 30 ms, velocities vary), block
chords of up to 8 voices, broken chords and a melody over chords, the sustain
pedal changed after each chord ("legato pedalling"), and occasional wheel bends
on melody notes.

Other performances can be benched by name (``performance(name)``): the
project's progressions (``retuner.bench.progressions``), or any registered with
:func:`register_performance`.
"""

from __future__ import annotations

import gc
import math
import random
import time
from typing import Callable, Iterable, Sequence

import mido

from retuner.engine.core import Engine, EngineConfig
from retuner.pitch.tuning import Tuning

Event = tuple[float, mido.Message]

JSON_KEYS = ("p50_us", "p99_us", "max_us", "messages_per_note_on", "ringing_retunes", "steals")

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
    names = list(_REGISTRY)
    try:
        from retuner.bench import progressions
        names += [n for n in progressions.PROGRESSIONS if n not in names]
    except ImportError:  # pragma: no cover - progressions are optional
        pass
    return names


def performance(name: str = "generated", n_note_events: int = 10000, seed: int = 1) -> list[Event]:
    """A named performance. Progressions are repeated (shifted in time) until
    they hold ``n_note_events`` note events."""
    if name in _REGISTRY:
        return _REGISTRY[name](n_note_events=n_note_events, seed=seed)
    from retuner.bench import progressions
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


def _percentile(sorted_values: Sequence[float], q: float) -> float:
    """Nearest-rank percentile of already sorted values."""
    if not sorted_values:
        return 0.0
    i = max(0, min(len(sorted_values) - 1, int(math.ceil(q / 100.0 * len(sorted_values))) - 1))
    return sorted_values[i]


CLOCKS = {"wall": time.perf_counter_ns, "cpu": time.thread_time_ns}


def measure(tuning: Tuning, config: EngineConfig, events: Sequence[Event], *,
            keep_output: bool = False, clock: str = "wall") -> dict:
    """Play ``events`` through a fresh engine and return the figures (see the module docstring).
    With ``keep_output`` the result also holds ``output``: [(t, msg), ...].

    ``clock``: "wall" (default; what a player waits, including any time the
    operating system gives other processes) or "cpu" (this thread's CPU time:
    the engine's own cost, steadier on a busy machine)."""
    engine = Engine(tuning, config)
    output: list[Event] = []
    start = engine.start(0.0)
    if keep_output:
        output += [(0.0, m) for m in start]
    pool_size = len(engine.pool.channels)
    lat: list[int] = []
    note_ons = 0
    rr_below = 0
    clock = CLOCKS[clock]
    gc.collect()   # start clean; the collector stays on, as in the daemon
    for t, msg in events:
        deadline = engine.next_deadline()
        if deadline is not None and deadline <= t:
            t0 = clock()
            out = engine.tick(deadline)
            lat.append(clock() - t0)
            if keep_output:
                output += [(deadline, m) for m in out]
        is_on = msg.type == "note_on" and msg.velocity > 0
        if is_on:
            note_ons += 1
            below = engine.pool.sounding_count() < pool_size
            rr = engine.stats["ringing_retunes"]
        t0 = clock()
        out = engine.feed(t, msg)
        lat.append(clock() - t0)
        if is_on and below and engine.stats["ringing_retunes"] != rr:
            rr_below += 1
        if keep_output:
            output += [(t, m) for m in out]
    deadline = engine.next_deadline()
    if deadline is not None:
        out = engine.tick(deadline)
        if keep_output:
            output += [(deadline, m) for m in out]
    lat.sort()
    st = engine.stats
    accepted = max(1, st["notes"])
    res = {
        "p50_us": round(_percentile(lat, 50) / 1000.0, 2),
        "p99_us": round(_percentile(lat, 99) / 1000.0, 2),
        "max_us": round(lat[-1] / 1000.0 if lat else 0.0, 2),
        "messages_per_note_on": round(st["note_on_messages"] / accepted, 4),
        "ringing_retunes": st["ringing_retunes"],
        "steals": st["steals"],
        "ringing_retunes_below_pool": rr_below,
        "events": len(events),
        "note_ons": note_ons,
        "note_events": sum(1 for _, m in events if m.type in ("note_on", "note_off")),
        "messages_out": st["messages_out"],
        "bends_sent": st["bends_sent"],
        "mean_us": round(sum(lat) / len(lat) / 1000.0, 2) if lat else 0.0,
    }
    if keep_output:
        res["output"] = output
    return res
