"""The package's structure, read from its own import statements (the ast of every module,
imports inside functions included, since a lazy import is a dependency all the same).

* no import cycle among retuner's modules, nor among its parts (live, control, convert, ...);
* data flows one way, down the layers of the core: the engine calls adaptive and profiles, they
  call pitch and midi, all may raise errors; the sans-I/O core never imports anything above it.
  Every other part of the package (live, control, convert, smf, measure, bench, view, commands,
  cli, and any part added later) counts as a shell, so an import from the core to any of them
  fails, with no exception;
* no output-mode name is compared outside the modules that define the modes.
"""

from __future__ import annotations

import ast
from pathlib import Path

import retuner

PKG = Path(retuner.__file__).resolve().parent
#: the core's layers, lowest first: a module imports only from its own layer or the ones below.
#: Whatever is not named here is a shell and stands above them all.
LAYERS = (("errors", "units"), ("pitch", "midi"), ("profiles", "adaptive"), ("engine",))
RANK = {part: i for i, layer in enumerate(LAYERS) for part in layer}
SHELL = len(LAYERS)


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


def rank(module: str) -> int:
    """The layer of a module: its first part below ``retuner`` (``retuner.engine.core`` -> engine)."""
    parts = module.split(".")
    return RANK.get(parts[1], SHELL) if len(parts) > 1 else SHELL


def upward_imports(g: dict[str, set[str]]) -> list[str]:
    return sorted(f"{n} imports {d}" for n, deps in g.items() for d in deps if rank(d) > rank(n))


def test_the_checker_sees_an_upward_import():
    """The layer check itself, on made-up graphs (so the real check can fail): the lookahead
    planner as it stood in adaptive/ (it used measure.metrics), a solver reaching for the engine,
    and the pitch arithmetic reaching for a part of the package that does not exist yet."""
    assert upward_imports({"retuner.adaptive.lookahead": {"retuner.measure.metrics", "retuner.measure",
                                                          "retuner.engine.outputs", "retuner.errors"}}) == [
        "retuner.adaptive.lookahead imports retuner.engine.outputs",
        "retuner.adaptive.lookahead imports retuner.measure",
        "retuner.adaptive.lookahead imports retuner.measure.metrics"]
    assert upward_imports({"retuner.pitch.tuning": {"retuner.newshell.x", "retuner.cli"}}) == [
        "retuner.pitch.tuning imports retuner.cli", "retuner.pitch.tuning imports retuner.newshell.x"]
    assert upward_imports({"retuner.live.daemon": {"retuner.engine.core", "retuner.control.server"},
                           "retuner.engine.core": {"retuner.adaptive.solver", "retuner.midi.encode"}}) == []


def test_every_part_of_the_package_is_a_layer_of_the_core_or_a_shell():
    """A core layer named here that no longer exists would silently check nothing."""
    parts = {n.split(".")[1] for n in modules() if "." in n}
    assert set(RANK) <= parts, set(RANK) - parts


def part_graph(g: dict[str, set[str]]) -> dict[str, set[str]]:
    """The same graph between the package's parts (``retuner.live.daemon`` -> live)."""
    def part(m):
        return m.split(".")[1] if "." in m else m
    out: dict[str, set[str]] = {}
    for n, deps in g.items():
        out.setdefault(part(n), set()).update(part(d) for d in deps if part(d) != part(n))
    return out


def test_no_import_cycle_between_the_parts_of_the_package():
    """Shells too import one way: a part that imports another is never imported by it, through
    any chain (the daemon hosts the control socket, so control never imports live; convert
    measures its plans, so measure never imports convert)."""
    assert part_graph({"retuner.live.daemon": {"retuner.control.server"},
                       "retuner.control.commands": {"retuner.live.config"}})["control"] == {"live"}
    g = part_graph(graph())
    assert find_cycle(g) is None, " -> ".join(find_cycle(g))


def test_the_core_never_imports_a_shell_nor_a_higher_layer():
    bad = upward_imports(graph())
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
