"""Arguments shared by several sub-commands, and the old option names still accepted."""

from __future__ import annotations

import argparse
import json
import sys


def old_name_warning(old: str, new: str) -> str:
    """The one line printed when an old option, config key or command is used."""
    return f"retuner: warning: {old} is now called {new}; the old name will go in a later release"


class OldName(argparse.Action):
    """An option's old name: does what the new one does, after a one-line warning on stderr.

    Hidden from --help (one name per concept); ``new`` is the option's name now."""

    def __init__(self, option_strings, dest, new: str, flag=None, **kw):
        self.new = new
        self.flag = flag          # for a switch: the value it stores (it then takes no argument)
        if flag is not None:
            kw["nargs"] = 0
        kw.setdefault("help", argparse.SUPPRESS)
        super().__init__(option_strings, dest, **kw)

    def __call__(self, parser, namespace, values, option_string=None):
        print(old_name_warning(option_string, self.new), file=sys.stderr)
        if self.flag is not None:
            values = self.flag
        if isinstance(getattr(namespace, self.dest, None), list) and not isinstance(values, list):
            values = getattr(namespace, self.dest) + [values]
        setattr(namespace, self.dest, values)


def add_old_name(parser, old: str, new: str, dest: str, **kw) -> None:
    """Accept ``old`` as ``new`` (same ``dest``) for one release, with a warning."""
    parser.add_argument(old, action=OldName, new=new, dest=dest, default=argparse.SUPPRESS, **kw)


def add_profile_dir(parser: argparse.ArgumentParser, help: str | None = None) -> None:
    parser.add_argument("--profile-dir", dest="profile_dirs", action="append", default=[], metavar="DIR",
                        help=help or "also read profiles from DIR (may be given more than once); "
                                     "a profile here with a built-in id overrides the built-in one")
    add_old_name(parser, "--profiles-dir", "--profile-dir", "profile_dirs", metavar="DIR")


def add_control_socket(parser: argparse.ArgumentParser, **kw) -> None:
    """``--control-socket PATH`` (the daemon's control socket), and its old name ``--socket``."""
    parser.add_argument("--control-socket", metavar="PATH", dest="control_socket",
                        help="control socket path (default $XDG_RUNTIME_DIR/retuner/control.sock)", **kw)
    add_old_name(parser, "--socket", "--control-socket", "control_socket", metavar="PATH")


def print_json(obj) -> None:
    json.dump(obj, sys.stdout, indent=2)
    sys.stdout.write("\n")
