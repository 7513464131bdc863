"""``retuner profiles``: list the tunings that can be loaded."""

from __future__ import annotations

from retuner.profiles.profile import list_profiles
from retuner.commands._common import add_profile_dir, print_json

NAME = "profiles"
HELP = "list the available tunings (built-in and your own)"
ORDER = 10


def add_arguments(parser):
    add_profile_dir(parser)
    parser.add_argument("--json", action="store_true", help='print [{"id": ..., "description": ...}, ...]')


def run(args) -> int:
    infos = list_profiles(args.profile_dirs)
    if args.json:
        print_json([{"id": p.id, "description": p.description, "source": p.source,
                     "builtin": p.builtin, "path": str(p.path)} for p in infos])
        return 0
    width = max(len(p.id) for p in infos)
    for p in infos:
        mark = "" if p.builtin else "  (yours)"
        print(f"{p.id:<{width}}  {p.description}{mark}")
    return 0
