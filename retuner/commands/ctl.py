"""``retuner ctl``: steer a running daemon through its control socket."""

from __future__ import annotations

import json
import sys

from retuner.control.client import ControlClient, NoDaemon
from retuner.commands._common import add_control_socket

NAME = "ctl"
HELP = "steer a running daemon: status, profiles, load, adaptive, concert-pitch, transpose, panic, subscribe"
ORDER = 40
DESCRIPTION = ("Speak to a running daemon over its control socket "
               "($XDG_RUNTIME_DIR/retuner/control.sock unless --control-socket). "
               "Exit status 1 when no daemon is running, 2 when it refuses the command.")


def add_arguments(parser) -> None:
    import argparse
    add_control_socket(parser)
    parser.add_argument("--json", action="store_true", help="print the daemon's JSON replies as they are")
    # the same two options are accepted after the action too (retuner ctl status --json)
    common = argparse.ArgumentParser(add_help=False)
    add_control_socket(common, default=argparse.SUPPRESS)
    common.add_argument("--json", action="store_true", default=argparse.SUPPRESS,
                        help="print the daemon's JSON replies as they are")
    sub = parser.add_subparsers(dest="action", metavar="ACTION", required=True)
    _add = sub.add_parser

    def add_parser(name, **kw):
        return _add(name, parents=[common], **kw)
    sub.add_parser = add_parser
    sub.add_parser("status", help="the profile in force, ports, state, counters, sounding notes")
    sub.add_parser("profiles", help="list the profiles the daemon can load")
    p = sub.add_parser("load", help="switch to a profile (sounding notes keep their pitch)")
    p.add_argument("profile", metavar="ID", help="profile id or path")
    p = sub.add_parser("adaptive", help="turn adaptive mode on or off")
    p.add_argument("state", choices=["on", "off"])
    p.add_argument("--set", dest="settings", action="append", default=[], metavar="NAME=VALUE",
                   help="an adaptive setting (repeatable; value is YAML: 5, true, [1, 2]), e.g. "
                        "policy=fixed-held, chord_window=0.03 (seconds, or with a unit: attack_time='30 ms'), max_drift=4, "
                        "max_motion=3, limit=7, "
                        "centre=profile")
    p = sub.add_parser("concert-pitch", help="set the frequency of A4 in Hz (the profile's own concert "
                                             "pitch is overridden until the next profile switch)")
    p.add_argument("hz", type=float, metavar="HZ")
    p = sub.add_parser("transpose", help="move the profile's root by N semitones (or shift by cents)")
    p.add_argument("amount", metavar="N", help="semitones (whole number), or cents with a 'c' suffix: 12.5c")
    sub.add_parser("panic", help="release every sounding note now")
    p = sub.add_parser("subscribe", help="print live events, one per line, until interrupted")
    p.add_argument("--count", type=int, default=0, metavar="N", help="stop after N events")


def _request(args):
    from retuner.errors import RetunerError
    a = args.action
    if a == "load":
        return {"cmd": "load", "profile": args.profile}
    if a == "adaptive":
        req = {"cmd": "adaptive", "on": args.state == "on"}
        if args.settings:
            import yaml
            settings = {}
            for item in args.settings:
                name, sep, value = item.partition("=")
                if not sep or not name:
                    raise RetunerError(f"--set expects NAME=VALUE, got {item!r}")
                try:
                    settings[name.strip()] = yaml.safe_load(value)
                except yaml.YAMLError:
                    raise RetunerError(f"--set {name}: value is not valid YAML") from None
            req["settings"] = settings
        return req
    if a == "concert-pitch":
        return {"cmd": "concert_pitch", "hz": args.hz}
    if a == "transpose":
        text = args.amount.strip()
        try:
            if text.lower().endswith("c"):
                return {"cmd": "transpose", "cents": float(text[:-1])}
            return {"cmd": "transpose", "semitones": int(text)}
        except ValueError:
            raise RetunerError(f"transpose: {text!r} is neither a whole number of semitones nor cents like 12.5c") from None
    return {"cmd": a}


# the engine's and the control socket's counters, in plain words
COUNTER_WORDS = {
    "notes": "notes played", "note_ons_out": "note-ons sent", "steals": "steals",
    "ringing_retunes": "ringing retunes", "bends_sent": "bends sent", "messages_out": "messages sent",
    "note_on_messages": "messages for note-ons", "dropped_unmapped": "unmapped keys left silent",
    "chords_solved": "chords tuned", "redressings": "channels dressed again for another part",
}
CONTROL_WORDS = {
    "clients": "clients now", "connections": "connections", "commands": "commands", "errors": "refused",
    "events": "events sent", "events_dropped": "events dropped for slow clients",
    "central_dropped": "events dropped while the daemon's event queue was full",
    "throttled": "slow clients held back", "subscribers": "subscribers",
}


def _words(key: str) -> str:
    return key.replace("_", " ")


def _number(v) -> str:
    return f"{v:.3f}".rstrip("0").rstrip(".") if isinstance(v, float) else str(v)


def _duration(seconds: float) -> str:
    s = int(seconds)
    h, m = divmod(s // 60, 60)
    return f"{h} h {m} min" if h else (f"{m} min {s % 60} s" if m else f"{s} s")


def _port(name, is_open) -> str:
    if not is_open:
        return "not open (waiting for it)"
    return name if name else "our own port"


def _fmt_status(r: dict) -> str:
    """The status reply as an aligned table of plain words: what plays, the ports, the state, counters."""
    rows: list[tuple[str, str]] = []
    rows.append(("profile", str(r.get("profile"))))
    rows.append(("concert pitch", "as the profile says" if r.get("concert_pitch_hz") is None
                 else f"A4 = {_number(r['concert_pitch_hz'])} Hz"))
    rows.append(("transpose", f"{r.get('transpose_semitones', 0)} semitones, "
                              f"{r.get('transpose_cents', 0.0):+.2f} cents"))
    rows.append(("adaptive", "on" if r.get("adaptive") else "off"))
    if "uptime_s" in r:
        rows.append(("state", f"running for {_duration(r['uptime_s'])}"))
    if "input_open" in r or "input" in r:
        rows.append(("input port", _port(r.get("input"), r.get("input_open", True))))
        rows.append(("output port", _port(r.get("output"), r.get("output_open", True))))
    if r.get("backend"):
        rows.append(("MIDI system", str(r["backend"])))
    if "config" in r:
        rows.append(("config file", r.get("config") or "none (built-in settings)"))
    rows.append(("sounding", f"{r.get('sounding', 0)} notes"))
    st = dict(r.get("counters") or {})
    n = st.pop("attack_retunes", 0)
    total, largest = st.pop("attack_retune_cents_total", 0.0), st.pop("attack_retune_cents_max", 0.0)
    corrected = st.pop("attack_corrected_notes", 0)
    for k, v in st.items():
        rows.append((COUNTER_WORDS.get(k, _words(k)), _number(v)))
    if n:
        rows.append(("attack retunes", f"{n}, mean {total / n:.2f} c, largest {largest:.2f} c "
                                       "(notes retuned within their attack)"))
        rows.append(("first guess missed", f"{corrected} notes corrected by more than 0.5 c in their attack"))
    if r.get("steals_explained"):
        rows.append(("notes cut short", r["steals_explained"]))
    if "bad_input" in r:
        rows.append(("bad input", f"{r['bad_input']} messages ignored"))
    if "errors" in r:
        rows.append(("errors", str(r["errors"])))
    dropped = r.get("input_dropped")
    if dropped is not None:
        rows.append(("overload", f"{sum(dropped.values())} input messages dropped "
                                 f"({dropped.get('note_on', 0)} note-ons, {dropped.get('other', 0)} others, "
                                 f"{dropped.get('release', 0)} releases), {r.get('input_waiting', 0)} waiting"))
    ctl = r.get("control") or {}
    if ctl:
        rows.append(("control socket", ", ".join(f"{_number(v)} {CONTROL_WORDS.get(k, _words(k))}"
                                                 for k, v in ctl.items())))
    w = max(len(label) for label, _ in rows)
    return "\n".join(f"{label:<{w}}  {value}" for label, value in rows)


def _fmt(reply: dict) -> str:
    cmd = reply.get("cmd")
    if cmd == "status":
        return _fmt_status(reply)
    if cmd == "profiles":
        rows = reply.get("profiles") or []
        w = max([len(p["id"]) for p in rows] + [2])
        return "\n".join(f"{p['id']:<{w}}  {p.get('description', '')}" for p in rows)
    if cmd in ("load", "concert_pitch", "reference", "transpose", "adaptive"):
        hz = reply.get("concert_pitch_hz")
        return (f"profile {reply.get('profile')}, concert pitch "
                f"{'as the profile says' if hz is None else f'A4 = {_number(hz)} Hz'}, "
                f"transpose {reply.get('transpose_semitones', 0)} st {reply.get('transpose_cents', 0.0):+.2f} c, "
                f"adaptive {'on' if reply.get('adaptive') else 'off'}")
    if cmd == "panic":
        return f"released {reply.get('released', 0)} notes"
    return json.dumps(reply)


def run(args) -> int:
    req = _request(args)
    try:
        with ControlClient(args.control_socket, timeout=5.0) as client:
            client.send(req)
            reply = client.read()
            if reply is None:
                raise NoDaemon("the daemon closed the connection")
            if not reply.get("ok"):
                print(json.dumps(reply) if args.json else f"retuner: daemon: {reply.get('error')}",
                      file=sys.stdout if args.json else sys.stderr)
                return 2
            print(json.dumps(reply) if args.json else _fmt(reply), flush=True)
            if args.action != "subscribe":
                return 0
            client.sock.settimeout(None)
            seen = 0
            while not args.count or seen < args.count:
                ev = client.read()
                if ev is None:
                    break
                seen += 1
                print(json.dumps(ev), flush=True)
            return 0
    except NoDaemon as exc:
        print(f"retuner: {exc}", file=sys.stderr)
        return 1
    except (TimeoutError, OSError) as exc:
        if isinstance(exc, BrokenPipeError):
            raise
        print(f"retuner: the daemon did not answer: {exc}", file=sys.stderr)
        return 1
