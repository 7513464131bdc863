"""What the two per-note-bend modes (pool and MPE) share: a pool of output
channels, each note on a channel bent to give it its exact pitch.

Channel choice, sharing, ringing and the steal policy are the allocator's
(:mod:`retuner.engine.allocator`); the bend formula is :mod:`retuner.midi.encode`'s.

* A note plays from its own key when its offset from that key's 12-EDO pitch is
  within the bend range; otherwise from the **nearest key** to its target
  (``round(cents / 100)``, kept within 0..127), bent by the remainder. Only a
  target below key 0 or above key 127 by more than the range is clamped.
* The **player's wheel** of an input channel is added, in whole output bend steps,
  to the tuning bend of the channels whose notes came from that channel (and
  widens the range when the sum would not fit): in the pool mode (see
  :mod:`retuner.engine.outputs.pool` for the rules), and in an MPE zone shared by
  several parts (a zone of one part carries its wheel on the manager channel:
  :mod:`retuner.engine.outputs.mpe`).
* A bend is sent only when a channel's bend value changes.
* Note-offs go to the channel and key the note was sent on; polyphonic pressure
  to the note's channel.
* Synth correction: ``bend_scale`` (a synth playing bends at 127/128 of their
  size gets bends 128/127 larger) and ``whole_semitone_range`` (for synths that
  ignore the cents part of RPN 0: the range is rounded to whole semitones and
  sent without CC38). To measure ``bend_scale``: play one key unbent and with
  the full upward bend at a known range, measure both pitches, and divide the
  measured interval by the specified one.
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass
from typing import Any, ClassVar, Optional, Sequence

import mido

from retuner.midi import encode as E
from retuner.engine.allocator import RINGING, STEAL, Note, Pool
from retuner.engine.outputs.base import OutputMode, effective_range

log = logging.getLogger(__name__)


@dataclass(frozen=True)
class BendSettings:
    """Settings of a per-note-bend mode (semitones and seconds, as in the config)."""

    channels: tuple[int, ...]        # the pool's output channels
    bend_range: float                # semitones, announced with RPN 0 on the pool's channels
    release_time: float
    bend_scale: float
    whole_semitone_range: bool
    share_channels: bool


class BendMode(OutputMode):
    """Each note on a channel of the pool, bent to its pitch (see the module docstring)."""

    settings_class: ClassVar[type] = BendSettings
    #: the pedals live on one channel the pool's members do not carry (MPE's manager):
    #: a steal silences the member alone with all-sound-off
    pedals_apart: ClassVar[bool] = False
    #: the pool's channels are dressed per part (pool mode, several input channels live)
    dressing: bool = False

    def __init__(self, config: Any, inputs: Any, stats: dict):
        super().__init__(config, inputs, stats)
        self.settings = s = self.settings_class.from_config(config)
        self.range_cents = effective_range(s.bend_range, s.whole_semitone_range)
        self.scale = s.bend_scale
        self.share = s.share_channels
        self.table = self.pool = Pool(s.channels, s.release_time)
        # what was last sent on each output channel (channel 16 k + c is channel c of port k)
        self.ports = max(s.channels, default=0) // 16 + 1
        self.sent: dict[int, Optional[int]] = {c: None for c in range(16 * self.ports)}
        # the player's wheel in output bend steps, per input channel: added to the bend of the
        # output channels whose notes came from that input channel (``owner``)
        self.wheel_units: dict[int, int] = {}
        self.owner: dict[int, int] = {c: -1 for c in self.pool.channels}   # output -> input channel
        self._clamp_told = False

    # ------------------------------------------------------------------ pitches
    def place(self, cents: float, key: int) -> tuple[int, int]:
        rng, sc = self.range_cents, self.scale
        off = cents - 100.0 * key
        if E.reachable(off, rng, sc):
            return key, E.bend_value(off, rng, sc)
        k = min(127, max(0, int(round(cents / 100.0))))
        return k, E.bend_value(cents - 100.0 * k, rng, sc)

    def sounding_cents(self, note: Note) -> float:
        return 100.0 * note.out_key + E.bend_cents(note.bend, self.range_cents * self.scale)

    def send_bend(self, c: int, out: list, force: bool = False) -> None:
        # the tuning bend plus the wheel in whole output steps (not the two summed and rounded
        # once): the wheel's share is then exactly what the measures take off, and a wheel
        # gesture never shows as motion of the tuning
        v = self.pool.bend[c] + self.wheel_units.get(self.owner.get(c, -1), 0)
        if v < 0 or v > 16383:
            self.clamped()
            v = 0 if v < 0 else 16383
        if force or self.sent[c] != v:
            self.sent[c] = v
            out.append(E.pitchwheel(c, v))
            self.stats["bends_sent"] += 1

    # ------------------------------------------------------------------ the player's wheel
    def units_of(self, ch: int) -> int:
        """Input channel ``ch``'s wheel in output bend steps."""
        return round(self.inputs.wheel.get(ch, 0) * self.inputs.range_of(ch) / (self.range_cents * self.scale))

    def wheel_changed(self) -> None:
        self.wheel_units = {ch: self.units_of(ch) for ch in self.inputs.wheel}

    def wheel(self, t: float, dom: int, msg: mido.Message, out: list) -> None:
        ch = msg.channel
        units = self.units_of(ch)
        if units == self.wheel_units.get(ch, 0):
            return
        self.wheel_units[ch] = units
        pool = self.pool
        notes, last_off, bend, owner = pool.notes, pool.last_off, pool.bend, self.owner
        rel = pool.release_time
        mine = [c for c in pool.channels if owner[c] == ch and (notes[c] or t - last_off[c] < rel)]
        if any(not 0 <= bend[c] + units <= 16383 for c in mine) and self.widen(t, ch, mine, out):
            return
        for c in mine:
            self.send_bend(c, out)

    def widen(self, t: float, ch: int, chans: list, out: list) -> bool:
        """The wheel of ``ch`` would take the bend of ``chans`` beyond the output range:
        widen the range (whole semitones, at most 127) so that the player's full wheel plus
        the largest tuning offset on the pool fits. False when it cannot grow."""
        rng = self.range_cents
        sc = self.scale
        offset = max(abs(E.bend_cents(self.pool.bend[c], rng)) for c in self.pool.channels)
        need = (offset + self.inputs.range_of(ch)) / sc
        semis = min(127, int(math.ceil(need / 100.0 - 1e-9)))
        if semis * 100.0 <= rng:
            return False
        self.stats["range_widenings"] = self.stats.get("range_widenings", 0) + 1
        log.info("the output bend range is widened to %d semitones: the player's wheel "
                 "(%.0f c) plus the tuning (%.0f c) did not fit", semis, self.inputs.range_of(ch), offset)
        self.set_range(semis * 100.0, t, out)
        return True

    def controllers_reset(self, t: float, out: list) -> None:
        self.wheel_changed()
        for c in self.pool.channels:
            self.sent[c] = E.BEND_CENTRE
        self.resend_bends(t, out)

    def channels_of(self, in_ch: int) -> Optional[Sequence[int]]:
        """The output channels input channel ``in_ch``'s notes may use (None: the whole pool)."""
        return None

    def clamped(self) -> None:
        """A bend (tuning plus the player's wheel) was cut short at the end of the range."""
        self.stats["wheel_clamps"] = self.stats.get("wheel_clamps", 0) + 1
        if not self._clamp_told:
            self._clamp_told = True
            log.warning("the player's wheel plus the tuning goes beyond the output bend range "
                        "(%.0f c): the bend is cut short (counted as wheel_clamps)", self.range_cents)

    def set_range(self, new_range: float, t: float, out: list) -> None:
        """Use ``new_range`` (cents) on the pool: announce it with RPN 0, and bend every
        busy or ringing channel again so its notes keep their pitch."""
        old = self.range_cents
        self.range_cents = new_range
        self.wheel_changed()
        for c in self.range_channels():
            out += E.bend_range_rpn(c, new_range, self.settings.whole_semitone_range)
        pool = self.pool
        for c in pool.channels:
            ns = pool.notes[c]
            if ns:
                n = ns[0]
                b = E.bend_value(n.cents - 100.0 * n.out_key, new_range, self.scale)
                for m in ns:
                    m.bend = b
                pool.bend[c] = b
            else:
                pool.bend[c] = E.bend_value(E.bend_cents(pool.bend[c], old * self.scale), new_range, self.scale)
            if ns or pool.is_ringing(c, t):
                self.send_bend(c, out, force=True)
            else:
                self.sent[c] = None

    def centre_pool(self, out: list) -> None:
        """Set-up: every pool channel's bend at centre, sent."""
        for c in self.pool.channels:
            self.pool.bend[c] = E.BEND_CENTRE
            self.sent[c] = None
            self.send_bend(c, out, force=True)

    # ------------------------------------------------------------------ notes
    def sound(self, t: float, note: Note, out: list, share: Optional[bool] = None) -> None:
        """Strike ``note`` on a channel of the pool (shared with notes of the same bend
        when ``share``, by default the mode's setting)."""
        c, kind = self.pool.choose(note.bend, note.out_key, t, self.share if share is None else share,
                                   note.in_ch, self.channels_of(note.in_ch))
        self.strike(t, note, c, kind, out)

    def strike(self, t: float, note: Note, c: int, kind: str, out: list) -> None:
        """Sound ``note`` on channel ``c``, chosen by the allocator rule ``kind``."""
        pool = self.pool
        if kind is STEAL:
            self.steal(c, t, out)
        elif kind is RINGING:
            self.stats["ringing_retunes"] += 1
        if self.dressing:
            self.redress(c, note.in_ch, out)
        pool.bend[c] = note.bend
        self.owner[c] = note.in_ch
        self.send_bend(c, out)
        note.out_ch = c
        pool.add(c, note, t)
        out.append(E.note_on(c, note.out_key, note.velocity))
        self.stats["note_ons_out"] += 1

    def redress(self, c: int, part: int, out: list) -> None:
        """Before a note of input channel ``part`` sounds on ``c``: dress ``c`` for it."""

    def movable(self, note: Note) -> bool:
        # a bend moves its whole channel: only a note alone on it can move alone
        return len(self.pool.notes[note.out_ch]) == 1

    def sound_solved(self, t: float, held: Sequence[Note], held_cents: Sequence[float],
                     new: Sequence[Note], new_cents: Sequence[float], out: list) -> None:
        pool = self.pool
        for n, c in zip(held, held_cents):
            c = float(c)
            if c == n.cents:
                continue
            if len(pool.notes[n.out_ch]) > 1:
                continue  # shared channel (from static mode): cannot move one note alone
            n.cents = c
            b = E.bend_value(c - 100.0 * n.out_key, self.range_cents, self.scale)
            if b != n.bend:
                n.bend = b
                pool.bend[n.out_ch] = b
                self.send_bend(n.out_ch, out)
        for n, c in zip(new, new_cents):
            n.cents = float(c)
            n.out_key, n.bend = self.place(n.cents, n.in_key)
            self.sound(t, n, out, False)

    def steal(self, c: int, t: float, out: list) -> None:
        """Silence every note on channel ``c``: note-offs first; pedalled notes
        are let go by lifting the pedal on this channel alone (and pressing it
        again, for notes to come, when the pedal is still down), or with
        all-sound-off on this channel alone when the pedals live elsewhere."""
        pool = self.pool
        sustain, sostenuto = self.inputs.sustain, self.inputs.sostenuto
        ns = pool.notes[c]
        sus = sost = False
        for n in ns:
            if n.down:
                out.append(E.note_off(c, n.out_key, 0))
                # it stays in its press queue (dead): the player's note-off for it will
                # come and must not be taken for a later press of the same key
            # a pedal down would keep the note sounding after its note-off
            if sustain.get(n.dom):
                sus = True
            if n.sost and sostenuto.get(n.dom):
                sost = True
            n.alive = False
            self.stats["steals"] += 1
        if self.pedals_apart and (sus or sost):
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

    def note_off(self, note: Note, msg: mido.Message) -> mido.Message:
        m = E.with_channel(msg, note.out_ch)
        vars(m)["note"] = note.out_key
        return m

    # ------------------------------------------------------------------ controllers
    def channel_mode(self, dom: int, msg: mido.Message) -> list[mido.Message]:
        return E.on_channels(msg, self.all_channels())

    def resend_bends(self, t: float, out: list) -> None:
        """Send the bend of every busy or ringing channel (if it changed)."""
        for c in self.pool.channels:
            if self.pool.notes[c] or self.pool.is_ringing(c, t):
                self.send_bend(c, out)

    def released(self) -> None:
        for c in self.all_channels():
            self.sent[c] = E.BEND_CENTRE
            if c in self.pool.bend:
                self.pool.bend[c] = E.BEND_CENTRE

    def output_lost(self) -> None:
        self.sent = {c: None for c in range(16 * self.ports)}

    # ------------------------------------------------------------------ steals explained
    #: what a steal takes, in the words of the line that explains steals
    steal_unit: ClassVar[str] = "pool's {} channels"

    def more_channels(self, config: Any, shares_port: bool) -> list[str]:
        """Remedies that give the mode more channels (none when it has them all)."""
        if len(self.pool.channels) >= 15 or shares_port:
            return []
        return ["more pool channels (--pool)"]

    def sharing(self, config: Any) -> list[str]:
        """A remedy that lets notes share channels (static tunings only: in adaptive mode
        every note has a bend of its own)."""
        if self.share or config.adaptive is not None:
            return []
        return ["sharing channels among notes of one bend (engine.share_channels: true)"]

    def steal_channels(self) -> int:
        """The channels a note may take (the number the line that explains steals gives)."""
        return len(self.pool.channels)

    def why_steals(self, config: Any, shares_port: bool = False) -> str:
        k = self.steal_channels()
        cure = self.more_channels(config, shares_port) + self.sharing(config)
        # the release time is no remedy: a ringing channel is always taken before a sounding
        # note is cut (the allocator's rules)
        cure.append("fewer notes sounding at once (the sustain pedal keeps released notes sounding)")
        cure[-1] = "or " + cure[-1] if len(cure) > 1 else cure[-1]
        return (f"more notes sounded at once than the {self.steal_unit.format(k)}, so sounding notes "
                f"lost theirs; to avoid it: " + "; ".join(cure))

    # ------------------------------------------------------------------ settings
    def reconfigure(self, config: Any, old: Any, t: float, out: list) -> None:
        """A changed bend range is announced again and the sounding notes keep their pitch."""
        s = self.settings_class.from_config(config)
        self.settings = s
        self.pool.release_time = s.release_time
        self.scale = s.bend_scale
        self.share = s.share_channels
        new_range = effective_range(s.bend_range, s.whole_semitone_range)
        range_changed = new_range != self.range_cents or config.whole_semitone_range != old.whole_semitone_range
        self.range_cents = new_range
        self.wheel_changed()
        if range_changed:
            for c in self.range_channels():
                out += E.bend_range_rpn(c, self.range_cents, s.whole_semitone_range)
        self.reconfigure_extra(config, old, range_changed, out)
        pool = self.pool
        for c in pool.channels:
            ns = pool.notes[c]
            if ns:
                n = ns[0]
                b = E.bend_value(n.cents - 100.0 * n.out_key, self.range_cents, self.scale)
                for m in ns:
                    m.bend = b
                pool.bend[c] = b
            elif range_changed:
                pool.bend[c] = E.bend_value(
                    E.bend_cents(pool.bend[c], self.range_cents), self.range_cents, self.scale)
            if ns or pool.is_ringing(c, t):
                self.send_bend(c, out)
            else:
                self.sent[c] = None if range_changed else self.sent[c]

    def range_channels(self) -> list[int]:
        """The channels that get the pool's bend range with RPN 0."""
        return list(self.pool.channels)

    def reconfigure_extra(self, config: Any, old: Any, range_changed: bool, out: list) -> None:
        """What a mode adds to a light reconfiguration after the bend range is announced."""
