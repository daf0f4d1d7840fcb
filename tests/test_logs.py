"""routerd.io.logs: one line per event, one timestamp per line, text or JSON."""
from __future__ import annotations

import io
import json
import re

import pytest

from routerd.io.logs import EventLog

STAMP = r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d\.\d{3}Z"


def test_text_lines_carry_level_message_and_fields() -> None:
    buf = io.StringIO()
    log = EventLog("text", buf)
    log.info("snapshot", cause="interval", record=42)
    log.warning("slow decide", ms=12.5)
    log.error("bad")
    lines = buf.getvalue().splitlines()
    assert re.fullmatch(STAMP + r" INFO  snapshot cause=interval record=42", lines[0])
    assert re.fullmatch(STAMP + r" WARN  slow decide ms=12.5", lines[1])
    assert re.fullmatch(STAMP + r" ERROR bad", lines[2])


def test_json_lines_parse_and_keep_the_fields() -> None:
    buf = io.StringIO()
    EventLog("json", buf, name="routerd.service").info("start", pid=7, path=b"x")
    (line,) = buf.getvalue().splitlines()
    d = json.loads(line)
    assert re.fullmatch(STAMP, d.pop("ts"))
    assert d == {"level": "INFO", "logger": "routerd.service", "msg": "start", "pid": 7,
                 "path": "b'x'"}


def test_a_field_cannot_overwrite_the_line_s_own_keys() -> None:
    buf = io.StringIO()
    EventLog("json", buf).info("m", level="spoofed", ts="then", logger="x")
    d = json.loads(buf.getvalue())
    assert d["level"] == "INFO" and d["ts"] != "then" and d["logger"] == "routerd"


def test_two_logs_in_one_process_do_not_share_handlers() -> None:
    a, b = io.StringIO(), io.StringIO()
    EventLog("text", a, name="routerd.service").info("one")
    EventLog("text", b, name="routerd.service").info("two")
    assert "one" in a.getvalue() and "two" not in a.getvalue()
    assert "two" in b.getvalue() and "one" not in b.getvalue()


def test_a_closed_stream_drops_the_line_quietly(capsys: pytest.CaptureFixture[str]) -> None:
    buf = io.StringIO()
    log = EventLog("text", buf)
    buf.close()
    log.error("nobody reads this")      # no exception, no traceback on stderr
    assert capsys.readouterr().err == ""


def test_an_unknown_format_is_refused() -> None:
    with pytest.raises(ValueError, match="log format 'xml'"):
        EventLog("xml")
