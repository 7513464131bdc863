"""`retuner export ID --format mts-bulk -o FILE.syx`: write a tuning as MIDI Tuning Standard data."""

from __future__ import annotations

import argparse
import sys

from retuner.midi import mts
from retuner.errors import RetunerError
from retuner.outfile import write_atomic
from retuner.profiles.profile import load_profile
from retuner.commands._common import add_old_name, add_profile_dir

NAME = "export"
HELP = "write a profile as a MIDI Tuning Standard bulk tuning dump or single note changes (.syx)"
DESCRIPTION = (
    "Write a profile's 128 key pitches as MIDI Tuning Standard system exclusive data: "
    "a bulk tuning dump (mts-bulk: one message, 16-character name, checksum) or single note "
    "tuning changes for all keys (mts-single). Unmapped keys are written as 'no change' "
    "(mts-bulk) or left out (mts-single); keys outside 8.1758 Hz .. 13289.7 Hz are clamped "
    "and reported."
)
ORDER = 40
FORMATS = ("mts-bulk", "mts-single")


def _data_byte(text: str) -> int:
    import argparse
    try:
        v = int(text, 0)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a number: {text!r}")
    if not 0 <= v <= 127:
        raise argparse.ArgumentTypeError(f"must be 0..127, got {v}")
    return v


def add_arguments(parser) -> None:
    parser.add_argument("profile", metavar="ID", help="profile id or path to a profile YAML file")
    parser.add_argument("--format", choices=FORMATS, default="mts-bulk",
                        help="mts-bulk (bulk tuning dump, default) or mts-single "
                             "(single note tuning changes for all 128 keys)")
    parser.add_argument("-o", "--output", required=True, metavar="FILE.syx",
                        help="file to write (raw system exclusive bytes, F0 ... F7)")
    parser.add_argument("--mts-device", type=_data_byte, default=mts.DEVICE_ALL,
                        help="device ID 0..127 (default 127 = all devices)")
    parser.add_argument("--mts-program", type=_data_byte, default=0, help="tuning program 0..127 (default 0)")
    parser.add_argument("--mts-bank", type=_data_byte, default=None,
                        help="tuning bank 0..127 (mts-single only: use the bank form of the message)")
    parser.add_argument("--mts-realtime", action=argparse.BooleanOptionalAction, default=True,
                        help="mts-single only: the real-time form (default); --no-mts-realtime: "
                             "the non-real-time form (always with a bank byte)")
    add_old_name(parser, "--mts-non-realtime", "--no-mts-realtime", "mts_realtime", flag=False)
    parser.add_argument("--name", default=None,
                        help="tuning name in the dump, up to 16 ASCII characters (default: the profile id)")
    add_profile_dir(parser)


def build(tuning, fmt: str, *, device: int, program: int, name: str,
          bank: int | None = None, realtime: bool = True) -> tuple[bytes, list[int]]:
    """The bytes of the export and the keys whose pitch had to be clamped."""
    if fmt == "mts-bulk":
        if bank is not None or not realtime:
            raise RetunerError("--mts-bank and --no-mts-realtime apply to --format mts-single only",
                               field="format")
        return mts.bulk_tuning_dump_checked(tuning.cents, name, device=device, program=program)
    changes = []
    clamped = []
    for key, cents in enumerate(tuning.cents):
        if cents is None:
            continue
        if mts.encode_frequency_checked(cents)[1]:
            clamped.append(key)
        changes.append((key, cents))
    msgs = mts.single_note_tuning_change(changes, device=device, program=program,
                                         bank=bank, realtime=realtime)
    return b"".join(bytes(m.bytes()) for m in msgs), clamped


def _ranges(keys: list[int]) -> str:
    """[0, 1, 2, 5] -> '0-2, 5'."""
    parts = []
    start = prev = None
    for k in keys + [None]:
        if start is not None and k == prev + 1:
            prev = k
            continue
        if start is not None:
            parts.append(str(start) if start == prev else f"{start}-{prev}")
        start = prev = k
    return ", ".join(parts)


def run(args) -> int:
    tuning = load_profile(args.profile, args.profile_dirs)
    name = args.name if args.name is not None else tuning.id
    if any(not (0x20 <= ord(ch) <= 0x7E) for ch in name):
        raise RetunerError("the tuning name must be printable ASCII", field="name")
    if len(name) > mts.NAME_LENGTH:
        print(f"retuner: tuning name cut to {mts.NAME_LENGTH} characters: {name[:mts.NAME_LENGTH]!r}",
              file=sys.stderr)
    data, clamped = build(tuning, args.format, device=args.mts_device, program=args.mts_program, name=name,
                          bank=args.mts_bank, realtime=args.mts_realtime)
    write_atomic(args.output, data)
    if clamped:
        print(f"retuner: {len(clamped)} key(s) outside the MIDI Tuning Standard range "
              f"(8.1758 Hz .. 13289.7 Hz) clamped: {_ranges(clamped)}", file=sys.stderr)
    print(f"wrote {args.output}: {args.format} of {tuning.id} ({len(data)} bytes)")
    return 0
