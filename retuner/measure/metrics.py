"""Impurity, motion and drift, computed from an OUTPUT message stream.

The stream is decoded the way a receiving synthesizer would hear it (not from
the engine's internal state):

* **pitch bend** (bend pool and MPE): a note on key k of channel c sounds at
  ``100*k + bend/8192 * range * 100 * bend_scale`` cents, ``bend`` in
  -8192..8191 (MIDI 1.0: centre 8192 on the wire), ``range`` in semitones from
  RPN 0 (CC101=0, CC100=0, data entry CC6 semitones + CC38 cents) as sent in the
  stream itself. Default range 2 semitones (MIDI 1.0 common practice); after an
  MPE Configuration Message (RPN 6 on channel 1 or 16, MPE specification 2018)
  the member channels default to 48 semitones and the manager to 2, and a
  member's note sounds at its own bend plus the manager's (the manager-channel
  bend applies to every note of the zone).
  ``bend_scale`` lets a caller model a synth that plays bends at a different
  size (e.g. 127/128).
* **MIDI Tuning Standard**: per-key pitches from bulk tuning dumps and single
  note tuning changes (decoded by :func:`retuner.midi.mts.parse_sysex`), kept per
  tuning program; a channel plays the program it selected with RPN 3 (and bank,
  RPN 4), or, if it never selected one, the last program written. Real-time
  changes retune sounding notes at once; non-real-time ones only later notes.
  Any channel bend adds on top.
* **system resets** (GM, GM2, GS, XG system on and System Reset, see
  :mod:`retuner.midi.resets`): every note stops and every channel is back at
  bend range 2, wheel centred, RPN null, no tuning program selected; reset all
  controllers (CC121) centres the channel's wheel and keeps its range.

Definitions (the same everywhere a figure is shown, so figures compare):

* **impurity**: every pair of simultaneously sounding notes whose interval,
  rounded to whole semitones and reduced by octaves, is a unison/octave, minor
  or major third, fourth, fifth, minor or major sixth; its distance in cents
  from 1/1 (2/1), 6/5, 5/4, 4/3, 3/2, 8/5, 5/3 (plus its whole octaves),
  averaged weighted by the time the pair sounds.
* **motion**: the sum of absolute pitch changes of notes while they sound,
  divided by the number of notes.
* **drift**: at each moment, the mean deviation from 12-EDO (cents from
  ``100*key`` of the output key) of the sounding notes; reported as its
  maximum absolute value, its final value and its time-weighted RMS.
"""

from __future__ import annotations

import itertools
import math
from array import array
from dataclasses import dataclass, field
from typing import Iterable, Optional, Sequence

import mido
import numpy as np

from retuner.midi.mts import is_mts, parse_sysex
from retuner.midi.resets import system_reset_bytes
from retuner.pitch import intervals
from retuner.pitch.tuning import Tuning

# interval class (semitones mod 12) -> just ratio, for the consonances counted in impurity
CONSONANT_RATIOS = {0: (1, 1), 3: (6, 5), 4: (5, 4), 5: (4, 3), 7: (3, 2), 8: (8, 5), 9: (5, 3)}
CONSONANT_CENTS = {c: 1200.0 * math.log2(p / q) for c, (p, q) in CONSONANT_RATIOS.items()}

# events closer than this (seconds) count as simultaneous (float rounding of event times)
TIME_EPS = 1e-9

CC_RPN_MSB, CC_RPN_LSB, CC_NRPN_MSB, CC_NRPN_LSB = 101, 100, 99, 98
CC_DATA_MSB, CC_DATA_LSB = 6, 38
RPN_BEND_RANGE = (0, 0)
RPN_MPE_CONFIG = (0, 6)
RPN_TUNING_PROGRAM = (0, 3)
RPN_TUNING_BANK = (0, 4)
# the controllers that change what the decoder hears: RPN and NRPN selection, data entry,
# reset all controllers (121), all notes off (123), all sound off (120)
_CC_HEARD = frozenset((CC_RPN_MSB, CC_RPN_LSB, CC_NRPN_MSB, CC_NRPN_LSB, CC_DATA_MSB, CC_DATA_LSB,
                       121, 123, 120))


@dataclass(slots=True)
class NoteTrack:
    """One sounding note of the output: its key, channel, start, end and pitch steps."""

    key: int
    channel: int
    start: float
    end: Optional[float] = None
    steps: list[tuple[float, float]] = field(default_factory=list)  # (time, cents) from start on

    @property
    def pitch(self) -> float:
        return self.steps[-1][1]

    @property
    def motion(self) -> float:
        return sum(abs(b[1] - a[1]) for a, b in zip(self.steps, self.steps[1:]))


def _close(nt: NoteTrack, t: float) -> None:
    """The note ends at ``t``: a change at that very instant (an output event at the note-off's
    time, after it) was never heard on this note."""
    nt.end = t
    steps = nt.steps
    while len(steps) > 1 and steps[-1][0] >= t - TIME_EPS:
        steps.pop()


def _step(nt: NoteTrack, t: float, p: float) -> None:
    """A note's pitch becomes ``p`` at ``t``. Changes at one instant are heard as their
    last value: a step at the time of the previous one replaces it."""
    if nt.steps and abs(nt.steps[-1][0] - t) <= TIME_EPS:
        nt.steps[-1] = (nt.steps[-1][0], p)
        if len(nt.steps) > 1 and abs(nt.steps[-2][1] - p) <= 1e-9:
            nt.steps.pop()
    else:
        nt.steps.append((t, p))


@dataclass
class Decoded:
    notes: list[NoteTrack]
    bends_sent: int
    channels_used: list[int]   # 1-based channels that carried notes
    end_time: float


# -- MIDI Tuning Standard part ---------------------------------------------------

def _parse_mts(msg):
    """MTS sysex (a mido message, or its bytes from F0 to F7) -> (realtime, bank, program,
    [(key, cents|None)]) or None."""
    if not is_mts(msg):
        return None
    try:
        m = parse_sysex(msg)
    except ValueError:
        return None
    if m.kind == "bulk_dump" and m.checksum_ok is False:
        return None
    return m.realtime, m.bank, m.program, m.changes


class _Channel:
    __slots__ = ("bend", "range", "rpn", "tprog", "tbank", "pending_bank")

    def __init__(self) -> None:
        self.bend = 0
        self.range = 2.0
        self.rpn: Optional[tuple[int, int]] = None
        self.tprog: Optional[int] = None
        self.tbank: int = 0
        self.pending_bank: Optional[int] = None


def decode(stream: Iterable[tuple[float, mido.Message]], *, bend_scale: float = 1.0,
           bend_range: Optional[float] = None, exclude_channels: Sequence[int] = (),
           end_time: Optional[float] = None,
           expression: Optional[Sequence[tuple[float, int, float]]] = None) -> Decoded:
    """Decode an output stream into sounding notes with their pitch over time.

    ``bend_range`` (semitones) is the range assumed before the stream sets one
    with RPN 0 (default 2); ``exclude_channels`` are 0-based (e.g. 9 for drums).
    Notes still sounding at the end end at ``end_time`` (default: last event).
    ``expression``: the player's wheel as it reaches each output channel,
    ``(seconds, channel, cents)`` in time order (see :func:`input_wheel`); it is
    taken off the pitch heard, in whole bend steps of the channel's range (as the
    output carries it: ``round(cents / step)`` steps; a wheel given for an MPE manager
    channel is taken off in the manager's steps from every note of its zone, as the
    manager carries it), so the notes carry the tuning's part only (a pitch
    error is then measured against tuning plus wheel, and motion and drift count
    what the tuning does).

    The messages are decoded as their bytes (:func:`decode_wire`).
    """
    return decode_wire(((t, m.bytes()) for t, m in stream), bend_scale=bend_scale,
                       bend_range=bend_range, exclude_channels=exclude_channels,
                       end_time=end_time, expression=expression)


def decode_wire(stream: Iterable[tuple[float, Sequence[int]]], *, bend_scale: float = 1.0,
                bend_range: Optional[float] = None, exclude_channels: Sequence[int] = (),
                end_time: Optional[float] = None,
                expression: Optional[Sequence[tuple[float, int, float]]] = None) -> Decoded:
    """:func:`decode` of a stream of ``(seconds, bytes)``, each message as a synth receives it
    (MIDI 1.0: status byte and data bytes; system exclusive from F0 to F7; System Reset FF),
    as :func:`retuner.smf.messages.wire_stream` reads them from a file: no object per message."""
    chans = [_Channel() for _ in range(16)]
    if bend_range is not None:
        for c in chans:
            c.range = float(bend_range)
    tables: dict[tuple[int, int], list[float]] = {}
    last_prog: list[Optional[tuple[int, int]]] = [None]
    sounding: dict[tuple[int, int], NoteTrack] = {}
    # the same notes by channel: key -> [note, tuning-table pitch of the note]
    on_ch: list[dict[int, list]] = [{} for _ in range(16)]
    done: list[NoteTrack] = []
    bends = 0
    used: set[int] = set()
    t_last = 0.0
    excl = set(exclude_channels)
    expr = [0.0] * 16             # the player's wheel on each channel, cents (taken off)
    xs = list(expression or ())
    xi = 0
    nx = len(xs)
    x_next = xs[0][0] if xs else math.inf
    step_of = _step
    manager_of: list[Optional[int]] = [None] * 16     # MPE member channel -> its zone's manager

    def table_for(ch: int) -> Optional[list[float]]:
        c = chans[ch]
        if c.tprog is not None:
            return tables.get((c.tbank, c.tprog))
        if last_prog[0] is not None:
            return tables.get(last_prog[0])
        return None

    def own_bend(ch: int) -> float:
        c = chans[ch]
        step = c.range * 100.0 * bend_scale / 8192.0
        w = expr[ch]
        # the wheel's share as the output carries it: whole bend steps of the channel's range
        share = round(w / step) * step if w and step else 0.0
        return c.bend * step - share

    def bend(ch: int) -> float:
        m = manager_of[ch]
        return own_bend(ch) if m is None else own_bend(ch) + own_bend(m)

    def restep_zone(t: float, ch: int) -> None:
        """Channel ``ch``'s bend changed: its notes, and if it is a manager, its members'."""
        restep_channel(t, ch)
        if ch in (0, 15):
            for m in range(16):
                if manager_of[m] == ch:
                    restep_channel(t, m)

    def restep_channel(t: float, ch: int) -> None:
        notes = on_ch[ch]
        if notes:
            b = bend(ch)
            for nt, b0 in notes.values():
                p = b0 + b
                if abs(p - nt.steps[-1][1]) > 1e-9:
                    step_of(nt, t, p)

    def end_note(ch: int, key: int, t: float) -> None:
        nt = sounding.pop((ch, key))
        del on_ch[ch][key]
        _close(nt, t)
        done.append(nt)

    for t, raw in stream:
        if t > t_last:
            t_last = t
        if x_next <= t + TIME_EPS:
            while xi < nx and xs[xi][0] <= t + TIME_EPS:
                tx, xch, cents = xs[xi]
                xi += 1
                if expr[xch] != cents:
                    expr[xch] = cents
                    restep_zone(tx, xch)
            x_next = xs[xi][0] if xi < nx else math.inf
        status = raw[0]
        if status >= 0xF0:
            if system_reset_bytes(raw) is not None:
                # GM/GM2/GS/XG system on, System Reset: every note stops, every channel is
                # back at bend range 2 (General MIDI), wheel centred, RPN null, no tuning selected
                for nt in sounding.values():
                    _close(nt, t)
                    done.append(nt)
                sounding.clear()
                for d in on_ch:
                    d.clear()
                chans[:] = [_Channel() for _ in range(16)]
                manager_of[:] = [None] * 16
                last_prog[0] = None
                continue
            if status != 0xF0:
                continue
            parsed = _parse_mts(raw)
            if parsed is None:
                continue
            realtime, bank, program, changes = parsed
            pk = (bank or 0, program)
            tab = tables.setdefault(pk, [100.0 * k for k in range(128)])
            for key, c in changes:
                if c is not None:
                    tab[key] = c
            last_prog[0] = pk
            if realtime:
                # real-time: sounding notes of this table take the new pitch at once
                for ch in range(16):
                    if on_ch[ch] and table_for(ch) is tab:
                        for key, entry in on_ch[ch].items():
                            entry[1] = tab[key]
                        restep_channel(t, ch)
            # non-real-time: sounding notes keep their pitch; later notes use the new table
            continue
        ch = status & 0x0F
        if ch in excl:
            continue
        hi = status & 0xF0
        if hi == 0x90 and raw[2] > 0:
            key = raw[1]
            if key in on_ch[ch]:  # re-strike of a sounding key: the old note ends
                end_note(ch, key, t)
            tab = table_for(ch)
            b0 = tab[key] if tab is not None else 100.0 * key
            nt = NoteTrack(key, ch, t, steps=[(t, b0 + bend(ch))])
            on_ch[ch][key] = [nt, b0]
            sounding[(ch, key)] = nt
            used.add(ch + 1)
        elif hi == 0x80 or hi == 0x90:
            if raw[1] in on_ch[ch]:
                end_note(ch, raw[1], t)
        elif hi == 0xE0:
            bends += 1
            chans[ch].bend = (raw[1] | (raw[2] << 7)) - 8192
            restep_zone(t, ch)
        elif hi == 0xB0:
            cc = raw[1]
            if cc not in _CC_HEARD:                  # a pedal, a volume: no pitch changes
                continue
            c = chans[ch]
            v = raw[2]
            if cc == CC_RPN_MSB:
                c.rpn = (v, c.rpn[1] if c.rpn else 127)
            elif cc == CC_RPN_LSB:
                c.rpn = (c.rpn[0] if c.rpn else 127, v)
            elif cc in (CC_NRPN_MSB, CC_NRPN_LSB):
                c.rpn = None
            elif cc == CC_DATA_MSB and c.rpn is not None:
                if c.rpn == RPN_BEND_RANGE:
                    c.range = float(v)  # the MSB resets the cents part
                    restep_zone(t, ch)
                elif c.rpn == RPN_MPE_CONFIG and ch in (0, 15):
                    members = range(1, 1 + v) if ch == 0 else range(15 - v, 15)
                    for m in range(16):
                        if manager_of[m] == ch:
                            manager_of[m] = None
                    for m in members:
                        chans[m].range = 48.0
                        manager_of[m] = ch
                    c.range = 2.0
                    for m in range(16):
                        restep_channel(t, m)
                elif c.rpn == RPN_TUNING_PROGRAM:
                    c.tprog = v
                    if c.pending_bank is not None:
                        c.tbank = c.pending_bank
                elif c.rpn == RPN_TUNING_BANK:
                    c.pending_bank = v
            elif cc == CC_DATA_LSB and c.rpn == RPN_BEND_RANGE:
                c.range = math.floor(c.range) + v / 100.0
                restep_zone(t, ch)
            elif cc == 121:  # reset all controllers (RP-015): wheel centred, RPN null, range kept
                c.bend = 0
                c.rpn = None
                restep_zone(t, ch)
            elif cc == 123 or cc == 120:  # all notes off / all sound off
                for key in [k for (c2, k) in sounding if c2 == ch]:
                    end_note(ch, key, t)

    t_end = end_time if end_time is not None else t_last
    for nt in sounding.values():
        nt.end = max(t_end, nt.start)
        done.append(nt)
    done.sort(key=lambda n: (n.start, n.key, n.channel))
    return Decoded(done, bends, sorted(used), t_end)


def input_wheel(stream: Iterable[tuple[float, mido.Message]], wheel_range: float,
                channels_of: dict) -> list[tuple[float, int, float]]:
    """The player's wheel, from the INPUT stream, as it reaches the output channels.

    Each input channel's wheel in cents is ``bend/8192 * range``, ``range`` being that
    channel's own pitch bend sensitivity (its RPN 0, MIDI 1.0; ``wheel_range`` semitones
    until it sets one, and again after a system reset); reset all controllers (CC121)
    centres it. ``channels_of`` maps an input channel to the output channels that carry its
    notes (and its wheel); returns ``(seconds, output channel, cents)`` in time order, for
    :func:`decode`'s ``expression``. The messages are read as their bytes
    (:func:`input_wheel_wire`).
    """
    return input_wheel_wire(((t, m.bytes()) for t, m in stream), wheel_range, channels_of)


def input_wheel_wire(stream: Iterable[tuple[float, Sequence[int]]], wheel_range: float,
                     channels_of: dict) -> list[tuple[float, int, float]]:
    """:func:`input_wheel` of a stream of ``(seconds, bytes)`` as :func:`decode_wire` reads."""
    rng: dict[int, float] = {}
    rpn: dict[int, Optional[tuple[int, int]]] = {}
    wheel: dict[int, int] = {}
    out: list[tuple[float, int, float]] = []

    def emit(t: float, ch: int) -> None:
        cents = wheel.get(ch, 0) / 8192.0 * rng.get(ch, wheel_range * 100.0)
        for oc in channels_of.get(ch, ()):
            out.append((t, oc, cents))

    for t, raw in stream:
        status = raw[0]
        hi = status & 0xF0
        if hi == 0xE0:
            ch = status & 0x0F
            wheel[ch] = (raw[1] | (raw[2] << 7)) - 8192
            emit(t, ch)
        elif hi == 0xB0:
            ch = status & 0x0F
            cc, v = raw[1], raw[2]
            sel = rpn.get(ch)
            if cc == CC_RPN_MSB:
                rpn[ch] = (v, sel[1] if sel else 127)
            elif cc == CC_RPN_LSB:
                rpn[ch] = (sel[0] if sel else 127, v)
            elif cc in (CC_NRPN_MSB, CC_NRPN_LSB):
                rpn[ch] = None
            elif cc in (CC_DATA_MSB, CC_DATA_LSB) and sel == RPN_BEND_RANGE:
                semis, cents = divmod(int(round(rng.get(ch, wheel_range * 100.0))), 100)
                if cc == CC_DATA_MSB:
                    semis = v
                else:
                    cents = min(v, 99)
                rng[ch] = semis * 100.0 + cents
                emit(t, ch)
            elif cc == 121:
                wheel[ch] = 0
                rpn[ch] = None
                emit(t, ch)
        elif status >= 0xF0 and system_reset_bytes(raw) is not None:
            moved = [ch for ch, w in wheel.items() if w]
            rng.clear()
            rpn.clear()
            wheel.clear()
            for ch in moved:
                emit(t, ch)
    out.sort(key=lambda e: e[0])
    return out


# -- the measures ----------------------------------------------------------------

def segments(notes: Sequence[NoteTrack]):
    """Yield (t0, t1, [(key, cents)]) for every interval over which the sounding set is constant.

    A note sounds from its start until its end and not after: at one instant its pitch
    changes are applied before its end, and nothing brings an ended note back (a note of zero
    length, or one bent at the instant it ends, once stayed in the set for good and made
    every later moment count it). The set holds only what sounds, so the work is linear in
    the notes times the notes sounding at once."""
    ev: list[tuple[float, int, int, float]] = []  # (time, kind 0=start/change 1=end, index, cents)
    for i, n in enumerate(notes):
        for t, c in n.steps:
            ev.append((t, 0, i, c))
        ev.append((n.end if n.end is not None else n.start, 1, i, 0.0))
    ev.sort(key=lambda e: (e[0], e[1]))
    cur: dict[int, float] = {}
    ended: set[int] = set()
    prev_t: Optional[float] = None
    for t, kind, i, c in ev:
        if prev_t is not None and t > prev_t + TIME_EPS and cur:
            yield prev_t, t, [(notes[j].key, p) for j, p in cur.items()]
        if prev_t is None or t > prev_t + TIME_EPS:
            prev_t = t
        if kind:
            cur.pop(i, None)
            ended.add(i)
        elif i not in ended:
            cur[i] = c


def pair_deviation(cents_low: float, cents_high: float) -> Optional[float]:
    """Distance in cents from just of a consonant pair (None if not a counted consonance)."""
    d = abs(cents_high - cents_low)
    semis = int(round(d / 100.0))
    cls, octs = semis % 12, semis // 12
    if cls not in CONSONANT_CENTS:
        return None
    return d - (CONSONANT_CENTS[cls] + 1200.0 * octs)


# interval class -> its just size in cents (NaN: not a counted consonance), for the arrays
_JUST_BY_CLASS = np.array([CONSONANT_CENTS.get(c, np.nan) for c in range(12)])
#: moments handled at once by :func:`moment_figures` (bounds its memory on a long piece)
MOMENTS_AT_ONCE = 1 << 15


def _moments(notes: Sequence[NoteTrack]):
    """The moments of :func:`segments` in blocks of arrays, for the measures: per moment its
    start ``t0``, end ``t1`` and count of sounding notes, and per sounding note (the moments
    one after the other) its key and pitch. The same walk as :func:`segments`, kept in arrays
    instead of one list per moment."""
    times = array("d")
    cents = array("d")
    index = array("q")
    ends = array("b")                              # 0 a start or change, 1 an end
    for i, n in enumerate(notes):
        steps = n.steps
        for t, c in steps:
            times.append(t)
            cents.append(c)
        times.append(n.end if n.end is not None else n.start)
        cents.append(0.0)
        index.extend([i] * (len(steps) + 1))
        ends.extend(bytes(len(steps)))
        ends.append(1)
    times_a, cents_a = np.frombuffer(times, dtype=np.float64), np.frombuffer(cents, dtype=np.float64)
    index_a, ends_a = np.frombuffer(index, dtype=np.int64), np.frombuffer(ends, dtype=np.int8)
    order = np.lexsort((ends_a, times_a))          # stable: as sorting by (time, kind)
    keys_of = np.fromiter((n.key for n in notes), dtype=np.float64, count=len(notes))
    at_once = MOMENTS_AT_ONCE
    cur: dict[int, float] = {}
    ended: set[int] = set()
    prev_t: Optional[float] = None
    t0s: list[float] = []
    t1s: list[float] = []
    counts: list[int] = []
    who: list[int] = []
    pitch: list[float] = []
    # in time order, a slice at a time as Python numbers (a long piece holds millions)
    events = (zip(times_a[part].tolist(), ends_a[part].tolist(), index_a[part].tolist(),
                  cents_a[part].tolist())
              for part in (order[k:k + 4 * at_once] for k in range(0, len(order), 4 * at_once)))
    for t, kind, i, c in itertools.chain.from_iterable(events):
        if prev_t is not None and t > prev_t + TIME_EPS:
            if cur:
                t0s.append(prev_t)
                t1s.append(t)
                counts.append(len(cur))
                who.extend(cur)
                pitch.extend(cur.values())
                if len(t0s) >= at_once:
                    w = np.array(who, dtype=np.int64)
                    yield np.array(t0s), np.array(t1s), np.array(counts), keys_of[w], np.array(pitch)
                    t0s, t1s, counts, who, pitch = [], [], [], [], []
            prev_t = t
        elif prev_t is None:
            prev_t = t
        if kind:
            cur.pop(i, None)
            ended.add(i)
        elif i not in ended:
            cur[i] = c
    if t0s:
        w = np.array(who, dtype=np.int64)
        yield np.array(t0s), np.array(t1s), np.array(counts), keys_of[w], np.array(pitch)


def moment_figures(notes: Sequence[NoteTrack], settle: float = 0.0) -> tuple[float, float, dict]:
    """:func:`impurity` and :func:`drift` from one walk over the moments: (impurity, total
    pair time, drift). The pairs and means of each block of moments are taken with array
    arithmetic; the figures are those of the definitions (sums in another order: equal to
    about 1e-12 of their size)."""
    tot = wsum = 0.0
    mx = final = sq = tt = 0.0
    for t0, t1, counts, keys, cents in _moments(notes):
        dt = t1 - t0
        starts = np.concatenate(([0], np.cumsum(counts)[:-1]))
        # drift: the mean deviation from 12-EDO of the notes sounding in each moment
        d = np.add.reduceat(cents - 100.0 * keys, starts) / counts
        long_enough = dt >= settle
        if long_enough.any():
            mx = max(mx, float(np.abs(d[long_enough]).max()))
        final = float(d[-1])
        sq += float(np.sum(dt * d * d))
        tt += float(np.sum(dt))
        # impurity: every pair of notes of a moment, moments of one size at a time
        for size in np.unique(counts).tolist():
            if size < 2:
                continue
            rows = np.nonzero(counts == size)[0]
            held = cents[starts[rows][:, None] + np.arange(size)]
            lo, hi = np.triu_indices(size, 1)
            dist = np.abs(held[:, hi] - held[:, lo])
            semis = np.rint(dist / 100.0).astype(np.int64)      # round half to even, as round()
            just = _JUST_BY_CLASS[semis % 12] + 1200.0 * (semis // 12)
            counted = ~np.isnan(just)
            w = np.broadcast_to(dt[rows][:, None], dist.shape)[counted]
            tot += float(np.sum(w * np.abs(dist[counted] - just[counted])))
            wsum += float(np.sum(w))
    imp = tot / wsum if wsum > 0 else 0.0
    return imp, wsum, {"max": mx, "final": final, "rms": math.sqrt(sq / tt) if tt > 0 else 0.0}


def impurity(notes: Sequence[NoteTrack]) -> tuple[float, float]:
    """(time-weighted mean |deviation from just| of consonant pairs, total pair time)."""
    imp, wsum, _ = moment_figures(notes)
    return imp, wsum


def motion(notes: Sequence[NoteTrack], after: float = 0.0) -> float:
    """Sum of absolute pitch changes of notes while they sound, per note. ``after`` > 0:
    only changes later than that many seconds after the note's start count (a change
    within the attack is masked by it)."""
    if not notes:
        return 0.0
    moved = [n for n in notes if len(n.steps) > 1]
    if not moved:
        return 0.0
    times = np.array([t for n in moved for t, _ in n.steps])
    cents = np.array([c for n in moved for _, c in n.steps])
    first = np.cumsum([0] + [len(n.steps) for n in moved[:-1]])
    change = np.ones(len(times), dtype=bool)        # a step that changes its note's pitch
    change[first] = False
    size = np.abs(np.diff(cents, prepend=0.0))
    if after > 0:
        lim = np.repeat(np.array([n.start for n in moved]) + after, [len(n.steps) for n in moved])
        change &= times > lim + TIME_EPS
    return float(np.sum(size[change])) / len(notes)


def drift(notes: Sequence[NoteTrack], settle: float = 0.0) -> dict:
    """Mean deviation from 12-EDO of the sounding notes at each moment: max |.|, final, RMS.

    ``settle`` > 0: the maximum only counts moments lasting at least that many
    seconds (a chord window leaves held notes alone for a few milliseconds;
    this tells those moments apart). RMS and final are unaffected.
    """
    return moment_figures(notes, settle)[2]


def worst_error(notes: Sequence[NoteTrack], tuning: Tuning) -> float:
    """Largest |pitch - target| over every pitch any note took (for static tunings)."""
    worst = 0.0
    for n in notes:
        target = tuning.cents[n.key]
        if target is None:
            continue
        for _, c in n.steps:
            worst = max(worst, abs(c - target))
    return worst


def worst_target_error(notes: Sequence[NoteTrack], tuning: Tuning) -> float:
    """Largest distance of any pitch any note took from its target: the profile pitch of its
    key, or, more than 50 cents away from it (the nearest-key rule plays a key from another)
    or for a key the profile leaves unmapped, the nearest pitch the profile maps."""
    if not notes:
        return 0.0
    mapped = np.array([c for c in tuning.cents if c is not None])
    target = np.array([math.nan if c is None else c for c in tuning.cents])
    keys = np.array([n.key for n in notes for _ in n.steps])
    cents = np.array([c for n in notes for _, c in n.steps])
    inside = (keys >= 0) & (keys < len(target))
    err = np.full(len(cents), math.inf)
    err[inside] = np.abs(cents[inside] - target[keys[inside]])
    far = ~(err <= 50.0)                        # also NaN: an unmapped key
    if far.any() and len(mapped):
        err[far] = np.abs(cents[far][:, None] - mapped[None, :]).min(axis=1)
    return float(err.max())


def report(stream: Iterable[tuple[float, mido.Message]], *, tuning: Optional[Tuning] = None,
           bend_scale: float = 1.0, bend_range: Optional[float] = None,
           exclude_channels: Sequence[int] = (), key_map: Optional[dict] = None,
           settle: float = 0.05) -> dict:
    """Every measure of an output stream, as a JSON-ready dict.

    ``tuning`` (static profiles): adds ``worst_error_cents`` against it.
    ``drift_max_cents`` is the drift maximum over moments lasting at least ``settle``
    seconds (50 ms: a chord's last note sounding alone for an instant while the others are
    released is no shift of the centre); ``drift_max_any_moment_cents`` counts every moment.
    ``late_motion_cents_per_note`` counts only changes more than ``settle`` after a note's
    start (a change within the attack is masked by it).
    ``key_map`` is unused unless an output key differs from the input key
    (then ``{output_key: input_key}``), for the worst-error check only.
    """
    dec = decode(stream, bend_scale=bend_scale, bend_range=bend_range, exclude_channels=exclude_channels)
    imp, pair_time = impurity(dec.notes)
    dr = drift(dec.notes, settle)
    out = {
        "notes": len(dec.notes),
        "channels_used": dec.channels_used,
        "bends_sent": dec.bends_sent,
        "impurity_cents": round(imp, 6),
        "consonant_pair_seconds": round(pair_time, 6),
        "motion_cents_per_note": round(motion(dec.notes), 6),
        "late_motion_cents_per_note": round(motion(dec.notes, settle), 6),
        "drift_max_cents": round(dr["max"], 6),
        "drift_final_cents": round(dr["final"], 6),
        "drift_rms_cents": round(dr["rms"], 6),
        "drift_max_any_moment_cents": round(drift(dec.notes)["max"], 6),
    }
    if tuning is not None:
        notes = dec.notes
        if key_map:
            notes = [NoteTrack(key_map.get(n.key, n.key), n.channel, n.start, n.end, n.steps) for n in notes]
        out["worst_error_cents"] = round(worst_error(notes, tuning), 6)
    return out


class StreamWindow:
    """The most recent part of an output stream, for figures while it is being played.

    Keeps the last ``size`` messages with their times, and the channel state they start
    from (each channel's last pitch bend and the last MIDI Tuning Standard messages before
    the window), so :meth:`snapshot` decodes as the synth heard it. Appending is cheap
    (the daemon does it for every message it sends); decoding happens in :meth:`report`,
    which the daemon calls off its engine thread.
    """

    def __init__(self, size: int = 20000, sysex_kept: int = 64):
        from collections import deque
        self._msgs: "deque[tuple[float, mido.Message]]" = deque()
        self._size = size
        self._bends: dict[int, mido.Message] = {}
        self._sysex: "deque[mido.Message]" = deque(maxlen=sysex_kept)

    def add(self, t: float, msg: mido.Message) -> None:
        self._msgs.append((t, msg))
        if len(self._msgs) > self._size:
            _, old = self._msgs.popleft()
            if old.type == "pitchwheel":
                self._bends[old.channel] = old
            elif old.type == "sysex":
                self._sysex.append(old)

    def __len__(self) -> int:
        return len(self._msgs)

    def snapshot(self) -> list[tuple[float, mido.Message]]:
        """The window as a stream that starts from the right channel state."""
        msgs = list(self._msgs)
        t0 = msgs[0][0] if msgs else 0.0
        head = [(t0, m) for m in self._sysex] + [(t0, m) for _, m in sorted(self._bends.items())]
        return head + msgs

    def report(self, **kw) -> dict:
        """:func:`report` of the window (keyword arguments as there)."""
        return report(self.snapshot(), **kw)


def percentile(sorted_values: Sequence[float], q: float) -> float:
    """Nearest-rank percentile ``q`` (0..100) of already sorted values; 0 for none."""
    if not sorted_values:
        return 0.0
    i = max(0, min(len(sorted_values) - 1, int(math.ceil(q / 100.0 * len(sorted_values))) - 1))
    return sorted_values[i]


def added_latency(inputs: Sequence[tuple[float, int]], outputs: Sequence[tuple[float, int]],
                  within: float = 1.0) -> list[float]:
    """Per input note-on (seconds, key): how much later its note-on left, taken as the first
    unclaimed output note-on of the same key at or after it and within ``within`` seconds (a
    note released while it waited in a chord window never sounds: it is left out); sorted."""
    outs: dict[int, list[float]] = {}
    for t, k in sorted(outputs):
        outs.setdefault(k, []).append(t)
    taken: dict[int, int] = {}
    lat = []
    for t, k in sorted(inputs):
        ts = outs.get(k, [])
        i = taken.get(k, 0)
        while i < len(ts) and ts[i] < t - TIME_EPS:
            i += 1
        if i < len(ts) and ts[i] - t <= within:
            lat.append(max(0.0, ts[i] - t))
            taken[k] = i + 1
    return sorted(lat)
