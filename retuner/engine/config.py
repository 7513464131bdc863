"""Every engine setting with its default, and its validation.

The user-facing config keys (``engine:`` in the config file, the command line's
options) are these fields; each output mode builds its own settings from them
(:mod:`retuner.engine.outputs`). Channels are 0-based here.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass
from typing import Any, Optional

from retuner.engine.outputs import MODES
from retuner.errors import RetunerError

DEFAULT_POOL = tuple(c for c in range(16) if c != 9)


@dataclass
class EngineConfig:
    """Every engine setting with its default. Channels are 0-based."""

    mode: str = "pool"                       # a name in retuner.engine.outputs.MODES
    # bend pool
    pool: tuple[int, ...] = DEFAULT_POOL     # output channels (default: all but channel 10)
    passthrough: tuple[int, ...] = (9,)      # input channels passed through untouched
    bend_range: float = 2.0                  # semitones, announced with RPN 0
    wheel_range: float = 2.0                 # semitones the player's wheel is assumed to span
    release_time: float = 2.0                # seconds a channel rings after its last note
    bend_scale: float = 1.0                  # synth correction: played / specified bend size
    whole_semitone_range: bool = False       # synth ignores CC38: whole semitones only
    share_channels: bool = True              # static tunings: notes with the same bend share
    # parts of a file tuned together: ((input channel, (output channels, ...)), ...); each part
    # sounds only on its own pool channels (its program and controllers) and is a pedal domain
    # of its own; empty: the pool is one instrument. Set by file conversion, not a user setting
    parts: tuple = dataclasses.field(default=(), metadata={"user_setting": False})
    # parts of a file tuned together in MPE: ((input channel, manager, (member channels, ...)), ...);
    # each part in a zone of its own (its program, controllers, pedals and wheel on the manager, its
    # notes on the members) and a pedal domain of its own. Output channel 16 * k + c is channel c of
    # the k-th output file (a port holds two zones). Set by file conversion, not a user setting
    part_zones: tuple = dataclasses.field(default=(), metadata={"user_setting": False})
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
        if isinstance(self.parts, dict):
            self.parts = tuple(sorted(self.parts.items()))
        self.parts = tuple((int(p), tuple(chs)) for p, chs in self.parts)
        self.part_zones = tuple((int(p), int(m), tuple(chs)) for p, m, chs in self.part_zones)

    def validate(self) -> "EngineConfig":
        def bad(msg: str, fld: str) -> RetunerError:
            return RetunerError(msg, field=fld)

        mode = MODES.get(self.mode) if isinstance(self.mode, str) else None
        if mode is None:
            raise bad(f"unknown mode {self.mode!r} (one of {', '.join(MODES)})", "mode")
        for name in ("pool", "passthrough"):
            chans = getattr(self, name)
            # parts of a file tuned together may span output files: channel 16 k + c of the pool
            # is channel c of the k-th file (set by file conversion only)
            top = 16 * 16 - 1 if name == "pool" and self.parts else 15
            for c in chans:
                if not isinstance(c, int) or not 0 <= c <= top:
                    raise bad(f"channel {c!r} is not a MIDI channel", name)
            if len(set(chans)) != len(chans):
                raise bad("a channel is listed twice", name)
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
        for name in ("mts_device", "mts_program"):
            v = getattr(self, name)
            if not isinstance(v, int) or not 0 <= v <= 127:
                raise bad("must be 0..127", name)
        if self.mts_bank is not None and (not isinstance(self.mts_bank, int) or not 0 <= self.mts_bank <= 127):
            raise bad("must be 0..127 or empty", "mts_bank")
        seen: set = set()
        for p, chs in self.parts:
            if not 0 <= p <= 15 or not chs or not set(chs) <= set(self.pool) or seen & set(chs):
                raise bad(f"part {p + 1}: its channels must be pool channels no other part has", "parts")
            seen |= set(chs)
        seen = set()
        for p, manager, chs in self.part_zones:
            port = manager // 16
            if (not 0 <= p <= 15 or manager < 0 or manager % 16 not in (0, 15) or not 1 <= len(chs) <= 15
                    or any(c // 16 != port or c == manager for c in chs) or seen & {manager, *chs}):
                raise bad(f"part {p + 1}: its zone needs a manager channel (1 or 16) and member channels "
                          f"of the same port that no other zone has", "part_zones")
            seen |= {manager, *chs}
        mode.check(self)
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
