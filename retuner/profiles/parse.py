"""One profile's text -> a :class:`Tuning`; every problem is one line naming file, line and field."""

from __future__ import annotations

import re

from retuner.errors import RetunerError
from retuner.pitch.tuning import A4_KEY, A4_HZ, Degree, Tuning, build_keyboard, hz_to_cents
from retuner.profiles import values
from retuner.profiles.document import Mapping, Sequence, Where, kind_of, load_yaml
from retuner.profiles.forms import FORMS, check_fields
from retuner.profiles.layout import DEFAULT_ROOT, parse_layout
from retuner.profiles.oldform import check_old_form

ID_RE = re.compile(r"^[a-z0-9][a-z0-9-]*$")
TOP_FIELDS = {"id", "description", "source", "names", "layout", "concert_pitch", *FORMS}


def parse_profile(text: str, filename: str = "<profile>") -> Tuning:
    """Parse and check one profile."""
    where = Where(filename)
    doc = load_yaml(text, filename)
    if not isinstance(doc, Mapping):
        raise RetunerError("a profile must be a YAML mapping of fields", file=filename, line=1)
    check_old_form(doc, where)
    check_fields(doc, TOP_FIELDS, where, "")
    for req in ("id", "description"):
        if req not in doc:
            raise where.err("required field is missing", req, doc)
    pid = doc["id"]
    if not isinstance(pid, str) or not ID_RE.match(pid):
        raise where.err(f"an id is lower-case letters, digits and '-', got {pid!r}", "id", doc, "id")
    desc = values.check_text(doc["description"], where, "description", doc, one_line=True)
    source = values.check_text(doc.get("source", ""), where, "source", doc, one_line=False) if "source" in doc else ""
    forms = [k for k in FORMS if k in doc]
    if len(forms) != 1:
        raise where.err(f"give exactly one of: {', '.join(FORMS)} (found {len(forms)})", "/".join(FORMS), doc)
    form = forms[0]
    body = doc[form]
    if not isinstance(body, Mapping):
        raise where.err(f"expected a mapping, got {kind_of(body)}", form, doc, form)
    scale = FORMS[form](body, where)
    n = len(scale.degrees)

    key_degrees = parse_layout(doc, where, n)
    ref_key, ref_hz = A4_KEY, A4_HZ
    if "concert_pitch" in doc:
        ref_key, ref_hz = values.concert_pitch(doc["concert_pitch"], where, "concert_pitch", doc, "concert_pitch")
    names = scale.names
    if "names" in doc:
        nm = doc["names"]
        if not isinstance(nm, Sequence) or len(nm) != n or not all(isinstance(x, str) for x in nm):
            raise where.err(f"expected a list of {n} names, one per degree", "names", doc, "names")
        names = list(nm)
    if names is None:
        names = [str(i) for i in range(n)]

    try:
        cents, where_keys = build_keyboard(scale.degrees, scale.period, key_degrees,
                                           reference_key=ref_key, reference_hz=ref_hz)
    except ValueError as exc:
        field = "concert_pitch" if "concert_pitch" in doc else "layout"
        raise where.err(f"{exc}: the key of the concert pitch must sound (default A4 = 440 Hz)",
                        field, doc, field if field in doc else None) from None
    a4 = hz_to_cents(A4_HZ)
    for k, c in enumerate(cents):
        if c is not None and abs(c - a4) > values.MAX_CENTS:
            raise where.err(f"key {k} would sound {c - a4:+.0f} cents from A4 = 440 Hz; every key must stay "
                            f"within ±{values.MAX_CENTS:.0f} cents of it", form, doc, form)
    root = next((k for k, w in enumerate(where_keys) if w == (0, 0)),
                next((k for k, w in enumerate(where_keys) if w is not None and w[1] == 0), DEFAULT_ROOT))
    return Tuning(id=pid, cents=tuple(cents), description=desc, source=source,
                  degrees=tuple(Degree(nm, d) for nm, d in zip(names, scale.degrees)), period=scale.period,
                  root=root, key_degree=tuple(where_keys))

