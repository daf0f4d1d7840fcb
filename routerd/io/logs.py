"""Log lines of the long-running shells (the service, the shard front and workers, the
agent): the standard library's :mod:`logging`, one line per event.

``EventLog(name, fmt)`` gives ``info(msg, **fields)``, ``warning(...)``, ``error(...)``:
a message plus named fields.  Two line formats (``service.log_format`` / ``--log-format``):

* ``text``: ``2026-12-03T08:40:01.123Z INFO  snapshot cause=interval record=42``
* ``json``: ``{"ts": "2026-12-03T08:40:01.123Z", "level": "INFO", "logger":
  "routerd.service", "msg": "snapshot", "cause": "interval", "record": 42}``

The timestamp is the one ``logging`` takes when the record is made (``record.created``),
so a line carries exactly one clock reading.  Each ``EventLog`` owns a private
``logging.Logger`` (not registered in the global logger tree, not propagated to the root):
several services in one process (tests) never share or duplicate handlers, and an
application that configures the root logger does not double our lines.  A log stream that
is gone (a closed pipe) never stops the process: the line is dropped.

Must not import: anything of routerd.
"""
from __future__ import annotations

import json
import logging
import sys
import time
from typing import Any, TextIO

FORMATS = ("text", "json")
#: the level names our lines carry (``WARN`` is shorter than logging's ``WARNING``)
_LEVEL = {logging.INFO: "INFO", logging.WARNING: "WARN", logging.ERROR: "ERROR",
          logging.DEBUG: "DEBUG", logging.CRITICAL: "CRIT"}


def _stamp(record: logging.LogRecord) -> str:
    return time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(record.created)) + \
        f".{int(record.msecs):03d}Z"


class TextFormatter(logging.Formatter):
    """``TIMESTAMP LEVEL message key=value ...``"""

    def format(self, record: logging.LogRecord) -> str:
        fields = getattr(record, "fields", {})
        extra = " ".join(f"{k}={v}" for k, v in fields.items())
        line = f"{_stamp(record)} {_LEVEL.get(record.levelno, record.levelname):<5} {record.getMessage()}"
        return line + (f" {extra}" if extra else "")


class JsonFormatter(logging.Formatter):
    """One JSON object per line: ``ts``, ``level``, ``logger``, ``msg`` and the fields."""

    def format(self, record: logging.LogRecord) -> str:
        fields = getattr(record, "fields", {})
        head = {"ts": _stamp(record), "level": _LEVEL.get(record.levelno, record.levelname),
                "logger": record.name, "msg": record.getMessage()}
        return json.dumps({**head, **{k: v for k, v in fields.items() if k not in head}},
                          default=str)


class _QuietStream(logging.StreamHandler):  # type: ignore[type-arg]
    """Writes and flushes each line; a stream that fails (closed pipe) drops the line
    instead of printing logging's own traceback."""

    def handleError(self, record: logging.LogRecord) -> None:
        pass


class EventLog:
    """A message and named fields per line, in the chosen format, to ``stream``
    (stderr by default)."""

    def __init__(self, fmt: str = "text", stream: TextIO | None = None,
                 name: str = "routerd"):
        if fmt not in FORMATS:
            raise ValueError(f"log format {fmt!r}: expected one of {', '.join(FORMATS)}")
        self.fmt = fmt
        self.logger = logging.Logger(name, logging.INFO)
        self.logger.propagate = False
        handler = _QuietStream(stream if stream is not None else sys.stderr)
        handler.setFormatter(JsonFormatter() if fmt == "json" else TextFormatter())
        self.logger.addHandler(handler)

    def _emit(self, level: int, msg: str, fields: dict[str, Any]) -> None:
        self.logger.log(level, "%s", msg, extra={"fields": fields})

    def info(self, msg: str, **fields: Any) -> None:
        self._emit(logging.INFO, msg, fields)

    def warning(self, msg: str, **fields: Any) -> None:
        self._emit(logging.WARNING, msg, fields)

    def error(self, msg: str, **fields: Any) -> None:
        self._emit(logging.ERROR, msg, fields)
