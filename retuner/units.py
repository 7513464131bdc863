"""Durations as users write them, in the config file and on the control socket: a bare number is
seconds, or a number with its unit ('10 min', '600 s', '30 ms', '1 h'). One rule for every
duration; the readers name the file, line and field of a bad one."""

from __future__ import annotations

import re
from typing import Any, Optional

#: the units a duration may carry
DURATION_UNITS = {"ms": 0.001, "s": 1.0, "min": 60.0, "h": 3600.0}
_DURATION = re.compile(r"\s*([0-9]+(?:\.[0-9]*)?|\.[0-9]+)\s*(ms|s|min|h)\s*")
#: the message for a duration that is neither a number nor a number with a known unit
DURATION_HELP = (f"expected seconds, or a number with its unit ({', '.join(DURATION_UNITS)}) such as "
                 "'10 min' or '30 ms'")


def seconds_of(v: Any) -> Optional[Any]:
    """``v`` in seconds: a non-string is returned as it is (to be range-checked by the reader),
    a string with its unit is converted, anything else gives None."""
    if not isinstance(v, str):
        return v
    found = _DURATION.fullmatch(v)
    if not found:
        return None
    return float(found.group(1)) * DURATION_UNITS[found.group(2)]
