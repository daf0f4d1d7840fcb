"""routerd.io.progress: in place on a terminal, plain lines (never a carriage return) elsewhere;
and the three commands' progress through it."""
from __future__ import annotations

import pytest

from routerd.io.clock import FakeClock
from routerd.io.progress import StatusLine
from sim_helpers import FakeTerminal as _Stream


def test_terminal_line_is_redrawn_in_place_and_padded() -> None:
    s = _Stream(tty=True)
    line = StatusLine(s, every_s=0.5, plain_every_s=10.0, clock=(c := FakeClock()))
    assert line.show("long text here")
    assert not line.show("too soon")               # within every_s
    c.advance(0.5)
    assert line.show("short")
    line.done()
    assert s.getvalue() == "\rlong text here" + "\rshort" + " " * 9 + "\n"


def test_plain_lines_elsewhere_at_their_own_rate() -> None:
    s = _Stream(tty=False)
    c = FakeClock()
    line = StatusLine(s, every_s=0.5, plain_every_s=10.0, clock=c)
    shown = []
    for i in range(41):                            # 20 s in steps of 0.5 s
        shown.append(line.show(f"at {i * 0.5:g} s"))
        c.advance(0.5)
    line.show("final", force=True)
    line.done()
    out = s.getvalue()
    assert "\r" not in out
    assert out.splitlines() == ["at 0 s", "at 10 s", "at 20 s", "final"]
    assert sum(shown) == 3


def test_write_errors_are_ignored() -> None:
    s = _Stream(tty=True)
    s.close()
    line = StatusLine(s)
    assert line.show("x") and line.shown
    line.done()


def test_simulate_progress_plain_when_not_a_terminal(monkeypatch: pytest.MonkeyPatch) -> None:
    import routerd.sim.run as sr

    s = _Stream(tty=False)
    t = iter([0.0, 2.5, 3.0, 13.0, 14.0, 14.5, 15.0, 15.5])
    monkeypatch.setattr(sr.time, "perf_counter", lambda: next(t))
    show = sr._progress_printer(10.0, stream=s)       # reads perf_counter once
    show(1.0, 100)                                    # 2.5 s: shown (the first)
    show(2.0, 200)                                    # 3.0 s: < 10 s since: not shown
    show(9.0, 900)                                    # 13.0 s: still within 10 s of the first
    show(9.5, 950)                                    # 14.0 s
    show(10.0, 1000, final=True)                      # 14.5 s
    out = s.getvalue()
    assert "\r" not in out
    lines = out.splitlines()
    assert len(lines) == 2 and lines[0].startswith("[###") and "t=1.00/10 s" in lines[0]
    assert lines[1].startswith("simulated 10 s: 1000 events")

