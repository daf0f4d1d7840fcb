"""``routerd agent``: the forwarding agent that runs on each overlay node.

Owns the data plane of one node: UDP sockets per overlay link, next-hop choice from the
latest published table, flowlet pinning, probes and echoes (hop latency, failure
detection), emulated propagation delay, hop and link reports to the service, and the
agent's own metrics and status file.  Message shapes come from :mod:`routerd.agent.overlay`
(packets) and :mod:`routerd.io.wire` via :mod:`routerd.agent.client` (service).

Must not import: the engine, the journal, the simulator.

Theory of operation
-------------------
One thread, one ``zmq.Poller`` over the link sockets, the local socket (applications
hand overlay packets in there), the table subscription and a stop pipe.  The poll timeout
is the time to the next deadline (a probe, a held packet's release, a report, a status
write), at most 50 ms.  Each pass is one :meth:`Agent.turn`: poll, handle, then the
timers due by the agent's clock (:mod:`routerd.io.clock`), so a test on a fake clock drives
the agent turn by turn and moves time itself.

Forwarding.  A data packet for another node goes to a next hop chosen from the table the
service published for this node: ``routes[dst] = [[next_hop, weight], ...]``; the greedy
hop and the exploration share are both just weights.  The choice is made per *flowlet*:
the (destination, flow id) pair stays on its next hop while its packets keep coming less
than ``agent.flowlet_gap_s`` apart, so a flow is not reordered; it is re-pinned after an
idle gap, when the table's entry for its destination changes, or when its link goes
down.  Next hops whose link is down are left out and the weights of the rest are
renormalised; with none left (or before the first table) the agent uses a static
fallback: the delay-shortest path over the links it believes up.  A packet is never sent
straight back to the neighbour it came from while another way exists: the service's tables
are loop-free, so such a hop only appears while two nodes hold tables of different
moments, and it would bounce the packet between them until they agree.  TTL: a packet that
arrives with TTL 0 and is not for this node is dropped as expired; else it leaves with
TTL - 1.

Hop latency: a probe every ``agent.probe_interval_s`` on each link, answered by the
neighbour with an echo that carries the probe's send time t1, its own receive time t2 and
echo send time t3; with the echo's arrival t4 the hop delay is the NTP on-wire delay
((t4 - t1) - (t3 - t2)) / 2 (RFC 5905 section 8; ``agent.latency: two_way``, needs no
clock sync) or t2 - t1 (``one_way``, for synchronised clocks such as the lab's
namespaces on one host).  Probes queue behind data in the same socket and rate limiter,
so they see its queueing.  Each sample becomes one hop row per destination
(x, y, d, latency) — the hop is the same link for every destination — with y's remaining
estimate for d when its echo carried one (an agent's echoes carry the estimates given to
:meth:`Agent.set_estimates` by an engine run beside it; none by default, and the service
then uses its own estimate of y).

Failure detection (after BFD, RFC 5880, asynchronous mode): a link whose neighbour has
not echoed for ``detect_multiplier x probe_interval_s`` is down; the next echo brings it up.
The rules are the table :data:`LINK_TRANSITIONS`, (state, event) → (next state, actions),
and :meth:`Agent._link_event` is the only code that changes a link's state.  A link starts
in ``init``: the agent has heard nothing yet, so it neither claims the link works nor
reports it failed; the detection time runs from start-up, as if an echo had just come.
The first echo or the first expiry of the detection time (``silence``) settles it, and
the change is reported.  After that only a *change* is reported: an echo on an up link
and silence on a down one do nothing, so a flapping neighbour costs one row per flap,
never one per probe.  ``resync`` (a new service epoch: the service lost what it knew)
reports a down link again and nothing else, because the service re-admits a link as up
on its own.  Actions: ``report`` queues a link row to the service, ``count`` updates the
link metrics and recomputes the static fallback (the set of usable links changed), and
``record`` keeps a detection entry for the status file.

Table hold (the agent's side of a service outage; compare the helper role of RFC 3623's
graceful restart): when the service publishes nothing and acknowledges nothing for
``agent.table_stale_s`` the agent holds its last table and keeps forwarding on it, says so
in ``routerd_agent_table_hold`` (and counts each hold in ``routerd_agent_table_holds_total``
and the status file's ``table_hold``), buffers its
reports (bounded, oldest dropped and counted), and resynchronises when the service is
back: a new epoch's table replaces the old one, pending batches are resent with their
numbers (the service applies each once), and links it sees down are reported again.

CURVE: with ``agent.client_key`` and ``agent.server_key`` set, the agent's ingest and
table sockets are CURVE clients (:class:`routerd.io.security.ClientKeys`) of a service
started with ``--server-key``/``--allow``; its batches carry the reporter name
``agent.reporter`` (default ``agent/NODE``), which must be its allow-file entry, and that
entry must list the node.  A rate_limited or unavailable refusal keeps the batch and
sends it again after a backoff (:mod:`routerd.agent.client`); other refusals are counted.

Propagation: netem is not always available, so with ``agent.propagation: emulate`` a
packet received on a link is held for that link's ``delay_s`` before it is handled —
after the sender's queue and rate limiter, as on a real wire.
"""
from __future__ import annotations

import argparse
import heapq
import json
import math
import os
import random
import signal
import socket
import sys
import threading
from collections import deque
from collections.abc import Mapping
from dataclasses import dataclass
from types import MappingProxyType
from typing import Any

from routerd.core.errors import InputError, Problem
from routerd.io import inputs as _inputs
from routerd.io.clock import SYSTEM, Clock
from routerd.io.files import read_yaml
from routerd.io.values import address_problem, parse_address

from . import overlay as ov

#: Why a packet is dropped by the agent (a fixed set: a metrics label uses it).
DROP_REASONS = ("no_route", "send_error", "hold_full", "not_data")
#: Why a flowlet was (re-)pinned.
REPIN_CAUSES = ("new", "idle", "table", "link", "return")
LINK_STATES = ("init", "up", "down")
#: States in which a link may carry traffic (init: nothing heard yet, not known failed).
USABLE_STATES = frozenset({"init", "up"})
#: What can happen to a link: an echo arrives; the detection time passes without one
#: (checked at each probe); the service starts a new epoch.
LINK_EVENTS = ("echo", "silence", "resync")
#: What a transition does (module docstring): report a link row, count the change (metrics,
#: static fallback), record a detection.
LINK_ACTIONS = ("report", "count", "record")
#: The link state machine: (state, event) -> (next state, actions).  Total over
#: LINK_STATES x LINK_EVENTS; the theory of operation is in the module docstring.
LINK_TRANSITIONS: Mapping[tuple[str, str], tuple[str, tuple[str, ...]]] = MappingProxyType({
    ("init", "echo"): ("up", ("report", "count")),
    ("init", "silence"): ("down", ("report", "count", "record")),
    ("init", "resync"): ("init", ()),
    ("up", "echo"): ("up", ()),
    ("up", "silence"): ("down", ("report", "count", "record")),
    ("up", "resync"): ("up", ()),
    ("down", "echo"): ("up", ("report", "count")),
    ("down", "silence"): ("down", ()),
    ("down", "resync"): ("down", ("report",)),
})
#: Hop latency histogram buckets, seconds (sub-millisecond veth hops up to congested ones).
LATENCY_BUCKETS_S = (1e-4, 2.5e-4, 5e-4, 1e-3, 2.5e-3, 5e-3, 0.01, 0.025, 0.05, 0.1, 0.25,
                     0.5, 1.0, 2.5)
_MAX_DRAIN = 256
_MAX_WAIT_S = 0.05


# ---- underlay map ------------------------------------------------------------------------
@dataclass(frozen=True, slots=True)
class LinkEnd:
    """This node's end of one overlay link: where it listens and where the neighbour is."""

    neighbour: int
    local: tuple[str, int]
    remote: tuple[str, int]


def parse_hostport(text: Any, where: str) -> tuple[str, int]:
    """``HOST:PORT`` → (host, port), or InputError naming ``where`` (routerd.io.values)."""
    why = address_problem(text)
    if why is not None:
        raise InputError(Problem(where, text, why))
    return parse_address(text)


UnderlayEntry = tuple[int, list[str], tuple[str, int], tuple[str, int]]


def underlay_entries(path: str) -> list[UnderlayEntry]:
    """The underlay map file's entries, checked for form alone (no topology needed):
    ``(position, [a, b], a's address, b's address)``.  InputError lists every problem."""
    out, problems = _underlay_form(path)
    if problems:
        raise InputError([p for _, p in problems])
    return out


def _underlay_form(path: str) -> tuple[list[UnderlayEntry], list[tuple[int, Problem]]]:
    if not os.path.exists(path):
        raise InputError(Problem(path, path, "does not exist (agent.underlay)"))
    doc = read_yaml(path)
    section = doc.get("underlay") if isinstance(doc, dict) else None
    links = section.get("links") if isinstance(section, dict) else None
    if not isinstance(links, list):
        raise InputError(Problem(f"{path}: underlay.links", links, "must be a list of links"))
    out: list[UnderlayEntry] = []
    problems: list[tuple[int, Problem]] = []
    for i, ent in enumerate(links):
        w = f"{path}: underlay.links[{i}]"
        if not isinstance(ent, dict) or set(ent) != {"between", "addresses"}:
            problems.append((i, Problem(w, ent, "must have exactly the keys between and addresses")))
            continue
        bt, ad = ent["between"], ent["addresses"]
        if not (isinstance(bt, list) and len(bt) == 2 and all(isinstance(x, str) for x in bt)):
            problems.append((i, Problem(f"{w}.between", bt, "must be two node names")))
            continue
        if not (isinstance(ad, list) and len(ad) == 2):
            problems.append((i, Problem(f"{w}.addresses", ad, "must be two HOST:PORT strings")))
            continue
        try:
            pa, pb = parse_hostport(ad[0], f"{w}.addresses[0]"), parse_hostport(ad[1], f"{w}.addresses[1]")
        except InputError as ie:
            problems += [(i, p) for p in ie.problems if isinstance(p, Problem)]
            continue
        out.append((i, bt, pa, pb))
    return out, problems


def load_underlay(path: str, topo: Any) -> dict[tuple[int, int], tuple[tuple[str, int], tuple[str, int]]]:
    """The underlay map file → {(a, b): (a's address, b's address)} for both directions.

    Format (YAML; ``configs/underlay.yaml`` is an example)::

        underlay:
          links:
            - {between: [a, b], addresses: ["10.254.0.1:7400", "10.254.0.2:7400"]}

    Every entry must name a link of the topology (in at least one direction)."""
    out: dict[tuple[int, int], tuple[tuple[str, int], tuple[str, int]]] = {}
    entries, problems = _underlay_form(path)
    for i, bt, pa, pb in entries:
        w = f"{path}: underlay.links[{i}]"
        unknown = [x for x in bt if x not in topo.index]
        if unknown:
            problems.append((i, Problem(f"{w}.between", unknown[0], f"is not a node of topology {topo.name!r}")))
            continue
        a, b = topo.index[bt[0]], topo.index[bt[1]]
        if (a, b) not in topo.link_index and (b, a) not in topo.link_index:
            problems.append((i, Problem(f"{w}.between", bt, f"is not a link of topology {topo.name!r}")))
            continue
        if (a, b) in out:
            problems.append((i, Problem(f"{w}.between", bt, "is listed twice")))
            continue
        out[(a, b)] = (pa, pb)
        out[(b, a)] = (pb, pa)
    if problems:
        raise InputError([p for _, p in sorted(problems, key=lambda ip: ip[0])])
    return out


def link_ends(node: int, topo: Any, underlay: Mapping[tuple[int, int], Any], where: str) -> list[LinkEnd]:
    """This node's link ends; every out-link of the node needs an underlay entry."""
    ends, missing = [], []
    for y in topo.neighbours[node]:
        if (node, y) not in underlay:
            missing.append(topo.nodes[y])
            continue
        local, remote = underlay[(node, y)]
        ends.append(LinkEnd(y, local, remote))
    if missing:
        raise InputError(Problem(where, missing, f"node {topo.nodes[node]!r} has links to these "
                                 "neighbours but the underlay map gives no addresses for them"))
    return ends


# ---- metrics -----------------------------------------------------------------------------
class AgentMetrics:
    """The agent's Prometheus metrics, on the registry passed in (a fresh one per test)."""

    def __init__(self, registry: Any):
        from prometheus_client import Counter, Gauge, Histogram

        r = registry
        self.forwarded = Counter("routerd_agent_packets_forwarded", "Data packets sent on to a next hop", registry=r)
        self.injected = Counter("routerd_agent_packets_injected", "Data packets handed in by local applications", registry=r)
        self.delivered = Counter("routerd_agent_packets_delivered", "Data packets for this node handed to the local application", registry=r)
        self.dropped = Counter("routerd_agent_packets_dropped", "Data packets dropped, by reason", ["reason"], registry=r)
        self.delivery = Histogram("routerd_agent_delivery_seconds", "Delivery time of packets for this node, from the origin timestamp (needs synchronised clocks)", buckets=LATENCY_BUCKETS_S, registry=r)
        self.ttl_expired = Counter("routerd_agent_ttl_expired", "Data packets dropped because their TTL ran out", registry=r)
        self.malformed = Counter("routerd_agent_malformed_packets", "Packets refused as malformed, by reason", ["reason"], registry=r)
        self.returns_avoided = Counter("routerd_agent_returns_avoided", "Next-hop choices that would have sent a packet straight back where it came from and took another way", registry=r)
        self.fallback = Counter("routerd_agent_fallback_forwarded", "Flowlets pinned by the static fallback (no usable table entry)", registry=r)
        self.probes = Counter("routerd_agent_probes", "Probe traffic by event (sent, answered, echoed, late)", ["event"], registry=r)
        self.latency = Histogram("routerd_agent_hop_latency_seconds", "Measured hop latency per probe echo", buckets=LATENCY_BUCKETS_S, registry=r)
        self.link_changes = Counter("routerd_agent_link_state_changes", "Link state changes detected, by new state", ["state"], registry=r)
        self.links_down = Gauge("routerd_agent_links_down", "Links of this node currently detected down", registry=r)
        self.repins = Counter("routerd_agent_flowlet_pins", "Flowlets pinned to a next hop, by cause", ["cause"], registry=r)
        self.flowlets = Gauge("routerd_agent_flowlets", "Flowlets currently pinned", registry=r)
        self.tables = Counter("routerd_agent_tables_received", "Table publications taken for this node", registry=r)
        self.table_age = Gauge("routerd_agent_table_age_seconds", "Seconds since the table in use arrived (NaN: none yet)", registry=r)
        self.table_hold = Gauge("routerd_agent_table_hold", "1 while holding the last good table (forwarding on it) with the service unreachable", registry=r)
        self.table_holds = Counter("routerd_agent_table_holds", "Times the agent began holding its last table (service unreachable)", registry=r)
        self.resyncs = Counter("routerd_agent_service_restarts_seen", "New service epochs seen in the tables (resynchronisations)", registry=r)
        self.report_rows = Counter("routerd_agent_report_rows", "Hop and link rows, by result (sent to the service, dropped from a full buffer)", ["result"], registry=r)
        self.report_errors = Counter("routerd_agent_report_errors", "Reporting errors by kind", ["kind"], registry=r)
        for reason in DROP_REASONS:
            self.dropped.labels(reason)
        for reason in ov.MALFORMED_REASONS:
            self.malformed.labels(reason)
        for ev in ("sent", "answered", "echoed", "late"):
            self.probes.labels(ev)
        for st in ("down", "up"):
            self.link_changes.labels(st)
        for c in REPIN_CAUSES:
            self.repins.labels(c)
        for res in ("sent", "dropped"):
            self.report_rows.labels(res)
        for k in ("delivery", "refused"):
            self.report_errors.labels(k)
        self.table_age.set(math.nan)


# ---- the agent -----------------------------------------------------------------------------
class _Link:
    __slots__ = (
        "delay_s",
        "detect_s",
        "end",
        "last_echo",
        "lat_n",
        "lat_sum",
        "outstanding",
        "seq",
        "since",
        "sock",
        "state",
    )

    def __init__(self, end: LinkEnd, sock: socket.socket, delay_s: float, now: float,
                 detect_s: float):
        self.end = end
        self.sock = sock
        self.delay_s = delay_s
        self.detect_s = detect_s
        self.state = "init"
        self.since = now
        self.last_echo = now       # detection clock starts at start-up (init state)
        self.seq = 0
        self.outstanding: dict[int, int] = {}
        self.lat_sum = 0.0
        self.lat_n = 0


class Agent:
    """One node's agent.  ``open()`` binds, ``run()`` loops until stopped (or ``duration_s``),
    ``request_stop()`` works from any thread or a signal handler, ``close()`` releases.

    ``clock`` (:mod:`routerd.io.clock`) is the only source of time: deadlines and detection
    on ``monotonic()``, wire timestamps on ``wall_ns()``; it is handed on to the reporter
    and the table subscriber."""

    def __init__(self, cfg: Any, topo: Any, node: str, *, registry: Any,
                 underlay: Mapping[tuple[int, int], Any] | None = None,
                 local: str | None = None, deliver: str | None = None,
                 status_file: str | None = None, status_interval_s: float = 1.0,
                 underlay_where: str = "agent.underlay", clock: Clock = SYSTEM):
        if node not in topo.index:
            raise InputError(Problem("--node", node, f"is not a node of topology {topo.name!r} "
                                     f"({', '.join(topo.nodes)})"))
        from routerd.io import security

        self.cfg = cfg
        self.clock = clock
        self.topo = topo
        self.name = node
        self.me = topo.index[node]
        self.curve = security.client_keys(cfg["agent.client_key"], cfg["agent.server_key"], "agent")
        self.reporter_name = cfg["agent.reporter"] or f"agent/{node}"
        self.tag = ov.topology_tag(topo.digest)
        self.m = AgentMetrics(registry)
        if underlay is None:
            if not cfg["agent.underlay"]:
                raise InputError(Problem(cfg.source + ": agent.underlay", None,
                                         "must name the underlay map file"))
            underlay = load_underlay(cfg["agent.underlay"], topo)
            underlay_where = cfg["agent.underlay"]
        self.ends = link_ends(self.me, topo, underlay, underlay_where)
        self.local_addr = parse_hostport(local or cfg["agent.local"], "agent.local")
        self.deliver_addr = parse_hostport(deliver or cfg["agent.deliver"], "agent.deliver")
        self.status_file = status_file
        self.status_error: str | None = None   # the last write failure, said once
        self.status_interval_s = status_interval_s
        self.interval = cfg["agent.probe_interval_s"]
        self.detect_s = cfg["agent.detect_multiplier"] * self.interval
        self.gap = cfg["agent.flowlet_gap_s"]
        self.one_way = cfg["agent.latency"] == "one_way"
        self.emulate = cfg["agent.propagation"] == "emulate"
        self.rng = random.Random((cfg["agent.seed"] << 16) ^ self.me)
        self.links: dict[int, _Link] = {}
        self.by_fd: dict[int, _Link] = {}
        self.local_sock: socket.socket | None = None
        self.sub: Any = None
        self.reporter: Any = None
        self.poller: Any = None
        self._stop_r, self._stop_w = os.pipe()
        os.set_blocking(self._stop_w, False)
        self._stop = False
        # table state
        self.routes: dict[int, tuple[tuple[int, ...], tuple[float, ...]]] = {}
        self.entry_version: dict[int, int] = {}
        self.table_at: float | None = None
        self.table_epoch: Any = None
        self.table_seq: int | None = None
        self.fallback_nh: list[int] = [-1] * topo.n
        self._fallback_excl: dict[int, list[int]] = {}
        self.flowlets: dict[tuple[int, int], list[Any]] = {}  # key → [nh, last_t, version]
        # this node's own remaining-time estimates, (destination, seconds), sent in every
        # echo; empty unless something running an engine beside the agent sets them
        self.estimates: tuple[tuple[int, float], ...] = ()
        # reporting
        self.rows: deque[tuple[str, str, str, float, float | None]] = deque(maxlen=cfg["agent.report_buffer_rows"])
        self.link_reports: dict[int, str] = {}
        self.last_ack_at: float | None = None
        self.table_hold = False
        self.counts: dict[str, int] = {k: 0 for k in (
            "forwarded", "injected", "delivered", "ttl_expired", "fallback", "probes_sent",
            "probes_answered", "echoes", "echoes_late", "tables", "resyncs", "table_holds",
            "rows_sent", "rows_dropped", "malformed", "delivery_errors", "refused",
            "returns_avoided")}
        self.drops: dict[str, int] = dict.fromkeys(DROP_REASONS, 0)
        self.malformed: dict[str, int] = dict.fromkeys(ov.MALFORMED_REASONS, 0)
        self.detections: deque[dict[str, Any]] = deque(maxlen=32)
        self.hold: list[tuple[float, int, int, bytes]] = []
        self._hold_n = 0
        self._hold_seq = 0
        self.hold_max = cfg["agent.hold_max_pkts"]
        self.started = self.clock.monotonic()
        self._next_probe = 0.0
        self._next_report = 0.0
        self._next_status = 0.0
        self._next_prune = 0.0

    # -- start-up ----------------------------------------------------------------------------
    def open(self) -> None:
        import zmq

        from .client import Reporter, TableSubscriber

        now = self.clock.monotonic()
        ctx: zmq.Context[Any] = zmq.Context.instance()
        s: socket.socket | None = None    # the socket being set up (closed if that fails)
        try:
            for e in self.ends:
                s = socket.socket(socket.AF_INET6 if ":" in e.local[0] else socket.AF_INET, socket.SOCK_DGRAM)
                s.setblocking(False)
                s.bind(e.local)
                s.connect(e.remote)
                k = self.topo.link_index.get((e.neighbour, self.me))
                delay = float(self.topo.delay_s[k]) if k is not None else 0.0
                ln = _Link(e, s, delay, now, self.detect_s)
                self.links[e.neighbour] = ln
                self.by_fd[s.fileno()] = ln
                s = None
            s = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
            s.setblocking(False)
            s.bind(self.local_addr)
            self.local_sock, s = s, None
        except OSError as e:
            if s is not None:       # not yet owned by a link: close() would not see it
                s.close()
            self.close()
            raise InputError(f"agent {self.name}: cannot bind its sockets: {e}") from None
        self._recompute_fallback()
        self.sub = TableSubscriber(self.cfg["service.publish"], [self.name], context=ctx,
                                   curve=self.curve, clock=self.clock)
        self.reporter = Reporter(self.cfg["service.ingest"], self.reporter_name,
                                 topology_nodes=self.topo, batch_rows=self.cfg["agent.report_batch_rows"],
                                 timeout_s=2.0, retries=3, context=ctx, on_ack=self._on_ack,
                                 curve=self.curve, clock=self.clock)
        self.poller = zmq.Poller()
        for ln in self.links.values():
            self.poller.register(ln.sock.fileno(), zmq.POLLIN)
        self.poller.register(self.local_sock.fileno(), zmq.POLLIN)
        self.poller.register(self.sub._sock, zmq.POLLIN)
        self.poller.register(self._stop_r, zmq.POLLIN)

    def _on_ack(self, ack: Any) -> None:
        self.last_ack_at = self.clock.monotonic()

    def request_stop(self) -> None:
        self._stop = True
        try:
            os.write(self._stop_w, b"x")
        except OSError:
            pass

    # -- the loop ----------------------------------------------------------------------------
    def run(self, duration_s: float | None = None) -> int:
        assert self.poller is not None, "open() first"
        end = math.inf if duration_s is None else self.clock.monotonic() + duration_s
        while not self._stop:
            now = self.clock.monotonic()
            if now >= end:
                break
            self.turn(min(_MAX_WAIT_S, self._next_deadline(now) - now, end - now))
        self.write_status()
        return 0

    def turn(self, wait_s: float = 0.0) -> None:
        """One pass of the loop: wait up to ``wait_s`` of real time for input, handle what
        came, then run the timers due by the clock.  :meth:`run` is a loop of these; a
        test on a :class:`~routerd.io.clock.FakeClock` calls it itself between advances."""
        assert self.poller is not None, "open() first"
        sub_sock = self.sub._sock
        local_fd = self.local_sock.fileno() if self.local_sock else -1
        for what, _ev in self.poller.poll(max(0, math.ceil(wait_s * 1000))):
            if what is sub_sock:
                self._take_tables()
            elif what == local_fd:
                self._drain_local()
            elif what == self._stop_r:
                self._stop = True
            else:
                ln = self.by_fd.get(what)
                if ln is not None:
                    self._drain_link(ln)
        self._timers(self.clock.monotonic())

    def _next_deadline(self, now: float) -> float:
        t = min(self._next_probe, self._next_report, self._next_status)
        if self.hold:
            t = min(t, self.hold[0][0])
        return t

    def _timers(self, now: float) -> None:
        if self.hold:
            self._release(now)
        if now >= self._next_probe:
            self._probe_all(now)
            self._next_probe = now + self.interval
        if now >= self._next_report:
            self._report(now)
            self._next_report = now + self.cfg["agent.report_interval_s"]
        if now >= self._next_prune:
            self._prune(now)
            self._next_prune = now + 1.0
        if now >= self._next_status:
            self._update_gauges(now)
            if self.status_file:
                self.write_status()
            self._next_status = now + self.status_interval_s

    # -- receiving -----------------------------------------------------------------------
    def _drain_local(self) -> None:
        s = self.local_sock
        assert s is not None
        for _ in range(_MAX_DRAIN):
            try:
                data = s.recv(65535)
            except (BlockingIOError, InterruptedError):
                return
            except OSError:
                return
            d = ov.decode(data, nodes=self.topo.n, topo=self.tag)
            if isinstance(d, ov.Malformed):
                self._malformed(d.reason)
                continue
            h, _payload = d
            if h.kind != ov.KIND_DATA:
                self.drops["not_data"] += 1
                self.m.dropped.labels("not_data").inc()
                continue
            self.counts["injected"] += 1
            self.m.injected.inc()
            self._handle_data(data, h, self.clock.monotonic())

    def _drain_link(self, ln: _Link) -> None:
        s = ln.sock
        for _ in range(_MAX_DRAIN):
            try:
                data = s.recv(65535)
            except (BlockingIOError, InterruptedError):
                return
            except OSError:   # ECONNREFUSED from an earlier send to a peer not yet up
                continue
            t2 = self.clock.wall_ns()
            if self.emulate and ln.delay_s > 0:
                if self._hold_n >= self.hold_max:
                    self.drops["hold_full"] += 1
                    self.m.dropped.labels("hold_full").inc()
                    continue
                self._hold_n += 1
                self._hold_seq += 1
                heapq.heappush(self.hold, (self.clock.monotonic() + ln.delay_s, self._hold_seq,
                                           ln.end.neighbour, data))
                continue
            self._from_link(ln, data, t2)

    def _release(self, now: float) -> None:
        h = self.hold
        while h and h[0][0] <= now:
            _, _, y, data = heapq.heappop(h)
            self._hold_n -= 1
            ln = self.links.get(y)
            if ln is not None:
                self._from_link(ln, data, self.clock.wall_ns())

    def _from_link(self, ln: _Link, data: bytes, t2: int) -> None:
        d = ov.decode(data, nodes=self.topo.n, topo=self.tag)
        if isinstance(d, ov.Malformed):
            self._malformed(d.reason)
            return
        h, payload = d
        if h.kind == ov.KIND_DATA:
            self._handle_data(data, h, self.clock.monotonic(), ln.end.neighbour)
        elif h.kind == ov.KIND_PROBE:
            self._answer(ln, h, t2)
        else:
            self._take_echo(ln, h, payload, self.clock.wall_ns())

    def _malformed(self, reason: str) -> None:
        self.malformed[reason] += 1
        self.counts["malformed"] += 1
        self.m.malformed.labels(reason).inc()

    # -- forwarding ------------------------------------------------------------------------
    def _handle_data(self, data: bytes, h: ov.Header, now: float, came: int = -1) -> None:
        if h.dst == self.me:
            self.counts["delivered"] += 1
            self.m.delivered.inc()
            self.m.delivery.observe(max(0.0, (self.clock.wall_ns() - h.origin_ns) / 1e9))
            try:
                assert self.local_sock is not None
                self.local_sock.sendto(data, self.deliver_addr)
            except OSError:
                self.drops["send_error"] += 1
                self.m.dropped.labels("send_error").inc()
            return
        if h.ttl == 0:
            self.counts["ttl_expired"] += 1
            self.m.ttl_expired.inc()
            return
        nh = self._next_hop(h.dst, h.flow, now, came)
        if nh < 0:
            self.drops["no_route"] += 1
            self.m.dropped.labels("no_route").inc()
            return
        try:
            self.links[nh].sock.send(ov.with_ttl(data, h.ttl - 1))
        except OSError:  # ENOBUFS, ECONNREFUSED (the neighbour is not listening yet)
            self.drops["send_error"] += 1
            self.m.dropped.labels("send_error").inc()
            return
        self.counts["forwarded"] += 1
        self.m.forwarded.inc()

    def _usable(self, y: int) -> bool:
        ln = self.links.get(y)
        return ln is not None and ln.state in USABLE_STATES

    def _next_hop(self, dst: int, flow: int, now: float, came: int = -1) -> int:
        key = (dst, flow)
        pin = self.flowlets.get(key)
        ver = self.entry_version.get(dst, 0)
        cause = "new"
        if pin is not None:
            if pin[2] != ver:
                cause = "table"
            elif not self._usable(pin[0]):
                cause = "link"
            elif now - pin[1] > self.gap:
                cause = "idle"
            elif pin[0] == came:
                cause = "return"
            else:
                pin[1] = now
                return int(pin[0])
        nh = self._choose(dst, came)
        if nh >= 0:
            self.flowlets[key] = [nh, now, ver]
            self.m.repins.labels(cause).inc()
        return nh

    def _choose(self, dst: int, came: int = -1) -> int:
        """A next hop for ``dst`` by the table's weights over usable links; never straight
        back to ``came`` (the neighbour the packet came from) while another way exists.

        The service's tables are loop-free per destination, so a table hop pointing back
        where the packet came from means two nodes hold tables of different moments (a
        change in flight, a link just lost): taking another way then avoids a two-node
        loop that would last until the tables agree."""
        ent = self.routes.get(dst)
        back = came >= 0 and came != dst
        if ent is not None:
            hops, weights = ent
            live = [(y, w) for y, w in zip(hops, weights) if w > 0 and self._usable(y)]
            if back and any(y == came for y, _ in live):
                self.m.returns_avoided.inc()
                self.counts["returns_avoided"] += 1
                live = [(y, w) for y, w in live if y != came]
            if live:
                if len(live) == 1:
                    return live[0][0]
                tot = sum(w for _, w in live)
                r = self.rng.random() * tot
                for y, w in live:
                    r -= w
                    if r < 0:
                        return y
                return live[-1][0]
        y = self.fallback_nh[dst]
        if back and y == came:
            alt = self._fallback_without(came)[dst]
            y = alt if alt >= 0 else came     # no other way at all: back it goes (TTL bounds it)
        if y >= 0:
            self.counts["fallback"] += 1
            self.m.fallback.inc()
        return y

    def _fallback_without(self, y: int) -> list[int]:
        got = self._fallback_excl.get(y)
        if got is None:
            got = self._fallback_excl[y] = self._shortest(exclude=y)
        return got

    def _recompute_fallback(self) -> None:
        self._fallback_excl = {}
        self.fallback_nh = self._shortest()

    def _shortest(self, exclude: int = -1) -> list[int]:
        """Next hops of this node on delay-shortest paths over the links it believes up
        (and without the link to ``exclude``)."""
        import numpy as np

        t = self.topo
        w = t.delay_s.astype(float).copy()
        for y, ln in self.links.items():
            if ln.state not in USABLE_STATES or y == exclude:
                w[t.link_index[(self.me, y)]] = np.inf
        _, first = t.shortest_from(self.me, w)    # one source, not all pairs
        return [int(v) for v in first.tolist()]

    def _prune(self, now: float) -> None:
        old = [k for k, p in self.flowlets.items() if now - p[1] > max(self.gap, 1.0)]
        for k in old:
            del self.flowlets[k]
        self.m.flowlets.set(len(self.flowlets))

    def set_estimates(self, estimates: Mapping[str, float]) -> None:
        """This node's own remaining-time estimates by destination name (seconds), for an
        engine run beside the agent: its echoes carry them, and the neighbours' hop rows
        then report them as ``estimate_s`` (the Q-routing estimate of the next hop)."""
        idx = self.topo.index
        out = []
        for name, e in estimates.items():
            if name not in idx or name == self.name:
                raise ValueError(f"estimate for {name!r}: not another node of {self.topo.name!r}")
            if not (isinstance(e, (int, float)) and 0.0 <= e < math.inf):
                raise ValueError(f"estimate for {name!r} is {e!r}, expected seconds >= 0")
            out.append((idx[name], float(e)))
        self.estimates = tuple(out)

    # -- tables --------------------------------------------------------------------------
    def _take_tables(self) -> None:
        sub = self.sub
        restarts = sub.restarts
        if not sub.poll(0):
            return
        tbl = sub.tables.get(self.name)
        if tbl is None:
            return
        seq, ep = sub.seq.get(self.name), sub.epoch.get(self.name)
        if seq == self.table_seq and ep == self.table_epoch:
            return
        idx = self.topo.index
        new: dict[int, tuple[tuple[int, ...], tuple[float, ...]]] = {}
        for dname, hops in tbl.items():
            d = idx.get(dname)
            if d is None or not isinstance(hops, list):
                continue
            ys, ws = [], []
            for item in hops:
                if (isinstance(item, list) and len(item) == 2 and item[0] in idx
                        and idx[item[0]] in self.links and isinstance(item[1], (int, float))):
                    ys.append(idx[item[0]])
                    ws.append(float(item[1]))
            if ys:
                new[d] = (tuple(ys), tuple(ws))
        for d in set(new) | set(self.routes):
            if new.get(d) != self.routes.get(d):
                self.entry_version[d] = self.entry_version.get(d, 0) + 1
        self.routes = new
        resync = self.table_epoch is not None and ep != self.table_epoch
        self.table_seq, self.table_epoch = seq, ep
        self.table_at = self.clock.monotonic()
        self.counts["tables"] += 1
        self.m.tables.inc()
        if resync or sub.restarts > restarts:
            self.counts["resyncs"] += 1
            self.m.resyncs.inc()
            # the service restarted: tell it again what we see down (idempotent)
            for ln in self.links.values():
                self._link_event(ln, "resync", self.clock.monotonic())
        if self.table_hold:
            self._set_table_hold(False)

    # -- probes --------------------------------------------------------------------------
    def _probe_all(self, now: float) -> None:
        for y, ln in self.links.items():
            ln.seq = (ln.seq + 1) & 0xFFFFFFFF
            t1 = self.clock.wall_ns()
            ln.outstanding[ln.seq] = t1
            if len(ln.outstanding) > 4 * self.cfg["agent.detect_multiplier"] + 4:
                ln.outstanding.pop(next(iter(ln.outstanding)))
            try:
                ln.sock.send(ov.probe(self.tag, self.me, y, ln.seq, t1))
                self.counts["probes_sent"] += 1
                self.m.probes.labels("sent").inc()
            except OSError:
                pass
            if now - ln.last_echo > ln.detect_s:
                self._link_event(ln, "silence", now)

    def _answer(self, ln: _Link, h: ov.Header, t2: int) -> None:
        if h.dst != self.me or h.src != ln.end.neighbour:
            self._malformed("unknown_node")
            return
        try:
            ln.sock.send(ov.echo(h, self.me, t2, self.clock.wall_ns(), self.estimates))
            self.counts["probes_answered"] += 1
            self.m.probes.labels("answered").inc()
        except OSError:
            pass

    def _take_echo(self, ln: _Link, h: ov.Header, payload: bytes, t4: int) -> None:
        e = ov.decode_echo(payload, self.topo.n)
        if isinstance(e, ov.Malformed):
            self._malformed(e.reason)
            return
        t1 = ln.outstanding.pop(h.seq, None)
        if t1 is None or t1 != h.origin_ns:
            self.counts["echoes_late"] += 1
            self.m.probes.labels("late").inc()
            return
        now = self.clock.monotonic()
        lat = ov.one_way_delay_s(t1, e.t2_ns) if self.one_way else ov.two_way_delay_s(t1, e.t2_ns, e.t3_ns, t4)
        self.counts["echoes"] += 1
        self.m.probes.labels("echoed").inc()
        self.m.latency.observe(lat)
        ln.lat_sum += lat
        ln.lat_n += 1
        self._link_event(ln, "echo", now)
        ln.last_echo = now
        est = dict(e.estimates)
        names = self.topo.nodes
        me, y = names[self.me], names[ln.end.neighbour]
        full = len(self.rows) == self.rows.maxlen
        for d in range(self.topo.n):
            if d != self.me:
                if full:
                    self.counts["rows_dropped"] += 1
                    self.m.report_rows.labels("dropped").inc()
                self.rows.append((me, y, names[d], lat, est.get(d)))

    def _link_event(self, ln: _Link, event: str, now: float) -> None:
        """Apply ``event`` to link ``ln`` by :data:`LINK_TRANSITIONS`."""
        old = ln.state
        state, actions = LINK_TRANSITIONS[(old, event)]
        if state != old:
            ln.state = state
            ln.since = now
        y = ln.end.neighbour
        if "record" in actions:
            self.detections.append({"neighbour": self.topo.nodes[y], "from": old,
                                    "after_s": now - ln.last_echo,
                                    "at": self.clock.wall()})
        if "report" in actions:
            self.link_reports[y] = state
        if "count" in actions:
            self.m.link_changes.labels(state).inc()
            self.m.links_down.set(sum(1 for v in self.links.values() if v.state == "down"))
            self._recompute_fallback()

    # -- reporting -------------------------------------------------------------------------
    def _report(self, now: float) -> None:
        from .client import DeliveryError, ServiceError

        rep = self.reporter
        room = (rep.max_pending - rep.pending - 1) * rep.batch_rows
        try:
            if room > 0 and self.link_reports:
                # link rows in a batch of their own, ahead of the hop rows: the service
                # applies a batch's hops before its links, and a link coming back up is
                # re-admitted with a fresh estimate that the hop rows measured after it
                # must correct, not precede
                rep.send_now()
                for y, st in list(self.link_reports.items()):
                    rep.add_link(self.name, self.topo.nodes[y], st)
                    del self.link_reports[y]
                rep.send_now()
                room = (rep.max_pending - rep.pending - 1) * rep.batch_rows
            if room > 0:
                n = min(room, len(self.rows))
                for _ in range(n):
                    a, b, c, lat, e = self.rows.popleft()
                    rep.add_hop(a, b, c, lat, e)
                self.counts["rows_sent"] += n
                self.m.report_rows.labels("sent").inc(n)
                rep.send_now()
            rep.pump(0)
        except DeliveryError:
            self.counts["delivery_errors"] += 1
            self.m.report_errors.labels("delivery").inc()
        except ServiceError:
            self.counts["refused"] += 1
            self.m.report_errors.labels("refused").inc()
        self._update_gauges(now)

    def service_reachable(self, now: float) -> bool:
        stale = self.cfg["agent.table_stale_s"]
        recent = [t for t in (self.table_at, self.last_ack_at) if t is not None]
        if not recent:
            return now - self.started < stale
        return now - max(recent) < stale

    def _set_table_hold(self, on: bool) -> None:
        if on and not self.table_hold:
            self.counts["table_holds"] += 1
            self.m.table_holds.inc()
        self.table_hold = on
        self.m.table_hold.set(1 if on else 0)

    def _update_gauges(self, now: float) -> None:
        if self.table_at is not None:
            self.m.table_age.set(now - self.table_at)
        if not self.service_reachable(now) and self.table_at is not None:
            self._set_table_hold(True)

    # -- status ----------------------------------------------------------------------------
    def status(self) -> dict[str, Any]:
        now = self.clock.monotonic()
        names = self.topo.nodes
        return {
            "node": self.name, "pid": os.getpid(), "uptime_s": now - self.started,
            "counts": dict(self.counts), "dropped": dict(self.drops), "malformed": dict(self.malformed),
            "links": {names[y]: {"state": ln.state, "mean_latency_s": ln.lat_sum / ln.lat_n if ln.lat_n else None,
                                 "echoes": ln.lat_n} for y, ln in self.links.items()},
            "detections": list(self.detections),
            "table": {"epoch": self.table_epoch, "seq": self.table_seq,
                      "age_s": None if self.table_at is None else now - self.table_at,
                      "routes": {names[d]: [[names[y], w] for y, w in zip(*e)] for d, e in self.routes.items()}},
            "table_hold": self.table_hold, "service_reachable": self.service_reachable(now),
            "report": {"buffered_rows": len(self.rows),
                       "pending_batches": self.reporter.pending if self.reporter else 0,
                       "accepted": self.reporter.accepted if self.reporter else 0,
                       "deferred": dict(self.reporter.deferred) if self.reporter else {},
                       "refused": dict(self.reporter.refused) if self.reporter else {},
                       "last_error": self.reporter.last_error if self.reporter else None,
                       "curve": self.curve is not None},
            "flowlets": len(self.flowlets),
        }

    def write_status(self) -> None:
        if not self.status_file:
            return
        tmp = self.status_file + ".tmp"
        try:
            with open(tmp, "w", encoding="utf-8") as fh:
                json.dump(self.status(), fh, default=str)
            os.replace(tmp, self.status_file)
        except OSError as e:
            # the loop goes on without it, but not in silence (said again if the reason changes)
            why = f"{e.filename or self.status_file}: {e.strerror or e}"
            if why != self.status_error:
                print(f"routerd agent: cannot write the status file {why}", file=sys.stderr, flush=True)
            self.status_error = why
        else:
            self.status_error = None

    def close(self) -> None:
        for ln in self.links.values():
            ln.sock.close()
        self.links = {}
        if self.local_sock is not None:
            self.local_sock.close()
            self.local_sock = None
        if self.reporter is not None:
            self.reporter.close(flush=False)
            self.reporter = None
        if self.sub is not None:
            self.sub.close()
            self.sub = None
        for fd in (self._stop_r, self._stop_w):
            try:
                os.close(fd)
            except OSError:
                pass
        self._stop_r = self._stop_w = -1


# ---- command line --------------------------------------------------------------------------
def configure(p: argparse.ArgumentParser) -> None:
    p.add_argument("--node", required=True, metavar="NAME", help="the overlay node this agent runs on")
    p.add_argument("--config", required=True, metavar="FILE",
                   help="YAML config: topology.file, service.ingest/publish endpoints, agent.* "
                        "(agent.underlay names the underlay map)")
    p.add_argument("--local", metavar="HOST:PORT", help="overrides agent.local")
    p.add_argument("--deliver", metavar="HOST:PORT", help="overrides agent.deliver")
    p.add_argument("--metrics", metavar="HOST:PORT", help="overrides agent.metrics")
    p.add_argument("--set", metavar="KEY=VALUE", action="append", default=[], dest="overrides",
                   help="override one config setting, e.g. --set agent.probe_interval_s=0.05 "
                        "(repeatable)")
    p.add_argument("--status-file", metavar="FILE", help="write the agent's counters and state as "
                   "JSON to FILE every second and at exit")
    p.add_argument("--duration", metavar="S", type=float, default=None,
                   help="stop after S seconds (default: run until SIGTERM or Ctrl-C)")


def load(args: argparse.Namespace) -> tuple[Any, Any]:
    """Config and topology by the one input rule (:mod:`routerd.io.inputs`: agent.underlay
    and the key files relative to the config file), ``--metrics`` and ``--set`` on top."""
    ns = argparse.Namespace(config=args.config, overrides=getattr(args, "overrides", None) or [])
    cfg = _inputs.load_config(ns)
    if getattr(args, "metrics", None):
        cfg = cfg.with_overrides({"agent.metrics": args.metrics}, where="--metrics")
    return cfg, _inputs.load_topology(cfg)


def run(args: argparse.Namespace) -> int:
    from prometheus_client import CollectorRegistry, start_http_server

    from routerd.io.cautions import CAUTIONS
    from routerd.io.metricsaddr import parse_address

    try:
        dur = getattr(args, "duration", None)
        if dur is not None and not (math.isfinite(dur) and dur > 0):
            # -1 stopped at once with exit 0, nan ran for ever
            raise InputError(Problem("--duration", dur, "must be a finite number of seconds above 0"))
        if getattr(args, "status_file", None):
            from routerd.io.files import output_file

            output_file(args.status_file, "--status-file")   # a directory, an unwritable place
            os.makedirs(os.path.dirname(os.path.abspath(args.status_file)), exist_ok=True)
        cfg, topo = load(args)
        agent = Agent(cfg, topo, args.node, registry=(reg := CollectorRegistry()),
                      local=args.local, deliver=args.deliver, status_file=args.status_file)
        host, port = parse_address(cfg["agent.metrics"])
    except (InputError, ValueError) as e:
        print(f"routerd agent: cannot start:\n{e}", file=sys.stderr)
        return 2
    try:
        agent.open()
    except InputError as e:
        print(f"routerd agent: cannot start: {e}", file=sys.stderr)
        return 2
    try:
        server, _t = start_http_server(port, addr=host, registry=reg)
    except OSError as e:
        agent.close()
        print(f"routerd agent: cannot start: metrics address {cfg['agent.metrics']}: {e}", file=sys.stderr)
        return 2

    def on_signal(_s: int, _f: Any) -> None:
        agent.request_stop()

    if threading.current_thread() is threading.main_thread():
        for s in (signal.SIGTERM, signal.SIGINT):
            signal.signal(s, on_signal)
    print(CAUTIONS, file=sys.stderr)
    nbrs = ", ".join(topo.nodes[e.neighbour] for e in agent.ends)
    print(f"routerd agent {args.node}: {len(agent.ends)} links ({nbrs}); local "
          f"{agent.local_addr[0]}:{agent.local_addr[1]}, deliver {agent.deliver_addr[0]}:"
          f"{agent.deliver_addr[1]}, metrics http://{host}:{server.server_address[1]}/metrics", flush=True)
    print(f"routerd agent {args.node}: ready (pid {os.getpid()})", flush=True)
    try:
        return agent.run(args.duration)
    finally:
        agent.write_status()
        agent.close()
        server.shutdown()
        server.server_close()
