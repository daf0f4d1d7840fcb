"""Prometheus metrics for the service: one custom collector, built at scrape time.

Owns: the metric names and label sets (bounded, fixed), the fixed-bucket histogram
accumulators the service feeds (|TD error|, update duration), and serving the text page
over HTTP on the metrics address.  The engine never imports this module; the service
hands the collector a :class:`MetricsSource` and the collector maps the engine's
``statistics()`` snapshot and the service's own counters to metric families when
Prometheus scrapes (prometheus_client's custom-collector pattern, ``registry=`` passed in,
so every test builds a fresh registry).

Names follow the Prometheus conventions (common practice, prometheus.io "Metric and label
naming"): base units in the name (``_seconds``, ``_bytes``), counters end in ``_total``,
label values come from fixed sets — never one series per node, destination or reporter.

Must not import: zmq, the journal, the wire module (the service passes the reason set in).
"""
from __future__ import annotations

import bisect
import threading
from collections.abc import Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, Protocol

import numpy as np
from prometheus_client.core import (
    CounterMetricFamily,
    GaugeMetricFamily,
    HistogramMetricFamily,
    Metric,
)
from prometheus_client.registry import Collector, CollectorRegistry

from routerd.io.metricsaddr import parse_address

__all__ = ["Counters", "Histo", "MetricsSource", "RouterdCollector", "connection_families",
           "parse_address", "serve"]

#: |TD error| buckets, seconds (the demo lab's hop delays are 0.5–2 ms; estimates reach
#: the ceiling of 10 s on dead links).
TD_BUCKETS_S = (1e-6, 1e-5, 1e-4, 2.5e-4, 5e-4, 1e-3, 2.5e-3, 5e-3, 0.01, 0.025, 0.05,
                0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0)
#: Engine update duration per batch, seconds.
UPDATE_BUCKETS_S = (1e-5, 2.5e-5, 5e-5, 1e-4, 2.5e-4, 5e-4, 1e-3, 2.5e-3, 5e-3, 0.01,
                    0.025, 0.05, 0.1, 0.25, 0.5, 1.0)

#: How long a snapshot holds the event loop, seconds (a fork, or a write in the loop).
SNAPSHOT_PAUSE_BUCKETS_S = (0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0,
                            2.5, 5.0, 10.0)

#: Batch outcomes (a fixed set).
BATCH_RESULTS = ("accepted", "duplicate", "refused")
#: Why table publications happen.
PUBLICATION_CAUSES = ("change", "interval", "final")
#: Control operations counted by name; anything else counts as "other".
CONTROL_OPS = ("tables", "estimates", "health", "snapshot", "link", "nodes", "reload", "other")
CONTROL_RESULTS = ("ok", "error")
#: Snapshot causes.
SNAPSHOT_CAUSES = ("interval", "request", "shutdown")
#: Reload outcomes.
RELOAD_RESULTS = ("applied", "rejected")
#: Ingest sockets.
INGEST_SOCKETS = ("router", "pull")
#: Listening sockets whose connections are counted against the connection cap.
LISTEN_SOCKETS = ("ingest", "pull", "publish", "control", "control_ro", "shards")


class Histo:
    """A fixed-bucket histogram accumulator fed with numpy arrays (one call per batch).

    Counts are per bucket (not cumulative) until exported; ``+Inf`` is the last bucket.
    """

    __slots__ = ("_blist", "_lock", "bounds", "counts", "sum")

    #: Below this many values a Python bisect beats numpy's per-call overhead.
    SMALL = 16

    def __init__(self, bounds: Sequence[float]):
        b = np.asarray(bounds, dtype=np.float64)
        if b.ndim != 1 or b.size == 0 or np.any(np.diff(b) <= 0):
            raise ValueError("histogram bounds must be a rising sequence")
        self.bounds = b
        self._blist = b.tolist()
        self.counts = np.zeros(b.size + 1, dtype=np.int64)
        self.sum = 0.0
        self._lock = threading.Lock()

    def observe_many(self, values: np.ndarray) -> None:
        v = np.asarray(values, dtype=np.float64)
        if v.size == 0:
            return
        if v.size < self.SMALL:
            for x in v.tolist():
                self.observe(x)
            return
        # Prometheus buckets are "less than or equal": side="left" puts v == bound in it
        idx = np.searchsorted(self.bounds, v, side="left")
        add = np.bincount(idx, minlength=self.counts.size)
        s = float(v.sum())
        with self._lock:
            self.counts += add
            self.sum += s

    def observe(self, value: float) -> None:
        i = bisect.bisect_left(self._blist, value)   # the same rule as side="left"
        with self._lock:
            self.counts[i] += 1
            self.sum += value

    def exported(self) -> tuple[list[tuple[str, float]], float]:
        """(cumulative ``[(le, count), ...]`` ending in ``+Inf``, sum)."""
        with self._lock:
            c = np.cumsum(self.counts)
            s = self.sum
        les = [_fmt(float(x)) for x in self.bounds] + ["+Inf"]
        return list(zip(les, (float(x) for x in c))), s

    @property
    def count(self) -> int:
        return int(self.counts.sum())


def _fmt(x: float) -> str:
    return repr(float(x))


@dataclass
class Counters:
    """The service's own counters (plain ints, bumped by the event loop).

    Every dict is created with its full, fixed key set, so every series exists from the
    first scrape and no label value can appear that is not listed here.
    """

    row_reasons: tuple[str, ...]     # why a row is rejected (wire.REASONS + service ones)
    frame_reasons: tuple[str, ...]   # why a whole frame is refused (wire.FRAME_ERRORS)
    observations_accepted: int = 0
    observations_rejected: dict[str, int] = field(default_factory=dict)
    link_reports_accepted: int = 0
    batches: dict[str, int] = field(default_factory=lambda: dict.fromkeys(BATCH_RESULTS, 0))
    refused: dict[str, int] = field(default_factory=dict)
    batches_by_socket: dict[str, int] = field(default_factory=lambda: dict.fromkeys(INGEST_SOCKETS, 0))
    publications: dict[str, int] = field(default_factory=lambda: dict.fromkeys(PUBLICATION_CAUSES, 0))
    control: dict[tuple[str, str], int] = field(
        default_factory=lambda: {(o, r): 0 for o in CONTROL_OPS for r in CONTROL_RESULTS})
    snapshots: dict[str, int] = field(default_factory=lambda: dict.fromkeys(SNAPSHOT_CAUSES, 0))
    reloads: dict[str, int] = field(default_factory=lambda: dict.fromkeys(RELOAD_RESULTS, 0))
    acks_undeliverable: int = 0
    ingest_disconnects: int = 0
    fsyncs: int = 0
    group_commits: int = 0
    td_error: Histo = field(default_factory=lambda: Histo(TD_BUCKETS_S))
    update_duration: Histo = field(default_factory=lambda: Histo(UPDATE_BUCKETS_S))
    snapshot_pause: Histo = field(default_factory=lambda: Histo(SNAPSHOT_PAUSE_BUCKETS_S))

    def __post_init__(self) -> None:
        for rs in (self.row_reasons, self.frame_reasons):
            if len(set(rs)) != len(rs):
                raise ValueError("reasons must be distinct")
        self.observations_rejected = dict.fromkeys(self.row_reasons, 0)
        self.refused = dict.fromkeys(self.frame_reasons, 0)

    def reject(self, reason: str, n: int = 1) -> None:
        """Count n rejected rows; a reason outside the fixed set is our bug — fail loudly."""
        if reason not in self.observations_rejected:
            raise KeyError(f"rejection reason {reason!r} is not in the fixed reason set")
        self.observations_rejected[reason] += n

    def refuse(self, reason: str) -> None:
        """Count one frame refused as a whole."""
        if reason not in self.refused:
            raise KeyError(f"refusal reason {reason!r} is not in the fixed reason set")
        self.refused[reason] += 1
        self.batches["refused"] += 1

    def add(self, counts: Any) -> None:
        """Count one ingest frame's outcome (a :class:`routerd.service.pipeline.Counts`)."""
        if counts.refused is not None:
            self.refuse(counts.refused)
        else:
            self.batches[counts.result] += 1
        for reason, n in counts.rejected:
            self.reject(reason, n)
        self.observations_accepted += counts.observations
        self.link_reports_accepted += counts.link_reports
        if counts.td_errors is not None:
            self.td_error.observe_many(counts.td_errors)
        if counts.update_s is not None:
            self.update_duration.observe(counts.update_s)

    def control_request(self, op: str, ok: bool) -> None:
        key = (op if op in CONTROL_OPS else "other", "ok" if ok else "error")
        self.control[key] += 1


class MetricsSource(Protocol):
    """What the collector reads at scrape time (the service implements it)."""

    counters: Counters

    def engine_statistics(self) -> Any: ...   # routerd.core.engine.EngineStats, taken under a lock
    def journal_bytes(self) -> int: ...
    def snapshot_age_s(self) -> float | None: ...
    def uptime_s(self) -> float: ...
    def info(self) -> Mapping[str, str]: ...  # a handful of constant labels: version, topology


class RouterdCollector(Collector):
    """Maps a :class:`MetricsSource` to metric families when scraped."""

    def __init__(self, source: MetricsSource):
        self.source = source

    def describe(self) -> Iterable[Metric]:
        # No up-front description: the registry would otherwise call collect() at register
        # time, before the service has an engine.
        return []

    def collect(self) -> Iterator[Metric]:
        src = self.source
        c = src.counters
        st = src.engine_statistics()

        obs = CounterMetricFamily("routerd_observations",
                                  "Hop observation rows received, by result (rejected rows by reason)")
        obs.add_sample("routerd_observations_total", {"result": "accepted"}, float(c.observations_accepted))
        for r, v in c.observations_rejected.items():
            obs.add_sample("routerd_observations_total", {"result": "rejected", "reason": r}, float(v))
        yield obs

        links = CounterMetricFamily("routerd_link_reports", "Link state rows (and operator overrides) applied")
        links.add_metric([], float(c.link_reports_accepted))
        yield links

        b = CounterMetricFamily("routerd_batches", "Ingest frames by result (refused frames by reason)")
        for r in ("accepted", "duplicate"):
            b.add_sample("routerd_batches_total", {"result": r}, float(c.batches[r]))
        for r, v in c.refused.items():
            b.add_sample("routerd_batches_total", {"result": "refused", "reason": r}, float(v))
        yield b

        bs = CounterMetricFamily("routerd_ingest_frames", "Ingest frames received, by socket", labels=["socket"])
        for s, v in c.batches_by_socket.items():
            bs.add_metric([s], float(v))
        yield bs

        p = CounterMetricFamily("routerd_table_publications",
                                "Per-node tables published, by cause", labels=["cause"])
        for k, v in c.publications.items():
            p.add_metric([k], float(v))
        yield p

        yield _counter("routerd_route_changes", "(node, destination) pairs whose greedy next hop changed",
                       st.route_changes)
        yield _counter("routerd_loops_prevented", "(node, destination) pairs newly held off a choice that would have formed a forwarding loop (once per change)",
                       st.loops_prevented)
        yield _counter("routerd_decisions", "Table recomputations (engine decide calls)", st.decisions)
        # split mode (engine.mode=split); zero in greedy mode
        yield _counter("routerd_split_key_publications",
                       "(node, destination) keys whose published shares changed (split mode)",
                       st.split_publications)
        yield _counter("routerd_split_whole_publications",
                       "Destinations published whole because mixing keys would have closed a loop (split mode)",
                       st.split_whole_publications)
        yield _counter("routerd_split_fallbacks",
                       "Keys put on the live shortest-path tree: route lost, gained, or on a cycle (split mode)",
                       st.split_fallbacks)
        yield _counter("routerd_engine_updates", "Q-value updates applied by the engine", st.updates)

        yield _gauge("routerd_exploration_share",
                     "Mean off-greedy weight over routed (node, destination) pairs", st.exploration_share)
        yield _gauge("routerd_td_error_mean_seconds", "Moving mean of |TD error| over rows", st.td_error_mean_s)
        yield _gauge("routerd_links_down", "Directed links marked down", st.links_down)
        yield _gauge("routerd_pending_destinations", "Destinations touched since the last decision",
                     st.pending_destinations)

        yield _histogram("routerd_td_error_seconds", "|TD error| of each accepted hop observation", c.td_error)
        yield _histogram("routerd_update_duration_seconds", "Engine time to apply one batch", c.update_duration)

        yield _gauge("routerd_journal_bytes", "Bytes in live journal segments", src.journal_bytes())
        age = src.snapshot_age_s()
        yield _gauge("routerd_snapshot_age_seconds",
                     "Seconds since the last snapshot was written (NaN: none yet in this run)",
                     float("nan") if age is None else age)
        yield _histogram("routerd_snapshot_pause_seconds", "Time a snapshot held the event loop "
                         "(the fork of a background snapshot, or a whole write in the loop)",
                         c.snapshot_pause)
        sn = CounterMetricFamily("routerd_snapshots", "Snapshots written, by cause", labels=["cause"])
        for k, v in c.snapshots.items():
            sn.add_metric([k], float(v))
        yield sn

        cr = CounterMetricFamily("routerd_control_requests", "Control requests by operation and result",
                                 labels=["op", "result"])
        for (o, r), v in c.control.items():
            cr.add_metric([o, r], float(v))
        yield cr
        rl = CounterMetricFamily("routerd_reloads", "Config reloads (SIGHUP), by result", labels=["result"])
        for k, v in c.reloads.items():
            rl.add_metric([k], float(v))
        yield rl
        yield _counter("routerd_acks_undeliverable",
                       "Acknowledgements that could not be sent (peer gone or its queue full)",
                       c.acks_undeliverable)
        yield _counter("routerd_ingest_disconnects",
                       "Ingest peer disconnections (including peers cut off for an oversized frame)",
                       c.ingest_disconnects)
        yield _counter("routerd_journal_fsyncs", "Journal group commits made durable", c.fsyncs)
        trust = getattr(src, "trust_state", None)   # storage and guard state (routerd.service)
        if trust is not None:
            t = trust()
            yield _gauge("routerd_storage_writable", "1 while the journal can be written; 0: "
                         "batches are answered 'unavailable' until it can", t["writable"])
            yield _counter("routerd_storage_failures", "Journal writes or fsyncs that failed "
                           "(disk full, I/O error)", t["failures"])
            yield _counter("routerd_guard_clipped_rows", "Hop rows whose latency the jump "
                           "guard clipped to its band (accepted, not rejected)", t["clipped"])
        conn = getattr(src, "connection_state", None)   # the connection cap (routerd.service.listeners)
        if conn is not None:
            yield from connection_families(conn())
        dd = getattr(src, "dedup_state", None)   # the duplicate window (routerd.service.dedup)
        if dd is not None:
            d = dd()
            ev = CounterMetricFamily("routerd_dedup_evictions", "Batches that left the duplicate "
                                     "window, by cause (window: service.dedup_batches per reporter; "
                                     "budget: service.dedup_budget_bytes or dedup_reporters)",
                                     labels=["cause"])
            ev.add_metric(["window"], float(d["evicted_window"]))
            ev.add_metric(["budget"], float(d["evicted_budget"]))
            yield ev
            yield _gauge("routerd_dedup_bytes", "Estimated bytes held by the duplicate window",
                         d["bytes"])
            yield _gauge("routerd_dedup_entries", "Batches held by the duplicate window", d["entries"])
            yield _gauge("routerd_dedup_marks", "Reporter names with a high-water mark (never "
                         "forgotten)", d["marks"])
            yield _gauge("routerd_dedup_marks_bytes", "Estimated bytes of the high-water marks",
                         d["marks_bytes"])
        yield _gauge("routerd_uptime_seconds", "Seconds since the service started", src.uptime_s())
        info = GaugeMetricFamily("routerd_build_info", "Constant 1, labelled with version and topology digest",
                                 labels=sorted(src.info()))
        info.add_metric([src.info()[k] for k in sorted(src.info())], 1.0)
        yield info


def connection_families(st: Mapping[str, Any]) -> Iterator[Metric]:
    """Open connections, refusals and holds per listening socket (every socket of
    :data:`LISTEN_SOCKETS` has a series; one the service does not run stays 0)."""
    if not st:
        return
    g = GaugeMetricFamily("routerd_ingest_connections", "Peer connections open now, by "
                          "listening socket", labels=["socket"])
    r = CounterMetricFamily("routerd_ingest_connections_refused", "Connections accepted over "
                            "the connection cap and cut off at once, by listening socket",
                            labels=["socket"])
    f = CounterMetricFamily("routerd_ingest_accept_failures", "Connections libzmq could not "
                            "accept for want of file descriptors, by listening socket",
                            labels=["socket"])
    for name in LISTEN_SOCKETS:
        g.add_metric([name], float(st["open"].get(name, 0)))
        r.add_metric([name], float(st["refused"].get(name, 0)))
        f.add_metric([name], float(st["accept_failures"].get(name, 0)))
    yield g
    yield r
    yield f
    yield _counter("routerd_ingest_connection_pauses", "Times the listening endpoints stopped "
                   "taking new connections at the connection cap", st["pauses"])
    yield _gauge("routerd_ingest_connection_cap", "Connections the listening endpoints may "
                 "hold at once (service.max_connections or derived from the descriptor limit)",
                 st["cap"])
    yield _gauge("routerd_ingest_paused", "1 while the ingest endpoint takes no new "
                 "connections (connection cap reached)", 1.0 if "ingest" in st["paused"] else 0.0)


def _counter(name: str, doc: str, value: float) -> CounterMetricFamily:
    f = CounterMetricFamily(name, doc)
    f.add_metric([], float(value))
    return f


def _gauge(name: str, doc: str, value: float) -> GaugeMetricFamily:
    return GaugeMetricFamily(name, doc, value=float(value))


def _histogram(name: str, doc: str, h: Histo) -> HistogramMetricFamily:
    buckets, s = h.exported()
    f = HistogramMetricFamily(name, doc)
    f.add_metric([], buckets, s)
    return f


def serve(addr: str, source: MetricsSource) -> tuple[Any, int, CollectorRegistry]:
    """Start the HTTP page on ``addr`` in a daemon thread: (server, bound port, registry).

    Stop it with ``server.shutdown(); server.server_close()``.
    """
    from prometheus_client import start_http_server

    host, port = parse_address(addr)
    registry = CollectorRegistry(auto_describe=False)
    registry.register(RouterdCollector(source))
    server, _thread = start_http_server(port, addr=host, registry=registry)
    return server, int(server.server_address[1]), registry
