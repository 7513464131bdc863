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

**Zones of their own.** File conversion in adaptive mode puts each part of a file in a
zone of its own and plays them all with one engine, so one solver tunes them as one
harmony (``EngineConfig.part_zones``: each part's manager and members). Two zones share a
port, the lower and the upper; a third part goes to a further port: output channel
``16 k + c`` is channel ``c`` of port ``k`` (the converter writes port k to the k-th file).
Each part is then a pedal and controller domain of its own: its program, bank, controllers,
pedals and channel pressure go to its zone's manager, a channel mode message (all notes off
and the like) to its zone's channels, its notes to its zone's members; each zone follows the
wheel rules below on its own.

The player's wheel belongs to its part, and where it is sent depends on how many
parts the zone holds (one rule, for files and live alike):

* **A zone that holds one part** (a converted file gives each part a zone of its own, with
  an engine per part or one engine for all; live, while only one input channel has played a note or moved its wheel into the
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
    #: parts of a file in zones of their own: ((input channel, manager, members, note channels), ...)
    zones: tuple = ()

    @classmethod
    def from_config(cls, cfg: Any) -> "MPESettings":
        pas = set(cfg.passthrough)
        common = dict(bend_range=cfg.mpe_member_range, release_time=cfg.release_time,
                      bend_scale=cfg.bend_scale, whole_semitone_range=cfg.whole_semitone_range,
                      share_channels=False, manager_range=cfg.mpe_manager_range)
        if cfg.part_zones:
            # a member that is a passthrough channel of its port (channel 16 k + c is channel c of
            # port k) is announced with the zone but plays no note
            zones = tuple((p, m, tuple(chs), tuple(c for c in chs if c % 16 not in pas))
                          for p, m, chs in cfg.part_zones)
            return cls(channels=tuple(c for z in zones for c in z[3]), manager=zones[0][1],
                       members=tuple(c for z in zones for c in z[2]), zones=zones, **common)
        members = tuple(cfg.mpe_member_channels())
        return cls(channels=tuple(c for c in members if c not in pas), manager=cfg.mpe_manager(),
                   members=members, **common)


class Zone:
    """One zone: its manager channel, its member channels (``channels``: those that take
    notes), and the input channels that have played or moved a wheel in it (``parts``; while
    there is one, its wheel is on the manager channel, from the second on, ``shared``, in the
    members' bends)."""

    __slots__ = ("manager", "members", "channels", "parts", "shared")

    def __init__(self, manager: int, members: tuple, channels: tuple):
        self.manager = manager
        self.members = members
        self.channels = channels
        self.parts: set[int] = set()
        self.shared = False

    def forget(self) -> None:
        self.parts = set()
        self.shared = False


class MPEMode(BendMode):
    name = "mpe"
    summary = "MPE zone"
    settings_class = MPESettings
    pedals_apart = True
    zone_per_part = True
    bend_range_field = "mpe_member_range"

    @classmethod
    def check(cls, config: Any) -> None:
        if config.part_zones:
            if not any(c % 16 not in config.passthrough for _, _, chs in config.part_zones for c in chs):
                raise config_error("no MPE member channel is left after the passthrough channels", "part_zones")
            return
        if not [c for c in config.mpe_member_channels() if c not in config.passthrough]:
            raise config_error("no MPE member channel is left after the passthrough channels", "mpe_members")

    @classmethod
    def part_channels(cls, config: Any) -> list[int]:
        return list(config.mpe_member_channels())

    @classmethod
    def channels_of_part(cls, config: Any, part: int) -> list[int]:
        for p, _, chs in config.part_zones:
            if p == part:
                return list(chs)
        if config.part_zones:       # a channel that plays no note of its own goes with the first zone
            return list(config.part_zones[0][2])
        return cls.part_channels(config)

    @classmethod
    def without_passthrough(cls, config: Any) -> Any:
        # the zone stops short of the passthrough channels only to keep drums out of it: a file
        # without drums gives the zone every channel (fewer ringing retunes)
        if config.mpe_members is None:
            return config.replace(mpe_members=15)
        return config

    def __init__(self, config: Any, inputs: Any, stats: dict):
        super().__init__(config, inputs, stats)
        s = self.settings
        if s.zones:
            self.zones = [Zone(m, members, chans) for _, m, members, chans in s.zones]
            self.zone_of_part = {z[0]: zone for z, zone in zip(s.zones, self.zones)}
        else:
            self.zones = [Zone(s.manager, s.members, s.channels)]
            self.zone_of_part = {}
        self.manager = self.zones[0].manager    # (the one zone's, when the zone holds every part)

    def zone_of(self, ch: int) -> Zone:
        """The zone of input channel ``ch`` (a channel that plays no note of its own goes with
        the first zone)."""
        return self.zone_of_part.get(ch, self.zones[0])

    def manager_range(self) -> float:
        s = self.settings
        return effective_range(s.manager_range, s.whole_semitone_range)

    def setup(self, t: float, tuning: Any) -> list[mido.Message]:
        s = self.settings
        out: list[mido.Message] = []
        for z in self.zones:
            out += E.mpe_configuration(z.manager, len(z.members))
            for c in z.members:
                out += E.bend_range_rpn(c, self.range_cents, s.whole_semitone_range)
            out += E.bend_range_rpn(z.manager, self.manager_range(), s.whole_semitone_range)
        self.centre_pool(out)
        for z in self.zones:
            self.centre_manager(z, out)
        return out

    def centre_manager(self, z: Zone, out: list) -> None:
        """The manager's bend at centre."""
        if self.sent[z.manager] != E.BEND_CENTRE:
            self.sent[z.manager] = E.BEND_CENTRE
            out.append(E.pitchwheel(z.manager, E.BEND_CENTRE))
            self.stats["bends_sent"] += 1

    def domain(self, ch: int) -> int:
        # parts in zones of their own: each part is a pedal and controller domain of its own
        return ch if ch in self.zone_of_part else 0

    def channels_of(self, in_ch: int):
        if not self.zone_of_part:
            return None
        return self.zone_of(in_ch).channels

    def zone(self, dom: int, msg: mido.Message) -> list[mido.Message]:
        return [E.with_channel(msg, self.zone_of(dom).manager)]

    def channel_mode(self, dom: int, msg: mido.Message) -> list[mido.Message]:
        z = self.zone_of(dom)
        return E.on_channels(msg, [z.manager] + list(z.members))

    def all_channels(self) -> list[int]:
        return [c for z in self.zones for c in (z.manager,) + tuple(z.members)]

    def poly_pressure(self, msg: mido.Message, note) -> list[mido.Message]:
        if note is None:
            return []
        return [E.msg("aftertouch", channel=note.out_ch, value=msg.value)]

    # ------------------------------------------------------------------ the player's wheel
    def units_of(self, ch: int) -> int:
        # while the zone holds one part its wheel is on the manager: none in the members' bends
        return super().units_of(ch) if self.zone_of(ch).shared else 0

    def manager_value(self, z: Zone) -> Optional[int]:
        """The manager's bend carrying the one part's wheel (None: beyond the manager's range)."""
        if not z.parts:
            return E.BEND_CENTRE
        (ch,) = z.parts
        v = E.BEND_CENTRE + round(self.inputs.wheel_cents(ch) * 8192.0 / (self.manager_range() * self.scale))
        return v if 0 <= v <= 16383 else None

    def send_manager(self, t: float, z: Zone, out: list) -> None:
        """The manager's bend as the one part's wheel wants it (switching to per-note wheels
        when it is beyond the manager's range)."""
        v = self.manager_value(z)
        if v is None:
            self.share_zone(t, z, out, "its wheel goes beyond the manager channel's bend range")
        elif self.sent[z.manager] != v:
            self.sent[z.manager] = v
            out.append(E.pitchwheel(z.manager, v))
            self.stats["bends_sent"] += 1

    def joins(self, t: float, ch: int, out: list) -> None:
        """Input channel ``ch`` plays a note or moves its wheel in its zone."""
        z = self.zone_of(ch)
        if z.shared or ch in z.parts:
            return
        z.parts.add(ch)
        if len(z.parts) > 1:
            self.share_zone(t, z, out, f"a second input channel ({ch + 1}) plays in it")

    def share_zone(self, t: float, z: Zone, out: list, why: str) -> None:
        """From now on each part's wheel in its own notes' member bends; the manager centred."""
        z.shared = True
        log.debug("MPE zone shared: the player's wheel now goes in each note's member bend, the "
                  "manager channel back at centre (%s)", why)
        # each moved wheel of the zone reaches its notes' members as a wheel move would (widening
        # the members' range when it must)
        for ch, pitch in list(self.inputs.wheel.items()):
            if self.zone_of(ch) is z:
                self.wheel_units.pop(ch, None)
                BendMode.wheel(self, t, -1, E.msg("pitchwheel", channel=ch, pitch=pitch), out)
        self.centre_manager(z, out)

    def wheel(self, t: float, dom: int, msg: mido.Message, out: list) -> None:
        z = self.zone_of(msg.channel)
        if not z.shared and (msg.pitch or msg.channel in z.parts):
            self.joins(t, msg.channel, out)
        if z.shared:
            super().wheel(t, dom, msg, out)
        elif msg.channel in z.parts:
            self.send_manager(t, z, out)

    def strike(self, t: float, note, c: int, kind: str, out: list) -> None:
        self.joins(t, note.in_ch, out)
        super().strike(t, note, c, kind, out)

    def controllers_reset(self, t: float, out: list) -> None:
        # reset-all-controllers reached every channel of the zone: the manager's bend is centred
        for z in self.zones:
            self.sent[z.manager] = E.BEND_CENTRE
        super().controllers_reset(t, out)
        for z in self.zones:
            if not z.shared:
                self.send_manager(t, z, out)

    def wheel_channels(self, channels) -> list[int]:
        # a zone that held one part carried its wheel on the manager channel
        chans = list(channels)
        for z in self.zones:
            if chans and chans[0] in z.members:
                return chans if z.shared else [z.manager]
        return chans

    def released(self) -> None:
        super().released()
        for z in self.zones:
            z.forget()

    def output_lost(self) -> None:
        super().output_lost()
        for z in self.zones:
            z.forget()

    # ------------------------------------------------------------------ steals explained
    steal_unit = "MPE zone's {} member channels"

    def steal_channels(self) -> int:
        # parts in zones of their own: a note is stolen within its zone
        return max(len(z.channels) for z in self.zones)

    def more_channels(self, config: Any, shares_port: bool) -> list[str]:
        if shares_port or len(self.zones) > 1:
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
        # every member of every zone (zones of their own: each part's)
        return [c for z in self.zones for c in z.members]

    def reconfigure_extra(self, config: Any, old: Any, range_changed: bool, out: list) -> None:
        if config.mpe_manager_range != old.mpe_manager_range or range_changed:
            for z in self.zones:
                out += E.bend_range_rpn(z.manager, self.manager_range(), config.whole_semitone_range)

    def reconfigure(self, config: Any, old: Any, t: float, out: list) -> None:
        super().reconfigure(config, old, t, out)
        for z in self.zones:
            if not z.shared:
                self.send_manager(t, z, out)     # the one part's wheel at the manager's (new) range
