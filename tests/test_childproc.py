"""routerd.io.childproc: the readiness line and the parent-death signal."""
from __future__ import annotations

import os
import subprocess
import sys
import textwrap
import time

import pytest

from routerd.io.childproc import READY_RE, die_with_parent, parse_ready, ready_line


def test_ready_line_round_trip() -> None:
    line = ready_line(4242, 1_767_225_600_123_456_789)
    assert line == "routerd: ready (pid 4242, epoch 1767225600123456789)"
    assert parse_ready(line) == (4242, 1_767_225_600_123_456_789)
    assert parse_ready(line + "\n") == (4242, 1_767_225_600_123_456_789)
    assert READY_RE.match(line)


@pytest.mark.parametrize("line", ["", "routerd: ready", "  routerd: ready (pid 1, epoch 2)",
                                  "routerd agent s: ready (pid 12)",
                                  "routerd: ready (pid x, epoch 2)"])
def test_not_a_ready_line(line: str) -> None:
    assert parse_ready(line) is None


@pytest.mark.slow
@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="PR_SET_PDEATHSIG is Linux-only")
def test_child_gets_sigterm_when_its_parent_dies(tmp_path: object) -> None:
    """A parent starts a child that calls die_with_parent() and then exits; the kernel
    sends the child SIGTERM, which its handler records in a file."""
    mark = os.path.join(str(tmp_path), "got")
    child = textwrap.dedent(f"""
        import signal, sys, time
        from routerd.io.childproc import die_with_parent
        def on_term(_s, _f):
            open({mark!r}, "w").write("SIGTERM")
            sys.exit(0)
        signal.signal(signal.SIGTERM, on_term)
        print("armed" if die_with_parent() else "unsupported", flush=True)
        time.sleep(30)
    """)
    parent = textwrap.dedent(f"""
        import subprocess, sys
        c = subprocess.Popen([sys.executable, "-c", {child!r}], stdout=subprocess.PIPE, text=True)
        print(c.stdout.readline().strip(), flush=True)
    """)
    p = subprocess.run([sys.executable, "-c", parent], capture_output=True, text=True, timeout=30)
    assert p.stdout.strip() == "armed", p.stderr
    end = time.monotonic() + 10
    while not os.path.exists(mark) and time.monotonic() < end:
        time.sleep(0.05)
    with open(mark) as fh:
        assert fh.read() == "SIGTERM"
    assert die_with_parent(0) is True          # signal 0 clears it again for this process
