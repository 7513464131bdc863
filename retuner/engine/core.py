"""The sans-I/O retuning engine: (time, MIDI message) in, MIDI messages out.

No ports, threads, clocks or files: time comes only from the arguments, so the
live daemon, file conversion and the tests drive the very same state machine
and get the very same output. Channels are 0-based here (mido's numbering);
users see 1..16.

Contract::

    engine = Engine(tuning, EngineConfig(...))
    out = engine.start(t)                 # setup messages
    out = engine.feed(t, msg)             # t: seconds, monotonic
    engine.next_deadline()                # float | None: call tick() then
    out = engine.tick(t)
    out = engine.set_tuning(tuning, t)    # sounding notes keep their pitch
    out = engine.set_adaptive(cfg, t)
    out = engine.release_all(t)           # panic / shutdown
    out = engine.input_lost(t)            # release what the lost input held
    engine.output_lost(t)                 # forget what sounded; start(t) again later
    engine.stats, engine.sounding()

Output modes
------------
``pool`` (default): each note goes to a channel of the pool bent to give it its
exact pitch (see :mod:`retuner.engine.allocator` for channel choice, sharing, ringing
and the steal policy; :mod:`retuner.midi.encode` for the bend formula).

* The bend range is announced on every pool channel with RPN 0 (then RPN null)
  at start and whenever it changes.
* A note plays from its own key when its offset from that key's 12-EDO pitch is
  within the bend range; otherwise from the **nearest key** to its target
  (``round(cents / 100)``, kept within 0..127), bent by the remainder. Only a
  target below key 0 or above key 127 by more than the range is clamped.
* The **player's wheel** is added to every channel's tuning bend: an input bend
  ``w`` (signed, -8192..8191) means ``w / 8192 * wheel_range`` cents, i.e.
  ``round(w * wheel_range / (bend_range * bend_scale))`` output steps, and the
  sum is **clamped** to 0..16383 (a note already bent far by its tuning can then
  not follow the wheel all the way). Wheel changes are sent to busy and
  ringing channels; an idle channel gets the right value when next used.
* Note-offs: each (input channel, key) keeps its presses first in, first out;
  a note-off (or a note-on with velocity 0) ends the oldest press, on the
  channel and key that press was sent on, whatever happened since (pedals,
  repeated presses, profile switches). A stolen press keeps its place, so its
  own note-off sends nothing; an all-notes-off or all-sound-off from the input
  forgets every press (the keyboard sends no note-offs for what it cleared).
  One key is never held twice on one channel.
* The pool is one instrument: the wheel and the pedals are those last sent on
  any retuned input channel, and channel mode messages (all-notes-off,
  all-sound-off, reset-all-controllers) from any retuned input channel act on
  the whole pool.
* Sustain (CC64) and sostenuto (CC66), channel pressure, program change and all
  other controllers go to every pool channel; polyphonic pressure to the note's
  channel; all-notes-off (CC123, and CC124-127), all-sound-off (CC120) and
  reset-all-controllers (CC121, after which the tuning bends are sent again)
  are honoured; omni/mono/poly mode messages (CC124-127) are not passed on (they
  would change how the pool channels play) but their all-notes-off effect is,
  as CC123. An input RPN 0 (pitch bend sensitivity) sets the assumed wheel
  range instead of reaching the pool (RPN 3, 4, 6 from the input are dropped).
* System exclusive, clock and other system messages pass through; channel
  messages on passthrough input channels (default channel 10) are untouched.
  After a system reset (0xFF) the sounding notes are forgotten and the setup
  (bend range, MPE configuration, MTS tuning) is sent again.
* Unmapped keys are dropped (logged once per key).
* A bend is sent only when a channel's bend value changes.
* Synth correction: ``bend_scale`` (a synth playing bends at 127/128 of their
  size gets bends 128/127 larger) and ``whole_semitone_range`` (for synths that
  ignore the cents part of RPN 0: the range is rounded to whole semitones and
  sent without CC38). To measure ``bend_scale``: play one key unbent and with
  the full upward bend at a known range, measure both pitches, and divide the
  measured interval by the specified one.

``mpe``: MPE (MIDI Polyphonic Expression specification, The MIDI Association,
2018). Lower zone by default (manager channel 1, member channels 2..N+1), upper
zone (manager 16, members 15 downwards) selectable. At start the MPE
Configuration Message (RPN 6 on the manager, data entry MSB = member count), RPN
0 on the members (48 semitones by default) and on the manager (2). Each note
gets a member channel of its own (pool rules, never shared) with its tuning
bend; polyphonic pressure becomes channel pressure on that member; sustain,
sostenuto, the player's wheel, channel pressure, program change and other
controllers go to the manager channel.

``mts``: MIDI Tuning Standard. Notes stay on their input channels (a key
struck again while still held on its channel is ended first); the synth's
key table is tuned with single note tuning changes (see :mod:`retuner.midi.mts`):
all 128 keys at start, then, before any note-on whose key is not tuned to its
target (after a profile switch while the key sounded, or in adaptive mode), one
message for all the keys of that chord. At start every non-passthrough channel
selects the tuning with RPN 4 (tuning bank select; bank 0 when no bank is set)
and RPN 3 (tuning program change).

Adaptive mode
-------------
With ``EngineConfig.adaptive`` set (an ``AdaptiveConfig`` of
:mod:`retuner.adaptive.solver`), note-ons are gathered for ``chord_window`` seconds
from the first note-on of a group, then solved together:
``AdaptiveSolver.solve(held=[(key, cents), ...], new=[key, ...])`` returns the
pitches of the held notes (they may move) and of the new ones. Moved held notes
get new bends (each adaptive note has a channel of its own), then the new notes
sound. Before each solve the solver is told which of its notes have ended
(``solver.release(keys)``; it applies its own policy for silences), or, for a
solver without ``release``, ``solver.reset()`` is called when nothing sounds. A
note-off for a note still waiting in the window cancels it: nothing is sent.

Note-offs and pedal changes (sustain, sostenuto) of the notes that sound are
delayed by the same ``chord_window``: the new chord is delayed by up to the
window, so the old one ends that much later too. Legato stays legato (no
moment where a held common tone sounds alone between two chords that were
played one into the other), pedalling keeps its order relative to the keys,
and each note keeps its played length. Delayed events are applied in the order
they arrived, each at its time plus the window; when a window closes at the
same moment, they come first.
"""

from __future__ import annotations

import dataclasses
import logging
import math
from collections import deque
from dataclasses import dataclass
from typing import Any, Optional, Sequence

import mido

from retuner.midi import encode as E
from retuner.engine.allocator import NEG_INF, RINGING, STEAL, Note, Pool
from retuner.errors import RetunerError
from retuner.pitch.tuning import Tuning

log = logging.getLogger(__name__)

MODES = ("pool", "mpe", "mts")
DEFAULT_POOL = tuple(c for c in range(16) if c != 9)
_MANAGED_RPNS = {E.RPN_PITCH_BEND_SENSITIVITY, E.RPN_TUNING_PROGRAM, E.RPN_TUNING_BANK,
                 E.RPN_MPE_CONFIGURATION}
_DATA_CCS = (E.CC_DATA_ENTRY_MSB, E.CC_DATA_ENTRY_LSB, E.CC_DATA_INCREMENT, E.CC_DATA_DECREMENT)
_NOTES_OFF_CCS = (E.CC_ALL_NOTES_OFF,) + E.CC_MODE_NOTES_OFF
_PEDAL_CCS = (E.CC_SUSTAIN, E.CC_SOSTENUTO)


@dataclass
class EngineConfig:
    """Every engine setting with its default. Channels are 0-based."""

    mode: str = "pool"                       # pool | mpe | mts
    # bend pool
    pool: tuple[int, ...] = DEFAULT_POOL     # output channels (default: all but channel 10)
    passthrough: tuple[int, ...] = (9,)      # input channels passed through untouched
    bend_range: float = 2.0                  # semitones, announced with RPN 0
    wheel_range: float = 2.0                 # semitones the player's wheel is assumed to span
    release_time: float = 2.0                # seconds a channel rings after its last note
    bend_scale: float = 1.0                  # synth correction: played / specified bend size
    whole_semitone_range: bool = False       # synth ignores CC38: whole semitones only
    share_channels: bool = True              # static tunings: notes with the same bend share
    # MPE
    mpe_zone: str = "lower"                  # lower (manager channel 1) | upper (manager 16)
    mpe_members: Optional[int] = None        # member channels in the zone; None: up to the first passthrough channel
    mpe_member_range: float = 48.0           # semitones
    mpe_manager_range: float = 2.0           # semitones
    # MIDI Tuning Standard
    mts_device: int = 0x7F
    mts_program: int = 0
    mts_bank: Optional[int] = None           # None: single note change without bank
    mts_realtime: bool = True
    # adaptive mode (an AdaptiveConfig of retuner.adaptive.solver, or None)
    adaptive: Any = None

    def __post_init__(self) -> None:
        # lists (from YAML or JSON) become tuples, so equal settings compare equal
        for name in ("pool", "passthrough"):
            v = getattr(self, name)
            if isinstance(v, (list, set, frozenset, range)):
                setattr(self, name, tuple(sorted(v)) if isinstance(v, (set, frozenset)) else tuple(v))

    def validate(self) -> "EngineConfig":
        def bad(msg: str, fld: str) -> RetunerError:
            return RetunerError(msg, field=fld)

        if self.mode not in MODES:
            raise bad(f"unknown mode {self.mode!r} (one of {', '.join(MODES)})", "mode")
        for name in ("pool", "passthrough"):
            chans = getattr(self, name)
            for c in chans:
                if not isinstance(c, int) or not 0 <= c <= 15:
                    raise bad(f"channel {c!r} is not a MIDI channel", name)
            if len(set(chans)) != len(chans):
                raise bad("a channel is listed twice", name)
        if self.mode == "pool":
            if not self.pool:
                raise bad("the pool needs at least one channel", "pool")
            both = set(self.pool) & set(self.passthrough)
            if both:
                raise bad(f"channel {min(both) + 1} is both in the pool and passed through", "pool")
        if not (0 < self.bend_range <= 127):
            raise bad("the pitch bend range must be above 0 and at most 127 semitones", "bend_range")
        if self.whole_semitone_range and round(self.bend_range) < 1:
            raise bad("a whole-semitone bend range must be at least 1 semitone", "bend_range")
        if not (0 <= self.wheel_range <= 127):
            raise bad("the wheel range must be 0..127 semitones", "wheel_range")
        if not (self.release_time >= 0 and math.isfinite(self.release_time)):
            raise bad("the release time must be 0 or more seconds", "release_time")
        if not (0.5 <= self.bend_scale <= 2.0):
            raise bad("the bend scale must be between 0.5 and 2", "bend_scale")
        if self.mpe_zone not in ("lower", "upper"):
            raise bad("the MPE zone is 'lower' or 'upper'", "mpe_zone")
        if self.mpe_members is not None and (isinstance(self.mpe_members, bool) or not isinstance(self.mpe_members, int)
                                             or not 1 <= self.mpe_members <= 15):
            raise bad("an MPE zone has 1..15 member channels", "mpe_members")
        if not (0 < self.mpe_member_range <= 127):
            raise bad("the MPE member bend range must be 1..127 semitones", "mpe_member_range")
        if not (0 < self.mpe_manager_range <= 127):
            raise bad("the MPE manager bend range must be 1..127 semitones", "mpe_manager_range")
        if self.mode == "mpe" and not [c for c in self.mpe_member_channels() if c not in self.passthrough]:
            raise bad("no MPE member channel is left after the passthrough channels", "mpe_members")
        for name in ("mts_device", "mts_program"):
            v = getattr(self, name)
            if not isinstance(v, int) or not 0 <= v <= 127:
                raise bad("must be 0..127", name)
        if self.mts_bank is not None and (not isinstance(self.mts_bank, int) or not 0 <= self.mts_bank <= 127):
            raise bad("must be 0..127 or empty", "mts_bank")
        return self

    # derived ------------------------------------------------------------------
    def mpe_manager(self) -> int:
        return 0 if self.mpe_zone == "lower" else 15

    def mpe_member_count(self) -> int:
        """The zone's member count: as set, or by default every channel from the
        manager's neighbour up to (not including) the first passthrough channel, so
        drums on channel 10 stay outside the zone: lower zone 2..9 (8 members),
        upper zone 15..11 (5 members); 15 with no passthrough channel."""
        if self.mpe_members is not None:
            return self.mpe_members
        order = range(1, 16) if self.mpe_zone == "lower" else range(14, -1, -1)
        n = 0
        for c in order:
            if c in self.passthrough:
                break
            n += 1
        return max(n, 1)

    def mpe_member_channels(self) -> list[int]:
        n = self.mpe_member_count()
        if self.mpe_zone == "lower":
            return list(range(1, 1 + n))
        return list(range(14, 14 - n, -1))

    def replace(self, **kw) -> "EngineConfig":
        return dataclasses.replace(self, **kw)


def _finite(x: Any) -> bool:
    try:
        return math.isfinite(x)
    except TypeError:
        return False


class Engine:
    """The retuning state machine (see the module docstring)."""

    def __init__(self, tuning: Tuning, config: Optional[EngineConfig] = None):
        self.config = (config or EngineConfig()).validate()
        self.tuning = tuning
        self.stats: dict[str, int] = {
            "notes": 0, "note_ons_out": 0, "steals": 0, "ringing_retunes": 0,
            "bends_sent": 0, "messages_out": 0, "note_on_messages": 0,
            "dropped_unmapped": 0, "chords_solved": 0,
        }
        self._warned_keys: set[int] = set()
        self._solver = None
        self._build()

    # ------------------------------------------------------------------ setup
    def _build(self) -> None:
        cfg = self.config
        self.mode = cfg.mode
        self._pass = frozenset(cfg.passthrough)
        if self.mode == "pool":
            self._range = self._effective_range(cfg.bend_range)
            chans = list(cfg.pool)
        elif self.mode == "mpe":
            self._range = self._effective_range(cfg.mpe_member_range)
            self._manager = cfg.mpe_manager()
            self._members = cfg.mpe_member_channels()
            chans = [c for c in self._members if c not in self._pass]
        else:
            self._range = self._effective_range(cfg.bend_range)
            chans = list(range(16))
        self._scale = cfg.bend_scale
        self.pool = Pool(chans, cfg.release_time)
        self._out_channels = chans          # where zone-wide messages go (pool mode)
        self._sent: dict[int, Optional[int]] = {c: None for c in range(16)}
        self._fifo: dict[tuple[int, int], deque] = {}
        self._pending: list[Note] = []
        # adaptive mode: note-offs and pedal changes, delayed by the chord window
        self._deferred: deque[tuple[float, int, Any, mido.Message]] = deque()   # (due, channel, note, msg)
        self._now_applying = False
        self._deadline: Optional[float] = None
        self._sustain: dict[int, bool] = {}
        self._sostenuto: dict[int, bool] = {}
        self._wheel: dict[int, int] = {}
        self._wheel_range = cfg.wheel_range * 100.0
        self._rpn_sel: dict[int, Any] = {}
        self._mts_enc: list[Optional[tuple[int, int, int]]] = [None] * 128
        self._share = cfg.share_channels and cfg.mode == "pool"
        self._wheel_units = 0
        self._plan_tuning()
        if cfg.adaptive is not None:
            self._make_solver(cfg.adaptive)

    def _effective_range(self, semitones: float) -> float:
        if self.config.whole_semitone_range:
            return float(round(semitones)) * 100.0
        semis, cents = E.split_range(semitones * 100.0)
        return semis * 100.0 + cents

    def _plan_tuning(self) -> None:
        """Per key: (output key, tuning bend, cents) or None when unmapped."""
        self._plan: list[Optional[tuple[int, int, float]]] = []
        for k in range(128):
            c = self.tuning.cents[k]
            if c is None:
                self._plan.append(None)
            else:
                ok, b = self._place(c, k)
                self._plan.append((ok, b, c))
        self._warned_keys = set()

    def _place(self, cents: float, key: int) -> tuple[int, int]:
        """Output key and tuning bend for a pitch asked for by ``key`` (nearest-key rule)."""
        rng, sc = self._range, self._scale
        off = cents - 100.0 * key
        if E.reachable(off, rng, sc):
            return key, E.bend_value(off, rng, sc)
        k = min(127, max(0, int(round(cents / 100.0))))
        return k, E.bend_value(cents - 100.0 * k, rng, sc)

    def _make_solver(self, acfg: Any) -> None:
        from retuner.adaptive.solver import AdaptiveSolver  # adaptive mode only
        self._solver = AdaptiveSolver(acfg, self.tuning)
        self._solver_keys: set[int] = set()
        self._window = float(getattr(acfg, "chord_window", 0.0) or 0.0)

    @property
    def adaptive(self) -> bool:
        return self._solver is not None

    # ------------------------------------------------------------------ start
    def start(self, t: float) -> list[mido.Message]:
        """Setup messages: bend range (RPN 0), MPE configuration, MTS tuning."""
        cfg = self.config
        out: list[mido.Message] = []
        if self.mode == "pool":
            for c in self.pool.channels:
                out += E.bend_range_rpn(c, self._range, cfg.whole_semitone_range)
            for c in self.pool.channels:
                self.pool.bend[c] = E.BEND_CENTRE
                self._sent[c] = None
                self._send_bend(c, out, force=True)
        elif self.mode == "mpe":
            out += E.mpe_configuration(self._manager, len(self._members))
            for c in self._members:
                out += E.bend_range_rpn(c, self._range, cfg.whole_semitone_range)
            out += E.bend_range_rpn(self._manager, self._effective_range(cfg.mpe_manager_range),
                                    cfg.whole_semitone_range)
            for c in self.pool.channels:
                self.pool.bend[c] = E.BEND_CENTRE
                self._sent[c] = None
                self._send_bend(c, out, force=True)
            self._sent[self._manager] = None
            self._send_manager_wheel(out)
        else:
            for c in range(16):
                if c in self._pass:
                    continue
                out += E.rpn(c, E.RPN_TUNING_BANK, cfg.mts_bank or 0)
                out += E.rpn(c, E.RPN_TUNING_PROGRAM, cfg.mts_program)
            self._mts_enc = [None] * 128
            out += self._mts_changes([(k, self.tuning.cents[k]) for k in range(128)
                                      if self.tuning.cents[k] is not None])
        # pedals the input still holds (after a reconnect)
        for dom, down in self._sustain.items():
            if down:
                out += self._zone(dom, E.control_change(0, E.CC_SUSTAIN, 127))
        self.stats["messages_out"] += len(out)
        return out

    # ------------------------------------------------------------------ feed
    def feed(self, t: float, msg: mido.Message) -> list[mido.Message]:
        """Messages to send for input ``msg`` arriving at ``t`` (seconds). A chord
        window that closed before ``t`` is flushed first, as of its deadline."""
        out: list[mido.Message] = []
        self._run_timers(t, out)
        typ = msg.type
        ch = getattr(msg, "channel", None)
        if ch is None or ch in self._pass:
            out.append(msg)
            if typ == "reset":
                # a system reset clears the synth: what sounded is gone, set it up again
                self.output_lost(t)
                setup = self.start(t)
                self.stats["messages_out"] -= len(setup)   # counted below with the rest
                out += setup
        elif typ == "note_on":
            if msg.velocity:
                self._note_on(t, ch, msg.note, msg.velocity, out)
            else:
                self._note_off(t, ch, msg.note, msg, out)
        elif typ == "note_off":
            self._note_off(t, ch, msg.note, msg, out)
        elif typ == "control_change":
            self._control(t, ch, msg, out)
        elif typ == "pitchwheel":
            self._wheel_in(t, ch, msg, out)
        elif typ == "polytouch":
            self._poly(ch, msg, out)
        else:  # aftertouch, program_change
            if self.mode == "mts":
                out.append(msg)
            else:
                out += self._zone(0, msg)
        self.stats["messages_out"] += len(out)
        return out

    def next_deadline(self) -> Optional[float]:
        d = self._deadline
        if self._deferred:
            due = self._deferred[0][0]
            if d is None or due < d:
                d = due
        return d

    def tick(self, t: float) -> list[mido.Message]:
        """Timers: flush the chord window once ``t`` reached its deadline and
        apply delayed note-offs and pedal changes that are due. Each is applied as
        of its own time, so a late tick changes nothing but the moment the
        messages leave."""
        out: list[mido.Message] = []
        self._run_timers(t, out)
        self.stats["messages_out"] += len(out)
        return out

    def _run_timers(self, t: float, out: list) -> None:
        """Everything due by ``t``, in time order; delayed events before a window
        that closes at the same moment."""
        while True:
            due = self._deferred[0][0] if self._deferred else None
            win = self._deadline
            if due is not None and due <= t and (win is None or due <= win):
                self._apply_one_deferred(out)
            elif win is not None and win <= t:
                self._flush(win, out)
            else:
                return

    def _apply_one_deferred(self, out: list) -> None:
        due, ch, note, msg = self._deferred.popleft()
        if note is None:
            self._now_applying = True
            try:
                self._control(due, ch, msg, out)
            finally:
                self._now_applying = False
        else:
            self._release(due, note, msg, out)

    def _apply_deferred(self, out: list) -> None:
        """Apply every delayed event now (adaptive mode ends, the input is lost)."""
        while self._deferred:
            self._apply_one_deferred(out)

    @property
    def _delaying(self) -> bool:
        return self._solver is not None and self._window > 0

    # ------------------------------------------------------------------ helpers
    def _dom(self, ch: int) -> int:
        return ch if self.mode == "mts" else 0

    def _zone(self, dom: int, msg: mido.Message) -> list[mido.Message]:
        """A zone-wide message on the channels that carry it for pedal domain ``dom``."""
        if self.mode == "pool":
            return E.on_channels(msg, self._out_channels)
        if self.mode == "mpe":
            return [E.with_channel(msg, self._manager)]
        return [E.with_channel(msg, dom)]

    def _all_channels(self) -> list[int]:
        if self.mode == "pool":
            return list(self.pool.channels)
        if self.mode == "mpe":
            return [self._manager] + list(self._members)
        return [c for c in range(16) if c not in self._pass]

    def _send_bend(self, c: int, out: list, force: bool = False) -> None:
        v = self.pool.bend[c] + self._wheel_units
        if v < 0:
            v = 0
        elif v > 16383:
            v = 16383
        if force or self._sent[c] != v:
            self._sent[c] = v
            out.append(E.pitchwheel(c, v))
            self.stats["bends_sent"] += 1

    def _send_manager_wheel(self, out: list) -> None:
        w = self._wheel.get(0, 0)
        rng = self._effective_range(self.config.mpe_manager_range)
        v = E.BEND_CENTRE + round(w * self._wheel_range / (rng * self._scale))
        v = min(E.BEND_MAX, max(E.BEND_MIN, v))
        m = self._manager
        if self._sent[m] != v:
            self._sent[m] = v
            out.append(E.pitchwheel(m, v))
            self.stats["bends_sent"] += 1

    def _update_wheel_units(self) -> None:
        if self.mode == "pool":
            w = self._wheel.get(0, 0)
            self._wheel_units = round(w * self._wheel_range / (self._range * self._scale))
        else:
            self._wheel_units = 0

    # ------------------------------------------------------------------ notes
    def _note_on(self, t: float, ch: int, key: int, vel: int, out: list) -> None:
        plan = self._plan[key]
        if plan is None:
            self.stats["dropped_unmapped"] += 1
            if key not in self._warned_keys:
                self._warned_keys.add(key)
                log.warning("key %d is unmapped in tuning %s: its notes are dropped", key, self.tuning.id)
            return
        self.stats["notes"] += 1
        note = Note(ch, key, vel, t, ch if self.mode == "mts" else 0)
        q = self._fifo.get((ch, key))
        if q is None:
            q = self._fifo[(ch, key)] = deque()
        q.append(note)
        if self._solver is not None:
            note.pending = True
            self._pending.append(note)
            if self._deadline is None:
                self._deadline = t + self._window
            if self._window <= 0:
                self._flush(t, out)
            return
        note.out_key, note.bend, note.cents = plan
        n0 = len(out)
        if self.mode == "mts":
            self._mts_note_on(t, [note], [], out)
        else:
            self._place_note(note, t, out, self._share)
        self.stats["note_on_messages"] += len(out) - n0

    def _place_note(self, note: Note, t: float, out: list, share: bool) -> None:
        pool = self.pool
        c, kind = pool.choose(note.bend, note.out_key, t, share)
        if kind is STEAL:
            self._steal(c, t, out)
        elif kind is RINGING:
            self.stats["ringing_retunes"] += 1
        pool.bend[c] = note.bend
        self._send_bend(c, out)
        note.out_ch = c
        pool.add(c, note, t)
        out.append(E.note_on(c, note.out_key, note.velocity))
        self.stats["note_ons_out"] += 1

    def _steal(self, c: int, t: float, out: list) -> None:
        """Silence every note on channel ``c``: note-offs first; pedalled notes
        are let go by lifting the pedal on this channel alone (and pressing it
        again, for notes to come, when the pedal is still down)."""
        pool = self.pool
        ns = pool.notes[c]
        sus = sost = False
        for n in ns:
            if n.down:
                out.append(E.note_off(c, n.out_key, 0))
                # it stays in its FIFO (dead): the player's note-off for it will come
                # and must not be taken for a later press of the same key
            # a pedal down would keep the note sounding after its note-off
            if self._sustain.get(n.dom):
                sus = True
            if n.sost and self._sostenuto.get(n.dom):
                sost = True
            n.alive = False
            self.stats["steals"] += 1
        if self.mode == "mpe" and (sus or sost):
            # the zone's pedals live on the manager channel: silence this member alone
            out.append(E.control_change(c, E.CC_ALL_SOUND_OFF, 0))
            sus = sost = False
        if sus:
            out.append(E.control_change(c, E.CC_SUSTAIN, 0))
        if sost:
            out.append(E.control_change(c, E.CC_SOSTENUTO, 0))
        if sus:
            out.append(E.control_change(c, E.CC_SUSTAIN, 127))
        if sost:
            out.append(E.control_change(c, E.CC_SOSTENUTO, 127))
        pool.notes[c] = []
        pool.last_off[c] = t

    def _forget_fifo(self, n: Note) -> None:
        q = self._fifo.get((n.in_ch, n.in_key))
        if q is not None:
            try:
                q.remove(n)
            except ValueError:
                pass
            if not q:
                del self._fifo[(n.in_ch, n.in_key)]

    def _note_off(self, t: float, ch: int, key: int, msg: mido.Message, out: list) -> None:
        q = self._fifo.get((ch, key))
        if not q:
            return
        note = q.popleft()
        if not q:
            del self._fifo[(ch, key)]
        if self._delaying and not note.pending and note.alive:
            self._deferred.append((t + self._window, ch, note, msg))
            return
        self._release(t, note, msg, out)

    def _release(self, t: float, note: Note, msg: Optional[mido.Message], out: list) -> None:
        """The player let go of ``note`` (already taken out of its FIFO)."""
        if note.pending:
            note.pending = False
            note.alive = False
            self._pending.remove(note)
            if not self._pending:
                self._deadline = None
            return
        if not note.alive:
            return
        note.down = False
        note.t_off = t
        if msg is None:
            msg = E.note_off(note.in_ch, note.in_key, 0)
        if self.mode == "mts":
            out.append(msg)
        else:
            m = E.with_channel(msg, note.out_ch)
            vars(m)["note"] = note.out_key
            out.append(m)
        dom = note.dom
        if self._sustain.get(dom) or (note.sost and self._sostenuto.get(dom)):
            return
        note.alive = False
        self.pool.remove(note, t)

    def _end_pedalled(self, t: float, dom: int) -> None:
        """The pedals of ``dom`` changed: notes no longer held stop sounding."""
        sus = self._sustain.get(dom, False)
        sost = self._sostenuto.get(dom, False)
        for c in self.pool.channels:
            ns = self.pool.notes[c]
            if not ns:
                continue
            for n in list(ns):
                if n.dom != dom or n.down:
                    continue
                if sus or (n.sost and sost):
                    continue
                n.alive = False
                self.pool.remove(n, t)

    def _sounding_notes(self) -> list[Note]:
        out: list[Note] = []
        for c in self.pool.channels:
            out.extend(self.pool.notes[c])
        return out

    # ------------------------------------------------------------------ controls
    def _control(self, t: float, ch: int, msg: mido.Message, out: list) -> None:
        cc = msg.control
        dom = self._dom(ch)
        if self.mode != "mts":
            sel_consumed = self._input_rpn(ch, cc, msg.value)
            if sel_consumed:
                return
        if cc in _PEDAL_CCS and self._delaying and not self._now_applying:
            self._deferred.append((t + self._window, ch, None, msg))
            return
        if cc == E.CC_SUSTAIN:
            down = msg.value >= E.PEDAL_ON
            out += self._zone(dom, msg) if self.mode != "mts" else [msg]
            was = self._sustain.get(dom, False)
            self._sustain[dom] = down
            if was and not down:
                self._end_pedalled(t, dom)
        elif cc == E.CC_SOSTENUTO:
            down = msg.value >= E.PEDAL_ON
            out += self._zone(dom, msg) if self.mode != "mts" else [msg]
            was = self._sostenuto.get(dom, False)
            self._sostenuto[dom] = down
            if down and not was:
                for n in self._sounding_notes():
                    if n.dom == dom and n.down:
                        n.sost = True
            elif was and not down:
                self._end_pedalled(t, dom)
                for n in self._sounding_notes():
                    if n.dom == dom:
                        n.sost = False
        elif cc == E.CC_ALL_SOUND_OFF:
            out += self._mode_targets(dom, msg)
            self._silence(t, dom, True, out)
        elif cc in _NOTES_OFF_CCS:
            if cc != E.CC_ALL_NOTES_OFF and self.mode != "mts":
                # omni/mono/poly mode changes would break the output channels: only their
                # all-notes-off effect (MIDI 1.0) reaches the synth, as CC123
                msg = E.control_change(ch, E.CC_ALL_NOTES_OFF, 0)
            out += self._mode_targets(dom, msg)
            self._silence(t, dom, False, out)
        elif cc == E.CC_RESET_ALL_CONTROLLERS:
            out += self._mode_targets(dom, msg)
            self._rpn_sel.pop(ch, None)
            self._sustain[dom] = False
            self._sostenuto[dom] = False
            self._end_pedalled(t, dom)
            for n in self._sounding_notes():
                if n.dom == dom:
                    n.sost = False
            self._wheel[dom] = 0
            if self.mode == "pool":
                self._update_wheel_units()
                for c in self.pool.channels:
                    self._sent[c] = E.BEND_CENTRE
                for c in self.pool.channels:
                    if self.pool.notes[c] or self.pool.is_ringing(c, t):
                        self._send_bend(c, out)
            elif self.mode == "mpe":
                self._sent[self._manager] = E.BEND_CENTRE
                for c in self._members:
                    self._sent[c] = E.BEND_CENTRE
                for c in self.pool.channels:
                    if self.pool.notes[c] or self.pool.is_ringing(c, t):
                        self._send_bend(c, out)
        else:
            out += self._zone(dom, msg) if self.mode != "mts" else [msg]

    def _mode_targets(self, dom: int, msg: mido.Message) -> list:
        """Channel mode messages reach every output channel of the domain."""
        if self.mode == "mts":
            return [msg]
        return E.on_channels(msg, self._all_channels())

    def _silence(self, t: float, dom: int, hard: bool, out: list) -> None:
        """All-sound-off (hard) or all-notes-off for pedal domain ``dom``."""
        for n in list(self._pending):
            if n.dom == dom:
                n.alive = False
                n.pending = False
                self._pending.remove(n)
                self._forget_fifo(n)
        if not self._pending:
            self._deadline = None
        self._deferred = deque(d for d in self._deferred if d[2] is None or d[2].dom != dom)
        for c in self.pool.channels:
            ns = self.pool.notes[c]
            for n in list(ns):
                if n.dom != dom:
                    continue
                if n.down:
                    n.down = False
                    n.t_off = t
                    self._forget_fifo(n)
                if hard or not (self._sustain.get(dom) or (n.sost and self._sostenuto.get(dom))):
                    n.alive = False
                    self.pool.remove(n, t)
                    if hard and not self.pool.notes[c]:
                        self.pool.last_off[c] = NEG_INF
        # the player's keyboard sends no note-offs for what it cleared: forget every
        # press of this domain (stolen ones too), so no later note-off is mispaired
        if self.mode == "mts":
            for k in [k for k in self._fifo if k[0] == dom]:
                del self._fifo[k]
        else:
            self._fifo.clear()

    def _input_rpn(self, ch: int, cc: int, value: int) -> bool:
        """Track the input's RPN selection; consume data entry for the RPNs the
        engine manages (RPN 0 sets the assumed wheel range). True if consumed."""
        if cc == E.CC_RPN_MSB:
            sel = self._rpn_sel.get(ch)
            lsb = sel[1] if isinstance(sel, tuple) else 127
            self._rpn_sel[ch] = (value, lsb)
        elif cc == E.CC_RPN_LSB:
            sel = self._rpn_sel.get(ch)
            msb = sel[0] if isinstance(sel, tuple) else 127
            self._rpn_sel[ch] = (msb, value)
        elif cc in (E.CC_NRPN_MSB, E.CC_NRPN_LSB):
            self._rpn_sel[ch] = "nrpn"
        elif cc in _DATA_CCS:
            sel = self._rpn_sel.get(ch)
            if sel in _MANAGED_RPNS:
                if sel == E.RPN_PITCH_BEND_SENSITIVITY:
                    semis, cents = divmod(int(round(self._wheel_range)), 100)
                    if cc == E.CC_DATA_ENTRY_MSB:
                        semis = value
                    elif cc == E.CC_DATA_ENTRY_LSB:
                        cents = min(value, 99)
                    self._wheel_range = semis * 100.0 + cents
                    self._update_wheel_units()
                return True
        return False

    def _wheel_in(self, t: float, ch: int, msg: mido.Message, out: list) -> None:
        if self.mode == "mts":
            self._wheel[ch] = msg.pitch
            out.append(msg)
            return
        self._wheel[0] = msg.pitch
        if self.mode == "mpe":
            self._send_manager_wheel(out)
            return
        old = self._wheel_units
        self._update_wheel_units()
        units = self._wheel_units
        if units == old:
            return
        pool = self.pool
        notes, last_off, bend, sent = pool.notes, pool.last_off, pool.bend, self._sent
        rel = pool.release_time
        n = 0
        for c in pool.channels:
            if notes[c] or t - last_off[c] < rel:
                v = bend[c] + units
                if v < 0:
                    v = 0
                elif v > 16383:
                    v = 16383
                if sent[c] != v:
                    sent[c] = v
                    out.append(E.pitchwheel(c, v))
                    n += 1
        self.stats["bends_sent"] += n

    def _poly(self, ch: int, msg: mido.Message, out: list) -> None:
        if self.mode == "mts":
            out.append(msg)
            return
        q = self._fifo.get((ch, msg.note))
        if not q:
            return
        for n in reversed(q):
            if n.alive and not n.pending:
                if self.mode == "mpe":
                    out.append(E.msg("aftertouch", channel=n.out_ch, value=msg.value))
                else:
                    out.append(E.msg("polytouch", channel=n.out_ch, note=n.out_key, value=msg.value))
                return

    # ------------------------------------------------------------------ MTS
    def _mts_changes(self, changes: Sequence[tuple[int, float]]) -> list[mido.Message]:
        from retuner.midi import mts
        todo = []
        for k, c in changes:
            enc = mts.encode_frequency(c)
            if self._mts_enc[k] != enc:
                self._mts_enc[k] = enc
                todo.append((k, c))
        if not todo:
            return []
        cfg = self.config
        return mts.single_note_tuning_change(todo, device=cfg.mts_device, program=cfg.mts_program,
                                             bank=cfg.mts_bank, realtime=cfg.mts_realtime)

    def _mts_note_on(self, t: float, notes: list[Note], moved: list[tuple[int, float]], out: list) -> None:
        out += self._mts_changes(list(moved) + [(n.in_key, n.cents) for n in notes])
        for n in notes:
            n.out_ch = n.in_ch
            n.out_key = n.in_key
            # a key pressed again while still down on this channel (merged inputs): end the
            # first press before striking again, so each note-off stops exactly one note;
            # the first press stays in its FIFO, dead, to take the first note-off
            for old in list(self.pool.notes[n.in_ch]):
                if old.down and old.out_key == n.out_key:
                    out.append(E.note_off(n.in_ch, n.out_key, 0))
                    old.alive = False
                    self.pool.remove(old, t)
            self.pool.add(n.in_ch, n, t)
            out.append(E.note_on(n.in_ch, n.in_key, n.velocity))
            self.stats["note_ons_out"] += 1

    # ------------------------------------------------------------------ adaptive
    def _flush(self, t: float, out: list) -> None:
        """Close the chord window: solve the gathered notes and sound them."""
        pend = [n for n in self._pending if n.alive]
        self._pending = []
        self._deadline = None
        if not pend:
            return
        for n in pend:
            n.pending = False
        solver = self._solver
        if solver is None:  # adaptive mode switched off meanwhile: static pitches
            n0 = len(out)
            for n in pend:
                n.out_key, n.bend, n.cents = self._plan[n.in_key]
                if self.mode == "mts":
                    self._mts_note_on(t, [n], [], out)
                else:
                    self._place_note(n, t, out, self._share)
            self.stats["note_on_messages"] += len(out) - n0
            return
        n0 = len(out)
        held = self._sounding_notes()
        held_keys = {n.in_key for n in held}
        ended = [k for k in self._solver_keys if k not in held_keys]
        if hasattr(solver, "release"):
            if ended:
                solver.release(ended)   # the solver applies its silence policy itself
        elif not held:
            solver.reset()
        self._solver_keys = held_keys | {n.in_key for n in pend}
        try:
            held_new, new_cents = solver.solve(held=[(n.in_key, n.cents) for n in held],
                                               new=[n.in_key for n in pend])
            held_new, new_cents = list(held_new), list(new_cents)
        except Exception:  # the engine must never die on a solver failure
            log.exception("adaptive solver failed: the chord keeps static pitches")
            held_new, new_cents = [], []
        # robust against short or non-finite answers: held notes stay, new notes get the profile
        if len(held_new) != len(held):
            held_new = [n.cents for n in held]
        held_new = [c if _finite(c) else n.cents for n, c in zip(held, held_new)]
        if len(new_cents) != len(pend):
            # an answer that does not match the notes one to one cannot be matched by
            # position: every new note takes its profile pitch instead
            new_cents = [self._plan[n.in_key][2] for n in pend]
        new_cents = [c if _finite(c) else self._plan[n.in_key][2] for n, c in zip(pend, new_cents)]
        self.stats["chords_solved"] += 1
        if self.mode == "mts":
            moved = []
            for n, c in zip(held, held_new):
                if c != n.cents:
                    n.cents = float(c)
                    moved.append((n.in_key, n.cents))
            for n, c in zip(pend, new_cents):
                n.cents = float(c)
            self._mts_note_on(t, pend, moved, out)
        else:
            pool = self.pool
            for n, c in zip(held, held_new):
                c = float(c)
                if c == n.cents:
                    continue
                if len(pool.notes[n.out_ch]) > 1:
                    continue  # shared channel (from static mode): cannot move one note alone
                n.cents = c
                b = E.bend_value(c - 100.0 * n.out_key, self._range, self._scale)
                if b != n.bend:
                    n.bend = b
                    pool.bend[n.out_ch] = b
                    self._send_bend(n.out_ch, out)
            for n, c in zip(pend, new_cents):
                n.cents = float(c)
                n.out_key, n.bend = self._place(n.cents, n.in_key)
                self._place_note(n, t, out, False)
        self.stats["note_on_messages"] += len(out) - n0

    # ------------------------------------------------------------------ switching
    def set_tuning(self, tuning: Tuning, t: float) -> list[mido.Message]:
        """Switch profile: sounding notes keep their pitch, new notes use ``tuning``."""
        out: list[mido.Message] = []
        self.tuning = tuning
        self._plan_tuning()
        if self._solver is not None:
            self._make_solver(self.config.adaptive)
        if self.mode == "mts":
            busy = {n.in_key for n in self._sounding_notes()}
            out += self._mts_changes([(k, tuning.cents[k]) for k in range(128)
                                      if tuning.cents[k] is not None and k not in busy])
        self.stats["messages_out"] += len(out)
        return out

    def set_adaptive(self, cfg: Any, t: float) -> list[mido.Message]:
        """Turn adaptive mode on (``cfg`` an AdaptiveConfig), change it, or off (None).
        Notes waiting in the chord window are sounded first."""
        out: list[mido.Message] = []
        self._apply_deferred(out)
        if self._pending:
            self._flush(t, out)
        self._apply_deferred(out)
        self.config = dataclasses.replace(self.config, adaptive=cfg)
        if cfg is None:
            self._solver = None
        else:
            self._make_solver(cfg)
        self.stats["messages_out"] += len(out)
        return out

    def reconfigure(self, config: EngineConfig, t: float) -> list[mido.Message]:
        """Apply new settings. A changed bend range is announced again and the
        sounding notes keep their pitch; a changed mode or channel layout
        releases everything and starts again."""
        config.validate()
        old = self.config
        if config == old:
            return []
        light = ("bend_range", "wheel_range", "release_time", "bend_scale", "whole_semitone_range",
                 "share_channels", "adaptive", "mpe_member_range", "mpe_manager_range")
        same_layout = all(getattr(config, f.name) == getattr(old, f.name)
                          for f in dataclasses.fields(EngineConfig) if f.name not in light)
        out: list[mido.Message] = []
        if not same_layout or self.mode == "mts":
            out += self.release_all(t)
            self.config = config
            self._solver = None
            self._build()
            out += self.start(t)
            return out
        if config.adaptive is not old.adaptive:
            out += self.set_adaptive(config.adaptive, t)
        self.config = config
        self.pool.release_time = config.release_time
        self._scale = config.bend_scale
        self._wheel_range = config.wheel_range * 100.0
        self._share = config.share_channels and self.mode == "pool"
        new_range = self._effective_range(config.bend_range if self.mode == "pool" else config.mpe_member_range)
        range_changed = new_range != self._range or config.whole_semitone_range != old.whole_semitone_range
        self._range = new_range
        self._update_wheel_units()
        self._plan_tuning()
        if range_changed:
            chans = self.pool.channels if self.mode == "pool" else self._members
            for c in chans:
                out += E.bend_range_rpn(c, self._range, config.whole_semitone_range)
        if self.mode == "mpe":
            if config.mpe_manager_range != old.mpe_manager_range or range_changed:
                out += E.bend_range_rpn(self._manager, self._effective_range(config.mpe_manager_range),
                                        config.whole_semitone_range)
            self._send_manager_wheel(out)     # only if its value changed
        for c in self.pool.channels:
            ns = self.pool.notes[c]
            if ns:
                n = ns[0]
                b = E.bend_value(n.cents - 100.0 * n.out_key, self._range, self._scale)
                for m in ns:
                    m.bend = b
                self.pool.bend[c] = b
            elif range_changed:
                self.pool.bend[c] = E.bend_value(
                    E.bend_cents(self.pool.bend[c], self._range), self._range, self._scale)
            if ns or self.pool.is_ringing(c, t):
                self._send_bend(c, out)
            else:
                self._sent[c] = None if range_changed else self._sent[c]
        self.stats["messages_out"] += len(out)
        return out

    # ------------------------------------------------------------------ endings
    def release_all(self, t: float) -> list[mido.Message]:
        """Panic / shutdown: a note-off per sounding note, then on every output
        channel pedals up (if down), all-notes-off and the bend reset to centre."""
        out: list[mido.Message] = []
        for n in self._pending:
            n.alive = False
            n.pending = False
        self._pending = []
        self._deferred.clear()     # their notes are still sounding: released below
        self._deadline = None
        for n in self._sounding_notes():
            if n.down:
                out.append(E.note_off(n.out_ch, n.out_key, 0))
            n.alive = False
        self.pool.clear(t)
        self._fifo.clear()
        sus = any(self._sustain.values())
        sost = any(self._sostenuto.values())
        for c in self._all_channels():
            if self.mode == "mts":
                sus_c, sost_c = self._sustain.get(c), self._sostenuto.get(c)
            else:
                sus_c, sost_c = sus, sost
            if sus_c:
                out.append(E.control_change(c, E.CC_SUSTAIN, 0))
            if sost_c:
                out.append(E.control_change(c, E.CC_SOSTENUTO, 0))
            out.append(E.control_change(c, E.CC_ALL_NOTES_OFF, 0))
            out.append(E.pitchwheel(c, E.BEND_CENTRE))
            self._sent[c] = E.BEND_CENTRE
            if c in self.pool.bend and self.mode != "mts":
                self.pool.bend[c] = E.BEND_CENTRE
        self._sustain.clear()
        self._sostenuto.clear()
        self._wheel.clear()
        self._update_wheel_units()
        self.stats["messages_out"] += len(out)
        return out

    def input_lost(self, t: float) -> list[mido.Message]:
        """The input went away: release the notes it held, lift its pedals and
        centre its wheel (nothing may stay stuck)."""
        out: list[mido.Message] = []
        for n in self._pending:
            n.alive = False
            n.pending = False
        self._pending = []
        self._deadline = None
        self._apply_deferred(out)
        fifo = self._fifo
        self._fifo = {}
        for q in fifo.values():
            for n in q:
                self._release(t, n, None, out)
        for dom in list(self._sostenuto):
            if self._sostenuto[dom]:
                self._control(t, dom, E.control_change(dom, E.CC_SOSTENUTO, 0), out)
        for dom in list(self._sustain):
            if self._sustain[dom]:
                self._control(t, dom, E.control_change(dom, E.CC_SUSTAIN, 0), out)
        for dom in list(self._wheel):
            if self._wheel[dom]:
                self._wheel_in(t, dom, E.msg("pitchwheel", channel=dom, pitch=0), out)
        self._rpn_sel.clear()
        self.stats["messages_out"] += len(out)
        return out

    def output_lost(self, t: float) -> None:
        """The output went away with its sounding notes: forget them. Call
        :meth:`start` again when it is back."""
        for n in self._pending:
            n.alive = False
            n.pending = False
        self._pending = []
        self._deferred.clear()
        self._deadline = None
        for n in self.pool.clear(None):
            n.alive = False
        for c in self.pool.channels:
            self.pool.last_off[c] = NEG_INF     # nothing rings on a device that is gone
        self._fifo.clear()
        self._sent = {c: None for c in range(16)}
        self._mts_enc = [None] * 128

    # ------------------------------------------------------------------ queries
    def sounding(self) -> list[dict]:
        """The notes sounding now: input key and channel, output channel and key,
        velocity, and pitch in cents above key 0 of 12-EDO (the tuning's part,
        as the bend sent encodes it and the synth plays it, ``bend_scale``
        included; the player's wheel not included)."""
        out = []
        for n in self._sounding_notes():
            if self.mode == "mts":
                from retuner.midi import mts
                enc = self._mts_enc[n.in_key]
                cents = mts.decode_frequency(enc) if enc is not None else n.cents
            else:
                cents = 100.0 * n.out_key + E.bend_cents(n.bend, self._range * self._scale)
            out.append({"key": n.in_key, "channel": n.out_ch, "out_key": n.out_key,
                        "cents": cents, "in_channel": n.in_ch, "velocity": n.velocity,
                        "held": n.down})
        return out

    @property
    def bend_range_cents(self) -> float:
        """The bend range the output channels use, in cents."""
        return self._range
