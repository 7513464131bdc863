"""``retuner watch``: a live view of the running daemon (notes, intervals, beat rates)."""

from __future__ import annotations

import sys

from retuner.commands._common import add_control_socket

NAME = "watch"
HELP = "live view of a running daemon: sounding notes, intervals, beat rates, drift, counters"
ORDER = 45
DESCRIPTION = ("Show what the running daemon plays, refreshed 25 times a second: every sounding note "
               "(name, key, cents from 12-EDO, Hz), every interval (size, deviation from just, beat "
               "rate), drift, the profile in force and counters. Press q to quit. Exit status 1 when no "
               "daemon is running. With --web PORT the same is served as a web page for a projector "
               "(the classroom view), which waits for the daemon and follows it when it restarts.")


def add_arguments(parser) -> None:
    add_control_socket(parser)
    parser.add_argument("--once", action="store_true", help="print the current state once and exit")
    parser.add_argument("--plain", action="store_true",
                        help="no full-screen view: print a plain frame whenever something changes")
    parser.add_argument("--frames", type=int, default=0, metavar="N", help="with --plain: stop after N frames")
    parser.add_argument("--small", action="store_true",
                        help="no block letters for the sounding notes (they are shown when they fit)")
    parser.add_argument("--fps", type=float, default=25.0, help="frames a second (default 25)")
    parser.add_argument("--web", type=int, metavar="PORT",
                        help="instead of the terminal view, serve the classroom view as a web page for a "
                             "projector on PORT (0: any free port; the address is printed); read-only, and "
                             "it follows the daemon when it stops and starts again")
    parser.add_argument("--web-address", default="127.0.0.1", metavar="ADDRESS",
                        help="with --web: the address to listen on (default 127.0.0.1, this computer only)")


def run(args) -> int:
    from retuner.control.client import NoDaemon
    from retuner.errors import RetunerError
    from retuner.view import watch
    if not 1.0 <= args.fps <= 120.0:
        raise RetunerError("must be from 1 to 120", field="--fps")
    if args.web is not None:
        return _serve_web(args)
    try:
        feed = watch.Feed(args.control_socket)
    except NoDaemon as exc:
        print(f"retuner: {exc}", file=sys.stderr)
        return 1
    except (OSError, RuntimeError) as exc:
        print(f"retuner: cannot subscribe to the daemon: {exc}", file=sys.stderr)
        return 1
    try:
        if args.once:
            print("\n".join(feed.render(200, 1000)))
            return 0
        if args.plain or not sys.stdout.isatty():
            watch.run_plain(feed, fps=args.fps, frames=args.frames)
            return 0
        try:
            watch.run_curses(feed, fps=args.fps, big=not args.small)
        except Exception as exc:   # a terminal curses cannot drive: fall back to plain frames
            if exc.__class__.__name__ != "error":
                raise
            print(f"retuner: full-screen view unavailable ({exc}); printing plain frames", file=sys.stderr)
            watch.run_plain(feed, fps=args.fps, frames=args.frames)
        return 0
    finally:
        feed.close()


def _serve_web(args) -> int:
    from retuner.errors import RetunerError
    from retuner.view import watch, web
    if not 0 <= args.web <= 65535:
        raise RetunerError(f"must be a port number from 0 to 65535, got {args.web}", field="--web")
    feed = watch.Feed(args.control_socket, reconnect=True).start()
    try:
        server = web.ClassroomServer(feed, args.web_address, args.web)
    except OSError as exc:
        feed.close()
        raise RetunerError(f"cannot listen on {args.web_address} port {args.web}: {exc.strerror or exc}",
                           field="--web") from None
    if args.web_address not in web.LOOPBACK:
        print(f"retuner: warning: the classroom view is open to the network on {args.web_address} "
              "(read-only: anyone who reaches it sees what is played)", file=sys.stderr)
    server.start()
    print(f"classroom view: {server.url}  (read-only; Ctrl-C stops)", flush=True)
    try:
        server.thread.join()
    except KeyboardInterrupt:
        pass
    finally:
        server.stop()
        feed.close()
    return 0
