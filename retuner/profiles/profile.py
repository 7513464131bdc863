"""Profiles: one tuning per YAML file. Find, load, validate.

A profile describes one period of a scale in exactly one of three ways and how
it lies on the keyboard::

    id: meantone-quarter          # required, lower-case letters, digits, '-'
    description: one line         # required
    source: where the definition is published
    # exactly one of:
    equal: {steps: 19, period: 2/1}                      # n equal steps of a period
    scale: {degrees: [16/15, 9/8, 386.314], period: 2/1}  # degrees above the root
    temperament: {start: Eb, fifths: [pure, -1/4 syntonic, ...]}  # 12 notes, chain of fifths
    reference: {key: 69, hz: 440.0}   # which key sounds at which Hz (default A4 = 440 Hz)
    root: 60                          # the key that plays degree 0 (default C4)
    keymap: {size: 12, degrees: [0, 1, null, ...]}  # optional: which keys play which degrees
    keys: [21, 108]                   # optional: keys outside are unmapped
    names: [C, C#, ...]               # optional: degree names for display

Ratios are written ``p/q`` (or whole numbers); a number with a decimal point is
cents. A temperament's fifth is ``pure`` or a fraction of a named comma by which
it is tempered: ``-1/4 syntonic`` is a fifth a quarter of a syntonic comma
narrower than 3/2. Commas: syntonic (81/80), pythagorean (3^12/2^19), schisma
(32805/32768). A temperament is laid out from C (the chain's notes are reduced
into the octave above C) and the keyboard is then shifted so the reference key
sounds at the reference Hz.

Built-in profiles live in the project's ``profiles/`` folder. Users' own profiles
are read from ``$XDG_CONFIG_HOME/retuner/profiles/`` (default
``~/.config/retuner/profiles/``) and from folders given with ``--profiles-dir``;
a user profile with a built-in id overrides the built-in one, with a notice.
"""

from __future__ import annotations

import logging
import os
import re
from dataclasses import dataclass
from fractions import Fraction
from pathlib import Path
from typing import Any, Iterable, Optional, Sequence

import yaml

from retuner.errors import RetunerError
from retuner.pitch.tuning import (COMMAS, KEY_NAMES, NUM_KEYS, Degree, Interval, Tuning,
                     build_keyboard, chain_of_fifths)

log = logging.getLogger(__name__)

ID_RE = re.compile(r"^[a-z0-9][a-z0-9-]*$")
TOP_FIELDS = {"id", "description", "source", "equal", "scale", "temperament",
              "reference", "root", "keymap", "keys", "names"}
KINDS = ("equal", "scale", "temperament")
NOTE_PCS = {"C": 0, "D": 2, "E": 4, "F": 5, "G": 7, "A": 9, "B": 11}
FIFTH_RE = re.compile(r"^\s*([+-]?\d+(?:/\d+)?)\s+([a-z]+)\s*$")


def builtin_dir() -> Path:
    """The folder of built-in profiles: the installed copy (``retuner/builtin_profiles``, put
    there by pyproject.toml from the project's ``profiles/``), or ``profiles/`` beside the
    package in a source tree."""
    here = Path(__file__).resolve().parent.parent   # the retuner package
    installed = here / "builtin_profiles"
    if installed.is_dir() and any(installed.glob("*.yaml")):
        return installed
    return here.parent / "profiles"


def user_profile_dirs() -> list[Path]:
    base = os.environ.get("XDG_CONFIG_HOME") or os.path.join(os.path.expanduser("~"), ".config")
    return [Path(base) / "retuner" / "profiles"]


# ---------------------------------------------------------------------------
# YAML with line numbers
class _Loader(yaml.SafeLoader):
    pass


def _construct_mapping(loader: _Loader, node: yaml.MappingNode, deep: bool = False):
    mapping = {}
    lines = {}
    for key_node, value_node in node.value:
        key = loader.construct_object(key_node, deep=deep)
        if key in mapping:
            raise RetunerError("duplicate field", line=key_node.start_mark.line + 1, field=str(key))
        mapping[key] = loader.construct_object(value_node, deep=deep)
        lines[key] = value_node.start_mark.line + 1
    return _Mapping(mapping, lines, node.start_mark.line + 1)


class _Mapping(dict):
    """A dict that remembers the line of each value."""

    def __init__(self, data: dict, lines: dict, line: int):
        super().__init__(data)
        self.lines = lines
        self.line = line


_Loader.add_constructor(yaml.resolver.BaseResolver.DEFAULT_MAPPING_TAG, _construct_mapping)


def load_yaml(text: str, filename: str) -> Any:
    """Parse YAML keeping line numbers; a syntax error becomes one RetunerError line."""
    try:
        return yaml.load(text, Loader=_Loader)  # noqa: S506 - SafeLoader subclass
    except RetunerError as exc:
        exc.file = filename
        raise
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        line = mark.line + 1 if mark else None
        raise RetunerError(f"not valid YAML: {exc.problem or exc.context}", file=filename, line=line) from None
    except yaml.YAMLError as exc:
        raise RetunerError(f"not valid YAML: {exc}", file=filename) from None


class _Ctx:
    """Where we are in a file, for error messages."""

    def __init__(self, filename: str):
        self.filename = filename

    def err(self, msg: str, field: str, mapping: Optional[_Mapping] = None, key: Any = None) -> RetunerError:
        line = None
        if isinstance(mapping, _Mapping):
            line = mapping.lines.get(key, mapping.line) if key is not None else mapping.line
        return RetunerError(msg, file=self.filename, line=line, field=field)


def _parse_ratio(value: Any, ctx: _Ctx, field: str, m: _Mapping, key: Any) -> Interval:
    """A ratio ``p/q`` or whole number (exact), or cents (a number with a decimal point)."""
    if isinstance(value, bool):
        raise ctx.err(f"expected a ratio like 3/2 or cents like 701.955, got {value!r}", field, m, key)
    if isinstance(value, int):
        if value <= 0:
            raise ctx.err("a ratio must be greater than 0", field, m, key)
        return Interval.ratio(value)
    if isinstance(value, float):
        if value != value or value in (float("inf"), float("-inf")):
            raise ctx.err("cents must be a finite number", field, m, key)
        return Interval.cents_value(value)
    if isinstance(value, str):
        s = value.strip()
        if re.fullmatch(r"\d+\s*/\s*\d+", s) or re.fullmatch(r"\d+", s):
            num, _, den = s.partition("/")
            if den and int(den) == 0:
                raise ctx.err("a ratio's denominator must not be 0", field, m, key)
            r = Fraction(int(num), int(den) if den else 1)
            if r <= 0:
                raise ctx.err("a ratio must be greater than 0", field, m, key)
            return Interval.ratio(r)
        if re.fullmatch(r"-?\d+(\.\d*)?\s*c?", s):
            return Interval.cents_value(float(s.rstrip("c ")))
        if re.fullmatch(r"-\d+\s*/\s*\d+", s):
            raise ctx.err("a ratio must be greater than 0", field, m, key)
    raise ctx.err(f"expected a ratio like 3/2 or cents like 701.955, got {value!r}", field, m, key)


def _expect_mapping(value: Any, ctx: _Ctx, field: str, m: _Mapping, key: Any) -> _Mapping:
    if not isinstance(value, _Mapping):
        raise ctx.err(f"expected a mapping, got {type(value).__name__}", field, m, key)
    return value


def _check_fields(sub: _Mapping, allowed: set[str], ctx: _Ctx, prefix: str) -> None:
    for k in sub:
        if k not in allowed:
            raise ctx.err(f"unknown field (expected one of: {', '.join(sorted(allowed))})",
                          f"{prefix}{k}", sub, k)


def _expect_int(value: Any, ctx: _Ctx, field: str, m: _Mapping, key: Any, lo: int, hi: int) -> int:
    if isinstance(value, bool) or not isinstance(value, int):
        raise ctx.err(f"expected a whole number, got {value!r}", field, m, key)
    if not lo <= value <= hi:
        raise ctx.err(f"must be between {lo} and {hi}, got {value}", field, m, key)
    return value


def _parse_fifth(value: Any, ctx: _Ctx, field: str, m: Any, key: Any) -> Interval:
    fifth = Interval.ratio(Fraction(3, 2))
    if isinstance(value, str) and value.strip() == "pure":
        return fifth
    if isinstance(value, str):
        mt = FIFTH_RE.match(value)
        if mt:
            frac = Fraction(mt.group(1))
            comma = mt.group(2)
            if comma not in COMMAS:
                raise ctx.err(f"unknown comma {comma!r} (known: {', '.join(COMMAS)})", field, m, key)
            return fifth * Interval.ratio(COMMAS[comma]) ** frac
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        return Interval.cents_value(float(value))
    raise ctx.err(f"expected 'pure', a tempering like '-1/4 syntonic', or cents; got {value!r}", field, m, key)


def _note_pc(value: Any, ctx: _Ctx, field: str, m: _Mapping, key: Any) -> int:
    if isinstance(value, str):
        mt = re.fullmatch(r"([A-G])([#b]*)", value.strip())
        if mt:
            pc = NOTE_PCS[mt.group(1)] + mt.group(2).count("#") - mt.group(2).count("b")
            return pc % 12
    raise ctx.err(f"expected a note name like Eb or C#, got {value!r}", field, m, key)


def _chain_names(start_pc: int, start_name: str) -> list[str]:
    """Spell the 12 notes of a chain of fifths starting at ``start_name``."""
    letters = "FCGDAEB"
    letter = start_name[0]
    acc = start_name[1:].count("#") - start_name[1:].count("b")
    names = [""] * 12
    idx = letters.index(letter)
    for i in range(12):
        pos = idx + i
        a = acc + pos // 7
        name = letters[pos % 7] + ("#" * a if a > 0 else "b" * (-a))
        names[(start_pc + 7 * i) % 12] = name
    return names


def parse_profile(text: str, filename: str = "<profile>") -> Tuning:
    """Parse and validate one profile; every problem is one RetunerError line."""
    ctx = _Ctx(filename)
    doc = load_yaml(text, filename)
    if not isinstance(doc, _Mapping):
        raise RetunerError("a profile must be a YAML mapping of fields", file=filename, line=1)
    _check_fields(doc, TOP_FIELDS, ctx, "")
    for req in ("id", "description"):
        if req not in doc:
            raise ctx.err("required field is missing", req, doc)
    pid = doc["id"]
    if not isinstance(pid, str) or not ID_RE.match(pid):
        raise ctx.err(f"an id is lower-case letters, digits and '-', got {pid!r}", "id", doc, "id")
    desc = doc["description"]
    if not isinstance(desc, str) or not desc.strip() or "\n" in desc.strip():
        raise ctx.err("expected one line of text", "description", doc, "description")
    source = doc.get("source", "")
    if not isinstance(source, str):
        raise ctx.err("expected text", "source", doc, "source")
    kinds = [k for k in KINDS if k in doc]
    if len(kinds) != 1:
        raise ctx.err(f"give exactly one of: {', '.join(KINDS)} (found {len(kinds)})", "equal/scale/temperament", doc)
    kind = kinds[0]
    body = _expect_mapping(doc[kind], ctx, kind, doc, kind)

    names: Optional[list[str]] = None
    root_default = 60
    if kind == "equal":
        _check_fields(body, {"steps", "period"}, ctx, "equal.")
        if "steps" not in body:
            raise ctx.err("required field is missing", "equal.steps", body)
        steps = _expect_int(body["steps"], ctx, "equal.steps", body, "steps", 1, 10000)
        period = _parse_ratio(body.get("period", "2/1"), ctx, "equal.period", body, "period")
        if period.cents <= 0:
            raise ctx.err("the period must be greater than 1/1", "equal.period", body, "period")
        degrees = [period ** Fraction(i, steps) for i in range(steps)]
        names = [str(i) for i in range(steps)]
    elif kind == "scale":
        _check_fields(body, {"degrees", "period"}, ctx, "scale.")
        if "degrees" not in body:
            raise ctx.err("required field is missing", "scale.degrees", body)
        raw = body["degrees"]
        if not isinstance(raw, list) or not raw:
            raise ctx.err("expected a non-empty list of ratios or cents", "scale.degrees", body, "degrees")
        period = _parse_ratio(body.get("period", "2/1"), ctx, "scale.period", body, "period")
        if period.cents <= 0:
            raise ctx.err("the period must be greater than 1/1", "scale.period", body, "period")
        degrees = [Interval()]
        for i, v in enumerate(raw):
            d = _parse_ratio(v, ctx, f"scale.degrees[{i}]", body, "degrees")
            if d.cents <= degrees[-1].cents + 1e-9:
                raise ctx.err("degrees must increase (each above the one before it, the first above 1/1)",
                              f"scale.degrees[{i}]", body, "degrees")
            if d.cents >= period.cents - 1e-9:
                raise ctx.err("a degree must be below the period", f"scale.degrees[{i}]", body, "degrees")
            degrees.append(d)
        if len(degrees) == 12 and abs(period.cents - 1200) < 1e-9:
            names = list(KEY_NAMES)
    else:  # temperament
        _check_fields(body, {"start", "fifths"}, ctx, "temperament.")
        for req in ("start", "fifths"):
            if req not in body:
                raise ctx.err("required field is missing", f"temperament.{req}", body)
        start_name = body["start"]
        start_pc = _note_pc(start_name, ctx, "temperament.start", body, "start")
        raw = body["fifths"]
        if isinstance(raw, list):
            if len(raw) != 11:
                raise ctx.err(f"a chain of 12 notes has 11 fifths, got {len(raw)}", "temperament.fifths", body, "fifths")
            fifths = [_parse_fifth(v, ctx, f"temperament.fifths[{i}]", body, "fifths") for i, v in enumerate(raw)]
        else:
            fifths = [_parse_fifth(raw, ctx, "temperament.fifths", body, "fifths")] * 11
        period = Interval.ratio(2)
        degrees = chain_of_fifths(start_pc, fifths)
        names = _chain_names(start_pc, start_name.strip())

    # reference, root, keymap, keys, names
    ref_key, ref_hz = 69, 440.0
    if "reference" in doc:
        ref = _expect_mapping(doc["reference"], ctx, "reference", doc, "reference")
        _check_fields(ref, {"key", "hz"}, ctx, "reference.")
        if "key" in ref:
            ref_key = _expect_int(ref["key"], ctx, "reference.key", ref, "key", 0, NUM_KEYS - 1)
        if "hz" in ref:
            hz = ref["hz"]
            if isinstance(hz, bool) or not isinstance(hz, (int, float)) or not 1.0 <= hz <= 20000.0:
                raise ctx.err(f"expected a frequency between 1 and 20000 Hz, got {hz!r}", "reference.hz", ref, "hz")
            ref_hz = float(hz)
    root = root_default
    if "root" in doc:
        root = _expect_int(doc["root"], ctx, "root", doc, "root", 0, NUM_KEYS - 1)

    keymap = None
    keymap_size = None
    if "keymap" in doc:
        km = _expect_mapping(doc["keymap"], ctx, "keymap", doc, "keymap")
        _check_fields(km, {"size", "degrees"}, ctx, "keymap.")
        if "degrees" not in km:
            raise ctx.err("required field is missing", "keymap.degrees", km)
        kd = km["degrees"]
        if not isinstance(kd, list) or not kd:
            raise ctx.err("expected a list of degree numbers (or null for an unmapped key)", "keymap.degrees", km, "degrees")
        keymap_size = _expect_int(km.get("size", len(kd)), ctx, "keymap.size", km, "size", 1, NUM_KEYS)
        if len(kd) != keymap_size:
            raise ctx.err(f"has {len(kd)} entries but keymap.size is {keymap_size}", "keymap.degrees", km, "degrees")
        keymap = []
        for i, v in enumerate(kd):
            if v is None:
                keymap.append(None)
            else:
                keymap.append(_expect_int(v, ctx, f"keymap.degrees[{i}]", km, "degrees", 0, 10000))
    key_range = (0, NUM_KEYS - 1)
    if "keys" in doc:
        kr = doc["keys"]
        if not (isinstance(kr, list) and len(kr) == 2):
            raise ctx.err("expected [lowest, highest] key numbers", "keys", doc, "keys")
        lo = _expect_int(kr[0], ctx, "keys[0]", doc, "keys", 0, NUM_KEYS - 1)
        hi = _expect_int(kr[1], ctx, "keys[1]", doc, "keys", 0, NUM_KEYS - 1)
        if lo > hi:
            raise ctx.err("the lowest key is above the highest", "keys", doc, "keys")
        key_range = (lo, hi)
    if "names" in doc:
        nm = doc["names"]
        if not isinstance(nm, list) or len(nm) != len(degrees) or not all(isinstance(x, str) for x in nm):
            raise ctx.err(f"expected a list of {len(degrees)} names", "names", doc, "names")
        names = nm
    if names is None:
        names = [str(i) for i in range(len(degrees))]

    try:
        cents, where = build_keyboard(degrees, period, root=root, reference_key=ref_key, reference_hz=ref_hz,
                                      keymap=keymap, keymap_size=keymap_size, key_range=key_range)
    except ValueError as exc:
        blame = next((k for k in ("reference", "keys", "keymap") if k in doc), None)
        raise ctx.err(str(exc), "reference.key", doc, blame) from None
    return Tuning(id=pid, cents=tuple(cents), description=desc.strip(), source=source.strip(),
                  degrees=tuple(Degree(n, d) for n, d in zip(names, degrees)), period=period,
                  root=root, key_degree=tuple(where))


@dataclass(frozen=True)
class ProfileInfo:
    id: str
    description: str
    source: str
    path: Path
    builtin: bool


def _read(path: Path) -> Tuning:
    try:
        text = path.read_text(encoding="utf-8")
    except UnicodeDecodeError:
        raise RetunerError("not UTF-8 text", file=str(path)) from None
    except OSError as exc:
        raise RetunerError(f"cannot read: {exc.strerror}", file=str(path)) from None
    return parse_profile(text, str(path))


def _scan(dirs: Iterable[Path]) -> dict[str, tuple[Path, bool]]:
    """id -> (path, builtin). User folders override built-ins, with a notice.

    A broken file or a repeated id in a user folder is reported (one line each) and left out,
    so one bad file does not stop every command or a daemon starting at boot; loading that file
    by its path still gives its error."""
    found: dict[str, tuple[Path, bool]] = {}
    for path in sorted(builtin_dir().glob("*.yaml")):
        found[path.stem] = (path, True)
    seen_user: dict[str, Path] = {}
    for d in dirs:
        d = Path(d)
        if not d.is_dir():
            continue
        for path in sorted(d.glob("*.yaml")):
            try:
                pid = _peek_id(path)
            except RetunerError as exc:
                log.warning("%s (profile left out)", exc)
                continue
            if pid in seen_user and seen_user[pid] != path:
                log.warning("%s: id: duplicate id %r, also in %s (this file left out)", path, pid, seen_user[pid])
                continue
            seen_user[pid] = path
            if pid in found and found[pid][1]:
                log.warning("profile %s from %s overrides the built-in one", pid, path)
            found[pid] = (path, False)
    return found


def _peek_id(path: Path) -> str:
    tuning = _read(path)
    return tuning.id


def _search_dirs(dirs: Sequence[Path | str]) -> list[Path]:
    """The user's folder (which may be missing) and the folders given with --profiles-dir
    (which must exist: a mistyped folder is an error, not an empty list)."""
    for d in dirs:
        if not Path(d).is_dir():
            raise RetunerError("not a folder", file=str(d), field="--profiles-dir")
    return user_profile_dirs() + [Path(d) for d in dirs]


def list_profiles(dirs: Sequence[Path | str] = ()) -> list[ProfileInfo]:
    """Every profile: built-in ones, then the user's (which override built-ins of the same id)."""
    out = []
    for pid, (path, builtin) in sorted(_scan(_search_dirs(dirs)).items()):
        t = _read(path)
        out.append(ProfileInfo(t.id, t.description, t.source, path, builtin))
    return out


def load_profile(name: str, dirs: Sequence[Path | str] = ()) -> Tuning:
    """Load a profile by id (built-in or user) or by path to a YAML file."""
    if name.endswith((".yaml", ".yml")) or os.sep in name:
        p = Path(name)
        if not p.is_file():
            raise RetunerError("no such profile file", file=name)
        return _read(p)
    found = _scan(_search_dirs(dirs))
    if name not in found:
        raise RetunerError(f"unknown profile {name!r}; 'retuner profiles' lists them", field="profile")
    return _read(found[name][0])
