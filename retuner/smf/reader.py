"""Reading Standard MIDI Files, strictly and fast.

Standard MIDI Files (type 0 and type 1; "Standard MIDI Files 1.0", MIDI Manufacturers
Association) are parsed here byte by byte rather than with mido's reader, for two reasons: a
malformed file must give one line that names the file and the place (track, byte offset or
tick), and the parse must be fast. Every event is kept with its absolute tick and its exact
bytes as they would stand in a file without running status.

What a file can make us compute is bounded (:data:`LIMITS`): its size, its tracks and its
events. A file over a limit is refused with one line naming the file and the place, before
any work on it is done. Events that a general reader cannot read back are refused too rather
than copied into an output: a Set Tempo that is not 3 bytes or is 0, a meta event shorter
than its type's fixed length, events after a track's End of Track.
"""

from __future__ import annotations

import heapq
import os
from dataclasses import dataclass, field
from typing import Callable, Optional, Sequence

from retuner.errors import RetunerError
from retuner.smf.tempo import DEFAULT_TEMPO, TempoMap

#: Status bytes of channel messages and their number of data bytes (MIDI 1.0).
DATA_LEN = {0x80: 2, 0x90: 2, 0xA0: 2, 0xB0: 2, 0xC0: 1, 0xD0: 1, 0xE0: 2}
META_TEMPO = 0x51
META_END_OF_TRACK = 0x2F
#: Meta event types with a fixed data length (SMF 1.0): sequence number (2, or 0 for "the
#: track's position"), MIDI channel prefix, End of Track, Set Tempo, SMPTE offset, time
#: signature, key signature. The port meta event (0x21, 1 byte) is common practice.
META_LENGTHS = {0x00: (0, 2), 0x20: (1,), 0x21: (1,), 0x2F: (0,), 0x51: (3,), 0x54: (5,),
                0x58: (4,), 0x59: (2,)}

# event kinds
CHANNEL, SYSEX, META = 0, 1, 2


@dataclass(frozen=True)
class Limits:
    """What one file may make us compute. Each is far above what a piece of music needs
    (a long piano piece holds some 100 000 events; General MIDI files a few dozen tracks),
    and low enough that a breach is found within about a second: the size and the tracks
    from the header at once, the events while reading them (about a million a second)."""

    file_bytes: int = 16 * 1024 * 1024
    tracks: int = 1024
    events: int = 1_100_000


LIMITS = Limits()
#: for reading back what we wrote ourselves: an output holds more events than its input (a
#: pedal goes to every channel of the pool), and its input was held to :data:`LIMITS`
NO_LIMITS = Limits(file_bytes=1 << 62, tracks=1 << 16, events=1 << 62)


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
    division: int                 # ticks per quarter note (>0), or ticks per 1000 s for SMPTE
    smpte: bool
    tracks: list[Track]
    header_division: int = 480    # the division field exactly as in the header
    tempo_map: TempoMap = None  # type: ignore[assignment]

    @property
    def end_tick(self) -> int:
        return max((t.end_tick for t in self.tracks), default=0)


def read_varlen(data: bytes, pos: int, end: int, where: Callable[[int], str]) -> tuple[int, int]:
    """A variable-length quantity at ``pos``: (value, position after it)."""
    value = 0
    for i in range(4):
        if pos >= end:
            raise RetunerError("truncated: a variable-length number runs past the end of the track",
                               file=None, field=where(pos))
        b = data[pos]
        pos += 1
        value = (value << 7) | (b & 0x7F)
        if not b & 0x80:
            return value, pos
    raise RetunerError("bad variable-length number (more than 4 bytes)", field=where(pos - 4))


def _parse_track(data: bytes, start: int, end: int, tno: int, path: str, budget: int) -> Track:
    """One MTrk body; at most ``budget`` events (else an error naming the place)."""
    events = list(_track_events(data, start, end, tno, path, budget))
    return Track(events, events.pop()[0])


def _track_events(data: bytes, start: int, end: int, tno: int, path: str, budget: int):
    """The events of one MTrk body as (tick, kind, raw), then (end tick, None, None)."""
    def where(pos: int) -> str:
        return f"track {tno + 1}, byte {pos}"

    def at(tick: int) -> str:
        return f"track {tno + 1}, tick {tick}"

    count = 0
    pos = start
    tick = 0
    running = 0
    data_len = DATA_LEN
    try:
        while pos < end:
            delta, pos = read_varlen(data, pos, end, where)
            tick += delta
            if pos >= end:
                raise RetunerError("truncated: an event is missing after its delta time", field=where(pos))
            if count >= budget:
                raise RetunerError(f"more than {LIMITS.events} events in the file (the limit)", field=at(tick))
            status = data[pos]
            if status == 0xFF:
                if pos + 2 > end:
                    raise RetunerError("truncated meta event", field=where(pos))
                mtype = data[pos + 1]
                length, p = read_varlen(data, pos + 2, end, where)
                if p + length > end:
                    raise RetunerError(f"meta event of {length} bytes runs past the end of the track",
                                       field=where(pos))
                fixed = META_LENGTHS.get(mtype)
                if fixed is not None and length not in fixed:
                    raise RetunerError(f"meta event FF {mtype:02X} has {length} data bytes, SMF 1.0 "
                                       f"gives it {' or '.join(map(str, fixed))}", field=at(tick))
                if mtype == META_END_OF_TRACK:
                    pos = p + length
                    if pos < end:
                        extra, q = read_varlen(data, pos, end, where)
                        raise RetunerError("events after End of Track (SMF 1.0: it is the last event "
                                           "of a track)", field=at(tick + extra))
                    break
                if mtype == META_TEMPO and not int.from_bytes(data[p:p + 3], "big"):
                    raise RetunerError("Set Tempo of 0 microseconds per quarter note", field=at(tick))
                yield tick, META, data[pos:p + length]
                count += 1
                pos = p + length
                running = 0  # SMF 1.0: meta and sysex events cancel running status
            elif status == 0xF0 or status == 0xF7:
                length, p = read_varlen(data, pos + 1, end, where)
                if p + length > end:
                    raise RetunerError(f"system exclusive of {length} bytes runs past the end of the track "
                                       f"({end - p} bytes left)", field=where(pos))
                yield tick, SYSEX, data[pos:p + length]
                count += 1
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
                n = data_len[running & 0xF0]
                if pos + n > end:
                    raise RetunerError("truncated channel message", field=where(pos))
                body = data[pos:pos + n]
                for b in body:
                    if b & 0x80:
                        raise RetunerError(f"data byte 0x{b:02X} out of range in a channel message",
                                           field=where(pos))
                yield tick, CHANNEL, bytes((running,)) + body
                count += 1
                pos += n
    except RetunerError as exc:
        exc.file = path
        raise
    yield tick, None, None


@dataclass
class _Header:
    format: int
    division: int
    smpte: bool
    header_division: int
    spans: list          # (start, end) of each MTrk body, in file order


def _header(data: bytes, path: str, limits: Optional[Limits] = None) -> _Header:
    """The header and where each track lies; every check that needs no event. ``limits``
    (default :data:`LIMITS`) bound an input file; our own outputs are read with
    :data:`NO_LIMITS`."""
    lim = LIMITS if limits is None else limits
    def err(msg: str, pos: Optional[int] = None) -> RetunerError:
        return RetunerError(msg, file=path, field=None if pos is None else f"byte {pos}")

    if len(data) > lim.file_bytes:
        raise err(f"{len(data)} bytes: more than the limit of {lim.file_bytes} for a MIDI file")
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
    if ntrks > lim.tracks:
        raise err(f"bad header: {ntrks} tracks, more than the limit of {lim.tracks}", 10)
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
    spans: list = []
    while pos < len(data) and len(spans) < ntrks:
        if pos + 8 > len(data):
            raise err(f"truncated: chunk header of track {len(spans) + 1} is cut off", pos)
        ctype = data[pos:pos + 4]
        clen = int.from_bytes(data[pos + 4:pos + 8], "big")
        body = pos + 8
        if body + clen > len(data):
            raise err(f"truncated: track {len(spans) + 1} announces {clen} bytes, "
                      f"only {len(data) - body} are left", pos)
        if ctype == b"MTrk":
            spans.append((body, body + clen))
        elif not all(0x20 <= c <= 0x7E for c in ctype):
            raise err(f"bad chunk type {ctype!r}", pos)
        # other (alien) chunk types are skipped, as SMF 1.0 asks
        pos = body + clen
    if len(spans) < ntrks:
        raise err(f"truncated: header announces {ntrks} tracks, the file holds {len(spans)}")
    return _Header(fmt, division, smpte, div, spans)


def _count_events(data: bytes, start: int, end: int, limit: int) -> int:
    """How many events a track holds, counted without reading them (stops past ``limit``).
    Only for a file big enough to break the limit: the count is a few times faster than the
    reading, so the breach is found quickly; the reading checks everything this skips."""
    n = 0
    pos = start
    running = 0
    data_len = DATA_LEN
    while pos < end and n <= limit:
        while pos < end and data[pos] & 0x80:       # the delta time
            pos += 1
        pos += 1
        if pos >= end:
            break
        status = data[pos]
        if status == 0xFF or status == 0xF0 or status == 0xF7:
            pos += 2 if status == 0xFF else 1
            length = 0
            while pos < end:
                b = data[pos]
                pos += 1
                length = (length << 7) | (b & 0x7F)
                if not b & 0x80:
                    break
            pos += length
            running = 0
            if status == 0xFF and pos <= end and data[pos - length - 2] == META_END_OF_TRACK:
                break
        elif status & 0x80:
            running = status
            pos += 1 + data_len.get(status & 0xF0, 0)
        elif running:
            pos += data_len[running & 0xF0]
        else:
            break                                   # bad running status: the reading says where
        n += 1
    return n


def parse_smf(data: bytes, path: str = "<file>") -> Song:
    """Parse a Standard MIDI File, strictly. Raises RetunerError naming the place."""
    h = _header(data, path)
    if len(data) > 2 * LIMITS.events:               # an event takes 2 bytes at least
        left = LIMITS.events
        for tno, (start, end) in enumerate(h.spans):
            left -= _count_events(data, start, end, left)
            if left < 0:
                raise RetunerError(f"more than {LIMITS.events} events in the file (the limit)",
                                   file=path, field=f"track {tno + 1}")
    tracks: list[Track] = []
    budget = LIMITS.events
    for tno, (start, end) in enumerate(h.spans):
        tr = _parse_track(data, start, end, tno, path, budget)
        budget -= len(tr.events)
        tracks.append(tr)
    song = Song(path, h.format, h.division, h.smpte, tracks, h.header_division)
    song.tempo_map = TempoMap(h.division, tempo_changes(tracks), h.smpte)
    return song


def stream_events(data: bytes, path: str = "<file>", limits: Optional[Limits] = None):
    """Every event of a file as (seconds, tick, track index, kind, raw) in the order of
    :func:`merged_events`, read as it goes: memory stays that of one event per track. The
    seconds follow the tempo map as it is met (a Set Tempo at tick T changes only what comes
    after T, so meeting it in tick order gives the same times as the whole map)."""
    h = _header(data, path, limits)
    budget = (LIMITS if limits is None else limits).events   # each track is held to the file's limit
    def tagged(ti: int, start: int, end: int):
        for tick, kind, raw in _track_events(data, start, end, ti, path, budget):
            if kind is not None:
                yield tick, ti, kind, raw

    if len(h.spans) == 1:           # one track: no merge to make
        s, e = h.spans[0]
        merged = ((tick, 0, kind, raw) for tick, kind, raw in _track_events(data, s, e, 0, path, budget))
    else:
        merged = heapq.merge(*(tagged(ti, s, e) for ti, (s, e) in enumerate(h.spans)),
                             key=lambda ev: ev[0])
    tm = TempoMap(h.division, (), h.smpte)
    spt = tm._spt(DEFAULT_TEMPO)
    base_tick, base_sec = 0, 0.0
    smpte = h.smpte
    for tick, ti, kind, raw in merged:
        if kind is None:
            return                  # the end of the only track
        t = base_sec + (tick - base_tick) * spt
        yield t, tick, ti, kind, raw
        if kind == META and raw[1] == META_TEMPO and not smpte:
            base_tick, base_sec = tick, t
            spt = tm._spt(int.from_bytes(raw[3:6], "big"))


def tempo_changes(tracks: Sequence[Track]) -> list[tuple[int, int]]:
    """(tick, microseconds per quarter note) of every Set Tempo in any track."""
    changes = []
    for tr in tracks:
        for tick, kind, raw in tr.events:
            if kind == META and raw[1] == META_TEMPO:
                changes.append((tick, int.from_bytes(raw[3:6], "big")))
    return changes


def read_smf(path: str | os.PathLike) -> Song:
    try:
        size = os.path.getsize(path)
        if size > LIMITS.file_bytes:
            raise RetunerError(f"{size} bytes: more than the limit of {LIMITS.file_bytes} for a MIDI file",
                               file=str(path))
        with open(path, "rb") as fh:
            data = fh.read()
    except FileNotFoundError:
        raise RetunerError("no such file", file=str(path))
    except IsADirectoryError:
        raise RetunerError("is a directory", file=str(path))
    except OSError as exc:
        raise RetunerError(f"cannot read: {exc.strerror or exc}", file=str(path))
    return parse_smf(data, str(path))


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
    return song.tempo_map.seconds_of(e[0] for e in merged)
