"""Where profiles are found: the built-in folder, the user's folder, folders given by option.

Built-in profiles live in the project's ``profiles/`` folder. Users' own profiles are read from
``$XDG_CONFIG_HOME/retuner/profiles/`` (default ``~/.config/retuner/profiles/``) and from folders
given with ``--profile-dir``; a user profile with a built-in id overrides the built-in one, with
a notice.
"""

from __future__ import annotations

import logging
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Iterable, Sequence

from retuner.errors import RetunerError
from retuner.pitch.tuning import Tuning
from retuner.profiles.document import read_text
from retuner.profiles.parse import parse_profile

log = logging.getLogger(__name__)


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


@dataclass(frozen=True)
class ProfileInfo:
    id: str
    description: str
    source: str
    path: Path
    builtin: bool


def read_profile(path: Path) -> Tuning:
    return parse_profile(read_text(path), str(path))


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
                pid = read_profile(path).id
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


def _search_dirs(dirs: Sequence[Path | str]) -> list[Path]:
    """The user's folder (which may be missing) and the folders given with --profile-dir
    (which must exist: a mistyped folder is an error, not an empty list)."""
    for d in dirs:
        if not Path(d).is_dir():
            raise RetunerError("not a folder", file=str(d), field="--profile-dir")
    return user_profile_dirs() + [Path(d) for d in dirs]


def list_profiles(dirs: Sequence[Path | str] = ()) -> list[ProfileInfo]:
    """Every profile: built-in ones, then the user's (which override built-ins of the same id)."""
    out = []
    for pid, (path, builtin) in sorted(_scan(_search_dirs(dirs)).items()):
        t = read_profile(path)
        out.append(ProfileInfo(t.id, t.description, t.source, path, builtin))
    return out


def load_profile(name: str, dirs: Sequence[Path | str] = ()) -> Tuning:
    """Load a profile by id (built-in or user) or by path to a YAML file."""
    if name.endswith((".yaml", ".yml")) or os.sep in name:
        p = Path(name)
        if not p.is_file():
            raise RetunerError("no such profile file", file=name)
        return read_profile(p)
    found = _scan(_search_dirs(dirs))
    if name not in found:
        raise RetunerError(f"unknown profile {name!r}; 'retuner profiles' lists them", field="profile")
    return read_profile(found[name][0])
