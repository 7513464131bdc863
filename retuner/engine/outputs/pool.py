"""The ``pool`` output mode (the default): each note on a channel of the pool,
bent to its exact pitch (see :mod:`retuner.engine.outputs.bend` for what it shares
with MPE).

* The bend range is announced on every pool channel with RPN 0 (then RPN null)
  at start and whenever it changes.
* The pool is one instrument: the wheel and the pedals are those last sent on
  any retuned input channel (one domain), and channel mode messages
  (all-notes-off, all-sound-off, reset-all-controllers) from any retuned input
  channel act on the whole pool.
* Sustain (CC64) and sostenuto (CC66), channel pressure, program change and all
  other controllers go to every pool channel; omni/mono/poly mode messages
  (CC124-127) are not passed on (they would change how the pool channels play)
  but their all-notes-off effect is, as CC123.
* The **player's wheel** is added to every channel's tuning bend: an input bend
  ``w`` (signed, -8192..8191) means ``w / 8192 * wheel_range`` cents, i.e.
  ``round(w * wheel_range / (bend_range * bend_scale))`` output steps, and the
  sum is **clamped** to 0..16383 (a note already bent far by its tuning can then
  not follow the wheel all the way). Wheel changes are sent to busy and
  ringing channels; an idle channel gets the right value when next used.
* Static tunings: notes with the same bend share a channel (``share_channels``),
  one key never held twice on one channel.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import mido

from retuner.midi import encode as E
from retuner.engine.outputs.base import config_error
from retuner.engine.outputs.bend import BendMode, BendSettings


@dataclass(frozen=True)
class PoolSettings(BendSettings):
    @classmethod
    def from_config(cls, cfg: Any) -> "PoolSettings":
        return cls(channels=tuple(cfg.pool), bend_range=cfg.bend_range, release_time=cfg.release_time,
                   bend_scale=cfg.bend_scale, whole_semitone_range=cfg.whole_semitone_range,
                   share_channels=cfg.share_channels)


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

    def setup(self, t: float, tuning: Any) -> list[mido.Message]:
        out: list[mido.Message] = []
        for c in self.pool.channels:
            out += E.bend_range_rpn(c, self.range_cents, self.settings.whole_semitone_range)
        self.centre_pool(out)
        return out

    def zone(self, dom: int, msg: mido.Message) -> list[mido.Message]:
        return E.on_channels(msg, self.pool.channels)

    def all_channels(self) -> list[int]:
        return list(self.pool.channels)

    def poly_pressure(self, msg: mido.Message, note) -> list[mido.Message]:
        if note is None:
            return []
        return [E.msg("polytouch", channel=note.out_ch, note=note.out_key, value=msg.value)]

    # ------------------------------------------------------------------ the player's wheel
    def wheel_changed(self) -> None:
        w = self.inputs.wheel.get(0, 0)
        self.wheel_units = round(w * self.inputs.wheel_range / (self.range_cents * self.scale))

    def wheel(self, t: float, dom: int, msg: mido.Message, out: list) -> None:
        old = self.wheel_units
        self.wheel_changed()
        units = self.wheel_units
        if units == old:
            return
        pool = self.pool
        notes, last_off, bend, sent = pool.notes, pool.last_off, pool.bend, self.sent
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

    def controllers_reset(self, t: float, out: list) -> None:
        self.wheel_changed()
        for c in self.pool.channels:
            self.sent[c] = E.BEND_CENTRE
        self.resend_bends(t, out)
