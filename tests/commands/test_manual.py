"""The man page and bash completion are written from the live argument parser and cover all of it.

Checked with the real tools: groff renders the page with every warning on (man(7) macros; groff's -ww),
and bash itself runs the completion function the way its programmable completion does (bash manual,
"Programmable Completion": COMP_WORDS, COMP_CWORD, COMPREPLY, complete -F)."""

from __future__ import annotations

import argparse
import shutil
import subprocess
import sys

import pytest

from retuner.cli import build_parser


def _commands(parser, path=()):
    """(path, parser) for retuner and every command below it, read straight from argparse."""
    yield path, parser
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            for name, sub in action.choices.items():
                yield from _commands(sub, path + (name,))


def _flags(parser):
    return {f for a in parser._actions for f in a.option_strings if a.help != argparse.SUPPRESS}


def _retuner(*args):
    r = subprocess.run([sys.executable, "-m", "retuner", *args], capture_output=True, text=True, timeout=60)
    assert r.returncode == 0, r.stderr
    return r.stdout


@pytest.fixture(scope="module")
def rendered():
    groff = shutil.which("groff")
    if groff is None:
        pytest.fail("groff is missing (apt-get install groff-base): cannot render the man page", pytrace=False)
    page = _retuner("manual")
    # -ww: all warnings; -Tascii -P-cbou: plain text; a wide line so no option is broken over two lines
    r = subprocess.run([groff, "-man", "-ww", "-Tascii", "-P-cbou", "-rLL=250n"], input=page,
                       capture_output=True, text=True, timeout=60)
    assert r.returncode == 0 and r.stderr == "", r.stderr
    return r.stdout


def test_man_page_has_every_command_and_option(rendered):
    lines = [line.strip() for line in rendered.splitlines()]
    assert lines[0].startswith("RETUNER(1)")
    for path, parser in _commands(build_parser()):
        if path:
            assert "retuner " + " ".join(path) in lines, path          # a heading of its own
        for flag in _flags(parser):
            assert any(line.startswith(flag) or f", {flag}" in line for line in lines), (path, flag)
    for section in ("NAME", "SYNOPSIS", "DESCRIPTION", "COMMANDS", "FILES", "ENVIRONMENT", "EXIT STATUS"):
        assert section in lines


def test_man_page_written_to_a_file(tmp_path):
    out = tmp_path / "retuner.1"
    assert _retuner("manual", "-o", str(out)) == ""
    assert out.read_text() == _retuner("manual")


def _complete(script_path, words):
    """COMPREPLY for the command line `words` (the last one is being completed), as bash computes it."""
    shell = "\n".join([
        f"source {script_path}",
        "COMP_WORDS=(" + " ".join(f"'{w}'" for w in words) + ")",
        "COMP_CWORD=$(( ${#COMP_WORDS[@]} - 1 ))",
        'COMP_LINE="${COMP_WORDS[*]}"; COMP_POINT=${#COMP_LINE}',
        "fn=$(complete -p retuner | sed -n 's/.*-F \\([^ ]*\\) retuner$/\\1/p')",
        '"$fn" retuner "${COMP_WORDS[COMP_CWORD]}" "${COMP_WORDS[COMP_CWORD-1]}"',
        'printf "%s\\n" "${COMPREPLY[@]}"'])
    r = subprocess.run(["bash", "--norc", "--noprofile", "-c", shell], capture_output=True, text=True,
                       timeout=30, cwd=script_path.parent)
    assert r.returncode == 0 and r.stderr == "", r.stderr
    return [w for w in r.stdout.splitlines() if w]


@pytest.fixture(scope="module")
def script(tmp_path_factory):
    path = tmp_path_factory.mktemp("completion") / "retuner.bash"
    path.write_text(_retuner("completion", "bash"))
    return path


def test_bash_completes_a_command_name(script):
    assert _complete(script, ["retuner", "conv"]) == ["convert"]
    assert _complete(script, ["retuner", "ctl", "ad"]) == ["adaptive"]
    assert _complete(script, ["retuner", "ctl", "--control-socket", "/tmp/s", "pan"]) == ["panic"]


def test_bash_completes_every_command_and_option_of_the_live_parser(script):
    for path, parser in _commands(build_parser()):
        names = [name for p, _ in _commands(parser) if len(p) == 1 for name in p]
        if names:
            assert set(names) <= set(_complete(script, ["retuner", *path, ""])), path
        assert set(_complete(script, ["retuner", *path, "-"])) == _flags(parser), path


def test_bash_completes_the_choices_of_an_option_from_the_parser(script):
    parser = dict(_commands(build_parser()))[("run",)]
    backend = next(a for a in parser._actions if "--backend" in a.option_strings)
    assert _complete(script, ["retuner", "run", "--backend", ""]) == list(backend.choices)
    assert _complete(script, ["retuner", "run", "--mode", "m"]) == ["mpe", "mts"]
    # an option's value is stepped over: after it, options of the same command again
    assert "--profile" in _complete(script, ["retuner", "run", "--mode", "mpe", "--pro"])
