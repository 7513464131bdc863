"""How a scale lies on the keyboard: runs of keys, each given a run of degrees.

::

    layout:
      runs:                 # key or run of keys: degree or run of degrees
        C4: 0               # key 60 plays the root
        D4: 1
        E4 to F4: 2 to 3    # two keys, two degrees
      repeat: 12            # optional: every 12 keys the runs sound again, one period higher (and lower)
      within: A0 to C8      # optional: only these keys sound

Degrees count on through the periods: in a scale of n degrees, degree n is the root one period
up and -1 the last degree one period down. A run given a single degree plays consecutive degrees
from it. A key no run covers is silent. Without a ``layout``, every key sounds and consecutive
keys play consecutive degrees, C4 (key 60) playing the root.
"""

from __future__ import annotations

from typing import Optional

from retuner.pitch.tuning import NUM_KEYS
from retuner.profiles import values
from retuner.profiles.document import Mapping, Where
from retuner.profiles.forms import check_fields

DEFAULT_ROOT = 60


def default_layout(root: int = DEFAULT_ROOT) -> list[Optional[int]]:
    """Every key, consecutive degrees, ``root`` playing degree 0."""
    return [k - root for k in range(NUM_KEYS)]


def parse_layout(doc: Mapping, where: Where, n: int) -> list[Optional[int]]:
    """The degree each key plays (None: silent), from the profile's ``layout`` field; ``n`` is the
    number of degrees in one period."""
    if "layout" not in doc:
        return default_layout()
    lay = doc["layout"]
    if not isinstance(lay, Mapping):
        raise where.err("expected a mapping with runs (and optionally repeat, within)", "layout", doc, "layout")
    check_fields(lay, {"runs", "repeat", "within"}, where, "layout.")
    lo, hi = 0, NUM_KEYS - 1
    if "within" in lay:
        lo, hi = values.key_run(lay["within"], where, "layout.within", lay, "within")
    repeat = None
    if "repeat" in lay:
        repeat = values.whole(lay["repeat"], where, "layout.repeat", lay, "repeat", 1, NUM_KEYS)
    if "runs" not in lay:
        if repeat is not None:
            raise where.err("repeat needs runs to repeat", "layout.repeat", lay, "repeat")
        out = default_layout()
        return [d if lo <= k <= hi else None for k, d in enumerate(out)]
    runs = lay["runs"]
    if not isinstance(runs, Mapping) or not runs:
        raise where.err("expected a mapping of key (or run of keys) to degree (or run of degrees), "
                        "like {C4 to B4: 0 to 11}", "layout.runs", lay, "runs")
    given: dict[int, int] = {}
    for keys, degs in runs.items():
        field = f"layout.runs.{keys}"
        k0, k1 = values.key_run(keys, where, field, runs, keys)
        d0, d1 = values.degree_run(degs, where, field, runs, keys)
        if d1 is not None and d1 - d0 != k1 - k0:
            raise where.err(f"{k1 - k0 + 1} keys but {abs(d1 - d0) + 1} degrees: give a run of degrees "
                            "as long as the run of keys, or only its first degree", field, runs, keys)
        for i, k in enumerate(range(k0, k1 + 1)):
            if k in given:
                raise where.err(f"key {k} ({values.key_name(k)}) is in two runs", field, runs, keys)
            given[k] = d0 + i
    out: list[Optional[int]] = [None] * NUM_KEYS
    if repeat is None:
        for k, d in given.items():
            out[k] = d
    else:
        span = max(given) - min(given) + 1
        if span > repeat:
            raise where.err(f"the runs cover {span} keys ({values.key_name(min(given))} to "
                            f"{values.key_name(max(given))}), more than repeat ({repeat}): copies would overlap",
                            "layout.repeat", lay, "repeat")
        return _repeated(given, repeat, n, lo, hi)
    return [d if lo <= k <= hi else None for k, d in enumerate(out)]


def _repeated(given: dict[int, int], repeat: int, n: int, lo: int, hi: int) -> list[Optional[int]]:
    """Copies of the runs every ``repeat`` keys, each one period (``n`` degrees) higher."""
    out: list[Optional[int]] = [None] * NUM_KEYS
    for k, d in given.items():
        for m in range(-(k // repeat), (NUM_KEYS - 1 - k) // repeat + 1):
            kk = k + m * repeat
            if lo <= kk <= hi:
                out[kk] = d + m * n
    return out
