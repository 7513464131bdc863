"""The systemd user unit and the daemon's log format.

Sources: systemd.service(5), systemd.exec(5) (Type=notify, WatchdogSec=, ProtectSystem=strict makes the
file system read-only except /dev, /proc and /sys; RuntimeDirectory= is made writable), sd_notify(3);
journald reads a "<N>" syslog priority prefix on stdout/stderr lines (systemd.exec(5), SyslogLevelPrefix=,
priorities from RFC 5424: 3 error, 4 warning, 6 info, 7 debug)."""

from __future__ import annotations

import logging
import os
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

import pytest

REPO = next(p for p in Path(__file__).resolve().parents if (p / "pyproject.toml").is_file())   # the checkout, at any depth of tests/
UNIT = REPO / "systemd" / "retuner.service"


def _unit() -> dict[str, dict[str, list[str]]]:
    sections: dict[str, dict[str, list[str]]] = {}
    cur = None
    for line in UNIT.read_text().splitlines():
        line = line.strip()
        if not line or line.startswith(("#", ";")):
            continue
        if line.startswith("["):
            cur = sections.setdefault(line.strip("[]"), {})
            continue
        k, v = line.split("=", 1)
        cur.setdefault(k, []).append(v)
    return sections


def test_unit_is_a_notify_service_with_watchdog_and_restart():
    s = _unit()["Service"]
    assert s["Type"] == ["notify"]
    assert s["Restart"] == ["on-failure"]
    assert int(s["WatchdogSec"][0]) > 0
    assert s["ExecStart"][0].endswith("retuner run")
    assert s["ExecReload"][0].endswith("-HUP $MAINPID")
    assert _unit()["Install"]["WantedBy"] == ["default.target"]      # a user unit


def test_unit_hardening_leaves_alsa_and_jack_working():
    s = _unit()["Service"]
    assert s["NoNewPrivileges"] == ["yes"]
    assert s["ProtectSystem"] == ["strict"]
    assert s["PrivateTmp"] == ["yes"]
    fams = s["RestrictAddressFamilies"][0].split()
    assert set(fams) == {"AF_UNIX", "AF_NETLINK"}                    # no network
    assert any("%E/retuner" in v for v in s["ReadOnlyPaths"])         # the config folder: read only
    assert any("/dev/shm" in v for v in s["ReadWritePaths"])          # JACK's sockets and shared memory
    assert s["RuntimeDirectory"] == ["retuner"]                      # control socket folder, writable
    assert "PrivateDevices" not in s                                 # would hide /dev/snd/seq


def test_systemd_analyze_verify(tmp_path):
    exe = shutil.which("systemd-analyze")
    if exe is None:
        pytest.fail("systemd-analyze is missing (apt-get install systemd): cannot verify the unit",
                    pytrace=False)
    retuner = shutil.which("retuner") or str(Path(sys.executable).with_name("retuner"))
    unit = tmp_path / "retuner.service"
    text = UNIT.read_text().replace("ExecStart=%h/.local/bin/retuner run", f"ExecStart={retuner} run")
    unit.write_text(text)
    runtime = tmp_path / "run"
    runtime.mkdir(mode=0o700)
    env = dict(os.environ, XDG_RUNTIME_DIR=str(runtime))
    r = subprocess.run([exe, "verify", "--user", str(unit)], capture_output=True, text=True, env=env,
                       timeout=60)
    assert r.returncode == 0, r.stdout + r.stderr
    # and it does complain about a broken unit (so the check above can fail)
    unit.write_text(text.replace("Type=notify", "Type=notifyy"))
    r = subprocess.run([exe, "verify", "--user", str(unit)], capture_output=True, text=True, env=env,
                       timeout=60)
    assert r.returncode != 0 or "notifyy" in (r.stdout + r.stderr)


def _capture(environ, level="info", verbose=0, journal=False):
    """The lines setup_logging writes to stderr; journal=True puts the stream's own device:inode in
    $JOURNAL_STREAM, as systemd does for a stream connected to the journal (systemd.exec(5))."""
    from retuner.live import daemon
    old = sys.stderr
    with tempfile.TemporaryFile("w+") as err:
        if journal:
            st = os.fstat(err.fileno())
            environ = dict(environ, JOURNAL_STREAM=f"{st.st_dev}:{st.st_ino}")
        sys.stderr = err
        try:
            daemon.setup_logging(level, verbose, environ=environ)
            log = logging.getLogger("retuner.test")
            log.debug("per-event line")
            log.info("status: fine")
            log.warning("input gone")
            log.error("reload failed")
        finally:
            sys.stderr = old
            daemon.setup_logging("info", 0, environ={})
        err.seek(0)
        return err.read().splitlines()


def test_journald_lines_have_priority_and_no_time_stamp():
    lines = _capture({}, journal=True)
    assert lines == ["<6>status: fine", "<4>input gone", "<3>reload failed"]
    lines = _capture({}, verbose=1, journal=True)
    assert lines[0] == "<7>per-event line"


def test_terminal_lines_have_a_time_stamp():
    lines = _capture({})
    assert len(lines) == 3
    assert lines[0].split()[1:] == ["INFO", "status:", "fine"]
    assert lines[0][2] == ":" and lines[0][5] == ":"          # HH:MM:SS


def test_run_help_lists_the_options():
    r = subprocess.run([sys.executable, "-m", "retuner", "run", "--help"], capture_output=True, text=True,
                       timeout=30)
    assert r.returncode == 0
    for opt in ("--config", "--profile", "--backend", "--input", "--output", "--virtual", "--mode",
                "--pool", "--bend-range", "--release-time", "--bend-scale", "-v"):
        assert opt in r.stdout


def test_start_limit_survives_a_late_sound_server():
    """systemd.unit(5): StartLimitIntervalSec= and StartLimitBurst= belong to [Unit]; more than Burst
    starts within the interval stop the unit (start-limit-hit). systemd.service(5): RestartSec= is the
    pause before a restart. Defaults from systemd-system.conf(5): DefaultStartLimitIntervalSec=10s,
    DefaultStartLimitBurst=5."""
    unit, service = _unit()["Unit"], _unit()["Service"]
    assert "StartLimitIntervalSec" not in service and "StartLimitBurst" not in service
    interval = float(unit.get("StartLimitIntervalSec", ["10"])[0])
    burst = int(unit.get("StartLimitBurst", ["5"])[0])
    pause = float(service["RestartSec"][0])
    assert interval > 0 and burst > 0                     # 0 would switch the limit off: endless loop
    # a unit failing at once is started every `pause` seconds: it keeps retrying for (burst - 1) * pause
    retrying_for = (burst - 1) * pause
    assert retrying_for >= 120, retrying_for              # a sound server two minutes late is caught
    # ... and the limit still stops a unit that can never start: more than `burst` starts fit the interval
    assert interval / pause + 1 > burst
