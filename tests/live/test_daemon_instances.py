"""One daemon per port set and per control socket, and a reload that only takes a whole config.
In-process (tests/daemonrig.py), plus the command line's one line and exit status 2."""

from __future__ import annotations

import os
import signal
import subprocess
import sys

import pytest

from daemonrig import Rig, note_on
from retuner.errors import RetunerError
from temperaments import MEANTONE, W3, half_step


def test_a_second_daemon_on_the_same_ports_refuses_and_names_the_first():
    first = Rig("profile: edo12\n", control=True)
    second = None
    try:
        second = Rig("profile: edo12\n", control=True, runtime=first.runtime, start=False)
        with pytest.raises(RetunerError) as ei:
            second.daemon.start()
        msg = str(ei.value)
        assert f"pid {os.getpid()}" in msg and first.socket_path in msg
        assert second.backend.open_ports() == []          # it never touched the ports
        assert second.backend.received(second.out_port) == []
        first.play(note_on(60))                           # the first plays on
        assert [n.key for n in first.decode().stuck()] == [60]
    finally:
        if second is not None:
            second.stopped = True
            second.close()
        first.close()


def test_a_second_daemon_on_the_same_socket_refuses():
    first = Rig("profile: edo12\n", control=True)
    try:
        second = Rig("profile: edo12\n", control=True, named=False, runtime=first.runtime, start=False)
        second.socket_path = first.socket_path
        second.daemon.settings = second.settings()
        with pytest.raises(RetunerError, match="control socket"):
            second.daemon.start()
        second.stopped = True
        second.close()
    finally:
        first.close()


def test_other_ports_and_socket_run_side_by_side_and_a_lock_dies_with_its_daemon():
    first = Rig("profile: edo12\n", control=True)
    try:
        other = Rig("profile: edo12\n", control=True, named=False, runtime=first.runtime)
        other.close()
        again = Rig("profile: edo12\n", control=True, named=False, runtime=first.runtime)
        again.close()
    finally:
        first.close()


def test_the_command_line_refuses_with_one_line_and_status_2():
    first = Rig("profile: edo12\n", control=True, named=False)
    try:
        env = dict(os.environ, XDG_RUNTIME_DIR=first.runtime)
        r = subprocess.run([sys.executable, "-m", "retuner", "run", "--virtual", "--status-interval", "0",
                            "--control-socket", first.socket_path], capture_output=True, text=True,
                           timeout=30, env=env)
        assert r.returncode == 2, r.stderr
        lines = r.stderr.strip().splitlines()
        assert len(lines) == 1 and f"pid {os.getpid()}" in lines[0] and first.socket_path in lines[0]
    finally:
        first.close()


def test_a_socket_folder_writable_by_others_is_refused_with_one_line(tmp_path):
    shared = tmp_path / "shared"
    shared.mkdir()
    os.chmod(shared, 0o777)
    env = dict(os.environ, XDG_RUNTIME_DIR=str(tmp_path / "xdg"))
    r = subprocess.run([sys.executable, "-m", "retuner", "run", "--virtual",
                        "--control-socket", str(shared / "c.sock")], capture_output=True, text=True,
                       timeout=30, env=env)
    assert r.returncode == 2
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and "writable by other users" in lines[0]


@pytest.mark.parametrize("text", ["", "\n\n", "# saved in a moment\n"])
def test_reload_of_an_empty_config_keeps_the_running_settings(text):
    r = Rig("profile: meantone-quarter\n")
    try:
        r.write_config(text)
        r.signal(signal.SIGHUP)
        assert r.log.count("reload failed, keeping the running settings") == 1
        assert r.log.count("empty") == 1
        assert r.daemon.outp is not None and r.daemon.inp is not None     # the named ports stay
        r.play(note_on(68))
        (n,) = r.decode().stuck()
        assert abs(n.cents - MEANTONE[68]) <= half_step(2)
        # a complete file is taken again
        r.write_config("profile: werckmeister-3\n")
        r.signal(signal.SIGHUP)
        r.play(note_on(63))
        n = [x for x in r.decode().stuck() if x.key == 63][0]
        assert abs(n.cents - W3[63]) <= half_step(2)
    finally:
        r.close()


def test_an_empty_config_at_the_start_still_means_the_defaults(tmp_path):
    # not a reload: nothing runs yet whose settings could be kept
    from retuner.live.config import load_config
    cfg = tmp_path / "c.yaml"
    cfg.write_text("")
    assert load_config(str(cfg)).profile == "edo12"
