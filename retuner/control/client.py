"""The control socket's client side (used by ``retuner ctl`` and ``retuner watch``)."""

from __future__ import annotations

import json
import os
import socket
from pathlib import Path
from typing import Optional

from retuner.control.protocol import default_socket_path, encode_line

class NoDaemon(Exception):
    """No daemon listens on the control socket."""


class ControlClient:
    """A blocking JSON-lines client for the control socket."""

    def __init__(self, path: str | os.PathLike | None = None, timeout: float = 5.0):
        self.path = Path(path) if path else default_socket_path()
        self.sock = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
        self.sock.settimeout(timeout)
        try:
            self.sock.connect(str(self.path))
        except (FileNotFoundError, ConnectionRefusedError) as exc:
            self.sock.close()
            raise NoDaemon(f"no daemon is running (nothing listens on {self.path})") from exc
        except OSError as exc:
            self.sock.close()
            raise NoDaemon(f"cannot reach the daemon on {self.path}: {exc.strerror or exc}") from exc
        self._buf = bytearray()

    def close(self) -> None:
        self.sock.close()

    def __enter__(self) -> "ControlClient":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def send(self, obj: dict) -> None:
        self.sock.sendall(encode_line(obj))

    def read(self) -> Optional[dict]:
        """The next line as an object; None at end of stream."""
        while True:
            nl = self._buf.find(b"\n")
            if nl >= 0:
                line = bytes(self._buf[:nl])
                del self._buf[:nl + 1]
                return json.loads(line)
            data = self.sock.recv(65536)
            if not data:
                return None
            self._buf += data

    def request(self, cmd: str, **args) -> dict:
        self.send({"cmd": cmd, **args})
        while True:
            reply = self.read()
            if reply is None:
                raise NoDaemon("the daemon closed the connection")
            if "event" not in reply:
                return reply
