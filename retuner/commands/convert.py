"""``retuner convert``: retune MIDI files (one file, or every .mid below a folder)."""

from __future__ import annotations

import os
import sys

from retuner.engine.outputs import MODES
from retuner.commands._common import add_profile_dir
from retuner.commands._engine_options import add_engine_arguments, build_engine_config, engine_overrides
from retuner.convert.batch import convert_batch
from retuner.convert.conversion import ConvertOptions, convert_file
from retuner.errors import RetunerError
from retuner.measure import report as rp
from retuner.profiles.profile import load_profile

NAME = "convert"
HELP = "retune a MIDI file (or every .mid below a folder) into new MIDI files"
ORDER = 30
DESCRIPTION = (
    "Play a MIDI file through the engine on the file's own clock (its tempo map) and write the "
    "result with every event at its original tick; tempo, time signature, markers, lyrics and "
    "other meta events are kept, percussion (channel 10) passes byte for byte. Each source "
    "channel (part) gets its own output channels; when the parts need more channels than one "
    "port has, one file per group of parts is written (OUT-part1.mid, OUT-part2.mid, ...). "
    "With a folder as input, every .mid below it is converted in parallel into OUTDIR (same "
    "relative paths). Files are written atomically: a bad input gives one line and no output. "
    "Channels are 1..16.")


def add_arguments(parser) -> None:
    parser.add_argument("input", metavar="IN", help="a MIDI file (type 0 or 1), or a folder of them")
    parser.add_argument("-o", "--output", required=True, metavar="OUT",
                        help="output file (or output folder when IN is a folder)")
    parser.add_argument("--profile", default="edo12", metavar="ID",
                        help="the profile to play (id or YAML file; default edo12)")
    add_profile_dir(parser)
    add_engine_arguments(parser)
    parser.add_argument("--merge-parts", action="store_true",
                        help="one engine and one pool for all parts, as the live daemon treats a "
                             "multi-channel input (parts share the channels, each channel dressed with "
                             "the program and controllers of the part it plays; pedals shared)")
    parser.add_argument("--parts-apart", action="store_true",
                        help="with --adaptive: tune each part on its own (default: the parts are "
                             "tuned together as one harmony, each on its own channels)")
    parser.add_argument("--live", action="store_true",
                        help="play the file as the daemon hears it live: the same decisions and the "
                             "same added latency (a --chord-window delays notes); the summary gives "
                             "the added latency per note-on")
    parser.add_argument("--lookahead", action="store_true",
                        help="with --adaptive: plan the tuning over the whole file (files only)")
    o = parser.add_argument_group("output")
    o.add_argument("--report", metavar="FILE.json", help="write the measures as JSON (and print a summary)")
    o.add_argument("--plot", metavar="FILE.png", help="draw each note's deviation from 12-EDO over time "
                   "(needs matplotlib: pip install 'retuner[plot]')")
    o.add_argument("--jobs", "-j", type=int, default=None, metavar="N",
                   help="worker processes for a folder (default: number of CPUs)")
    o.add_argument("-q", "--quiet", action="store_true",
                   help="no summary (it is not even computed); only errors, and the one line "
                        "that says where split output went")


def build_options(args):
    """ConvertOptions from the command line."""
    tuning = load_profile(args.profile, args.profile_dirs)
    if args.lookahead and not args.adaptive:
        raise RetunerError("needs --adaptive", field="--lookahead")
    cfg = build_engine_config(engine_overrides(args))
    if args.live and args.lookahead:
        raise RetunerError("plans over the whole file, which live playing cannot: choose one", field="--lookahead")
    return ConvertOptions(tuning, cfg, lookahead=args.lookahead, live=args.live,
                          want_report=bool(args.report or args.plot or not args.quiet),
                          merge_parts=args.merge_parts, parts_apart=args.parts_apart)


def _one_blas_thread() -> None:
    """The lookahead planner solves many small dense systems: BLAS threads only contend for
    them (and batches run one process per CPU anyway). Takes effect only if numpy is not
    loaded yet."""
    if "numpy" not in sys.modules:
        for var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
            os.environ.setdefault(var, "1")


class _Progress:
    """Progress of a long conversion (the lookahead) on stderr: one line rewritten in place
    on a terminal, nothing otherwise (a log should not fill with it)."""

    def __init__(self, stream):
        self.stream = stream
        self.tty = hasattr(stream, "isatty") and stream.isatty()
        self.shown = False

    def __call__(self, text: str) -> None:
        if self.tty:
            self.stream.write("\r\x1b[K" + text)
            self.stream.flush()
            self.shown = True

    def done(self) -> None:
        if self.shown:
            self.stream.write("\r\x1b[K")
            self.stream.flush()


def run(args) -> int:
    _one_blas_thread()
    if args.plot:
        rp.require_matplotlib()
    opts = build_options(args)
    if os.path.isdir(args.input):
        if args.report or args.plot:
            raise RetunerError("is for a single file, not a folder (so is --plot)",
                               field="--report" if args.report else "--plot")
        return convert_batch(args.input, args.output, opts, jobs=args.jobs, quiet=args.quiet)
    progress = _Progress(sys.stderr) if opts.lookahead and not args.quiet else None
    try:
        res = convert_file(args.input, args.output, opts, progress)
    finally:
        if progress is not None:
            progress.done()
    if res.split:     # said even with -q: the output is not where -o said
        names = ", ".join(os.path.basename(o.path) for o in res.outputs)
        why = ("in MPE mode a port holds two parts (one per zone)" if MODES[opts.config.mode].zone_per_part
               else "the parts need more channels than the pool has")
        how = ("the parts of all of them tuned as one harmony: play them together, a port each"
               if res.one_harmony else "each playable on its own")
        print(f"retuner: {why}: wrote {len(res.outputs)} files ({names}), {how} (the drums, lyrics and "
              f"markers in the first)", file=sys.stderr)
    if not (args.report or args.plot or not args.quiet):
        return 0      # -q and nothing asked for: the measures are not computed at all
    decoded = rp.decode_outputs(res, opts)
    summary = rp.build_report(res, opts, decoded)
    if args.report:
        rp.write_report(args.report, summary)
    if args.plot:
        rp.plot(res, opts, args.plot, decoded)
    if not args.quiet:
        print(rp.text_summary(summary))
    return 0
