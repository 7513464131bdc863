"""sd_notify messages, checked against the protocol in systemd's sd_notify(3) man page:
datagrams of newline-separated KEY=VALUE lines to the AF_UNIX socket named by $NOTIFY_SOCKET
(a leading '@' = abstract namespace); $WATCHDOG_USEC = the interval the manager expects pings in,
$WATCHDOG_PID = the process it is meant for."""

from __future__ import annotations

import os
import socket
import uuid

from retuner.live.notify import Notifier


def _bind(tmp_path, abstract=False):
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    if abstract:
        name = f"retuner-test-{uuid.uuid4().hex}"
        sock.bind("\0" + name)
        env_value = "@" + name
    else:
        path = str(tmp_path / "notify.sock")
        sock.bind(path)
        env_value = path
    sock.settimeout(2)
    return sock, env_value


def test_ready_watchdog_stopping_arrive(tmp_path):
    sock, addr = _bind(tmp_path)
    n = Notifier({"NOTIFY_SOCKET": addr})
    assert n.enabled
    assert n.ready(status="ports open")
    assert sock.recv(4096).decode().split("\n") == ["READY=1", "STATUS=ports open"]
    assert n.watchdog()
    assert sock.recv(4096) == b"WATCHDOG=1"
    assert n.stopping()
    assert sock.recv(4096) == b"STOPPING=1"
    n.close()
    sock.close()


def test_abstract_namespace(tmp_path):
    sock, addr = _bind(tmp_path, abstract=True)
    assert addr.startswith("@")
    n = Notifier({"NOTIFY_SOCKET": addr})
    n.ready()
    assert sock.recv(4096) == b"READY=1"
    sock.close()


def test_reloading_carries_monotonic_usec(tmp_path):
    # sd_notify(3): RELOADING=1 must come with MONOTONIC_USEC (CLOCK_MONOTONIC, microseconds)
    sock, addr = _bind(tmp_path)
    n = Notifier({"NOTIFY_SOCKET": addr})
    import time
    before = time.clock_gettime(time.CLOCK_MONOTONIC) * 1e6
    n.reloading()
    lines = dict(l.split("=", 1) for l in sock.recv(4096).decode().split("\n"))
    after = time.clock_gettime(time.CLOCK_MONOTONIC) * 1e6
    assert lines["RELOADING"] == "1"
    assert before <= int(lines["MONOTONIC_USEC"]) <= after
    sock.close()


def test_without_socket_nothing_is_sent():
    n = Notifier({})
    assert not n.enabled
    assert n.ready() is False
    assert n.watchdog_interval is None


def test_watchdog_interval_is_half_of_watchdog_usec():
    # sd_watchdog_enabled(3) recommends pinging at half the interval
    assert Notifier({"WATCHDOG_USEC": "3000000"}).watchdog_interval == 1.5
    # meant for another process: not ours to ping
    assert Notifier({"WATCHDOG_USEC": "3000000", "WATCHDOG_PID": str(os.getpid() + 1)}).watchdog_interval is None
    assert Notifier({"WATCHDOG_USEC": "3000000", "WATCHDOG_PID": str(os.getpid())}).watchdog_interval == 1.5
    assert Notifier({"WATCHDOG_USEC": "junk"}).watchdog_interval is None


def test_missing_socket_does_not_raise(tmp_path):
    n = Notifier({"NOTIFY_SOCKET": str(tmp_path / "nobody-listens")})
    assert n.ready() is False
    assert n.watchdog() is False
