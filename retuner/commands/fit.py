"""``retuner fit``: the fixed 12-note tuning that suits a piece best."""

from __future__ import annotations

import sys

from retuner.errors import RetunerError
from retuner.pitch.tuning import rounded
from retuner.profiles.profile import parse_profile
from retuner.commands._engine_options import channel_list
from retuner.commands._common import add_old_name, add_profile_dir


NAME = "fit"
HELP = "fit a fixed 12-note tuning to a piece (least impurity of its consonant intervals)"
ORDER = 60
DESCRIPTION = ("Compute the 12-note tuning (one pitch per pitch class, pure octaves) that minimises "
               "the time-weighted deviation from just (mean absolute, or squared with --norm squares) "
               "of the piece's sounding consonant intervals, write it as a profile, and compare its impurity with 12-EDO, "
               "quarter-comma meantone and well temperaments on the same piece.")


def add_arguments(parser) -> None:
    parser.add_argument("input", metavar="IN.mid", help="the piece (MIDI file)")
    parser.add_argument("-o", "--output", metavar="FILE.yaml", required=True, help="profile to write")
    parser.add_argument("--id", dest="profile_id", help="profile id (default: from the output file name)")
    parser.add_argument("--concert-pitch", type=float, default=440.0, metavar="HZ",
                        help="the frequency of A4 in the written profile (default 440)")
    add_old_name(parser, "--reference", "--concert-pitch", "concert_pitch", type=float, metavar="HZ")
    parser.add_argument("--max-deviation", type=float, metavar="CENTS",
                        help="no pitch class further than this from 12-EDO (A4 at the concert pitch)")
    parser.add_argument("--max-wolf", type=float, metavar="CENTS",
                        help="no fifth of the 12 further than this from a pure 3/2 (at least 1.955)")
    parser.add_argument("--per-key", action="store_true",
                        help="every key its own pitch (keyboards with split keys): octaves are fitted too")
    parser.add_argument("--norm", choices=["abs", "squares"], default="abs",
                        help="abs (default): minimise the impurity itself, the time-weighted mean |deviation| "
                             "(iteratively reweighted least squares); squares: plain weighted least squares")
    parser.add_argument("--exclude-channels", type=channel_list, default=[10], metavar="LIST",
                        help="channels left out of the fit, e.g. percussion (default 10; 'none')")
    add_old_name(parser, "--passthrough", "--exclude-channels", "exclude_channels", type=channel_list,
                 metavar="LIST")
    parser.add_argument("--profiles", metavar="LIST",
                        help="comma-separated profiles to compare (default: edo12, meantone-quarter, "
                             "werckmeister-3, kirnberger-3, vallotti, young-2)")
    add_profile_dir(parser, help="more folders of profiles for --profiles (may be given more than once)")


def run(args) -> int:
    # lazy: the fit solves with numpy, which no other command needs at start-up
    from retuner.measure import fit
    if not (args.concert_pitch > 0):
        raise RetunerError(f"must be a positive frequency in Hz, got {args.concert_pitch:g}",
                           field="--concert-pitch")
    for option, value in (("--max-deviation", args.max_deviation), ("--max-wolf", args.max_wolf)):
        if value is not None and not value >= 0:
            raise RetunerError(f"must be 0 or more cents, got {value:g}", field=option)
    notes = fit.read_notes(args.input, passthrough=[c - 1 for c in args.exclude_channels])
    weights = fit.pair_weights(notes)
    if not weights:
        raise RetunerError("the piece has no two notes sounding together in a consonant interval",
                           file=args.input)
    result = fit.fit_tuning(weights, max_deviation=args.max_deviation, max_wolf=args.max_wolf,
                            norm=args.norm, per_key=args.per_key)
    pid = args.profile_id or fit.profile_id_for(args.output)
    text = fit.profile_yaml(result, profile_id=pid, source_name=args.input, reference_hz=args.concert_pitch)
    parse_profile(text, args.output)         # what we write must load
    fit.write_atomic(args.output, text)
    ids = [s.strip() for s in args.profiles.split(",") if s.strip()] if args.profiles else list(fit.COMPARE_PROFILES)
    rows = [(pid + " (fitted)", result.impurity)] + fit.compare(weights, ids, args.profile_dirs)
    seconds = sum(weights.values())
    print(f"{args.input}: {len(notes)} notes; consonant pairs sound {seconds:.1f} s in all "
          f"(pairs counted separately); wrote {args.output}")
    if result.key_offsets is not None:
        played = result.used
        print("per key, cents from 12-EDO: " + "  ".join(
            f"{k}:{rounded(result.key_offsets[k], 2):+.2f}" for k in played))
    else:
        names = ("C", "C#", "D", "Eb", "E", "F", "F#", "G", "G#", "A", "Bb", "B")
        used = set(result.used)
        print("offsets from 12-EDO (cents; '.' = not in any consonant pair, left at 12-EDO): "
              + "  ".join(f"{n} {rounded(v, 2):+.2f}" if i in used else f"{n} ."
                          for i, (n, v) in enumerate(zip(names, result.offsets))))
    if result.active:
        print("binding limits: " + ", ".join(result.active))
    w = max(len(r[0]) for r in rows)
    print(f"{'profile':<{w}}  impurity (cents)")
    for name, imp in rows:
        print(f"{name:<{w}}  {imp:8.3f}")
    sys.stdout.flush()
    return 0
