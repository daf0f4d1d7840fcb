"""What a routerd process tells the process that started it, and how it follows that parent.

Owns: the readiness line a long-running command prints once it serves (``routerd: ready
(pid P, epoch E)``): its text (:func:`ready_line`) and its one parser (:func:`parse_ready`,
:data:`READY_RE`), used by everything that starts a service and waits for it (the lab, the
closed loop, the test harness, the benchmarks); and the parent-death signal
(:func:`die_with_parent`), so a child started by a front or a simulator does not outlive it.

Must not import: anything of routerd (a child imports this before it execs the service).
"""
from __future__ import annotations

import contextlib
import re
import signal

__all__ = ["READY_RE", "die_with_parent", "parse_ready", "ready_line"]

#: The readiness line; group 1 is the pid, group 2 the epoch (ns).
READY_RE = re.compile(r"^routerd: ready \(pid (\d+), epoch (\d+)\)")

_PR_SET_PDEATHSIG = 1   # linux/prctl.h


def ready_line(pid: int, epoch: int) -> str:
    """The line a service prints (to stdout, flushed) once it serves."""
    return f"routerd: ready (pid {pid}, epoch {epoch})"


def parse_ready(line: str) -> tuple[int, int] | None:
    """(pid, epoch) when ``line`` is a readiness line, else None."""
    m = READY_RE.match(line)
    return (int(m.group(1)), int(m.group(2))) if m else None


def die_with_parent(sig: int = signal.SIGTERM) -> bool:
    """Ask the kernel to send ``sig`` to this process when the thread that started it
    exits (Linux ``PR_SET_PDEATHSIG``).  Returns False where that is not available (not
    Linux, no libc): the caller then relies on its parent to stop it.  A parent that died
    *before* the call is not covered: check ``os.getppid()`` afterwards."""
    with contextlib.suppress(Exception):
        import ctypes

        libc = ctypes.CDLL(None, use_errno=True)
        return int(libc.prctl(_PR_SET_PDEATHSIG, int(sig), 0, 0, 0)) == 0
    return False
