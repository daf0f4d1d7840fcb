"""Trace-driven link delays: per-link latency series as the links' delays over time.

Owns: the link-trace CSV format (read here; ``routerd replay --export-link-trace``
writes it from a journal) and turning it into the simulator's ``delay`` link events.
Must not import: the engine, zmq, prometheus, matplotlib.

Format (CSV, header row, one row per link and time)::

    t_s,from,to,delay_s[,mean_s,samples]
    0.0,w3,e3,0.00102
    1.0,w3,e3,0.00187

``t_s`` is seconds from the start of the trace, ``from``/``to`` node names of a directed
link (``between`` rows do not exist: give both directions), ``delay_s`` the link's delay
from ``t_s`` until the link's next row (before its first row: the topology's delay).
Other columns are ignored.  Rows need not be sorted.

Which number is the delay.  A journaled hop latency is queueing + transmission +
propagation.  The simulator adds its own queueing and transmission for the traffic it
carries, so the exported ``delay_s`` is the *least* latency seen on the link in each
bin — the estimate of the part no queue caused (the minimum-filter idea behind LEDBAT's
base delay, RFC 6817 §2.2, and BBR's min RTT); ``mean_s`` is written beside it for
reading, not used.  ``--speed`` divides ``t_s`` as it divides a capture's timestamps.
"""
from __future__ import annotations

import csv
import io
import math
from dataclasses import dataclass

from routerd.core.errors import InputError, Problem
from routerd.core.topology import Topology

from .core import LinkEvent

COLUMNS = ("t_s", "from", "to", "delay_s")


@dataclass(frozen=True, slots=True)
class LinkTrace:
    """Delay changes per directed link, in time order."""

    source: str
    changes: tuple[tuple[float, int, float], ...]   # (t_s, link index, delay_s)

    @property
    def links(self) -> int:
        return len({k for _, k, _ in self.changes})

    @property
    def span_s(self) -> float:
        return max((t for t, _, _ in self.changes), default=0.0)

    def events(self, speed: float = 1.0) -> list[LinkEvent]:
        return [LinkEvent(t / speed, (k,), "delay", delay_s=d) for t, k, d in self.changes]

    def to_dict(self) -> dict[str, object]:
        return {"source": self.source, "changes": len(self.changes), "links": self.links,
                "span_s": self.span_s}


def load(path: str, topo: Topology) -> LinkTrace:
    """Read a link trace; InputError listing every bad row with file and line."""
    try:
        with open(path, encoding="utf-8", newline="") as fh:
            text = fh.read()
    except (OSError, UnicodeDecodeError) as e:
        raise InputError(f"{path}: cannot be read as a text link trace: {e}") from None
    problems: list[Problem] = []
    rows: list[tuple[float, int, float, int]] = []
    rd = csv.reader(io.StringIO(text))
    header = [h.strip() for h in next(rd, [])]
    missing = [c for c in COLUMNS if c not in header]
    if missing:
        raise InputError(Problem(f"{path}:1", ",".join(header),
                                 f"lacks the column(s) {', '.join(missing)} "
                                 f"(needs {','.join(COLUMNS)})"))
    col = {c: header.index(c) for c in COLUMNS}
    for row in rd:
        if not row or all(not c.strip() for c in row):
            continue
        where = f"{path}:{rd.line_num}"
        if len(row) < len(header):
            problems.append(Problem(where, ",".join(row), f"has {len(row)} fields, the header {len(header)}"))
            continue
        a, b = row[col["from"]].strip(), row[col["to"]].strip()
        try:
            t = float(row[col["t_s"]])
            d = float(row[col["delay_s"]])
        except ValueError:
            problems.append(Problem(where, ",".join(row), "t_s and delay_s must be numbers"))
            continue
        if not (math.isfinite(t) and t >= 0):
            problems.append(Problem(where, t, "t_s must be a finite number >= 0"))
            continue
        if not (math.isfinite(d) and d >= 0):
            problems.append(Problem(where, d, "delay_s must be a finite number >= 0"))
            continue
        if a not in topo.index or b not in topo.index:
            bad = a if a not in topo.index else b
            problems.append(Problem(where, bad, f"is not a node of topology {topo.name!r}"))
            continue
        k = topo.link_index.get((topo.index[a], topo.index[b]))
        if k is None:
            problems.append(Problem(where, f"{a}->{b}", f"is not a link of topology {topo.name!r}"))
            continue
        rows.append((t, k, d, rd.line_num))
    if problems:
        shown = problems[:20]
        if len(problems) > 20:
            shown.append(Problem(path, len(problems) - 20, "more rows have problems"))
        raise InputError(shown)
    seen: dict[tuple[float, int], int] = {}
    for t, k, _, line in rows:
        if (t, k) in seen:
            problems.append(Problem(f"{path}:{line}", t, f"gives link {topo.nodes[topo.src[k]]}->"
                                    f"{topo.nodes[topo.dst[k]]} a second delay at this time "
                                    f"(first at line {seen[(t, k)]})"))
        seen.setdefault((t, k), line)
    if problems:
        raise InputError(problems[:20])
    rows.sort(key=lambda r: (r[0], r[1]))
    return LinkTrace(path, tuple((t, k, d) for t, k, d, _ in rows))


def for_spec(spec: object, topo: Topology) -> LinkTrace | None:
    """The link trace of a run (``spec.link_trace``), or None."""
    path = getattr(spec, "link_trace", None)
    return None if path is None else load(path, topo)
