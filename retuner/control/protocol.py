"""The control socket's protocol: JSON lines and the shape of each message.

Each request is one JSON object on one line, each reply one JSON object on one
line (UTF-8, ``\n``-terminated)::

    -> {"cmd": "status"}
    <- {"ok": true, "cmd": "status", "profile": "werckmeister-3", "concert_pitch_hz": null, ...}
    -> {"cmd": "load", "profile": "vallotti", "id": 7}
    <- {"ok": true, "cmd": "load", "id": 7, "profile": "vallotti", ...}
    -> {"cmd": "concert_pitch", "hz": 415}
    -> {"cmd": "nonsense"}
    <- {"ok": false, "error": "unknown command 'nonsense' (known: ...)"}

``id`` is optional and echoed. The commands and the fields each takes are
:data:`COMMANDS` (what they do: retuner.control.commands). A subscribed client
then receives event lines (``{"event": "note_on", ...}``, ``note_off``,
``pitch``, ``profile``, ``adaptive``, ``counters``, ``panic``) until it disconnects.
What plays is named the same everywhere: ``profile`` (the profile in force), ``concert_pitch_hz``
(A4 over the profile's own concert pitch; null: the profile's), ``transpose_semitones``,
``transpose_cents``, ``adaptive``.
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Optional

SOCKET_NAME = "control.sock"

#: command name -> allowed argument fields (besides "cmd" and "id")
COMMANDS: dict[str, tuple[str, ...]] = {
    "status": (),
    "profiles": (),
    "load": ("profile",),
    "adaptive": ("on", "settings"),
    "concert_pitch": ("hz",),          # A4 in Hz, over the profile's own concert pitch
    "reference": ("hz",),              # the old name of concert_pitch, for one release
    "transpose": ("semitones", "cents"),
    "panic": (),
    "subscribe": (),
}


#: old command name -> its name now (still accepted for one release)
OLD_COMMANDS = {"reference": "concert_pitch"}


def default_socket_path() -> Path:
    """``$XDG_RUNTIME_DIR/retuner/control.sock`` (falls back to /tmp/retuner-UID/)."""
    base = os.environ.get("XDG_RUNTIME_DIR")
    if base:
        return Path(base) / "retuner" / SOCKET_NAME
    return Path(f"/tmp/retuner-{os.getuid()}") / SOCKET_NAME


def error_reply(message: str, req_id: Any = None, cmd: Optional[str] = None) -> dict:
    out: dict[str, Any] = {"ok": False, "error": message}
    if cmd is not None:
        out["cmd"] = cmd
    if req_id is not None:
        out["id"] = req_id
    return out


def encode_line(obj: dict) -> bytes:
    return (json.dumps(obj, separators=(",", ":"), allow_nan=False, default=str) + "\n").encode()


@dataclass
class Command:
    """A validated request, waiting to be applied on the engine thread."""

    name: str
    args: dict
    req_id: Any = None
    data: Any = None          # whatever handler.prepare made ready (e.g. a loaded Tuning)
    client: int = -1          # set by the server


def parse_request(line: bytes | str) -> tuple[Optional[Command], Optional[dict]]:
    """Parse and check one request line: (command, None) or (None, error reply).

    Checks the JSON, that it is an object, the command name and that only the
    command's own fields are present. Values are checked by the handler.
    """
    try:
        text = line.decode("utf-8") if isinstance(line, (bytes, bytearray)) else line
        obj = json.loads(text)
    except (UnicodeDecodeError, ValueError) as exc:
        return None, error_reply(f"malformed JSON: {exc}")
    except RecursionError:
        return None, error_reply("request nested too deeply (send one flat JSON object per line)")
    if not isinstance(obj, dict):
        return None, error_reply("a request must be a JSON object such as {\"cmd\": \"status\"}")
    req_id = obj.get("id")
    if req_id is not None and (isinstance(req_id, bool) or not isinstance(req_id, (str, int, float))):
        return None, error_reply("'id' must be a string or a number")
    name = obj.get("cmd")
    if not isinstance(name, str):
        return None, error_reply("missing 'cmd' (a string)", req_id)
    if name not in COMMANDS:
        known = ", ".join(c for c in COMMANDS if c not in OLD_COMMANDS)
        return None, error_reply(f"unknown command {name!r} (known: {known})", req_id)
    allowed = COMMANDS[name]
    extra = sorted(k for k in obj if k not in ("cmd", "id") and k not in allowed)
    if extra:
        return None, error_reply(f"{name}: unknown field(s) {', '.join(extra)}"
                            + (f" (allowed: {', '.join(allowed)})" if allowed else " (takes none)"),
                            req_id, name)
    args = {k: v for k, v in obj.items() if k in allowed}
    return Command(name, args, req_id), None
