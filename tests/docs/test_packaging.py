"""What `pip install .` installs: every sub-package of the source tree, and a command that runs
outside it (an installed copy that misses a package fails only there, never in the tree)."""

from __future__ import annotations

import os
import subprocess
import sys
import tomllib
from pathlib import Path

ROOT = next(p for p in Path(__file__).resolve().parents if (p / "pyproject.toml").is_file())   # the checkout, at any depth of tests/


def test_every_package_of_the_tree_is_listed_for_installation():
    listed = set(tomllib.loads((ROOT / "pyproject.toml").read_text())["tool"]["setuptools"]["packages"])
    found = {".".join(p.parent.relative_to(ROOT).parts) for p in (ROOT / "retuner").rglob("__init__.py")}
    assert found <= listed, sorted(found - listed)


def test_the_installed_command_imports_every_module_outside_the_tree(tmp_path):
    """The test environment's installed retuner (pip install -e '.[test]'), run from another folder,
    imports every module of the package, and has the JACK backend's compiled period (a plain C
    library that cffi loads, built at install: no Python module, so not imported as one)."""
    code = ("import importlib, pkgutil, retuner; "
            "[importlib.import_module(m.name) for m in pkgutil.walk_packages(retuner.__path__, 'retuner.') "
            "if m.name not in ('retuner.__main__', 'retuner.live._jackcycle')]; "
            "from retuner.live import jackcycle; assert jackcycle.library() is not None, 'not built'; "
            "print(retuner.__file__)")
    r = subprocess.run([sys.executable, "-c", code], cwd=tmp_path, capture_output=True, text=True,
                       env={k: v for k, v in os.environ.items() if k != "PYTHONPATH"}, timeout=120)
    assert r.returncode == 0, r.stderr[-2000:]
