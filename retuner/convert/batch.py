"""Converting a folder: every ``.mid``/``.midi`` below it, in worker processes.

:func:`convert_batch` converts every MIDI file below a folder into an output folder (same
relative paths) in worker processes (``concurrent.futures.ProcessPoolExecutor``, one per CPU
unless told), with a progress bar on a terminal and plain lines otherwise; a bad file is
reported in one line and skipped, the rest finish; the exit status is 1 if any failed.
"""

from __future__ import annotations

import os
import sys
from concurrent.futures import ProcessPoolExecutor, as_completed
from pathlib import Path
from typing import Optional, Sequence

from retuner.convert.conversion import ConvertOptions, convert_file
from retuner.errors import RetunerError


def find_midi_files(folder: str | os.PathLike) -> list[Path]:
    """Every .mid / .midi below ``folder`` (case-insensitive), sorted."""
    root = Path(folder)
    out = [p for p in root.rglob("*") if p.is_file() and p.suffix.lower() in (".mid", ".midi")]
    return sorted(out)


def _batch_one(job: tuple[str, str, ConvertOptions]) -> tuple[str, Optional[str], list[str], int]:
    """Worker: convert one file. Returns (input, error line or None, outputs written, notes)."""
    src, dst, opts = job
    try:
        Path(dst).parent.mkdir(parents=True, exist_ok=True)
        res = convert_file(src, dst, opts)
        return src, None, [o.path for o in res.outputs], int(res.stats.get("notes", 0))
    except RetunerError as exc:
        if exc.file is None:
            exc.file = src
        return src, str(exc), [], 0
    except Exception as exc:  # a bug must not take the batch down: report the file and go on
        return src, f"{src}: internal error: {type(exc).__name__}: {exc}", [], 0


def _split_note(outputs: Sequence[str]) -> str:
    if len(outputs) <= 1:
        return ""
    return (f": the parts need more channels than one port has: {len(outputs)} files "
            f"({', '.join(os.path.basename(o) for o in outputs)})")


class _Progress:
    """A progress bar on a terminal, plain lines otherwise."""

    def __init__(self, total: int, stream, quiet: bool = False):
        self.total = total
        self.done = 0
        self.failed = 0
        self.stream = stream
        self.tty = hasattr(stream, "isatty") and stream.isatty()
        self.quiet = quiet

    def update(self, name: str, error: Optional[str], note: str = "") -> None:
        self.done += 1
        if error:
            self.failed += 1
        if self.tty:
            if error:
                self.stream.write("\r\x1b[K" + f"retuner: {error}\n")
            elif note:
                self.stream.write("\r\x1b[K" + f"{name}{note}\n")
            width = 30
            filled = int(width * self.done / max(self.total, 1))
            self.stream.write(f"\r\x1b[K[{'#' * filled}{'.' * (width - filled)}] "
                              f"{self.done}/{self.total} {os.path.basename(name)[:40]}")
            if self.done == self.total:
                self.stream.write("\n")
            self.stream.flush()
        else:
            if error:
                self.stream.write(f"retuner: {error}\n")
            elif not self.quiet or note:
                self.stream.write(f"[{self.done}/{self.total}] {name}{note}\n")
            self.stream.flush()


def convert_batch(src_dir: str | os.PathLike, dst_dir: str | os.PathLike, opts: ConvertOptions, *,
                  jobs: Optional[int] = None, quiet: bool = False, stream=None) -> int:
    """Convert every .mid below ``src_dir`` into ``dst_dir`` (same relative paths) in worker
    processes. A bad file is reported in one line and skipped. Exit status: 0, or 1 if any failed."""
    stream = stream if stream is not None else sys.stderr
    src = Path(src_dir)
    dst = Path(dst_dir)
    if dst.exists() and not dst.is_dir():
        raise RetunerError("output for a folder must be a folder", file=str(dst))
    files = find_midi_files(src)
    if not files:
        raise RetunerError("no .mid files found", file=str(src))
    try:
        dst.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise RetunerError(f"cannot create the output folder: {exc.strerror or exc}", file=str(dst))
    if dst.resolve() == src.resolve():
        raise RetunerError("the output folder must differ from the input folder", file=str(dst))
    jobs_list = [(str(f), str(dst / f.relative_to(src)), opts) for f in files]
    n = jobs if jobs and jobs > 0 else (os.cpu_count() or 1)
    n = max(1, min(n, len(jobs_list)))
    prog = _Progress(len(jobs_list), stream, quiet)
    results = []
    if n == 1:
        for j in jobs_list:
            r = _batch_one(j)
            results.append(r)
            prog.update(r[0], r[1], _split_note(r[2]))
    else:
        with ProcessPoolExecutor(max_workers=n) as ex:
            futs = [ex.submit(_batch_one, j) for j in jobs_list]
            for fut in as_completed(futs):
                r = fut.result()
                results.append(r)
                prog.update(r[0], r[1], _split_note(r[2]))
    failed = [r for r in results if r[1]]
    if not quiet:
        ok = len(results) - len(failed)
        print(f"converted {ok} of {len(results)} files into {dst}"
              + (f"; {len(failed)} failed" if failed else ""))
    return 1 if failed else 0
