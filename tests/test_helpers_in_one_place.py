"""The tests' own layout: helpers shared by several test modules live in helper modules under
tests/ (jack.py, jackdaemon.py, synthmodel.py, mtsdecode.py, keyboard.py, ...), never in a test
module that another one imports, so a test module can be moved, split or removed alone."""

from __future__ import annotations

import ast
from pathlib import Path

TESTS = Path(__file__).resolve().parent


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
