"""``retuner convert``: retune MIDI files (one file, or every .mid below a folder)."""

from __future__ import annotations

import argparse
import os
import sys

from ..errors import RetunerError
from ._common import add_profiles_dir

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


def _channels(text: str) -> list[int]:
    """'1-9,11-16' -> [1..9, 11..16] (1-based, as the user sees channels)."""
    out: list[int] = []
    try:
        for part in text.split(","):
            part = part.strip()
            if not part:
                continue
            if "-" in part:
                a, b = part.split("-", 1)
                out.extend(range(int(a), int(b) + 1))
            else:
                out.append(int(part))
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a channel list: {text!r} (e.g. 1-9,11-16)")
    if any(not 1 <= c <= 16 for c in out):
        raise argparse.ArgumentTypeError("channels are 1..16, e.g. 1-9,11-16")
    return out


def _channels_or_none(text: str) -> list[int]:
    if text.strip().lower() in ("", "none"):
        return []
    return _channels(text)


def add_arguments(parser) -> None:
    parser.add_argument("input", metavar="IN", help="a MIDI file (type 0 or 1), or a folder of them")
    parser.add_argument("-o", "--output", required=True, metavar="OUT",
                        help="output file (or output folder when IN is a folder)")
    parser.add_argument("--profile", default="edo12", metavar="ID",
                        help="tuning (profile id or YAML file; default edo12)")
    add_profiles_dir(parser)
    g = parser.add_argument_group("engine")
    g.add_argument("--mode", choices=("pool", "mpe", "mts"), default="pool",
                   help="pool: per-note bend on a channel pool (default); mpe; mts: MIDI Tuning Standard")
    g.add_argument("--channels", type=_channels, metavar="LIST",
                   help="output channels of the pool (default all but the passthrough channels)")
    g.add_argument("--passthrough-channels", type=_channels_or_none, default=[10], metavar="LIST",
                   help="input channels copied byte for byte, e.g. percussion (default 10; 'none')")
    g.add_argument("--bend-range", type=float, default=None, metavar="SEMITONES",
                   help="pitch bend range announced with RPN 0 (default 2; MPE members 48)")
    g.add_argument("--release-time", type=float, default=2.0, metavar="SECONDS",
                   help="a channel rings this long after its last note (default 2)")
    g.add_argument("--bend-scale", type=float, default=1.0, metavar="FACTOR",
                   help="synth correction: played / specified bend size (e.g. 0.9921875 = 127/128)")
    g.add_argument("--whole-semitones", action="store_true",
                   help="synth ignores the cents part of the bend range: whole semitones only")
    g.add_argument("--merge-parts", action="store_true",
                   help="one engine and one pool for all parts, as the live daemon treats a "
                        "multi-channel input (parts share channels, programs and controllers)")
    g.add_argument("--mpe-zone", choices=("lower", "upper"), default="lower")
    g.add_argument("--mpe-members", type=int, default=None, metavar="N")
    a = parser.add_argument_group("adaptive")
    a.add_argument("--adaptive", action="store_true", help="adaptive just intonation (as the live daemon)")
    a.add_argument("--lookahead", action="store_true",
                   help="with --adaptive: plan the tuning over the whole file (files only)")
    a.add_argument("--policy", default=None, help="fixed-held, limited or free, optionally +reset")
    a.add_argument("--chord-window", type=float, default=None, metavar="SECONDS")
    a.add_argument("--max-drift", type=float, default=None, metavar="CENTS")
    a.add_argument("--max-motion", type=float, default=None, metavar="CENTS")
    a.add_argument("--limit", choices=("5", "7"), default=None, help="5-limit (default) or 7-limit table")
    a.add_argument("--reference", choices=("edo12", "profile"), default=None)
    o = parser.add_argument_group("output")
    o.add_argument("--report", metavar="FILE.json", help="write the measures as JSON (and print a summary)")
    o.add_argument("--plot", metavar="FILE.png", help="draw each note's deviation from 12-EDO over time "
                   "(needs matplotlib: pip install 'retuner[plot]')")
    o.add_argument("--jobs", "-j", type=int, default=None, metavar="N",
                   help="worker processes for a folder (default: number of CPUs)")
    o.add_argument("-q", "--quiet", action="store_true", help="no summary on stdout")


def build_options(args):
    """ConvertOptions from the command line."""
    from ..engine import EngineConfig
    from ..files import ConvertOptions
    from ..profile import load_profile

    tuning = load_profile(args.profile, args.profiles_dir)
    pas = tuple(sorted({c - 1 for c in args.passthrough_channels}))
    kw = dict(mode=args.mode, passthrough=pas, release_time=args.release_time,
              bend_scale=args.bend_scale, whole_semitone_range=args.whole_semitones,
              mpe_zone=args.mpe_zone)
    if args.channels:
        kw["pool"] = tuple(c - 1 for c in args.channels)
    else:
        kw["pool"] = tuple(c for c in range(16) if c not in pas)
    if args.bend_range is not None:
        if args.mode == "mpe":
            kw["mpe_member_range"] = args.bend_range
        else:
            kw["bend_range"] = args.bend_range
    if args.mpe_members is not None:
        kw["mpe_members"] = args.mpe_members
    if args.lookahead and not args.adaptive:
        raise RetunerError("--lookahead needs --adaptive", field="--lookahead")
    if args.adaptive:
        from ..adaptive import AdaptiveConfig
        d = {}
        for opt in ("policy", "chord_window", "max_drift", "max_motion", "limit", "reference"):
            v = getattr(args, opt)
            if v is not None:
                d[opt] = v
        kw["adaptive"] = AdaptiveConfig.from_dict(d)
    else:
        for opt in ("policy", "chord_window", "max_drift", "max_motion", "limit", "reference"):
            if getattr(args, opt) is not None:
                raise RetunerError("adaptive settings need --adaptive", field="--" + opt.replace("_", "-"))
    try:
        cfg = EngineConfig(**kw).validate()
    except RetunerError as exc:
        opt = {"pool": "--channels", "passthrough": "--passthrough-channels"}.get(exc.field or "")
        if opt:
            exc.field = opt
        elif exc.field:
            exc.field = "--" + exc.field.replace("_", "-")
        raise
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
    from .. import files

    if args.plot:
        from ..report import require_matplotlib
        require_matplotlib()
    opts = build_options(args)
    if os.path.isdir(args.input):
        if args.report or args.plot:
            raise RetunerError("--report and --plot are for single files", field="--report")
        return files.convert_batch(args.input, args.output, opts, jobs=args.jobs, quiet=args.quiet)
    from .. import report as rp
    res = files.convert_file(args.input, args.output, opts)
    if res.split:
        names = ", ".join(os.path.basename(o.path) for o in res.outputs)
        why = ("in MPE mode a port holds two parts (one per zone)" if opts.config.mode == "mpe"
               else "the parts need more channels than one port has")
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
