"""The journald check as systemd.exec(5) documents it: $JOURNAL_STREAM is "DEVICE:INODE" in decimal,
to be compared with fstat() of standard error (st_dev, st_ino)."""

from __future__ import annotations

import io
import os
import subprocess
import sys

from retuner.live.journal import journal_stream, stream_is_journal


def _stamp(fd: int) -> str:
    st = os.fstat(fd)
    return f"{st.st_dev}:{st.st_ino}"


def test_the_variable_is_device_and_inode_in_decimal():
    assert journal_stream({"JOURNAL_STREAM": "8:1234"}) == (8, 1234)
    for bad in ({}, {"JOURNAL_STREAM": ""}, {"JOURNAL_STREAM": "8"}, {"JOURNAL_STREAM": "8:x"},
                {"JOURNAL_STREAM": "0x8:12"}, {"JOURNAL_STREAM": ":"}):
        assert journal_stream(bad) is None, bad


def test_only_the_stream_the_variable_names_counts(tmp_path):
    with open(tmp_path / "journal", "w") as journal, open(tmp_path / "terminal", "w") as other:
        env = {"JOURNAL_STREAM": _stamp(journal.fileno())}
        assert stream_is_journal(journal, env)
        assert stream_is_journal(journal.fileno(), env)
        assert not stream_is_journal(other, env)            # inherited, but stderr is elsewhere now
        assert not stream_is_journal(journal, {})
        assert not stream_is_journal(io.StringIO(), env)    # no descriptor at all
        journal_fd = journal.fileno()
    assert not stream_is_journal(journal_fd, env)           # closed


def test_a_child_with_its_stderr_on_the_journal_stream_sees_it_and_one_redirected_does_not(tmp_path):
    code = ("import sys; from retuner.live.journal import stream_is_journal; "
            "print(stream_is_journal(sys.stderr))")
    with open(tmp_path / "journal", "w") as journal:
        env = dict(os.environ, JOURNAL_STREAM=_stamp(journal.fileno()))
        on = subprocess.run([sys.executable, "-c", code], stderr=journal, stdout=subprocess.PIPE,
                            text=True, env=env, timeout=30)
        off = subprocess.run([sys.executable, "-c", code], stderr=subprocess.PIPE, stdout=subprocess.PIPE,
                             text=True, env=env, timeout=30)
    assert on.stdout.strip() == "True"
    assert off.stdout.strip() == "False"
