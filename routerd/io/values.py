"""Plain values inside input files and flags: numbers, HOST:PORT addresses, ZeroMQ endpoints.

Owns: the one rule for what spells a number (YAML 1.2's float spellings included:
``1.0e6``, ``1e6``, ``2E-3``, which PyYAML's YAML 1.1 rules leave as strings), and the one
check of an address or an endpoint, so every command refuses the same values with the
same words before anything binds.  Pure: no files, sockets or clocks.
Must not import: anything of routerd but ``routerd.core.errors``; yaml, zmq.
"""
from __future__ import annotations

import re
from typing import Any

#: A number as YAML 1.2 (core schema) spells it; the exponent forms are the ones PyYAML
#: (YAML 1.1: a dot and a signed exponent needed) reads as strings.
NUMBER_RE = re.compile(r"[-+]?(\.[0-9]+|[0-9]+(\.[0-9]*)?)([eE][-+]?[0-9]+)?")
#: The spellings YAML 1.1 misses: an exponent without a sign or without a dot.
EXPONENT_RE = re.compile(r"[-+]?(\.[0-9]+|[0-9]+(\.[0-9]*)?)[eE][-+]?[0-9]+")

#: ZeroMQ transports an endpoint of ours may use (ROUTER, PUB, REP, PULL all take them).
TRANSPORTS = ("tcp", "ipc", "inproc")
#: sun_path holds 108 bytes with its NUL: a longer ipc:// path cannot be bound.
IPC_PATH_MAX = 107


def as_number(v: Any) -> float | int | None:
    """``v`` as a number when it is one (an int or float, not true/false) or a string that
    spells one (:data:`NUMBER_RE`); None otherwise.  Range and finiteness are the caller's."""
    if isinstance(v, bool):
        return None
    if isinstance(v, (int, float)):
        return v
    if isinstance(v, str) and NUMBER_RE.fullmatch(v):
        return float(v) if any(c in v for c in ".eE") else int(v)
    return None


def address_problem(text: Any) -> str | None:
    """Why ``text`` is not a ``HOST:PORT`` address (``[v6]:PORT`` too; port 0-65535, 0 = any
    free one), or None when it is one."""
    if not isinstance(text, str):
        return "must be a string HOST:PORT"
    host, sep, port = text.rpartition(":")
    if not sep or not host.strip("[]") or not port.isdigit() or not 0 <= int(port) <= 65535:
        return "is not HOST:PORT (PORT 0-65535, 0 = any free port)"
    return None


def parse_address(text: str) -> tuple[str, int]:
    """``HOST:PORT`` → (host, port); ValueError naming the rule."""
    why = address_problem(text)
    if why is not None:
        raise ValueError(f"address {text!r} {why}")
    host, _, port = text.rpartition(":")
    return host.strip("[]"), int(port)


def endpoint_problem(text: Any) -> str | None:
    """Why ``text`` is not a ZeroMQ endpoint we can bind or connect, or None.

    ``tcp://HOST:PORT`` (HOST may be ``*``, an address or an interface name; PORT 0-65535
    or ``*``), ``ipc://PATH`` (at most :data:`IPC_PATH_MAX` bytes), ``inproc://NAME``."""
    if not isinstance(text, str):
        return "must be a string like tcp://HOST:PORT or ipc://PATH"
    scheme, sep, rest = text.partition("://")
    if not sep or scheme not in TRANSPORTS:
        return "is not an endpoint (tcp://HOST:PORT, ipc://PATH or inproc://NAME)"
    if not rest:
        return f"has nothing after {scheme}://"
    if scheme == "tcp":
        host, sep2, port = rest.rpartition(":")
        host = host.split(";")[-1]              # tcp://SOURCE;HOST:PORT
        if not sep2 or not host.strip("[]"):
            return "is not tcp://HOST:PORT"
        if port != "*" and not (port.isdigit() and 0 <= int(port) <= 65535):
            return "has no valid port (0-65535, or * for any free one)"
    elif scheme == "ipc" and len(rest.encode()) > IPC_PATH_MAX:
        return f"has an ipc:// path longer than {IPC_PATH_MAX} bytes (the socket file's limit)"
    return None
