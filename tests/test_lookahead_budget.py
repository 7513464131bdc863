"""The lookahead's time budget: after the first plan no further plan or mixture starts once the
time spent plus the dearest step so far would pass the budget (the caller's clock; the planner
reads none). A clock that advances ten seconds at every reading stands in for a slow machine."""

from __future__ import annotations

from retuner.adaptive.solver import AdaptiveConfig
from retuner.bench.progressions import progression, to_midifile
from retuner.convert import conversion
from retuner.convert.arrange import plan_groups
from retuner.engine.core import EngineConfig
from retuner.adaptive import lookahead
from retuner.pitch.tuning import Tuning
from retuner.smf.messages import output_stream
from retuner.smf.reader import event_seconds, merged_events, read_smf


def _song(tmp_path):
    path = tmp_path / "pump.mid"
    to_midifile(progression("pump", legato=True, rounds=4)).save(path)
    return read_smf(str(path))


def _choose(song, budget=None, clock=None):
    cfg = EngineConfig(adaptive=AdaptiveConfig()).validate()
    tun = Tuning.equal12()
    merged = merged_events(song)
    secs = event_seconds(song, merged)
    groups = plan_groups(song, merged, secs, tun, cfg)
    live = conversion._render(song, merged, secs, groups, tun, cfg, "out.mid", None)
    render = lambda plan: conversion._render(song, merged, secs, groups, tun, cfg, "out.mid", plan)  # noqa: E731
    return lookahead.choose(song, merged, secs, tun, cfg, live, render, output_stream, budget=budget, clock=clock)


def test_a_spent_budget_stops_the_search_after_the_first_plan(tmp_path):
    song = _song(tmp_path)
    free = _choose(song)
    assert free.summary["plans_tried"] > 1          # without a budget this piece takes several plans
    assert free.summary["stopped_by_time_budget"] is False
    ticks = iter(range(0, 10 ** 6, 10))
    bounded = _choose(song, budget=1.0, clock=lambda: float(next(ticks)))
    assert bounded.summary["plans_tried"] == 1
    assert bounded.summary["stopped_by_time_budget"] is True
    assert bounded.outputs                            # the first plan is kept and written
