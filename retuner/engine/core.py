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
How pitches reach the synth is the output mode's: ``pool`` (default: each note
on a channel of a pool, bent to its exact pitch), ``mpe`` (an MPE zone) and
``mts`` (the synth's key table tuned with the MIDI Tuning Standard), one module
each in :mod:`retuner.engine.outputs`, chosen by name from the table
``retuner.engine.outputs.MODES``. The engine is the coordinator: it keeps the
input state (:mod:`retuner.engine.inputs`: press queues, pedals, wheel, the
input's RPN selection), the chord window (:mod:`retuner.engine.chord`) and the
adaptive solver, and asks the mode object for everything else.

* System exclusive, clock and other system messages pass through; channel
  messages on passthrough input channels (default channel 10) are untouched,
  but their notes are counted: panic and a lost input end them with note-offs,
  and after a layout change that takes their channel into retuning the
  player's note-offs for them still go to the synth as they came.
  After a system reset (System Reset 0xFF, GM or GM2 System On, GS Reset, XG
  System On: :mod:`retuner.midi.resets`) the sounding notes are forgotten, the
  player's wheel, pedals, input bend range and RPN selection are back at their
  defaults (as the synth's are), and the setup (bend range, MPE configuration,
  MTS tuning selection and key table) is sent again right after the reset.
* Unmapped keys are dropped (logged once per key).
* All-notes-off (CC123, and CC124-127), all-sound-off (CC120) and
  reset-all-controllers (CC121, after which the tuning bends are sent again)
  from the input are honoured for the pedal domain of their channel.

Adaptive mode
-------------
With ``EngineConfig.adaptive`` set (an ``AdaptiveConfig`` of
:mod:`retuner.adaptive.solver`), note-ons are gathered for ``chord_window`` seconds
from the first note-on of a group, then solved together.

The solver is handed to the engine: ``Engine(tuning, config, solver=make)``, where
``make(adaptive_config, tuning)`` returns a solver (default: ``AdaptiveSolver``; the
lookahead planner of :mod:`retuner.convert.lookahead` hands in one that answers from
its plan). The engine calls it again whenever the tuning or the adaptive settings
change. ``solver.solve(held=[(key, cents), ...], new=[key, ...], t=seconds,
part=input channel of the new notes)`` returns the
pitches of the held notes (they may move) and of the new ones. Moved held notes
get new bends (each adaptive note has a channel of its own), then the new notes
sound. Before each solve the solver is told which of its notes have ended
(``solver.release(keys)``; it applies its own policy for silences), or, for a
solver without ``release``, ``solver.reset()`` is called when nothing sounds.
The chord window, and the note-offs and pedal changes delayed with it, are
described in :mod:`retuner.engine.chord`. Adaptive mode needs a 12-note profile:
an engine built with adaptive settings and another profile is refused with one
line (a RetunerError on the ``adaptive`` setting); switched to such a profile
while running, adaptive mode rests until a 12-note profile is in force again
(see :mod:`retuner.adaptive.solver`).
"""

from __future__ import annotations

import dataclasses
import logging
import math
from collections import deque
from typing import Any, Callable, Optional

import mido

from retuner.adaptive.solver import AdaptiveSolver
from retuner.midi import encode as E
from retuner.midi.resets import system_reset
from retuner.engine.attack import AttackSettle
from retuner.engine.allocator import NEG_INF, Note
from retuner.engine.chord import ChordWindow
from retuner.engine.config import DEFAULT_POOL, EngineConfig
from retuner.engine.inputs import InputState, PassthroughNotes
from retuner.engine.notes import release
from retuner.engine.outputs import MODES, OutputMode
from retuner.engine.outputs.base import explain_steals
from retuner.errors import RetunerError
from retuner.pitch.tuning import Tuning

__all__ = ["Engine", "EngineConfig", "MODES", "DEFAULT_POOL"]

log = logging.getLogger(__name__)

_NOTES_OFF_CCS = (E.CC_ALL_NOTES_OFF,) + E.CC_MODE_NOTES_OFF
_PEDAL_CCS = (E.CC_SUSTAIN, E.CC_SOSTENUTO)
#: settings a mode can apply to what sounds without starting again
_LIGHT_FIELDS = ("bend_range", "wheel_range", "release_time", "bend_scale", "whole_semitone_range",
                 "share_channels", "adaptive", "mpe_member_range", "mpe_manager_range")


def _not_twelve(tuning: Tuning) -> str:
    return (f"adaptive mode tunes 12-note profiles with a 1200 c period only: {tuning.id} has "
            f"{tuning.size} notes to a period of {tuning.period.cents:.1f} c")


def _finite(x: Any) -> bool:
    try:
        return math.isfinite(x)
    except TypeError:
        return False


class Engine:
    """The retuning state machine (see the module docstring)."""

    def __init__(self, tuning: Tuning, config: Optional[EngineConfig] = None,
                 solver: Optional[Callable[[Any, Tuning], Any]] = None):
        self.config = (config or EngineConfig()).validate()
        if self.config.adaptive is not None and not tuning.is_twelve:
            raise RetunerError(_not_twelve(tuning), field="adaptive")
        self.tuning = tuning
        # adaptive mode: makes the solver from (adaptive settings, tuning), again at each change
        self._solver_factory = solver if solver is not None else AdaptiveSolver
        self.stats: dict[str, int] = {
            "notes": 0, "note_ons_out": 0, "steals": 0, "ringing_retunes": 0,
            "bends_sent": 0, "messages_out": 0, "note_on_messages": 0,
            "dropped_unmapped": 0, "chords_solved": 0,
            # the player's wheel: bends cut short at the end of the output range (the range
            # is widened first where it can be), and widenings of the output range
            "wheel_clamps": 0, "range_widenings": 0,
            # attack mode: retunes of notes within their attack, how many and how large (cents)
            "attack_retunes": 0, "attack_retune_cents_total": 0.0, "attack_retune_cents_max": 0.0,
            "attack_corrected_notes": 0,
        }
        self._attack: Optional[AttackSettle] = None
        # adaptive mode: cents moved by notes already sounding, by cause ("chord:recentre",
        # "release:drift-limit" ...: what started the solve, then the solver's held_cause)
        self.held_motion: dict[str, float] = {}
        self._warned_keys: set[int] = set()
        self._solver = None
        self._pass_notes = PassthroughNotes()     # kept across layout changes
        self._orphaned = self._pass_notes.orphaned
        self._build()

    # ------------------------------------------------------------------ setup
    def _build(self) -> None:
        cfg = self.config
        self._pass = frozenset(cfg.passthrough)
        self.inputs = InputState(cfg.wheel_range)
        self.output: OutputMode = MODES[cfg.mode](cfg, self.inputs, self.stats)
        self._table = self.output.table
        self._presses = self.inputs.presses
        self._pedals = self.inputs.pedals
        self._holds = self._pedals.holds
        self._domain = [self.output.domain(c) for c in range(16)]    # input channel -> domain
        self._chord = ChordWindow()
        self._plan_tuning()
        if cfg.adaptive is not None:
            self._make_solver(cfg.adaptive)

    @property
    def pool(self):
        """The output's notes per channel (the channel pool in the per-note-bend modes)."""
        return self.output.table

    def _plan_tuning(self) -> None:
        """Per key: (output key, tuning bend, cents) or None when unmapped."""
        place = self.output.place
        self._plan: list[Optional[tuple[int, int, float]]] = []
        for k in range(128):
            c = self.tuning.cents[k]
            if c is None:
                self._plan.append(None)
            else:
                ok, b = place(c, k)
                self._plan.append((ok, b, c))
        self._warned_keys = set()

    def _make_solver(self, acfg: Any) -> None:
        if not self.tuning.is_twelve:
            # a running engine never refuses: adaptive mode rests while this profile is in force
            log.warning("%s; adaptive mode rests while it is in force", _not_twelve(self.tuning))
            self._solver = None
            return
        self._solver = self._solver_factory(acfg, self.tuning)
        self._solver_keys: set[int] = set()
        self._window = float(getattr(acfg, "chord_window", 0.0) or 0.0)
        # no chord window: notes sound at once and settle within their attack
        attack = 0.0 if self._window > 0 else float(getattr(acfg, "attack_time", 0.0) or 0.0)
        self._attack = AttackSettle(attack) if attack > 0 else None

    @property
    def attack_retune_cents(self) -> list[float]:
        """Attack mode: the sizes (cents) of the latest retunes of notes within their attack."""
        return list(self._attack.recent) if self._attack is not None else []

    @property
    def attack_corrections(self) -> list[float]:
        """Attack mode: per note retuned within its attack (the latest 10000), how far (cents)
        its pitch at the end of the attack lies from the pitch it left with."""
        return self._attack.corrections() if self._attack is not None else []

    @property
    def adaptive(self) -> bool:
        return self._solver is not None

    # ------------------------------------------------------------------ start
    def start(self, t: float) -> list[mido.Message]:
        """Setup messages: bend range (RPN 0), MPE configuration, MTS tuning."""
        out = self.output.setup(t, self.tuning)
        # pedals the input still holds (after a reconnect)
        for dom, down in self.inputs.sustain.items():
            if down:
                out += self.output.zone(dom, E.control_change(0, E.CC_SUSTAIN, 127))
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
            if ch is not None:
                self._pass_notes.track(msg)
            elif system_reset(msg) is not None:
                # the synth is reset: what sounded is gone; set it up again right after
                setup = self.synth_reset(t)
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
            out += self.output.poly_pressure(msg, self.inputs.sounding_press(ch, msg.note))
        else:  # aftertouch, program_change
            out += self.output.zone(self._domain[ch], msg)
        self.stats["messages_out"] += len(out)
        return out

    def next_deadline(self) -> Optional[float]:
        chord = self._chord
        d = chord.deadline
        a = self._attack
        if a is not None and a.due is not None and (d is None or a.due < d):
            d = a.due
        if chord.deferred:
            due = chord.deferred[0][0]
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
        chord = self._chord
        while True:
            due = chord.deferred[0][0] if chord.deferred else None
            win = chord.deadline
            if due is not None and due <= t and (win is None or due <= win):
                self._apply_one_deferred(out)
            elif win is not None and win <= t:
                self._flush(win, out)
            elif self._attack is not None and self._attack.due is not None and self._attack.due <= t:
                self._settle_held(self._attack.due, out)
            else:
                return

    def _apply_one_deferred(self, out: list) -> None:
        chord = self._chord
        due, ch, note, msg = chord.deferred.popleft()
        if note is None:
            chord.applying = True
            try:
                self._control(due, ch, msg, out)
            finally:
                chord.applying = False
        else:
            self._release(due, note, msg, out)

    def _apply_deferred(self, out: list) -> None:
        """Apply every delayed event now (adaptive mode ends, the input is lost)."""
        while self._chord.deferred:
            self._apply_one_deferred(out)

    @property
    def _delaying(self) -> bool:
        return self._solver is not None and self._window > 0

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
        note = Note(ch, key, vel, t, self._domain[ch])
        # its press queue (see retuner.engine.inputs); handled here: the hot path
        q = self._presses.get((ch, key))
        if q is None:
            q = self._presses[(ch, key)] = deque()
        q.append(note)
        if self._solver is not None:
            self._chord.gather(note, t, self._window)
            if self._window <= 0:
                self._flush(t, out)
            return
        note.out_key, note.bend, note.cents = plan
        n0 = len(out)
        self.output.sound(t, note, out)
        self.stats["note_on_messages"] += len(out) - n0

    def _note_off(self, t: float, ch: int, key: int, msg: mido.Message, out: list) -> None:
        if self._orphaned and self._pass_notes.take_orphan(ch, key):
            out.append(msg)     # started while its channel was passed through: it goes as it came
            return
        # the presses this note-off ends (the one rule: retuner.engine.notes.release)
        presses = self._presses
        q = presses.get((ch, key))
        if not q:
            return
        ended = release(q)
        if not q:
            del presses[(ch, key)]
        note = ended.pop()
        for n in ended:
            # presses that outlived an earlier release of their key while a newer press
            # waited: their own note-offs were lost. They end now, with the newer press
            # this note-off belongs to
            self._end_press(t, ch, n, msg, out)
        if self._solver is not None and self._window > 0 and not note.pending and note.alive:
            self._chord.delay(t + self._window, ch, note, msg)
            return
        self._release(t, note, msg, out)

    def _end_press(self, t: float, ch: int, note: Note, msg: mido.Message, out: list) -> None:
        if self._delaying and not note.pending and note.alive:
            self._chord.delay(t + self._window, ch, note, msg)
            return
        self._release(t, note, msg, out)

    def _release(self, t: float, note: Note, msg: Optional[mido.Message], out: list) -> None:
        """The player let go of ``note`` (already taken out of its press queue)."""
        if note.pending:
            self._chord.cancel(note)
            return
        if not note.alive:
            return
        note.down = False
        note.t_off = t
        if self._attack is not None:
            self._attack.released(note)
        if msg is None:
            msg = E.note_off(note.in_ch, note.in_key, 0)
        out.append(self.output.note_off(note, msg))
        if self._holds(note.dom, note):
            return
        note.alive = False
        self._table.remove(note, t)
        if self._attack is not None and self._solver is not None:
            # the chord lost a note: its notes still in their attack settle without it
            self._flush(t, out)

    def _end_pedalled(self, t: float, dom: int) -> None:
        """The pedals of ``dom`` changed: notes no longer held stop sounding."""
        table = self.output.table
        notes = table.notes
        released = [n for c in table.channels for n in notes[c] if n.dom == dom and not n.down]
        for n in self._pedals.let_go(dom, released):
            n.alive = False
            table.remove(n, t)

    def _sounding_notes(self) -> list[Note]:
        return self._table.sounding()

    # ------------------------------------------------------------------ controls
    def _control(self, t: float, ch: int, msg: mido.Message, out: list) -> None:
        cc = msg.control
        output = self.output
        inputs = self.inputs
        dom = self._domain[ch]
        if output.takes_input_rpn and inputs.rpn_data(ch, cc, msg.value):
            output.wheel_changed()      # the assumed wheel range may have changed
            return
        if cc in _PEDAL_CCS and self._delaying and not self._chord.applying:
            self._chord.delay(t + self._window, ch, None, msg)
            return
        if cc == E.CC_SUSTAIN:
            out += output.zone(dom, msg)
            if self._pedals.sustain_to(dom, msg.value):
                self._end_pedalled(t, dom)
        elif cc == E.CC_SOSTENUTO:
            out += output.zone(dom, msg)
            step = self._pedals.sostenuto_to(dom, msg.value)
            if step > 0:
                for n in self._sounding_notes():
                    if n.dom == dom and n.down:
                        n.sost = True
            elif step < 0:
                self._end_pedalled(t, dom)
                for n in self._sounding_notes():
                    if n.dom == dom:
                        n.sost = False
        elif cc == E.CC_ALL_SOUND_OFF:
            out += output.channel_mode(dom, msg)
            self._silence(t, dom, True, out)
        elif cc in _NOTES_OFF_CCS:
            if cc != E.CC_ALL_NOTES_OFF and not output.keeps_input_channels:
                # omni/mono/poly mode changes would break the output channels: only their
                # all-notes-off effect (MIDI 1.0) reaches the synth, as CC123
                msg = E.control_change(ch, E.CC_ALL_NOTES_OFF, 0)
            out += output.channel_mode(dom, msg)
            self._silence(t, dom, False, out)
        elif cc == E.CC_RESET_ALL_CONTROLLERS:
            out += output.channel_mode(dom, msg)
            inputs.rpn.pop(ch, None)
            self._pedals.up(dom)
            self._end_pedalled(t, dom)
            for n in self._sounding_notes():
                if n.dom == dom:
                    n.sost = False
            domain = self._domain
            for c in [c for c in inputs.wheel if domain[c] == dom]:
                del inputs.wheel[c]
            output.controllers_reset(t, out)
        else:
            out += output.zone(dom, msg)

    def _silence(self, t: float, dom: int, hard: bool, out: list) -> None:
        """All-sound-off (hard) or all-notes-off for pedal domain ``dom``."""
        chord = self._chord
        inputs = self.inputs
        for n in list(chord.pending):
            if n.dom == dom:
                n.alive = False
                n.pending = False
                chord.pending.remove(n)
                inputs.forget(n)
        if not chord.pending:
            chord.deadline = None
        chord.deferred = type(chord.deferred)(d for d in chord.deferred if d[2] is None or d[2].dom != dom)
        table = self.output.table
        for c in table.channels:
            ns = table.notes[c]
            for n in list(ns):
                if n.dom != dom:
                    continue
                if n.down:
                    n.down = False
                    n.t_off = t
                    inputs.forget(n)
                if hard or not self._pedals.holds(dom, n):
                    n.alive = False
                    table.remove(n, t)
                    if hard and not table.notes[c]:
                        table.last_off[c] = NEG_INF
        # the player's keyboard sends no note-offs for what it cleared: forget every
        # press of this domain (stolen ones too), so no later note-off is mispaired
        domain = self.output.domain
        inputs.forget_domain(lambda ch: domain(ch) == dom)

    def _wheel_in(self, t: float, ch: int, msg: mido.Message, out: list) -> None:
        dom = self._domain[ch]
        self.inputs.wheel[ch] = msg.pitch
        output = self.output
        before = output.range_cents
        output.wheel(t, dom, msg, out)
        if output.range_cents != before:
            self._plan_tuning()        # the output range was widened for the wheel

    # ------------------------------------------------------------------ adaptive
    def _flush(self, t: float, out: list) -> None:
        """Close the chord window: solve the gathered notes and sound them."""
        pend = self._chord.close()
        attack = self._attack
        if not pend and attack is None:
            return
        solver = self._solver
        output = self.output
        if solver is None:  # adaptive mode switched off meanwhile: static pitches
            n0 = len(out)
            for n in pend:
                n.out_key, n.bend, n.cents = self._plan[n.in_key]
                output.sound(t, n, out)
            self.stats["note_on_messages"] += len(out) - n0
            return
        n0 = len(out)
        held = self._sounding_notes()
        fresh: list[Note] = []
        if attack is not None:
            # notes within their attack are solved again with the new ones
            fresh = attack.fresh(held, t, self.output.movable)
            if fresh:
                fs = set(map(id, fresh))
                held = [n for n in held if id(n) not in fs]
            if not pend and not fresh:
                return
        held_keys = {n.in_key for n in held}
        again = {n.in_key for n in fresh}
        ended = [k for k in self._solver_keys if k not in held_keys and k not in again]
        if hasattr(solver, "release"):
            if ended:
                solver.release(ended)   # the solver applies its silence policy itself
        elif not held and not fresh:
            solver.reset()
        self._solver_keys = held_keys | again | {n.in_key for n in pend}
        if attack is None:
            held_in = [(n.in_key, n.cents) for n in held]
        elif fresh:
            held_in = attack.again(solver, held)
        else:
            held_in = attack.begin(solver, held)
        new_notes = fresh + pend
        # voice leading: the held notes the new ones are taken to replace are about to end,
        # so they stay out of the solve (they keep their pitch); see engine/attack.py
        ending = attack.ending(held, new_notes, pend, t) if attack is not None else ()
        asked = [h for h, n in zip(held_in, held) if id(n) not in ending] if ending else held_in
        try:
            held_new, new_cents = solver.solve(held=asked, new=[n.in_key for n in new_notes],
                                               t=t, part=new_notes[0].in_ch)
            held_new, new_cents = list(held_new), list(new_cents)
            if ending and len(held_new) == len(asked):
                # the notes left out keep their pitch (a short answer is caught below)
                it = iter(held_new)
                held_new = [n.cents if id(n) in ending else next(it) for n in held]
        except Exception:  # the engine must never die on a solver failure
            log.exception("adaptive solver failed: the chord keeps static pitches")
            held_new, new_cents = [], []
        # robust against short or non-finite answers: held notes stay, new notes get the profile
        if len(held_new) != len(held):
            held_new = [n.cents for n in held]
        held_new = [c if _finite(c) else n.cents for n, c in zip(held, held_new)]
        cause = ("chord:" if pend else "release:") + (getattr(solver, "held_cause", "") or "other")
        if fresh:
            nf = len(fresh)
            if len(new_cents) == len(new_notes):
                fresh_cents = [c if _finite(c) else n.cents for n, c in zip(fresh, new_cents[:nf])]
                new_cents = new_cents[nf:]
            else:
                fresh_cents = [n.cents for n in fresh]
                new_cents = []
        if attack is not None:
            # held notes past their attack move once per chord: when its attack is over, or
            # now when several of its notes started at this very instant (a block chord in a
            # file: a later note of the same instant moves them again, unheard)
            starts = [n.t_on for n in new_notes]
            attack.plan(held, held_new, starts, cause)
            held, held_new = [], []
            if attack.held_plan and len(starts) > 1 and min(starts) >= t:
                self._settle_held(t, out)
            if fresh:
                attack.count(fresh, fresh_cents, self.stats, t)
                held, held_new = fresh, fresh_cents
        else:
            self._count_held_motion(held, held_new, cause)
        if len(new_cents) != len(pend):
            # an answer that does not match the notes one to one cannot be matched by
            # position: every new note takes its profile pitch instead
            new_cents = [self._plan[n.in_key][2] for n in pend]
        new_cents = [c if _finite(c) else self._plan[n.in_key][2] for n, c in zip(pend, new_cents)]
        output.sound_solved(t, held, held_new, pend, new_cents, out)
        if pend:
            # (a chord settling after one of its notes ended is no new chord, and its bends
            # are no note-on's messages)
            self.stats["chords_solved"] += 1
            self.stats["note_on_messages"] += len(out) - n0

    def _settle_held(self, t: float, out: list) -> None:
        """Attack mode: the held notes move to where the chord's last solve put them."""
        plan = self._attack.take_plan()
        if plan:
            self._count_held_motion([n for n, _ in plan], [c for _, c in plan], self._attack.cause)
            self.output.sound_solved(t, [n for n, _ in plan], [c for _, c in plan], [], [], out)

    def _count_held_motion(self, held: list, cents: list, cause: str) -> None:
        moved = sum(abs(float(c) - n.cents) for n, c in zip(held, cents))
        if moved > 0:
            self.held_motion[cause] = self.held_motion.get(cause, 0.0) + moved

    # ------------------------------------------------------------------ switching
    def set_tuning(self, tuning: Tuning, t: float) -> list[mido.Message]:
        """Switch profile: sounding notes keep their pitch, new notes use ``tuning``."""
        self.tuning = tuning
        self._plan_tuning()
        if self.config.adaptive is not None:
            self._make_solver(self.config.adaptive)
        out = self.output.retuned(tuning, self._sounding_notes())
        self.stats["messages_out"] += len(out)
        return out

    def set_adaptive(self, cfg: Any, t: float) -> list[mido.Message]:
        """Turn adaptive mode on (``cfg`` an AdaptiveConfig), change it, or off (None).
        Notes waiting in the chord window are sounded first."""
        out: list[mido.Message] = []
        self._apply_deferred(out)
        if self._chord.pending:
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
        same_layout = all(getattr(config, f.name) == getattr(old, f.name)
                          for f in dataclasses.fields(EngineConfig) if f.name not in _LIGHT_FIELDS)
        out: list[mido.Message] = []
        if not same_layout or not self.output.reconfigures_lightly:
            out += self._release_retuned(t)     # notes on passthrough channels sound on
            self.config = config
            self._solver = None
            self._build()
            self._pass_notes.relayout(self._pass)
            out += self.start(t)
            return out
        if config.adaptive is not old.adaptive:
            out += self.set_adaptive(config.adaptive, t)
        self.config = config
        self.inputs.wheel_range = config.wheel_range * 100.0
        self.output.reconfigure(config, old, t, out)
        self._plan_tuning()
        self.stats["messages_out"] += len(out)
        return out

    # ------------------------------------------------------------------ endings
    def release_all(self, t: float) -> list[mido.Message]:
        """Panic / shutdown: a note-off per sounding note, then on every output
        channel pedals up (if down), all-notes-off and the bend reset to centre;
        then a note-off for each note sounding on a passthrough channel."""
        out = self._release_retuned(t)
        passed = self._pass_notes.release()
        self.stats["messages_out"] += len(passed)
        return out + passed

    def _release_retuned(self, t: float) -> list[mido.Message]:
        out: list[mido.Message] = []
        chord = self._chord
        chord.drop_pending()
        chord.deferred.clear()     # their notes are still sounding: released below
        for n in self._sounding_notes():
            if n.down:
                out.append(E.note_off(n.out_ch, n.out_key, 0))
            n.alive = False
        output = self.output
        inputs = self.inputs
        output.table.clear(t)
        inputs.presses.clear()
        for c in output.all_channels():
            dom = output.domain(c)
            if inputs.sustain.get(dom):
                out.append(E.control_change(c, E.CC_SUSTAIN, 0))
            if inputs.sostenuto.get(dom):
                out.append(E.control_change(c, E.CC_SOSTENUTO, 0))
            out.append(E.control_change(c, E.CC_ALL_NOTES_OFF, 0))
            out.append(E.pitchwheel(c, E.BEND_CENTRE))
        output.released()
        inputs.sustain.clear()
        inputs.sostenuto.clear()
        inputs.wheel.clear()
        output.wheel_changed()
        self.stats["messages_out"] += len(out)
        return out

    def input_lost(self, t: float) -> list[mido.Message]:
        """The input went away: release the notes it held, lift its pedals and
        centre its wheel (nothing may stay stuck)."""
        out: list[mido.Message] = []
        self._chord.drop_pending()
        self._apply_deferred(out)
        inputs = self.inputs
        for q in inputs.take_all().values():
            for n in q:
                self._release(t, n, None, out)
        for dom in list(inputs.sostenuto):
            if inputs.sostenuto[dom]:
                self._control(t, dom, E.control_change(dom, E.CC_SOSTENUTO, 0), out)
        for dom in list(inputs.sustain):
            if inputs.sustain[dom]:
                self._control(t, dom, E.control_change(dom, E.CC_SUSTAIN, 0), out)
        for ch in list(inputs.wheel):
            if inputs.wheel[ch]:
                self._wheel_in(t, ch, E.msg("pitchwheel", channel=ch, pitch=0), out)
        inputs.rpn.clear()
        out += self._pass_notes.release()
        self.stats["messages_out"] += len(out)
        return out

    def synth_reset(self, t: float) -> list[mido.Message]:
        """The synth was just reset (GM, GM2, GS or XG system on, or System Reset: see
        :mod:`retuner.midi.resets`): it forgot its notes and every set-up, and is back at
        bend range 2, wheel centred, pedals up. The state kept for the player is reset as
        the synth's was (wheel centred, pedals up, the input's bend range back to its
        default, RPN selection null) and the set-up messages to send right after the
        reset are returned."""
        self.output_lost(t)
        inputs = self.inputs
        inputs.sustain.clear()
        inputs.sostenuto.clear()
        inputs.wheel.clear()
        inputs.rpn.clear()
        inputs.dress.clear()
        inputs.wheel_range = self.config.wheel_range * 100.0
        inputs.wheel_ranges.clear()
        self.output.wheel_changed()
        return self.start(t)

    def output_lost(self, t: float) -> None:
        """The output went away with its sounding notes: forget them. Call
        :meth:`start` again when it is back."""
        chord = self._chord
        chord.drop_pending()
        chord.deferred.clear()
        table = self.output.table
        for n in table.clear(None):
            n.alive = False
        for c in table.channels:
            table.last_off[c] = NEG_INF     # nothing rings on a device that is gone
        self.inputs.presses.clear()
        self._pass_notes.forget()
        self.output.output_lost()

    # ------------------------------------------------------------------ queries
    def steals_explained(self, shares_port: bool = False) -> str:
        """One line: how many notes steals cut short, why, and what would avoid it with the
        settings in force; empty when no note was cut."""
        n = int(self.stats.get("steals", 0))
        return explain_steals(n, self.output.why_steals(self.config, shares_port)) if n else ""

    def sounding(self) -> list[dict]:
        """The notes sounding now: input key and channel, output channel and key,
        velocity, and pitch in cents above key 0 of 12-EDO (the tuning's part,
        as the bend sent encodes it and the synth plays it, ``bend_scale``
        included; the player's wheel not included)."""
        out = []
        cents_of = self.output.sounding_cents
        for n in self._sounding_notes():
            out.append({"key": n.in_key, "channel": n.out_ch, "out_key": n.out_key,
                        "cents": cents_of(n), "in_channel": n.in_ch, "velocity": n.velocity,
                        "held": n.down})
        return out

    @property
    def bend_range_cents(self) -> float:
        """The bend range the output channels use, in cents."""
        return self.output.range_cents
