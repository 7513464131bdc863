"""The daemon's YAML config: defaults, fields, and one-line errors naming file, line and field."""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap

import pytest

from retuner.live.config import Settings, engine_config, load_config, parse_config, default_config_path
from retuner.errors import RetunerError


def _err(text: str) -> RetunerError:
    with pytest.raises(RetunerError) as ei:
        parse_config(textwrap.dedent(text), "cfg.yaml")
    return ei.value


def test_builtin_defaults_without_a_file(tmp_path, monkeypatch):
    monkeypatch.setenv("XDG_CONFIG_HOME", str(tmp_path))
    assert default_config_path() == tmp_path / "retuner" / "config.yaml"
    s = load_config(None)
    assert s == Settings()
    assert s.profile == "edo12" and s.backend == "auto" and s.source is None


def test_default_file_is_read(tmp_path, monkeypatch):
    monkeypatch.setenv("XDG_CONFIG_HOME", str(tmp_path))
    (tmp_path / "retuner").mkdir()
    (tmp_path / "retuner" / "config.yaml").write_text("profile: vallotti\nbackend: jack\n")
    s = load_config(None)
    assert (s.profile, s.backend) == ("vallotti", "jack")
    assert s.source == str(tmp_path / "retuner" / "config.yaml")


def test_named_file_must_exist(tmp_path):
    with pytest.raises(RetunerError) as ei:
        load_config(str(tmp_path / "nope.yaml"))
    assert "nope.yaml" in str(ei.value)


def test_full_config_parses(tmp_path):
    s = parse_config(textwrap.dedent("""\
        profile: werckmeister-3
        profile_dirs: [TMP]
        backend: mido.backends.rtmidi/UNIX_JACK
        input: "Digital Piano"
        output: "FLUID*"
        virtual: false
        client_name: stage
        profiles: [edo12, meantone-quarter, werckmeister-3]
        switch: {channel: 16, ab_cc: 80, ab: [meantone-quarter, edo12]}
        status_interval: 5
        port_poll: 0.25
        log_level: debug
        control: {enabled: false, socket: /tmp/sock}
        """).replace("TMP", str(tmp_path)), "cfg.yaml")
    assert s.backend == "jack"
    assert s.input == "Digital Piano" and s.output == "FLUID*"
    assert s.profiles == ["edo12", "meantone-quarter", "werckmeister-3"]
    assert (s.switch.channel, s.switch.ab_cc, s.switch.ab) == (16, 80, ("meantone-quarter", "edo12"))
    assert s.status_interval == 5.0 and s.port_poll == 0.25 and s.log_level == "debug"
    assert s.control.enabled is False and s.control.path == "/tmp/sock"


def test_unknown_field_names_file_line_field():
    e = _err("""\
        profile: edo12
        backend: jack
        outptu: FLUID
        """)
    assert (e.file, e.line, e.field) == ("cfg.yaml", 3, "outptu")
    assert str(e).startswith("cfg.yaml:3: outptu: unknown field")
    assert "\n" not in str(e)


def test_wrong_types_name_line_and_field():
    e = _err("profile: edo12\nvirtual: yes please\n")
    assert (e.line, e.field) == (2, "virtual")
    e = _err("switch:\n  channel: 17\n")
    assert (e.line, e.field) == (2, "switch.channel") and "between 1 and 16" in e.message
    e = _err("switch:\n  ab: [edo12]\n")
    assert (e.line, e.field) == (2, "switch.ab")
    e = _err("status_interval: soon\n")
    assert (e.line, e.field) == (1, "status_interval")
    e = _err("backend: coreaudio\n")
    assert (e.line, e.field) == (1, "backend")
    e = _err("\n\nswitch:\n  knob: 3\n")
    assert (e.line, e.field) == (4, "switch.knob")
    e = _err("profiles: edo12\n")
    assert e.field == "profiles"


def test_yaml_syntax_error_has_a_line():
    e = _err("profile: edo12\nswitch: {channel: 3\n")
    assert e.file == "cfg.yaml" and e.line is not None


def test_cli_prints_one_line_and_exits_2(tmp_path):
    cfg = tmp_path / "bad.yaml"
    cfg.write_text("profile: edo12\nbackend: jack\nvolume: 11\n")
    r = subprocess.run([sys.executable, "-m", "retuner", "run", "--config", str(cfg)],
                       capture_output=True, text=True, timeout=20)
    assert r.returncode == 2
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1
    assert f"{cfg}:3: volume: unknown field" in lines[0]


def test_flags_override_the_file(tmp_path):
    from retuner.cli import build_parser
    from retuner.commands import run as run_cmd
    cfg = tmp_path / "c.yaml"
    cfg.write_text("profile: vallotti\nbackend: alsa\ninput: Piano\n"
                   "engine: {pool: [1, 2, 3], bend_range: 12}\nswitch: {channel: 3}\n")
    args = build_parser().parse_args(["run", "--config", str(cfg), "--profile", "edo19", "--backend", "jack",
                                      "--pool", "1-4,6", "--bend-scale", "127/128",
                                      "--switch-channel", "16", "--virtual"])
    s = run_cmd._apply_flags(load_config(args.config), args)
    assert (s.profile, s.backend, s.input, s.virtual) == ("edo19", "jack", "Piano", True)
    assert s.engine["pool"] == (1, 2, 3, 4, 6) and s.engine["bend_range"] == 12.0
    assert s.engine["bend_scale"] == 0.9921875
    assert s.switch.channel == 16
    from retuner.live.config import engine_config
    ec = engine_config(s)
    # channels are 1-based for the user, 0-based in the engine (mido's numbering)
    assert ec.pool == (0, 1, 2, 3, 5) and ec.bend_range == 12.0
    # a bad flag value is one line naming the option
    with pytest.raises(SystemExit) as ei:
        build_parser().parse_args(["run", "--mode", "surround"])
    assert ei.value.code == 2
    # a value the parser lets through but the engine refuses names its option
    args = build_parser().parse_args(["run", "--pool", "1-10"])
    with pytest.raises(RetunerError) as ei:
        run_cmd._apply_flags(Settings(), args)
    assert ei.value.field == "--pool" and ei.value.file is None
    args = build_parser().parse_args(["run", "--release-time", "-1"])
    with pytest.raises(RetunerError) as ei:
        run_cmd._apply_flags(Settings(), args)
    assert ei.value.field == "--release-time"


def test_unknown_profile_in_the_list_names_its_line(tmp_path):
    cfg = tmp_path / "c.yaml"
    cfg.write_text("profile: edo12\nprofiles: [edo12, no-such-tuning]\n")
    r = subprocess.run([sys.executable, "-m", "retuner", "run", "--config", str(cfg)],
                       capture_output=True, text=True, timeout=20,
                       env={**__import__("os").environ, "XDG_CONFIG_HOME": str(tmp_path)})
    assert r.returncode == 2
    assert r.stderr.strip().splitlines() == [
        f"retuner: {cfg}:2: profiles[1]: unknown profile 'no-such-tuning'; 'retuner profiles' lists them"]


def test_engine_section_numbers_and_fractions():
    s = parse_config("engine:\n  bend_scale: 127/128\n  release_time: 1\n", "c.yaml")
    assert s.engine["bend_scale"] == 127 / 128 and s.engine["release_time"] == 1.0
    e = _err("engine:\n  bend_scale: a lot\n")
    assert (e.line, e.field) == (2, "engine.bend_scale")
    e = _err("engine:\n  mode: surround\n")
    assert (e.line, e.field) == (2, "engine.mode")
    e = _err("engine:\n  pool: [1, 10]\n")          # the engine's own rule: 10 is passed through
    assert (e.line, e.field) == (2, "engine.pool")


def test_nested_adaptive_setting_names_its_line(tmp_path):
    cfg = tmp_path / "c.yaml"
    cfg.write_text("profile: edo12\nengine:\n  adaptive:\n    chord_window: 0.02\n    policy: wobbly\n")
    r = subprocess.run([sys.executable, "-m", "retuner", "run", "--config", str(cfg)],
                       capture_output=True, text=True, timeout=20,
                       env={**__import__("os").environ, "XDG_CONFIG_HOME": str(tmp_path)})
    assert r.returncode == 2
    (line,) = r.stderr.strip().splitlines()
    assert line.startswith(f"retuner: {cfg}:5: engine.adaptive.policy: "), line


def test_old_config_keys_still_load_with_a_warning_naming_the_new_key():
    s = parse_config("control:\n  path: /tmp/s\nengine:\n  adaptive: {window: 3}\n", "cfg.yaml")
    assert s.control.path == "/tmp/s"
    assert s.engine["adaptive"] == {"recentre_band_cents": 3}
    assert set(s.notes) == {
        "retuner: warning: cfg.yaml:2: control.path is now called control.socket; "
        "the old name will go in a later release",
        "retuner: warning: cfg.yaml:4: engine.adaptive.window is now called engine.adaptive.recentre_band_cents; "
        "the old name will go in a later release"}


def test_the_recentre_band_reaches_the_solver_and_is_named_with_its_unit():
    s = parse_config("engine:\n  adaptive: {recentre_band_cents: 3, attack_time: 0.01}\n", "cfg.yaml")
    assert s.notes == [] and engine_config(s).adaptive.window == 3.0
    with pytest.raises(RetunerError) as ei:
        parse_config("engine:\n  adaptive:\n    recentre_band_cents: 5000\n", "cfg.yaml")
    assert str(ei.value).startswith(
        "cfg.yaml:3: engine.adaptive.recentre_band_cents: must be between 0 and 1200 cents, got 5000")


def test_status_interval_is_in_seconds():
    assert parse_config("status_interval: 90\n", "cfg.yaml").status_interval == 90.0
    assert Settings().status_interval == 600.0


@pytest.mark.parametrize("text, field, seconds", [
    # one rule for every duration: a bare number is seconds, or a number with its unit
    # (SI: ms, s, h; min, the minute, is accepted for use with the SI, BIPM SI Brochure table 8)
    ("status_interval: 10 min\n", "status_interval", 600.0),
    ("status_interval: 600 s\n", "status_interval", 600.0),
    ("status_interval: 1 h\n", "status_interval", 3600.0),
    ("port_poll: 250 ms\n", "port_poll", 0.25),
    ("setup_refresh: 2.5 s\n", "setup_refresh", 2.5),
    ("setup_refresh: 3\n", "setup_refresh", 3.0),
])
def test_durations_take_a_unit(text, field, seconds):
    s = parse_config(text, "cfg.yaml")
    assert getattr(s, field) == seconds and s.notes == []


def test_engine_and_adaptive_durations_take_a_unit():
    s = parse_config("engine:\n  release_time: 1500 ms\n  adaptive: {chord_window: 30 ms, attack_time: 0.05 s}\n",
                     "cfg.yaml")
    cfg = engine_config(s)
    assert cfg.release_time == 1.5
    assert cfg.adaptive.chord_window == pytest.approx(0.03) and cfg.adaptive.attack_time == pytest.approx(0.05)
    with pytest.raises(RetunerError) as ei:
        parse_config("engine:\n  adaptive:\n    chord_window: 30 parsecs\n", "cfg.yaml")
    assert (ei.value.line, ei.value.field) == (3, "engine.adaptive.chord_window")


def test_a_bad_duration_is_one_line_naming_the_field():
    for text in ("status_interval: 10 minutes\n", "status_interval: ten\n", "status_interval: 25 h\n"):
        with pytest.raises(RetunerError) as ei:
            parse_config("log_level: info\n" + text, "cfg.yaml")
        assert (ei.value.file, ei.value.line, ei.value.field) == ("cfg.yaml", 2, "status_interval")
        assert "seconds" in str(ei.value) and "\n" not in str(ei.value)


def test_a_bare_status_interval_under_a_minute_is_read_as_seconds_with_one_warning():
    # a file from when status_interval counted minutes: 10 meant ten minutes
    s = parse_config("log_level: info\nstatus_interval: 10\n", "cfg.yaml")
    assert s.status_interval == 10.0
    [note] = s.notes
    assert note.startswith("retuner: warning: cfg.yaml:2: status_interval: 10 is 10 seconds")
    assert "'10 min'" in note and "'10 s'" in note
    # said with a unit, 0 (none) or a minute and more: no warning
    for text in ("status_interval: 10 s\n", "status_interval: 10 min\n", "status_interval: 0\n",
                 "status_interval: 60\n", "status_interval: 600\n"):
        assert parse_config(text, "cfg.yaml").notes == [], text


def test_retuner_run_prints_the_status_interval_warning_once(tmp_path):
    cfg = tmp_path / "cfg.yaml"
    cfg.write_text("status_interval: 5\n")
    env = {**os.environ, "XDG_RUNTIME_DIR": str(tmp_path), "JACK_DEFAULT_SERVER": f"none-{os.getpid()}",
           "JACK_NO_START_SERVER": "1"}
    # no JACK server by that name: the daemon stops at once (exit 1), after the config's warnings
    r = subprocess.run([sys.executable, "-m", "retuner", "run", "--config", str(cfg), "--backend", "jack",
                        "--virtual", "--no-control-socket"], capture_output=True, text=True, timeout=60, env=env)
    assert r.returncode == 1, r.stderr
    warnings = [l for l in r.stderr.splitlines() if "warning" in l and "status_interval" in l]
    assert warnings == [f"retuner: warning: {cfg}:1: status_interval: 5 is 5 seconds (it counted minutes before); "
                        "write '5 min' for minutes, or '5 s' to keep seconds without this warning"]


def test_run_options_with_their_config_names_reach_the_settings(tmp_path):
    from retuner.cli import build_parser
    from retuner.commands import run as run_cmd
    cfg = tmp_path / "c.yaml"
    cfg.write_text("log_level: warning\nstatus_interval: 30\ncontrol: {socket: /tmp/a.sock}\n")
    s = run_cmd._apply_flags(load_config(str(cfg)), build_parser().parse_args(["run", "--config", str(cfg)]))
    assert (s.log_level, s.status_interval, s.control.path) == ("warning", 30.0, "/tmp/a.sock")
    args = build_parser().parse_args(["run", "--config", str(cfg), "--log-level", "error",
                                      "--status-interval", "90", "--control-socket", "/tmp/b.sock",
                                      "--profile-dir", str(tmp_path)])
    s = run_cmd._apply_flags(load_config(str(cfg)), args)
    assert (s.log_level, s.status_interval, s.control.path) == ("error", 90.0, "/tmp/b.sock")
    assert s.profile_dirs == [str(tmp_path)]


@pytest.mark.parametrize("command, old, new", [
    (["run"], ["--profiles-dir", "/tmp"], ["--profile-dir", "/tmp"]),
    (["run"], ["--control-channel", "5"], ["--switch-channel", "5"]),
    (["run"], ["--socket", "/tmp/s"], ["--control-socket", "/tmp/s"]),
    (["run"], ["--verbose"], ["-v"]),
    (["convert", "a", "-o", "b"], ["--whole-semitones"], ["--whole-semitone-range"]),
    (["convert", "a", "-o", "b"], ["--mts-non-realtime"], ["--no-mts-realtime"]),
    (["export", "edo12", "-o", "x.syx"], ["--mts-non-realtime"], ["--no-mts-realtime"]),
    (["fit", "a.mid", "-o", "x.yaml"], ["--reference", "415"], ["--concert-pitch", "415"]),
    (["fit", "a.mid", "-o", "x.yaml"], ["--passthrough", "9"], ["--exclude-channels", "9"]),
    (["compare", "a.mid"], ["--passthrough", "9"], ["--exclude-channels", "9"]),
    (["watch"], ["--socket", "/tmp/s"], ["--control-socket", "/tmp/s"]),
    (["ctl", "status"], ["--socket", "/tmp/s"], ["--control-socket", "/tmp/s"]),
])
def test_an_old_option_name_does_what_the_new_one_does_with_one_warning(command, old, new, capsys):
    from retuner.cli import build_parser

    def parsed(argv):
        return {k: v for k, v in vars(build_parser().parse_args(argv)).items() if k != "_parser"}
    with_new = parsed(command + new)
    assert capsys.readouterr().err == ""
    with_old = parsed(command + old)
    err = capsys.readouterr().err.strip().splitlines()
    assert with_old == with_new
    assert len(err) == 1 and err[0].startswith(f"retuner: warning: {old[0]} is now called {new[0]}")


def test_bend_range_reaches_the_mpe_members_from_the_file_and_the_option(tmp_path):
    """In MPE mode the notes sound on member channels: the one bend range setting is theirs,
    whether the file or --bend-range gives it (MPE specification: members default to 48
    semitones, which an explicit setting overrides)."""
    from retuner.commands._engine_options import engine_overrides
    from retuner.cli import build_parser
    from retuner.live import config as C
    cfg = tmp_path / "config.yaml"
    cfg.write_text("engine:\n  mode: mpe\n  bend_range: 24\n")
    assert C.engine_config(C.load_config(str(cfg))).mpe_member_range == 24
    cfg.write_text("engine:\n  mode: mpe\n")
    assert C.engine_config(C.load_config(str(cfg))).mpe_member_range == 48   # the MPE default stays
    # --bend-range on top of a file that chose MPE (the option does not know the file's mode)
    args = build_parser().parse_args(["run", "--config", str(cfg), "--bend-range", "24"])
    s = C.load_config(str(cfg))
    s.engine.update(engine_overrides(args))
    assert C.engine_config(s).mpe_member_range == 24


@pytest.mark.parametrize("text, kind", [("engine: [1, 2]\n", "a list"), ("engine: {pool: x}\n", None),
                                        ("switch: 3\n", "a whole number")])
def test_a_value_of_the_wrong_kind_is_named_in_plain_words(text, kind):
    with pytest.raises(RetunerError) as ei:
        parse_config(text, "cfg.yaml")
    msg = str(ei.value)
    assert "Sequence" not in msg and "Mapping" not in msg and "\n" not in msg, msg
    if kind is not None:
        assert msg.endswith(f"got {kind}"), msg
