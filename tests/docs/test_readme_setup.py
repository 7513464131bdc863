"""The README's two set-up commands work as written, as root without sudo and as a user with sudo.

Installing for real takes minutes, so here the commands run verbatim under bash with recording
stand-ins for the programs they call (apt-get, sudo, python3 and the venv it makes); what is checked is
the shell logic: who gets called, as whom, with which environment. The real installs were run by hand.
Shell facts from the bash manual (Simple Command Expansion: assignments before a command are recognised
before expansion, so "$S VAR=x cmd" with an empty $S runs "VAR=x" as a command) and env(1).
"""

from __future__ import annotations

import os
import re
import shlex
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from retuner.cli import build_parser
from retuner.live import ports
from retuner.live.config import Settings

REPO = next(p for p in Path(__file__).resolve().parents if (p / "pyproject.toml").is_file())   # the checkout, at any depth of tests/
README = (REPO / "README.md").read_text()
PREFIX = 'S=$(test "$(id -u)" = 0 || echo sudo)'
VENV = ".venv"


def _blocks() -> dict[str, str]:
    """The first shell block of "Start here" (install and run) and the block after the test marker."""
    start = README.index("## Start here")
    install = re.search(r"```sh\n(.*?)\n```", README[start:], re.S).group(1)
    marker = README.index("<!-- test-command -->")
    test = re.match(r"\s*```sh\n(.*?)\n```", README[marker + len("<!-- test-command -->"):], re.S).group(1)
    return {"install": install, "test": test}


def _simple_commands(line: str) -> list[list[str]]:
    out = []
    for part in re.split(r"&&|;", line):
        words = shlex.split(part)
        if words:
            out.append(words)
    return out


@pytest.mark.parametrize("which", ["install", "test"])
def test_command_is_one_line_that_uses_sudo_only_through_the_prefix(which):
    cmd = _blocks()[which]
    assert "\n" not in cmd
    assert cmd.startswith(PREFIX + "; ")
    rest = cmd[len(PREFIX) + 2:]
    for words in _simple_commands(rest):
        assert "sudo" not in words, words                     # never a bare sudo
        if "apt-get" in words:
            assert words[0] == "$S", words                    # ... but every install through $S
            if "install" in words:
                # through env: "$S DEBIAN_FRONTEND=... apt-get" breaks when $S is empty
                assert words[1:3] == ["env", "DEBIAN_FRONTEND=noninteractive"], words
                assert "-y" in words


def test_venv_paths_match_across_the_readme():
    blocks = _blocks()
    for which, cmd in blocks.items():
        assert f"python3 -m venv {VENV} " in cmd, which
    used = set(re.findall(r"([\w$./~-]*venv[\w-]*)/bin/", README))
    assert used and {u.removeprefix("$PWD/") for u in used} == {VENV}, used
    assert f"{VENV}/" in (REPO / ".gitignore").read_text()       # the venv is never committed
    # the user unit is pointed at the same venv
    assert f'ExecStart=$PWD/{VENV}/bin/retuner run' in README


def _fake_bin(tmp_path: Path, uid: int, with_sudo: bool) -> tuple[dict, Path]:
    """A PATH with recording stand-ins; each call is logged as: name|uid|DEBIAN_FRONTEND|args."""
    bin_ = tmp_path / "bin"
    bin_.mkdir()
    log = tmp_path / "calls.log"
    record = f'printf "%s|%s|%s|%s\\n" "$(basename "$0")" "$FAKE_UID" "${{DEBIAN_FRONTEND-}}" "$*" >> {log}\n'

    def script(name, body=""):
        p = bin_ / name
        p.write_text("#!/bin/bash\n" + record + body)
        p.chmod(0o755)

    script("id", '[ "$1" = -u ] && echo "$FAKE_UID"\n')
    script("apt-get", '[ "$FAKE_UID" = 0 ] || { echo "apt-get: are you root?" >&2; exit 100; }\n')
    if with_sudo:
        script("sudo", 'FAKE_UID=0 exec env "$@"\n')      # sudo takes VAR=value too
    # python3 -m venv DIR makes DIR/bin with recording pip, python and retuner
    venv_bin = 'for t in pip python retuner; do printf "%s\\n" "#!/bin/bash" ' \
               f"'{record}' > \"$3/bin/$t\"; chmod +x \"$3/bin/$t\"; done\n"
    script("python3", f'[ "$1 $2" = "-m venv" ] && mkdir -p "$3/bin" && {venv_bin}')
    for tool in ("env", "bash", "basename", "mkdir", "chmod"):      # the real ones, and nothing else
        os.symlink(shutil.which(tool), bin_ / tool)
    env = {"PATH": str(bin_), "FAKE_UID": str(uid), "HOME": str(tmp_path)}
    return env, log


@pytest.mark.parametrize("which", ["install", "test"])
@pytest.mark.parametrize("uid,with_sudo", [(0, False), (1000, True)])
def test_command_runs_as_root_without_sudo_and_as_a_user_with_sudo(tmp_path, which, uid, with_sudo):
    env, log = _fake_bin(tmp_path, uid, with_sudo)
    work = tmp_path / "clone"
    work.mkdir()
    r = subprocess.run(["bash", "-euo", "pipefail", "-c", _blocks()[which]], cwd=work, env=env,
                       capture_output=True, text=True, timeout=30)
    assert r.returncode == 0, r.stderr
    calls = [line.split("|") for line in log.read_text().splitlines()]
    names = [c[0] for c in calls if c[0] != "id"]
    if with_sudo:
        assert names[:4] == ["sudo", "apt-get", "sudo", "apt-get"], names
    else:
        assert names[:2] == ["apt-get", "apt-get"], names
    apt = [c for c in calls if c[0] == "apt-get"]
    assert [c[1] for c in apt] == ["0", "0"]                          # both as root
    assert apt[0][3] == "update"
    assert apt[1][2] == "noninteractive" and apt[1][3].startswith("install -y")
    rest = [c for c in calls if c[0] in ("pip", "python", "retuner")]
    assert all(c[1] == str(uid) for c in rest)                        # nothing else as root
    assert rest[0][0] == "pip" and rest[0][3].startswith(("install .", "install -e ."))


def test_without_root_and_without_sudo_the_command_stops_at_once(tmp_path):
    env, log = _fake_bin(tmp_path, 1000, with_sudo=False)
    r = subprocess.run(["bash", "-c", _blocks()["install"]], cwd=tmp_path, env=env, capture_output=True,
                       text=True, timeout=30)
    assert r.returncode == 127 and "sudo" in r.stderr                  # bash: sudo: command not found
    assert not (tmp_path / VENV).exists()


def test_man_page_and_completion_block_runs_as_written(tmp_path):
    start = README.index("The man page and the bash and zsh completion are written from the options themselves")
    first, second = re.findall(r"```sh\n(.*?)\n```", README[start:], re.S)[:2]
    block = first + "\n" + second
    work = tmp_path / "clone"
    (work / VENV / "bin").mkdir(parents=True)
    os.symlink(Path(sys.executable).with_name("retuner"), work / VENV / "bin" / "retuner")
    env = dict(os.environ, HOME=str(tmp_path))
    r = subprocess.run(["bash", "-euo", "pipefail", "-c", block], cwd=work, env=env, capture_output=True,
                       text=True, timeout=60)
    assert r.returncode == 0, r.stderr
    page = (tmp_path / ".local/share/man/man1/retuner.1").read_text()
    assert page.startswith(".TH RETUNER 1 ")
    completion = (tmp_path / ".local/share/bash-completion/completions/retuner").read_text()
    assert "complete -o filenames -F _retuner retuner" in completion
    assert (tmp_path / ".zfunc/_retuner").read_text().startswith("#compdef retuner\n")     # zsh, from $fpath


def test_jack_block_starts_the_server_the_tests_use_and_the_command_parses():
    start = README.index("use a JACK server; with no sound")
    block = re.search(r"```sh\n(.*?)\n```", README[start:], re.S).group(1).splitlines()
    assert block[0].startswith("$S apt-get install ") and "jackd2" in block[0].split()
    # the same dummy-driver server the JACK tests start (tests/jack.py), under the default name
    jackd = shlex.split(block[1])
    assert jackd[0] == "jackd" and jackd[-1] == "&"
    assert {"--no-realtime", "-d"} <= set(jackd) and jackd[jackd.index("-d") + 1] == "dummy"
    retuner = shlex.split(block[2])
    assert retuner[0] == f"{VENV}/bin/retuner"
    args = build_parser().parse_args(retuner[1:])              # parses with the live options
    assert args.command == "run" and args.virtual
    # no --backend: the default (auto) takes the JACK server when there is no ALSA sequencer
    assert args.backend is None and "jack" in ports.CHOICES and ports.AUTO == Settings().backend
