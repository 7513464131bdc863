"""What the ALSA sequencer's and PipeWire's own tools print, parsed for the tests that run retuner in
the virtual machine of tests/alsavm.py (tests/live/test_alsa_vm.py, test_pipewire_alsa_bridge.py), and
the packages README.md's test command installs."""

from __future__ import annotations

import os
import re

REPO = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def aconnect_clients(text: str) -> dict[str, list[str]]:
    """``aconnect -l``/``-i``/``-o`` output (alsa-utils): client name -> its port names."""
    assert text is not None, "aconnect is not installed (apt-get install alsa-utils)"
    clients: dict[str, list[str]] = {}
    current = None
    for line in text.splitlines():
        m = re.match(r"client \d+: '([^']*)'", line)
        if m:
            current = clients.setdefault(m.group(1), [])
            continue
        m = re.match(r"\s+\d+ '([^']*)'", line)
        if m and current is not None:
            current.append(m.group(1).strip())
    return clients


def aconnect_numbers(text: str) -> dict[str, int]:
    """``aconnect -l`` output: client name -> client number."""
    return {name: int(num) for num, name in re.findall(r"client (\d+): '([^']*)'", text)}


def pw_objects(text: str) -> list[dict]:
    """``pw-cli ls TYPE`` output (PipeWire): one dict of properties per object, with its ``id`` and
    ``type``."""
    objects: list[dict] = []
    for line in text.splitlines():
        m = re.match(r"\s*id (\d+), type (\S+)", line)
        if m:
            objects.append({"id": m.group(1), "type": m.group(2)})
            continue
        m = re.match(r'\s*([\w.\-]+) = "(.*)"$', line)
        if m and objects:
            objects[-1][m.group(1)] = m.group(2)
    return objects


def readme_test_command() -> list[str]:
    """The words of README.md's test command (the block after ``<!-- test-command -->``)."""
    text = open(os.path.join(REPO, "README.md"), encoding="utf-8").read()
    marker = text.index("<!-- test-command -->")
    command = re.match(r"\s*```sh\n(.*?)\n```", text[marker + len("<!-- test-command -->"):], re.S).group(1)
    return command.split()
