"""Converting one MIDI file: drive the engines with the file's own clock, write.

Clock
-----
The tempo map (every Set Tempo meta event, in any track, at its tick) turns ticks into
seconds; the engine sees exactly the times a live performance of the file would have, so
``convert --adaptive`` behaves as the daemon does on the same performance (chord window,
release time and every timer included).

Writing
-------
Every output event is written at its ORIGINAL tick: the engine output for an input event at
tick T is written at tick T; output the engine produces at a timer (``engine.tick(deadline)``)
is written at the tick of that time. Meta events (tempo, time signature, markers, lyrics,
track names, ...) and system exclusive stay in their tracks at their ticks, byte for byte;
type 1 files keep their track layout (the conductor track included), each retuned event
landing in the track its input came from. A system reset in the file (GM, GM2, GS or XG
system on: :mod:`retuner.midi.resets`) is written as it is, and every engine's set-up (bend
ranges, MPE configuration, MTS tuning) follows right after it in the same track, at its tick:
the reset would otherwise undo the set-up written at the start. Files are written atomically: a temporary file in
the target folder, then ``os.replace`` -- there is never a half-written output.

Parts
-----
How parts share the output channels is :mod:`retuner.convert.arrange`. Adaptive mode (``--live``
and ``--lookahead`` too) runs one engine for the parts of every output file (each part on its own share
of the pool, or in MPE mode in a zone of its own, two zones a file): one solver (or the plan,
which pairs the notes of every part) tunes them together as one harmony, and each part still sounds
only on its own channels (its program and controllers) with its own pedals and wheel. An engine
that plays several files numbers channel c of its k-th file ``16 k + c``; every file is driven in
one pass over the input and each message written to its file. Such an engine's counters go with
the first file it plays. ``parts_apart`` runs one engine per part instead,
as a daemon per part would: each part is tuned against itself. ``--merge-parts`` runs one engine with one pool for all parts instead, exactly
as the daemon treats a multi-channel input: the parts are then tuned together and share
the output channels, each channel dressed for the part whose note it plays (its program and
controllers: :mod:`retuner.engine.outputs.pool`), the pedals shared. With ``--lookahead`` the plan tunes all
parts together (see :mod:`retuner.convert.lookahead`).
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from typing import Any, Optional, Sequence

from retuner.engine.outputs import MODES
from retuner.midi.resets import system_reset_raw
from retuner.convert.arrange import plan_groups, split_name
from retuner.engine.core import Engine, EngineConfig
from retuner.engine.drive import Drive
from retuner.midi import encode as E
from retuner.errors import RetunerError
from retuner.outfile import write_atomic
from retuner.smf.messages import message_to_raw, output_stream, raw_to_message
from retuner.smf.reader import CHANNEL, META, SYSEX, Song, event_seconds, merged_events, read_smf
from retuner.smf.writer import TrackBytes, serialize


@dataclass
class ConvertOptions:
    """What ``convert`` does to one file. ``config`` is the engine configuration
    for the whole port (its pool, passthrough channels, mode, adaptive settings);
    arrangements carve each part's share out of ``config.pool``."""

    tuning: object                      # retuner.pitch.tuning.Tuning
    config: object = None               # retuner.engine.core.EngineConfig
    lookahead: bool = False
    want_report: bool = False
    merge_parts: bool = False           # one engine and one pool for every part (as the daemon)
    parts_apart: bool = False           # adaptive: each part tuned on its own (default: together)
    live: bool = False                  # as the daemon hears it live: a chord window delays notes


@dataclass
class Output:
    path: str
    parts: list[int]                    # 0-based source channels in this file
    channels: dict                      # part -> list of 0-based output channels (pool / MPE members)
    data: bytes = b""
    stats: dict = field(default_factory=dict)
    report: Optional[dict] = None
    wheel: Optional[list] = None        # the player's wheel per output channel, for the measures
    wheel_channels: Optional[dict] = None   # part -> the output channels its wheel was sent on
    steals_why: str = ""                # why steals cut notes short and what avoids it ("" if none did)
    engines: int = 1                    # engines that played this file's parts (1: one harmony)
    # which engine of the conversion played them (-1: several): files with the same number were
    # tuned as one harmony, by one engine whose counters (``stats``) go with the first of them
    harmony: int = 0


@dataclass
class ConvertResult:
    input: str
    outputs: list[Output]
    split: bool = False
    lookahead: Optional[dict] = None    # what the lookahead planner chose, and the live figures
    note_ons: Optional[list] = None     # --live: the input's note-ons as (seconds, key)

    @property
    def one_harmony(self) -> bool:
        """Did one engine (one solver) play every part, in one file or several? Parts played by
        engines of their own are each tuned against themselves."""
        return all(o.engines == 1 for o in self.outputs) and len({o.harmony for o in self.outputs}) == 1

    @property
    def stats(self) -> dict:
        tot: dict = {}
        for o in self.outputs:
            for k, v in o.stats.items():
                tot[k] = tot.get(k, 0) + v
        return tot


def _make_engine(tuning, config, plan=None):
    if plan is not None:    # a lookahead plan plays through the engine as its solver
        return Engine(tuning, plan.engine_config(config), solver=plan.solver_factory(config))
    return Engine(tuning, config)


class _Group:
    """One output file: the parts it holds and one engine per part (or one for all)."""

    def __init__(self, parts: list[int], engines: dict, channels: dict):
        self.parts = parts
        self.engines = engines          # part -> Engine (the same engine may serve several parts)
        self.channels = channels


#: meta events a listener sees or reads rather than hears the timing of (text, lyrics, marker, cue
#: point: Standard MIDI File 1.0, "Meta-Events"): when a file's parts are written to several files,
#: only the first file has them, with the percussion, so that playing the files together on their
#: ports shows each lyric and sounds each drum once; tempo, time signature, key signature, track
#: names and System Exclusive (a synth reset each port's synth needs) go to every file
SHOWN_ONCE = frozenset({0x01, 0x05, 0x06, 0x07})


def _drive(song: Song, merged: Sequence, secs: Sequence[float], groups: Sequence[_Group], passthrough: frozenset,
           as_lists: bool = False) -> list[list[tuple[list, int]]]:
    """Feed the engines of the output files ``groups`` with the file's events on the file's
    clock; return the output tracks of each file. An engine may play the parts of several
    files: its output channel 16 k + c is channel c of the k-th file it plays. The first file
    holds the percussion and the text meta events (:data:`SHOWN_ONCE`)."""
    ntr = len(song.tracks)
    # a plan rewrites the tracks after the drive: it gets lists; otherwise bytes as they come
    outs: list = [[[] for _ in range(ntr)] if as_lists else [TrackBytes() for _ in range(ntr)] for _ in groups]
    tm = song.tempo_map
    engine_of: dict[int, Any] = {}                      # part -> engine
    file_of: dict[int, int] = {}                        # part -> the file it is written to
    files_of: dict[int, list] = {}                      # id(engine) -> the files it plays, in order
    engines: list = []
    for gi, g in enumerate(groups):
        for p in g.parts:
            e = g.engines[p]
            engine_of[p] = e
            file_of[p] = gi
            fs = files_of.setdefault(id(e), [])
            if not fs:
                engines.append(e)
            if gi not in fs:
                fs.append(gi)
    home: dict = {}                                     # (id(engine), file) -> track of its first event
    for tick, ti, kind, raw in merged:
        if kind == CHANNEL:
            p = raw[0] & 0x0F
            e = engine_of.get(p)
            if e is not None:
                home.setdefault((id(e), file_of[p]), ti)
    to_raw = message_to_raw

    def route(e, res, tick, ti=None):
        """Write engine ``e``'s output ``res`` at ``tick``: in track ``ti`` (None: the engine's
        home track in each file)."""
        fs = files_of[id(e)]
        if len(fs) == 1:
            f = fs[0]
            outs[f][home.get((id(e), f), 0) if ti is None else ti].extend((tick, to_raw(m)) for m in res)
            return
        for m in res:
            c = getattr(m, "channel", 0)
            f = fs[c >> 4]
            if c > 15:
                m = E.with_channel(m, c & 15)
            outs[f][home.get((id(e), f), 0) if ti is None else ti].append((tick, to_raw(m)))

    drives = {id(e): Drive(e) for e in engines}
    for e in engines:
        route(e, drives[id(e)].start(0.0), 0)
    timed = [(e, drives[id(e)]) for e in engines if e.adaptive]   # only adaptive engines have deadlines
    last_tick = 0
    for idx, (tick, ti, kind, raw) in enumerate(merged):
        t = secs[idx]
        for e, dr in timed:
            for d, res in dr.due(t):
                dt = min(max(int(round(tm.tick(d))), last_tick), tick)
                route(e, res, dt)
        last_tick = tick
        if kind != CHANNEL:
            for fi, f in enumerate(outs):
                if fi and kind == META and raw[1] in SHOWN_ONCE:
                    continue
                f[ti].append((tick, raw))
            if kind == SYSEX and system_reset_raw(raw) is not None:
                # the file resets the synth: each engine's set-up follows right after it
                for e in engines:
                    route(e, e.synth_reset(t), tick, ti)
            continue
        ch = raw[0] & 0x0F
        if ch in passthrough:
            outs[0][ti].append((tick, raw))
            continue
        e = engine_of.get(ch)
        if e is None:
            continue
        res = e.feed(t, raw_to_message(raw))
        if res:
            route(e, res, tick, ti)
    # timers after the last event (chord windows still open)
    for e, dr in timed:
        for d, res in dr.finish():
            route(e, res, max(int(round(tm.tick(d))), last_tick))
    result = []
    for f in outs:
        tracks = []
        for ti, tr in enumerate(song.tracks):
            evs = f[ti]
            last = evs.last if isinstance(evs, TrackBytes) else (evs[-1][0] if evs else 0)
            tracks.append((evs, max(tr.end_tick, last)))
        result.append(tracks)
    return result


def convert_song(song: Song, out_path: str, opts: ConvertOptions, progress=None) -> ConvertResult:
    """Convert a parsed file; return the outputs (bytes not yet written). ``progress``
    (optional) is called with a short text while a long conversion (the lookahead) works."""
    config = opts.config or EngineConfig()
    config.validate()
    tuning = opts.tuning
    merged = merged_events(song)
    secs = event_seconds(song, merged)
    if config.adaptive is not None and config.adaptive.chord_window > 0 and not opts.live:
        # a file keeps every note at its tick: a chord window would delay them
        raise RetunerError("a chord window delays every note; a converted file keeps each note at its "
                           "tick (notes sound at once and settle within --attack-time): add --live to "
                           "hear the window's delay as the daemon would play it", field="--chord-window")
    # adaptive mode (live, as the daemon, or planned over the file) tunes a file's pitched parts
    # together as one harmony, each on its own channels (its program and controllers)
    together = config.adaptive is not None and not opts.parts_apart
    groups = plan_groups(song, merged, secs, tuning, config, merge=opts.merge_parts, together=together)
    if not opts.lookahead:
        outputs = _render(song, merged, secs, groups, tuning, config, out_path, None)
        res = ConvertResult(song.path, outputs, len(groups) > 1)
        if opts.live:
            pas = frozenset(config.passthrough)
            res.note_ons = [(secs[i], raw[1]) for i, (_, _, kind, raw) in enumerate(merged)
                            if kind == CHANNEL and raw[0] & 0xF0 == 0x90 and len(raw) > 2 and raw[2]
                            and (raw[0] & 0x0F) not in pas]
        return res
    if config.adaptive is None:
        raise RetunerError("--lookahead needs --adaptive", field="lookahead")
    # lazy: the planner needs numpy, and the command line sets numpy's thread count first
    from retuner.convert import lookahead
    say = progress or (lambda text: None)
    say("lookahead: playing the file live")
    live = _render(song, merged, secs, groups, tuning, config, out_path, None)
    tries = [0]

    def render_plan(plan):
        tries[0] += 1
        say(f"lookahead: {tries[0]} plan{'s' if tries[0] > 1 else ''} tried")
        return _render(song, merged, secs, groups, tuning, config, out_path, plan)

    say("lookahead: planning")
    chosen = lookahead.choose(song, merged, secs, tuning, config, live, render_plan, output_stream,
                              apart=opts.parts_apart)
    res = ConvertResult(song.path, chosen.outputs, len(groups) > 1)
    res.lookahead = chosen.summary
    return res


def _render(song, merged, secs, groups, tuning, config, out_path, plan) -> list[Output]:
    pas = frozenset(config.passthrough)
    split = len(groups) > 1
    by_cfg: dict[int, Any] = {}          # parts given the very same config share one engine
    files = []
    for parts, cfgs in groups:
        engines = {}
        for p in parts:
            cfg = cfgs[p]
            e = by_cfg.get(id(cfg))
            if e is None:
                e = by_cfg[id(cfg)] = _make_engine(tuning, cfg, plan)
            engines[p] = e
        # parts tuned together each sound on their own share of the pool or their own zone; an
        # engine playing several files numbers the channels of its k-th file 16 k + c
        channels = {p: MODES[cfgs[p].mode].channels_of_part(cfgs[p], p) for p in parts}
        files.append(_Group(parts, engines, channels))
    drives = _drive(song, merged, secs, files, pas, as_lists=plan is not None)
    number = {id(e): i for i, e in enumerate(by_cfg.values())}      # an engine's number in this conversion
    counted: set = set()                 # an engine's counters go with the first file it plays
    outputs = []
    for gi, (group, tracks) in enumerate(zip(files, drives)):
        parts, engines = group.parts, group.engines
        if plan is not None:
            plan.after_drive(song, tracks, group)
        data = serialize(song.format, song.header_division, tracks)
        distinct = list({id(e): e for e in engines.values()}.values())
        mine = [e for e in distinct if id(e) not in counted]
        counted |= {id(e) for e in mine}
        stats: dict = {}
        for e in mine:
            for k, v in e.stats.items():
                stats[k] = stats.get(k, 0) + v
        path = split_name(out_path, gi + 1) if split else str(out_path)
        wheel_channels = {p: [c & 15 for c in engines[p].output.wheel_channels(group.channels[p])] for p in parts}
        channels = {p: [c & 15 for c in chans] for p, chans in group.channels.items()}
        harmony = number[id(distinct[0])] if len(distinct) == 1 else -1
        outputs.append(Output(path, parts, channels, data, stats,
                              steals_why=_steals_why(mine) if mine else "", engines=len(distinct),
                              wheel_channels=wheel_channels, harmony=harmony))
    return outputs


def _steals_why(engines: list) -> str:
    """Why steals cut notes short in one output file, and what would avoid it: the reason of
    the engine that stole most (several engines: the file's parts share the port); "" when
    no note was cut."""
    worst = max(engines, key=lambda e: e.stats.get("steals", 0))
    if not worst.stats.get("steals"):
        return ""
    return worst.output.why_steals(worst.config, len(engines) > 1)


def convert_file(in_path: str | os.PathLike, out_path: str | os.PathLike, opts: ConvertOptions,
                 progress=None) -> ConvertResult:
    """Read, convert and write (atomically; all output files or none). The input is never
    overwritten: an output path that names the input file is refused."""
    song = read_smf(in_path)
    res = convert_song(song, str(out_path), opts, progress)
    for o in res.outputs:
        if os.path.exists(o.path) and os.path.samefile(o.path, in_path):
            raise RetunerError("the output would overwrite the input; give another -o", file=str(o.path))
    written = []
    try:
        for o in res.outputs:
            write_atomic(o.path, o.data)
            written.append(o.path)
    except BaseException:
        for p in written:
            try:
                os.unlink(p)
            except OSError:
                pass
        raise
    return res
