"""``retuner ports``: the MIDI ports a user connects, and which of them are retuner's own."""

from __future__ import annotations

from retuner.live import ports as _ports
from retuner.commands._common import print_json

NAME = "ports"
HELP = "list MIDI ports: sources (keyboards), destinations (synths) and retuner's own"
ORDER = 45
DESCRIPTION = (
    "List the MIDI ports of the MIDI system by what you connect: sources (a keyboard, a sequencer: "
    "what retuner reads, 'retuner run --input'), destinations (a synth: what retuner plays on, "
    "'retuner run --output'), and the ports of a retuner daemon running now (its in port takes a "
    "source, its out port goes to a destination). Any listed name, a part of one, or a shell "
    "pattern works with --input/--output.")


def add_arguments(parser):
    parser.add_argument("--backend", default=_ports.AUTO, choices=_ports.CHOICES,
                        help="MIDI system: auto (default: the ALSA sequencer, else a running JACK server), "
                             "alsa or jack")
    parser.add_argument("--client-name", metavar="NAME", default="retuner",
                        help="base of a running daemon's client names, to tell its ports apart (default retuner)")
    parser.add_argument("--json", action="store_true",
                        help='print {"backend", "sources", "destinations", "own_in", "own_out"} as JSON')


def sorted_ports(inputs: list[str], outputs: list[str], base: str) -> dict:
    """The listing by what a user connects. ``inputs`` (readable ports) are sources, ``outputs``
    (writable ports) destinations; a daemon's own ``in`` port is writable and its ``out`` port
    readable, so each is taken out of the list it would otherwise be in."""
    return {"sources": [n for n in inputs if not _ports.is_own(n, base)],
            "destinations": [n for n in outputs if not _ports.is_own(n, base)],
            "own_in": [n for n in outputs if _ports.is_own(n, base)],
            "own_out": [n for n in inputs if _ports.is_own(n, base)]}


def run(args) -> int:
    word = _ports.choose_backend(args.backend)
    inputs, outputs = _ports.list_ports(word)
    listing = sorted_ports(inputs, outputs, args.client_name)
    if args.json:
        print_json({"backend": word, **listing})
        return 0
    none = ["(none)"]
    print(f"MIDI system: {word}")
    print("sources (keyboards, sequencers): connect one to retuner's in port, or name it with run --input")
    for name in listing["sources"] or none:
        print(f"  {name}")
    print("destinations (synths): connect retuner's out port to one, or name it with run --output")
    for name in listing["destinations"] or none:
        print(f"  {name}")
    print("retuner's own ports (a daemon running now):")
    if not listing["own_in"] and not listing["own_out"]:
        print("  (none: no daemon with its own ports is running)")
    for name in listing["own_in"]:
        print(f"  {name}  <- connect a source to it")
    for name in listing["own_out"]:
        print(f"  {name}  -> connect it to a destination")
    return 0
