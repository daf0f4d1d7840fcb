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

from routerd.core import kernels as _kernels
from routerd.io.metricsaddr import parse_address

#: the compiled histogram binning when built (the same bucket counts as the numpy one)
_KERNELS = _kernels.select("auto")

__all__ = ["Counters", "Histo", "LabelledCollector", "MetricsSource", "RouterdCollector",
           "connection_families", "optimum_families", "with_labels",
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

    __slots__ = ("_blist", "_counts", "_lock", "_pending", "_pending_n", "_sum", "bounds")

    #: Below this many values a Python bisect beats numpy's per-call overhead.
    SMALL = 16
    #: Values held by :meth:`defer` before they are folded in without a reader asking.
    PENDING_MAX = 1 << 16

    def __init__(self, bounds: Sequence[float]):
        b = np.asarray(bounds, dtype=np.float64)
        if b.ndim != 1 or b.size == 0 or np.any(np.diff(b) <= 0):
            raise ValueError("histogram bounds must be a rising sequence")
        self.bounds = b
        self._blist = b.tolist()
        self._counts = np.zeros(b.size + 1, dtype=np.int64)
        self._sum = 0.0
        self._lock = threading.Lock()
        self._pending: list[np.ndarray] = []
        self._pending_n = 0

    @property
    def counts(self) -> np.ndarray:
        """Per-bucket counts (deferred values folded in first)."""
        with self._lock:
            self._fold()
            return self._counts

    @property
    def sum(self) -> float:
        with self._lock:
            self._fold()
            return self._sum

    def observe_many(self, values: np.ndarray) -> None:
        v = np.asarray(values, dtype=np.float64)
        if v.size == 0:
            return
        if v.size < self.SMALL:
            for x in v.tolist():
                self.observe(x)
            return
        add, s = self._binned(v)
        with self._lock:
            self._counts += add
            self._sum += s

    def defer(self, values: np.ndarray) -> None:
        """:meth:`observe_many` later: the array is kept (not copied: the caller hands it
        over) and folded in with the others in one numpy pass when anyone reads the
        histogram, or once :data:`PENDING_MAX` values wait.  The ingest loop counts a
        batch's |TD errors| this way: one pass per scrape instead of four numpy calls per
        batch.  Same counts; the sum may differ in the last bits (one pairwise sum over
        the concatenation instead of one per array)."""
        with self._lock:
            self._pending.append(values)
            self._pending_n += values.shape[0]
            if self._pending_n >= self.PENDING_MAX:
                self._fold()

    def _fold(self) -> None:
        # under self._lock
        if not self._pending:
            return
        p, self._pending, self._pending_n = self._pending, [], 0
        v = np.asarray(p[0] if len(p) == 1 else np.concatenate(p), dtype=np.float64)
        if v.size:
            add, s = self._binned(v)
            self._counts += add
            self._sum += s

    def _binned(self, v: np.ndarray) -> tuple[np.ndarray, float]:
        kern = _KERNELS
        if kern is not None:
            # one compiled pass, the same buckets (routerd/core/_kernels.pyx: histo_add)
            add = np.zeros(self._counts.size, dtype=np.int64)
            s = kern.histo_add(add, self.bounds, np.ascontiguousarray(v, dtype=np.float64),
                               _binade_starts(self.bounds))
            return add, float(s)
        # Prometheus buckets are "less than or equal": side="left" puts v == bound in it
        idx = np.searchsorted(self.bounds, v, side="left")
        return np.bincount(idx, minlength=self._counts.size), float(v.sum())

    def observe(self, value: float) -> None:
        i = bisect.bisect_left(self._blist, value)   # the same rule as side="left"
        with self._lock:
            self._counts[i] += 1
            self._sum += value

    def exported(self) -> tuple[list[tuple[str, float]], float]:
        """(cumulative ``[(le, count), ...]`` ending in ``+Inf``, sum)."""
        with self._lock:
            self._fold()
            c = np.cumsum(self._counts)
            s = self._sum
        les = [_fmt(float(x)) for x in self.bounds] + ["+Inf"]
        return list(zip(les, (float(x) for x in c))), s

    @property
    def count(self) -> int:
        return int(self.counts.sum())


_LUTS: dict[bytes, np.ndarray] = {}


def _binade_starts(bounds: np.ndarray) -> np.ndarray:
    """Per binary exponent (2048), how many ``bounds`` lie below the smallest non-negative
    double of that exponent (0.0 for exponent 0): where the compiled binning starts a value
    (``_kernels.histo_add``).  Cached per set of bounds."""
    key = bounds.tobytes()
    lut = _LUTS.get(key)
    if lut is None:
        with np.errstate(over="ignore"):      # exponent 2047: inf and NaN, +inf here
            low = np.ldexp(1.0, np.arange(2048) - 1023)
        low[0] = 0.0
        lut = _LUTS[key] = np.searchsorted(bounds, low, side="left").astype(np.int64)
    return lut


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
            self.td_error.defer(counts.td_errors)
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
        opt = getattr(src, "optimum", None)   # the live optimality gap (routerd.service.optimum)
        if opt is not None:
            yield from optimum_families(opt.stats())
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


def optimum_families(f: Mapping[str, float]) -> Iterator[Metric]:
    """The live optimality gap (:meth:`routerd.service.optimum.Optimum.stats`).  The delay
    series are absent until a run has given them (and the published one while the tables
    leave measured demand unrouted or a link over capacity): ``absent()`` tells, not NaN."""
    runs = CounterMetricFamily("routerd_optimum_runs", "Optimiser runs on the measured demand, "
                               "by outcome (skipped: intervals that passed while a run was going)",
                               labels=["outcome"])
    runs.add_metric(["ok"], f["runs"])
    runs.add_metric(["failed"], f["failed"])
    runs.add_metric(["skipped"], f["skipped"])
    yield runs
    yield _counter("routerd_optimum_run_seconds", "Time spent in optimiser runs (child process)",
                   f["run_s_total"])
    yield _gauge("routerd_optimum_enabled", "1 when the live optimality gap runs "
                 "(engine.optimum.interval_s > 0, network within engine.optimum.max_nodes, not a shard worker)",
                 f["enabled"])
    yield _counter("routerd_optimum_guides", "Optimum splits that seeded split mode's shares "
                   "(engine.optimum.guide; journaled guide records)", f["guides"])
    yield _gauge("routerd_optimum_guided_destinations", "Destinations the last guide seeded "
                 "(the others kept their shares: a route or a loop would have changed)", f["guided"])
    yield _gauge("routerd_measured_demand_packets_per_second", "Offered demand measured from "
                 "hop rows (packets entering the network per second, all pairs)", f["demand_pps"])
    for name, key, doc in (
            ("routerd_model_delay_optimal_seconds", "optimal",
             "Model (M/M/1 links + propagation) mean delay of the flow-deviation optimum for the measured demand"),
            ("routerd_model_delay_optimal_lower_seconds", "lower",
             "Lower bound on the model's optimal mean delay (the optimum lies between this and the optimal series)"),
            ("routerd_model_delay_published_seconds", "published",
             "Model mean delay of the published tables for the measured demand"),
            ("routerd_model_delay_gap_ratio", "ratio",
             "Published over optimal model delay (1 = the tables are at the model's optimum)"),
            ("routerd_optimum_last_run_duration_seconds", "run_s", "Duration of the last optimiser run"),
            ("routerd_optimum_relative_gap", "rel_gap",
             "Duality gap over cost of the last optimiser run (0 = converged exactly)"),
            ("routerd_optimum_age_seconds", "age_s", "Seconds since the last optimiser result"),
            ("routerd_measured_demand_unroutable_packets_per_second", "unroutable",
             "Measured demand the last optimiser run left out: between nodes the live links do "
             "not join (a partition), which no routing can carry")):
        v = f[key]
        if v == v and v not in (float("inf"), float("-inf")):
            yield _gauge(name, doc, v)


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


class LabelledCollector(Collector):
    """Another collector's families with constant labels added to every sample (a shard
    worker's page: ``shard="K"`` on every series, so one Prometheus job scrapes all
    workers and their series never collide)."""

    def __init__(self, inner: Collector, labels: Mapping[str, str]):
        self.inner = inner
        self.labels = dict(labels)

    def describe(self) -> Iterable[Metric]:
        return []

    def collect(self) -> Iterator[Metric]:
        for m in self.inner.collect():
            yield with_labels(m, self.labels)


def with_labels(m: Metric, labels: Mapping[str, str]) -> Metric:
    """A copy of family ``m`` with ``labels`` on every sample."""
    out = Metric(m.name, m.documentation, m.type, m.unit)
    out.samples = [s._replace(labels={**s.labels, **labels}) for s in m.samples]
    return out


def serve(addr: str, source: MetricsSource,
          labels: Mapping[str, str] | None = None) -> tuple[Any, int, CollectorRegistry]:
    """Start the HTTP page on ``addr`` in a daemon thread: (server, bound port, registry).
    ``labels``: constant labels on every sample (:class:`LabelledCollector`).

    Stop it with ``server.shutdown(); server.server_close()``.
    """
    from prometheus_client import start_http_server

    host, port = parse_address(addr)
    registry = CollectorRegistry(auto_describe=False)
    col: Collector = RouterdCollector(source)
    registry.register(LabelledCollector(col, labels) if labels else col)
    server, _thread = start_http_server(port, addr=host, registry=registry)
    return server, int(server.server_address[1]), registry
