"""``retuner bench --files``: how fast and how lean file conversion is.

Figures (seconds unless named otherwise; each the best of ``repeat`` runs in this process):

* ``convert_s`` against ``mido_load_save_s``: converting a generated arrangement of about
  100 000 events (:func:`retuner.bench.performance.arrangement_tracks`) against mido loading
  and saving the same file (goal: ``time_ratio`` at most 2);
* ``piano``: a piano-like file of 10 000 channel messages (at most 7 notes sounding, pedal;
  :func:`retuner.bench.performance.piano_tracks`) converted with its summary, as
  ``retuner convert`` does without ``-q`` (goal: at most 3x mido's load + save); and a
  piano-like file of 2 500 messages converted by ``retuner convert --adaptive`` with and
  without ``--lookahead`` in child processes (goal: at most 20x);
* ``big``: ``retuner convert`` with its summary on a piano-like file of 1 000 000 events, in a
  child process: its wall time and peak resident memory (``ru_maxrss`` from ``wait4``;
  goal: at most 400 MB);
* ``batch``: a batch of files with one worker and with more (goal: scales with workers).
"""

from __future__ import annotations

import io
import os
import shutil
import subprocess
import sys
import tempfile
import time
from typing import Callable, Optional, Sequence

import mido

from retuner.bench.performance import arrangement_tracks, piano_tracks, write_file
from retuner.convert.batch import convert_batch
from retuner.convert.conversion import ConvertOptions, convert_file
from retuner.engine.core import EngineConfig
from retuner.measure import report as rp
from retuner.profiles.profile import load_profile

GOALS = {"time_ratio": 2.0, "piano_time_ratio": 3.0, "lookahead_time_ratio": 20.0, "big_peak_rss_mb": 400.0}


def _best(fn: Callable[[], object], repeat: int) -> float:
    ts = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        ts.append(time.perf_counter() - t0)
    return min(ts)


def _mido_round_trip(src: str, dst: str) -> None:
    mido.MidiFile(src).save(dst)


def _with_summary(src: str, dst: str, opts: ConvertOptions) -> str:
    """What ``retuner convert`` does without ``-q``: convert, decode the output, summarise."""
    res = convert_file(src, dst, opts)
    return rp.text_summary(rp.build_report(res, opts, rp.decode_outputs(res, opts)))


def child_run(argv: Sequence[str]) -> dict:
    """Run ``python -m retuner ARGV`` in a child process: exit status, wall seconds, peak RSS (MB)."""
    t0 = time.perf_counter()
    proc = subprocess.Popen([sys.executable, "-m", "retuner", *argv],
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    err = proc.stderr.read() if proc.stderr else b""
    _, status, usage = os.wait4(proc.pid, 0)
    proc.returncode = os.waitstatus_to_exitcode(status)
    wall = time.perf_counter() - t0
    return {"status": proc.returncode, "time_s": round(wall, 3),
            "peak_rss_mb": round(usage.ru_maxrss / 1024.0, 1),       # Linux: kilobytes
            "error": err.decode(errors="replace").strip()[-300:]}


def convert_speed_bench(events: int = 100_000, *, profile: str = "meantone-quarter",
                        batch_files: int = 8, batch_events: int = 12_000,
                        jobs: Optional[Sequence[int]] = None, repeat: int = 3,
                        piano_messages: int = 10_000, big_events: int = 1_000_000,
                        lookahead: bool = True, lookahead_messages: int = 2_500) -> dict:
    """The figures of the module docstring (``big_events=0`` leaves the big file out)."""
    tmp = tempfile.mkdtemp(prefix="retuner-bench-")
    try:
        src = os.path.join(tmp, "big.mid")
        n = write_file(src, arrangement_tracks(events))
        tuning = load_profile(profile)
        opts = ConvertOptions(tuning, EngineConfig())
        t_mido = _best(lambda: _mido_round_trip(src, os.path.join(tmp, "mido.mid")), repeat)
        t_conv = _best(lambda: convert_file(src, os.path.join(tmp, "out.mid"), opts), repeat)
        out = {"events": n, "profile": profile, "mido_load_save_s": round(t_mido, 4),
               "convert_s": round(t_conv, 4), "time_ratio": round(t_conv / t_mido, 3),
               "events_per_s": round(n / t_conv), "goals": GOALS}
        # a piano-like file, converted with the summary, as the command line does
        psrc = os.path.join(tmp, "piano.mid")
        pn = write_file(psrc, piano_tracks(piano_messages))
        p_mido = _best(lambda: _mido_round_trip(psrc, os.path.join(tmp, "pmido.mid")), repeat)
        p_conv = _best(lambda: _with_summary(psrc, os.path.join(tmp, "pout.mid"), opts), repeat)
        piano = {"events": pn, "mido_load_save_s": round(p_mido, 4),
                 "convert_with_summary_s": round(p_conv, 4), "time_ratio": round(p_conv / p_mido, 3)}
        if lookahead:
            # as a user runs them (child processes: the command line gives the planner's numpy
            # one thread before loading it, which this process cannot do any more)
            lsrc = os.path.join(tmp, "piano-la.mid")
            ln = write_file(lsrc, piano_tracks(lookahead_messages))
            plain = child_run(["convert", lsrc, "-o", os.path.join(tmp, "pa.mid"), "--adaptive", "-q"])
            la = child_run(["convert", lsrc, "-o", os.path.join(tmp, "pla.mid"), "--adaptive",
                            "--lookahead", "-q"])
            piano.update({"lookahead_events": ln, "adaptive_s": plain["time_s"],
                          "lookahead_s": la["time_s"],
                          "lookahead_time_ratio": round(la["time_s"] / plain["time_s"], 2)})
        out["piano"] = piano
        if big_events:
            bsrc = os.path.join(tmp, "million.mid")
            bn = write_file(bsrc, piano_tracks(big_events))
            run = child_run(["convert", bsrc, "-o", os.path.join(tmp, "million-out.mid"),
                             "--profile", profile])
            run["events"] = bn
            run["file_mb"] = round(os.path.getsize(bsrc) / 1e6, 2)
            out["big"] = run
        # batch scaling
        bdir = os.path.join(tmp, "batch")
        os.mkdir(bdir)
        for i in range(batch_files):
            write_file(os.path.join(bdir, f"f{i}.mid"), arrangement_tracks(batch_events, seed=i + 2))
        cpus = os.cpu_count() or 1
        jobs = list(jobs) if jobs else sorted({1, min(2, cpus), cpus})
        times = {}
        for j in jobs:
            odir = os.path.join(tmp, f"out{j}")
            t0 = time.perf_counter()
            convert_batch(bdir, odir, opts, jobs=j, quiet=True, stream=io.StringIO())
            times[j] = time.perf_counter() - t0
        out["batch"] = {"files": batch_files, "events_per_file": batch_events,
                        "time_s_by_jobs": {str(j): round(t, 3) for j, t in times.items()},
                        "speedup": {str(j): round(times[jobs[0]] / t, 2) for j, t in times.items()},
                        "cpus": cpus}
        return out
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
