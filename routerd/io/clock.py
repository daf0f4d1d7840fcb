"""Time as a value passed in: the :class:`Clock` interface, the real one and a fake one.

Owns: how routerd's shells read time.  A shell (the agent, the client, the lab; the
service and the shard front later) takes a ``clock`` argument and reads time only through
it; tests pass a :class:`FakeClock` and move virtual time forward themselves instead of
sleeping.  The pure core never reads a clock at all: it gets ``now`` as an argument.

Must not import: anything of routerd (it sits below every shell), sockets, zmq.

Theory of operation
-------------------
Two readings, kept apart because they answer different questions:

* ``monotonic()`` (seconds, float) for intervals and deadlines: timeouts, probe
  schedules, detection times, ages.  It never goes backwards and has no epoch.
* ``wall_ns()`` (integer ns since the Unix epoch) and ``wall()`` (the same in float
  seconds) for instants other processes read: timestamps on the wire (probe and echo
  times, packet origin), epochs, batch numbers, "at" fields in status files.

``sleep(s)`` waits ``s`` seconds of the clock's own time.  Waiting for I/O is not the
clock's business: callers poll their sockets with real timeouts and read the clock
afterwards, so a fake clock does not advance while a socket is polled.  Code that must
make progress under a fake clock is therefore written as *turns* (poll with a bounded
timeout, then act on what the clock says), and a test drives the turns and the clock.

:class:`FakeClock` is modelled on the idea of trio's ``MockClock``: virtual time that
moves only when told (:meth:`FakeClock.advance`, or :meth:`FakeClock.sleep`, which jumps
instead of waiting).  Both readings move together, so intervals measured on one and
differences of wall timestamps agree.  It is safe to read from several threads; a test
that advances it from one thread sees every reader on the new time at its next read.
"""
from __future__ import annotations

import threading
import time
from typing import Protocol, runtime_checkable

__all__ = ["SYSTEM", "Clock", "FakeClock", "SystemClock"]


@runtime_checkable
class Clock(Protocol):
    """What a shell may ask of time (see the module docstring for which reading to use)."""

    def monotonic(self) -> float:
        """Seconds on a clock that never goes backwards (no epoch): for intervals."""
        ...

    def wall_ns(self) -> int:
        """Nanoseconds since the Unix epoch: for timestamps other processes read."""
        ...

    def wall(self) -> float:
        """``wall_ns()`` in seconds."""
        ...

    def sleep(self, seconds: float) -> None:
        """Wait ``seconds`` of this clock's time (a fake clock jumps instead)."""
        ...


class SystemClock:
    """The host's clocks: :func:`time.monotonic`, :func:`time.time_ns`, :func:`time.sleep`."""

    __slots__ = ()

    def monotonic(self) -> float:
        return time.monotonic()

    def wall_ns(self) -> int:
        return time.time_ns()

    def wall(self) -> float:
        return time.time()

    def sleep(self, seconds: float) -> None:
        if seconds > 0:
            time.sleep(seconds)

    def __repr__(self) -> str:
        return "SystemClock()"


#: The one real clock; the default of every ``clock=`` argument.
SYSTEM = SystemClock()


class FakeClock:
    """Virtual time for tests: it moves only through :meth:`advance` or :meth:`sleep`.

    ``start`` is the first ``monotonic()`` reading (seconds); ``wall_start_ns`` the first
    ``wall_ns()`` (default: a fixed instant, 2026-01-01T00:00:00Z, so runs repeat).
    """

    def __init__(self, start: float = 0.0, wall_start_ns: int = 1_767_225_600_000_000_000):
        self._lock = threading.Lock()
        self._elapsed_ns = 0
        self._start = float(start)
        self._wall0 = int(wall_start_ns)

    def advance(self, seconds: float) -> float:
        """Move virtual time forward by ``seconds`` (>= 0); returns the new ``monotonic()``."""
        if not seconds >= 0:
            raise ValueError(f"FakeClock.advance({seconds!r}): time only moves forward")
        with self._lock:
            self._elapsed_ns += round(seconds * 1e9)
            return self._start + self._elapsed_ns / 1e9

    def monotonic(self) -> float:
        with self._lock:
            return self._start + self._elapsed_ns / 1e9

    def wall_ns(self) -> int:
        with self._lock:
            return self._wall0 + self._elapsed_ns

    def wall(self) -> float:
        return self.wall_ns() / 1e9

    def sleep(self, seconds: float) -> None:
        """Jump ``seconds`` forward at once (nothing else happens in between)."""
        if seconds > 0:
            self.advance(seconds)

    def __repr__(self) -> str:
        return f"FakeClock(monotonic={self.monotonic():.9f})"
