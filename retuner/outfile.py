"""Writing output files all or nothing: a temporary file in the same folder, then a rename."""

from __future__ import annotations

import os
import tempfile
from pathlib import Path

from retuner.errors import RetunerError


def write_atomic(path: str | os.PathLike, data: bytes | str) -> None:
    """Write ``data`` (text is written as UTF-8) to ``path``: a temporary file in the same
    folder, flushed to disk, then ``os.replace``. On any error the temporary file is removed
    and an existing file at ``path`` is left as it was; an OSError becomes a RetunerError
    naming the file. The new file's mode follows the umask, as an ordinary file's would."""
    if isinstance(data, str):
        data = data.encode("utf-8")
    target = Path(path)
    directory = target.parent if str(target.parent) else Path(".")
    if not directory.is_dir():
        raise RetunerError("output folder does not exist", file=str(path))
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=directory)
    except OSError as exc:
        raise RetunerError(f"cannot write: {exc.strerror or exc}", file=str(path)) from exc
    try:
        umask = os.umask(0)
        os.umask(umask)
        os.fchmod(fd, 0o666 & ~umask)
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, target)
    except BaseException as exc:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        if isinstance(exc, OSError):
            raise RetunerError(f"cannot write: {exc.strerror or exc}", file=str(path)) from exc
        raise
