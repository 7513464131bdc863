"""``retuner manual``: the man page, written from the argument parser."""

from __future__ import annotations

from retuner import __version__
from retuner.manual import man_page
from retuner.outfile import write_atomic

NAME = "manual"
HELP = "print the man page (roff), written from the options themselves"
ORDER = 90
DESCRIPTION = ("Print retuner's man page in man(7) format, made from the same argument parser as every "
               "--help, so it always matches this version. Install it with, e.g., "
               "'retuner manual -o ~/.local/share/man/man1/retuner.1' and read it with 'man retuner'.")


def add_arguments(parser) -> None:
    parser.add_argument("-o", "--output", metavar="FILE", help="write to FILE instead of standard output")


def run(args) -> int:
    text = man_page(args._parser, __version__)
    if args.output:
        write_atomic(args.output, text)
    else:
        print(text, end="")
    return 0
