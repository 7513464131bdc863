"""One daemon per port set and per control socket.

Two daemons on the same ports double every note; two on one control socket fight over it. So
before it opens anything, a daemon claims both with lock files (``flock``, released by the kernel
however the process ends, SIGKILL included):

* ``<socket name>.lock`` beside the control socket (when it is enabled);
* ``ports-<digest>.lock`` for the port set (the backend and, per side, the port name asked for
  or, for a port of our own, the client name), in the folder every daemon of the user shares
  whatever its socket: ``$XDG_RUNTIME_DIR/retuner`` (else ``/tmp/retuner-UID``).

Each lock file holds the owner's pid and socket, so a second daemon refuses with one line naming
the first. The folder must be ours (owned by us, not writable by group or others): another user
could otherwise plant a socket or lock of their own there.
"""

from __future__ import annotations

import fcntl
import hashlib
import os
from pathlib import Path
from typing import Optional

from retuner.control.protocol import default_socket_path
from retuner.control.server import check_folder
from retuner.errors import RetunerError
from retuner.live.config import Settings


def socket_path(settings: Settings) -> Path:
    return Path(settings.control.path) if settings.control.path else default_socket_path()


def port_set(settings: Settings) -> str:
    """What identifies the ports a daemon plays through."""
    def side(name: Optional[str], own: str) -> str:
        if settings.virtual or name is None:
            return f"own:{settings.client_name}-{own}"
        return f"port:{name}"
    return "|".join((settings.backend, side(settings.input, "in"), side(settings.output, "out")))


class Claim:
    """The lock files a running daemon holds (see the module doc)."""

    def __init__(self, settings: Settings):
        self.settings = settings
        self.socket_fd: Optional[int] = None
        self.ports_fd: Optional[int] = None

    def take(self) -> "Claim":
        s = self.settings
        sock = socket_path(s)
        me = self._me(s)
        try:
            if s.control.enabled:
                check_folder(sock.parent)
                self.socket_fd = self._lock(sock.parent / f"{sock.name}.lock",
                                            f"the control socket {sock}", me)
            self.ports_fd = self._lock_ports(s, me)
        except BaseException:
            self.release()
            raise
        return self

    def move_ports(self, new: Settings) -> None:
        """A reload with other ports: claim the new set, then let go of the old one."""
        if port_set(new) == port_set(self.settings):
            self.settings = new
            return
        fd = self._lock_ports(new, self._me(new))
        if self.ports_fd is not None:
            os.close(self.ports_fd)
        self.ports_fd = fd
        self.settings = new

    @staticmethod
    def _me(s: Settings) -> str:
        return f"pid {os.getpid()}, control socket {socket_path(s) if s.control.enabled else 'off'}\n"

    def _lock_ports(self, s: Settings, me: str) -> int:
        # in the one folder every daemon of this user shares, whatever its socket
        folder = default_socket_path().parent
        check_folder(folder)
        digest = hashlib.sha1(port_set(s).encode()).hexdigest()[:16]
        return self._lock(folder / f"ports-{digest}.lock", "these ports", me)

    @staticmethod
    def _lock(path: Path, what: str, me: str) -> int:
        try:
            fd = os.open(path, os.O_RDWR | os.O_CREAT | os.O_CLOEXEC | os.O_NOFOLLOW, 0o600)
        except OSError as exc:
            raise RetunerError(f"cannot open the lock file {path}: {exc.strerror or exc}") from None
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            try:
                other = os.pread(fd, 200, 0).decode("utf-8", "replace").strip() or "pid unknown"
            finally:
                os.close(fd)
            raise RetunerError(f"another retuner daemon ({other}) already runs on {what}; "
                               "stop it first (or give this one other ports and --control-socket)") from None
        os.ftruncate(fd, 0)
        os.pwrite(fd, me.encode(), 0)
        return fd

    def release(self) -> None:
        for fd in (self.socket_fd, self.ports_fd):
            if fd is not None:
                try:
                    os.close(fd)          # closing drops the lock; the file stays (harmless, reused)
                except OSError:
                    pass
        self.socket_fd = self.ports_fd = None
