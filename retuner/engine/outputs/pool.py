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
* Sustain (CC64) and sostenuto (CC66), channel pressure, program change and all
  other controllers go to every pool channel; omni/mono/poly mode messages
  (CC124-127) are not passed on (they would change how the pool channels play)
  but their all-notes-off effect is, as CC123.
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
        return E.on_channels(msg, self.channels_of(msg.channel) or self.pool.channels)

    def channel_mode(self, dom: int, msg: mido.Message) -> list[mido.Message]:
        return E.on_channels(msg, self.channels_of(msg.channel) or self.pool.channels)

    def all_channels(self) -> list[int]:
        return list(self.pool.channels)

    def poly_pressure(self, msg: mido.Message, note) -> list[mido.Message]:
        if note is None:
            return []
        return [E.msg("polytouch", channel=note.out_ch, note=note.out_key, value=msg.value)]
