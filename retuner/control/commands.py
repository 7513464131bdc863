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
from retuner.pitch.tuning import NUM_KEYS, Tuning, cents_to_hz
from retuner.profiles.profile import list_profiles, load_profile

log = logging.getLogger(__name__)

@dataclass
class EngineHost:
    """What :class:`EngineControl` needs from the daemon that owns the engine.

    ``engine`` is the running engine (see retuner.engine.core); ``emit(messages)`` sends
    output messages to the output port; ``clock()`` is the engine clock
    (seconds, monotonic). ``tuning`` is the loaded profile; ``profile_dirs`` are
    searched by ``load`` and ``profiles``. ``adaptive_config(settings)`` turns a
    settings dict into the engine's adaptive configuration (None: use
    ``retuner.adaptive.solver``'s defaults). ``on_switch(tuning)`` is told about a
    profile switch made from the socket (for logging and config state).
    """

    engine: Any
    emit: Callable[[list], None]
    tuning: Any
    clock: Callable[[], float] = time.monotonic
    profile_dirs: tuple = ()
    adaptive_config: Optional[Callable[[dict], Any]] = None
    on_switch: Optional[Callable[[Any], None]] = None
    status_extra: Optional[Callable[[], dict]] = None


def rotate_tuning(tuning, semitones: int):
    """The tuning with its pattern moved up ``semitones`` keys (the root moves with it).

    Key k plays what key k - n played, raised by n equal-tempered semitones, so
    the intervals between keys are those of the tuning with its root n keys
    higher. Keys whose source would lie outside 0..127 are mapped through the
    tuning's period when it has whole-key periods (12-note tunings), else unmapped.
    """
    n = int(semitones)
    if n == 0:
        return tuning
    cents = tuning.cents
    size = tuning.size if getattr(tuning, "is_twelve", False) else None
    out = []
    for k in range(NUM_KEYS):
        src = k - n
        shift = 0.0
        if size:
            while src < 0:
                src += 12
                shift -= 1200.0
            while src >= NUM_KEYS:
                src -= 12
                shift += 1200.0
        if 0 <= src < NUM_KEYS and cents[src] is not None:
            out.append(cents[src] + 100.0 * n + shift)
        else:
            out.append(None)
    return Tuning(id=tuning.id, cents=tuple(out), description=tuning.description,
                  source=tuning.source, degrees=tuning.degrees, period=tuning.period,
                  root=tuning.root + n)


class EngineControl(Handler):
    """The control commands, applied to a daemon's engine (see :class:`EngineHost`).

    The tuning in force is ``base`` (the loaded profile) with its root moved by
    ``transpose`` semitones, the whole keyboard shifted so A4 (key 69) sounds at
    ``reference`` Hz (None: as the profile says), then shifted by
    ``transpose_cents``. Switching keeps sounding notes at their pitch (the
    engine's set_tuning contract); new notes use the new tuning.
    """

    COUNTER_INTERVAL = 0.25   # seconds between counters events

    def __init__(self, host: EngineHost, server: Optional[ControlServer] = None):
        self.host = host
        self.server = server
        self.base = host.tuning
        self.reference: Optional[float] = None
        self.transpose = 0
        self.transpose_cents = 0.0
        self.adaptive: Optional[dict] = None
        self.current = getattr(host.engine, "tuning", None) or host.tuning
        self._sounding: dict[tuple, dict] = {}
        self._next_counters = 0.0
        self._last_tuning_id: Optional[str] = None
        self._profiles_cache: Optional[tuple[float, list]] = None
        # the adaptive settings in force or last used: "adaptive on" starts from them
        self._adaptive_base = getattr(getattr(host.engine, "config", None), "adaptive", None)

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
        elif cmd.name == "reference":
            hz = a.get("hz")
            if isinstance(hz, bool) or not isinstance(hz, (int, float)) or not math.isfinite(hz) \
                    or not 200.0 <= hz <= 1000.0:
                raise RetunerError("reference: 'hz' must be a number from 200 to 1000 (A4)", field="hz")
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
        base = self._adaptive_base
        if base is not None and dataclasses.is_dataclass(base):
            merged = {f.name: getattr(base, f.name) for f in dataclasses.fields(base)}
            merged.update({str(k).replace("-", "_"): v for k, v in settings.items()})
            unknown = sorted(k for k in settings if str(k).replace("-", "_") not in
                             {f.name for f in dataclasses.fields(base)})
            if unknown:
                raise RetunerError(f"unknown setting {unknown[0]!r}", field=f"adaptive.{unknown[0]}")
            settings = merged
        try:
            return AdaptiveConfig.from_dict(settings, file="control socket")
        except RetunerError:
            raise
        except (TypeError, ValueError) as exc:
            raise RetunerError(f"adaptive: {exc}", field="settings") from None

    # -------------------------------------------------------- engine thread
    def _effective(self):
        t = rotate_tuning(self.base, self.transpose)
        a4, a4_new = self.base.cents[69], t.cents[69]
        if self.transpose and a4 is not None and a4_new is not None:
            t = t.shifted(a4 - a4_new)        # A4 keeps its pitch; the pattern moves around it
        if self.reference is not None:
            t = t.with_reference_hz(self.reference)
        if self.transpose_cents:
            t = t.shifted(self.transpose_cents)
        return t

    def _switch(self, now: float) -> None:
        tuning = self._effective()
        out = self.host.engine.set_tuning(tuning, now)
        self.current = tuning
        if out:
            self.host.emit(out)
        self._publish({"event": "tuning", "t": now, **self._tuning_info()})
        if self.host.on_switch is not None:
            self.host.on_switch(tuning)

    def _tuning_info(self) -> dict:
        eng = self.host.engine
        on = getattr(eng, "adaptive", None)
        if not isinstance(on, bool):
            on = getattr(getattr(eng, "config", None), "adaptive", None) is not None
        return {"tuning": self.current.id, "base": self.base.id, "reference": self.reference,
                "transpose": self.transpose, "transpose_cents": self.transpose_cents,
                "adaptive": on}

    def apply(self, cmd: Command) -> dict:
        now = self.host.clock()
        a = cmd.args
        name = cmd.name
        if name == "status":
            return self.status()
        if name == "load":
            old = self.base
            self.base = cmd.data
            try:
                self._switch(now)
            except Exception:
                self.base = old
                raise
            return self._tuning_info()
        if name == "reference":
            old_ref = self.reference
            self.reference = float(a["hz"])
            try:
                self._switch(now)
            except Exception:
                self.reference = old_ref
                raise
            log.info("reference: A4 = %.3f Hz (control socket)", self.reference)
            return self._tuning_info()
        if name == "transpose":
            old = (self.transpose, self.transpose_cents)
            self.transpose = int(a.get("semitones", 0))
            self.transpose_cents = float(a.get("cents", 0.0))
            try:
                self._switch(now)
            except Exception:
                self.transpose, self.transpose_cents = old
                raise
            log.info("transpose: %+d semitones %+.2f cents (control socket)", self.transpose, self.transpose_cents)
            return self._tuning_info()
        if name == "adaptive":
            out = self.host.engine.set_adaptive(cmd.data, now)
            self.adaptive = dict(a.get("settings") or {}) if cmd.data is not None else None
            if cmd.data is not None:
                self._adaptive_base = cmd.data
            if out:
                self.host.emit(out)
            self._publish({"event": "adaptive", "t": now, "on": self.adaptive is not None,
                           "settings": self.adaptive})
            log.info("adaptive %s (control socket)", "on" if self.adaptive is not None else "off")
            return self._tuning_info()
        if name == "panic":
            sounding = len(self.host.engine.sounding())
            out = self.host.engine.release_all(now)
            log.warning("panic: every note released (control socket)")
            if out:
                self.host.emit(out)
            self._publish({"event": "panic", "t": now})
            self.observe(now, force=True)
            # notes held by a pedal have had their note-off already: count every sounding note
            return {"released": sounding}
        if name == "subscribe":
            self.observe(now)                 # existing subscribers get what changed first
            snap = self.status()
            sounding = self.host.engine.sounding()
            snap["notes"] = self._notes(sounding)
            # the new subscriber's events continue from exactly this snapshot
            self._sounding = {(n.get("channel", 0), n["key"]): dict(n) for n in sounding}
            self._next_counters = 0.0
            return snap
        raise RetunerError(f"unknown command {name!r}")

    def _notes(self, sounding=None) -> list[dict]:
        out = []
        for n in (self.host.engine.sounding() if sounding is None else sounding):
            c = n.get("cents")
            out.append({"key": n["key"], "cents": c, "channel": n.get("channel", 0) + 1,
                        "hz": None if c is None else cents_to_hz(c)})
        out.sort(key=lambda d: (d["cents"] if d["cents"] is not None else d["key"] * 100.0))
        return out

    def _check_external_switch(self) -> None:
        """The daemon switched profile itself (program change, A/B controller): follow it."""
        t = getattr(self.host.engine, "tuning", None)
        if t is not None and t is not self.current:
            self.base = self.current = t
            self.reference = None
            self.transpose = 0
            self.transpose_cents = 0.0
            self._publish({"event": "tuning", "t": self.host.clock(), **self._tuning_info()})

    def status(self) -> dict:
        self._check_external_switch()
        eng = self.host.engine
        out = self._tuning_info()
        out["stats"] = dict(getattr(eng, "stats", {}) or {})
        out["sounding"] = len(eng.sounding())
        if self.server is not None:
            out["control"] = self.server.stats()
        if self.host.status_extra is not None:
            out.update(self.host.status_extra())
        return out

    def _publish(self, event: dict) -> None:
        if self.server is not None:
            self.server.publish(event)

    def tuning_changed(self, tuning) -> None:
        """Tell the control state about a switch the daemon made itself (program change, A/B CC)."""
        self.base = tuning
        self.current = self._effective() if (self.transpose or self.reference or self.transpose_cents) \
            else tuning
        self._publish({"event": "tuning", "t": self.host.clock(), **self._tuning_info()})

    def observe(self, now: float, force: bool = False) -> None:
        """Publish what changed since the last call: note on/off, pitch changes, counters.

        Call on the engine thread after feeding or ticking the engine. Costs one
        ``engine.sounding()`` call when anyone is subscribed, nothing otherwise.
        """
        server = self.server
        if server is None or not server.subscribers:
            self._sounding.clear()
            return
        self._check_external_switch()
        now_notes = {}
        for n in self.host.engine.sounding():
            now_notes[(n.get("channel", 0), n["key"])] = n
        old = self._sounding
        for k, n in old.items():
            if k not in now_notes:
                server.publish({"event": "note_off", "t": now, "key": n["key"], "channel": k[0] + 1})
        for k, n in now_notes.items():
            prev = old.get(k)
            c = n.get("cents")
            if prev is None:
                server.publish({"event": "note_on", "t": now, "key": n["key"], "channel": k[0] + 1,
                                "cents": c, "hz": None if c is None else cents_to_hz(c),
                                "velocity": n.get("velocity")})
            elif prev.get("cents") != c:
                server.publish({"event": "pitch", "t": now, "key": n["key"], "channel": k[0] + 1,
                                "cents": c, "hz": None if c is None else cents_to_hz(c)})
        self._sounding = {k: dict(v) for k, v in now_notes.items()}
        if force or now >= self._next_counters:
            self._next_counters = now + self.COUNTER_INTERVAL
            stats = dict(getattr(self.host.engine, "stats", {}) or {})
            stats["events_dropped"] = server.counters["events_dropped"] + server.counters["central_dropped"]
            server.publish({"event": "counters", "t": now, "tuning": self.current.id, **stats})
