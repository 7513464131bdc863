"""The adaptive settings as users write them (the config file's ``adaptive`` keys, the control
socket's ``adaptive`` command) against the solver's field names (:class:`AdaptiveConfig`), and
the solver's errors named and measured as the user wrote the setting. The daemon's config and
the control socket both read them from here."""

from __future__ import annotations

import re

from retuner.errors import RetunerError
from retuner.units import DURATION_HELP, seconds_of


# adaptive settings whose user-facing name differs from the solver's field (the band, in cents,
# within which the centre is not re-centred; not to be confused with chord_window, in seconds)
ADAPTIVE_KEY_OF = {"window": "recentre_band_cents", "window_per_held": "recentre_band_per_held_cents"}
ADAPTIVE_FIELD_OF = {v: k for k, v in ADAPTIVE_KEY_OF.items()}

# units of the numeric adaptive settings, named in a range error
ADAPTIVE_UNITS = {"chord_window": "seconds", "attack_time": "seconds", "max_drift": "cents",
                  "max_motion": "cents", "recentre_band_cents": "cents",
                  "recentre_band_per_held_cents": "cents", "aim_limit": "cents", "drift_margin": "cents"}


#: the adaptive settings that are durations (seconds, or a number with its unit: '30 ms')
ADAPTIVE_DURATIONS = {"chord_window", "attack_time"}


def adaptive_fields(settings: dict, source: str = "control socket") -> dict:
    """User-facing adaptive settings -> the solver's field names (AdaptiveConfig); a duration
    written with its unit ('30 ms') becomes seconds, as in the config file."""
    out = {}
    for k, v in settings.items():
        if k in ADAPTIVE_DURATIONS:
            secs = seconds_of(v)
            if secs is None:
                raise RetunerError(f"{DURATION_HELP}, got {v!r}", file=source, field=f"adaptive.{k}")
            v = secs
        out[ADAPTIVE_FIELD_OF.get(k, k)] = v
    return out


def adaptive_error(exc: RetunerError) -> RetunerError:
    """A solver's error on an adaptive setting, named and measured as the user wrote it."""
    head, _, name = (exc.field or "").rpartition(".")
    user = ADAPTIVE_KEY_OF.get(name, name)
    if name:
        exc.field = f"{head}.{user}" if head else user
    unit = ADAPTIVE_UNITS.get(user)
    if unit and exc.message.startswith("must be between") and unit not in exc.message:
        exc.message = re.sub(r"^(must be between [^\s,]+ and [^\s,]+)", rf"\1 {unit}", exc.message)
    return exc
