"""``retuner run``: the live daemon between a keyboard and a synth."""

from __future__ import annotations

import os
import sys

from retuner.live import config as _config
from retuner.live import ports as _ports
from retuner.live.daemon import Daemon, setup_logging
from retuner.errors import RetunerError
from retuner.profiles.profile import load_profile
from retuner.commands._common import add_control_socket, add_old_name, add_profile_dir
from retuner.commands._engine_options import add_engine_arguments, duration, engine_overrides, option_for_field

NAME = "run"
HELP = "retune live: read a MIDI port, play the tuning on another (the daemon)"
ORDER = 10
DESCRIPTION = (
    "Run the live daemon. Settings come from the config file (--config FILE, else "
    "$XDG_CONFIG_HOME/retuner/config.yaml when it exists, else built-in defaults); the options "
    "below override it. A side (input or output) without a port name gets a port of our own "
    "(one client, retuner:in and retuner:out). SIGHUP reloads the config and profiles; SIGTERM/SIGINT "
    "release every note and stop. Channels are 1..16.")

def add_arguments(parser):
    parser.add_argument("--config", metavar="FILE",
                        help="YAML config (default: $XDG_CONFIG_HOME/retuner/config.yaml if it exists)")
    parser.add_argument("--profile", metavar="ID", help="the profile to play (id or file; config: profile)")
    add_profile_dir(parser)
    parser.add_argument("--backend", choices=_ports.CHOICES,
                        help="MIDI system: auto (default: the ALSA sequencer, else a running JACK server), "
                             "alsa or jack")
    parser.add_argument("--input", metavar="NAME", help="port to read from: exact name, part of it, or a pattern")
    parser.add_argument("--output", metavar="NAME", help="port to write to: exact name, part of it, or a pattern")
    parser.add_argument("--virtual", action="store_true", default=None,
                        help="create our own input and output ports, ignoring port names in the config")
    parser.add_argument("--client-name", metavar="NAME", help="base of our client names (default retuner)")
    parser.add_argument("--switch-channel", type=int, metavar="CH", choices=range(1, 17),
                        help="program change N on this channel selects the N-th profile of the config "
                             "(config: switch.channel)")
    add_old_name(parser, "--control-channel", "--switch-channel", "switch_channel", type=int,
                 metavar="CH", choices=range(1, 17))
    add_control_socket(parser)
    parser.add_argument("--no-control-socket", action="store_true", help="do not open the control socket")
    parser.add_argument("--status-interval", type=duration, metavar="DURATION",
                        help="time between status lines (seconds, or with a unit as '10 min'; 0: none; "
                             "default 10 min)")
    parser.add_argument("--log-level", choices=_config.LOG_LEVELS,
                        help="what the log shows (default info; config: log_level)")
    parser.add_argument("-v", dest="verbose", action="count", default=0,
                        help="log every event: the same as --log-level debug")
    add_old_name(parser, "--verbose", "-v (or --log-level debug)", "verbose", flag=1)
    add_engine_arguments(parser)


def _apply_flags(s: _config.Settings, args) -> _config.Settings:
    s = s.copy()
    for k in ("profile", "backend", "input", "output", "client_name"):
        v = getattr(args, k, None)
        if v is not None:
            setattr(s, k, v)
    if args.profile_dirs:
        for d in args.profile_dirs:
            if not os.path.isdir(os.path.expanduser(d)):
                raise RetunerError("not a folder", file=d, field="--profile-dir")
        s.profile_dirs = list(s.profile_dirs) + [os.path.expanduser(d) for d in args.profile_dirs]
    if args.profile is not None:
        # a profile named here is this option's mistake, not the config file's
        try:
            load_profile(args.profile, s.profile_dirs)
        except RetunerError as exc:
            if exc.file is None or exc.file == args.profile:
                raise RetunerError(exc.message, field="--profile") from None
            raise
    if args.virtual:
        if args.input or args.output:
            raise RetunerError("makes our own ports: leave out --input and --output, "
                               "or leave out --virtual to connect to named ports", field="--virtual")
        s.virtual = True
    eng = engine_overrides(args, adaptive_in_force=s.engine.get("adaptive"))
    if eng:
        checked = _config.check_engine_settings(eng, prefix="--")
        s.engine = {**s.engine, **checked}
        try:
            _config.engine_config(s)
        except RetunerError as exc:
            # a value given as an option is named as the option, not as the config's field
            if (exc.field or "").removeprefix("engine.").split(".")[0] in eng:
                exc.file, exc.line = None, None
                exc.field = option_for_field(exc.field)
            raise
    if args.switch_channel is not None:
        s.switch.channel = args.switch_channel
    if args.control_socket:
        s.control.path = args.control_socket
    if args.no_control_socket:
        s.control.enabled = False
    if args.status_interval is not None:
        if args.status_interval < 0:
            raise RetunerError("must be 0 or more", field="--status-interval")
        s.status_interval = args.status_interval
    if args.log_level:
        s.log_level = args.log_level
    return s


def settings_loader(args):
    """The daemon's settings as these options make them: ``load(reload=False)``. A reload
    refuses an empty config file (an editor saving by truncate-then-write leaves one for a moment)."""
    def load(reload: bool = False) -> _config.Settings:
        return _apply_flags(_config.load_config(args.config, reload=reload), args)
    return load


def run(args) -> int:
    load = settings_loader(args)
    s = load()
    for note in s.notes:
        print(note, file=sys.stderr)
    setup_logging(s.log_level, args.verbose)
    daemon = Daemon(s, reload_settings=lambda: load(reload=True))
    daemon.verbose = args.verbose
    return daemon.run()
