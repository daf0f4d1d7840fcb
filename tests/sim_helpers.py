"""Shared checks for the simulator's tests (imported by tests/test_sim_*.py)."""
from __future__ import annotations

import io
from typing import Any

from routerd.sim.core import CoreResult


def assert_little(s: dict[str, Any], rel: float = 0.03) -> None:
    """Little's law L = lambda W (Little, Operations Research 9, 1961): the time-average
    number of packets in the network equals the rate at which packets leave times their
    mean time in it.  Only edge effects at the window's ends separate the two measures."""
    L, lw = s["little_L"], s["little_lambda_W"]
    assert abs(L - lw) <= rel * max(L, 1e-9) + 1e-3, (L, lw)


def assert_little_raw(raw: CoreResult, rel: float = 0.03) -> None:
    """The same check on :func:`routerd.sim.core.run_core`'s raw result."""
    win = raw.window_s
    L = raw.little_area / win
    lw = raw.left / win * (raw.sys_sum / raw.left) if raw.left else 0.0
    assert abs(L - lw) <= rel * max(L, 1e-9) + 1e-3, (L, lw)


class FakeTerminal(io.StringIO):
    """A text stream that says whether it is a terminal (progress output draws in place on
    one, prints plain lines otherwise)."""

    def __init__(self, tty: bool):
        super().__init__()
        self._tty = tty

    def isatty(self) -> bool:
        return self._tty
