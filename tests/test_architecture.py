"""The package's structure, read from its own import statements (the ast of every module,
imports inside functions included, since a lazy import is a dependency all the same).

* no import cycle among retuner's modules;
* data flows one way: the sans-I/O core (pitch, midi, engine, adaptive, profiles) never imports
  a shell (live, control, convert, smf, measure, bench, view, commands, cli), except the measures
  of an output stream (measure.metrics: pure functions of messages), which the lookahead planner
  uses to choose among its plans;
* no output-mode name is compared outside the modules that define the modes.
"""

from __future__ import annotations

import ast
from pathlib import Path

import retuner

PKG = Path(retuner.__file__).resolve().parent
CORE = ("pitch", "midi", "engine", "adaptive", "profiles")
SHELLS = ("live", "control", "convert", "smf", "measure", "bench", "view", "commands", "cli")
ALLOWED = {"retuner.measure.metrics"}


def modules() -> dict[str, Path]:
    out = {}
    for p in PKG.rglob("*.py"):
        rel = p.relative_to(PKG.parent).with_suffix("")
        parts = list(rel.parts)
        if parts[-1] == "__init__":
            parts = parts[:-1]
        out[".".join(parts)] = p
    return out


def imports_of(name: str, path: Path, known: set[str]) -> set[str]:
    tree = ast.parse(path.read_text(encoding="utf-8"))
    pkg = name if path.name == "__init__.py" else name.rsplit(".", 1)[0]
    found: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            targets = [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = pkg.split(".")
                base = base[:len(base) - (node.level - 1)]
                mod = ".".join(base + ([node.module] if node.module else []))
            else:
                mod = node.module or ""
            targets = [mod] + [f"{mod}.{a.name}" for a in node.names]
        else:
            continue
        for t in targets:
            # the deepest known module named by the import
            while t and t not in known:
                t = t.rpartition(".")[0]
            if t and t != name and t != "retuner":
                found.add(t)
    return found


def graph() -> dict[str, set[str]]:
    mods = modules()
    known = set(mods)
    return {n: imports_of(n, p, known) for n, p in mods.items()}


def find_cycle(g: dict[str, set[str]]):
    state: dict[str, int] = {}
    stack: list[str] = []

    def visit(n):
        state[n] = 1
        stack.append(n)
        for m in sorted(g.get(n, ())):
            if state.get(m) == 1:
                return stack[stack.index(m):] + [m]
            if not state.get(m):
                c = visit(m)
                if c:
                    return c
        stack.pop()
        state[n] = 2
        return None

    for n in sorted(g):
        if not state.get(n):
            c = visit(n)
            if c:
                return c
    return None


def test_the_checker_sees_a_cycle():
    """The cycle finder itself, on a made-up graph (so the real check can fail)."""
    assert find_cycle({"a": {"b"}, "b": {"c"}, "c": {"a"}}) == ["a", "b", "c", "a"]
    assert find_cycle({"a": {"b"}, "b": set()}) is None


def test_no_import_cycle_counting_imports_inside_functions():
    g = graph()
    assert len(g) > 30
    assert find_cycle(g) is None, " -> ".join(find_cycle(g))


def test_the_core_never_imports_a_shell():
    bad = []
    for n, deps in graph().items():
        parts = n.split(".")
        if len(parts) < 2 or parts[1] not in CORE:
            continue
        for d in deps:
            dp = d.split(".")
            if len(dp) > 1 and dp[1] in SHELLS and d not in ALLOWED and d != "retuner.measure":
                bad.append(f"{n} imports {d}")
    assert not bad, bad


def _mode_comparisons(tree: ast.AST, names: set[str]) -> list[int]:
    """Lines where a mode name is compared (==, !=, in) with something named like a mode
    (``mode``, ``config.mode``, ``self.mode_name``: a config field called "pool" is no mode)."""
    def modeish(p):
        return ((isinstance(p, ast.Name) and "mode" in p.id)
                or (isinstance(p, ast.Attribute) and "mode" in p.attr))

    lines = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Compare):
            parts = [node.left] + list(node.comparators)
            if not any(modeish(p) for p in parts):
                continue
            consts = [p for p in parts if isinstance(p, ast.Constant) and p.value in names]
            for p in parts:
                if isinstance(p, (ast.Tuple, ast.List, ast.Set)):
                    consts += [e for e in p.elts if isinstance(e, ast.Constant) and e.value in names]
            if consts:
                lines.append(node.lineno)
    return lines


def test_the_mode_finder_sees_a_comparison():
    tree = ast.parse("if config.mode == 'mts':\n    pass\nx = cfg.mode in ('pool', 'mpe')\n")
    assert _mode_comparisons(tree, {"pool", "mpe", "mts"}) == [1, 3]


def test_output_mode_names_are_compared_only_where_the_modes_are_defined():
    from retuner.engine.outputs import MODES
    names = set(MODES)
    bad = []
    for name, path in modules().items():
        if name.startswith("retuner.engine.outputs"):
            continue
        for line in _mode_comparisons(ast.parse(path.read_text(encoding="utf-8")), names):
            bad.append(f"{path.relative_to(PKG.parent)}:{line}")
    assert not bad, bad
