"""The one config module: schema, defaults, loading, overrides, checking.

Owns: every tunable of every command, as one declarative table (``SCHEMA``) of key path →
type, default, range, choices and a one-line meaning. Units are in the key names
(``_s``, ``_bps``, ``_pkts``). Errors name the file, the key path, the value and the rule,
e.g. ``configs/lab.yaml: engine.explore.max_rate: 1.4 is above 1.0``.

A config is a nested dict of plain values, frozen into a :class:`Config` that gives typed
access by path (``cfg["engine.step.alpha"]``) and sections as dicts.  ``tunable=True`` marks
keys that a running service may change on reload (SIGHUP) without a restart.

Must not import: sockets, zmq, prometheus, the engine or the simulator.
"""
from __future__ import annotations

import copy
import math
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import Any

from routerd.core.errors import ConfigError, Problem

from .files import parse_yaml, read_yaml
from .values import address_problem, as_number, endpoint_problem


@dataclass(frozen=True, slots=True)
class Field:
    kind: type | tuple[type, ...]
    default: Any
    doc: str
    lo: float | None = None
    hi: float | None = None
    lo_open: bool = False  # True: value must be > lo, not >= lo
    hi_open: bool = False
    choices: tuple[Any, ...] | None = None
    tunable: bool = False
    nullable: bool = False
    #: "path": a file or folder, relative to the config file that names it
    #: (routerd.io.inputs); "key": the same, or a Z85 key's text itself; "endpoint": a
    #: ZeroMQ endpoint; "address": HOST:PORT (routerd.io.values checks both)
    form: str | None = None


F = Field
SCHEMA: dict[str, Field] = {
    # -- topology --------------------------------------------------------------------
    "topology.file": F(str, None, "topology file or topohub:GROUP/NAME; none: the built-in demo lab", nullable=True, form="path"),
    "topology.default_capacity_bps": F(float, None, "capacity for links whose file gives none", lo=0, lo_open=True, nullable=True),
    "topology.default_buffer_pkts": F(int, None, "buffer for links whose file gives none", lo=1, nullable=True),
    # -- engine: step sizes --------------------------------------------------------------
    "engine.step.mode": F(str, "decaying", "constant: alpha; decaying: max(floor, c / n^kappa) per entry", choices=("constant", "decaying"), tunable=True),
    "engine.step.alpha": F(float, 0.5, "constant step size", lo=0, hi=1, lo_open=True, tunable=True),
    "engine.step.c": F(float, 1.0, "decaying step: scale c", lo=0, hi=1, lo_open=True, tunable=True),
    "engine.step.kappa": F(float, 0.6, "decaying step: exponent, in (1/2, 1] for Robbins-Monro", lo=0.5, hi=1, lo_open=True, tunable=True),
    "engine.step.floor": F(float, 0.05, "decaying step: lower bound (keeps tracking; 0 = pure Robbins-Monro)", lo=0, hi=1, tunable=True),
    # -- engine: values ----------------------------------------------------------------
    "engine.initial.mode": F(str, "shortest", "initial Q: delay-shortest distances or a constant", choices=("shortest", "constant")),
    "engine.initial.value_s": F(float, 0.1, "initial Q when mode is constant", lo=0),
    "engine.ceiling_s": F(float, 10.0, "estimate given to dead links; upper clip of every estimate", lo=0, lo_open=True, tunable=True),
    # -- engine: decisions -------------------------------------------------------------
    "engine.hysteresis.margin": F(float, 0.05, "a challenger must beat the incumbent by this fraction", lo=0, hi=1, hi_open=True, tunable=True),
    "engine.explore.basis": F(str, "td", "what sets each entry's exploration share: recent TD error or visit counts", choices=("td", "visits"), tunable=True),
    "engine.explore.min_rate": F(float, 0.0, "exploration share floor per (node, destination)", lo=0, hi=1, tunable=True),
    "engine.explore.max_rate": F(float, 0.1, "exploration share ceiling per (node, destination)", lo=0, hi=1, tunable=True),
    "engine.explore.cap": F(float, 0.2, "global cap: no share is ever above this", lo=0, hi=1, tunable=True),
    "engine.explore.td_ref": F(float, 0.2, "relative TD error (|delta| / estimate) at which the share reaches max_rate", lo=0, lo_open=True, tunable=True),
    "engine.explore.td_smoothing": F(float, 0.1, "weight of a new |TD error| in its moving average", lo=0, hi=1, lo_open=True, tunable=True),
    "engine.explore.visits_half": F(float, 50.0, "visits at which the share is halfway down to min_rate", lo=0, lo_open=True, tunable=True),
    # -- engine: implementation (routerd/core/kernels.py) -----------------------------------
    "engine.kernels": F(str, "auto", "hot paths: compiled kernels when built (auto), insist on them (compiled), or the numpy reference; the same results either way", choices=("auto", "compiled", "reference")),
    # -- engine: published refinements (routerd/core/variants.py) ---------------------------
    "engine.mode": F(str, "split", "learning mode: greedy (one next hop per destination, Q-routing with hysteresis and exploration) or split (shares over strictly downhill next hops moved by measured marginal delay; routerd/core/splitting.py)", choices=("greedy", "split")),
    "engine.split.max_nodes": F(int, 200, "split mode decides every destination at every decision, in time growing about as the square of the node count (measured: 5 ms at 100 nodes, 20 ms at 200, 50 ms at 300, 0.65 s at 1,000); on a network with more nodes than this the service, the simulator and the closed loop run greedy instead (the service says so at start-up and in health; shard workers always run greedy) (0 = no bound; engine.split.destinations_per_decision then bounds each decision's time)", lo=0),
    "engine.split.destinations_per_decision": F(int, 0, "split: how many destinations one decision takes, in turn (0 = all of them); each destination's share step covers the time since its own last step; after a link goes down the next decision also takes every destination with a share on it, after a link comes up every one with an unrouted key.  Bounds a decision's time (about proportional to this times the node count) at the price of each destination being stepped and republished less often: measured against mindelay in bench/reports/split_blocks.md", lo=0, tunable=True),
    "engine.split.step": F(float, 1.0, "split: fraction of the curvature-scaled (Newton) share step taken per rate window (scaled by the time since the last decision)", lo=0, hi=1, lo_open=True, tunable=True),
    "engine.split.max_step": F(float, 1.0, "split: most share one next hop gives up per rate window (scaled by the time since the last decision)", lo=0, hi=1, lo_open=True, tunable=True),
    "engine.split.publish_threshold": F(float, 0.02, "split: a key's table is republished only when one of its shares moved by more than this", lo=0, hi=1, hi_open=True, tunable=True),
    "engine.split.rate_window_s": F(float, 1.0, "split: time constant of the per-link rate and latency estimates and the per-key traffic rate", lo=0, lo_open=True, tunable=True),
    "engine.split.refresh": F(float, 0.5, "split: step of the per-decision refresh of every entry of a used link from its link latency plus the neighbour's published estimate", lo=0, hi=1, lo_open=True, tunable=True),
    "engine.split.prior_samples": F(float, 2.0, "split: weight (in samples) of a link's idle latency in its latency estimate", lo=0, lo_open=True, tunable=True),
    "engine.split.uphill_drain": F(float, 0.1, "split: least share an already-used next hop that is no longer downhill gives up per rate window, as a fraction of engine.split.max_step, while the neighbour it leads to would take the reverse next hop (it blocks that neighbour; 0: the gradient alone)", lo=0, hi=1, tunable=True),
    "engine.split.event_boost": F(float, 3.0, "split: the share step (and its bound) is multiplied by this right after any link goes down or up, decaying to 1 with time constant engine.split.event_boost_s, so shares leave a cut link's detour and return to a restored link sooner (1 = no boost)", lo=1, hi=100, tunable=True),
    "engine.split.rate_model": F(float, 0.97, "split: when above 0, a link's marginal cost uses the larger of its measured latency and the stationary M/M/1 latency of its measured rate on its known capacity (utilisation capped at this value), which answers a share change at once where the queue follows seconds later (0 = measured latency only)", lo=0, hi=1, hi_open=True, tunable=True),
    "engine.split.event_boost_s": F(float, 2.0, "split: time constant (s) of the decay of engine.split.event_boost", lo=0, lo_open=True, tunable=True),
    # -- engine: the live optimality gap (routerd/service/optimum.py) -----------------------
    "engine.optimum.interval_s": F(float, 2.0, "every this often the service runs flow deviation on the measured demand and live links in a child process and exports the model's optimal mean delay beside its delay of the published tables (0 = off)", lo=0),
    "engine.optimum.first_s": F(float, 0.5, "the optimiser's first run comes this long after the start (at most engine.optimum.interval_s; then every interval): with the guide, a cold start's first seconds are when a result helps most", lo=0),
    "engine.optimum.budget_s": F(float, 1.0, "most time one optimiser run may take; it then stops with the best routing so far and reports its gap", lo=0, lo_open=True),
    "engine.optimum.window_s": F(float, 10.0, "time constant of the measured demand and link rates the optimiser is fed", lo=0, lo_open=True),
    "engine.optimum.packet_bytes": F(float, 0.0, "mean packet size for the model (0 = estimated from the measured link latencies and rates, M/M/1 service time)", lo=0),
    "engine.optimum.guide": F(bool, True, "split mode: each optimiser result seeds the learner's shares (whole destinations, live links only, kept acyclic; journaled as a guide record, so replay reproduces it; the simulator runs the optimiser on simulated time)"),
    "engine.optimum.max_nodes": F(int, 300, "networks with more nodes get no optimum (its cost grows about as n^2 per iteration; measured in the README)", lo=2),
    "engine.variant": F(str, "plain", "learning rule: plain Q-routing, full_echo (all neighbours' estimates), predictive (recovery-rate prediction), dual (backward rows carried by packets), confidence (confidence-weighted steps)", choices=("plain", "full_echo", "predictive", "dual", "confidence")),
    "engine.full_echo.damping": F(float, 0.5, "full_echo: step multiplier of the echo updates of the hops not taken (1 = the published rule)", lo=0, hi=1, lo_open=True, tunable=True),
    "engine.full_echo.latency_smoothing": F(float, 0.2, "full_echo: weight of a new hop latency in a link's expected latency", lo=0, hi=1, lo_open=True, tunable=True),
    "engine.predictive.beta": F(float, 0.7, "predictive: learning rate of the recovery rate R", lo=0, hi=1, lo_open=True, tunable=True),
    "engine.predictive.gamma": F(float, 0.9, "predictive: decay of R when an estimate grows", lo=0, hi=1, tunable=True),
    "engine.confidence.decay": F(float, 0.9, "confidence: lambda, the factor an unused entry's confidence keeps per decay interval", lo=0, hi=1, lo_open=True, tunable=True),
    "engine.confidence.decay_interval_s": F(float, 1.0, "confidence: seconds per decay step", lo=0, lo_open=True, tunable=True),
    "engine.confidence.initial": F(float, 0.0, "confidence: the confidence of a starting estimate", lo=0, hi=1, tunable=True),
    "engine.confidence.min_step": F(float, 0.05, "confidence: floor of the step size max(C_new, 1 - C_old) (0 = the published rule)", lo=0, hi=1, tunable=True),
    # -- service -----------------------------------------------------------------------
    "service.ingest": F(str, "tcp://127.0.0.1:7301", "ingest endpoint (ROUTER)", form="endpoint"),
    "service.pull": F(str, None, "fire-and-forget ingest endpoint (PULL)", nullable=True, form="endpoint"),
    "service.publish": F(str, "tcp://127.0.0.1:7302", "tables endpoint (PUB)", form="endpoint"),
    "service.control": F(str, "tcp://127.0.0.1:7303", "control endpoint (REP)", form="endpoint"),
    "service.metrics": F(str, "127.0.0.1:9307", "metrics HTTP address HOST:PORT", form="address"),
    "service.state_dir": F(str, "./routerd-state", "journal and snapshots directory", form="path"),
    "service.publish_interval_s": F(float, 2.0, "every node's table is published at this interval", lo=0, lo_open=True, tunable=True),
    "service.debounce_s": F(float, 0.005, "least time between two decisions (changed tables go out after the next one), except after a batch or control link that changes a link's state, which is decided at once; with service.max_decisions_per_s it bounds how stale a published table can be", lo=0, tunable=True),
    "service.max_decisions_per_s": F(float, 20.0, "decisions (Engine.decide calls, each followed by the changed tables) per second at most, over a burst of a tenth of a second's worth, at least one (0 = no cap): under steady ingest the cost of deciding and publishing stays bounded while an idle service still answers a change within service.debounce_s; a batch that changes a link's state is decided at once (its token is borrowed, down to a debt of one burst)", lo=0, tunable=True),
    "service.decide_budget_s": F(float, 0.02, "time one decision may take: due destinations beyond what fits (by the measured cost per destination) are left to the next decisions, in turn (0 = no bound; a batch that changes a link's state, and shutdown, decide everything)", lo=0, tunable=True),
    "service.snapshot_interval_s": F(float, 60.0, "engine snapshot interval", lo=0, lo_open=True, tunable=True),
    "service.snapshot_background": F(bool, True, "write interval snapshots from a forked child (copy-on-write memory) while the loop goes on; false: written in the loop (it stalls for the write)"),
    "service.max_message_bytes": F(int, 16 * 1024 * 1024, "frames larger than this are refused", lo=1024),
    "service.log_format": F(str, "text", "log lines as plain text or JSON lines", choices=("text", "json")),
    "service.journal.fsync": F(str, "batch", "fsync the journal after each batch, every interval, or never", choices=("batch", "interval", "never")),
    "service.journal.sync_thread": F(bool, True, "with fsync 'batch': fsync in a writer thread (group commit) while the loop goes on receiving; acknowledgements still wait for the fsync that covers their batch (false: the loop fsyncs each turn itself)"),
    "service.journal.fsync_interval_s": F(float, 0.05, "fsync interval when fsync is 'interval'", lo=0, lo_open=True),
    "service.journal.segment_bytes": F(int, 64 * 1024 * 1024, "journal segment size before a new one starts", lo=4096),
    "service.hwm_msgs": F(int, 1000, "high-water mark of every socket, in messages (ingest: queued frames before the sender is held back; tables: dropped beyond it)", lo=1, hi=2**31 - 1),
    "service.linger_s": F(float, 1.0, "at shutdown, how long queued replies and final tables may still go out", lo=0),
    "service.heartbeat_s": F(float, 5.0, "ZMTP heartbeat interval; a peer silent for three intervals is dropped (0 = off)", lo=0),
    "service.max_rows": F(int, 262144, "rows (hops + links) taken in one batch; more is refused as too_many_rows", lo=1),
    "service.publish_budget_s": F(float, 0.005, "time per loop turn spent publishing due tables before ingest is served again (the rest go out next turn)", lo=0, lo_open=True, tunable=True),
    "service.max_drain": F(int, 256, "ingest frames taken per loop iteration: one journal group commit (one fsync) covers them all", lo=1),
    "service.dedup_batches": F(int, 1024, "batch numbers remembered per reporter to re-acknowledge a re-sent batch without applying it twice", lo=1),
    "service.dedup_reporters": F(int, 4096, "reporters remembered for duplicate detection (the least recently seen is forgotten first)", lo=1),
    "service.dedup_budget_bytes": F(int, 4 * 1024 * 1024, "bytes the duplicate window may hold (estimated; over it the least recently seen reporter's window goes first, counted in routerd_dedup_evictions_total); a batch that left the window is refused as stale_batch if re-sent, never applied twice", lo=4096),
    "service.dedup_marks_budget_bytes": F(int, 8 * 1024 * 1024, "bytes for the per-reporter high-water marks (one per reporter name ever seen, ~120 bytes + the name; never forgotten); when full, batches from new reporter names are refused as reporters_full", lo=4096),
    "service.shutdown_timeout_s": F(float, 10.0, "hard bound on a graceful shutdown (SIGTERM/SIGINT)", lo=0, lo_open=True),
    "service.max_connections": F(int, 0, "peer connections held at once over every listening endpoint (ingest, pull, publish, control); at the cap the endpoints stop listening until some close (connects are refused); 0 = derive from the descriptor limit (RLIMIT_NOFILE, raised to its hard limit at start-up)", lo=0),
    "service.gc_freeze": F(bool, True, "move every object alive after start-up out of the garbage collector's reach (gc.freeze)"),
    # -- simulator ---------------------------------------------------------------------
    "sim.decision_interval_s": F(float, 0.05, "virtual time between table recomputations (like the service's debounce)", lo=0, lo_open=True),
    "sim.executor": F(str, "local", "routerd sweep: where runs execute: a local process pool, or Dask (the routerd[cluster] extra; --scheduler ADDRESS, else a LocalCluster on this host)", choices=("local", "dask")),
    "sim.scheduler": F(str, None, "routerd sweep with the dask executor: the scheduler's address, e.g. tcp://HOST:8786 (none: start a LocalCluster)", nullable=True),
    "sim.ttl": F(int, 64, "packet TTL in hops", lo=1, hi=255),
    "sim.feedback": F(str, "delayed", "estimate returns after the link's propagation delay, or instantly", choices=("delayed", "instant")),
    "sim.series_interval_s": F(float, 1.0, "virtual time per row of the simulator's time series (CSV, plots)", lo=0, lo_open=True),
    "sim.flows_per_pair": F(int, 8, "flow ids per (source, destination) pair; ecmp hashes the flow id", lo=1),
    "sim.reroute.detect_s": F(float, 0.3, "reroute baseline: seconds from a link event until the routes are recomputed (failure detection, e.g. 3 probes missed at 100 ms)", lo=0),
    "sim.reroute.tick_s": F(float, 0.01, "reroute baseline: how often due link events are checked (the recomputation lands at the first check at or after the detection time)", lo=0, lo_open=True),
    "sim.estimate": F(str, "published", "qrouting: the estimate a node reports: the Q of the next hop it publishes, or the minimum over its live next hops (engine.estimate)", choices=("published", "min")),
    # -- simulator, closed loop (--policy service): sim/closedloop.py ----------------------
    "sim.service.speed": F(float, 1.0, "closed loop: virtual seconds per wall-clock second (1 = real time)", lo=0.01, hi=1000),
    "sim.service.estimate_nodes": F(int, 0, "closed loop: nodes whose estimates are fetched from the service per decision interval, round robin (0 = all)", lo=0),
    "sim.service.timeout_s": F(float, 5.0, "closed loop: how long to wait for the service's acknowledgements and control replies", lo=0, lo_open=True),
    "sim.service.client_key": F(str, None, "closed loop with a named CURVE service (--policy service:ENDPOINTS): the simulator's secret certificate NAME.key_secret; with sim.service.server_key", nullable=True, form="path"),
    "sim.service.server_key": F(str, None, "closed loop: the CURVE service's public key, its NAME.key file or the Z85 text", nullable=True, form="key"),
    "sim.service.reporter": F(str, None, "closed loop: reporter name in the batches; with CURVE its allow-file entry, which must list every node (default sim-PID-N)", nullable=True),
    # -- agent (routerd agent: one per overlay node) -------------------------------------
    "agent.underlay": F(str, None, "underlay map: the UDP address of each end of each overlay link (relative to the config file)", nullable=True, form="path"),
    "agent.local": F(str, "127.0.0.1:7400", "UDP HOST:PORT where local applications hand the agent overlay packets", form="address"),
    "agent.deliver": F(str, "127.0.0.1:7401", "UDP HOST:PORT the agent hands packets for its own node to", form="address"),
    "agent.metrics": F(str, "127.0.0.1:9308", "agent metrics HTTP address HOST:PORT (port 0: any free one)", form="address"),
    "agent.probe_interval_s": F(float, 0.1, "probe interval per link (hop latency and failure detection)", lo=0.001, hi=60),
    "agent.detect_multiplier": F(int, 3, "probes missed before a link is down: detection time = multiplier x interval (as in BFD, RFC 5880)", lo=1, hi=255),
    "agent.flowlet_gap_s": F(float, 0.05, "a flow idle this long may move to another next hop (flowlet pinning)", lo=0),
    "agent.latency": F(str, "two_way", "hop latency from probe timestamps: two_way (NTP-style, no clock sync needed) or one_way (needs synchronised clocks)", choices=("two_way", "one_way")),
    "agent.propagation": F(str, "none", "emulate: hold each received packet for its link's delay_s (for labs without netem)", choices=("none", "emulate")),
    "agent.report_interval_s": F(float, 0.25, "hop rows are handed to the service at least this often", lo=0.001, hi=60),
    "agent.report_batch_rows": F(int, 512, "rows per ingest batch", lo=1),
    "agent.report_buffer_rows": F(int, 100000, "rows kept while the service is unreachable (the oldest are dropped, counted)", lo=1),
    "agent.table_stale_s": F(float, 6.0, "no table and no acknowledgement for this long: the service counts as unreachable (the agent holds its last table)", lo=0, lo_open=True),
    "agent.hold_max_pkts": F(int, 100000, "packets held at once for emulated propagation (beyond: dropped, counted)", lo=1),
    "agent.seed": F(int, 0, "seed of the weighted next-hop choice (mixed with the node index)", lo=0),
    "agent.client_key": F(str, None, "the agent's CURVE secret certificate NAME.key_secret (relative to the config file); with agent.server_key: CURVE to a service started with --server-key", nullable=True, form="path"),
    "agent.server_key": F(str, None, "the service's CURVE public key: its NAME.key file (relative to the config file) or the Z85 text", nullable=True, form="key"),
    "agent.reporter": F(str, None, "reporter name in the agent's batches; with CURVE the agent's entry in the service's allow file (default agent/NODE)", nullable=True),
    # -- plausibility guards (routerd/core/guards.py), applied by the service before the engine --
    "guards.floor_fraction": F(float, 1.0, "a hop latency below this fraction of the link's propagation delay (or an estimate below it of the shortest propagation distance) is rejected as below_floor (0 = off)", lo=0, hi=1, tunable=True),
    "guards.ceiling_s": F(float, 60.0, "a hop latency or estimate above this is rejected as above_ceiling (0 = off)", lo=0, tunable=True),
    "guards.jump.factor": F(float, 0.0, "a latency outside [ref/f, ref*f] of the link's reference is clipped or held (0 = off; else > 1)", lo=0, tunable=True),
    "guards.jump.action": F(str, "hold", "a jump is clipped to the band edge, or held until jump.confirm samples on the same side confirm it", choices=("clip", "hold"), tunable=True),
    "guards.jump.confirm": F(int, 3, "out-of-band samples on one side that confirm a level shift (hold)", lo=1, tunable=True),
    "guards.jump.smoothing": F(float, 0.2, "weight of an accepted sample in the link's reference latency", lo=0, hi=1, lo_open=True, tunable=True),
    "guards.rate.batches_per_s": F(float, 0.0, "per-reporter token bucket: batches per second (0 = unlimited); excess batches are refused as rate_limited", lo=0, tunable=True),
    "guards.rate.burst_batches": F(float, 50.0, "per-reporter token bucket: batch burst", lo=1, tunable=True),
    "guards.rate.rows_per_s": F(float, 0.0, "per-reporter token bucket: rows per second (0 = unlimited)", lo=0, tunable=True),
    "guards.rate.burst_rows": F(float, 1.0e6, "per-reporter token bucket: row burst", lo=1, tunable=True),
    "guards.rate.max_reporters": F(int, 4096, "reporters with a token bucket (the least recently seen is forgotten first)", lo=1, tunable=True),
    # -- security (routerd/io/security.py): CURVE and reporter authorisation ------------------
    "security.server_key": F(str, None, "the service's CURVE secret certificate (NAME.key_secret from routerd keys); with security.allow: CURVE on every ZeroMQ endpoint", nullable=True, form="path"),
    "security.allow": F(str, None, "allow file (YAML): reporter name -> public_key (Z85 or a .key file) and nodes it may speak for", nullable=True, form="path"),
    "security.control_readonly": F(str, None, "a second control endpoint without CURVE serving read-only ops only (tables, estimates, health, nodes)", nullable=True, form="endpoint"),
    "service.storage_retry_s": F(float, 1.0, "after a journal write failed (disk full, unwritable), how often the service tries to resume", lo=0.01),
    # -- sharding by destination (routerd/service/shard.py: serve --shards N, --shard K/N) ---------
    "shard.map": F(str, None, "YAML map node -> shard index (nodes it does not name: crc32 of the name mod N); the front and every worker need the same one", nullable=True, form="path"),
    "shard.timeout_s": F(float, 30.0, "front: a batch whose pieces are not all acknowledged by then is answered unavailable (the reporter sends it again)", lo=0, lo_open=True),
    "shard.hello_interval_s": F(float, 1.0, "worker: how often it announces itself to the front (--upstream); 3 missed announcements count as down", lo=0.01),
    "shard.start_timeout_s": F(float, 60.0, "front: how long to wait for every worker's first announcement at start-up", lo=0, lo_open=True),
    "shard.restart_delay_s": F(float, 1.0, "front with local workers: a worker that exits is started again after this delay", lo=0),
    "shard.metrics_port_base": F(int, 0, "worker K serves its own metrics page (with a shard label) at the host of service.metrics, port base + K, unless --metrics is given; 0: the worker's own service.metrics (a front's local workers: any free port, listed by health)", lo=0, hi=65535),
    "shard.control_timeout_s": F(float, 5.0, "front: how long a control request waits for each worker", lo=0, lo_open=True),
}


def defaults() -> dict[str, Any]:
    """A fresh nested dict holding every default."""
    out: dict[str, Any] = {}
    for path, f in SCHEMA.items():
        _set(out, path, copy.deepcopy(f.default))
    return out


def _set(d: dict[str, Any], path: str, value: Any) -> None:
    parts = path.split(".")
    for p in parts[:-1]:
        d = d.setdefault(p, {})
    d[parts[-1]] = value


def _flatten(d: Mapping[str, Any], prefix: str = "") -> Iterable[tuple[str, Any]]:
    for k, v in d.items():
        path = f"{prefix}{k}"
        if isinstance(v, Mapping) and not any(s == path for s in SCHEMA):
            if not v and not any(s.startswith(path + ".") for s in SCHEMA):
                yield path, v
            yield from _flatten(v, path + ".")
        else:
            yield path, v


#: The largest whole number any setting takes: counts and sizes end up in C (ZeroMQ socket
#: options, deque lengths), where a larger one ended the command in an OverflowError.
INT_MAX = 2**62


def _bound(x: float) -> str:
    return str(x) if isinstance(x, int) else f"{x:g}"


def check_value(path: str, value: Any, where: str) -> tuple[Any, Problem | None]:
    """Coerce one value to its field's type, or say exactly what is wrong with it."""
    f = SCHEMA.get(path)
    loc = f"{where}: {path}"
    if f is None:
        inside = [s for s in SCHEMA if s.startswith(path + ".")]
        if inside:   # a section given a value: say so, not "not a known setting"
            more = ", ..." if len(inside) > 3 else ""
            return None, Problem(loc, value, f"must be a mapping: {path} is a section "
                                             f"({', '.join(inside[:3])}{more})")
        near = [s for s in SCHEMA if s.rsplit(".", 1)[-1] == path.rsplit(".", 1)[-1]]
        hint = f" (did you mean {near[0]}?)" if near else ""
        return None, Problem(loc, value, f"is not a known setting{hint}")
    if value is None:
        if f.nullable:
            return None, None
        return None, Problem(loc, value, "must be set")
    kinds = f.kind if isinstance(f.kind, tuple) else (f.kind,)
    v = value
    if float in kinds and isinstance(value, int) and not isinstance(value, bool):
        v = float(value)
    if float in kinds and isinstance(value, str) and as_number(value) is not None:
        v = float(as_number(value))  # type: ignore[arg-type]  # the one number rule
    if int in kinds and isinstance(value, float) and value.is_integer():
        v = int(value)
    if isinstance(v, bool) and bool not in kinds:
        return None, Problem(loc, value, f"must be {_kind_name(kinds)}, not true/false")
    if not isinstance(v, kinds):
        return None, Problem(loc, value, f"must be {_kind_name(kinds)}")
    if isinstance(v, float) and not math.isfinite(v):
        return None, Problem(loc, value, "must be a finite number")
    if isinstance(v, int) and not isinstance(v, bool) and abs(v) > INT_MAX and f.hi is None:
        return None, Problem(loc, value, f"is above {INT_MAX} (the largest whole number a setting takes)")
    if isinstance(v, str) and f.form in ("endpoint", "address"):
        why = (endpoint_problem if f.form == "endpoint" else address_problem)(v)
        if why is not None:
            return None, Problem(loc, value, why)
    if isinstance(v, str) and f.form in ("path", "key") and not v:
        return None, Problem(loc, value, "is empty (give a path, or null for none)")
    if f.choices is not None and v not in f.choices:
        return None, Problem(loc, value, f"is not one of {', '.join(map(str, f.choices))}")
    if f.lo is not None and isinstance(v, (int, float)):
        if v < f.lo or (f.lo_open and v == f.lo):
            return None, Problem(loc, value, f"is {'at or ' if f.lo_open and v == f.lo else ''}below {f.lo:g}" + (" (must be above it)" if f.lo_open else ""))
    if f.hi is not None and isinstance(v, (int, float)):
        if v > f.hi or (f.hi_open and v == f.hi):
            return None, Problem(loc, value, f"is {'at or ' if f.hi_open and v == f.hi else ''}above {_bound(f.hi)}" + (" (must be below it)" if f.hi_open else ""))
    return v, None


def _kind_name(kinds: tuple[type, ...]) -> str:
    names = {str: "a string", float: "a number", int: "a whole number", bool: "true or false"}
    return " or ".join(names.get(k, k.__name__) for k in kinds)


def _cross_checks(flat: dict[str, Any], where: str) -> list[Problem]:
    p: list[Problem] = []
    lo, hi, cap = flat["engine.explore.min_rate"], flat["engine.explore.max_rate"], flat["engine.explore.cap"]
    if lo > hi:
        p.append(Problem(f"{where}: engine.explore.min_rate", lo, f"is above engine.explore.max_rate ({hi})"))
    if hi > cap:
        p.append(Problem(f"{where}: engine.explore.max_rate", hi, f"is above the global cap engine.explore.cap ({cap})"))
    if flat["engine.initial.value_s"] > flat["engine.ceiling_s"]:
        p.append(Problem(f"{where}: engine.initial.value_s", flat["engine.initial.value_s"],
                         f"is above engine.ceiling_s ({flat['engine.ceiling_s']})"))
    from routerd.core.splitting import takes_variant   # here: numpy only when a config is checked
    if not takes_variant(flat["engine.mode"], flat["engine.variant"]):
        # the engine refuses the pair (routerd.core.splitting.problems): say so at load time,
        # with the way out, instead of a traceback when serve or simulate builds the engine
        p.append(Problem(f"{where}: engine.variant", flat["engine.variant"],
                         "is a greedy-mode rule: engine.mode split takes the plain rule only "
                         "(set engine.mode: greedy to run this variant)"))
    jf = flat["guards.jump.factor"]
    if 0 < jf <= 1:
        p.append(Problem(f"{where}: guards.jump.factor", jf, "must be 0 (off) or above 1"))
    return p


#: The endpoints a service binds, by the name its messages give them.
SERVICE_ENDPOINTS = (("ingest", "service.ingest"), ("pull", "service.pull"),
                     ("publish", "service.publish"), ("control", "service.control"),
                     ("control-readonly", "security.control_readonly"))


def split_fits(cfg: Config, n: int, shard_worker: bool = False) -> tuple[Config, str | None]:
    """The config a shell runs on a network of ``n`` nodes: ``engine.mode`` split turned
    to greedy above ``engine.split.max_nodes`` (a bound on split's decision time, see the
    key's help) and in a shard worker (its engine holds only its own destinations; split
    mode's state spans all of them), and the sentence that says so (None: unchanged)."""
    if cfg["engine.mode"] != "split":
        return cfg, None
    if shard_worker:
        why = ("a shard worker runs greedy: its engine holds only its own destinations' "
               "columns (1/N of the memory), and split mode's state spans every destination")
        return cfg.with_overrides({"engine.mode": "greedy"}, where="shard worker"), why
    cap = int(cfg["engine.split.max_nodes"])
    if cap <= 0 or n <= cap:
        return cfg, None
    why = (f"engine.mode split runs on networks of up to engine.split.max_nodes ({cap}) nodes; "
           f"this one has {n}: running greedy (split decides every destination at every decision, "
           f"in time growing as the square of the node count; set engine.split.max_nodes: 0 to run it anyway, "
           f"and engine.split.destinations_per_decision to bound each decision)")
    return cfg.with_overrides({"engine.mode": "greedy"}, where="engine.split.max_nodes"), why


def endpoint_clashes(cfg: Config) -> list[tuple[str, str, str]]:
    """``(name, endpoint, earlier name)`` for each endpoint a service would bind twice (a
    wildcard port ``*`` excepted): ``routerd serve`` refuses to start on them and
    ``routerd validate`` reports them."""
    seen: dict[str, str] = {}
    out = []
    for name, key in SERVICE_ENDPOINTS:
        ep = cfg[key]
        if not ep:
            continue
        if ep in seen and "*" not in ep:
            out.append((name, ep, seen[ep]))
        else:
            seen[ep] = name
    return out


class Config:
    """A checked, immutable config. ``cfg["a.b.c"]`` gives one value; ``cfg.section("a.b")`` a dict."""

    __slots__ = ("_flat", "source", "given")

    def __init__(self, flat: Mapping[str, Any], source: str = "<defaults>",
                 given: Iterable[str] = ()):
        self._flat = dict(flat)
        self.source = source
        #: the keys the source file itself set (its paths resolve against its folder)
        self.given: frozenset[str] = frozenset(given)

    def __getitem__(self, path: str) -> Any:
        return self._flat[path]

    def get(self, path: str, default: Any = None) -> Any:
        return self._flat.get(path, default)

    def section(self, prefix: str) -> dict[str, Any]:
        n = len(prefix) + 1
        return {k[n:]: v for k, v in self._flat.items() if k.startswith(prefix + ".")}

    def flat(self) -> dict[str, Any]:
        return dict(self._flat)

    def nested(self) -> dict[str, Any]:
        out: dict[str, Any] = {}
        for k, v in self._flat.items():
            _set(out, k, v)
        return out

    def with_overrides(self, overrides: Mapping[str, Any], where: str = "override") -> Config:
        return from_mapping_flat({**self._flat, **overrides}, where, base=None)

    def tunable_diff(self, other: Config) -> tuple[dict[str, Any], list[str]]:
        """(changed tunable keys → new value, changed keys that need a restart)."""
        changed = {k: other[k] for k in SCHEMA if self._flat.get(k) != other.get(k)}
        tun = {k: v for k, v in changed.items() if SCHEMA[k].tunable}
        return tun, sorted(k for k in changed if not SCHEMA[k].tunable)

    def __eq__(self, other: object) -> bool:
        return isinstance(other, Config) and other._flat == self._flat

    def __repr__(self) -> str:
        return f"Config(source={self.source!r})"


def from_mapping_flat(flat_in: Mapping[str, Any], where: str, base: Config | None) -> Config:
    flat = dict(base.flat()) if base is not None else {k: f.default for k, f in SCHEMA.items()}
    problems: list[Problem] = []
    for k, v in flat_in.items():
        cv, prob = check_value(k, v, where)
        if prob:
            problems.append(prob)
        else:
            flat[k] = cv
    if not problems:
        problems += _cross_checks(flat, where)
    if problems:
        raise ConfigError(problems)
    return Config(flat, where)


def from_mapping(doc: Any, where: str = "<mapping>", base: Config | None = None) -> Config:
    """Check a nested mapping (a parsed YAML file) against the schema."""
    if doc is None:
        doc = {}
    if not isinstance(doc, Mapping):
        raise ConfigError(Problem(where, type(doc).__name__, "must be a mapping of sections"))
    flat = dict(_flatten(doc))
    cfg = from_mapping_flat(flat, where, base)
    return Config(cfg.flat(), where, given=flat)


def load(path: str | Mapping[str, Any] | None = None, overrides: Iterable[str] = ()) -> Config:
    """Load a YAML config file (or the defaults) and apply ``KEY=VALUE`` overrides.  A
    mapping in place of the path is the file's parsed document (a sweep's spec carries its
    config inline, so it runs on a host without the file).

    Paths stay as written: commands read configs through :func:`routerd.io.inputs.
    load_config`, which resolves them against the config file's folder."""
    cfg = Config({k: f.default for k, f in SCHEMA.items()})
    if isinstance(path, Mapping):
        cfg = from_mapping(path, "<inline config>")
        path = "<inline config>"
    elif path is not None:
        doc = read_yaml(path, ConfigError)
        if doc is None:
            # a truncated or wrong file would otherwise run on the defaults unnoticed
            raise ConfigError(Problem(path, None, "is empty: a config file names at least one "
                                      "section (for the defaults, give no config)"))
        cfg = from_mapping(doc, path)
    ov = parse_overrides(overrides)
    if ov:
        cfg = from_mapping_flat(ov, (path or "defaults") + " + --set", base=cfg)
    return cfg


def parse_overrides(items: Iterable[str]) -> dict[str, Any]:
    """``--set KEY=VALUE`` items → {key: value} (YAML scalar rules), unchecked against the
    schema; ConfigError for every item that is not ``KEY=VALUE``."""
    ov: dict[str, Any] = {}
    problems: list[Problem] = []
    for item in items:
        if "=" not in item:
            problems.append(Problem("--set", item, "must look like KEY=VALUE"))
            continue
        k, raw = item.split("=", 1)
        ov[k.strip()] = parse_scalar(raw)
    if problems:
        raise ConfigError(problems)
    return ov


def parse_scalar(raw: str) -> Any:
    """A --set value: YAML scalar rules (numbers, true/false, null, strings)."""
    import yaml

    try:
        return parse_yaml(raw)
    except yaml.YAMLError:
        return raw


def describe() -> str:
    """Every setting with its default and meaning, for ``routerd validate --schema``."""
    lines = []
    for k, f in SCHEMA.items():
        rng = ""
        if f.choices:
            rng = " {" + "|".join(map(str, f.choices)) + "}"
        elif f.lo is not None or f.hi is not None:
            lo = "-inf" if f.lo is None else f"{f.lo:g}"
            hi = "inf" if f.hi is None else _bound(f.hi)
            rng = f" {'(' if f.lo_open else '['}{lo}, {hi}{')' if f.hi_open else ']'}"
        tun = " (reloadable)" if f.tunable else ""
        if f.form in ("path", "key"):
            tun += " (relative to the config file)"
        lines.append(f"{k} = {f.default!r}{rng}{tun}\n    {f.doc}")
    return "\n".join(lines)
