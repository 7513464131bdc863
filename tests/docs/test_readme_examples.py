"""Every example in the README works as written.

Each YAML block loads (a profile with the profile reader, the configuration with the config reader);
each ``retuner`` command in a shell block, and each one quoted in the prose, parses with the live
parser without an old option name; the commands that end by themselves and touch nothing (show,
profiles, manual, completion) are run for real. The daemon (``run``), ``watch`` and ``ctl`` never
end or need a running daemon: they are parsed, not run. The two set-up commands are checked in
test_readme_setup.py.
"""

from __future__ import annotations

import contextlib
import io
import os
import re
import shlex
import subprocess
from pathlib import Path

import pytest

from retuner import cli
from retuner.live.config import load_config, parse_config
from retuner.profiles.parse import parse_profile

REPO = next(p for p in Path(__file__).resolve().parents if (p / "pyproject.toml").is_file())   # the checkout, at any depth of tests/
README = (REPO / "README.md").read_text()
OPERATORS = {"&&", "||", ";", "&", "|", ">", ">>", "<", "2>"}
RUN_FOR_REAL = {"show", "profiles", "manual", "completion"}


def _blocks(lang: str) -> list[str]:
    return re.findall(rf"```{lang}\n(.*?)\n```", README, re.S)


def _retuner_commands(text: str) -> list[list[str]]:
    """The argument lists of every ``retuner`` (or ``.venv/bin/retuner``) command in shell text."""
    text = text.replace("\\\n", " ")
    out = []
    for line in text.splitlines():
        lex = shlex.shlex(line, posix=True, punctuation_chars=True)
        lex.whitespace_split = True
        lex.commenters = "#"
        words = list(lex)
        simple: list[str] = []
        for w in words + [";"]:
            if w in OPERATORS or set(w) <= set("&|;<>"):
                while simple and re.match(r"^[A-Z_]+=", simple[0]):   # VAR=value before a command
                    simple.pop(0)
                if simple and (simple[0] == "retuner" or simple[0].endswith("/bin/retuner")) \
                        and not simple[0].startswith("ExecStart"):
                    out.append(simple[1:])
                simple = []
                if w in (">", ">>", "<", "2>"):
                    simple = ["<redirect>"]          # the word after a redirection is a file
            else:
                simple.append(w)
    return out


def _parse(argv: list[str]):
    err = io.StringIO()
    with contextlib.redirect_stderr(err):
        try:
            args = cli.build_parser().parse_args(argv)
        except SystemExit as exc:
            if exc.code == 0 and "--help" in argv:
                return None
            raise AssertionError(f"retuner {' '.join(argv)}: {err.getvalue().strip()} (exit {exc.code})")
    assert "warning" not in err.getvalue(), (argv, err.getvalue())   # no old option names
    return args


def test_every_yaml_block_loads(tmp_path, monkeypatch):
    blocks = _blocks("yaml")
    profiles = [b for b in blocks if re.search(r"^id: ", b, re.M)]
    configs = [b for b in blocks if b not in profiles]
    assert len(profiles) >= 4 and len(configs) == 1
    for text in profiles:
        t = parse_profile(text, "README.md")
        assert t.id.startswith("my-")
    # the configuration names ~/tunings, which must exist
    monkeypatch.setenv("HOME", str(tmp_path))
    (tmp_path / "tunings").mkdir()
    s = parse_config(configs[0], "README.md")
    assert s.profile_dirs == [str(tmp_path / "tunings")]
    assert s.notes == []                        # no old key names
    assert s.engine["adaptive"]["recentre_band_cents"] == 2


def test_every_accepted_config_key_is_in_the_readme_reference():
    import dataclasses

    from retuner.adaptive.solver import AdaptiveConfig
    from retuner.live import config
    block = next(b for b in _blocks("yaml") if not re.search(r"^id: ", b, re.M))
    block = re.sub(r"(intervals|weights): \{[^}]*\}", r"\1:", block)   # their keys are interval classes
    keys = set(re.findall(r"^ *(\w+):", block, re.M)) | set(re.findall(r"[{,] *(\w+):", block))
    accepted = (set(config.TOP_FIELDS) - {"mode"}) | set(config.engine_fields()) \
        | {config.ADAPTIVE_KEY_OF.get(f.name, f.name) for f in dataclasses.fields(AdaptiveConfig)} \
        | {"channel", "ab_cc", "ab", "enabled", "socket"}
    assert accepted - keys == set(), "accepted but not documented"
    assert keys - accepted == set(), "documented but not accepted"


def test_every_retuner_command_in_a_shell_block_parses_and_the_quick_ones_run(tmp_path, monkeypatch):
    monkeypatch.setenv("HOME", str(tmp_path))
    monkeypatch.chdir(tmp_path)
    commands = [c for b in _blocks("sh") for c in _retuner_commands(b)]
    seen = {c[0] for c in commands}
    assert {"run", "convert", "compare", "fit", "show", "ctl", "watch", "manual", "completion"} <= seen, seen
    for argv in commands:
        argv = [os.path.expanduser(w) for w in argv]
        args = _parse(argv)
        if argv[0] in RUN_FOR_REAL and "--plot" not in argv:
            if "-o" in argv:      # the block makes the folder first (mkdir -p)
                Path(argv[argv.index("-o") + 1]).parent.mkdir(parents=True, exist_ok=True)
            out = io.StringIO()
            with contextlib.redirect_stdout(out):
                assert args._run(args) == 0, argv
            assert out.getvalue() or "-o" in argv, argv


def test_the_classroom_config_command_writes_a_config_that_loads(tmp_path):
    block = next(b for b in _blocks("sh") if "printf" in b)
    lines = block.replace("\\\n", " ").splitlines()
    write = next(line for line in lines if "printf" in line).split("#")[0]
    env = dict(os.environ, HOME=str(tmp_path))
    subprocess.run(["bash", "-c", write], check=True, env=env)
    s = load_config(str(tmp_path / ".config" / "retuner" / "config.yaml"))
    assert s.profiles == ["edo12", "pythagorean", "meantone-quarter", "werckmeister-3"]
    assert s.switch.channel == 16


def _inline_commands() -> list[str]:
    """``retuner ...`` quoted in the prose (not in blocks), placeholders filled in."""
    prose = re.sub(r"```.*?```", "", README, flags=re.S)
    spans = re.findall(r"`(?:[A-Z_]+=\S+ )?((?:\.venv/bin/)?retuner [^`]+)`", prose)
    fill = {"ID": "edo12", "PORT": "8080", "HZ": "440", "N": "2", "DIR": "/tmp", "FILE.png": "x.png",
            "FILE.json": "x.json", "OUTDIR": "out"}
    out = []
    for span in spans:
        if " | " in span or "<" in span:       # a summary of several commands, not one to type
            continue
        out.append(" ".join(fill.get(w, w) for w in span.split()))
    return out


@pytest.mark.parametrize("span", _inline_commands())
def test_every_retuner_command_in_the_prose_parses(span):
    argv = shlex.split(span)[1:]
    _parse(argv)
