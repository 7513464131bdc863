"""``retuner bench --jack``: it starts its own JACK server when none runs, measures the daemon, and gives
the figures (idle CPU, note-on latency in ms and in JACK periods, static and adaptive). Figures only:
no timing goal is asserted here (goals are read from the bench's output)."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import uuid
from pathlib import Path

REPO = next(p for p in Path(__file__).resolve().parents if (p / "pyproject.toml").is_file())   # the checkout


def test_bench_jack_starts_a_server_and_gives_figures(tmp_path):
    name = f"retuner-bench-test-{os.getpid()}-{uuid.uuid4().hex[:6]}"
    env = dict(os.environ, JACK_DEFAULT_SERVER=name, JACK_NO_START_SERVER="1", XDG_CONFIG_HOME=str(tmp_path))
    r = subprocess.run([sys.executable, "-m", "retuner", "bench", "--jack", "--idle", "0.5", "--notes", "3",
                        "--turns", "2", "--json"], env=env, cwd=REPO, capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr[-3000:]
    f = json.loads(r.stdout)
    assert f["server"] == name
    assert f["sample_rate"] == 48000 and f["period_frames"] == 128      # the dummy driver as started
    assert "old" not in f
    assert f["turns"] == 2
    assert f["new"]["period"] == "C"                 # the compiled period, built at install
    assert len(f["floor"]["idle_cpu_turns"]) == 2 and f["floor"]["idle_cpu_percent"] >= 0
    for play in ("static", "adaptive"):
        fig = f["new"][play]
        assert "error" not in fig, fig
        # one JACK client with both ports
        assert sorted(p.split(":")[1] for p in fig["ports"]) == ["in", "out"]
        assert len({p.split(":")[0] for p in fig["ports"]}) == 1
        assert len(fig["idle_cpu_turns"]) == 2 and min(fig["idle_cpu_turns"]) >= 0
        assert min(fig["idle_cpu_turns"]) <= fig["idle_cpu_percent"] <= max(fig["idle_cpu_turns"])
        assert fig["notes"] == 6 and fig["notes_back"] == 6
        # JACK hands a client's output to the next client in a period, and the daemon answers outside
        # JACK's process callback (common practice of JACK MIDI): a note-on cannot come back within
        # the period it left in
        assert fig["latency_periods"]["median"] >= 1
        assert abs(fig["latency_ms"]["median"] - fig["latency_periods"]["median"] * f["period_ms"]) \
            <= f["period_ms"]
    # the server it started is stopped again
    gone = subprocess.run(["jack_lsp"], env=env, capture_output=True, text=True, timeout=20)
    assert gone.returncode != 0


def test_bench_jack_text_names_both_plays(tmp_path):
    name = f"retuner-bench-test-{os.getpid()}-{uuid.uuid4().hex[:6]}"
    env = dict(os.environ, JACK_DEFAULT_SERVER=name, JACK_NO_START_SERVER="1", XDG_CONFIG_HOME=str(tmp_path))
    r = subprocess.run([sys.executable, "-m", "retuner", "bench", "--jack", "--idle", "0.3", "--notes", "2"],
                       env=env, cwd=REPO, capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr[-3000:]
    lines = r.stdout.splitlines()
    assert lines[0].startswith(f"JACK server {name}: 48000 Hz")
    assert any(l.startswith("new static: idle ") and "periods" in l for l in lines), r.stdout
    assert any(l.startswith("new adaptive: idle ") and "periods" in l for l in lines), r.stdout
    assert any(l.startswith("floor: idle ") for l in lines), r.stdout
