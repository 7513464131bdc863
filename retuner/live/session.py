"""The session: the one owner of the tuning in force in a running daemon.

The tuning in force is the chosen profile (``base``) with its root moved by
``transpose`` semitones, the whole keyboard shifted so A4 (key 69) sounds at
``reference`` Hz (None: as the profile says), then shifted by
``transpose_cents``; plus the adaptive settings (on, off, and the settings last
used, which "adaptive on" starts from).

Everything that changes it goes through here and nowhere else: program change
and the A/B switch (the daemon), the control socket's ``load``, ``reference``,
``transpose`` and ``adaptive`` (retuner.control.commands) and a reload (SIGHUP).
The session hands the result to the engine (``set_tuning``, ``set_adaptive``,
``reconfigure``) and returns the engine's messages for the caller to send.
Whoever wants to hear of a change (the control socket publishes it to its
subscribers) registers with :meth:`Session.listen`; nobody copies the state.

A switch keeps sounding notes at their pitch (the engine's ``set_tuning``
contract); new notes use the new tuning. When the engine refuses a change
(raises), the session keeps its previous state.
"""

from __future__ import annotations

import logging
from typing import Any, Callable, Optional

from retuner.pitch.tuning import NUM_KEYS, Tuning

log = logging.getLogger(__name__)


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


class Session:
    """The tuning in force and the adaptive settings, applied to one engine."""

    def __init__(self, engine, base=None):
        self.engine = engine
        self.base = base if base is not None else getattr(engine, "tuning", None)
        self.transpose = 0
        self.transpose_cents = 0.0
        self.reference: Optional[float] = None
        self.current = getattr(engine, "tuning", None) or self.base
        # the adaptive settings as the control socket gave them (None: off or set by the config)
        self.adaptive_settings: Optional[dict] = None
        # the adaptive settings in force or last used: "adaptive on" starts from them
        self.adaptive_base = getattr(getattr(engine, "config", None), "adaptive", None)
        self._listeners: list[Callable[[str, float], None]] = []

    # ------------------------------------------------------------------ listeners
    def listen(self, fn: Callable[[str, float], None]) -> None:
        """``fn(kind, t)`` after every change: kind ``"tuning"`` or ``"adaptive"``."""
        self._listeners.append(fn)

    def _changed(self, kind: str, t: float) -> None:
        for fn in self._listeners:
            try:
                fn(kind, t)
            except Exception:  # noqa: BLE001 - a listener never undoes a switch
                log.exception("session listener failed")

    # ------------------------------------------------------------------ queries
    @property
    def adaptive(self) -> bool:
        on = getattr(self.engine, "adaptive", None)
        if isinstance(on, bool):
            return on
        return getattr(getattr(self.engine, "config", None), "adaptive", None) is not None

    def effective(self, base=None):
        """The tuning to play: ``base`` (default the session's) with transpose and reference."""
        base = self.base if base is None else base
        t = rotate_tuning(base, self.transpose)
        a4, a4_new = base.cents[69], t.cents[69]
        if self.transpose and a4 is not None and a4_new is not None:
            t = t.shifted(a4 - a4_new)        # A4 keeps its pitch; the pattern moves around it
        if self.reference is not None:
            t = t.with_reference_hz(self.reference)
        if self.transpose_cents:
            t = t.shifted(self.transpose_cents)
        return t

    def info(self) -> dict:
        return {"tuning": self.current.id, "base": self.base.id, "reference": self.reference,
                "transpose": self.transpose, "transpose_cents": self.transpose_cents,
                "adaptive": self.adaptive}

    # ------------------------------------------------------------------ changes
    def _apply(self, t: float, why: str, **changes: Any) -> list:
        """Set ``changes`` on the session and switch the engine; restore them if it refuses."""
        old = {k: getattr(self, k) for k in changes}
        for k, v in changes.items():
            setattr(self, k, v)
        try:
            tuning = self.effective()
            out = self.engine.set_tuning(tuning, t)
        except Exception:
            for k, v in old.items():
                setattr(self, k, v)
            raise
        self.current = tuning
        if why:
            log.info("profile: %s (%s)", self.base.id, why)
        self._changed("tuning", t)
        return out or []

    def load(self, tuning, t: float, why: str) -> list:
        """Switch to another profile (program change, A/B switch, ``load``, reload);
        transpose and reference stay as they are."""
        return self._apply(t, why, base=tuning)

    def set_reference(self, hz: Optional[float], t: float) -> list:
        out = self._apply(t, "", reference=None if hz is None else float(hz))
        log.info("concert pitch: A4 = %.3f Hz (control socket)", self.reference)
        return out

    def set_transpose(self, semitones: int, cents: float, t: float) -> list:
        out = self._apply(t, "", transpose=int(semitones), transpose_cents=float(cents))
        log.info("transpose: %+d semitones %+.2f cents (control socket)", self.transpose,
                 self.transpose_cents)
        return out

    def set_adaptive(self, cfg, t: float, settings: Optional[dict] = None) -> list:
        """Adaptive mode on with ``cfg`` (``settings``: as the user gave them), or off (None)."""
        out = self.engine.set_adaptive(cfg, t)
        self.adaptive_settings = dict(settings or {}) if cfg is not None else None
        if cfg is not None:
            self.adaptive_base = cfg
        log.info("adaptive %s (control socket)", "on" if cfg is not None else "off")
        self._changed("adaptive", t)
        return out or []

    def reconfigure(self, config, t: float) -> list:
        """New engine settings from a reload; the adaptive settings come with them."""
        out = self.engine.reconfigure(config, t)
        if config.adaptive is not None:
            self.adaptive_base = config.adaptive
        self.adaptive_settings = None
        return out or []
