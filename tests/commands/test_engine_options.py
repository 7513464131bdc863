"""The engine options shared by `retuner run` and `retuner convert` reach the engine.

MIDI Tuning Standard layouts (MMA, MIDI Tuning Standard 1992 and its extension, as in the
MIDI 1.0 Detailed Specification): real-time single note tuning change F0 7F <device> 08 02
<program> <count> ...; bank form F0 7F <device> 08 07 <bank> <program> <count> ...;
non-real-time forms start F0 7E. RPN 3 = tuning program change, RPN 4 = tuning bank select.
"""

import subprocess
import sys

import mido
import pytest

from retuner.cli import build_parser
from retuner.commands import run as run_cmd
from retuner.commands._engine_options import build_engine_config, engine_overrides
from retuner.live.config import Settings, engine_config
from retuner.errors import RetunerError


def parse(*argv):
    return build_parser().parse_args(list(argv))


def test_run_and_convert_offer_the_same_engine_options():
    def options(cmd):
        sub = next(a for a in build_parser()._actions if a.dest == "command")
        return {o for a in sub.choices[cmd]._actions for o in a.option_strings}
    shared = {"--mode", "--pool", "--passthrough", "--bend-range", "--release-time",
              "--bend-scale", "--whole-semitone-range", "--mpe-zone", "--mpe-members", "--mts-device",
              "--mts-program", "--mts-bank", "--no-mts-realtime", "--adaptive", "--policy",
              "--chord-window", "--max-drift", "--max-motion", "--limit", "--centre"}
    assert shared <= options("run") and shared <= options("convert")


def test_mts_options_reach_the_engine():
    args = parse("convert", "in.mid", "-o", "out.mid", "--mode", "mts", "--mts-device", "5",
                 "--mts-program", "3", "--mts-bank", "2", "--no-mts-realtime")
    cfg = build_engine_config(engine_overrides(args))
    assert (cfg.mts_device, cfg.mts_program, cfg.mts_bank, cfg.mts_realtime) == (5, 3, 2, False)


def test_passthrough_none_gives_all_sixteen_channels_to_the_pool():
    cfg = build_engine_config(engine_overrides(parse("convert", "a", "-o", "b", "--passthrough", "none")))
    assert cfg.passthrough == () and cfg.pool == tuple(range(16))


def test_adaptive_options_need_adaptive_unless_the_config_has_it():
    with pytest.raises(RetunerError) as ei:
        engine_overrides(parse("convert", "a", "-o", "b", "--max-drift", "3"))
    assert ei.value.field == "--max-drift"
    eng = engine_overrides(parse("run", "--max-drift", "3"), adaptive_in_force={"policy": "fixed-held"})
    assert eng["adaptive"] == {"policy": "fixed-held", "max_drift": 3.0}
    s = run_cmd._apply_flags(Settings(), parse("run", "--adaptive", "--chord-window", "0.03"))
    ec = engine_config(s)
    assert ec.adaptive is not None and ec.adaptive.chord_window == pytest.approx(0.03)


def test_durations_on_the_command_line_take_the_config_files_units():
    """One rule for every duration (retuner/units.py): seconds, or a number with its unit."""
    s = run_cmd._apply_flags(Settings(), parse("run", "--adaptive", "--attack-time", "30 ms",
                                               "--release-time", "1.5 s", "--status-interval", "10 min"))
    ec = engine_config(s)
    assert ec.adaptive.attack_time == pytest.approx(0.03)
    assert ec.release_time == pytest.approx(1.5)
    assert s.status_interval == pytest.approx(600.0)
    s = run_cmd._apply_flags(Settings(), parse("run", "--adaptive", "--chord-window", "0.02"))
    assert engine_config(s).adaptive.chord_window == pytest.approx(0.02)
    r = subprocess.run([sys.executable, "-m", "retuner", "run", "--attack-time", "30 parsecs"],
                       capture_output=True, text=True)
    assert r.returncode == 2
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and "--attack-time" in lines[0] and "'30 ms'" in lines[0]


def test_bad_adaptive_value_names_the_option():
    with pytest.raises(RetunerError) as ei:
        build_engine_config(engine_overrides(parse("convert", "a", "-o", "b", "--adaptive", "--policy", "wobbly")))
    assert ei.value.field == "--policy"


def test_convert_mts_bank_form_bytes(tmp_path):
    src = tmp_path / "in.mid"
    mid = mido.MidiFile(ticks_per_beat=480)
    tr = mido.MidiTrack()
    mid.tracks.append(tr)
    tr += [mido.Message("note_on", note=60, velocity=80, time=0),
           mido.Message("note_off", note=60, velocity=0, time=480)]
    mid.save(src)
    out = tmp_path / "out.mid"
    r = subprocess.run([sys.executable, "-m", "retuner", "convert", str(src), "-o", str(out), "-q",
                        "--profile", "werckmeister-3", "--mode", "mts", "--mts-device", "5",
                        "--mts-program", "3", "--mts-bank", "2"], capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    msgs = [m for tr in mido.MidiFile(out).tracks for m in tr if not m.is_meta]
    sysex = [list(m.data) for m in msgs if m.type == "sysex"]
    assert sysex, "the tuning is sent"
    # bank form, real-time: 7F <device 5> 08 07 <bank 2> <program 3>
    assert all(d[:6] == [0x7F, 5, 0x08, 0x07, 2, 3] for d in sysex)
    # channel 1 selects tuning program 3 (RPN 3) and bank 2 (RPN 4): CC101 0, CC100 n, CC6 value
    cc = [(m.control, m.value) for m in msgs if m.type == "control_change" and m.channel == 0]
    for rpn, value in ((3, 3), (4, 2)):
        i = cc.index((100, rpn))
        assert cc[i - 1] == (101, 0) and cc[i + 1] == (6, value)
