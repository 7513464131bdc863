"""Arranging a file's parts onto output channels (bend-pool and MPE modes).

Each source channel is a *part*. Parts get disjoint shares of the output channels, so each
part keeps its own program, controllers and wheel: one engine per part, each with its own
sub-pool; or, in adaptive mode (``together``), one engine for the parts of every file, each
part still on its own share (``EngineConfig.parts``), so one solver tunes them as one harmony,
and every channel of a file is shared out (none kept back); that engine's output channel
``16 k + c`` is channel ``c`` of the k-th file (the converter writes each message to its file). Sharing: every part first gets as many channels as its largest number of notes
sounding at once (its *minimum*: with fewer it would steal notes; in a static tuning notes
with one bend share a channel, so it counts notes with different bends); channels left over
go, one at a time, to the part whose wish is least met (its *wish*: one channel per bend
value it ever uses in a static tuning -- then every note finds a channel already bent right
and nothing is re-bent while ringing -- or twice its minimum in adaptive mode). Parts
tuned together keep no channel back: once every wish is met, the rest is still shared out in
proportion to the wishes (a one-note bass never gets as many as a part playing chords). When the
minimums of all parts together exceed one port (16 channels minus the pass-through
channels), the parts are split into groups that fit (first-fit, largest first) and each
group is written to its own file, ``OUT-part1.mid``, ``OUT-part2.mid``, ...; each such file
holds the conductor track (tempo, time and key signatures) and the group's parts; the first file
also holds the percussion (passthrough channels) and the lyrics, markers, cue points and texts, so
that the files played together on their ports sound each drum and show each lyric once. MTS
mode keeps notes on their own channels: one engine, no sharing needed. In MPE mode a zone
belongs to one part: a file holds two parts, the first in the lower zone (manager channel
1, members 2..8), the second in the upper zone (manager channel 16, members 15..9, channel
10 left to percussion); a third part starts the next file. A single part keeps the whole
configured zone. In adaptive mode (``together``) one engine plays every part of every file,
each in its zone (``EngineConfig.part_zones``), so one solver tunes them as one harmony; its
output channel ``16 k + c`` is channel ``c`` of the k-th file (the converter writes each
message to its file). Static tunings and ``--parts-apart`` keep an engine per part.
"""

from __future__ import annotations

from pathlib import Path
from typing import Iterable, Optional, Sequence

from retuner.engine.outputs import MODES
from retuner.engine.notes import SUSTAIN, NoteTracker
from retuner.smf.reader import CHANNEL, Song


def song_parts(merged: Sequence, passthrough: Iterable[int]) -> list[int]:
    """Every channel (not passed through) that carries channel messages."""
    pas = set(passthrough)
    chans = set()
    for _, _, kind, raw in merged:
        if kind == CHANNEL:
            c = raw[0] & 0x0F
            if c not in pas:
                chans.add(c)
    return sorted(chans)


def note_channels(merged: Sequence) -> set[int]:
    """The channels that play at least one note (a note-on with a velocity)."""
    out = set()
    for _, _, kind, raw in merged:
        if kind == CHANNEL and raw[0] & 0xF0 == 0x90 and len(raw) > 2 and raw[2] > 0:
            out.add(raw[0] & 0x0F)
    return out


def channel_list(chans: Iterable[int]) -> str:
    return ",".join(str(c + 1) for c in chans)


def split_name(out_path: str, index: int) -> str:
    """OUT.mid -> OUT-part1.mid (index counts from 1)."""
    p = Path(out_path)
    return str(p.with_name(f"{p.stem}-part{index}{p.suffix or '.mid'}"))


def part_needs(merged: Sequence, parts: Sequence[int], tuning, *, adaptive: bool, avail: int,
               secs: Optional[Sequence[float]] = None, release: float = 0.0) -> tuple[dict, dict]:
    """Per part: the channels it needs at least (most notes with different bends sounding at
    once, pedal included: with fewer it would steal) and the channels it wishes for (one per
    bend value it ever uses: then every note finds a channel already bent right, and no
    channel is re-bent while ringing). Static tunings share a channel among notes with one bend;
    in adaptive mode every note has a bend of its own, and a part wishes for twice its most
    notes at once, or for as many as sound or still ring (released less than ``release``
    seconds before, ``secs`` giving each event's time) when a note starts, if that is more:
    a quick melody line needs a third channel when its notes come back within the release."""
    want = set(parts)
    dev_cache: dict[int, object] = {}

    def bend_of(key: int):
        d = dev_cache.get(key)
        if d is None:
            c = tuning.cents[key]
            d = dev_cache[key] = None if c is None else round(c - 100.0 * key, 4)
        return d

    notes = NoteTracker()                                  # the sustain pedal holds notes on
    sounding: dict[int, dict] = {p: {} for p in parts}    # part -> {bend: count}
    most: dict[int, int] = {p: 1 for p in parts}
    used: dict[int, set] = {p: set() for p in parts}

    ringing: dict[int, list] = {p: [] for p in parts}     # part -> end times of its notes
    busy: dict[int, int] = {p: 1 for p in parts}         # most notes sounding or ringing at a note-on
    timed = adaptive and secs is not None and release > 0

    def drop(p: int, b) -> None:
        snd = sounding[p]
        snd[b] -= 1
        if not snd[b]:
            del snd[b]
        if timed:
            ringing[p].append(now)

    now = 0.0
    for i, (_, _, kind, raw) in enumerate(merged):
        if timed:
            now = secs[i]
        if kind != CHANNEL:
            continue
        st = raw[0]
        p = st & 0x0F
        if p not in want:
            continue
        hi = st & 0xF0
        if hi == 0x90 and raw[2]:
            b = bend_of(raw[1])
            if b is None:
                continue
            b = (b, raw[1]) if adaptive else b
            snd = sounding[p]
            snd[b] = snd.get(b, 0) + 1
            notes.note_on(p, raw[1], b)
            used[p].add(b)
            n = notes.sounding(p) if adaptive else len(snd)
            if n > most[p]:
                most[p] = n
            if timed:
                ends = ringing[p] = [e for e in ringing[p] if e > now - release]
                if n + len(ends) > busy[p]:
                    busy[p] = n + len(ends)
        elif hi == 0x80 or hi == 0x90:
            for b, ended in notes.note_off(p, raw[1]):
                if ended:
                    drop(p, b)
        elif hi == 0xB0 and raw[1] == SUSTAIN:
            for b in notes.control(p, SUSTAIN, raw[2]):
                drop(p, b)
    need_min = {p: max(1, min(most[p], avail)) for p in parts}
    wish = {p: max(need_min[p], min(avail, len(used[p]) if not adaptive else max(2 * most[p], busy[p])))
            for p in parts}
    return need_min, wish


def plan_groups(song: Song, merged: Sequence, secs: Sequence[float], tuning, config,
                merge: bool = False, together: bool = False) -> list[tuple[list[int], dict]]:
    """Share the output channels among the parts (see the module docstring).

    Returns groups, one per output file: (parts, {part: engine config}). ``together``
    (adaptive mode): every part of every group shares one engine config, the k-th group's
    channels numbered ``16 k + c``: in pool mode each part keeps its own channels (``parts``
    lists them), in MPE mode its own zone (``part_zones``). Parts given the very same config object are played by
    one engine, so one solver tunes them as one harmony.
    """
    pas = frozenset(config.passthrough)
    all_parts = song_parts(merged, pas)
    # channels that only set things up (controllers, programs) and play no note are no parts of
    # their own: they go with the first group and its first part's engine, so a file that
    # initialises all 16 channels is not split for nothing
    playing = note_channels(merged)
    parts = [p for p in all_parts if p in playing]
    quiet = [p for p in all_parts if p not in playing]
    wide = MODES[config.mode].without_passthrough(config)
    if wide is not config and not any(
            kind == CHANNEL and (raw[0] & 0x0F) in pas for _, _, kind, raw in merged):
        config = wide
    if MODES[config.mode].keeps_input_channels or len(parts) <= 1 or merge:
        return [(all_parts, {p: config for p in all_parts})]
    groups = _plan_note_groups(merged, parts, tuning, config, pas, together, secs)
    mode = MODES[config.mode]
    if together and not mode.zone_per_part:
        # pool: one engine for every part of every file, each part on its share; output
        # channel 16 k + c is channel c of file k
        shares = tuple((p, tuple(16 * i + c for c in cfgs[p].pool))
                       for i, (g, cfgs) in enumerate(groups) for p in g)
        one = config.replace(pool=tuple(c for _, chs in shares for c in chs), parts=shares)
        groups = [(g, {p: one for p in g}) for g, _ in groups]
    elif together:
        # MPE: one engine for every part of every file, each part in the zone it has; output
        # channel 16 k + c is channel c of file k
        zones = tuple((p, 16 * i + cfgs[p].mpe_manager(), tuple(16 * i + c for c in cfgs[p].mpe_member_channels()))
                      for i, (g, cfgs) in enumerate(groups) for p in g)
        one = config.replace(part_zones=zones)
        groups = [(g, {p: one for p in g}) for g, _ in groups]
    first_parts, first_cfgs = groups[0]
    for q in quiet:
        first_cfgs[q] = first_cfgs[first_parts[0]]
    groups[0] = (sorted(first_parts + quiet), first_cfgs)
    return groups


def _plan_note_groups(merged, parts, tuning, config, pas, together=False, secs=None) -> list[tuple[list[int], dict]]:
    if MODES[config.mode].zone_per_part:
        # one MPE zone per part: two parts per file, the first in the lower zone (manager
        # channel 1, members 2..8), the second in the upper zone (manager 16, members 15..9)
        out = []
        for i in range(0, len(parts), 2):
            pair = parts[i:i + 2]
            if len(pair) == 1:
                out.append((pair, {pair[0]: config if len(parts) == 1 else
                                   config.replace(mpe_zone="lower", mpe_members=min(config.mpe_member_count(), 7))}))
            else:
                upper = config.replace(mpe_zone="upper", mpe_members=None)     # stops short of passthrough
                out.append((pair, {pair[0]: config.replace(mpe_zone="lower", mpe_members=7),
                                   pair[1]: upper.replace(mpe_members=min(upper.mpe_member_count(), 7))}))
        return out
    pool = [c for c in config.pool if c not in pas]
    avail = len(pool)
    need_min, wish = part_needs(merged, parts, tuning, adaptive=config.adaptive is not None, avail=avail,
                                secs=secs, release=config.release_time)
    # groups: first fit, largest minimum first
    groups: list[list[int]] = []
    for p in sorted(parts, key=lambda q: (-need_min[q], q)):
        for g in groups:
            if sum(need_min[q] for q in g) + need_min[p] <= avail:
                g.append(p)
                break
        else:
            groups.append([p])
    out = []
    for g in groups:
        g.sort()
        share = {p: need_min[p] for p in g}
        left = avail - sum(share.values())
        while left > 0:
            cands = [p for p in g if share[p] < wish[p]]
            if not cands:
                if not together:
                    break
                # one engine for the group: no channel is kept back; once every wish is met
                # the rest is shared in proportion to the wishes (spare channels rest longer
                # between notes: fewer ringing retunes)
                cands = g
            p = min(cands, key=lambda q: (share[q] / wish[q], q))
            share[p] += 1
            left -= 1
        cfgs = {}
        i = 0
        for p in g:
            sub = tuple(pool[i:i + share[p]])
            i += share[p]
            cfgs[p] = config.replace(pool=sub)
        out.append((g, cfgs))
    return out
