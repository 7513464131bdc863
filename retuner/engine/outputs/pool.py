"""The ``pool`` output mode (the default): each note on a channel of the pool,
bent to its exact pitch (see :mod:`retuner.engine.outputs.bend` for what it shares
with MPE).

* The bend range is announced on every pool channel with RPN 0 (then RPN null)
  at start and whenever it changes.
* The pool is one instrument for the pedals: they are those last sent on any
  retuned input channel (one domain), and channel mode messages (all-notes-off,
  all-sound-off, reset-all-controllers) from any retuned input channel act on
  the whole pool. The **wheel** is per input channel: it bends only the output
  channels whose notes came from that input channel (channels are shared only
  among notes of one input channel).
* Sustain (CC64) and sostenuto (CC66) go to every pool channel; omni/mono/poly
  mode messages (CC124-127) are not passed on (they would change how the pool
  channels play) but their all-notes-off effect is, as CC123.
* **Each part keeps its own instrument.** While one input channel plays, the pool
  is that part's instrument: its program, bank, controllers and channel pressure
  go to every pool channel. Once a second input channel plays or sets its
  program or a controller (a keyboard split, two keyboards), every output channel
  wears the *dress* of one part (program, bank, volume, pan, expression,
  modulation and the other sound-shaping controllers: :mod:`retuner.engine.dress`):
  at first the first part's. A part's program, controllers and channel pressure
  go only to the channels dressed for it (Reset All Controllers goes to every
  channel, as it resets the pedals; the other parts' channels get their values
  back right after it). A note of part P
  takes, in this order: a channel dressed for P (shared, same bend, idle: the
  allocator's rules); another part's idle channel; a ringing channel of P; another
  part's ringing channel; a steal among P's channels (among all when P has none).
  A channel that wore another part's dress is dressed for P first (only the
  values that differ: bank, program, controllers; a value P never set is the
  synth's default), then bent, then the note sounds; counted in ``redressings``.
  The pedals and all-notes-off stay the pool's (one pedal domain), as the
  adaptive solver tunes all parts as one harmony. Parts of a file
  (``parts``) have channels of their own instead, never dressed again.
* The **player's wheel** is added to the tuning bend of its notes' channels: an
  input bend ``w`` (signed, -8192..8191) means ``w / 8192 * wheel_range``
  cents, ``wheel_range`` being that input channel's own bend range (its RPN 0,
  else the ``wheel_range`` setting), i.e.
  ``round(w * wheel_range / (bend_range * bend_scale))`` output steps. When the
  sum would leave 0..16383, the output range is **widened** (whole semitones, at
  most 127) so that the full wheel plus the largest tuning offset fits: RPN 0 is
  announced again on every pool channel and every sounding note keeps its pitch
  (``bend_range`` is then a minimum; counted in ``range_widenings``). Only a
  range already at 127 semitones clamps the sum, counted in ``wheel_clamps`` and
  said once in the log. Wheel changes are sent to busy and ringing channels; an
  idle channel gets the right value when next used.
* Static tunings: notes with the same bend share a channel (``share_channels``),
  one key never held twice on one channel.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import mido

from retuner.midi import encode as E
from retuner.engine import dress as D
from retuner.engine.allocator import IDLE, RINGING, SAME_BEND, SHARE, STEAL, Note
from retuner.engine.outputs.base import config_error
from retuner.engine.outputs.bend import BendMode, BendSettings


@dataclass(frozen=True)
class PoolSettings(BendSettings):
    parts: tuple = ()       # ((input channel, (output channels...)), ...): parts tuned together

    @classmethod
    def from_config(cls, cfg: Any) -> "PoolSettings":
        return cls(channels=tuple(cfg.pool), bend_range=cfg.bend_range, release_time=cfg.release_time,
                   bend_scale=cfg.bend_scale, whole_semitone_range=cfg.whole_semitone_range,
                   share_channels=cfg.share_channels, parts=tuple(cfg.parts))


class PoolMode(BendMode):
    name = "pool"
    summary = "per-note pitch bend on a pool of channels (default)"
    settings_class = PoolSettings

    @classmethod
    def check(cls, config: Any) -> None:
        if not config.pool:
            raise config_error("the pool needs at least one channel", "pool")
        both = set(config.pool) & set(config.passthrough)
        if both:
            raise config_error(f"channel {min(both) + 1} is both in the pool and passed through", "pool")

    @classmethod
    def part_channels(cls, config: Any) -> list[int]:
        return list(config.pool)

    def __init__(self, config: Any, inputs: Any, stats: dict):
        super().__init__(config, inputs, stats)
        self.part_pool: dict[int, tuple] = {p: tuple(chs) for p, chs in self.settings.parts}
        # a channel that plays no note of its own (set-up only) goes with the first part
        self.first_part = self.settings.parts[0][1] if self.settings.parts else None
        self.undress()

    # ------------------------------------------------------------------ parts' dresses
    def undress(self) -> None:
        """The synth's channels wear nothing yet (start, or a synth that forgot its set-up)."""
        self.dressing = False
        self.first_in: Any = None               # the input channel heard first
        self.worn_by_all: dict = {}             # the dress every channel wears while one part plays
        self.worn: dict[int, dict] = {}         # output channel -> its dress (while dressing)
        self.wearer: dict[int, int] = {}        # output channel -> the part it is dressed for

    def heard(self, ch: int) -> None:
        """Input channel ``ch`` plays or dresses: a second part starts the dressing."""
        if self.dressing or self.part_pool:
            return
        if self.first_in is None:
            self.first_in = ch
        elif ch != self.first_in:
            self.dressing = True
            for c in self.pool.channels:
                self.wearer[c] = self.first_in
                self.worn[c] = dict(self.worn_by_all)

    def dressed_for(self, ch: int) -> list[int]:
        wearer = self.wearer
        return [c for c in self.pool.channels if wearer[c] == ch]

    def redress(self, c: int, part: int, out: list) -> None:
        if self.wearer[c] == part:
            return
        msgs, now = D.redress(c, self.worn[c], self.inputs.dress.get(part, {}))
        out += msgs
        self.worn[c] = now
        self.wearer[c] = part
        self.stats["redressings"] = self.stats.get("redressings", 0) + 1

    def sound(self, t: float, note: Note, out: list, share=None) -> None:
        ch = note.in_ch
        if not self.dressing:
            if ch != self.first_in:
                self.heard(ch)
            if not self.dressing:
                BendMode.sound(self, t, note, out, share)
                return
        c, kind = self.pick(t, note, self.share if share is None else share)
        self.strike(t, note, c, kind, out)

    def pick(self, t: float, note: Note, share: bool) -> tuple[int, str]:
        """The channel for ``note`` while the pool's channels are dressed per part (the
        order is in the module docstring)."""
        pool = self.pool
        ch = note.in_ch
        wearer, notes, last_off = self.wearer, pool.notes, pool.last_off
        rel = pool.release_time
        own = self.dressed_for(ch)
        kind = c = None
        if own:
            c, kind = pool.choose(note.bend, note.out_key, t, share, ch, own)
            if kind is SHARE or kind is SAME_BEND or kind is IDLE:
                return c, kind
        others = [d for d in pool.channels if wearer[d] != ch and not notes[d]]
        idle = [d for d in others if t - last_off[d] >= rel]
        if idle:
            return pool.choose(note.bend, note.out_key, t, False, ch, idle)
        if kind is RINGING:
            return c, kind
        if others:
            return pool.choose(note.bend, note.out_key, t, False, ch, others)
        if kind is STEAL:
            return c, kind
        return pool.victim(), STEAL

    def dress(self, msg: mido.Message) -> list[mido.Message]:
        """A program change or sound-shaping controller from the input: kept as its
        channel's dress and sent to the channels dressed for that channel."""
        ch = msg.channel
        key = D.dress_key(msg)
        value = D.dress_value(msg)
        d = self.inputs.dress.get(ch)
        if d is None:
            d = self.inputs.dress[ch] = {}
        d[key] = value
        if ch != self.first_in:
            self.heard(ch)
        if not self.dressing:
            self.worn_by_all[key] = value
            return E.on_channels(msg, self.pool.channels)
        chans = self.dressed_for(ch)
        for c in chans:
            self.worn[c][key] = value
        return E.on_channels(msg, chans)

    def domain(self, ch: int) -> int:
        # parts tuned together: each part is a pedal and controller domain of its own
        return ch if ch in self.part_pool else 0

    def channels_of(self, in_ch: int):
        if not self.part_pool:
            return None
        return self.part_pool.get(in_ch, self.first_part)

    def setup(self, t: float, tuning: Any) -> list[mido.Message]:
        out: list[mido.Message] = []
        for c in self.pool.channels:
            out += E.bend_range_rpn(c, self.range_cents, self.settings.whole_semitone_range)
        self.centre_pool(out)
        return out

    def zone(self, dom: int, msg: mido.Message) -> list[mido.Message]:
        if not self.part_pool:
            if D.dress_key(msg) is not None:
                return self.dress(msg)
            if self.dressing and msg.type == "aftertouch":
                return E.on_channels(msg, self.dressed_for(msg.channel))
        return E.on_channels(msg, self.channels_of(msg.channel) or self.pool.channels)

    def channel_mode(self, dom: int, msg: mido.Message) -> list[mido.Message]:
        if not self.part_pool and msg.control == E.CC_RESET_ALL_CONTROLLERS:
            ch = msg.channel
            if ch in self.inputs.dress:
                D.reset_all_controllers(self.inputs.dress[ch])
            if self.dressing:
                # the pedals are the pool's: the reset goes to every channel, and the
                # channels of the other parts get back the values it took from them
                out = E.on_channels(msg, self.pool.channels)
                dress = self.inputs.dress
                for c in self.pool.channels:
                    worn = self.worn[c]
                    D.reset_all_controllers(worn)
                    if self.wearer[c] != ch:
                        msgs, self.worn[c] = D.redress(c, worn, dress.get(self.wearer[c], {}))
                        out += msgs
                return out
            D.reset_all_controllers(self.worn_by_all)
        return E.on_channels(msg, self.channels_of(msg.channel) or self.pool.channels)

    def output_lost(self) -> None:
        super().output_lost()
        self.undress()

    def all_channels(self) -> list[int]:
        return list(self.pool.channels)

    def poly_pressure(self, msg: mido.Message, note) -> list[mido.Message]:
        if note is None:
            return []
        return [E.msg("polytouch", channel=note.out_ch, note=note.out_key, value=msg.value)]
