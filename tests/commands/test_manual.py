"""The man page and the bash and zsh completion are written from the live argument parser and cover all of it.

Checked with the real tools: groff renders the page with every warning on (man(7) macros; groff's -ww),
bash itself runs the completion function the way its programmable completion does (bash manual,
"Programmable Completion": COMP_WORDS, COMP_CWORD, COMPREPLY, complete -F), and zsh completes real
command lines: an interactive `zsh -f` on a pseudo-terminal (zsh/zpty) loads the script from $fpath with
compinit, and TAB runs the completion system (zsh manual, "Completion System"; "The zsh/zpty Module")."""

from __future__ import annotations

import argparse
import re
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


# --- zsh ----------------------------------------------------------------------------------------------

#: Completes each command line given (TAB, complete-word) in an interactive zsh on a pseudo-terminal
#: and prints "<LINE>line" then every match as "<HIT>match". Matches are read where the completion
#: system adds them (compadd, wrapped; calls that only compute, -O/-A/-D, pass through). Markers are
#: written split in two ("<E""ND>") so the terminal's echo of these commands never looks like them.
ZSH_DRIVER = r"""
zmodload zsh/zpty || exit 3
how=$1; shift
zpty z zsh -f -i
zpty -w z "PS1='' PROMPT='' RPROMPT=''; unsetopt beep; LISTMAX=100000"
if [[ $how == fpath:* ]]; then
  zpty -w z "fpath=(${(q)how#fpath:} \$fpath); autoload -Uz compinit; compinit -u -D"
else
  zpty -w z "autoload -Uz compinit; compinit -u -D; source ${(q)how#source:}"
fi
zpty -w z 'compadd() {
  if [[ ${@[1,(i)(-|--)]} == *-[OAD]\ * ]]; then builtin compadd "$@"; return $?; fi
  local -a __hits; builtin compadd -A __hits "$@"; local rc=$?
  (( $#__hits )) && print -r -l -- "<H""IT>"${^__hits}
  return rc
}'
zpty -w z '__complete() { _main_complete; print -r -- "<E""ND>"; }; zle -C __complete complete-word __complete'
zpty -w z "bindkey '^I' __complete; print -r -- '<RE''ADY>'"
out=''
while zpty -r z chunk; do out+=$chunk; [[ $out == *'<READY>'* ]] && break; done
for line in "$@"; do
  zpty -w -n z "$line"$'\t'
  out=''
  integer n=0
  while (( n++ < 3000 )); do
    if zpty -r -t z chunk; then out+=$chunk; else sleep 0.01; fi
    [[ $out == *'<END>'* ]] && break
  done
  [[ $out == *'<END>'* ]] || { print -r -- "no answer for: $line"; exit 4 }
  print -r -- "<LINE>$line"
  print -r -- "$out"
  zpty -w -n z $'\C-u'
done
zpty -d z
"""


def _zsh():
    zsh = shutil.which("zsh")
    if zsh is None:
        pytest.fail("zsh is missing (apt-get install zsh): cannot check the zsh completion", pytrace=False)
    return zsh


@pytest.fixture(scope="module")
def zsh_dir(tmp_path_factory):
    """A folder of $fpath holding the script as _retuner (how a user installs it), and the driver."""
    d = tmp_path_factory.mktemp("zsh")
    (d / "_retuner").write_text(_retuner("completion", "zsh"))
    (d / "driver.zsh").write_text(ZSH_DRIVER)
    (d / "empty").mkdir()             # the working folder: no file names among the matches
    return d


def _zsh_complete(zsh_dir, lines, how=None):
    """line -> the matches zsh offers for it."""
    how = how or f"fpath:{zsh_dir}"
    r = subprocess.run([_zsh(), "-f", str(zsh_dir / "driver.zsh"), how, *lines], capture_output=True,
                       text=True, timeout=300, cwd=zsh_dir / "empty")
    assert r.returncode == 0, r.stdout[-2000:] + r.stderr
    out: dict[str, list[str]] = {}
    current = None
    for piece in re.split(r"(<LINE>[^\r\n]*|<HIT>[^\r\n<\x1b]*)", r.stdout):
        if piece.startswith("<LINE>"):
            current = piece[len("<LINE>"):]
            out[current] = []
        elif piece.startswith("<HIT>") and current is not None:
            out[current].append(piece[len("<HIT>"):])
    assert list(out) == list(lines), r.stdout[-2000:]
    return out


def test_zsh_completion_parses_and_names_every_command_and_option(zsh_dir):
    r = subprocess.run([_zsh(), "-n", str(zsh_dir / "_retuner")], capture_output=True, text=True, timeout=30)
    assert r.returncode == 0 and r.stderr == "", r.stderr
    text = (zsh_dir / "_retuner").read_text()
    assert text.startswith("#compdef retuner\n")
    for path, parser in _commands(build_parser()):
        if path:
            assert re.search(rf"^ *{re.escape(path[-1])}\) _retuner", text, re.M), path     # handed on
            assert f"'{path[-1]}:" in text, path                                            # described
        for flag in _flags(parser):
            assert re.search(rf"[')]\*?{re.escape(flag)}[=+\[]", text), (path, flag)


def test_zsh_completes_every_command_and_option_of_the_live_parser(zsh_dir):
    commands = list(_commands(build_parser()))
    lines = []
    for path, parser in commands:
        lines.append(" ".join(["retuner", *path, "-"]))
        if any(isinstance(a, argparse._SubParsersAction) for a in parser._actions):
            lines.append(" ".join(["retuner", *path, ""]))
    got = _zsh_complete(zsh_dir, lines)
    for path, parser in commands:
        assert set(got[" ".join(["retuner", *path, "-"])]) == _flags(parser), path
        names = [name for p, _ in _commands(parser) if len(p) == 1 for name in p]
        if names:
            assert set(got[" ".join(["retuner", *path, ""])]) == set(names), path


def test_zsh_completes_names_choices_and_steps_over_values(zsh_dir):
    parser = dict(_commands(build_parser()))[("run",)]
    backend = next(a for a in parser._actions if "--backend" in a.option_strings)
    got = _zsh_complete(zsh_dir, ["retuner conv", "retuner ctl ad", "retuner ctl --control-socket /tmp/s pan",
                                  "retuner run --backend ", "retuner run --mode m", "retuner run --mode=m",
                                  "retuner run --mode mpe --pro", "retuner ctl adaptive ", "retuner completion "])
    assert got["retuner conv"] == ["convert"]
    assert got["retuner ctl ad"] == ["adaptive"]
    assert got["retuner ctl --control-socket /tmp/s pan"] == ["panic"]
    assert sorted(got["retuner run --backend "]) == sorted(backend.choices)
    assert sorted(got["retuner run --mode m"]) == sorted(got["retuner run --mode=m"]) == ["mpe", "mts"]
    assert sorted(got["retuner run --mode mpe --pro"]) == ["--profile", "--profile-dir"]
    assert sorted(got["retuner ctl adaptive "]) == ["off", "on"]
    assert sorted(got["retuner completion "]) == ["bash", "zsh"]


def test_zsh_completion_sourced_after_compinit(zsh_dir):
    # the other way to install it: 'source <(retuner completion zsh)' in ~/.zshrc, after compinit
    got = _zsh_complete(zsh_dir, ["retuner sh", "retuner ctl tr"], how=f"source:{zsh_dir / '_retuner'}")
    assert got == {"retuner sh": ["show"], "retuner ctl tr": ["transpose"]}
