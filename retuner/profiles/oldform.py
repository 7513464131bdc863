"""Profiles written in retuner's first form get one line saying how to write them now.

The first form placed a scale with ``root``, ``keymap: {size, degrees}`` (null for a silent key)
and ``keys: [lowest, highest]``, and set the pitch with ``reference: {key, hz}``. Its values were
told apart by the decimal point; that rule is refused where the values are read (see values.py).
Here the old placing fields are turned into the ``layout`` and ``concert_pitch`` that play the
same pitches, and the line shows them.
"""

from __future__ import annotations

from typing import Any, Optional

from retuner.pitch.tuning import NUM_KEYS
from retuner.profiles.document import Mapping, Sequence, Where
from retuner.profiles.values import format_concert_pitch

OLD_FIELDS = ("root", "keymap", "keys", "reference")


def _int(v: Any) -> Optional[int]:
    return v if isinstance(v, int) and not isinstance(v, bool) else None


def _scale_size(doc: Mapping) -> Optional[int]:
    if isinstance(doc.get("equal"), Mapping):
        return _int(doc["equal"].get("steps"))
    if isinstance(doc.get("scale"), Mapping) and isinstance(doc["scale"].get("degrees"), Sequence):
        return len(doc["scale"]["degrees"]) + 1   # the first form left the root out
    if "temperament" in doc:
        return 12
    return None


def _runs_text(pairs: list[tuple[int, int]]) -> str:
    """(key, degree) pairs, rising keys -> 'a to b: d to e, ...' with consecutive ones joined."""
    out = []
    i = 0
    while i < len(pairs):
        j = i
        while j + 1 < len(pairs) and pairs[j + 1][0] == pairs[j][0] + 1 and pairs[j + 1][1] == pairs[j][1] + 1:
            j += 1
        (k0, d0), (k1, d1) = pairs[i], pairs[j]
        out.append(f"{k0}: {d0}" if i == j else f"{k0} to {k1}: {d0} to {d1}")
        i = j + 1
    return ", ".join(out)


def _new_layout(doc: Mapping) -> Optional[str]:
    root = _int(doc.get("root", 60))
    n = _scale_size(doc)
    if root is None or not 0 <= root < NUM_KEYS or not n:
        return None
    parts = []
    km = doc.get("keymap")
    if km is not None:
        if not isinstance(km, Mapping) or not isinstance(km.get("degrees"), Sequence):
            return None
        degs = list(km["degrees"])
        size = _int(km.get("size", len(degs)))
        if size != len(degs) or not size or size > NUM_KEYS or any(d is not None and _int(d) is None for d in degs):
            return None
        base, shift = root, 0
        while base + size > NUM_KEYS:       # the runs must be keys: take the copy a period lower
            base, shift = base - size, shift + 1
        pairs = [(base + i, d - shift * n) for i, d in enumerate(degs) if d is not None]
        if not pairs:
            return None
        parts.append(f"runs: {{{_runs_text(pairs)}}}")
        parts.append(f"repeat: {size}")
    elif root != 60 or "keys" in doc:
        parts.append(f"runs: {{0 to {NUM_KEYS - 1}: {-root} to {NUM_KEYS - 1 - root}}}")
    kr = doc.get("keys")
    if kr is not None:
        if not (isinstance(kr, Sequence) and len(kr) == 2 and all(_int(v) is not None for v in kr)):
            return None
        parts.append(f"within: {kr[0]} to {kr[1]}")
    return "layout: {" + ", ".join(parts) + "}" if parts else None


def _new_pitch(doc: Mapping) -> Optional[str]:
    ref = doc.get("reference")
    if not isinstance(ref, Mapping):
        return None
    key, hz = _int(ref.get("key", 69)), ref.get("hz", 440.0)
    if key is None or not 0 <= key < NUM_KEYS or isinstance(hz, bool) or not isinstance(hz, (int, float)):
        return None
    return "concert_pitch: " + format_concert_pitch(key, float(hz))


def check_old_form(doc: Mapping, where: Where) -> None:
    """One line for a profile that still uses the first form's placing fields."""
    present = [f for f in OLD_FIELDS if f in doc]
    if not present:
        return
    first = min(present, key=lambda f: doc.lines.get(f, 0))
    placing = [f for f in present if f != "reference"]
    new = []
    if placing:
        new.append(_new_layout(doc) or "layout: {runs: {KEY or KEY to KEY: DEGREE or DEGREE to DEGREE}, "
                                       "repeat: KEYS, within: KEY to KEY}")
    if "reference" in present:
        new.append(_new_pitch(doc) or "concert_pitch: A4 = 440 Hz")
    if isinstance(doc.get("scale"), Mapping) and isinstance(doc["scale"].get("degrees"), Sequence) \
            and doc["scale"]["degrees"] and str(doc["scale"]["degrees"][0]).strip() not in ("1/1", "0 cents"):
        new.append("scale.degrees beginning with the root, 1/1")
    others = [f for f in present if f != first]
    also = f", and so {'is' if len(others) == 1 else 'are'} {', '.join(others)}" if others else ""
    raise where.err(f"this is retuner's first profile form{also}; write instead: {' and '.join(new)}",
                    first, doc, first)
