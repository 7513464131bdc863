"""``retuner show ID``: a tuning as a table for a projector, or every key as JSON."""

from __future__ import annotations

from retuner.profiles.profile import load_profile
from retuner.view import plot
from retuner.view.showtable import degree_rows, format_ratio, interval_rows
from retuner.pitch.tuning import NUM_KEYS, ratio_to_cents, rounded
from retuner.commands._common import add_profile_dir, print_json
from retuner.errors import RetunerError

NAME = "show"
HELP = "print a tuning: its degrees, and the size and beat rate of every third and fifth"
ORDER = 20
DESCRIPTION = (
    "Print a tuning as a table. Beat rate of an interval near the just ratio p:q (upper:lower), "
    "lower tone f1, upper tone f2: the p-th partial of the lower tone and the q-th partial of the "
    "upper tone nearly coincide and beat at |q*f2 - p*f1| Hz.")


def add_arguments(parser):
    parser.add_argument("id", help="profile id (see 'retuner profiles') or a path to a profile file")
    parser.add_argument("--octave", type=int, default=4, choices=range(0, 9), metavar="N",
                        help="octave (scientific pitch notation, C4 = middle C) for Hz and beat rates; default 4")
    parser.add_argument("--json", action="store_true", help="print every key's Hz and cents as JSON")
    parser.add_argument("--plot", metavar="FILE.png",
                        help="draw a picture instead of the table: each degree against 12-EDO and, for "
                             "12-note tunings, the fifths and major thirds around the circle of fifths with "
                             "their beat rates in --octave (needs matplotlib: pip install 'retuner[plot]')")
    parser.add_argument("--beside", metavar="ID",
                        help="with --plot: draw this second tuning beside the first, for comparison")
    add_profile_dir(parser)


def run(args) -> int:
    if args.beside and not args.plot:
        raise RetunerError("only works with --plot", field="--beside")
    if args.plot:
        plot.require_matplotlib()
    t = load_profile(args.id, args.profile_dirs)
    if args.plot:
        tunings = [t] + ([load_profile(args.beside, args.profile_dirs)] if args.beside else [])
        plot.plot_tunings(tunings, args.plot, args.octave)
        print(f"wrote {args.plot}")
        return 0
    if args.json:
        print_json({
            "id": t.id,
            "description": t.description,
            "source": t.source,
            # cents: from key 0's 12-EDO pitch (as the control socket counts); offset_cents:
            # from the key's own 12-EDO pitch; a degree's cents_from_root: above the root
            "keys": [{"key": k, "hz": t.hz(k), "cents": t.cents[k],
                      "offset_cents": None if t.cents[k] is None else t.cents[k] - 100.0 * k}
                     for k in range(NUM_KEYS)],
            "degrees": [{"degree": r.index, "name": r.name, "cents_from_root": r.cents,
                         "ratio": format_ratio(r.ratio), "ratio_exact": r.exact}
                        for r in degree_rows(t, args.octave)],
        })
        return 0
    print(f"{t.id}: {t.description}")
    if t.source:
        print(f"source: {t.source}")
    period = t.period.as_fraction
    print(f"period: {format_ratio(period) if period is not None else ''} ({t.period.cents:.3f} cents), {len(t.degrees)} degrees, "
          f"A4 (key 69) = {t.hz(69):.3f} Hz" if t.hz(69) else "")
    print()
    hz_head = f"Hz (oct {args.octave})" if t.is_twelve else f"Hz (key {t.root}+)"
    print("from root: cents above the root; from 12-EDO: cents of the key as it sounds from the same "
          "key in 12-EDO; ratio: exact, or ~ the nearest simple one and how far the degree is from it")
    print(f"{'degree':>6}  {'name':<5} {'from root (c)':>13} {'from 12-EDO (c)':>15}  {'ratio':<16} {hz_head:>12}")
    for r in degree_rows(t, args.octave):
        if r.exact:
            ratio = format_ratio(r.ratio)
        else:
            ratio = f"~{format_ratio(r.ratio)} {rounded(r.cents - ratio_to_cents(r.ratio), 1):+.1f}c"
        hz = f"{r.hz:.3f}" if r.hz is not None else "unmapped"
        print(f"{r.index:>6}  {r.name:<5} {rounded(r.cents):>13.3f} {rounded(r.from_edo12):>+15.3f}  "
              f"{ratio:<16} {hz:>12}")
    if t.is_twelve:
        print()
        print(f"intervals from each key of octave {args.octave} "
              f"(beat rate = |q*f2 - p*f1| for the just ratio p:q)")
        print(f"{'from':<4} {'interval':<12} {'to':<3} {'cents':>9} {'from just (c)':>13}  {'just':<4} "
              f"{'beat rate (Hz)':>14}")
        for r in interval_rows(t, args.octave):
            print(f"{r.lower:<4} {r.kind:<12} {r.upper:<3} {rounded(r.cents):>9.3f} {rounded(r.deviation):>+13.3f}  "
                  f"{format_ratio(r.just):<4} {r.beat_hz:>14.2f}")
    return 0
