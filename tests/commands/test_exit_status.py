"""Every command gives the same exit status for the same error.

Exit statuses by common practice for command-line tools (and what systemd.service(5) lets a unit tell
apart with RestartPreventExitStatus=): 2 for a mistake in what the user wrote (argparse's own status for a
usage error), 1 for something outside that is not there (yet) and may come (the MIDI system, a daemon).
"""

from __future__ import annotations

import os
import subprocess
import sys

import pytest

from retuner.cli import exit_status
from retuner.live import ports
from retuner.errors import RetunerError, Unavailable


def _retuner(*args, env=None):
    return subprocess.run([sys.executable, "-m", "retuner", *args], capture_output=True, text=True,
                          timeout=60, env=env)


@pytest.fixture
def no_jack_server(tmp_path):
    # a JACK server name nobody runs, and no client may start one of its own
    return dict(os.environ, JACK_DEFAULT_SERVER=f"retuner-nobody-{os.getpid()}", JACK_NO_START_SERVER="1",
                XDG_CONFIG_HOME=str(tmp_path), XDG_RUNTIME_DIR=str(tmp_path))


def test_no_midi_system_is_status_1_from_every_command_that_needs_it(no_jack_server):
    listing = _retuner("ports", "--backend", "jack", env=no_jack_server)
    daemon = _retuner("run", "--backend", "jack", "--virtual", "--no-control-socket", env=no_jack_server)
    for r in (listing, daemon):
        assert r.returncode == 1, r.stderr
        last = r.stderr.strip().splitlines()[-1]
        assert last.startswith("retuner: backend: cannot open the jack MIDI system"), r.stderr
    assert listing.stdout == ""


def test_a_mistake_is_status_2_from_every_command(tmp_path):
    env = dict(os.environ, XDG_CONFIG_HOME=str(tmp_path), XDG_RUNTIME_DIR=str(tmp_path))
    for args in (["run", "--profile", "no-such-tuning", "--no-control-socket"],
                 ["show", "no-such-tuning"],
                 ["export", "no-such-tuning", "--format", "mts-bulk", "-o", str(tmp_path / "x.syx")],
                 ["ports", "--backend", "nonsense"],
                 ["convert", str(tmp_path / "missing.mid"), "-o", str(tmp_path / "out.mid")]):
        r = _retuner(*args, env=env)
        assert r.returncode == 2, (args, r.stderr)
        assert len(r.stderr.strip().splitlines()) == 1, (args, r.stderr)


def test_the_status_comes_from_the_error_kind():
    assert exit_status(RetunerError("bad value", field="--bend-range")) == 2
    assert exit_status(Unavailable("no daemon is running")) == 1
    # the port layer reports a MIDI system it cannot open as Unavailable
    assert exit_status(ports._rt_error(OSError("x"), "cannot open the alsa MIDI system", "alsa")) == 1
    # ... while a backend named wrongly in a config file is a mistake in that file
    assert exit_status(RetunerError("unknown backend 'x'", file="config.yaml", line=3, field="backend")) == 2
