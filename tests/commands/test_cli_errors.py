"""Mistakes a user can make on the command line: one line, exit status 2, nothing changed."""

import subprocess
import sys

import mido


def run_cli(*args):
    return subprocess.run([sys.executable, "-m", "retuner", *map(str, args)], capture_output=True, text=True)


def one_line(r):
    lines = r.stderr.strip().splitlines()
    assert r.returncode == 2, r.stderr
    assert len(lines) == 1 and "Traceback" not in r.stderr, r.stderr
    return lines[0]


def test_usage_mistake_is_one_line():
    line = one_line(run_cli("run", "--mode", "surround"))
    assert line.startswith("retuner run: argument --mode: invalid choice: 'surround'")
    line = one_line(run_cli("convert"))
    assert "required" in line and "retuner convert --help" in line


def test_convert_never_overwrites_its_input(tmp_path):
    src = tmp_path / "piece.mid"
    mid = mido.MidiFile()
    tr = mido.MidiTrack()
    mid.tracks.append(tr)
    tr += [mido.Message("note_on", note=64, velocity=70, time=0), mido.Message("note_off", note=64, time=480)]
    mid.save(src)
    before = src.read_bytes()
    line = one_line(run_cli("convert", src, "-o", src, "--profile", "meantone-quarter"))
    assert "overwrite the input" in line
    assert src.read_bytes() == before
    folder = tmp_path / "songs"
    folder.mkdir()
    (folder / "a.mid").write_bytes(before)
    line = one_line(run_cli("convert", folder, "-o", folder))
    assert "must differ from the input folder" in line


def test_missing_profiles_dir_is_named(tmp_path):
    line = one_line(run_cli("profiles", "--profile-dir", tmp_path / "nope"))
    assert line == f"retuner: {tmp_path / 'nope'}: --profile-dir: not a folder"


def test_virtual_and_named_ports_do_not_mix():
    line = one_line(run_cli("run", "--virtual", "--input", "Digital Piano"))
    assert line.startswith("retuner: --virtual: makes our own ports")  # named once, not twice


def test_a_profile_given_as_an_option_is_named_as_the_option(tmp_path):
    # the config's own profile line is valid: the mistake is --profile's, and said once
    cfg = tmp_path / "config.yaml"
    cfg.write_text("profile: edo12\n")
    line = one_line(run_cli("run", "--config", cfg, "--profile", "nosuch"))
    assert line.startswith("retuner: --profile: unknown profile 'nosuch'"), line
    assert "config.yaml" not in line


def test_a_config_profile_folder_is_named_by_file_and_line(tmp_path):
    cfg = tmp_path / "config.yaml"
    cfg.write_text(f"profile: edo12\nprofile_dirs: [{tmp_path / 'nope'}]\n")
    line = one_line(run_cli("run", "--config", cfg))
    assert line == f"retuner: {cfg}:2: profile_dirs: not a folder: {tmp_path / 'nope'}"


def test_an_option_is_named_once():
    for args, option in ((("run", "--virtual", "--output", "x"), "--virtual"),
                         (("fit", "a.mid", "-o", "b.yaml", "--concert-pitch", "0"), "--concert-pitch")):
        line = one_line(run_cli(*args))
        assert line.count(option) == 1 or line.startswith(f"retuner: {option}: "), line
        assert f"{option}: {option}" not in line


def test_a_range_error_gives_the_unit():
    line = one_line(run_cli("convert", "a.mid", "-o", "b.mid", "--adaptive", "--chord-window", "5"))
    assert line.startswith("retuner: --chord-window: must be between 0 and 0.25 seconds"), line
    line = one_line(run_cli("convert", "a.mid", "-o", "b.mid", "--adaptive", "--max-drift", "5000"))
    assert "cents" in line


def test_an_option_typo_suggests_the_nearest_option_and_the_sub_commands_help():
    line = one_line(run_cli("convert", "a.mid", "-o", "b.mid", "--profle-dir", "x"))
    assert line == ("retuner convert: unrecognized arguments: --profle-dir x; did you mean --profile-dir? "
                    "(see 'retuner convert --help')")
    # an old name close to the typo suggests the name now
    line = one_line(run_cli("fit", "a.mid", "-o", "b.yaml", "--refrence", "415"))
    assert "did you mean --concert-pitch?" in line and "'retuner fit --help'" in line
    line = one_line(run_cli("ctl", "status", "--jsno"))
    assert "did you mean --json?" in line and "'retuner ctl status --help'" in line


def test_old_option_names_still_work_with_one_warning(tmp_path):
    (tmp_path / "p").mkdir()
    r = run_cli("profiles", "--profiles-dir", tmp_path / "p")
    assert r.returncode == 0, r.stderr
    assert r.stderr.strip() == ("retuner: warning: --profiles-dir is now called --profile-dir; "
                                "the old name will go in a later release")


def test_options_checked_before_any_work_name_themselves_once(tmp_path):
    (tmp_path / "songs").mkdir()
    line = one_line(run_cli("convert", tmp_path / "songs", "-o", tmp_path / "out", "--report", "r.json"))
    assert line == "retuner: --report: is for a single file, not a folder (so is --plot)"
    line = one_line(run_cli("fit", "a.mid", "-o", tmp_path / "b.yaml", "--max-deviation", "-1"))
    assert line == "retuner: --max-deviation: must be 0 or more cents, got -1"


def test_an_abbreviation_means_the_name_now_not_the_old_one():
    from retuner.cli import build_parser
    args = build_parser().parse_args(["convert", "a.mid", "-o", "b.mid", "--whole-semitone"])
    assert args.whole_semitone_range is True
