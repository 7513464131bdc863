"""``retuner bench``: latency and economy of the engine on a generated performance."""

from __future__ import annotations

from retuner.bench.files import convert_speed_bench
from retuner.bench.performance import performance, performance_names
from retuner.bench.progressions import adaptive_bench, format_adaptive_bench
from retuner.bench.timing import JSON_KEYS, measure
from retuner.engine.core import EngineConfig, MODES
from retuner.errors import RetunerError
from retuner.profiles.profile import load_profile
from retuner.commands._common import add_profile_dir, print_json

NAME = "bench"
HELP = "play a generated performance through the engine and print latency and message figures"
ORDER = 80
DESCRIPTION = (
    "Play a seeded, generated performance (at least 10 000 note events, chords of up to 8 voices, "
    "sustain pedal, wheel) through the engine in this process and print the latency of each event "
    "(p50/p99/max, microseconds), messages sent per note-on, ringing retunes and steals.")


def add_arguments(parser):
    parser.add_argument("--profile", default="meantone-quarter", metavar="ID",
                        help="profile id or path (default meantone-quarter)")
    parser.add_argument("--mode", choices=tuple(MODES), default=EngineConfig.mode,
                        help=f"output mode (default {EngineConfig.mode})")
    parser.add_argument("--adaptive", action="store_true", help="adaptive mode with default settings")
    parser.add_argument("--performance", default="generated", metavar="NAME",
                        help="what to play: 'generated' (default) or a progression name")
    parser.add_argument("--events", type=int, default=10000, metavar="N",
                        help="note events (note-ons + note-offs) at least (default 10000)")
    parser.add_argument("--seed", type=int, default=1, help="seed of the generated performance (default 1)")
    parser.add_argument("--clock", choices=("wall", "cpu"), default="wall",
                        help="time each event by the wall clock (default) or by this thread's CPU time "
                             "(steadier on a busy machine)")
    parser.add_argument("--files", action="store_true",
                        help="measure file conversion instead: generated files against mido loading and "
                             "saving them (100 000 events; a piano-like 10 000 with the summary), "
                             "--lookahead against plain --adaptive, peak memory on 1 000 000 events, "
                             "and a batch with 1..N worker processes")
    parser.add_argument("--jack", action="store_true",
                        help="measure the daemon under a JACK server instead (one is started with its dummy "
                             "driver when none runs): idle CPU in percent of a core and note-on latency in "
                             "ms and in JACK periods, static and adaptive")
    parser.add_argument("--idle", type=float, default=10.0, metavar="SECONDS",
                        help="with --jack: how long the idle daemon is measured (default 10)")
    parser.add_argument("--notes", type=int, default=50, metavar="N",
                        help="with --jack: note-ons timed in each play (default 50)")
    parser.add_argument("--turns", type=int, default=1, metavar="N",
                        help="with --jack: measure each play N times, the checkouts taking turns, and give "
                             "the median idle CPU (default 1)")
    parser.add_argument("--against", metavar="REPO",
                        help="with --jack: also measure the daemon of another checkout, in the same run")
    parser.add_argument("--against-python", metavar="PYTHON",
                        help="with --against: the Python that runs it (default this one)")
    parser.add_argument("--json", action="store_true", help="print the figures as one JSON object")
    add_profile_dir(parser)


def _files_bench(args) -> int:
    figs = convert_speed_bench(profile=args.profile, batch_events=40_000)
    if args.json:
        print_json(figs)
        return 0
    g = figs["goals"]
    print(f"convert {figs['events']} events ({figs['profile']}): {figs['convert_s']:.3f} s; "
          f"mido load+save {figs['mido_load_save_s']:.3f} s; x{figs['time_ratio']:.2f} mido's time "
          f"(goal <= {g['time_ratio']:g}); {figs['events_per_s']} events/s")
    p = figs["piano"]
    print(f"piano-like file of {p['events']} events, converted with its summary: "
          f"{p['convert_with_summary_s']:.3f} s; mido load+save {p['mido_load_save_s']:.3f} s; "
          f"x{p['time_ratio']:.2f} mido's time (goal <= {g['piano_time_ratio']:g})")
    if "lookahead_s" in p:
        print(f"  convert --adaptive on {p['lookahead_events']} events: {p['adaptive_s']:.3f} s, "
              f"with --lookahead {p['lookahead_s']:.3f} s: "
              f"x{p['lookahead_time_ratio']:.2f} (goal <= {g['lookahead_time_ratio']:g})")
    if "big" in figs:
        b = figs["big"]
        state = "" if b["status"] == 0 else f" FAILED (exit {b['status']}: {b['error']})"
        print(f"retuner convert with its summary on {b['events']} events ({b['file_mb']} MB): "
              f"{b['time_s']:.1f} s, peak RSS {b['peak_rss_mb']:.0f} MB "
              f"(goal <= {g['big_peak_rss_mb']:g} MB){state}")
    b = figs["batch"]
    runs = ", ".join(f"{j} worker(s) {t:.2f} s (x{b['speedup'][j]:.2f})" for j, t in b["time_s_by_jobs"].items())
    print(f"batch of {b['files']} files x {b['events_per_file']} events on {b['cpus']} CPUs: {runs}")
    return 0


def _jack_bench(args) -> int:
    from retuner.bench.jacklive import format_jack_bench, jack_bench   # lazy: it loads JACK-Client
    if args.idle <= 0 or args.notes < 1 or args.turns < 1:
        raise RetunerError("--idle must be above 0, --notes and --turns at least 1", field="--jack")
    figs = jack_bench(idle=args.idle, notes=args.notes, against=args.against,
                      against_python=args.against_python, turns=args.turns)
    if args.json:
        print_json(figs)
    else:
        print(format_jack_bench(figs))
    return 0


def run(args) -> int:
    if args.files:
        return _files_bench(args)
    if args.jack:
        return _jack_bench(args)
    tuning = load_profile(args.profile, args.profile_dirs)
    adaptive = None
    if args.adaptive:
        from retuner.adaptive.solver import AdaptiveConfig   # lazy: it loads numpy
        adaptive = AdaptiveConfig()
    if args.performance not in performance_names():
        raise RetunerError(f"unknown performance {args.performance!r} "
                           f"(one of {', '.join(performance_names())})", field="--performance")
    if args.events < 1:
        raise RetunerError("must be at least 1", field="--events")
    events = performance(args.performance, n_note_events=args.events, seed=args.seed)
    res = measure(tuning, EngineConfig(mode=args.mode, adaptive=adaptive), events, clock=args.clock)
    if args.json:
        figs = {k: res[k] for k in JSON_KEYS}
        if args.adaptive:  # the adaptive goals: progressions measured from the output
            figs["adaptive"] = adaptive_bench(mode=args.mode, clock=args.clock)
        print_json(figs)
        return 0
    print(f"profile {tuning.id}, mode {args.mode}{' adaptive' if adaptive else ''}, "
          f"performance {args.performance} (seed {args.seed}): {res['events']} events, "
          f"{res['note_events']} note events")
    print(f"latency per event ({args.clock} clock): p50 {res['p50_us']:.1f} us, p99 {res['p99_us']:.1f} us, "
          f"max {res['max_us']:.1f} us (mean {res['mean_us']:.1f} us)")
    print(f"messages per note-on: {res['messages_per_note_on']:.3f} "
          f"({res['messages_out']} messages out, {res['bends_sent']} bends)")
    print(f"ringing retunes: {res['ringing_retunes']} "
          f"({res['ringing_retunes_below_pool']} while fewer notes sounded than pool channels)")
    print(f"steals: {res['steals']}")
    if args.adaptive:
        print(format_adaptive_bench(adaptive_bench(mode=args.mode, clock=args.clock)))
    return 0
