"""Packaging: one place for the version, the licence file matches the declared licence."""

from __future__ import annotations

import importlib.metadata
import subprocess
import sys
import re
from pathlib import Path

import retuner

REPO = Path(__file__).resolve().parent.parent


def _project_table() -> str:
    """The [project] table of pyproject.toml as text (tomllib is not in every Python we support)."""
    text = (REPO / "pyproject.toml").read_text()
    start = text.index("\n[project]\n")
    end = text.find("\n[", start + 1)
    return text[start:end]


def test_version_is_written_once_and_the_installed_metadata_agrees():
    project = _project_table()
    assert not re.search(r"^version\s*=", project, re.M)
    assert re.search(r'^dynamic\s*=\s*\[[^]]*"version"', project, re.M)
    r = subprocess.run([sys.executable, "-m", "retuner", "--version"], capture_output=True, text=True,
                       timeout=30)
    assert r.returncode == 0
    # the installed package's metadata (PEP 566 / importlib.metadata), built from the one place
    assert r.stdout.strip() == f"retuner {importlib.metadata.version('retuner')}"
    assert retuner.__version__ == importlib.metadata.version("retuner")


def test_licence_file_is_the_mit_licence_the_metadata_declares():
    assert re.search(r'^license\s*=\s*\{\s*text\s*=\s*"MIT"\s*\}', _project_table(), re.M)
    assert importlib.metadata.metadata("retuner")["License"] == "MIT"
    text = (REPO / "LICENSE").read_text()
    # the MIT License as published by the Open Source Initiative (opensource.org/license/mit)
    assert text.startswith("MIT License\n")
    assert "Copyright (c) " in text and "retuner developers" in text
    assert ("Permission is hereby granted, free of charge, to any person obtaining a copy\nof this software"
            in text)
    assert 'THE SOFTWARE IS PROVIDED "AS IS", WITHOUT WARRANTY OF ANY KIND' in text
