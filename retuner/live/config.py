"""The daemon's configuration: a YAML file, built-in defaults, and command-line overrides.

The file is ``--config FILE``, else ``$XDG_CONFIG_HOME/retuner/config.yaml``
(``~/.config/retuner/config.yaml``) when it exists, else nothing (built-in
defaults). Every field is optional::

    profile: werckmeister-3        # the tuning to start with (id or path to a profile file)
    profile_dirs: [~/tunings]      # more folders to look for profiles in
    backend: auto                  # auto (ALSA sequencer, else a running JACK server), alsa or jack
    input: "Digital Piano"         # port to read from: exact name, part of it, or a shell pattern
    output: "FLUID*"               # port to write to; a side without a name gets a port of our own
    virtual: false                 # true: always create our own ports ("retuner:in", "retuner:out")
    client_name: retuner           # base of our client names
    engine:                        # engine settings (see 'retuner run --help' and the engine's docs)
      mode: pool
      ...
    profiles: [edo12, meantone-quarter, werckmeister-3]   # program change N (1-based) selects the N-th
    switch:
      channel: 16                  # switching channel (1..16) for program change and the A/B toggle; null = off
      ab_cc: 80                    # this CC (value >= 64) toggles between the two profiles of 'ab'; null = off
      ab: [meantone-quarter, edo12]
    status_interval: 600           # seconds between status lines; 0 = none. Every duration is a
                                   # number of seconds or has its unit: 10 min, 600 s, 250 ms, 1 h
    port_poll: 0.5                 # seconds between looks for lost/returned ports
    setup_refresh: 1               # our own output port: send the setup (bend range...) again
                                   # before a note-on after this many quiet seconds with nothing
                                   # sounding or ringing, for a synth connected after the start; 0 = never
    log_level: info                # debug, info, warning, error
    panic_all_sound_off: false     # panic also sends All Sound Off (CC120) on every channel, which
                                   # cuts release tails and reverb at once; pedals up and All Notes
                                   # Off (CC64/CC66 = 0, CC123) are always sent
    control:                       # the control socket (JSON lines; see retuner.control.protocol)
      enabled: true
      socket: null                 # its path; default $XDG_RUNTIME_DIR/retuner/control.sock

Channels are 1..16 here, as a user sees them. Errors are one line naming the
file, the line and the field (exit status 2 from the command line).
"""

from __future__ import annotations

import copy
import dataclasses
import enum
import os
import time
import types
import typing
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Optional

from retuner.adaptive.settings import ADAPTIVE_DURATIONS, ADAPTIVE_FIELD_OF, ADAPTIVE_KEY_OF, adaptive_error, adaptive_fields
from retuner.engine.outputs import MODES
from retuner.errors import RetunerError
from retuner.profiles.document import kind_of
from retuner.units import DURATION_HELP, seconds_of

LOG_LEVELS = ("debug", "info", "warning", "error")


def default_config_path() -> Path:
    base = os.environ.get("XDG_CONFIG_HOME") or os.path.join(os.path.expanduser("~"), ".config")
    return Path(base) / "retuner" / "config.yaml"


@dataclass
class Switching:
    channel: Optional[int] = None            # 1..16 or None
    ab_cc: Optional[int] = None              # 0..127 or None
    ab: Optional[tuple[str, str]] = None


@dataclass
class ControlSettings:
    enabled: bool = True
    path: Optional[str] = None               # the config key "socket"


@dataclass
class Settings:
    """Everything ``retuner run`` needs, after file + defaults + flags."""

    source: Optional[str] = None             # the config file read, if any
    profile: str = "edo12"
    profile_dirs: list[str] = field(default_factory=list)
    backend: str = "auto"
    input: Optional[str] = None
    output: Optional[str] = None
    virtual: bool = False
    client_name: str = "retuner"
    engine: dict[str, Any] = field(default_factory=dict)   # user-facing values (channels 1-based)
    profiles: list[str] = field(default_factory=list)
    switch: Switching = field(default_factory=Switching)
    status_interval: float = 600.0           # seconds
    port_poll: float = 0.5                   # seconds
    setup_refresh: float = 1.0               # seconds; 0 = never (see the module doc)
    log_level: str = "info"
    panic_all_sound_off: bool = False        # see the module doc
    control: ControlSettings = field(default_factory=ControlSettings)
    lines: dict[str, int] = field(default_factory=dict, compare=False, repr=False)  # field -> line in source
    notes: list[str] = field(default_factory=list, compare=False, repr=False)  # warnings (old names)

    def copy(self) -> "Settings":
        return copy.deepcopy(self)


# --------------------------------------------------------------------------- checking
class _Where:
    def __init__(self, filename: str, notes: Optional[list] = None):
        self.filename = filename
        self.notes = notes          # where warnings about old names go (None: nowhere)

    def err(self, msg: str, fld: str, mapping: Any = None, key: Any = None) -> RetunerError:
        line = None
        lines = getattr(mapping, "lines", None)
        if lines is not None:
            line = lines.get(key, getattr(mapping, "line", None)) if key is not None else getattr(mapping, "line", None)
        return RetunerError(msg, file=self.filename, line=line, field=fld)


def _str(v, w, fld, m, k, allow_none=False):
    if v is None and allow_none:
        return None
    if not isinstance(v, str) or not v.strip():
        raise w.err(f"expected text, got {kind_of(v)}", fld, m, k)
    return v


def _bool(v, w, fld, m, k):
    if not isinstance(v, bool):
        raise w.err(f"expected true or false, got {v!r}", fld, m, k)
    return v


def _int(v, w, fld, m, k, lo, hi, allow_none=False):
    if v is None and allow_none:
        return None
    if isinstance(v, bool) or not isinstance(v, int):
        raise w.err(f"expected a whole number, got {kind_of(v)} {v!r}", fld, m, k)
    if not lo <= v <= hi:
        raise w.err(f"must be between {lo} and {hi}, got {v}", fld, m, k)
    return v


def _num(v, w, fld, m, k, lo, hi):
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        raise w.err(f"expected a number, got {kind_of(v)} {v!r}", fld, m, k)
    if not lo <= v <= hi:
        raise w.err(f"must be between {lo} and {hi}, got {v}", fld, m, k)
    return float(v)


#: the units a duration in the config may carry; a bare number is seconds (one rule for every
#: duration: status_interval, port_poll, setup_refresh, engine.release_time, and the adaptive
#: chord_window and attack_time)
#: durations among the engine's settings and the adaptive settings
ENGINE_DURATIONS = {"release_time"}
#: status_interval counted minutes before it counted seconds: a bare number below this gets a warning
OLD_MINUTES_BELOW = 60


def duration_seconds(v, w, fld, m, k):
    """A duration as written in the config: a number of seconds, or a number with its unit
    ('10 min', '600 s', '30 ms', '1 h'). Returns seconds (still a number to be range-checked)."""
    secs = seconds_of(v)
    if secs is None:
        raise w.err(f"{DURATION_HELP}, got {v!r}", fld, m, k)
    return secs


def _seconds(v, w, fld, m, k, lo, hi):
    secs = duration_seconds(v, w, fld, m, k)
    if isinstance(secs, bool) or not isinstance(secs, (int, float)):
        raise w.err(f"expected seconds, or a number with its unit such as '10 min', got {kind_of(v)} {v!r}",
                    fld, m, k)
    if not lo <= secs <= hi:
        raise w.err(f"must be between {lo:g} and {hi:g} seconds, got {v!r}", fld, m, k)
    return float(secs)


def _str_list(v, w, fld, m, k):
    if not isinstance(v, list) or not all(isinstance(x, str) and x for x in v):
        raise w.err("expected a list of names", fld, m, k)
    return list(v)


def _mapping(v, w, fld, m, k):
    if not isinstance(v, dict):
        raise w.err(f"expected a mapping, got {kind_of(v)}", fld, m, k)
    return v


def _unknown(sub, allowed, w, prefix):
    for k in sub:
        if k not in allowed:
            raise w.err(f"unknown field (expected one of: {', '.join(sorted(allowed))})",
                        f"{prefix}{k}", sub, k)


TOP_FIELDS = {"profile", "profile_dirs", "backend", "input", "output", "virtual", "client_name",
              "engine", "mode", "profiles", "switch", "status_interval", "port_poll", "log_level",
              "control", "setup_refresh", "panic_all_sound_off"}


def parse_config(text: str, filename: str = "<config>", base: Optional[Settings] = None) -> Settings:
    """Parse and check a config file's text; fields not given keep ``base``'s (default: built-in) values."""
    from retuner.profiles.profile import load_yaml
    from retuner.live import ports

    data = load_yaml(text, filename)
    s = (base or Settings()).copy()
    s.source = filename
    s.notes = []
    w = _Where(filename, s.notes)
    if data is None:
        return s
    if not isinstance(data, dict):
        raise RetunerError("the config must be a mapping of fields", file=filename, line=1)
    _unknown(data, TOP_FIELDS, w, "")
    d = data
    s.lines = dict(getattr(d, "lines", {}))
    if "profile" in d:
        s.profile = _str(d["profile"], w, "profile", d, "profile")
    if "profile_dirs" in d:
        s.profile_dirs = [os.path.expanduser(p) for p in _str_list(d["profile_dirs"], w, "profile_dirs", d, "profile_dirs")]
        for p in s.profile_dirs:
            if not os.path.isdir(p):
                raise w.err(f"not a folder: {p}", "profile_dirs", d, "profile_dirs")
    if "backend" in d:
        b = _str(d["backend"], w, "backend", d, "backend")
        try:
            s.backend = ports.backend_word(b)
        except RetunerError as exc:
            raise w.err(exc.message, "backend", d, "backend") from None
    for k in ("input", "output"):
        if k in d:
            setattr(s, k, _str(d[k], w, k, d, k, allow_none=True))
    if "virtual" in d:
        s.virtual = _bool(d["virtual"], w, "virtual", d, "virtual")
    if "client_name" in d:
        s.client_name = _str(d["client_name"], w, "client_name", d, "client_name")
    if "engine" in d:
        eng = _mapping(d["engine"], w, "engine", d, "engine")
        s.engine = dict(s.engine)
        s.engine.update(check_engine_settings(eng, w))
    if "mode" in d:
        s.engine = dict(s.engine)
        s.engine.update(check_engine_settings({"mode": d["mode"]}, w, mapping=d, prefix=""))
    if "profiles" in d:
        s.profiles = _str_list(d["profiles"], w, "profiles", d, "profiles")
        if len(s.profiles) > 128:
            raise w.err("at most 128 profiles (one per program number)", "profiles", d, "profiles")
    if "switch" in d:
        sw = _mapping(d["switch"], w, "switch", d, "switch")
        _unknown(sw, {"channel", "ab_cc", "ab"}, w, "switch.")
        s.switch = dataclasses.replace(s.switch)
        if "channel" in sw:
            s.switch.channel = _int(sw["channel"], w, "switch.channel", sw, "channel", 1, 16, allow_none=True)
        if "ab_cc" in sw:
            s.switch.ab_cc = _int(sw["ab_cc"], w, "switch.ab_cc", sw, "ab_cc", 0, 127, allow_none=True)
        if "ab" in sw:
            if sw["ab"] is None:
                s.switch.ab = None
            else:
                ab = _str_list(sw["ab"], w, "switch.ab", sw, "ab")
                if len(ab) != 2:
                    raise w.err(f"expected two profiles, got {len(ab)}", "switch.ab", sw, "ab")
                s.switch.ab = (ab[0], ab[1])
    if "status_interval" in d:
        v = d["status_interval"]
        s.status_interval = _seconds(v, w, "status_interval", d, "status_interval", 0, 24 * 3600)
        if not isinstance(v, str) and 0 < s.status_interval < OLD_MINUTES_BELOW:
            # it counted minutes before: a file written then would now print ten times a minute
            s.notes.append(_note(filename, d, "status_interval",
                                 f"status_interval: {v:g} is {v:g} seconds (it counted minutes before); "
                                 f"write '{v:g} min' for minutes, or '{v:g} s' to keep seconds without this warning"))
    if "port_poll" in d:
        s.port_poll = _seconds(d["port_poll"], w, "port_poll", d, "port_poll", 0.05, 60)
    if "setup_refresh" in d:
        s.setup_refresh = _seconds(d["setup_refresh"], w, "setup_refresh", d, "setup_refresh", 0, 3600)
    if "panic_all_sound_off" in d:
        s.panic_all_sound_off = _bool(d["panic_all_sound_off"], w, "panic_all_sound_off", d, "panic_all_sound_off")
    if "log_level" in d:
        lv = _str(d["log_level"], w, "log_level", d, "log_level")
        if lv not in LOG_LEVELS:
            raise w.err(f"expected one of {', '.join(LOG_LEVELS)}, got {lv!r}", "log_level", d, "log_level")
        s.log_level = lv
    if "control" in d:
        c = _mapping(d["control"], w, "control", d, "control")
        _unknown(c, {"enabled", "socket", "path"}, w, "control.")
        s.control = dataclasses.replace(s.control)
        if "enabled" in c:
            s.control.enabled = _bool(c["enabled"], w, "control.enabled", c, "enabled")
        for key in ("path", "socket"):        # "path": the old name, for one release
            if key in c:
                if key == "path":
                    s.notes.append(_old_key_note(filename, c, "control.path", "control.socket", "path"))
                s.control.path = _str(c[key], w, f"control.{key}", c, key, allow_none=True)
    if s.engine:
        try:
            engine_config(s)          # the engine's own checks (e.g. a channel in pool and passthrough)
        except RetunerError as exc:
            eng = d.get("engine")
            key = (exc.field or "").replace("engine.", "", 1)
            head, _, sub = key.partition(".")
            if isinstance(eng, dict) and key in eng:
                exc.line = eng.lines.get(key)
            elif isinstance(eng, dict) and head in eng:
                inner = eng[head]       # e.g. engine.adaptive.policy: the line of the nested field
                lines = getattr(inner, "lines", None)
                exc.line = (lines or {}).get(sub) or eng.lines.get(head)
            elif "mode" in d and key == "mode":
                exc.line = d.lines.get("mode")
            raise
    return s


def load_config(path: Optional[str], *, required: bool = False, reload: bool = False) -> Settings:
    """Read ``path`` (or the default file when ``path`` is None); built-in defaults when absent.

    A file the user named explicitly (``required``) must exist. On a ``reload`` the file must be
    complete: one that is empty (or only comments) is refused, since an editor that saves by
    truncate-then-write leaves it so for a moment, and one that changes while it is read is read
    again (a few times, then refused)."""
    p = Path(path) if path else default_config_path()
    if not p.is_file():
        if required or path:
            raise RetunerError("no such config file", file=str(p))
        return Settings()
    for attempt in range(5):
        try:
            before = p.stat()
            text = p.read_text(encoding="utf-8")
            after = p.stat()
        except (OSError, UnicodeDecodeError) as exc:
            raise RetunerError(f"cannot read: {exc}", file=str(p)) from None
        if (before.st_size, before.st_mtime_ns) == (after.st_size, after.st_mtime_ns) \
                and len(text.encode("utf-8")) == after.st_size:
            break
        time.sleep(0.05)           # being written right now: read it again in a moment
    else:
        raise RetunerError("the file kept changing while it was read; not loaded", file=str(p))
    if reload and not any(line.strip() and not line.lstrip().startswith("#") for line in text.splitlines()):
        raise RetunerError("the file is empty (an editor may be saving it); not loaded", file=str(p))
    return parse_config(text, str(p))


# --------------------------------------------------------------------------- engine settings
# The engine's settings are the fields of retuner.engine.core.EngineConfig. In files and on the
# command line channels are 1..16; the engine (like mido) counts 0..15. A field whose name ends
# in "channel" or "channels" holds channels.

def _engine_config_class():
    from retuner.engine.core import EngineConfig  # noqa: WPS433 - the engine lands separately
    return EngineConfig


def engine_fields() -> dict[str, Any]:
    """name -> type hint of every EngineConfig field."""
    cls = _engine_config_class()
    hints = typing.get_type_hints(cls)
    return {f.name: hints.get(f.name, Any) for f in dataclasses.fields(cls)
            if f.metadata.get("user_setting", True)}


CHANNEL_FIELDS = {"pool", "passthrough"}


def _is_channel_field(name: str) -> bool:
    return name in CHANNEL_FIELDS or name.endswith("_channel") or name.endswith("_channels")


def _adaptive_settings(v: Any, w: "_Where", fld: str, m: Any, k: Any) -> Any:
    """``adaptive``: null/false (off), true (defaults) or a mapping of AdaptiveConfig fields."""
    if v is None or v is False:
        return None
    if v is True:
        v = {}
    if not isinstance(v, dict):
        raise w.err(f"expected true, false or a mapping of adaptive settings, got {kind_of(v)}", fld, m, k)
    from retuner.adaptive.solver import AdaptiveConfig
    names = {ADAPTIVE_KEY_OF.get(f.name, f.name) for f in dataclasses.fields(AdaptiveConfig)}
    out = {}
    for key, value in v.items():
        if key in ADAPTIVE_KEY_OF and key not in ADAPTIVE_FIELD_OF:      # an old name
            if w.notes is not None:
                w.notes.append(_old_key_note(w.filename, v, f"{fld}.{key}", f"{fld}.{ADAPTIVE_KEY_OF[key]}", key))
            key = ADAPTIVE_KEY_OF[key]
        if key in ADAPTIVE_DURATIONS:
            value = duration_seconds(value, w, f"{fld}.{key}", v, key)
        out[key] = value
    _unknown(out, names, w, fld + ".")
    return out


def _old_key_note(filename: str, mapping: Any, old: str, new: str, key: Any) -> str:
    return _note(filename, mapping, key, f"{old} is now called {new}; the old name will go in a later release")


def _note(filename: str, mapping: Any, key: Any, text: str) -> str:
    """One warning line naming the file and the line of ``key``."""
    line = getattr(mapping, "lines", {}).get(key)
    where = f"{filename}:{line}" if line is not None else filename
    return f"retuner: warning: {where}: {text}"


def _check_value(v: Any, hint: Any, w: _Where, fld: str, m: Any, k: Any, channel: bool) -> Any:
    origin = typing.get_origin(hint)
    args = typing.get_args(hint)
    if hint is Any:
        return v
    if origin in (typing.Union, types.UnionType):
        if v is None and type(None) in args:
            return None
        others = [a for a in args if a is not type(None)]
        errors = []
        for a in others:
            try:
                return _check_value(v, a, w, fld, m, k, channel)
            except RetunerError as exc:
                errors.append(exc)
        raise errors[0] if errors else w.err(f"unexpected value {v!r}", fld, m, k)
    if origin is typing.Literal:
        if v not in args:
            raise w.err(f"expected one of {', '.join(map(str, args))}, got {v!r}", fld, m, k)
        return v
    if origin in (list, tuple, set, frozenset) or hint in (list, tuple):
        if not isinstance(v, list):
            raise w.err(f"expected a list, got {kind_of(v)}", fld, m, k)
        item = args[0] if args else Any
        out = [_check_value(x, item, w, fld, m, k, channel) for x in v]
        return tuple(out) if (origin is tuple or hint is tuple) else (set(out) if origin in (set, frozenset) else out)
    if hint is bool:
        return _bool(v, w, fld, m, k)
    if hint is int:
        if channel:
            return _int(v, w, fld, m, k, 1, 16)
        return _int(v, w, fld, m, k, -(2 ** 31), 2 ** 31)
    if hint is float:
        if isinstance(v, str):          # a fraction such as 127/128
            from fractions import Fraction
            try:
                v = float(Fraction(v.strip()))
            except (ValueError, ZeroDivisionError):
                raise w.err(f"expected a number or a fraction like 127/128, got {v!r}", fld, m, k) from None
        return _num(v, w, fld, m, k, float("-inf"), float("inf"))
    if hint is str:
        return _str(v, w, fld, m, k)
    if isinstance(hint, type) and issubclass(hint, enum.Enum):
        try:
            return hint(v)
        except ValueError:
            raise w.err(f"expected one of {', '.join(str(e.value) for e in hint)}, got {v!r}", fld, m, k) from None
    return v


def check_engine_settings(eng: dict, w: Optional[_Where] = None, *, mapping: Any = None,
                          prefix: str = "engine.") -> dict[str, Any]:
    """Check user-facing engine settings against EngineConfig's fields and types."""
    w = w or _Where("<settings>")
    m = mapping if mapping is not None else eng
    fields = engine_fields()
    _unknown(eng, set(fields), w, prefix)
    out = {}
    for k, v in eng.items():
        if k == "adaptive":
            out[k] = _adaptive_settings(v, w, prefix + k, m, k)
        elif k == "mode":
            from retuner.engine.core import MODES
            if v not in MODES:
                raise w.err(f"expected one of {', '.join(MODES)}, got {v!r}", prefix + k, m, k)
            out[k] = v
        else:
            if k in ENGINE_DURATIONS:
                v = duration_seconds(v, w, prefix + k, m, k)
            out[k] = _check_value(v, fields[k], w, prefix + k, m, k, _is_channel_field(k))
    return out


def engine_config(settings: Settings):
    """An EngineConfig from the settings (channels converted to the engine's 0..15)."""
    cls = _engine_config_class()
    kw = {}
    for k, v in settings.engine.items():
        if _is_channel_field(k) and v is not None:
            if isinstance(v, (list, tuple, set, frozenset)):
                v = type(v)(c - 1 for c in v)
            else:
                v = v - 1
        if k == "adaptive" and v is not None:
            from retuner.adaptive.solver import AdaptiveConfig
            try:
                v = AdaptiveConfig.from_dict(adaptive_fields(v, settings.source), file=settings.source)
            except RetunerError as exc:
                exc.field = "engine." + (exc.field or "adaptive")
                raise adaptive_error(exc)
            except (TypeError, ValueError) as exc:
                raise RetunerError(f"bad adaptive settings: {exc}", file=settings.source,
                                   field="engine.adaptive") from None
        kw[k] = v
    # one bend range for the channels notes sound on: in a mode that keeps it in another field
    # (MPE: the members' range), a bend_range given in the file or by --bend-range sets that field
    # unless the file names that field itself
    mode = MODES.get(kw.get("mode", "pool"))
    if mode is not None and mode.bend_range_field != "bend_range" and "bend_range" in kw \
            and mode.bend_range_field not in kw:
        kw[mode.bend_range_field] = kw["bend_range"]
    try:
        return cls(**kw).validate()
    except RetunerError as exc:
        if exc.file is None:
            exc.file = settings.source
        if exc.field and not exc.field.startswith("engine."):
            exc.field = "engine." + exc.field
        raise
    except (TypeError, ValueError) as exc:
        raise RetunerError(f"bad engine settings: {exc}", file=settings.source, field="engine") from None
