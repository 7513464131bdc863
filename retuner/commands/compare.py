"""``retuner compare``: how a piece sounds in several tunings, to choose one."""

from __future__ import annotations

import argparse

from retuner.commands._common import add_old_name, add_profile_dir, print_json
from retuner.commands._engine_options import channel_list as _channels_or_none
from retuner.commands.convert import _one_blas_thread
from retuner.convert.compare import compare
from retuner.engine.core import EngineConfig
from retuner.errors import RetunerError
from retuner.measure import report
from retuner.profiles.profile import load_profile
from retuner.smf.reader import read_smf
from retuner.view import plot

NAME = "compare"
HELP = "compare tunings on a MIDI file: impurity, motion, drift and beat rates of its main intervals"
ORDER = 32
DESCRIPTION = (
    "Convert a MIDI file in memory with each tuning and measure the output: impurity (mean "
    "distance of consonant pairs from just, weighted by time), motion (cents per note), drift "
    "(largest mean deviation from 12-EDO) and the beat rates of the piece's most frequent "
    "consonant key pairs. Beat rate of an interval near the just ratio p:q (upper:lower), lower "
    "tone f1, upper tone f2: |q*f2 - p*f1| Hz. With --adaptive, adaptive tuning (live, and with "
    "lookahead) is added, played with the first tuning listed as its profile.")


def add_arguments(parser) -> None:
    parser.add_argument("input", metavar="IN.mid")
    parser.add_argument("--profiles", default="edo12,meantone-quarter,werckmeister-3", metavar="LIST",
                        help="comma-separated profile ids or files (default edo12,meantone-quarter,werckmeister-3)")
    parser.add_argument("--adaptive", action="store_true", help="add adaptive tuning (live and lookahead)")
    parser.add_argument("--top", type=int, default=5, metavar="N", help="how many intervals (default 5)")
    parser.add_argument("--exclude-channels", default="10", metavar="LIST",
                        help="input channels left out of the measures, e.g. percussion (default 10; 'none')")
    add_old_name(parser, "--passthrough", "--exclude-channels", "exclude_channels", metavar="LIST")
    parser.add_argument("--json", action="store_true", help="print JSON")
    parser.add_argument("--plot", metavar="FILE.png", help="also draw the tunings side by side (degrees, fifths, "
                        "major thirds, beat rates from middle C; needs matplotlib: pip install 'retuner[plot]')")
    add_profile_dir(parser)


def run(args) -> int:
    _one_blas_thread()

    names = [n.strip() for n in args.profiles.split(",") if n.strip()]
    if not names:
        raise RetunerError("give at least one profile", field="--profiles")
    if not 1 <= args.top <= 50:
        raise RetunerError("must be 1..50", field="--top")
    try:
        pas = tuple(sorted(c - 1 for c in _channels_or_none(args.exclude_channels)))
    except argparse.ArgumentTypeError as exc:
        raise RetunerError(str(exc), field="--exclude-channels")
    tunings = [load_profile(n, args.profile_dirs) for n in names]
    song = read_smf(args.input)
    cfg = EngineConfig(passthrough=pas, pool=tuple(c for c in range(16) if c not in pas)).validate()
    acfg = None
    if args.adaptive:
        # lazy: the solver loads numpy, which must come after _one_blas_thread
        from retuner.adaptive.solver import AdaptiveConfig
        acfg = AdaptiveConfig()
    c = compare(song, tunings, cfg, adaptive_config=acfg, top=args.top)
    if args.plot:
        plot.plot_tunings(tunings, args.plot)
    if args.json:
        print_json(c)
    else:
        print(report.compare_text(c))
    return 0
