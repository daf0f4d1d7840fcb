"""One live status line on a stream: redrawn in place on a terminal, plain lines elsewhere.

Owns: how a long-running command shows progress (``routerd simulate``, ``sweep``, ``lab``,
``demo``): on a terminal the line is rewritten in place (``\\r``, padded over the previous
text, no escape codes); on anything else (a pipe, a log file, CI) every update is a plain
line ending in ``\\n`` and never contains ``\\r``, at a rate the caller chooses (usually
lower), so logs stay readable.  What the line says and when it is worth showing is the
caller's business.

Must not import: anything of routerd but :mod:`routerd.io.clock`.
"""
from __future__ import annotations

import sys
from typing import IO

from .clock import SYSTEM, Clock

__all__ = ["StatusLine"]


class StatusLine:
    """``show(text)`` at most every ``every_s`` on a terminal and every ``plain_every_s``
    (default: ``every_s``) elsewhere; ``force=True`` shows regardless (a final line).
    ``done()`` ends a terminal line.  Write errors (a closed pipe) are ignored: progress
    is never worth failing a run for."""

    def __init__(self, stream: IO[str] | None = None, *, every_s: float = 0.0,
                 plain_every_s: float | None = None, clock: Clock = SYSTEM):
        self.stream = stream if stream is not None else sys.stderr
        self.tty = bool(getattr(self.stream, "isatty", lambda: False)())
        self.every_s = every_s if self.tty else (every_s if plain_every_s is None else plain_every_s)
        self.clock = clock
        self.shown = False
        self.last_text = ""
        self._last_at: float | None = None
        self._width = 0          # length of what is on the terminal line now

    def due(self) -> bool:
        """Whether :meth:`show` would write now (lets a caller skip building the text)."""
        return self._last_at is None or self.clock.monotonic() - self._last_at >= self.every_s

    def show(self, text: str, *, force: bool = False) -> bool:
        """Write ``text`` if due (or forced); returns whether it was written."""
        if not force and not self.due():
            return False
        self._last_at = self.clock.monotonic()
        self.last_text = text
        self.shown = True
        if self.tty:
            out = "\r" + text + " " * max(0, self._width - len(text))
            self._width = len(text)
        else:
            out = text + "\n"
        try:
            self.stream.write(out)
            self.stream.flush()
        except (OSError, ValueError):
            pass
        return True

    def done(self) -> None:
        """End the line on a terminal (plain lines are already ended)."""
        if self.tty and self.shown and self._width:
            self._width = 0
            try:
                self.stream.write("\n")
                self.stream.flush()
            except (OSError, ValueError):
                pass
