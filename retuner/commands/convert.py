"""``retuner convert``: retune MIDI files (one file, or every .mid below a folder)."""

from __future__ import annotations

import os
import sys

from retuner.engine.outputs import MODES
from retuner.errors import RetunerError
from retuner.commands._common import add_profiles_dir
from retuner.commands._engine_options import add_engine_arguments, build_engine_config, engine_overrides

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
                        help="tuning (profile id or YAML file; default edo12)")
    add_profiles_dir(parser)
    add_engine_arguments(parser)
    parser.add_argument("--merge-parts", action="store_true",
                        help="one engine and one pool for all parts, as the live daemon treats a "
                             "multi-channel input (parts share channels, programs and controllers)")
    parser.add_argument("--lookahead", action="store_true",
                        help="with --adaptive: plan the tuning over the whole file (files only)")
    o = parser.add_argument_group("output")
    o.add_argument("--report", metavar="FILE.json", help="write the measures as JSON (and print a summary)")
    o.add_argument("--plot", metavar="FILE.png", help="draw each note's deviation from 12-EDO over time "
                   "(needs matplotlib: pip install 'retuner[plot]')")
    o.add_argument("--jobs", "-j", type=int, default=None, metavar="N",
                   help="worker processes for a folder (default: number of CPUs)")
    o.add_argument("-q", "--quiet", action="store_true", help="no summary on stdout")


def build_options(args):
    """ConvertOptions from the command line."""
    from retuner.convert.files import ConvertOptions
    from retuner.profiles.profile import load_profile

    tuning = load_profile(args.profile, args.profiles_dir)
    if args.lookahead and not args.adaptive:
        raise RetunerError("needs --adaptive", field="--lookahead")
    cfg = build_engine_config(engine_overrides(args))
    return ConvertOptions(tuning, cfg, lookahead=args.lookahead,
                          want_report=bool(args.report or args.plot or not args.quiet),
                          merge_parts=args.merge_parts)


def _one_blas_thread() -> None:
    """The lookahead planner solves many small dense systems: BLAS threads only contend for
    them (and batches run one process per CPU anyway). Takes effect only if numpy is not
    loaded yet."""
    if "numpy" not in sys.modules:
        for var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
            os.environ.setdefault(var, "1")


def run(args) -> int:
    _one_blas_thread()
    from retuner.convert import files

    if args.plot:
        from retuner.measure.report import require_matplotlib
        require_matplotlib()
    opts = build_options(args)
    if os.path.isdir(args.input):
        if args.report or args.plot:
            raise RetunerError("--report and --plot are for single files", field="--report")
        return files.convert_batch(args.input, args.output, opts, jobs=args.jobs, quiet=args.quiet)
    from retuner.measure import report as rp
    res = files.convert_file(args.input, args.output, opts)
    if res.split:
        names = ", ".join(os.path.basename(o.path) for o in res.outputs)
        why = ("in MPE mode a port holds two parts (one per zone)" if MODES[opts.config.mode].zone_per_part
               else "the parts need more channels than the pool has")
        print(f"retuner: {why}: wrote {len(res.outputs)} files ({names}), each playable on its own",
              file=sys.stderr)
    summary = rp.build_report(res, opts)
    if args.report:
        rp.write_report(args.report, summary)
    if args.plot:
        rp.plot(res, opts, args.plot)
    if not args.quiet:
        print(rp.text_summary(summary))
    return 0
