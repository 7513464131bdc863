"""What each control command does to the running engine (applied on the engine thread).

The server (retuner.control.server) parses and checks a request and calls
:meth:`EngineControl.prepare` on its own thread (slow work such as reading a
profile happens there); the daemon's engine thread then calls
:meth:`EngineControl.apply` and publishes events with :meth:`EngineControl.observe`.
"""

from __future__ import annotations

import dataclasses
import logging
import math
import time
from dataclasses import dataclass
from typing import Any, Callable, Optional

from retuner.adaptive.solver import AdaptiveConfig
from retuner.control.protocol import Command
from retuner.control.server import ControlServer, Handler
from retuner.errors import RetunerError
from retuner.adaptive.settings import adaptive_error, adaptive_fields
from retuner.pitch.tuning import cents_to_hz
from retuner.profiles.profile import list_profiles, load_profile

log = logging.getLogger(__name__)

@dataclass
class EngineHost:
    """What :class:`EngineControl` needs from the daemon that owns the engine.

    ``session`` owns the tuning in force and the engine (retuner.live.session);
    ``emit(messages)`` sends output messages to the output port; ``clock()`` is the
    engine clock (seconds, monotonic); ``profile_dirs`` are searched by ``load`` and
    ``profiles``. ``adaptive_config(settings)`` turns a settings dict into the
    engine's adaptive configuration (None: use ``retuner.adaptive.solver``'s
    defaults). ``panic(t)`` silences the output and returns how many notes it
    knew of (None: the engine's ``release_all``). ``status_extra()`` adds the daemon's
    own fields to ``status``.
    """

    session: Any
    emit: Callable[[list], None]
    clock: Callable[[], float] = time.monotonic
    profile_dirs: tuple = ()
    adaptive_config: Optional[Callable[[dict], Any]] = None
    status_extra: Optional[Callable[[], dict]] = None
    panic: Optional[Callable[[float], int]] = None


class EngineControl(Handler):
    """The control commands, applied to a daemon's session and engine (see :class:`EngineHost`).

    What the tuning in force is, and how a switch treats sounding notes, is the
    session's business (retuner.live.session); this class turns requests into
    session calls, replies and events.
    """

    COUNTER_INTERVAL = 0.25   # seconds between counters events

    def __init__(self, host: EngineHost, server: Optional[ControlServer] = None):
        self.host = host
        self.server = server
        self._sounding: dict[tuple, dict] = {}
        self._next_counters = 0.0
        self._profiles_cache: Optional[tuple[float, list]] = None
        if host.session is not None:
            host.session.listen(self._session_changed)

    @property
    def session(self):
        return self.host.session

    @property
    def engine(self):
        return self.host.session.engine

    # -------------------------------------------------------- server thread
    def prepare(self, cmd: Command) -> Command | dict:
        a = cmd.args
        if cmd.name == "profiles":
            now = time.monotonic()
            if self._profiles_cache is None or now - self._profiles_cache[0] > 1.0:
                # reads the folders: at most once a second
                self._profiles_cache = (now, [{"id": p.id, "description": p.description,
                                               "builtin": bool(p.builtin)}
                                              for p in list_profiles(self.host.profile_dirs)])
            return {"ok": True, "cmd": "profiles", "profiles": list(self._profiles_cache[1])}
        if cmd.name == "load":
            pid = a.get("profile")
            if not isinstance(pid, str) or not pid:
                raise RetunerError("load: 'profile' must be a profile id or path", field="profile")
            cmd.data = load_profile(pid, self.host.profile_dirs)   # slow part, off the engine thread
        elif cmd.name == "adaptive":
            on = a.get("on")
            if not isinstance(on, bool):
                raise RetunerError("adaptive: 'on' must be true or false", field="on")
            settings = a.get("settings") or {}
            if not isinstance(settings, dict):
                raise RetunerError("adaptive: 'settings' must be an object", field="settings")
            cmd.data = self._adaptive_config(settings) if on else None
        elif cmd.name in ("concert_pitch", "reference"):
            hz = a.get("hz")
            if isinstance(hz, bool) or not isinstance(hz, (int, float)) or not math.isfinite(hz) \
                    or not 200.0 <= hz <= 1000.0:
                raise RetunerError("concert_pitch: 'hz' must be a number from 200 to 1000 (A4)", field="hz")
        elif cmd.name == "transpose":
            if "semitones" not in a and "cents" not in a:
                raise RetunerError("transpose: give 'semitones' and/or 'cents'")
            st = a.get("semitones", 0)
            ct = a.get("cents", 0.0)
            if isinstance(st, bool) or not isinstance(st, int) or not -24 <= st <= 24:
                raise RetunerError("transpose: 'semitones' must be a whole number from -24 to 24",
                                   field="semitones")
            if isinstance(ct, bool) or not isinstance(ct, (int, float)) or not math.isfinite(ct) \
                    or not -1200.0 <= ct <= 1200.0:
                raise RetunerError("transpose: 'cents' must be a number from -1200 to 1200", field="cents")
        return cmd

    def _adaptive_config(self, settings: dict):
        if self.host.adaptive_config is not None:
            return self.host.adaptive_config(settings)
        settings = adaptive_fields({str(k).replace("-", "_"): v for k, v in settings.items()})
        base = self.session.adaptive_base
        if base is not None and dataclasses.is_dataclass(base):
            merged = {f.name: getattr(base, f.name) for f in dataclasses.fields(base)}
            merged.update(settings)
            unknown = sorted(k for k in settings if k not in {f.name for f in dataclasses.fields(base)})
            if unknown:
                raise RetunerError(f"unknown setting {unknown[0]!r}", field=f"adaptive.{unknown[0]}")
            settings = merged
        try:
            return AdaptiveConfig.from_dict(settings, file="control socket")
        except RetunerError as exc:
            raise adaptive_error(exc)
        except (TypeError, ValueError) as exc:
            raise RetunerError(f"adaptive: {exc}", field="settings") from None

    # -------------------------------------------------------- engine thread
    def info(self) -> dict:
        """What plays, under the socket's field names: the profile in force, the concert pitch that
        overrides the profile's own (None: the profile's), the transposition and adaptive mode."""
        i = self.session.info()
        return {"profile": i["base"], "concert_pitch_hz": i["reference"],
                "transpose_semitones": i["transpose"], "transpose_cents": i["transpose_cents"],
                "adaptive": i["adaptive"]}

    def _session_changed(self, kind: str, t: float) -> None:
        if kind == "tuning":
            self._publish({"event": "profile", "time_s": t, **self.info()})
        else:
            self._publish({"event": "adaptive", "time_s": t, "on": self.session.adaptive_settings is not None,
                           "settings": self.session.adaptive_settings})

    def _emit(self, out) -> None:
        if out:
            self.host.emit(out)

    def apply(self, cmd: Command) -> dict:
        now = self.host.clock()
        a = cmd.args
        name = cmd.name
        session = self.session
        if name == "status":
            return self.status()
        if name == "load":
            self._emit(session.load(cmd.data, now, "control socket"))
            return self.info()
        if name in ("concert_pitch", "reference"):
            self._emit(session.set_reference(float(a["hz"]), now))
            return self.info()
        if name == "transpose":
            self._emit(session.set_transpose(int(a.get("semitones", 0)), float(a.get("cents", 0.0)), now))
            return self.info()
        if name == "adaptive":
            self._emit(session.set_adaptive(cmd.data, now, a.get("settings")))
            return self.info()
        if name == "panic":
            if self.host.panic is not None:
                sounding = self.host.panic(now)
            else:
                sounding = len(self.engine.sounding())
                self._emit(self.engine.release_all(now))
            log.warning("panic: every note released (control socket)")
            self._publish({"event": "panic", "time_s": now})
            self.observe(now, force=True)
            # notes held by a pedal have had their note-off already: count every sounding note
            return {"released": sounding}
        if name == "subscribe":
            self.observe(now)                 # existing subscribers get what changed first
            snap = self.status()
            sounding = self.engine.sounding()
            snap["notes"] = self._notes(sounding)
            # the new subscriber's events continue from exactly this snapshot
            self._sounding = {(n.get("channel", 0), n["key"]): dict(n) for n in sounding}
            self._next_counters = 0.0
            return snap
        raise RetunerError(f"unknown command {name!r}")

    def _notes(self, sounding=None) -> list[dict]:
        out = []
        for n in (self.engine.sounding() if sounding is None else sounding):
            c = n.get("cents")
            out.append({"key": n["key"], "cents": c, "channel": n.get("channel", 0) + 1,
                        "hz": None if c is None else cents_to_hz(c)})
        out.sort(key=lambda d: (d["cents"] if d["cents"] is not None else d["key"] * 100.0))
        return out

    def status(self) -> dict:
        eng = self.engine
        out = self.info()
        out["counters"] = dict(getattr(eng, "stats", {}) or {})
        cut = eng.steals_explained()
        if cut:
            out["steals_explained"] = cut
        out["sounding"] = len(eng.sounding())
        if self.server is not None:
            out["control"] = self.server.stats()
        if self.host.status_extra is not None:
            out.update(self.host.status_extra())
        return out

    def _publish(self, event: dict) -> None:
        if self.server is not None:
            self.server.publish(event)

    def observe(self, now: float, force: bool = False) -> None:
        """Publish what changed since the last call: note on/off, pitch changes, counters.

        Call on the engine thread after feeding or ticking the engine. Costs one
        ``engine.sounding()`` call when anyone is subscribed, nothing otherwise.
        """
        server = self.server
        if server is None or not server.subscribers:
            self._sounding.clear()
            return
        now_notes = {}
        for n in self.engine.sounding():
            now_notes[(n.get("channel", 0), n["key"])] = n
        old = self._sounding
        for k, n in old.items():
            if k not in now_notes:
                server.publish({"event": "note_off", "time_s": now, "key": n["key"], "channel": k[0] + 1})
        for k, n in now_notes.items():
            prev = old.get(k)
            c = n.get("cents")
            if prev is None:
                server.publish({"event": "note_on", "time_s": now, "key": n["key"], "channel": k[0] + 1,
                                "cents": c, "hz": None if c is None else cents_to_hz(c),
                                "velocity": n.get("velocity")})
            elif prev.get("cents") != c:
                server.publish({"event": "pitch", "time_s": now, "key": n["key"], "channel": k[0] + 1,
                                "cents": c, "hz": None if c is None else cents_to_hz(c)})
        self._sounding = {k: dict(v) for k, v in now_notes.items()}
        if force or now >= self._next_counters:
            self._next_counters = now + self.COUNTER_INTERVAL
            stats = dict(getattr(self.engine, "stats", {}) or {})
            stats["events_dropped"] = server.counters["events_dropped"] + server.counters["central_dropped"]
            server.publish({"event": "counters", "time_s": now, "profile": self.session.base.id, **stats})
