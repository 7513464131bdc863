"""MIDI files in and out: read, drive the engine with the file's own clock, write.

Reading
-------
Standard MIDI Files (type 0 and type 1; "Standard MIDI Files 1.0", MIDI
Manufacturers Association) are parsed here byte by byte rather than with mido's
reader, for two reasons: a malformed file must give one line that names the file
and the place (track, byte offset), and the parse must be fast. Every event is
kept with its absolute tick and, for events that are not retuned (meta events,
system exclusive, percussion and other pass-through channels), its exact bytes.

Clock
-----
The tempo map (every Set Tempo meta event, in any track, at its tick) turns
ticks into seconds; the engine sees exactly the times a live performance of
the file would have, so ``convert --adaptive`` behaves as the daemon does on the
same performance (chord window, release time and every timer included).

Writing
-------
Every output event is written at its ORIGINAL tick: the engine output for an
input event at tick T is written at tick T; output the engine produces at a
timer (``engine.tick(deadline)``) is written at the tick of that time. Meta
events (tempo, time signature, markers, lyrics, track names, ...) and system
exclusive stay in their tracks at their ticks, byte for byte; type 1 files keep
their track layout (the conductor track included), each retuned event landing in
the track its input came from. Files are written atomically: a temporary file in
the target folder, then ``os.replace`` -- there is never a half-written output.

Arrangements (bend-pool and MPE modes)
--------------------------------------
Each source channel is a *part*. Parts get disjoint shares of the output
channels, so each part keeps its own program, controllers and wheel: one engine
per part, each with its own sub-pool. Sharing: every part first gets as many
channels as its largest number of notes sounding at once (its *minimum*: with
fewer it would steal notes; in a static tuning notes with one bend share a
channel, so it counts notes with different bends); channels left over go, one
at a time, to the part whose wish is least met (its *wish*: one channel per
bend value it ever uses in a static tuning -- then every note finds a channel
already bent right and nothing is re-bent while ringing -- or twice its
minimum in adaptive mode). When the minimums of all parts together exceed one
port (16 channels minus the pass-through channels), the parts are split into
groups that fit (first-fit, largest first) and each group is written to its own
file, ``OUT-part1.mid``, ``OUT-part2.mid``, ... (one line on stderr says so);
each such file holds the conductor track, the percussion and the group's parts,
and plays on its own. MTS mode keeps notes on their own channels: one engine,
no sharing needed. In MPE mode a zone belongs to one part: a file holds two
parts, the first in the lower zone (manager channel 1, members 2..8), the second
in the upper zone (manager channel 16, members 15..9, channel 10 left to
percussion); a third part starts the next file. A single part keeps the whole
configured zone.

Adaptive mode without ``--lookahead`` runs one engine per part, as a daemon per
part would: each part is tuned against itself (for a file with one part -- a
keyboard performance -- that is exactly the live daemon). ``--merge-parts``
runs one engine with one pool for all parts instead, exactly as the daemon
treats a multi-channel input: the parts are then tuned together but share
their output channels, programs and controllers. With ``--lookahead``
the plan tunes all parts together (see :mod:`retuner.adaptive.lookahead`).

Batches
-------
:func:`convert_batch` converts every ``.mid``/``.midi`` below a folder into an
output folder (same relative paths) in worker processes
(``concurrent.futures.ProcessPoolExecutor``, one per CPU unless told), with a
progress bar on a terminal and plain lines otherwise; a bad file is reported in
one line and skipped, the rest finish; the exit status is 1 if any failed.

Speed
-----
:func:`convert_speed_bench` measures a generated ~100 000-event arrangement
against mido loading and saving the same file (goal: at most 2x), and a batch
with one and with more workers.
"""

from __future__ import annotations

import bisect
import os
import tempfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Iterable, Optional, Sequence

import mido
from mido.messages.messages import Message

from retuner.engine.outputs import MODES
from retuner.errors import RetunerError
from retuner.outfile import write_atomic

# ---------------------------------------------------------------------------
# Standard MIDI File parsing
# ---------------------------------------------------------------------------
#: Status bytes of channel messages and their number of data bytes (MIDI 1.0).
_DATA_LEN = {0x80: 2, 0x90: 2, 0xA0: 2, 0xB0: 2, 0xC0: 1, 0xD0: 1, 0xE0: 2}
#: mido message types by status high nibble.
_TYPES = {0x80: "note_off", 0x90: "note_on", 0xA0: "polytouch", 0xB0: "control_change",
          0xC0: "program_change", 0xD0: "aftertouch", 0xE0: "pitchwheel"}
META_TEMPO = 0x51
META_END_OF_TRACK = 0x2F
DEFAULT_TEMPO = 500000  # microseconds per quarter note (SMF 1.0: 120 bpm when none is given)

# event kinds
CHANNEL, SYSEX, META = 0, 1, 2


@dataclass
class Track:
    """One track: events as (tick, kind, raw bytes) in file order, plus its end tick.

    Raw bytes are as the event appears in a file without running status:
    channel messages with their status byte; system exclusive as F0/F7 + length
    + data; meta events as FF type length data.
    """

    events: list = field(default_factory=list)
    end_tick: int = 0


@dataclass
class Song:
    path: str
    format: int
    division: int                 # ticks per quarter note (>0), or ticks per second for SMPTE
    smpte: bool
    tracks: list[Track]
    header_division: int = 480    # the division field exactly as in the header
    tempo_map: "TempoMap" = None  # type: ignore[assignment]

    @property
    def end_tick(self) -> int:
        return max((t.end_tick for t in self.tracks), default=0)


def _varlen(data: bytes, pos: int, end: int, where: Callable[[int], str]) -> tuple[int, int]:
    value = 0
    for i in range(4):
        if pos >= end:
            raise RetunerError(f"truncated: a variable-length number runs past the end of the track",
                               file=None, field=where(pos))
        b = data[pos]
        pos += 1
        value = (value << 7) | (b & 0x7F)
        if not b & 0x80:
            return value, pos
    raise RetunerError("bad variable-length number (more than 4 bytes)", field=where(pos - 4))


def _parse_track(data: bytes, start: int, end: int, tno: int, path: str) -> Track:
    def where(pos: int) -> str:
        return f"track {tno + 1}, byte {pos}"

    events: list = []
    append = events.append
    pos = start
    tick = 0
    running = 0
    ended = False
    try:
        while pos < end:
            delta, pos = _varlen(data, pos, end, where)
            tick += delta
            if pos >= end:
                raise RetunerError("truncated: an event is missing after its delta time", field=where(pos))
            status = data[pos]
            if status == 0xFF:
                if pos + 2 > end:
                    raise RetunerError("truncated meta event", field=where(pos))
                mtype = data[pos + 1]
                length, p = _varlen(data, pos + 2, end, where)
                if p + length > end:
                    raise RetunerError(f"meta event of {length} bytes runs past the end of the track",
                                       field=where(pos))
                if mtype == META_END_OF_TRACK:
                    pos = p + length
                    ended = True
                    break
                append((tick, META, data[pos:p + length]))
                pos = p + length
                running = 0  # SMF 1.0: meta and sysex events cancel running status
            elif status == 0xF0 or status == 0xF7:
                length, p = _varlen(data, pos + 1, end, where)
                if p + length > end:
                    raise RetunerError(f"system exclusive of {length} bytes runs past the end of the track "
                                       f"({end - p} bytes left)", field=where(pos))
                append((tick, SYSEX, data[pos:p + length]))
                pos = p + length
                running = 0
            elif status >= 0xF0:
                raise RetunerError(f"status byte 0x{status:02X} is not allowed in a MIDI file", field=where(pos))
            else:
                if status & 0x80:
                    running = status
                    pos += 1
                elif not running:
                    raise RetunerError(f"data byte 0x{status:02X} without a status byte (bad running status)",
                                       field=where(pos))
                n = _DATA_LEN[running & 0xF0]
                if pos + n > end:
                    raise RetunerError("truncated channel message", field=where(pos))
                body = data[pos:pos + n]
                for b in body:
                    if b & 0x80:
                        raise RetunerError(f"data byte 0x{b:02X} out of range in a channel message",
                                           field=where(pos))
                append((tick, CHANNEL, bytes((running,)) + body))
                pos += n
    except RetunerError as exc:
        exc.file = path
        raise
    if ended and pos < end:
        pass  # bytes after End of Track are ignored (SMF 1.0: nothing may follow it)
    return Track(events, tick)


def parse_smf(data: bytes, path: str = "<file>") -> Song:
    """Parse a Standard MIDI File, strictly. Raises RetunerError naming the place."""
    def err(msg: str, pos: Optional[int] = None) -> RetunerError:
        return RetunerError(msg, file=path, field=None if pos is None else f"byte {pos}")

    if len(data) < 14 or data[:4] != b"MThd":
        if data[:4] == b"RIFF" and data[8:12] == b"RMID":
            raise err("RIFF MIDI (RMID) files are not supported: extract the Standard MIDI File")
        raise err("not a Standard MIDI File (no MThd header)" if len(data) >= 4 and data[:4] != b"MThd"
                  else "not a Standard MIDI File (file too short)")
    hlen = int.from_bytes(data[4:8], "big")
    if hlen < 6:
        raise err(f"bad header: length {hlen}, expected 6", 4)
    if 8 + hlen > len(data):
        raise err("truncated header", 8)
    fmt = int.from_bytes(data[8:10], "big")
    ntrks = int.from_bytes(data[10:12], "big")
    div = int.from_bytes(data[12:14], "big")
    if fmt == 2:
        raise err("type 2 (sequential tracks) files are not supported", 8)
    if fmt not in (0, 1):
        raise err(f"bad header: format {fmt} (expected 0 or 1)", 8)
    if ntrks == 0:
        raise err("bad header: no tracks", 10)
    if fmt == 0 and ntrks != 1:
        raise err(f"bad header: a type 0 file has exactly one track, header says {ntrks}", 10)
    smpte = bool(div & 0x8000)
    if smpte:
        fps = 256 - (div >> 8)
        tpf = div & 0xFF
        if fps not in (24, 25, 29, 30) or tpf == 0:
            raise err(f"bad header: SMPTE division {fps} frames/s x {tpf} ticks", 12)
        division = int(round((29.97 if fps == 29 else fps) * tpf * 1000))  # ticks per 1000 s
    else:
        if div == 0:
            raise err("bad header: 0 ticks per quarter note", 12)
        division = div
    pos = 8 + hlen
    tracks: list[Track] = []
    while pos < len(data) and len(tracks) < ntrks:
        if pos + 8 > len(data):
            raise err(f"truncated: chunk header of track {len(tracks) + 1} is cut off", pos)
        ctype = data[pos:pos + 4]
        clen = int.from_bytes(data[pos + 4:pos + 8], "big")
        body = pos + 8
        if body + clen > len(data):
            raise err(f"truncated: track {len(tracks) + 1} announces {clen} bytes, "
                      f"only {len(data) - body} are left", pos)
        if ctype == b"MTrk":
            tracks.append(_parse_track(data, body, body + clen, len(tracks), path))
        elif not all(0x20 <= c <= 0x7E for c in ctype):
            raise err(f"bad chunk type {ctype!r}", pos)
        # other (alien) chunk types are skipped, as SMF 1.0 asks
        pos = body + clen
    if len(tracks) < ntrks:
        raise err(f"truncated: header announces {ntrks} tracks, the file holds {len(tracks)}")
    song = Song(path, fmt, division, smpte, tracks, div)
    song.tempo_map = TempoMap.from_song(song)
    return song


def read_smf(path: str | os.PathLike) -> Song:
    try:
        with open(path, "rb") as fh:
            data = fh.read()
    except FileNotFoundError:
        raise RetunerError("no such file", file=str(path))
    except IsADirectoryError:
        raise RetunerError("is a directory", file=str(path))
    except OSError as exc:
        raise RetunerError(f"cannot read: {exc.strerror or exc}", file=str(path))
    return parse_smf(data, str(path))


# ---------------------------------------------------------------------------
# Tempo map
# ---------------------------------------------------------------------------
class TempoMap:
    """Ticks <-> seconds through every Set Tempo event (SMF 1.0: microseconds per quarter note)."""

    def __init__(self, division: int, changes: Sequence[tuple[int, int]] = (), smpte: bool = False):
        self.division = division
        self.smpte = smpte
        ticks = [0]
        tempos = [DEFAULT_TEMPO]
        for tick, tempo in sorted(changes, key=lambda c: c[0]):
            if tick == ticks[-1]:
                tempos[-1] = tempo
            else:
                ticks.append(tick)
                tempos.append(tempo)
        secs = [0.0]
        for i in range(1, len(ticks)):
            secs.append(secs[-1] + (ticks[i] - ticks[i - 1]) * self._spt(tempos[i - 1]))
        self.ticks, self.tempos, self.secs = ticks, tempos, secs

    def _spt(self, tempo: int) -> float:
        """Seconds per tick."""
        if self.smpte:
            return 1000.0 / self.division
        return tempo * 1e-6 / self.division

    @classmethod
    def from_song(cls, song: Song) -> "TempoMap":
        changes = []
        for tr in song.tracks:
            for tick, kind, raw in tr.events:
                if kind == META and raw[1] == META_TEMPO and len(raw) >= 6 and raw[2] == 3:
                    tempo = int.from_bytes(raw[3:6], "big")
                    if tempo > 0:
                        changes.append((tick, tempo))
        return cls(song.division, changes, song.smpte)

    def seconds(self, tick: int) -> float:
        i = bisect.bisect_right(self.ticks, tick) - 1
        return self.secs[i] + (tick - self.ticks[i]) * self._spt(self.tempos[i])

    def tick(self, seconds: float) -> float:
        """The (fractional) tick at ``seconds``."""
        i = bisect.bisect_right(self.secs, seconds) - 1
        if i < 0:
            i = 0
        return self.ticks[i] + (seconds - self.secs[i]) / self._spt(self.tempos[i])


# ---------------------------------------------------------------------------
# Messages <-> bytes
# ---------------------------------------------------------------------------
def raw_to_message(raw: bytes) -> Message:
    """A channel message's bytes -> mido Message (fast: no per-field checks; bytes are validated)."""
    status = raw[0]
    hi = status & 0xF0
    ch = status & 0x0F
    m = Message.__new__(Message)
    d = vars(m)
    t = _TYPES[hi]
    d["type"] = t
    d["channel"] = ch
    if hi == 0x80 or hi == 0x90:
        d["note"] = raw[1]
        d["velocity"] = raw[2]
    elif hi == 0xB0:
        d["control"] = raw[1]
        d["value"] = raw[2]
    elif hi == 0xE0:
        d["pitch"] = (raw[1] | (raw[2] << 7)) - 8192
    elif hi == 0xC0:
        d["program"] = raw[1]
    elif hi == 0xD0:
        d["value"] = raw[1]
    else:  # polytouch
        d["note"] = raw[1]
        d["value"] = raw[2]
    d["time"] = 0
    return m


def _encode_varlen(n: int) -> bytes:
    out = [n & 0x7F]
    n >>= 7
    while n:
        out.append((n & 0x7F) | 0x80)
        n >>= 7
    return bytes(reversed(out))


_VARLEN_CACHE = [_encode_varlen(i) for i in range(4096)]


def varlen(n: int) -> bytes:
    return _VARLEN_CACHE[n] if n < 4096 else _encode_varlen(n)


def message_to_raw(m: Message) -> bytes:
    """An engine output message -> bytes as written in a file track."""
    t = m.type
    if t == "note_on":
        return bytes((0x90 | m.channel, m.note, m.velocity))
    if t == "note_off":
        return bytes((0x80 | m.channel, m.note, m.velocity))
    if t == "pitchwheel":
        v = m.pitch + 8192
        return bytes((0xE0 | m.channel, v & 0x7F, v >> 7))
    if t == "control_change":
        return bytes((0xB0 | m.channel, m.control, m.value))
    if t == "sysex":
        body = bytes(m.data) + b"\xF7"
        return b"\xF0" + varlen(len(body)) + body
    b = bytes(m.bytes())
    if b[0] < 0xF0:
        return b
    # other system messages cannot stand in a file as such: SMF 1.0 escape (F7 length bytes)
    return b"\xF7" + varlen(len(b)) + b


def is_channel_raw(raw: bytes) -> bool:
    return raw[0] < 0xF0


# ---------------------------------------------------------------------------
# Writing
# ---------------------------------------------------------------------------
def serialize(fmt: int, division_header: int, tracks: Sequence[tuple[list, int]]) -> bytes:
    """SMF bytes from tracks given as (events [(tick, raw)] in non-decreasing tick order, end tick)."""
    out = [b"MThd", (6).to_bytes(4, "big"), fmt.to_bytes(2, "big"), len(tracks).to_bytes(2, "big"),
           division_header.to_bytes(2, "big")]
    vl = _VARLEN_CACHE
    for events, end_tick in tracks:
        parts = []
        app = parts.append
        last = 0
        for tick, raw in events:
            d = tick - last
            app(vl[d] if d < 4096 else _encode_varlen(d))
            app(raw)
            last = tick
        d = max(end_tick - last, 0)
        app(varlen(d))
        app(b"\xFF\x2F\x00")
        body = b"".join(parts)
        out.append(b"MTrk")
        out.append(len(body).to_bytes(4, "big"))
        out.append(body)
    return b"".join(out)


# ---------------------------------------------------------------------------
# Conversion
# ---------------------------------------------------------------------------
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


@dataclass
class Output:
    path: str
    parts: list[int]                    # 0-based source channels in this file
    channels: dict                      # part -> list of 0-based output channels (pool / MPE members)
    data: bytes = b""
    stats: dict = field(default_factory=dict)
    report: Optional[dict] = None


@dataclass
class ConvertResult:
    input: str
    outputs: list[Output]
    split: bool = False
    lookahead: Optional[dict] = None    # what the lookahead planner chose, and the live figures

    @property
    def stats(self) -> dict:
        tot: dict = {}
        for o in self.outputs:
            for k, v in o.stats.items():
                tot[k] = tot.get(k, 0) + v
        return tot


def merged_events(song: Song) -> list:
    """Every event of every track as (tick, track index, kind, raw), in time order
    (events at one tick: lower track first, then file order)."""
    if len(song.tracks) == 1:
        return [(tick, 0, kind, raw) for tick, kind, raw in song.tracks[0].events]
    out = []
    for ti, tr in enumerate(song.tracks):
        out.extend((tick, ti, kind, raw) for tick, kind, raw in tr.events)
    out.sort(key=lambda e: (e[0], e[1]))  # stable: file order kept within a track
    return out


def event_seconds(song: Song, merged: Sequence) -> list[float]:
    """Seconds of each merged event (walks the tempo map once)."""
    tm = song.tempo_map
    ticks, secs, tempos = tm.ticks, tm.secs, tm.tempos
    out = []
    i = 0
    n = len(ticks)
    spt = tm._spt(tempos[0])
    for e in merged:
        tick = e[0]
        while i + 1 < n and ticks[i + 1] <= tick:
            i += 1
            spt = tm._spt(tempos[i])
        out.append(secs[i] + (tick - ticks[i]) * spt)
    return out


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


def _make_engine(tuning, config, plan=None):
    from retuner.engine.core import Engine
    if plan is not None:    # a lookahead plan plays through the engine as its solver
        return Engine(tuning, plan.engine_config(config), solver=plan.solver_factory(config))
    return Engine(tuning, config)


class _Group:
    """One output file: the parts it holds and one engine per part (or one for all)."""

    def __init__(self, parts: list[int], engines: dict, channels: dict):
        self.parts = parts
        self.engines = engines          # part -> Engine (the same engine may serve several parts)
        self.channels = channels


def _drive(song: Song, merged: Sequence, secs: Sequence[float], group: _Group,
           passthrough: frozenset) -> list[tuple[list, int]]:
    """Feed the group's engines with the file's events on the file's clock; return output tracks."""
    ntr = len(song.tracks)
    outs: list[list] = [[] for _ in range(ntr)]
    tm = song.tempo_map
    engine_of = group.engines                           # part -> engine
    engines = list({id(e): e for e in engine_of.values()}.values())
    home: dict[int, int] = {}                           # id(engine) -> track of its first event
    for tick, ti, kind, raw in merged:
        if kind == CHANNEL:
            e = engine_of.get(raw[0] & 0x0F)
            if e is not None and id(e) not in home:
                home[id(e)] = ti
    to_raw = message_to_raw
    for e in engines:
        ti = home.get(id(e), 0)
        outs[ti].extend((0, to_raw(m)) for m in e.start(0.0))
    timed = [e for e in engines if e.adaptive]          # only adaptive engines have deadlines
    last_tick = 0
    for idx, (tick, ti, kind, raw) in enumerate(merged):
        t = secs[idx]
        if timed:
            for e in timed:
                d = e.next_deadline()
                while d is not None and d <= t:
                    dt = min(max(int(round(tm.tick(d))), last_tick), tick)
                    outs[home.get(id(e), ti)].extend((dt, to_raw(m)) for m in e.tick(d))
                    d = e.next_deadline()
        last_tick = tick
        if kind != CHANNEL:
            outs[ti].append((tick, raw))
            continue
        ch = raw[0] & 0x0F
        if ch in passthrough:
            outs[ti].append((tick, raw))
            continue
        e = engine_of.get(ch)
        if e is None:
            continue  # a part written to another file
        msg = raw_to_message(raw)
        res = e.feed(t, msg)
        if res:
            out = outs[ti]
            for m in res:
                out.append((tick, to_raw(m)))
    # timers after the last event (chord windows still open)
    for e in timed:
        guard = 0
        d = e.next_deadline()
        while d is not None and guard < 10000:
            dt = max(int(round(tm.tick(d))), last_tick)
            outs[home.get(id(e), 0)].extend((dt, to_raw(m)) for m in e.tick(d))
            d = e.next_deadline()
            guard += 1
    result = []
    for ti, tr in enumerate(song.tracks):
        evs = outs[ti]
        end = max(tr.end_tick, evs[-1][0] if evs else 0)
        result.append((evs, end))
    return result


def _channel_list(chans: Iterable[int]) -> str:
    return ",".join(str(c + 1) for c in chans)


def part_needs(merged: Sequence, parts: Sequence[int], tuning, *, adaptive: bool, avail: int) -> tuple[dict, dict]:
    """Per part: the channels it needs at least (most notes with different bends sounding at
    once, pedal included: with fewer it would steal) and the channels it wishes for (one per
    bend value it ever uses: then every note finds a channel already bent right, and no
    channel is re-bent while ringing). Static tunings share a channel among notes with one bend;
    in adaptive mode every note has a bend of its own."""
    want = set(parts)
    dev_cache: dict[int, object] = {}

    def bend_of(key: int):
        d = dev_cache.get(key)
        if d is None:
            c = tuning.cents[key]
            d = dev_cache[key] = None if c is None else round(c - 100.0 * key, 4)
        return d

    sounding: dict[int, dict] = {p: {} for p in parts}    # part -> {bend: count}
    keys_down: dict[int, dict] = {p: {} for p in parts}   # part -> {key: [bends]}
    pedal_held: dict[int, list] = {p: [] for p in parts}
    pedal: dict[int, bool] = {}
    poly: dict[int, int] = {p: 0 for p in parts}
    most: dict[int, int] = {p: 1 for p in parts}
    used: dict[int, set] = {p: set() for p in parts}

    def drop(p: int, b) -> None:
        snd = sounding[p]
        snd[b] -= 1
        if not snd[b]:
            del snd[b]
        poly[p] -= 1

    for _, _, kind, raw in merged:
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
            keys_down[p].setdefault(raw[1], []).append(b)
            used[p].add(b)
            poly[p] += 1
            n = poly[p] if adaptive else len(snd)
            if n > most[p]:
                most[p] = n
        elif hi == 0x80 or hi == 0x90:
            q = keys_down[p].get(raw[1])
            if q:
                b = q.pop(0)
                if pedal.get(p):
                    pedal_held[p].append(b)
                else:
                    drop(p, b)
        elif hi == 0xB0 and raw[1] == 64:
            down = raw[2] >= 64
            if pedal.get(p) and not down:
                for b in pedal_held[p]:
                    drop(p, b)
                pedal_held[p] = []
            pedal[p] = down
    need_min = {p: max(1, min(most[p], avail)) for p in parts}
    wish = {p: max(need_min[p], min(avail, len(used[p]) if not adaptive else 2 * most[p])) for p in parts}
    return need_min, wish


def plan_groups(song: Song, merged: Sequence, secs: Sequence[float], tuning, config,
                merge: bool = False) -> list[tuple[list[int], dict]]:
    """Share the output channels among the parts (see the module docstring).

    Returns groups, one per output file: (parts, {part: engine config}).
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
    groups = _plan_note_groups(merged, parts, tuning, config, pas)
    first_parts, first_cfgs = groups[0]
    for q in quiet:
        first_cfgs[q] = first_cfgs[first_parts[0]]
    groups[0] = (sorted(first_parts + quiet), first_cfgs)
    return groups


def _plan_note_groups(merged, parts, tuning, config, pas) -> list[tuple[list[int], dict]]:
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
    need_min, wish = part_needs(merged, parts, tuning, adaptive=config.adaptive is not None, avail=avail)
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
                break
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


def split_name(out_path: str, index: int) -> str:
    """OUT.mid -> OUT-part1.mid (index counts from 1)."""
    p = Path(out_path)
    return str(p.with_name(f"{p.stem}-part{index}{p.suffix or '.mid'}"))


def convert_song(song: Song, out_path: str, opts: ConvertOptions) -> ConvertResult:
    """Convert a parsed file; return the outputs (bytes not yet written)."""
    from retuner.engine.core import EngineConfig
    config = opts.config or EngineConfig()
    config.validate()
    tuning = opts.tuning
    merged = merged_events(song)
    secs = event_seconds(song, merged)
    groups = plan_groups(song, merged, secs, tuning, config, merge=opts.merge_parts)
    if not opts.lookahead:
        outputs = _render(song, merged, secs, groups, tuning, config, out_path, None)
        return ConvertResult(song.path, outputs, len(groups) > 1)
    if config.adaptive is None:
        raise RetunerError("--lookahead needs --adaptive", field="lookahead")
    from retuner.adaptive import lookahead
    live = _render(song, merged, secs, groups, tuning, config, out_path, None)
    chosen = lookahead.choose(
        song, merged, secs, tuning, config, live,
        lambda plan: _render(song, merged, secs, groups, tuning, config, out_path, plan), output_stream)
    res = ConvertResult(song.path, chosen.outputs, len(groups) > 1)
    res.lookahead = chosen.summary
    return res


def _render(song, merged, secs, groups, tuning, config, out_path, plan) -> list[Output]:
    pas = frozenset(config.passthrough)
    outputs = []
    split = len(groups) > 1
    for gi, (parts, cfgs) in enumerate(groups):
        engines = {}
        by_cfg: dict[int, Any] = {}      # parts given the very same config share one engine
        for p in parts:
            cfg = cfgs[p]
            e = by_cfg.get(id(cfg))
            if e is None:
                e = _make_engine(tuning, cfg, plan)
                by_cfg[id(cfg)] = e
            engines[p] = e
        channels = {p: MODES[cfgs[p].mode].part_channels(cfgs[p]) for p in parts}
        group = _Group(parts, engines, channels)
        tracks = _drive(song, merged, secs, group, pas)
        if plan is not None:
            plan.after_drive(song, tracks, group)
        data = serialize(song.format, song.header_division, tracks)
        stats: dict = {}
        for e in {id(e): e for e in engines.values()}.values():
            for k, v in e.stats.items():
                stats[k] = stats.get(k, 0) + v
        path = split_name(out_path, gi + 1) if split else str(out_path)
        outputs.append(Output(path, parts, channels, data, stats))
    return outputs


def convert_file(in_path: str | os.PathLike, out_path: str | os.PathLike, opts: ConvertOptions) -> ConvertResult:
    """Read, convert and write (atomically; all output files or none). The input is never
    overwritten: an output path that names the input file is refused."""
    song = read_smf(in_path)
    res = convert_song(song, str(out_path), opts)
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


# ---------------------------------------------------------------------------
# Output -> (seconds, message) stream, report
# ---------------------------------------------------------------------------
def output_stream(data: bytes, path: str = "<output>", channels: Optional[Iterable[int]] = None) -> list:
    """(seconds, mido message) of every channel message and system exclusive of a written file,
    in time order (the file's own tempo map)."""
    song = parse_smf(data, path)
    merged = merged_events(song)
    secs = event_seconds(song, merged)
    keep = None if channels is None else set(channels)
    out = []
    for (tick, ti, kind, raw), t in zip(merged, secs):
        if kind == CHANNEL:
            if keep is None or (raw[0] & 0x0F) in keep:
                out.append((t, raw_to_message(raw)))
        elif kind == SYSEX and raw[0] == 0xF0:
            length, p = _varlen(raw, 1, len(raw), lambda pos: "")
            body = raw[p:p + length]
            if body.endswith(b"\xF7"):
                body = body[:-1]
            try:
                out.append((t, mido.Message("sysex", data=body)))
            except ValueError:
                pass
    return out


# ---------------------------------------------------------------------------
# Batches
# ---------------------------------------------------------------------------
def find_midi_files(folder: str | os.PathLike) -> list[Path]:
    """Every .mid / .midi below ``folder`` (case-insensitive), sorted."""
    root = Path(folder)
    out = [p for p in root.rglob("*") if p.is_file() and p.suffix.lower() in (".mid", ".midi")]
    return sorted(out)


def _batch_one(job: tuple[str, str, ConvertOptions]) -> tuple[str, Optional[str], list[str], int]:
    """Worker: convert one file. Returns (input, error line or None, outputs written, notes)."""
    src, dst, opts = job
    try:
        Path(dst).parent.mkdir(parents=True, exist_ok=True)
        res = convert_file(src, dst, opts)
        return src, None, [o.path for o in res.outputs], int(res.stats.get("notes", 0))
    except RetunerError as exc:
        if exc.file is None:
            exc.file = src
        return src, str(exc), [], 0
    except Exception as exc:  # a bug must not take the batch down: report the file and go on
        return src, f"{src}: internal error: {type(exc).__name__}: {exc}", [], 0


def _split_note(outputs: Sequence[str]) -> str:
    if len(outputs) <= 1:
        return ""
    return (f": the parts need more channels than one port has: {len(outputs)} files "
            f"({', '.join(os.path.basename(o) for o in outputs)})")


class _Progress:
    """A progress bar on a terminal, plain lines otherwise."""

    def __init__(self, total: int, stream, quiet: bool = False):
        self.total = total
        self.done = 0
        self.failed = 0
        self.stream = stream
        self.tty = hasattr(stream, "isatty") and stream.isatty()
        self.quiet = quiet

    def update(self, name: str, error: Optional[str], note: str = "") -> None:
        self.done += 1
        if error:
            self.failed += 1
        if self.tty:
            if error:
                self.stream.write("\r\x1b[K" + f"retuner: {error}\n")
            elif note:
                self.stream.write("\r\x1b[K" + f"{name}{note}\n")
            width = 30
            filled = int(width * self.done / max(self.total, 1))
            self.stream.write(f"\r\x1b[K[{'#' * filled}{'.' * (width - filled)}] "
                              f"{self.done}/{self.total} {os.path.basename(name)[:40]}")
            if self.done == self.total:
                self.stream.write("\n")
            self.stream.flush()
        else:
            if error:
                self.stream.write(f"retuner: {error}\n")
            elif not self.quiet or note:
                self.stream.write(f"[{self.done}/{self.total}] {name}{note}\n")
            self.stream.flush()


def convert_batch(src_dir: str | os.PathLike, dst_dir: str | os.PathLike, opts: ConvertOptions, *,
                  jobs: Optional[int] = None, quiet: bool = False, stream=None) -> int:
    """Convert every .mid below ``src_dir`` into ``dst_dir`` (same relative paths) in worker
    processes. A bad file is reported in one line and skipped. Exit status: 0, or 1 if any failed."""
    import sys
    from concurrent.futures import ProcessPoolExecutor, as_completed

    stream = stream if stream is not None else sys.stderr
    src = Path(src_dir)
    dst = Path(dst_dir)
    if dst.exists() and not dst.is_dir():
        raise RetunerError("output for a folder must be a folder", file=str(dst))
    files = find_midi_files(src)
    if not files:
        raise RetunerError("no .mid files found", file=str(src))
    try:
        dst.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise RetunerError(f"cannot create the output folder: {exc.strerror or exc}", file=str(dst))
    if dst.resolve() == src.resolve():
        raise RetunerError("the output folder must differ from the input folder", file=str(dst))
    jobs_list = [(str(f), str(dst / f.relative_to(src)), opts) for f in files]
    n = jobs if jobs and jobs > 0 else (os.cpu_count() or 1)
    n = max(1, min(n, len(jobs_list)))
    prog = _Progress(len(jobs_list), stream, quiet)
    results = []
    if n == 1:
        for j in jobs_list:
            r = _batch_one(j)
            results.append(r)
            prog.update(r[0], r[1], _split_note(r[2]))
    else:
        with ProcessPoolExecutor(max_workers=n) as ex:
            futs = [ex.submit(_batch_one, j) for j in jobs_list]
            for fut in as_completed(futs):
                r = fut.result()
                results.append(r)
                prog.update(r[0], r[1], _split_note(r[2]))
    failed = [r for r in results if r[1]]
    if not quiet:
        ok = len(results) - len(failed)
        print(f"converted {ok} of {len(results)} files into {dst}"
              + (f"; {len(failed)} failed" if failed else ""))
    return 1 if failed else 0


# ---------------------------------------------------------------------------
# Speed
# ---------------------------------------------------------------------------
def _bench_file(path: str, events: int, seed: int = 1, wheel: bool = True) -> int:
    """Write a generated arrangement of about ``events`` events: a piano part (chords of 1..4
    notes, sustain pedal, some wheel), a bass part and drums. Returns the event count."""
    import random
    rnd = random.Random(seed)
    tpb = 480
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
    tracks = []
    cond = [(0, b"\xFF\x51\x03\x07\xA1\x20"), (0, b"\xFF\x58\x04\x04\x02\x18\x08")]
    tracks.append((cond, tick))
    for evs in (piano, bass, drums):
        evs.sort(key=lambda e: e[0])
        tracks.append((evs, tick + tpb))
    with open(path, "wb") as fh:
        fh.write(serialize(1, tpb, tracks))
    return n


def convert_speed_bench(events: int = 100_000, *, profile: str = "meantone-quarter",
                        batch_files: int = 8, batch_events: int = 12_000,
                        jobs: Optional[Sequence[int]] = None, repeat: int = 3) -> dict:
    """Measure file conversion speed: converting a generated file of about ``events`` events
    against mido loading and saving the same file (goal: at most 2x), and a batch of
    ``batch_files`` files with 1 worker and with more (goal: scales with workers).
    Best of ``repeat`` runs for the single file. Returns the figures (seconds)."""
    import shutil
    import time

    from retuner.engine.core import EngineConfig
    from retuner.profiles.profile import load_profile

    tmp = tempfile.mkdtemp(prefix="retuner-bench-")
    try:
        src = os.path.join(tmp, "big.mid")
        n = _bench_file(src, events)
        tuning = load_profile(profile)
        opts = ConvertOptions(tuning, EngineConfig())

        def best(fn):
            ts = []
            for _ in range(repeat):
                t0 = time.perf_counter()
                fn()
                ts.append(time.perf_counter() - t0)
            return min(ts)

        def mido_round_trip():
            mf = mido.MidiFile(src)
            mf.save(os.path.join(tmp, "mido.mid"))

        t_mido = best(mido_round_trip)
        t_conv = best(lambda: convert_file(src, os.path.join(tmp, "out.mid"), opts))
        out = {"events": n, "profile": profile, "mido_load_save_s": round(t_mido, 4),
               "convert_s": round(t_conv, 4), "ratio": round(t_conv / t_mido, 3),
               "events_per_s": round(n / t_conv)}
        # batch scaling
        bdir = os.path.join(tmp, "batch")
        os.mkdir(bdir)
        for i in range(batch_files):
            _bench_file(os.path.join(bdir, f"f{i}.mid"), batch_events, seed=i + 2)
        cpus = os.cpu_count() or 1
        jobs = list(jobs) if jobs else sorted({1, min(2, cpus), cpus})
        times = {}
        import io as _io
        for j in jobs:
            odir = os.path.join(tmp, f"out{j}")
            t0 = time.perf_counter()
            convert_batch(bdir, odir, opts, jobs=j, quiet=True, stream=_io.StringIO())
            times[j] = time.perf_counter() - t0
        out["batch"] = {"files": batch_files, "events_per_file": batch_events,
                        "seconds_by_jobs": {str(j): round(t, 3) for j, t in times.items()},
                        "speedup": {str(j): round(times[jobs[0]] / t, 2) for j, t in times.items()},
                        "cpus": cpus}
        return out
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
