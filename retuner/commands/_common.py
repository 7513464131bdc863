"""Arguments shared by several sub-commands."""

from __future__ import annotations

import argparse
import json
import sys


def add_profiles_dir(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--profiles-dir", action="append", default=[], metavar="DIR",
                        help="also read profiles from DIR (may be given more than once); "
                             "a profile here with a built-in id overrides the built-in one")


def print_json(obj) -> None:
    json.dump(obj, sys.stdout, indent=2)
    sys.stdout.write("\n")
