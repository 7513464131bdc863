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

The performances (the generated one, the project's progressions) come from
:mod:`retuner.bench.performance`; the engine is driven by the one drive loop
(:mod:`retuner.engine.drive`), with each call timed.
"""

from __future__ import annotations

import gc
import time
from typing import Sequence

import mido

from retuner.engine.core import Engine, EngineConfig
from retuner.engine.drive import Drive
from retuner.measure.metrics import percentile
from retuner.pitch.tuning import Tuning

Event = tuple[float, mido.Message]

JSON_KEYS = ("p50_us", "p99_us", "max_us", "messages_per_note_on", "ringing_retunes", "steals")


CLOCKS = {"wall": time.perf_counter_ns, "cpu": time.thread_time_ns}


class _Timed:
    """An engine whose feed and tick calls are timed (the figures are the engine's own cost:
    the drive loop's bookkeeping stays outside the clock)."""

    def __init__(self, engine: Engine, clock):
        self.engine = engine
        self.clock = clock
        self.lat: list[int] = []

    def start(self, t: float) -> list:
        return self.engine.start(t)

    def next_deadline(self):
        return self.engine.next_deadline()

    def feed(self, t: float, msg) -> list:
        clock = self.clock
        t0 = clock()
        out = self.engine.feed(t, msg)
        self.lat.append(clock() - t0)
        return out

    def tick(self, t: float) -> list:
        clock = self.clock
        t0 = clock()
        out = self.engine.tick(t)
        self.lat.append(clock() - t0)
        return out


def measure(tuning: Tuning, config: EngineConfig, events: Sequence[Event], *,
            keep_output: bool = False, clock: str = "wall") -> dict:
    """Play ``events`` through a fresh engine and return the figures (see the module docstring).
    With ``keep_output`` the result also holds ``output``: [(t, msg), ...].

    ``clock``: "wall" (default; what a player waits, including any time the
    operating system gives other processes) or "cpu" (this thread's CPU time:
    the engine's own cost, steadier on a busy machine)."""
    engine = Engine(tuning, config)
    timed = _Timed(engine, CLOCKS[clock])
    drive = Drive(timed)
    output: list[Event] = []
    start = drive.start(0.0)
    if keep_output:
        output += [(0.0, m) for m in start]
    pool_size = len(engine.pool.channels)
    note_ons = 0
    rr_below = 0
    gc.collect()   # start clean; the collector stays on, as in the daemon
    for t, msg in events:
        is_on = msg.type == "note_on" and msg.velocity > 0
        for when, out in drive.due(t):
            if keep_output:
                output += [(when, m) for m in out]
        if is_on:
            note_ons += 1
            below = engine.pool.sounding_count() < pool_size
            rr = engine.stats["ringing_retunes"]
        out = timed.feed(t, msg)
        if is_on and below and engine.stats["ringing_retunes"] != rr:
            rr_below += 1
        if keep_output:
            output += [(t, m) for m in out]
    for when, out in drive.finish():
        if keep_output:
            output += [(when, m) for m in out]
    lat = sorted(timed.lat)
    st = engine.stats
    accepted = max(1, st["notes"])
    res = {
        "p50_us": round(percentile(lat, 50) / 1000.0, 2),
        "p99_us": round(percentile(lat, 99) / 1000.0, 2),
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
