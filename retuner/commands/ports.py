"""``retuner ports``: list the MIDI ports retuner can read from and write to."""

from __future__ import annotations

from retuner.live import ports as _ports
from retuner.commands._common import print_json

NAME = "ports"
HELP = "list MIDI input and output ports (ALSA sequencer or JACK)"
ORDER = 45
DESCRIPTION = (
    "List the MIDI ports of the chosen backend. 'inputs' are ports retuner can read from "
    "(a keyboard), 'outputs' ports it can write to (a synth). Any of these names, a part of one, "
    "or a shell pattern, works with 'retuner run --input/--output'.")


def add_arguments(parser):
    parser.add_argument("--backend", default=_ports.AUTO, choices=_ports.CHOICES,
                        help="MIDI system: auto (default: the ALSA sequencer, else a running JACK server), "
                             "alsa or jack")
    parser.add_argument("--json", action="store_true", help="print {\"inputs\": [...], \"outputs\": [...]}")


def run(args) -> int:
    args.backend = _ports.choose_backend(args.backend)
    inputs, outputs = _ports.list_ports(args.backend)
    if args.json:
        print_json({"backend": args.backend, "inputs": inputs, "outputs": outputs})
        return 0
    print(f"inputs ({args.backend}):")
    for name in inputs or ["(none)"]:
        print(f"  {name}")
    print(f"outputs ({args.backend}):")
    for name in outputs or ["(none)"]:
        print(f"  {name}")
    return 0
