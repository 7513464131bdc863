"""Engine options shared by ``retuner run`` and ``retuner convert``: one name, one meaning.

Every option defaults to None (not given), so a config file's value stays unless the
option overrides it. :func:`engine_overrides` returns the given options as user-facing
engine settings (the fields of :class:`retuner.engine.core.EngineConfig`, channels 1..16),
the same form as the ``engine:`` section of the config file, checked by
:func:`retuner.live.config.check_engine_settings`.
"""

from __future__ import annotations

import argparse
from fractions import Fraction
from typing import Any

from retuner.engine.outputs import MODES
from retuner.commands._common import add_old_name
from retuner.units import DURATION_HELP, seconds_of

ADAPTIVE_OPTIONS = ("policy", "chord_window", "attack_time", "max_drift", "max_motion", "limit", "centre")


def channel_list(text: str) -> list[int]:
    """'1-9,11-16' -> [1..9, 11..16] (channels as the user sees them, 1..16); 'none' -> []."""
    if text.strip().lower() in ("", "none"):
        return []
    out: list[int] = []
    try:
        for part in text.split(","):
            part = part.strip()
            if not part:
                continue
            if "-" in part:
                a, b = part.split("-", 1)
                out.extend(range(int(a), int(b) + 1))
            else:
                out.append(int(part))
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a channel list: {text!r} (e.g. 1-9,11-16)") from None
    if any(not 1 <= c <= 16 for c in out):
        raise argparse.ArgumentTypeError("channels are 1..16, e.g. 1-9,11-16")
    return out


def number(text: str) -> float:
    """A number or a fraction such as 127/128."""
    try:
        return float(Fraction(text.strip()))
    except (ValueError, ZeroDivisionError):
        raise argparse.ArgumentTypeError(f"expected a number or a fraction like 127/128, got {text!r}") from None


def duration(text: str) -> float:
    """A duration as the config file takes it: seconds, or a number with its unit ('30 ms')."""
    v = seconds_of(text.strip())
    if v is None:
        try:
            v = float(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{DURATION_HELP}, got {text!r}") from None
    return float(v)


def _byte(text: str) -> int:
    try:
        v = int(text, 0)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number 0..127, got {text!r}") from None
    if not 0 <= v <= 127:
        raise argparse.ArgumentTypeError(f"expected a number 0..127, got {v}")
    return v


def add_engine_arguments(parser: argparse.ArgumentParser) -> None:
    g = parser.add_argument_group("engine")
    g.add_argument("--mode", choices=tuple(MODES),
                   help="; ".join(f"{name}: {mode.summary}" for name, mode in MODES.items()))
    g.add_argument("--pool", type=channel_list, metavar="LIST",
                   help="pool channels, e.g. 1-9,11-16 (default: all but the passthrough channels)")
    g.add_argument("--passthrough", type=channel_list, metavar="LIST",
                   help="input channels passed through untouched, e.g. drums (default 10; 'none')")
    g.add_argument("--bend-range", type=number, metavar="SEMITONES",
                   help="pitch bend range announced with RPN 0 (default 2; MPE members: 48)")
    g.add_argument("--release-time", type=duration, metavar="DURATION",
                   help="a channel rings this long after its last note-off (seconds, or with a unit "
                        "as '500 ms'; default 2)")
    g.add_argument("--bend-scale", type=number, metavar="FACTOR",
                   help="synth correction: the synth plays a bend at FACTOR of its specified size "
                        "(e.g. 127/128 for FluidSynth)")
    g.add_argument("--whole-semitone-range", action="store_true", default=None,
                   help="synth correction: the synth ignores the cents part of the bend range")
    add_old_name(g, "--whole-semitones", "--whole-semitone-range", "whole_semitone_range", flag=True)
    g.add_argument("--mpe-zone", choices=("lower", "upper"),
                   help="MPE zone: lower (manager channel 1, default) or upper (manager 16)")
    g.add_argument("--mpe-members", type=int, metavar="N",
                   help="MPE member channels (default: up to the first passthrough channel)")
    g.add_argument("--mts-device", type=_byte, metavar="ID",
                   help="MTS device ID 0..127 (default 127 = all devices)")
    g.add_argument("--mts-program", type=_byte, metavar="N", help="MTS tuning program 0..127 (default 0)")
    g.add_argument("--mts-bank", type=_byte, metavar="N",
                   help="MTS tuning bank 0..127: use the bank form of the single note tuning change")
    g.add_argument("--mts-realtime", action=argparse.BooleanOptionalAction, default=None,
                   help="MTS: the real-time form of the single note tuning change (default); "
                        "--no-mts-realtime: the non-real-time form (changes reach new notes only)")
    add_old_name(g, "--mts-non-realtime", "--no-mts-realtime", "mts_realtime", flag=False)
    a = parser.add_argument_group("adaptive just intonation")
    a.add_argument("--adaptive", action="store_true", default=None,
                   help="tune every chord justly as it is played, re-centring towards 12-EDO (see --centre)")
    a.add_argument("--policy", help="how sounding notes may move: fixed-held, limited or free, "
                                    "optionally +reset (default limited+reset)")
    a.add_argument("--attack-time", type=duration, metavar="DURATION",
                   help="notes sound at once; while a note is this young it is retuned as the rest "
                        "of its chord arrives (seconds, or with a unit as '40 ms'; default 40 ms)")
    a.add_argument("--chord-window", type=duration, metavar="DURATION",
                   help="instead: wait this long for the rest of a chord before sounding it "
                        "(adds this much latency; seconds, or with a unit as '20 ms'; default 0 = no "
                        "window)")
    a.add_argument("--max-drift", type=number, metavar="CENTS",
                   help="largest distance of the centre from where it is pulled to (default 4.8)")
    a.add_argument("--max-motion", type=number, metavar="CENTS", help="largest move of a held note per chord (default 6)")
    a.add_argument("--limit", choices=("5", "7"), help="5-limit (default) or 7-limit table of just intervals")
    a.add_argument("--centre", choices=("edo12", "profile"),
                   help="what the centre is pulled to: 12-EDO at the profile's concert pitch (default) "
                        "or the profile itself")


# engine setting -> the option that sets it (for error messages)
OPTION_OF = {"pool": "--pool", "passthrough": "--passthrough", "bend_range": "--bend-range",
             "mpe_member_range": "--bend-range", "whole_semitone_range": "--whole-semitone-range",
             "mts_device": "--mts-device", "mts_realtime": "--mts-realtime", "adaptive": "--adaptive"}


def engine_overrides(args: Any, adaptive_in_force: Any = None) -> dict[str, Any]:
    """The engine options given on the command line, as user-facing engine settings.

    ``adaptive_in_force``: the adaptive settings already in force (a config file's), which
    adaptive options given without ``--adaptive`` then change; with none in force, such options
    are a mistake."""
    eng: dict[str, Any] = {}
    simple = {"mode": "mode", "pool": "pool", "passthrough": "passthrough",
              "release_time": "release_time", "bend_scale": "bend_scale",
              "whole_semitone_range": "whole_semitone_range", "mpe_zone": "mpe_zone",
              "mpe_members": "mpe_members", "mts_device": "mts_device",
              "mts_program": "mts_program", "mts_bank": "mts_bank", "mts_realtime": "mts_realtime"}
    for opt, fld in simple.items():
        v = getattr(args, opt, None)
        if v is not None:
            eng[fld] = v
    if getattr(args, "bend_range", None) is not None:
        mode = MODES.get(getattr(args, "mode", None))
        eng[mode.bend_range_field if mode else "bend_range"] = args.bend_range
    if "passthrough" in eng and "pool" not in eng:
        eng["pool"] = [c for c in range(1, 17) if c not in eng["passthrough"]]
    adaptive = {k: getattr(args, k) for k in ADAPTIVE_OPTIONS if getattr(args, k, None) is not None}
    if getattr(args, "adaptive", None) or (adaptive and adaptive_in_force is not None):
        eng["adaptive"] = {**dict(adaptive_in_force or {}), **adaptive}
    elif adaptive:
        from retuner.errors import RetunerError
        raise RetunerError("adaptive settings need --adaptive", field="--" + next(iter(adaptive)).replace("_", "-"))
    return eng


def option_for_field(field: str) -> str:
    """The command-line option that sets an engine setting named in an error
    ('engine.release_time' -> '--release-time', 'engine.adaptive.policy' -> '--policy')."""
    fld = field[len("engine."):] if field.startswith("engine.") else field
    head, _, rest = fld.partition(".")
    if head == "adaptive" and rest:
        return "--" + rest.replace("_", "-")
    return OPTION_OF.get(fld, "--" + fld.replace("_", "-"))


def build_engine_config(eng: dict[str, Any]):
    """An EngineConfig from user-facing settings given as options; errors name the option."""
    from retuner.live.config import Settings, check_engine_settings, engine_config
    from retuner.errors import RetunerError
    try:
        return engine_config(Settings(engine=check_engine_settings(eng, prefix="")))
    except RetunerError as exc:
        if exc.field:
            exc.field = option_for_field(exc.field)
        raise
