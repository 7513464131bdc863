"""Readiness and watchdog notifications to the service manager (sd_notify protocol).

The protocol (systemd, ``sd_notify(3)``): the manager passes the path of a Unix
datagram socket in ``$NOTIFY_SOCKET`` (a leading ``@`` means the abstract
namespace); the service sends newline-separated ``KEY=VALUE`` assignments such as
``READY=1``, ``WATCHDOG=1``, ``STOPPING=1``, ``STATUS=...``. ``$WATCHDOG_USEC``
(with ``$WATCHDOG_PID``, when set, naming the process it is meant for) tells how
often the manager expects ``WATCHDOG=1``; the usual advice is to ping at half that
interval.

Without ``$NOTIFY_SOCKET`` every call is a no-op, so the daemon runs the same
under a terminal, a plain shell script or a service manager.
"""

from __future__ import annotations

import logging
import os
import socket
import time
from typing import Mapping, Optional

log = logging.getLogger("retuner.live.notify")


class Notifier:
    """Send ``KEY=VALUE`` lines to ``$NOTIFY_SOCKET``; silent when it is not set."""

    def __init__(self, environ: Optional[Mapping[str, str]] = None):
        env = os.environ if environ is None else environ
        path = env.get("NOTIFY_SOCKET") or ""
        self.address: Optional[str] = None
        if path.startswith("@"):
            self.address = "\0" + path[1:]      # abstract namespace
        elif path.startswith("/"):
            self.address = path
        self.watchdog_usec: Optional[int] = None
        wd = env.get("WATCHDOG_USEC")
        wd_pid = env.get("WATCHDOG_PID")
        if wd and (not wd_pid or wd_pid == str(os.getpid())):
            try:
                usec = int(wd)
                if usec > 0:
                    self.watchdog_usec = usec
            except ValueError:
                log.warning("ignoring WATCHDOG_USEC=%r: not a whole number", wd)
        self._sock: Optional[socket.socket] = None
        self._warned = False

    @property
    def enabled(self) -> bool:
        return self.address is not None

    @property
    def watchdog_interval(self) -> Optional[float]:
        """Seconds between WATCHDOG=1 pings (half of ``$WATCHDOG_USEC``), or None."""
        if self.watchdog_usec is None:
            return None
        return self.watchdog_usec / 2e6

    def send(self, **fields: object) -> bool:
        """Send e.g. ``send(READY=1, STATUS="running")``; return True when sent."""
        if self.address is None:
            return False
        text = "\n".join(f"{k}={v}" for k, v in fields.items())
        try:
            if self._sock is None:
                self._sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
                self._sock.setblocking(False)
            self._sock.sendto(text.encode("utf-8"), self.address)
            return True
        except OSError as exc:
            if not self._warned:
                log.warning("cannot notify the service manager at %s: %s",
                            self.address.replace("\0", "@"), exc)
                self._warned = True
            return False

    def ready(self, status: str | None = None) -> bool:
        return self.send(READY=1, **({"STATUS": status} if status else {}))

    def watchdog(self) -> bool:
        return self.send(WATCHDOG=1)

    def stopping(self) -> bool:
        return self.send(STOPPING=1)

    def reloading(self) -> bool:
        # systemd >= 253 wants the monotonic clock beside RELOADING=1 (sd_notify(3)).
        usec = int(time.clock_gettime(time.CLOCK_MONOTONIC) * 1e6)
        return self.send(RELOADING=1, MONOTONIC_USEC=usec)

    def status(self, text: str) -> bool:
        return self.send(STATUS=text)

    def close(self) -> None:
        if self._sock is not None:
            self._sock.close()
            self._sock = None
