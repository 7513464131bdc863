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

The player's wheel belongs to its part: a wheel on input channel c bends only
the notes that came from c, each in its own member's bend (tuning offset plus
that channel's wheel at its own bend range, in whole bend steps), as the
pool mode does (:mod:`retuner.engine.outputs.bend`). The manager channel's bend
stays centred, whatever the number of input channels: one rule, nothing to
switch when a second part starts, and the members' range (48 semitones by
default) holds the tuning plus a wheel of up to 47 semitones at a step of
0.59 c; beyond that the members' range is widened like the pool's.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import mido

from retuner.midi import encode as E
from retuner.engine.outputs.base import config_error, effective_range
from retuner.engine.outputs.bend import BendMode, BendSettings


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
        """The manager's bend at centre: the wheel is in the members' bends."""
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
    def controllers_reset(self, t: float, out: list) -> None:
        self.sent[self.manager] = E.BEND_CENTRE
        super().controllers_reset(t, out)

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
