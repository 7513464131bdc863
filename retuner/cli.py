"""The command line: thin. Each sub-command lives in ``retuner/commands/<name>.py``.

A command module defines::

    NAME = "show"            # the sub-command
    HELP = "one line"        # shown in ``retuner --help``
    ORDER = 20               # position in the help listing
    def add_arguments(parser): ...
    def run(args) -> int: ...  # exit status

Errors a user can cause are raised as :class:`retuner.errors.RetunerError` and
printed here as one line with exit status 2; something outside that is not there
(the MIDI system, the daemon) is :class:`retuner.errors.Unavailable`, status 1.
The exit status is decided here only, so every command gives the same one for
the same error.
"""

from __future__ import annotations

import argparse
import difflib
import importlib
import pkgutil
import sys

from retuner import __version__
from retuner import commands as _commands_pkg
from retuner.errors import RetunerError, Unavailable


def _command_modules():
    mods = []
    for info in pkgutil.iter_modules(_commands_pkg.__path__):
        if info.name.startswith("_"):
            continue
        mod = importlib.import_module(f"{_commands_pkg.__name__}.{info.name}")
        if hasattr(mod, "NAME") and hasattr(mod, "run"):
            mods.append(mod)
    mods.sort(key=lambda m: (getattr(m, "ORDER", 100), m.NAME))
    return mods


class _Parser(argparse.ArgumentParser):
    """Usage mistakes are one line (and exit status 2), like every other mistake. An unknown
    option is reported by the sub-command it was given to, with the nearest option it has."""

    def parse_known_args(self, args=None, namespace=None):
        ns, extras = super().parse_known_args(args, namespace)
        if extras and self._subparsers is None:
            return ns, extras
        if extras:
            # the innermost sub-command given: it names the unknown option and its own help
            parser = self
            while parser._subparsers is not None:
                action = next((a for a in parser._subparsers._group_actions
                               if isinstance(a, argparse._SubParsersAction)), None)
                chosen = getattr(ns, action.dest, None) if action is not None else None
                if chosen not in (action.choices if action is not None else {}):
                    break
                parser = action.choices[chosen]
            if parser is not self:
                parser.error(unknown_options_message(parser, extras))
        return ns, extras

    def _get_option_tuples(self, option_string):
        # an abbreviation matching a name now and an old name (kept for one release) means the
        # name now: "--whole-semitone" is "--whole-semitone-range", not ambiguous with the old one
        found = super()._get_option_tuples(option_string)
        current = [t for t in found if not hasattr(t[0], "new")]
        return current if current else found

    def error(self, message: str):  # noqa: D401 - argparse's hook
        self.exit(2, f"{self.prog}: {message} (see '{self.prog} --help')\n")


def unknown_options_message(parser: argparse.ArgumentParser, extras: list[str]) -> str:
    """'unrecognized arguments: --profles-dir x; did you mean --profile-dir?'"""
    message = f"unrecognized arguments: {' '.join(extras)}"
    # every long option, an old name standing for its name now
    known = {o: getattr(a, "new", o) for o, a in parser._option_string_actions.items() if o.startswith("--")}
    for word in extras:
        if word.startswith("-"):
            near = difflib.get_close_matches(word.split("=", 1)[0], list(known), n=1, cutoff=0.6)
            if near:
                return f"{message}; did you mean {known[near[0]]}?"
    return message


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="retuner",
        description="Give every MIDI note the exact pitch of a tuning: live, or in MIDI files.",
    )
    parser.add_argument("--version", action="version", version=f"retuner {__version__}")
    # the whole parser, for the commands that write the man page and the shell completion from it
    parser.set_defaults(_parser=parser)
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for mod in _command_modules():
        p = sub.add_parser(mod.NAME, help=mod.HELP, description=getattr(mod, "DESCRIPTION", mod.HELP))
        mod.add_arguments(p)
        p.set_defaults(_run=mod.run)
    return parser


def exit_status(exc: RetunerError) -> int:
    """The exit status for an error: 2 for a mistake, 1 for something that is not there (yet)."""
    return exc.exit_status


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "_run", None):
        parser.print_help()
        return 2
    try:
        return int(args._run(args) or 0)
    except RetunerError as exc:
        print(f"retuner: {exc}", file=sys.stderr)
        return exit_status(exc)
    except BrokenPipeError:
        return 0
    except KeyboardInterrupt:
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
