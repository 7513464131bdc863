"""The ``mpe`` output mode: MPE (MIDI Polyphonic Expression specification, The
MIDI Association, 2018).

Lower zone by default (manager channel 1, member channels 2..N+1), upper zone
(manager 16, members 15 downwards) selectable. At start the MPE Configuration
Message (RPN 6 on the manager, data entry MSB = member count), RPN 0 on the
members (48 semitones by default) and on the manager (2). Each note gets a
member channel of its own (pool rules, never shared) with its tuning bend;
polyphonic pressure becomes channel pressure on that member; sustain,
sostenuto, channel pressure, program change and other controllers go to the
manager channel. A steal of a pedalled note silences its member alone with
all-sound-off (the pedals live on the manager).

The player's wheel belongs to its part, and where it is sent depends on how many
parts the zone holds (one rule, for files and live alike):

* **A zone that holds one part** (a converted file gives each part a zone of its own;
  live, while only one input channel has played a note or moved its wheel into the
  zone): the wheel goes on the manager channel, at the manager's range (2 semitones by
  default, a step of 0.024 c); the MPE specification makes a manager-channel bend apply
  to every note of the zone. The members' bends carry the tuning alone, so a note sounds
  at tuning + wheel within half a member step plus half a manager step (0.31 c at the
  default ranges).
* **A zone shared by several parts** (live: a second input channel plays a note or moves
  its wheel in the zone), or a wheel beyond the manager's range: the zone switches, once,
  to per-note wheels: a wheel on input channel c bends only the notes that came from c,
  each in its own member's bend (tuning offset plus that channel's wheel at its own bend
  range, in whole bend steps), as the pool mode does
  (:mod:`retuner.engine.outputs.bend`), and the manager's bend goes back to centre. Notes
  keep their pitch across the switch within one member step; a debug line in the log
  says when it happens. The members' range (48 semitones by default) holds the tuning
  plus a wheel of up to 47 semitones at a step of 0.59 c; beyond that the members' range
  is widened like the pool's. A panic or a synth reset gives the zone back to the next
  part that plays.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass
from typing import Any, Optional

import mido

from retuner.midi import encode as E
from retuner.engine.outputs.base import config_error, effective_range
from retuner.engine.outputs.bend import BendMode, BendSettings

log = logging.getLogger(__name__)


@dataclass(frozen=True)
class MPESettings(BendSettings):
    manager: int = 0
    members: tuple[int, ...] = ()        # every member channel of the zone (RPN 0 goes to each)
    manager_range: float = 2.0           # semitones

    @classmethod
    def from_config(cls, cfg: Any) -> "MPESettings":
        members = tuple(cfg.mpe_member_channels())
        pas = set(cfg.passthrough)
        return cls(channels=tuple(c for c in members if c not in pas), bend_range=cfg.mpe_member_range,
                   release_time=cfg.release_time, bend_scale=cfg.bend_scale,
                   whole_semitone_range=cfg.whole_semitone_range, share_channels=False,
                   manager=cfg.mpe_manager(), members=members, manager_range=cfg.mpe_manager_range)


class MPEMode(BendMode):
    name = "mpe"
    summary = "MPE zone"
    settings_class = MPESettings
    pedals_apart = True
    zone_per_part = True
    bend_range_field = "mpe_member_range"

    @classmethod
    def check(cls, config: Any) -> None:
        if not [c for c in config.mpe_member_channels() if c not in config.passthrough]:
            raise config_error("no MPE member channel is left after the passthrough channels", "mpe_members")

    @classmethod
    def part_channels(cls, config: Any) -> list[int]:
        return list(config.mpe_member_channels())

    @classmethod
    def why_parts_apart(cls, split: bool) -> str:
        return ("in MPE each part has a zone and an engine of its own; to tune the parts as one "
                "harmony use pool mode, or --merge-parts (one zone, one instrument)")

    @classmethod
    def without_passthrough(cls, config: Any) -> Any:
        # the zone stops short of the passthrough channels only to keep drums out of it: a file
        # without drums gives the zone every channel (fewer ringing retunes)
        if config.mpe_members is None:
            return config.replace(mpe_members=15)
        return config

    def __init__(self, config: Any, inputs: Any, stats: dict):
        super().__init__(config, inputs, stats)
        self.manager = self.settings.manager
        self.members = list(self.settings.members)
        # the input channels that have played or moved a wheel in the zone; while there is one,
        # its wheel is on the manager channel, from the second on (``shared``) on the members
        self.parts: set[int] = set()
        self.shared = False

    def manager_range(self) -> float:
        s = self.settings
        return effective_range(s.manager_range, s.whole_semitone_range)

    def setup(self, t: float, tuning: Any) -> list[mido.Message]:
        s = self.settings
        out: list[mido.Message] = []
        out += E.mpe_configuration(self.manager, len(self.members))
        for c in self.members:
            out += E.bend_range_rpn(c, self.range_cents, s.whole_semitone_range)
        out += E.bend_range_rpn(self.manager, self.manager_range(), s.whole_semitone_range)
        self.centre_pool(out)
        self.centre_manager(out)
        return out

    def centre_manager(self, out: list) -> None:
        """The manager's bend at centre."""
        if self.sent[self.manager] != E.BEND_CENTRE:
            self.sent[self.manager] = E.BEND_CENTRE
            out.append(E.pitchwheel(self.manager, E.BEND_CENTRE))
            self.stats["bends_sent"] += 1

    def zone(self, dom: int, msg: mido.Message) -> list[mido.Message]:
        return [E.with_channel(msg, self.manager)]

    def all_channels(self) -> list[int]:
        return [self.manager] + list(self.members)

    def poly_pressure(self, msg: mido.Message, note) -> list[mido.Message]:
        if note is None:
            return []
        return [E.msg("aftertouch", channel=note.out_ch, value=msg.value)]

    # ------------------------------------------------------------------ the player's wheel
    def units_of(self, ch: int) -> int:
        # while the zone holds one part its wheel is on the manager: none in the members' bends
        return super().units_of(ch) if self.shared else 0

    def manager_value(self) -> Optional[int]:
        """The manager's bend carrying the one part's wheel (None: beyond the manager's range)."""
        if not self.parts:
            return E.BEND_CENTRE
        (ch,) = self.parts
        v = E.BEND_CENTRE + round(self.inputs.wheel_cents(ch) * 8192.0 / (self.manager_range() * self.scale))
        return v if 0 <= v <= 16383 else None

    def send_manager(self, t: float, out: list) -> None:
        """The manager's bend as the one part's wheel wants it (switching to per-note wheels
        when it is beyond the manager's range)."""
        v = self.manager_value()
        if v is None:
            self.share_zone(t, out, "its wheel goes beyond the manager channel's bend range")
        elif self.sent[self.manager] != v:
            self.sent[self.manager] = v
            out.append(E.pitchwheel(self.manager, v))
            self.stats["bends_sent"] += 1

    def joins(self, t: float, ch: int, out: list) -> None:
        """Input channel ``ch`` plays a note or moves its wheel in the zone."""
        if self.shared or ch in self.parts:
            return
        if not self.parts:
            self.parts.add(ch)
            return
        self.parts.add(ch)
        self.share_zone(t, out, f"a second input channel ({ch + 1}) plays in it")

    def share_zone(self, t: float, out: list, why: str) -> None:
        """From now on each part's wheel in its own notes' member bends; the manager centred."""
        self.shared = True
        log.debug("MPE zone shared: the player's wheel now goes in each note's member bend, the "
                  "manager channel back at centre (%s)", why)
        # each moved wheel reaches its notes' members as a wheel move would (widening the
        # members' range when it must)
        self.wheel_units = {}
        for ch, pitch in list(self.inputs.wheel.items()):
            BendMode.wheel(self, t, -1, E.msg("pitchwheel", channel=ch, pitch=pitch), out)
        self.centre_manager(out)

    def wheel(self, t: float, dom: int, msg: mido.Message, out: list) -> None:
        if not self.shared and (msg.pitch or msg.channel in self.parts):
            self.joins(t, msg.channel, out)
        if self.shared:
            super().wheel(t, dom, msg, out)
        elif msg.channel in self.parts:
            self.send_manager(t, out)

    def strike(self, t: float, note, c: int, kind: str, out: list) -> None:
        self.joins(t, note.in_ch, out)
        super().strike(t, note, c, kind, out)

    def controllers_reset(self, t: float, out: list) -> None:
        # reset-all-controllers reached every channel of the zone: the manager's bend is centred
        self.sent[self.manager] = E.BEND_CENTRE
        super().controllers_reset(t, out)
        if not self.shared:
            self.send_manager(t, out)

    def wheel_channels(self, channels) -> list[int]:
        # a zone that held one part carried its wheel on the manager channel
        return list(channels) if self.shared else [self.manager]

    def released(self) -> None:
        super().released()
        self.parts = set()
        self.shared = False

    def output_lost(self) -> None:
        super().output_lost()
        self.parts = set()
        self.shared = False

    # ------------------------------------------------------------------ steals explained
    steal_unit = "MPE zone's {} member channels"

    def more_channels(self, config: Any, shares_port: bool) -> list[str]:
        if shares_port:
            # the converter gives each of two parts in one file a zone of 7 members
            return ["--merge-parts (the file's parts share one zone of up to 15 member channels "
                    "instead of a zone of 7 each)"]
        if len(self.pool.channels) >= 15:
            return []
        wide = config.replace(mpe_members=15)
        if len([c for c in wide.mpe_member_channels() if c not in config.passthrough]) > len(self.pool.channels):
            return ["more member channels (--mpe-members 15)"]
        return ["more member channels (--mpe-members 15 --passthrough none, if no channel needs "
                "passing through)"]

    def sharing(self, config: Any) -> list[str]:
        # MPE gives every note a member of its own; the pool shares among notes of one bend
        if config.adaptive is not None:
            return []
        return ["pool mode (--mode pool), where notes of one bend share a channel"]

    # ------------------------------------------------------------------ settings
    def range_channels(self) -> list[int]:
        return list(self.members)

    def reconfigure_extra(self, config: Any, old: Any, range_changed: bool, out: list) -> None:
        if config.mpe_manager_range != old.mpe_manager_range or range_changed:
            out += E.bend_range_rpn(self.manager, self.manager_range(), config.whole_semitone_range)

    def reconfigure(self, config: Any, old: Any, t: float, out: list) -> None:
        super().reconfigure(config, old, t, out)
        if not self.shared:
            self.send_manager(t, out)        # the one part's wheel at the manager's (new) range
