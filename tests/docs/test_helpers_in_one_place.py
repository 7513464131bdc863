"""The tests' own layout: helpers shared by several test modules live in helper modules under
tests/ (jack.py, jackdaemon.py, synthmodel.py, mtsdecode.py, keyboard.py, ...), never in a test
module that another one imports, so a test module can be moved, split or removed alone."""

from __future__ import annotations

import ast
from collections import Counter
from pathlib import Path

TESTS = next(p for p in Path(__file__).resolve().parents if (p / "pyproject.toml").is_file()) / "tests"   # every folder below it too


def imported_test_modules(source: str) -> list[str]:
    """Names of test modules (``test_*``) that ``source`` imports, anywhere in it."""
    found = []
    for node in ast.walk(ast.parse(source)):
        if isinstance(node, ast.Import):
            names = [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom) and not node.level:
            names = [node.module or ""]
        else:
            continue
        found += [n for n in names if n.split(".")[0].startswith("test_")]
    return found


def test_the_finder_sees_an_import_of_a_test_module():
    src = "from test_engine import SynthModel\ndef f():\n    import test_bench\nimport testing\n"
    assert imported_test_modules(src) == ["test_engine", "test_bench"]


def test_no_module_under_tests_imports_a_test_module():
    bad = []
    for path in sorted(TESTS.rglob("*.py")):
        for name in imported_test_modules(path.read_text(encoding="utf-8")):
            bad.append(f"{path.relative_to(TESTS)} imports {name}")
    assert not bad, bad


def test_test_modules_have_unique_names_and_helpers_stay_in_tests():
    """Test modules are grouped in folders by the package they test, and pytest imports each by
    its base name (its default import mode, prepend), so no two may share one; the helper
    modules stay in tests/ itself (on the path of every folder: pyproject's pythonpath), the
    converter's generated files in tests/data."""
    names = Counter(p.name for p in TESTS.rglob("test_*.py"))
    assert not [n for n, c in names.items() if c > 1], names.most_common(3)
    strays = [str(p.relative_to(TESTS)) for p in TESTS.rglob("*.py")
              if p.parent not in (TESTS, TESTS / "data") and not p.name.startswith("test_")]
    assert not strays, strays
