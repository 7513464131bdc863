"""Every JSON field a user or a script reads is named in the project's vocabulary.

The outputs walked: show, profiles, compare and bench (plain, --adaptive, --files) with --json, the
report of convert --report (with --adaptive --lookahead, the richest), the classroom view's frame, and
the control socket's replies and events as `retuner ctl ... --json` prints them from a running daemon
(in memory, tests/daemonrig.py). The allowed words come from DEVELOPERS.md, section Vocabulary: the
table's JSON field column and the list of JSON words below it; a field name is words joined by `_`,
so a new synonym (say `tuning` for a profile, `reference` for the concert pitch) fails here until the
vocabulary says it. The words in the table's last column (old names) are never allowed. A number that
is not a whole count carries its unit (`_cents`, `_s`, `_hz`, ...) or says it is a ratio.
"""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
import threading
import time
from pathlib import Path
from fnmatch import fnmatchcase

import pytest

from data import midigen
from daemonrig import Rig, note_on

REPO = next(str(p) for p in Path(os.path.abspath(__file__)).parents if (p / "pyproject.toml").is_file())   # the checkout, at any depth of tests/

#: where a mapping's keys are data (names of progressions, profiles, policies, goals, part and
#: worker numbers), not field names: path patterns, '*' standing for one key
DATA_KEYS = ("bench-adaptive.adaptive.pump", "bench-adaptive.adaptive.chorales",
             "bench-adaptive.adaptive.humanised", "bench-adaptive.adaptive.humanised.*",
             "bench-adaptive.adaptive.goals", "bench-files.batch.*", "convert-report.part_channels")


def vocabulary() -> tuple[set[str], set[str], set[str], set[str]]:
    """(allowed words, old words, unit words, words of a number without a unit) from DEVELOPERS.md."""
    text = open(os.path.join(REPO, "DEVELOPERS.md"), encoding="utf-8").read()
    section = text.split("## Vocabulary", 1)[1]
    allowed: set[str] = set()
    old: set[str] = set()
    for line in section.splitlines():
        cells = [c.strip() for c in line.strip().strip("|").split("|")]
        if len(cells) != 6 or cells[0] in ("concept",) or set(cells[0]) <= {"-"}:
            continue
        for name in re.findall(r"`([a-z0-9_]+)`", cells[3]):
            allowed.update(name.split("_"))
        for name in re.findall(r"`([a-z0-9_.]+)`", cells[5]):
            old.update(re.split(r"[_.]", name))

    def listed(title: str) -> set[str]:
        m = re.search(re.escape(title) + r".*?\n```\n(.*?)```", section, re.S)
        assert m, f"DEVELOPERS.md, Vocabulary: no list after {title!r}"
        return set(m.group(1).split())

    words, units, counts = listed("JSON words:"), listed("JSON units:"), listed("JSON numbers without a unit")
    return allowed | words | units | counts, old - allowed - words - units - counts, units, counts


def run_json(*argv: str, cwd=None) -> object:
    r = subprocess.run([sys.executable, "-m", "retuner", *argv], capture_output=True, text=True,
                       timeout=600, cwd=cwd)
    assert r.returncode == 0, r.stderr
    return json.loads(r.stdout)


def control_outputs(tmp_path) -> dict[str, object]:
    """What `retuner ctl ... --json` prints from a daemon (in memory, its loop turned by a thread
    of the test, which also plays the notes)."""
    rig = Rig(control=True)
    calls: list = []
    stop = threading.Event()

    def loop():
        while not stop.is_set():
            while calls:
                calls.pop(0)()
            rig.clock.advance(0.002)
            rig.pump()
            time.sleep(0.002)

    thread = threading.Thread(target=loop, daemon=True)
    thread.start()
    out: dict[str, object] = {}
    try:
        def ctl(*args: str) -> subprocess.CompletedProcess:
            return subprocess.run([sys.executable, "-m", "retuner", "ctl", "--control-socket", rig.socket_path,
                                   "--json", *args], capture_output=True, text=True, timeout=60)
        sub = subprocess.Popen([sys.executable, "-m", "retuner", "ctl", "--control-socket", rig.socket_path,
                                "--json", "subscribe"], stdout=subprocess.PIPE, text=True)
        time.sleep(1.5)        # subscribed before the notes play
        calls.append(lambda: rig.play(note_on(60), note_on(64), note_on(67)))
        time.sleep(0.5)
        for action in (["status"], ["profiles"], ["load", "vallotti"], ["concert-pitch", "442"],
                       ["transpose", "2"], ["adaptive", "on", "--set", "max_drift=4"], ["panic"]):
            r = ctl(*action)
            assert r.returncode == 0, r.stderr
            out["ctl-" + action[0]] = json.loads(r.stdout)
        time.sleep(0.5)
        sub.terminate()
        lines, _ = sub.communicate(timeout=60)
        for i, line in enumerate(lines.splitlines()):
            ev = json.loads(line)
            out["ctl-subscribe-" + (ev["event"] if i else "reply")] = ev
        assert {"ctl-subscribe-" + e for e in ("note_on", "profile", "adaptive", "panic", "counters")} <= set(out), lines
        assert {"ctl-subscribe-" + e for e in ("note_on", "profile", "adaptive", "panic", "counters")} <= set(out)
    finally:
        stop.set()
        thread.join(5)
        rig.close()
    return out


def all_outputs(tmp_path) -> dict[str, object]:
    src = str(tmp_path / "hymn.mid")
    midigen.four_part_piece(src)
    out: dict[str, object] = {
        "show": run_json("show", "edo12", "--json"),
        "profiles": run_json("profiles", "--json"),
        "compare": run_json("compare", src, "--json", "--adaptive", "--top", "3"),
        "bench": run_json("bench", "--json", "--events", "300"),
        "bench-adaptive": run_json("bench", "--json", "--events", "300", "--adaptive"),
    }
    rep = tmp_path / "report.json"
    r = subprocess.run([sys.executable, "-m", "retuner", "convert", src, "-o", str(tmp_path / "out.mid"),
                        "--adaptive", "--lookahead", "--report", str(rep), "-q"],
                       capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr
    out["convert-report"] = json.loads(rep.read_text())
    # bench --files as the command prints it, on files small enough for a test
    from retuner.bench.files import convert_speed_bench
    out["bench-files"] = json.loads(json.dumps(convert_speed_bench(
        3000, batch_files=2, batch_events=500, jobs=[1], repeat=1, piano_messages=500, big_events=2000,
        lookahead_messages=300)))
    from retuner.view.watch import WatchState
    from retuner.view.web import frame
    s = WatchState()
    s.snapshot({"profile": "edo12", "notes": [{"key": 60, "cents": 6000.0}, {"key": 64, "cents": 6400.0}]})
    out["classroom-frame"] = frame(s)
    out.update(control_outputs(tmp_path))
    return out


def fields(obj, path: str):
    """(path, key, value) of every field of every mapping inside ``obj``."""
    if isinstance(obj, dict):
        data = any(fnmatchcase(path, p) for p in DATA_KEYS)
        for k, v in obj.items():
            if not data:
                yield path, k, v
            yield from fields(v, f"{path}.{k}")
    elif isinstance(obj, list):
        for v in obj:
            yield from fields(v, path)


@pytest.fixture(scope="module")
def outputs(tmp_path_factory):
    return all_outputs(tmp_path_factory.mktemp("json"))


def test_the_vocabulary_lists_are_read():
    allowed, old, units, counts = vocabulary()
    # the table's own words are in; its old names are out (DEVELOPERS.md, Vocabulary)
    assert {"profile", "concert", "pitch", "hz", "impurity", "cents", "beat", "rate"} <= allowed
    assert {"tuning", "reference", "beats", "stats", "uptime"} <= old | {"uptime"}
    assert {"cents", "s", "hz"} <= units
    assert not old & allowed


def test_every_json_field_is_in_the_vocabulary(outputs):
    allowed, old, units, counts = vocabulary()
    assert len(outputs) >= 15
    bad = set()
    for source, obj in outputs.items():
        for path, key, _ in fields(obj, source):
            words = key.split("_")
            for w in words:
                if w in old:
                    bad.add(f"{path}.{key}: {w!r} is an old name (DEVELOPERS.md, Vocabulary)")
                elif w not in allowed:
                    bad.add(f"{path}.{key}: {w!r} is not a JSON word of DEVELOPERS.md, Vocabulary")
    assert not bad, "\n".join(sorted(bad))


def test_numbers_carry_their_unit(outputs):
    allowed, old, units, counts = vocabulary()
    bad = set()
    for source, obj in outputs.items():
        for path, key, value in fields(obj, source):
            if not isinstance(value, float) and not (isinstance(value, list) and value
                                                      and all(isinstance(v, float) for v in value)):
                continue
            words = set(key.split("_"))
            if not words & (units | counts):
                bad.add(f"{path}.{key} = {value!r}: no unit in its name")
    assert not bad, "\n".join(sorted(bad))


def test_a_synonym_fails(outputs):
    # the check can fail: a made-up output naming a profile `tuning`, as compare did, is refused
    allowed, old, units, counts = vocabulary()
    assert "tuning" in old and "tuning" not in allowed
    assert [k for _, k, _ in fields({"results": [{"tuning": "edo12"}]}, "x") if "tuning" in k.split("_")]
