"""``routerd serve``: the daemon shell — sockets, journal, snapshots, metrics, signals.

Owns the event loop and nothing else: no learning logic (that is :mod:`routerd.core.engine`),
no ingest rules (:mod:`routerd.service.pipeline`), no message shapes (:mod:`routerd.io.wire`),
no file formats (:mod:`routerd.io.journal`), no metric names (:mod:`routerd.service.metrics`).
Time comes from the ``clock`` it is given (:mod:`routerd.io.clock`).  Must not import: the
simulator.

Theory of operation
-------------------
One thread runs one ``zmq.Poller`` over the work sockets (ingest ROUTER, optional PULL,
control REP), a monitor per listening socket (connections accepted and closed: the
connection cap of :mod:`routerd.service.listeners`) and a stop pipe (an inproc PAIR the signal
handlers write to).  The poll timeout is the time to the next deadline
(debounced decision, periodic publication, snapshot), so there are no sleeps.  One loop
iteration:

1. drain up to ``service.max_drain`` frames from the ingest sockets (with the journal
   writer thread, for at most :data:`INGEST_SLICE_S` per turn); hand each to the
   ingest pipeline (:mod:`routerd.service.pipeline`: decode, CURVE binding, storage
   state, duplicates, rate limits, rights, guards, engine — a pure object whose
   docstring is the theory of operation) with the clock's time, append the journal
   records it returns and take its counts;
2. group commit (policy ``batch``): one fsync covers everything appended so far, and an
   acknowledgement goes out only once the fsync covering its batch has returned — an ack
   always means "durably journaled".  The fsync goes to the journal writer thread
   (:class:`journal.Syncer`): the turn's answers wait in ``_pending`` tagged with the
   last record appended, the loop goes on (the next slice, decisions, tables: no fsync
   sits in front of them), and the thread's pipe wakes the poll when the fsync is done
   (``_synced`` → ``_release``, in arrival order).  Without the thread
   (``service.journal.sync_thread: false``), and for a turn whose control request
   wrote a record, the loop syncs itself.  Every answer waits, duplicates and errors
   included, so none can overtake the batch it answers for.  A failed fsync in the thread is a storage failure
   like any other: every waiting answer becomes ``unavailable``;
3. answer at most one control request (REP) — one that appended a record only after an
   fsync in the loop;
4. when tables are pending, ``service.debounce_s`` has passed since the last decision and
   the decision token bucket (``service.max_decisions_per_s``, a burst of 0.1 s worth) has
   a token, call :meth:`Engine.decide` (journaled as a ``tick`` so replay makes the same
   calls in the same places) and queue the nodes whose table changed; a batch (or a
   control ``link``) that changed a link's state is decided at once, past the debounce and
   the cap (its token is still taken, down to a debt of one burst, so the next ordinary
   decisions wait instead), and its links' source nodes lead the change queue: their
   tables are encoded on their own and sent before any other.  Every ``service.publish_interval_s``
   queue every node.  Changed tables go out first, then the interval round oldest first,
   for at most ``service.publish_budget_s`` per turn (a node queued twice goes out once,
   with its latest table), so a round of changes on a large network never holds ingest
   up for long.  A node's routes are encoded once per change from the engine's arrays
   (:meth:`Engine.table_arrays`, :class:`wire.TableCodec`) and the bytes reused for every
   send until its table changes again;
5. every ``service.snapshot_interval_s`` take a snapshot and, once it is durable, retire
   the journal segments it covers.

Snapshots.  An interval snapshot is written by a forked child (``service.
snapshot_background``): the loop commits the journal, notes the record number, and
forks — the child's copy-on-write memory *is* the engine at that record, so the loop only
waits for the fork (a few ms at 1,000 nodes) and goes on.  The child writes the temporary
file (:meth:`journal.SnapshotStore.write_file`, streamed from the arrays, fsynced) and
``os._exit``s; it touches no zmq object, logger or lock, runs no garbage collection and
has the default signal actions.  The loop polls for its end: exit 0 → rename into place,
fsync the directory, drop old snapshots, and only then retire journal segments; any other
end → the file is removed and the failure logged (the journal still has everything).  One
child at a time; one overdue for :data:`SNAPSHOT_CHILD_LIMIT_S` is killed.  The cost moves
to copy-on-write: pages the loop writes while the child runs are copied (at most the
engine's size, only under heavy ingest).  A control ``snapshot`` forks the same way; its
REP answer is held back (the socket takes no other request meanwhile) and sent when the
child's file is installed.  Shutdown, a request while a child is already running, and
hosts where fork is off or fails write in the loop (streamed, no full copy; the loop waits).

The live optimality gap (:mod:`routerd.service.optimum`, its own thread and child
process): the loop only hands it each accepted ``batch`` record (it counts the rows); its
thread takes ``self.lock`` briefly every ``engine.optimum.interval_s`` to copy the
published shares, and ``health``/the metrics page read its last result.  With
``engine.optimum.guide`` the loop's housekeeping applies a waiting result's splits
(:func:`journal.apply_guide`) and journals the ``guide`` record, like a ``tick``.

Start-up takes the config and topology the flags give, else the ones the state dir
recorded (:func:`statedir.choose`), restores the newest readable snapshot, then replays
the journal after it with :func:`journal.replay_into` — the same code path an offline
replay uses — so the state after a restart equals the state before it.  It records the
topology and config documents before the ``start`` record that names them.  The snapshot carries the engine settings in
force when it was taken and the duplicate windows, so neither is lost.

Storage faults.  A journal write or fsync that fails (disk full, I/O error) puts the
service *down*: the turn's answers become ``unavailable`` errors, the engine and the
duplicate windows are rebuilt read-only from the state directory (so they hold exactly
what is stored), nothing is decided, journaled or snapshotted, tables keep going out,
and every ``service.storage_retry_s`` the journal is reopened the way start-up opens it.
An acknowledgement therefore never covers a batch that is not in the journal.

Shutdown (SIGTERM, SIGINT): stop taking frames, answer the ones in hand, decide, write
the final snapshot, publish every table, close with a bounded linger, exit 0.  A watchdog
thread ends the process with status 1 if that takes longer than
``service.shutdown_timeout_s``.  SIGHUP re-reads the config file and applies the changed
tunables (:meth:`Config.tunable_diff`, :meth:`Engine.reconfigure`, journaled as a
``config`` record); a bad file is logged and the running config kept.
"""
from __future__ import annotations

import argparse
import contextlib
import dataclasses
import gc
import glob
import itertools
import math
import os
import signal
import sys
import threading
import time
import warnings
import zlib
from collections import OrderedDict, deque
from collections.abc import Iterable, Mapping
from dataclasses import asdict
from typing import Any

from routerd import __version__
from routerd.core import guards as _guards
from routerd.core import kernels as _kernels
from routerd.core import topology as _topology
from routerd.core.engine import Decision, Engine, EngineSettings
from routerd.core.errors import InputError, Problem
from routerd.io import clock as _clock
from routerd.io import config as _config
from routerd.io import journal as _journal
from routerd.io import security as _security
from routerd.io import statedir as _statedir
from routerd.io import wire
from routerd.io.cautions import CAUTIONS
from routerd.io.inputs import load_config, load_topology
from routerd.io.journal import engine_state as _engine_state
from routerd.io.logs import EventLog
from routerd.io.metricsaddr import page_url
from routerd.io.values import endpoint_problem

from . import dedup as _dedup
from . import listeners as _listeners
from . import optimum as _optimum
from . import pipeline as _pipeline
from .dedup import Dedup

# the ingest pipeline's reason sets and helpers, where callers have always found them
SERVICE_REASONS = _pipeline.SERVICE_REASONS
SERVICE_FRAME_ERRORS = _pipeline.SERVICE_FRAME_ERRORS
make_dedup = _pipeline.make_dedup
dedup_refusal = _pipeline.dedup_refusal
#: Frames up to this much above ``service.max_message_bytes`` are still read so they can
#: be answered ``oversized``; beyond it libzmq's MAXMSGSIZE cuts the peer off unanswered
#: (counted as a disconnect), so a hostile peer cannot make us buffer arbitrarily much.
OVERSIZE_ANSWER_SLACK = 1 << 20
#: Rejections remembered per deduplicated batch (a re-ack repeats at most this many).
DEDUP_REJECTIONS = _dedup.REJECTIONS_KEPT

#: With the journal writer thread: ingest work per loop turn before the turn's fsync is
#: handed to the thread (the next slice is taken while it runs) and housekeeping runs.
INGEST_SLICE_S = 0.002
#: Table entries (destinations) encoded ahead in one pass when tables are due.
TABLE_ENTRIES_AHEAD = 2048
#: Loop time per turn spent encoding a control ``tables`` reply (it is built over as many
#: turns as it takes; 100 nodes: 20-80 ms of encoding that held the loop in one turn).
TABLES_REPLY_SLICE_S = 0.004


@dataclasses.dataclass
class _TablesReply:
    """A control ``tables`` reply being encoded over loop turns: the REP socket owed it
    and the encoded (name, routes) pairs of nodes ``0 .. next - 1`` so far."""
    sock: Any
    parts: list[bytes] = dataclasses.field(default_factory=list)
    next: int = 0
#: The interpreter's thread switch interval while the journal writer thread runs.
SYNC_SWITCH_INTERVAL_S = 0.0005
#: A snapshot child still running after this long is killed (and its file removed).
SNAPSHOT_CHILD_LIMIT_S = 600.0
# routine decisions wait this long at most for a snapshot child to end (copy-on-write)
SNAPSHOT_DEFER_S = 1.0
#: while a snapshot child lives, the loop wakes at least this often to see it end
SNAPSHOT_POLL_S = 0.05
#: Exit statuses of the snapshot child.
SNAPSHOT_CHILD_EXITS = {1: "the child could not write the file (I/O error, disk full)",
                        2: "the child failed unexpectedly", -9: "killed (overdue)"}

class _Deferred(Exception):
    """A control request answered later (a snapshot being written by a child)."""


class StorageDown(Exception):
    """The journal cannot be written now; nothing may be acknowledged until it can."""


# ---- command line ------------------------------------------------------------------------
def configure(p: argparse.ArgumentParser) -> None:
    p.add_argument("--config", metavar="FILE", help="YAML config (sections topology, engine, "
                   "service, guards, security, shard, ...); every key: routerd validate --schema")
    p.add_argument("--topology", metavar="FILE", help="topology file or topohub:GROUP/NAME "
                   "(default: the one the state dir recorded, else the config's topology.file, "
                   "else the built-in demo lab)")
    p.add_argument("--ingest", metavar="EP", help="ingest endpoint, ROUTER (default tcp://127.0.0.1:7301)")
    p.add_argument("--pull", metavar="EP", help="fire-and-forget ingest endpoint, PULL (default: off)")
    p.add_argument("--publish", metavar="EP", help="tables endpoint, PUB (default tcp://127.0.0.1:7302)")
    p.add_argument("--control", metavar="EP", help="control endpoint, REP (default tcp://127.0.0.1:7303)")
    p.add_argument("--metrics", metavar="HOST:PORT", help="Prometheus page address (default "
                   "127.0.0.1:9307; port 0 picks a free one)")
    p.add_argument("--state-dir", metavar="DIR", help="journal and snapshots (default ./routerd-state)")
    p.add_argument("--server-key", metavar="FILE", help="CURVE on every ZeroMQ endpoint: the "
                   "service's secret key file (NAME.key_secret, from routerd keys); needs --allow")
    p.add_argument("--allow", metavar="FILE", help="allow file (YAML): reporter name -> public_key "
                   "and the nodes it may report for; needs --server-key")
    p.add_argument("--control-readonly", metavar="EP", help="a second control endpoint without "
                   "CURVE for read-only ops (tables, estimates, health, nodes); default: off")
    p.add_argument("--set", metavar="KEY=VALUE", action="append", default=[], dest="overrides",
                   help="override one config setting, e.g. --set engine.hysteresis.margin=0.1 "
                        "(repeatable; after --config and the flags)")


def choose_inputs(args: argparse.Namespace, docs_dir: str | None = None,
                  refs: _statedir.DocRefs | None = None,
                  journals: Iterable[str] | None = None) -> _statedir.Chosen:
    """Config and topology for ``serve`` on the state dir the flags name: the flags and
    files given, else what the state dir recorded (:func:`statedir.choose`).  ``docs_dir``:
    where the recorded documents are when not in the state dir itself (a shard's);
    ``refs``: which of them (default: its ``current.yaml``); ``journals``: the state dirs
    whose journals say which network the directory was written for (default: ``docs_dir``)."""
    root = load_config(args)["service.state_dir"]
    why = _statedir.unusable(root)
    if why is not None:    # before anything reads or writes there
        raise InputError(Problem("service.state_dir (--state-dir)", root, why))
    where = docs_dir or root
    dirs = list(journals) if journals is not None else [where]

    def written_for() -> str | None:
        return next((w for d in dirs if (w := _journal.written_for(_journal.journal_dir(d)))), None)

    if refs is None:
        # the pointer; a directory without one (it could not be written) from its records
        refs = _statedir.current(where) or _statedir.refs_in(
            _journal.iter_records(_journal.journal_dir(where), 0))
    return _statedir.choose(args, where, refs,
                            state_root=root, written_for=written_for,
                            load_config_fn=load_config, load_topology_fn=load_topology)


def run(args: argparse.Namespace) -> int:
    """One process (``routerd serve`` without ``--shards``/``--shard``: those go to
    :func:`routerd.service.shard.run`, chosen by :mod:`routerd.service.serve`)."""
    try:
        chosen = choose_inputs(args)
    except InputError as e:
        print(f"routerd serve: cannot start:\n{e}", file=sys.stderr)
        return 2
    svc = Service(chosen.cfg, chosen.topo, reload_args=args, inputs=chosen)
    try:
        svc.start()
    except StartError as e:
        print(f"routerd serve: cannot start: {e}", file=sys.stderr)
        svc.close()
        return 2
    return svc.serve()


class StartError(Exception):
    """The service cannot start (an endpoint in use, a state dir for another topology...)."""


def bind_endpoint(owner: Any, kind: int, name: str, ep: str, opts: _listeners.SocketOptions,
                  curve: tuple[bytes, bytes] | None = None) -> Any:
    """Bind one named endpoint of ``owner`` (a Service or the shard front: ``ctx``,
    ``log``, ``sockets``, ``endpoints``) with :func:`listeners.bind_socket`; a failure is
    a StartError naming the endpoint, a stale ipc file removed is logged."""
    import zmq

    try:
        s, note = _listeners.bind_socket(owner.ctx, kind, ep, opts, curve=curve)
    except zmq.ZMQError as e:
        raise StartError(f"{name} endpoint {ep}: {e.strerror}") from None
    except _listeners.EndpointInUse as e:
        raise StartError(f"{name} endpoint {e}") from None
    if note:
        owner.log.warning(note, endpoint=name)
    owner.sockets[name] = s
    owner.endpoints[name] = s.last_endpoint.decode()
    return s


# ---- security at start-up ------------------------------------------------------------
def load_security(cfg: Any, topo: Any, log: Any) -> tuple[Any, Any] | None:
    """The configured server key and allow file (``security.*``), checked before anything
    binds or is written — for the service and the shard front alike: ``(server keys,
    allow)``, or None when CURVE is off; a StartError naming the file and the fault; a
    warning logged once when an endpoint is reachable from other hosts."""
    try:
        loaded = _security.load_configured(cfg, topo)
    except InputError as e:
        raise StartError(f"security:\n{e}") from None
    if loaded is None:
        return None
    keys, allow, exposure = loaded
    if exposure:
        log.warning(exposure)   # once, at start-up
    return keys, allow


# ---- the service -------------------------------------------------------------------------
class Service:
    """One running daemon.  ``start()`` binds and restores, ``serve()`` loops until a
    stop signal and returns the exit status; ``request_stop()`` works from any thread."""

    def __init__(self, cfg: _config.Config, topo: _topology.Topology, *,
                 reload_args: argparse.Namespace | None = None, out: Any = None,
                 inputs: _statedir.Chosen | None = None, clock: _clock.Clock = _clock.SYSTEM):
        from . import metrics as _metrics

        # split mode above engine.split.max_nodes (and in a shard worker) runs greedy, said
        # in the banner and health; the state dir records the config as given
        self.cfg_given = cfg
        cfg, self.mode_note = self._fit_mode(cfg, topo.n)
        self.cfg = cfg
        #: every time the service reads (deadlines, the engine's and the journal's ``t``,
        #: the epoch); measured CPU durations use time.perf_counter
        self.clock = clock
        # decode, who, storage, duplicates, rate, rights, guards, engine: the engine, the
        # duplicate window, the guards, the allow list and the storage state live there
        self.pipeline = _pipeline.Pipeline(topo, cfg, timer=time.perf_counter)
        self.topo = topo
        self.reload_args = reload_args
        # where cfg and topo came from (banner), and the recorded config a reload re-reads
        # the flags on top of when no --config was given
        self.inputs = inputs
        self.documents = _statedir.DocRefs()   # what the newest start/config record names
        self.out = out or sys.stdout
        self.log = EventLog(cfg["service.log_format"], name="routerd.service")
        self.counters = _metrics.Counters(row_reasons=wire.REASONS + SERVICE_REASONS,
                                          frame_reasons=wire.FRAME_ERRORS + SERVICE_FRAME_ERRORS)
        self.server_keys: tuple[bytes, bytes] | None = None
        self.auth: Any = None
        self._turn_failed = False
        self._next_resume = 0.0
        self.storage_failures = 0
        self.storage_resumed = 0
        # engine + counters vs. the metrics thread; re-entrant: a control "snapshot" runs
        # under the loop's hold of it
        self.lock = threading.RLock()
        self.journal: Any = None
        self.snapshots: Any = None
        self.ctx: Any = None
        self.sockets: dict[str, Any] = {}
        self.endpoints: dict[str, str] = {}
        self.metrics_server: Any = None
        self.metrics_port: int | None = None
        self.epoch = clock.wall_ns()           # rises on every start: subscribers see a restart
        self.seq = [0] * topo.n
        self.started = clock.monotonic()
        self.last_snapshot_at: float | None = None
        self.last_snapshot_record: int | None = None
        self.restored: dict[str, Any] = {}
        self._pub_queue: OrderedDict[int, str] = OrderedDict()   # node → why it is due
        # nodes whose table changed: they go out before the interval round
        self._pub_changed: OrderedDict[int, str] = OrderedDict()
        # link sources at the head of _pub_changed: encoded and sent before any other table
        self._pub_lead: set[int] = set()
        self._pub_deferred = False      # the last turn's decision overran: it published none
        # a node's encoded routes (wire.table_routes) zlib-compressed, reused by the interval
        # rounds until it changes (see _publish)
        self._table_bytes: dict[int, bytes] = {}
        # due tables encoded ahead in one pass (_encode_ahead), as they are: taken by _publish
        self._ahead: dict[int, bytes] = {}
        # answers waiting for the writer thread's fsync: (record they wait for, socket, frames)
        self._pending: deque[tuple[int, Any, list[Any], int | None]] = deque()
        self._syncer: _journal.Syncer | None = None
        self._synced_upto = 0             # the last record made durable in the loop itself
        self._requested = 0               # the last record the writer thread was asked for
        self._decide_tokens = 1.0
        # source nodes of link rows since the last decision: decided without waiting for a
        # token (down to a debt of one burst) and their tables published first
        self._urgent: set[int] = set()
        self._tokens_at = -math.inf
        #: the longest loop turn (s): receive, pipeline, journal, answers, housekeeping
        self.max_turn_s = 0.0
        #: where the longest turn's time went: ingest (receive + pipeline + journal
        #: appends + control), commit (an fsync in the loop), answers, housekeeping
        #: (decisions, publishing, snapshots)
        self.max_turn_parts: dict[str, float] = {}
        self.max_turn_cpu_s = 0.0                      # the turn that took the most CPU
        self.max_turn_cpu_parts: dict[str, float] = {}
        self._touched = False
        self._last_decide = -math.inf
        # a whole decision's cost (Engine.decide with its key lane, the tick journaled, the
        # changes queued) as fixed seconds plus seconds per full-pass destination (EWMAs
        # that rise fast and fall slowly): sizes the limit that keeps a decision within
        # service.decide_budget_s (None: not measured yet)
        self._decide_cost: float | None = None
        self._decide_fixed = 0.0
        self._decide_max: tuple[float, int, int | None] = (0.0, 0, None)   # took, f, limit
        self._next_publish_all = 0.0
        self._next_snapshot = 0.0
        self._stop = False
        self._reload = False
        self._sig_tx: Any = None
        self._sig_rx: Any = None
        self._last_record = 0
        self._unsynced = False
        self._unsynced_since = 0.0
        # while the loop drains a socket: ingest's batch records are held by the journal
        # and written together when the drain ends (_flush_held: one write a turn)
        self._holding = False
        self.listeners: _listeners.Listeners | None = None
        self._next_gate_tick = 0.0
        self._snap_child: tuple[int, str, int, float] | None = None   # pid, tmp, record, start
        self._snap_cause = "interval"
        self._snap_reply: Any = None     # the control socket owed the answer to a "snapshot"
        self._tables_replies: list[_TablesReply] = []   # control "tables" replies being built
        self._house_parts: dict[str, float] = {}         # the last turn's housekeeping steps
        self.state_lock: _statedir.StateLock | None = None
        self.recovery: _journal.RecoveryReport | None = None   # what start-up recovery found
        self._snapshot_mark: int | None = None    # the last record when the last snapshot was noted
        self.optimum = _optimum.Optimum.for_service(self)   # the live optimality gap (its own thread)

    # -- the pipeline's state, as the rest of the service has always named it ----------
    @property
    def engine(self) -> Engine | None:
        return self.pipeline.engine

    @engine.setter
    def engine(self, engine: Engine | None) -> None:
        self.pipeline.engine = engine
        getattr(self, "_table_bytes", {}).clear()    # another engine: encode its tables afresh
        getattr(self, "_ahead", {}).clear()

    @property
    def dedup(self) -> Dedup:
        return self.pipeline.dedup

    def metrics_labels(self) -> dict[str, str]:
        """Constant labels on every series of the metrics page (a shard worker: its index)."""
        return {}

    def _fit_mode(self, cfg: _config.Config, n: int) -> tuple[_config.Config, str | None]:
        """The config this process runs (``config.split_fits``) and why it differs."""
        return _config.split_fits(cfg, n)

    def _engine_owned(self, settings: EngineSettings) -> Any:
        """The destinations the engine holds (``Engine(owned=)``): None, all of them; a
        shard worker its own."""
        return None

    @dedup.setter
    def dedup(self, dedup: Dedup) -> None:
        self.pipeline.dedup = dedup

    @property
    def guards(self) -> _guards.Guards:
        return self.pipeline.guards

    @property
    def allow(self) -> _security.Allow | None:
        """The allowed reporters: CURVE is on when set."""
        return self.pipeline.allow

    @allow.setter
    def allow(self, allow: _security.Allow | None) -> None:
        self.pipeline.allow = allow

    @property
    def _down(self) -> str | None:
        """Why the journal cannot be written (None: it can)."""
        return self.pipeline.down

    @_down.setter
    def _down(self, reason: str | None) -> None:
        self.pipeline.down = reason

    # -- metrics source -------------------------------------------------------------------
    def engine_statistics(self) -> Any:
        with self.lock:
            assert self.engine is not None
            return self.engine.statistics()

    def journal_bytes(self) -> int:
        j = self.journal
        return int(j.bytes_total) if j is not None else 0

    def snapshot_age_s(self) -> float | None:
        # wall clock: the newest snapshot may come from before this start (its file time)
        return None if self.last_snapshot_at is None else max(0.0, self.clock.wall() - self.last_snapshot_at)

    def trust_state(self) -> dict[str, float]:
        """Storage and guard figures for the metrics page."""
        return {"writable": 1.0 if self._down is None else 0.0,
                "failures": float(self.storage_failures), "clipped": float(self.guards.stats.clipped)}

    def dedup_state(self) -> dict[str, int]:
        """The duplicate window's size, bounds and evictions for the metrics page."""
        return self.dedup.statistics()

    def uptime_s(self) -> float:
        return self.clock.monotonic() - self.started

    def info(self) -> Mapping[str, str]:
        return {"version": __version__, "topology": self.topo.digest}

    # -- start-up -------------------------------------------------------------------------
    def start(self) -> None:
        import zmq

        from routerd.io.fsmode import private_dir

        from . import metrics as _metrics

        cfg = self.cfg
        if cfg["engine.kernels"] == "compiled" and not _kernels.available():
            raise StartError(_kernels.describe("compiled"))
        try:
            _metrics.parse_address(cfg["service.metrics"])   # before anything is written
        except ValueError as e:
            raise StartError(str(e)) from None
        self._load_security()
        self._warn_exposed()
        state_dir = cfg["service.state_dir"]
        try:
            self._claim_endpoints()    # before anything is written: a second service stops here
        except StartError as e:
            # the same endpoints and the same state dir: name the process that holds both
            held = _statedir.busy(state_dir)
            raise StartError(f"{e}; {held}" if held else str(e)) from None
        try:
            private_dir(state_dir)        # 0700 when created here (routerd.io.fsmode)
            # one writer per state dir, before anything in it is read or written
            self.state_lock = _statedir.StateLock(state_dir, self._lock_what()).acquire()
        except _statedir.StateDirBusy as e:
            raise StartError(str(e)) from None
        except OSError as e:
            raise StartError(f"state dir {state_dir}: {e.strerror}") from None
        self.restore(state_dir)
        _listeners.raise_nofile(self.log)
        self.ctx = zmq.Context()
        if self.allow is not None:
            # the ZAP handler must run before the first CURVE socket binds
            self.auth = _security.start_authenticator(self.ctx, self.allow)
        self._bind_all(zmq)
        self._start_metrics()
        self.optimum.start()
        self._cap_connections()
        self._install_signals()
        now = self.clock.monotonic()
        self._next_publish_all = now            # a fresh subscriber gets tables at once
        self._next_snapshot = now + cfg["service.snapshot_interval_s"]
        self._banner()
        if cfg["service.gc_freeze"]:
            # everything alive now (topology, engine arrays' owners, modules) lives as long
            # as the process: keep the collector from walking it on every generation-2 pass
            gc.collect()
            gc.freeze()

    def _lock_what(self) -> str:
        """What the lock file says holds the directory (shown to a second process)."""
        return "routerd serve"

    def _warn_exposed(self) -> None:
        """Endpoints other hosts can reach without CURVE: said at start-up (the defaults
        bind to loopback only)."""
        cfg = self.cfg
        open_eps = [] if self.allow is not None else [
            (k, cfg[f"service.{k}"]) for k in ("ingest", "pull", "publish", "control")]
        open_eps.append(("control-readonly", cfg["security.control_readonly"]))
        for name, ep in open_eps:
            # a malformed endpoint is not "reachable": it is refused (routerd.io.values)
            if endpoint_problem(ep) is None and _security.exposed(ep):
                self.log.warning("endpoint reachable from other hosts without CURVE: anyone "
                                 "there can use it (give --server-key and --allow, or bind "
                                 "to 127.0.0.1)", endpoint=name, address=ep)
        if _security.exposed("tcp://" + cfg["service.metrics"]):
            self.log.warning("metrics page reachable from other hosts (it reads, never "
                             "writes)", address=cfg["service.metrics"])

    def _load_security(self) -> None:
        """Key and allow file, checked before anything binds or is written."""
        loaded = load_security(self.cfg, self.topo, self.log)
        if loaded is not None:
            self.server_keys, self.allow = loaded

    def restore(self, state_dir: str | None = None) -> None:
        """Recover the state dir (:func:`journal.recover_state`: the newest intact snapshot,
        the journal checked against it, cuts applied), open the journal, then the snapshot
        plus the records recovery kept — :func:`journal.restore`, the offline path.  What
        :meth:`start` does before it binds anything (``state_dir``: default the config's);
        without sockets, :meth:`ingest` and :meth:`commit` then run the whole ingest path."""
        cfg = self.cfg
        state_dir = state_dir or cfg["service.state_dir"]
        want = EngineSettings.from_config(cfg)
        self.dedup = make_dedup(cfg)
        try:
            snaps = _journal.SnapshotStore(_journal.snapshot_dir(state_dir))
            # the one recovery procedure (replay runs the same one, read-only): the newest
            # intact snapshot, the journal checked against it, cuts and set-asides applied
            rec = _journal.recover_state(state_dir, apply=True)
        except OSError as e:
            raise StartError(f"state dir {state_dir}: {_os_reason(e)}") from None
        try:
            self.journal = _journal.Journal(
                _journal.journal_dir(state_dir), fsync=cfg["service.journal.fsync"],
                fsync_interval_s=cfg["service.journal.fsync_interval_s"],
                segment_bytes=cfg["service.journal.segment_bytes"], start_after=rec.report.base,
                recovery=rec.report)
        except OSError as e:
            raise StartError(f"journal in {state_dir}: {e}") from None
        self.recovery = rec.report
        for line in rec.report.lines()[1:]:
            self.log.warning("recovery", detail=line)
        try:
            r = _journal.restore(state_dir, self.topo, want, on_record=self._remember_record,
                                 recovery=rec, owned=self._engine_owned(want))
        except (ValueError, _journal.JournalError) as e:
            raise StartError(f"state dir {state_dir}: {e} (another topology needs another "
                             "--state-dir)") from None
        if r.snapshot_record:
            # the snapshot's windows first, then the tail's batches on top (on_record ran
            # before we got here, so put the tail back after the restore)
            tail = self.dedup
            self.dedup = make_dedup(cfg)
            self.dedup.restore(r.state.get("dedup", ()))
            self.dedup.restore(tail.export())
            self.restored["snapshot_record"] = r.snapshot_record
            self.last_snapshot_record = r.snapshot_record
            with contextlib.suppress(OSError, TypeError):
                self.last_snapshot_at = os.path.getmtime(os.path.join(
                    snaps.dir, rec.report.snapshot_file))   # type: ignore[arg-type]
        self.restored["replayed"] = r.replay.records
        self.snapshots = snaps
        self.engine = r.engine
        self._last_record = self.journal.last_record
        try:
            # the documents first, so the start record never names a missing one
            self.documents = _statedir.store(state_dir, self.topo, self.cfg_given)
        except OSError as e:
            raise StartError(f"state dir {state_dir}: recording the topology and config: "
                             f"{_os_reason(e)}") from None
        try:
            self._append("start", {"topology": self.topo.digest, "nodes": list(self.topo.nodes),
                                   "settings": asdict(r.engine.settings), "epoch": self.epoch,
                                   "documents": self.documents.body()})
            if r.engine.settings != want:
                self._reconfigure_engine(want)
            self.commit()
        except StorageDown as e:
            raise StartError(f"state dir {state_dir}: {e}") from None
        try:
            _statedir.set_current(state_dir, self.documents)
        except OSError as e:
            # the start record names the documents; without the pointer a start from the
            # directory alone reads them from the journal instead
            self.log.warning("cannot update the pointer to the recorded documents",
                             file=_statedir.CURRENT, reason=_os_reason(e))

    def _claim_endpoints(self) -> None:
        """Every ipc:// endpoint we will bind: refused when another process listens on its
        socket file (libzmq's bind would silently take the file over), a stale file from
        a crash removed (logged); one endpoint named twice is refused too."""
        cfg = self.cfg
        for name, ep, other in _config.endpoint_clashes(cfg):
            raise StartError(f"{name} endpoint {ep}: also given as the {other} endpoint")
        for name, key in _config.SERVICE_ENDPOINTS:
            if cfg[key]:
                self._claim(name, cfg[key])

    def _claim(self, name: str, ep: str) -> None:
        try:
            note = _listeners.claim_ipc(ep)
        except _listeners.EndpointInUse as e:
            raise StartError(f"{name} endpoint {e}") from None
        if note:
            self.log.warning(note, endpoint=name)

    def _bind_all(self, zmq: Any) -> None:
        cfg = self.cfg
        opts = _listeners.SocketOptions.from_config(cfg, slack=OVERSIZE_ANSWER_SLACK)

        def mk(kind: int, name: str, ep: str) -> Any:
            return bind_endpoint(self, kind, name, ep, opts,
                                 curve=self.server_keys if name != "control_ro" else None)

        mk(zmq.ROUTER, "ingest", cfg["service.ingest"])
        if cfg["service.pull"]:
            mk(zmq.PULL, "pull", cfg["service.pull"])
        mk(zmq.PUB, "publish", cfg["service.publish"])
        mk(zmq.REP, "control", cfg["service.control"])
        if cfg["security.control_readonly"]:
            mk(zmq.REP, "control_ro", cfg["security.control_readonly"])
        pipe = f"inproc://routerd-stop-{id(self)}"
        self._sig_rx = self.ctx.socket(zmq.PAIR)
        self._sig_rx.linger = 0
        self._sig_rx.bind(pipe)
        self._sig_tx = self.ctx.socket(zmq.PAIR)
        self._sig_tx.linger = 0
        self._sig_tx.sndhwm = 16
        self._sig_tx.connect(pipe)

    def _cap_connections(self) -> None:
        """The connection cap and a monitor on every listening socket (routerd.service.listeners)."""
        try:
            self.listeners = _listeners.Listeners.start(
                self.sockets, self.endpoints, self.cfg["service.max_connections"], self.log)
        except ValueError as e:
            raise StartError(str(e)) from None

    def connection_state(self) -> dict[str, Any]:
        """Connection figures for the metrics page and health."""
        lst = self.listeners
        return {} if lst is None else lst.figures()

    def _start_metrics(self) -> None:
        from . import metrics as _metrics

        addr = self.cfg["service.metrics"]
        try:
            self.metrics_server, self.metrics_port, _ = _metrics.serve(
                addr, self, labels=self.metrics_labels())
        except OSError as e:
            raise StartError(f"metrics address {addr}: {e.strerror or e}") from None
        self.endpoints["metrics"] = page_url(_metrics.parse_address(addr)[0], self.metrics_port)

    def _install_signals(self) -> None:
        if threading.current_thread() is not threading.main_thread():
            return  # embedded in a test thread: stop with request_stop()

        def on_signal(signum: int, _frame: Any) -> None:
            self._signal(signum)

        for s in (signal.SIGTERM, signal.SIGINT, signal.SIGHUP):
            signal.signal(s, on_signal)

    def _signal(self, signum: int) -> None:
        # runs in the main thread between bytecodes, never inside a call on _sig_tx
        import zmq

        try:
            self._sig_tx.send(bytes([signum]), zmq.NOBLOCK)
        except zmq.ZMQError:
            pass  # the pipe already holds unread signals: the loop will wake anyway

    def request_stop(self) -> None:
        """Ask the loop to stop (thread-safe: only sets a flag the loop reads each turn)."""
        self._stop = True

    def _mode_line(self) -> str:
        """The learning mode the engine runs, in one line (banner)."""
        cfg = self.cfg
        if cfg["engine.mode"] != "split":
            return "greedy: " + (self.mode_note or "one next hop per destination (engine.mode greedy)")
        opt = self.optimum
        guide = (f"guided by the optimum every {opt.interval:g} s"
                 if opt.enabled and opt.guide and opt.guide_off is None else "unguided")
        return f"split: shares by measured marginal delay, {guide}"

    def _banner(self) -> None:
        t = self.topo
        w = self.out
        na = "- (off)"
        lines = [
            (f"routerd {__version__}: serving topology {t.name!r} — {t.n} nodes, {t.n_links} "
             f"directed links (topology id {t.digest})"),
            f"  ingest   {self.endpoints['ingest']}   ROUTER: batches, each acknowledged once journaled",
            f"  pull     {self.endpoints.get('pull', na)}   PULL: the same batches, fire-and-forget",
            (f"  publish  {self.endpoints['publish']}   PUB: tables/<node>, on change and every "
             f"{self.cfg['service.publish_interval_s']:g} s"),
            (f"  control  {self.endpoints['control']}   REP: tables, estimates, health, nodes; "
             "snapshot, link, reload" + (" (control keys only)" if self.allow is not None else "")),
            *([(f"  control-readonly  {self.endpoints['control_ro']}   REP without CURVE: "
                f"{', '.join(_security.READ_OPS)}")] if "control_ro" in self.endpoints else []),
            (f"  security CURVE on every ZeroMQ endpoint; {len(self.allow)} keys allowed "
             f"({'; '.join(_security.describe(self.allow))})" if self.allow is not None
             else "  security off: any local peer may report (give --server-key and --allow)"),
            f"  metrics  {self.endpoints['metrics']}",
            f"  mode     {self._mode_line()}",
            f"  {_kernels.describe(self.cfg['engine.kernels'])}",
            f"  state    {os.path.abspath(self.cfg['service.state_dir'])}   (journal fsync: "
            f"{self.cfg['service.journal.fsync']}; "
            + (f"restored snapshot at record {self.restored['snapshot_record']}, "
               if "snapshot_record" in self.restored else "no snapshot, ")
            + f"{self.restored.get('replayed', 0)} journal records replayed)",
            *(f"  input    {line}" for line in (self.inputs.said if self.inputs else ())),
            *(f"  recovery {ln}" for ln in (self.recovery.lines()[1:] if self.recovery else [])),
            CAUTIONS,
            f"routerd: ready (pid {os.getpid()}, epoch {self.epoch})",
        ]
        try:
            print("\n".join(lines), file=w, flush=True)
        except (OSError, ValueError):
            pass
        self.log.info("started", topology=t.name, nodes=t.n, links=t.n_links, epoch=self.epoch,
                      kernels=_kernels.status(self.cfg["engine.kernels"])["path"],
                      **{k: v for k, v in self.endpoints.items()})

    # -- journal records (bodies are journal.py's; the service only fills them) ---------
    def _append(self, kind: str, body: Mapping[str, Any], hold: bool = False) -> None:
        # sync=False: the loop commits once per turn (group commit) before any ack;
        # hold: written with the others of the drain (_flush_held), before any commit
        if self.journal is None:
            raise StorageDown(self._down or "the journal is closed")
        try:
            self._last_record = self.journal.append(kind, body, sync=False, hold=hold)
        except (OSError, _journal.JournalError) as e:
            self._storage_failed(f"journal append: {_os_reason(e)}")
            raise StorageDown(self._down) from None
        if not self._unsynced:
            self._unsynced = True
            self._unsynced_since = self.clock.monotonic()

    def _journal_link(self, a: int, b: int, up: bool, t: float) -> None:
        self._append("link", {"from": a, "to": b, "up": up, "t": t})

    def _journal_tick(self, t: float, limit: int | None = None) -> None:
        # a bounded decision's limit: replay passes it back to Engine.decide
        self._append("tick", {"t": t} if limit is None else {"t": t, "limit": limit})

    def _journal_config(self) -> None:
        assert self.engine is not None
        self._append("config", {"settings": asdict(self.engine.settings),
                                "documents": {"config": self.documents.config} if self.documents.config else {}})

    def _remember_record(self, rec: Any) -> None:
        """Rebuild the duplicate windows from replayed batch records."""
        if rec.kind == "batch" and "ack" in rec.body:
            b, ack = rec.body, rec.body["ack"]
            # a stored reason this version no longer has is dropped, not fatal at start-up
            self.dedup.put(b["reporter"], b["batch"], ack.get("accepted", 0),
                           [x for x in ack.get("rejected", ()) if self.dedup.knows(str(x[1]))])

    def _flush_held(self) -> None:
        """Write the records the drain held (one write for all of them).  A failure is a
        storage failure: the engine goes back to what is stored and the turn's answers
        become ``unavailable`` (``_turn_failed``)."""
        j = self.journal
        if j is None or not j.held:
            return
        try:
            j.flush()
        except (OSError, _journal.JournalError) as e:
            self._storage_failed(f"journal append: {_os_reason(e)}")
            return
        self._last_record = j.last_record

    def commit(self) -> None:
        """Make this turn's appends durable as the fsync policy promises (group commit):
        ``batch`` — one fsync now; ``interval`` — once ``fsync_interval_s`` has passed since
        the first unsynced append (the poll wakes for it); ``never`` — the OS decides."""
        if self.journal is None:
            return
        self._flush_held()
        if self.journal is None:
            raise StorageDown(self._down or "the journal is closed")
        pol = self.journal.fsync
        if pol == "batch" and self._last_record <= self._durable():
            self._unsynced = False      # the writer thread (or an earlier commit) covered it
            return
        if not self._unsynced and pol != "batch":
            return
        try:
            if pol == "batch":
                self.journal.commit()
                self._synced_upto = self._last_record
                self.counters.fsyncs += 1
            elif pol == "interval":
                if not self.journal.maybe_sync():
                    return
                self.counters.fsyncs += 1
        except OSError as e:
            self._storage_failed(f"journal fsync: {_os_reason(e)}")
            raise StorageDown(self._down) from None
        self._unsynced = False
        self.counters.group_commits += 1

    # -- storage failures ----------------------------------------------------------------
    def _storage_failed(self, reason: str) -> None:
        """The journal could not be written: stop acknowledging, and put the engine back to
        what the journal holds (it may have applied a batch or a decision that is not
        stored).  :meth:`try_resume` reopens the journal every ``service.storage_retry_s``."""
        first = self._down is None
        self._stop_syncer()      # its pending answers are not known durable: unavailable
        self._synced_upto = 0
        self._down = reason
        self._turn_failed = True
        self._unsynced = False
        self.storage_failures += 1
        if first:
            self.log.error("storage failed: not acknowledging batches until the journal can be "
                           "written again", reason=reason,
                           state_dir=os.path.abspath(self.cfg["service.state_dir"]))
        j, self.journal = self.journal, None
        if j is not None:
            j.drop_held()       # records of a turn that will not be acknowledged
            try:
                j.close()
            except OSError:
                with contextlib.suppress(OSError):
                    os.close(j._fd)   # close without the sync that just failed
        self._rebuild_from_disk()
        self._next_resume = self.clock.monotonic() + self.cfg["service.storage_retry_s"]

    def _rebuild_from_disk(self) -> None:
        """Engine and duplicate windows from the state directory, read-only."""
        cfg = self.cfg
        fresh = make_dedup(cfg)
        old, self.dedup = self.dedup, fresh
        try:
            want = EngineSettings.from_config(cfg)
            r = _journal.restore(cfg["service.state_dir"], self.topo, want,
                                 on_record=self._remember_record,
                                 owned=self._engine_owned(want))
        except Exception as e:  # noqa: BLE001 - reading back failed too: keep what we have
            self.dedup = old
            self.log.error("storage: cannot read the state back; tables stay as they are",
                           error=f"{type(e).__name__}: {e}")
            return
        if r.snapshot_record:
            tail = self.dedup
            self.dedup = make_dedup(cfg)
            self.dedup.restore(r.state.get("dedup", ()))
            self.dedup.restore(tail.export())
        with self.lock:
            self.engine = r.engine

    def try_resume(self) -> None:
        """While storage is down: once ``service.storage_retry_s`` has passed on the clock
        since the failure (or the last try), reopen the journal the way start-up does."""
        if self._down is None or self.clock.monotonic() < self._next_resume:
            return
        reason, dedup = self._down, self.dedup
        self._down = None
        try:
            self.restore(self.cfg["service.state_dir"])
        except StartError as e:
            if self.journal is not None:
                with contextlib.suppress(OSError):
                    self.journal.close()
                self.journal = None
            if self._down is None:   # it failed before writing: the state in hand stands
                self._down, self.dedup = reason, dedup
            self._next_resume = self.clock.monotonic() + self.cfg["service.storage_retry_s"]
            self.log.warning("storage still unavailable", detail=str(e).replace("\n", "; "))
            return
        self.storage_resumed += 1
        self._touched = True
        self.log.info("storage back: acknowledging again", record=self._last_record,
                      replayed=self.restored.get("replayed", 0))

    def _unacknowledge(self, answer: bytes, batch: int | None) -> bytes:
        """This turn's answer when its commit failed: an ack becomes ``unavailable`` (the
        batch is in the journal file but not known durable: the reporter sends it again and
        gets it acknowledged as a duplicate once the journal syncs); errors stay."""
        try:
            if "error" in wire.decode_reply(answer):
                return answer
        except wire.BadReply:  # pragma: no cover - we encoded it ourselves
            pass
        return self._unavailable(batch)

    def _unavailable(self, batch: int | None = None) -> bytes:
        fed = _pipeline.unavailable(self._down, batch)
        self.counters.add(fed.counts)
        return fed.answer

    # -- the loop -------------------------------------------------------------------------
    def serve(self) -> int:
        import zmq

        poller = zmq.Poller()
        ingest = self.sockets["ingest"]
        pull = self.sockets.get("pull")
        control = self.sockets["control"]
        control_ro = self.sockets.get("control_ro")
        monitors = self.listeners.monitors() if self.listeners is not None else []
        for s in (ingest, pull, control, control_ro, self._sig_rx, *monitors):
            if s is not None:
                poller.register(s, zmq.POLLIN)
        wake: int | None = None
        try:
            while not self._stop:
                syncer = self._syncer_for_journal()
                if (syncer.wake_fd if syncer is not None else None) != wake:
                    if wake is not None:
                        poller.unregister(wake)
                    wake = syncer.wake_fd if syncer is not None else None
                    if wake is not None:
                        poller.register(wake, zmq.POLLIN)
                events = dict(poller.poll(self._timeout_ms()))
                t_turn = time.perf_counter()
                cpu_turn = time.thread_time()
                if wake is not None and wake in events:
                    self._synced(zmq)
                if self._sig_rx in events:
                    self._read_signals(zmq)
                if any(m in events for m in monitors):
                    self._read_monitor()
                if self._reload:
                    self._reload = False
                    self._do_reload()
                # (socket, reply parts, batch number, the last record appended when it
                # was answered: the record that must be durable before it goes out)
                acks: list[tuple[Any, list[Any], int | None, int]] = []
                reply: bytes | None = None
                reply_ro: bytes | None = None
                self._turn_failed = False
                t_in = time.perf_counter()
                with self.lock:
                    if ingest in events:
                        self._drain(zmq, ingest, "router", acks)
                    if pull is not None and pull in events:
                        self._drain(zmq, pull, "pull", None)
                    before_control = self._last_record
                    if control in events:
                        reply = self._control_one(zmq, control)
                    if control_ro is not None and control_ro in events:
                        reply_ro = self._control_one(zmq, control_ro, readonly=True)
                    control_wrote = self._last_record != before_control
                t_commit = time.perf_counter()
                syncer = self._syncer if self.journal is not None else None
                if syncer is not None and not self._turn_failed and not control_wrote \
                        and (self._unsynced or self._last_record > self._durable()):
                    # group commit in the writer thread: each answer waits for the fsync
                    # that covers the last record appended when it was answered (its own
                    # batch's, or the one before: nothing overtakes a batch it answers for)
                    # while the loop goes on (the next slice of frames, decisions, tables:
                    # none waits behind it).  A turn that appended nothing while a sync is
                    # still running waits for that sync too, never for one in the loop.
                    # (Asking for the sync after each batch instead of once a turn was
                    # tried: 2-2.5x the fsyncs, and the writer thread's GIL hand-offs
                    # cost more loop time a batch than the earlier start saved.)
                    self._pending.extend((tag, sk, parts, b) for sk, parts, b, tag in acks)
                    acks = []
                    if self._unsynced:
                        self._request_sync()
                else:
                    # group commit in the loop: one fsync (policy "batch") covers every batch
                    # of this turn (a control request that wrote a record is answered only
                    # once it is durable, and so is everything before it)
                    with contextlib.suppress(StorageDown):
                        self.commit()
                if self._turn_failed:
                    # something of this turn may not be stored: acknowledge none of it
                    self._fail_pending(zmq)
                    acks = [(sk, parts[:-1] + [self._unacknowledge(parts[-1], b)], b, tag)
                            for sk, parts, b, tag in acks]
                    if reply is not None:
                        reply = wire.encode_error(f"unavailable: the journal cannot be written "
                                                  f"({self._down})")
                t_ans = time.perf_counter()
                self._release(zmq)
                for sock, parts, _, _ in acks:
                    self._send_ack(zmq, sock, parts)
                if reply is not None:
                    control.send(reply)
                if reply_ro is not None and control_ro is not None:
                    control_ro.send(reply_ro)
                t_house = time.perf_counter()
                self._housekeeping()
                t_end = time.perf_counter()
                dt = t_end - t_turn
                # a turn's CPU time is at most its wall time: only a turn longer than the
                # longest CPU turn so far can set either record, and only then is the CPU
                # clock read (a system call that cost tens of us a turn under load here)
                if dt > self.max_turn_s or dt > self.max_turn_cpu_s:
                    cpu = time.thread_time() - cpu_turn
                    if dt > self.max_turn_s or cpu > self.max_turn_cpu_s:
                        # "cpu": the loop thread's own CPU time in the turn (the rest of the
                        # turn it waited: for a core, the GIL, the lock, the disk)
                        parts = {"signals": t_in - t_turn, "ingest": t_commit - t_in,
                                 "commit": t_ans - t_commit, "answers": t_house - t_ans,
                                 "housekeeping": t_end - t_house, "cpu": cpu,
                                 **{f"housekeeping.{k}": v for k, v in self._house_parts.items()}}
                        if dt > self.max_turn_s:
                            self.max_turn_s, self.max_turn_parts = dt, parts
                        if cpu > self.max_turn_cpu_s:
                            self.max_turn_cpu_s, self.max_turn_cpu_parts = cpu, parts
        except Exception as e:  # noqa: BLE001 - a bug of ours: say so loudly, keep the journal consistent
            import traceback

            self.log.error("internal error; stopping without a final snapshot (the journal "
                           "holds every acknowledged batch)", error=f"{type(e).__name__}: {e}",
                           traceback=traceback.format_exc().replace("\n", " | "))
            self.close()
            return 1
        return self._shutdown()

    # -- group commit in the writer thread (policy ``batch``) -----------------------------
    def _syncer_for_journal(self) -> _journal.Syncer | None:
        """The writer thread of the open journal (policy ``batch``; started on first use,
        and again after storage came back with a new journal), else None."""
        j = self.journal
        if self._syncer is not None and self._syncer.journal is not j:
            self._stop_syncer()
        if j is None or j.fsync != "batch" or not self.cfg["service.journal.sync_thread"]:
            return None
        if self._syncer is None:
            with contextlib.suppress(StorageDown):
                self.commit()          # the writer thread starts from a durable journal
            if self.journal is None:
                return None
            # the writer loop in C without the GIL where built, unless every reference
            # path was asked for (engine.kernels: reference)
            self._syncer = _journal.Syncer(
                self.journal, compiled=None if self.pipeline.kernels is not None else False)
            self._syncs_seen = 0
            # the writer thread needs the GIL for a few bytecodes after each fsync; with
            # the default 5 ms switch interval every acknowledgement could wait that long
            sys.setswitchinterval(min(sys.getswitchinterval(), SYNC_SWITCH_INTERVAL_S))
            self._requested = self._synced_upto = self.journal.last_record
        return self._syncer

    def _stop_syncer(self) -> None:
        syncer, self._syncer = self._syncer, None
        if syncer is not None:
            syncer.close()
            if syncer.error is None:
                self._synced_upto = max(self._synced_upto, syncer.durable)

    def _request_sync(self) -> None:
        assert self._syncer is not None
        self._flush_held()          # the thread syncs what is written
        if self._syncer is None:    # the write failed: storage is down
            return
        self._syncer.request(self._last_record)
        self._requested = self._last_record
        self._unsynced = False

    def _durable(self) -> int:
        syncer = self._syncer
        if syncer is not None and syncer.error is None:
            return max(self._synced_upto, syncer.durable)
        return self._synced_upto

    def _synced(self, zmq: Any) -> None:
        """The writer thread finished a sync (or failed one): release the answers it
        covers, or put the service down and answer them ``unavailable``."""
        syncer = self._syncer
        assert syncer is not None
        syncer.drain()
        done = syncer.syncs - getattr(self, "_syncs_seen", 0)
        self._syncs_seen = syncer.syncs
        self.counters.fsyncs += done
        self.counters.group_commits += done
        if syncer.error is not None:
            with self.lock:
                self._storage_failed(f"journal fsync: {_os_reason(syncer.error)}")
            self._fail_pending(zmq)
            return
        self._release(zmq)

    def _release(self, zmq: Any) -> None:
        """Send every waiting answer whose records are durable (in arrival order)."""
        q = self._pending
        if not q:
            return
        upto = self._durable()
        while q and q[0][0] <= upto:
            _, sock, parts, _ = q.popleft()
            self._send_ack(zmq, sock, parts)

    def _release_ready(self) -> None:
        """:meth:`_release` from inside housekeeping: answers whose fsync the writer thread
        finished meanwhile go out now, not after the rest of the turn (a decision, a round
        of tables); the wake pipe is drained when the loop polls again."""
        if self._pending and self._syncer is not None:
            import zmq

            self._release(zmq)

    def _fail_pending(self, zmq: Any) -> None:
        """Storage failed: no waiting answer is known durable; each becomes ``unavailable``
        (errors stay errors)."""
        q, self._pending = self._pending, deque()
        for _, sock, parts, b in q:
            self._send_ack(zmq, sock, parts[:-1] + [self._unacknowledge(parts[-1], b)])

    def _timeout_ms(self) -> int:
        now = self.clock.monotonic()
        if self._pub_queue or self._pub_changed or self._tables_replies:
            return 0          # tables still due: take what arrived, then publish more
        t = min(self._next_publish_all, self._next_snapshot)
        if self.listeners is not None and self.listeners.waiting():
            t = min(t, self._next_gate_tick)
        if self._snap_child is not None:
            t = min(t, now + SNAPSHOT_POLL_S)      # look for the snapshot child's end
        if self._touched:
            t = min(t, self._decision_at())
        if self._unsynced:
            t = min(t, self._unsynced_since + self.cfg["service.journal.fsync_interval_s"])
        return max(0, math.ceil((t - now) * 1000))

    def _read_signals(self, zmq: Any) -> None:
        while True:
            try:
                b = self._sig_rx.recv(zmq.NOBLOCK)
            except zmq.Again:
                return
            for signum in b:
                if signum == signal.SIGHUP:
                    self._reload = True
                else:
                    self.log.info("stopping", signal=signal.Signals(signum).name)
                    self._stop = True

    def _read_monitor(self) -> None:
        """Connection events: the cap's accounting (pause, resume, cut off), and the
        ingest disconnect count."""
        assert self.listeners is not None
        self.listeners.read()
        self.counters.ingest_disconnects = self.listeners.disconnects["ingest"]

    def _recv(self, zmq: Any, sock: Any, curve: bool) -> tuple[list[bytes], _security.Reporter | None]:
        """One waiting message (raises zmq.Again if none) and, under CURVE, the allowed
        reporter its ZAP User-Id belongs to (None for a key not in the allow file)."""
        if not curve:
            return recv_frames(zmq, sock), None
        return _security.recv_with_peer(sock, zmq.NOBLOCK, self.allow)

    def _drain(self, zmq: Any, sock: Any, name: str, acks: list[Any] | None) -> None:
        routed = acks is not None
        curve = self.allow is not None
        # with the writer thread, a turn takes a slice of INGEST_SLICE_S: its fsync then
        # runs while the loop takes the next slice, and decisions are not held up long
        end = time.perf_counter() + INGEST_SLICE_S if self._syncer is not None else math.inf
        self._holding = True
        try:
            self._drain_frames(zmq, sock, name, acks, routed, curve, end)
        finally:
            self._holding = False
            self._flush_held()

    def _drain_frames(self, zmq: Any, sock: Any, name: str, acks: list[Any] | None,
                      routed: bool, curve: bool, end: float) -> None:
        for _ in range(self.cfg["service.max_drain"]):
            if time.perf_counter() >= end:
                return
            try:
                parts, peer = self._recv(zmq, sock, curve)
            except zmq.Again:
                return
            self.counters.batches_by_socket[name] += 1
            env, body = self._envelope(*_pipeline.envelope(parts, routed))
            bno: int | None = None
            if len(body) != 1:
                fed = _pipeline.extra_frames(len(body))
                self.counters.add(fed.counts)
                out = fed.answer
            else:
                out, bno = self.ingest(body[0], peer)
            if acks is not None:
                acks.append((sock, env + [out], bno, self._last_record))

    def ingest(self, payload: bytes, peer: _security.Reporter | None = None
               ) -> tuple[bytes, int | None]:
        """One ingest frame through the pipeline (:mod:`routerd.service.pipeline`) at the
        clock's time, its records appended to the journal and its counts taken: its answer
        and batch number (None when unreadable).  The answer may go out only after
        :meth:`commit` (the loop's group commit); with no sockets, this is the whole ingest
        path (tests, the fuzzer)."""
        fed = self.pipeline.feed(payload, peer, self.clock.wall(), self.clock.monotonic())
        try:
            for kind, body in fed.records:
                # StorageDown here: the engine holds a batch the journal lacks — the
                # failure handler has already put the engine back to what is stored
                self._append(kind, body, self._holding)
        except StorageDown:
            return self._unavailable(fed.batch), fed.batch
        self.counters.add(fed.counts)
        if fed.touched:
            self._touched = True
            self._urgent.update(fed.urgent)
            if self.optimum.meter is not None:          # engine.optimum: count the demand
                for kind, body in fed.records:
                    if kind == "batch":
                        self.optimum.feed(body)
        return fed.answer, fed.batch

    def _envelope(self, env: list[bytes], body: list[bytes]) -> tuple[list[bytes], list[bytes]]:
        """Hook (routerd.service.shard's worker): move leading body frames into the reply envelope."""
        return env, body

    def _routes(self, x: int) -> dict[str, list[list[Any]]]:
        """Hook (routerd.service.shard's worker): the table of node x as published."""
        assert self.engine is not None
        return wire.routes_by_name(self.engine, x)

    def _encoded_routes(self, x: int) -> bytes:
        """x's table as published, encoded (:func:`wire.table_routes` bytes): from the
        engine's arrays (:class:`wire.TableCodec`) unless a subclass publishes other
        routes (the shard worker's :meth:`_routes`)."""
        if type(self)._routes is not Service._routes:
            return wire.table_routes(self._routes(x))
        eng = self.engine
        assert eng is not None
        codec = getattr(self, "_codec", None)
        if codec is None:
            codec = self._codec = wire.TableCodec(self.topo.nodes)
        return codec.routes(*eng.table_arrays(x))

    def _send_ack(self, zmq: Any, sock: Any, parts: list[Any]) -> None:
        try:
            send_frames(zmq, sock, parts)
        except zmq.ZMQError:  # EHOSTUNREACH (peer gone) or EAGAIN (its queue is full)
            self.counters.acks_undeliverable += 1

    # -- control --------------------------------------------------------------------------
    def _control_one(self, zmq: Any, sock: Any, readonly: bool = False) -> bytes | None:
        curve = self.allow is not None and not readonly
        try:
            parts, peer = self._recv(zmq, sock, curve)
        except zmq.Again:
            return None
        if len(parts) != 1:
            self.counters.control_request("other", False)
            return wire.encode_error(f"extra_frames: a control request is one frame, got {len(parts)}")
        req = wire.decode_control(parts[0], self.topo)
        if isinstance(req, wire.WireError):
            self.counters.control_request("other", False)
            return wire.encode_error(req.reason)
        op = req["op"]
        refused = _security.control_refusal(op, peer, curve=curve, readonly=readonly)
        if refused is not None:
            self.counters.control_request(op, False)
            return wire.encode_error(refused)
        if op == "tables" and self._tables_in_turns():
            # built over the next turns (a slice each), answered when whole
            self._tables_replies.append(_TablesReply(sock))
            self._tables_reply_work(TABLES_REPLY_SLICE_S)
            return None
        try:
            out = self._control(op, req)
        except _Deferred:
            self._snap_reply = sock
            return None
        except StorageDown as e:
            self.counters.control_request(op, False)
            return wire.encode_error(f"unavailable: the journal cannot be written ({e})")
        except StartError as e:  # an operation that failed for a reason we can state
            self.counters.control_request(op, False)
            return wire.encode_error(f"bad_request: {e}")
        self.counters.control_request(op, True)
        return wire.encode_reply(out)

    def _control(self, op: str, req: Mapping[str, Any]) -> dict[str, Any]:
        eng = self.engine
        assert eng is not None
        t = self.topo
        if op == "tables":
            return {"tables": wire.tables_by_name(eng)}
        if op == "estimates":
            return {"estimates": wire.estimates_by_name(eng, t.index[req["node"]])}
        if op == "nodes":
            out = wire.nodes_reply(t)
            out.pop("v", None)
            return out
        if op == "health":
            return self.health()
        if op == "snapshot":
            if self._snap_child is None and self._snapshot_background("request"):
                raise _Deferred()     # answered when the child is done (_answer_snapshot)
            rec = self._snapshot("request")
            return {"snapshot": {"record": rec}}
        if op == "reload":
            return {"reload": self._do_reload()}
        if op == "link":
            if self._down is not None:
                raise StorageDown(self._down)
            a, b = t.index[req["from"]], t.index[req["to"]]
            up = req["state"] == "up"
            now = self.clock.wall()
            changed = eng.set_link(a, b, up, now)
            if changed:
                self._journal_link(a, b, up, now)
                self._touched = True
                self._urgent.add(a)
            self.counters.link_reports_accepted += 1
            self.log.info("link override", link=f"{req['from']}->{req['to']}", state=req["state"],
                          changed=changed)
            return {"link": {"from": req["from"], "to": req["to"], "state": req["state"],
                             "changed": changed}}
        raise StartError(f"op {op!r} is not served")  # wire.decode_control admits only known ops

    def _tables_in_turns(self) -> bool:
        """Whether a ``tables`` reply can be encoded from the engine's arrays over several
        turns (a subclass with its own routes or its own ``tables`` answers in one go)."""
        cls = type(self)
        return cls._routes is Service._routes and cls._control is Service._control \
            and self.engine is not None

    def _tables_reply_work(self, budget_s: float) -> None:
        """Encode the waiting ``tables`` replies for about ``budget_s``, a pass of
        ``TABLE_ENTRIES_AHEAD`` entries at a time (:meth:`Engine.table_arrays_many`,
        :class:`wire.TableCodec`: the bytes published for the same tables), and send each
        one that is whole.  The bytes are those of ``wire.encode_reply({"tables":
        wire.tables_by_name(engine)})`` for the engine as it is when each node is encoded
        (every node's table is at least as new as the request; nodes encoded in later turns
        may be newer than earlier ones, as published tables are)."""
        import msgpack
        import zmq

        eng = self.engine
        if eng is None:
            return
        end = time.perf_counter() + budget_s
        n = self.topo.n
        want = max(1, TABLE_ENTRIES_AHEAD // max(1, n))
        codec = getattr(self, "_codec", None)
        if codec is None:
            codec = self._codec = wire.TableCodec(self.topo.nodes)
        names = getattr(self, "_packed_names", None)
        if names is None:
            names = self._packed_names = [msgpack.packb(nm) for nm in self.topo.nodes]
        while self._tables_replies:
            job = self._tables_replies[0]
            while job.next < n:
                xs = list(range(job.next, min(n, job.next + want)))
                enc = codec.routes_many(*eng.table_arrays_many(xs), len(xs))
                for x, b in zip(xs, enc):
                    job.parts += (names[x], b)
                job.next = xs[-1] + 1
                if time.perf_counter() >= end:
                    break
            if job.next < n:
                return
            self._tables_replies.pop(0)
            head = wire.encode_reply({"tables": {}})
            assert head.endswith(b"\x80")      # the empty map last: replaced by n entries
            body = b"".join((head[:-1], msgpack.Packer().pack_map_header(n), *job.parts))
            with contextlib.suppress(zmq.ZMQError):
                job.sock.send(body, zmq.NOBLOCK)
            self.counters.control_request("tables", True)
            if time.perf_counter() >= end:
                return

    def health(self) -> dict[str, Any]:
        c = self.counters
        st = self.engine.statistics() if self.engine is not None else None
        return {
            "status": "stopping" if self._stop else "degraded" if self._down is not None else "ok",
            "uptime_s": self.uptime_s(),
            "epoch": self.epoch,
            "version": __version__,
            "kernels": _kernels.status(self.cfg["engine.kernels"]),
            "mode": {"running": self.cfg["engine.mode"], "why": self.mode_note},
            "topology": {"name": self.topo.name, "id": self.topo.digest, "nodes": self.topo.n,
                         "links": self.topo.n_links},
            "counts": {
                "batches": dict(c.batches),
                "observations_accepted": c.observations_accepted,
                "observations_rejected": {k: v for k, v in c.observations_rejected.items() if v},
                "frames_refused": {k: v for k, v in c.refused.items() if v},
                "link_reports": c.link_reports_accepted,
                "publications": dict(c.publications),
                "engine_updates": st.updates if st else 0,
                "route_changes": st.route_changes if st else 0,
                "loops_prevented": st.loops_prevented if st else 0,
                "links_down": st.links_down if st else 0,
                "acks_undeliverable": c.acks_undeliverable,
                "dedup_entries": len(self.dedup),
            },
            "dedup": self.dedup.statistics(),
            "journal": {"bytes": self.journal_bytes(), "last_record": self._last_record,
                        "fsync": self.cfg["service.journal.fsync"]},
            "last_snapshot": None if self.last_snapshot_at is None else {
                "record": self.last_snapshot_record, "age_s": self.snapshot_age_s()},
            "restored": dict(self.restored),
            "recovery": None if self.recovery is None else self.recovery.as_dict(),
            "storage": {"ok": self._down is None, "reason": self._down,
                        "failures": self.storage_failures, "resumed": self.storage_resumed},
            "guards": {"rejected": dict(self.guards.stats.rejected),
                       "clipped": self.guards.stats.clipped,
                       "rate_limited_batches": self.guards.stats.rate_limited_batches,
                       "reporters_tracked": self.guards.reporters_tracked},
            "connections": self.connection_state(),
            "loop": {"max_turn_s": self.max_turn_s, "max_turn_parts_s": dict(self.max_turn_parts),
                     "max_turn_cpu_s": self.max_turn_cpu_s,
                     "max_turn_cpu_parts_s": dict(self.max_turn_cpu_parts),
                     "acks_waiting_fsync": len(self._pending),
                     # how decisions are sized to service.decide_budget_s, and the longest
                     "decide": {"cost_per_destination_s": self._decide_cost,
                                "fixed_s": self._decide_fixed,
                                "max_s": self._decide_max[0],
                                "max_destinations": self._decide_max[1],
                                "max_limit": self._decide_max[2]}},
            "optimum": self.optimum.health(),
            "security": {"curve": self.allow is not None,
                         "reporters": [] if self.allow is None else
                         [r.name for r in self.allow.reporters]},
        }

    # -- decisions, tables, snapshots ----------------------------------------------------
    def _housekeeping(self) -> None:
        parts = self._house_parts = {}
        t0 = time.perf_counter()
        self._housekeeping_steps(parts)
        parts["rest"] = time.perf_counter() - t0 - sum(parts.values())

    def _housekeeping_steps(self, parts: dict[str, float]) -> None:
        """Housekeeping's steps; ``parts`` gets the seconds of the ones that may take long
        (for health's ``loop.max_turn_parts_s``)."""
        now = self.clock.monotonic()
        cfg = self.cfg
        if self.listeners is not None and now >= self._next_gate_tick:
            self.listeners.tick()
            self._next_gate_tick = now + 1.0
        if self._tables_replies:
            t0 = time.perf_counter()
            self._tables_reply_work(TABLES_REPLY_SLICE_S)
            parts["tables_reply"] = time.perf_counter() - t0
        if self._down is not None:
            # no decisions (they would be journaled) and no snapshots; tables keep going out
            self.try_resume()
        if self._down is not None:
            if now >= self._next_publish_all:
                self._queue_publish(range(self.topo.n), "interval")
                self._next_publish_all = now + cfg["service.publish_interval_s"]
            if self._pub_queue or self._pub_changed:
                self._publish_due(cfg["service.publish_budget_s"])
            return
        if self.optimum.guide_due() and self.engine is not None:   # engine.optimum.guide
            with self.lock, contextlib.suppress(StorageDown):       # (a failure rebuilds the engine)
                body = self.optimum.take_guide(self.clock.wall())
                seeded = _journal.apply_guide(self.engine, body)
                self._append("guide", body)
                self.optimum.guided(seeded)    # counted once journaled (a failure rebuilds)
                self._touched = True
        overran = False
        if self._touched and self._decision_due(now):
            t0 = time.perf_counter()
            self._decide_and_publish(now)
            self._release_ready()
            parts["decide"] = took = time.perf_counter() - t0
            # a decision that overran its budget (a busy machine, or a link change deciding
            # everything) leaves this turn's publishing to the next turn, which comes at
            # once (tables due: no wait) after the frames that arrived meanwhile — except a
            # link's source tables, which lead; never two turns running (no starving)
            budget = cfg["service.decide_budget_s"]
            overran = 0 < budget < took and not self._pub_lead and not self._pub_deferred
        self._pub_deferred = overran
        if now >= self._next_publish_all:
            self._queue_publish(range(self.topo.n), "interval")
            self._next_publish_all = now + cfg["service.publish_interval_s"]
        if (self._pub_queue or self._pub_changed) and not overran:
            t0 = time.perf_counter()
            self._publish_due(cfg["service.publish_budget_s"])
            parts["publish"] = time.perf_counter() - t0
        if self._snap_child is not None:
            t0 = time.perf_counter()
            self._reap_snapshot()
            parts["snapshot_reap"] = time.perf_counter() - t0
        if now >= self._next_snapshot and self._down is None:
            if self._last_record != self._snapshot_mark:
                with contextlib.suppress(StartError, StorageDown):   # logged, retried next interval
                    if not self._snapshot_background():
                        self._snapshot("interval")
            self._next_snapshot = now + cfg["service.snapshot_interval_s"]

    def _decision_at(self) -> float:
        """When the next decision may run: ``service.debounce_s`` after the last one and,
        with ``service.max_decisions_per_s``, once a token is there (a bucket holding a
        tenth of a second's worth, at least one)."""
        cfg = self.cfg
        if self._urgent:
            # a link changed state: decided now, past the debounce and the cap (its token
            # is still taken, down to a debt of one burst: the next decisions wait instead)
            return -math.inf
        t = self._last_decide + cfg["service.debounce_s"]
        if self._snap_child is not None:
            # a snapshot child shares the engine's pages copy-on-write: a decision now pays
            # a page fault and copy for each page it writes first (a 1,000-node decision of
            # 23 destinations took 36-40 ms after the fork, 5-10 ms without), so routine
            # decisions wait for the child's end, at most SNAPSHOT_DEFER_S
            now = self.clock.monotonic()
            started = self._snap_child[3]
            if now < started + SNAPSHOT_DEFER_S:
                t = max(t, min(now + SNAPSHOT_POLL_S, started + SNAPSHOT_DEFER_S))
        rate = cfg["service.max_decisions_per_s"]
        if rate > 0:
            tokens = self._tokens(rate)
            if tokens < 1.0:
                t = max(t, self.clock.monotonic() + (1.0 - tokens) / rate)
        return t

    def _tokens(self, rate: float) -> float:
        now = self.clock.monotonic()
        burst = max(1.0, rate * 0.1)
        self._decide_tokens = min(burst, self._decide_tokens + (now - self._tokens_at) * rate) \
            if self._tokens_at > -math.inf else burst
        self._tokens_at = now
        return self._decide_tokens

    def _decision_due(self, now: float) -> bool:
        return now >= self._decision_at()

    def _decide_limit(self, eng: Any) -> int | None:
        """How many due destinations this decision may take (None: all) so that it fits
        ``service.decide_budget_s``, from the measured cost per destination (before any
        measurement, a guess of 20 ns per node and slot).  Link rows decide everything."""
        budget = self.cfg["service.decide_budget_s"]
        if budget <= 0 or self._urgent:
            return None
        cost = self._decide_cost if self._decide_cost is not None else 2e-8 * eng.n * eng.k
        # the key lane and the bookkeeping come first: the full pass gets what they leave
        room = budget - self._decide_fixed
        limit = max(1, int(room / max(cost, 1e-9))) if room > 0 else 1
        # no more due than that: no limit (and none journaled)
        return None if limit >= eng.pending() else limit

    def _decide_and_publish(self, now_mono: float, bounded: bool = True) -> None:
        eng = self.engine
        assert eng is not None
        limit = self._decide_limit(eng) if bounded else None
        with self.lock:
            t = self.clock.wall()
            f0, t0 = eng.full_pass_destinations, time.perf_counter()
            try:
                d = self._decide_in_parts(eng, t, limit, t0)
            except StorageDown:
                return   # the engine was put back to what is stored; decide again on resume
            f = eng.full_pass_destinations - f0
        self._touched = eng.pending() > 0     # a bounded decision left some for the next
        self._last_decide = now_mono
        rate = self.cfg["service.max_decisions_per_s"]
        if rate > 0:
            self._tokens(rate)
            self._decide_tokens = max(-max(1.0, rate * 0.1), self._decide_tokens - 1.0)
        urgent, self._urgent = self._urgent, set()
        if d.changed_nodes:
            for x in d.changed_nodes:
                self._table_bytes.pop(x, None)
                self._ahead.pop(x, None)
            first = sorted(urgent & d.changed_nodes)
            for x in first:       # a link's source goes to the front of the change queue
                self._pub_changed.pop(x, None)
            self._queue_publish(first, "change")
            for x in reversed(first):
                self._pub_changed.move_to_end(x, last=False)
            self._pub_lead = set(first)
            self._queue_publish(sorted(d.changed_nodes), "change")
        took = time.perf_counter() - t0
        if took > self._decide_max[0] and bounded:
            self._decide_max = (took, f, limit)
        self._decide_took(took, f)

    def _decide_in_parts(self, eng: Any, t: float, limit: int | None, t0: float) -> Any:
        """One decision at wall time ``t``, journaled.  A bounded one (``limit``) runs in up
        to four parts of ``limit / 4`` destinations, each an ``Engine.decide`` call with
        its own journaled tick (replay takes the same parts), and stops after the part
        that reaches ``service.decide_budget_s`` from ``t0``: the limit comes from the
        measured cost of a destination, which moved 3-4x between decisions of a loaded
        1,000-node service (90 destinations planned for 20 ms took 43-50 ms), so the
        clock, not the estimate alone, ends the decision: an overrun is at most one part.
        The key lane runs in the first part (its keys are then done)."""
        if limit is None or eng.settings.mode == "split":   # split takes every destination
            d = eng.decide(t, limit=limit)
            self._journal_tick(t, limit)
            return d
        end = t0 + self.cfg["service.decide_budget_s"]
        part = -(-limit // 4)
        nodes: set[int] = set()
        changes = prevented = taken = 0
        while True:
            k = min(part, limit - taken)
            d = eng.decide(t, limit=k)
            self._journal_tick(t, k)
            nodes |= d.changed_nodes
            changes += d.route_changes
            prevented += d.loops_prevented
            taken += k
            if taken >= limit or eng.pending() == 0 or time.perf_counter() >= end:
                break
        return Decision(frozenset(nodes), changes, prevented)

    def _decide_took(self, took: float, f: int) -> None:
        """Learn a whole decision's cost from one that took ``took`` seconds with ``f``
        full-pass destinations: the part not explained by ``f`` destinations at the current
        cost per destination is the fixed part (the key lane, which is never limited, the
        journal, the queueing); with 16 or more destinations, what is left after the fixed
        part (at least half) gives the cost of one.  Both take a dearer sample at once
        and fall slowly (an EWMA), so one cheap decision does not let the next overrun:
        under load the cost of a destination moved 2x between decisions, and going half
        way up let a 90-destination decision take 41 ms against its 20 ms."""
        def ewma(old: float | None, new: float) -> float:
            return new if old is None or new > old else 0.8 * old + 0.2 * new

        cost = self._decide_cost
        if f >= 16:        # enough destinations to measure the cost of one
            self._decide_cost = ewma(cost, max(took - self._decide_fixed, 0.5 * took) / f)
        if cost is not None:
            self._decide_fixed = ewma(self._decide_fixed, max(0.0, took - f * cost))

    def _queue_publish(self, nodes: Iterable[int], cause: str) -> None:
        """Mark tables due.  Changed tables go in their own queue, served before the
        interval round; a node already due keeps its place: it goes out once, with the
        table as it is when its turn comes (changes coalesce, memory stays <= 2n)."""
        if cause == "change":
            q = self._pub_changed
            for x in nodes:
                if x not in q:
                    q[x] = cause
                self._pub_queue.pop(x, None)    # the change round sends it now
            return
        q = self._pub_queue
        changed = self._pub_changed
        for x in nodes:
            if x not in q and x not in changed:
                q[x] = cause

    def _publish_due(self, budget_s: float) -> None:
        """Publish due tables, changed ones first, then the interval round oldest first,
        for at most ``budget_s`` this turn — so a big round cannot hold up ingest for longer
        than that."""
        end = time.perf_counter() + budget_s
        cache, ahead = self._table_bytes, self._ahead
        for q in (self._pub_changed, self._pub_queue):
            while q:
                nxt = next(iter(q))
                if nxt not in cache and nxt not in ahead:
                    self._encode_ahead()
                x, cause = q.popitem(last=False)
                self._publish((x,), cause)
                self._release_ready()
                if time.perf_counter() >= end:
                    return

    def _encode_ahead(self) -> None:
        """Encode the next due tables that have no bytes yet in one pass
        (:meth:`Engine.table_arrays_many`, :meth:`wire.TableCodec.routes_many`): about
        ``TABLE_ENTRIES_AHEAD`` entries' worth, in queue order, so a round of changes costs a
        few numpy calls instead of a few dozen per table."""
        if type(self)._routes is not Service._routes:
            return          # a subclass publishes other routes: table by table
        eng = self.engine
        assert eng is not None
        cache, ahead = self._table_bytes, self._ahead
        want = max(1, TABLE_ENTRIES_AHEAD // max(1, self.topo.n))
        lead = self._pub_lead
        if lead:
            # a link's source nodes lead the queue: encoded on their own, sent at once
            want = sum(1 for _ in itertools.takewhile(lead.__contains__, self._pub_changed))
            lead.clear()
        todo: list[int] = []
        for q in (self._pub_changed, self._pub_queue):
            for x in q:
                if x not in cache and x not in ahead:
                    todo.append(x)
                    if len(todo) >= want:
                        break
            if len(todo) >= want:
                break
        if len(todo) < 2:
            return          # one table: _publish encodes it as it goes (no extra pass)
        codec = getattr(self, "_codec", None)
        if codec is None:
            codec = self._codec = wire.TableCodec(self.topo.nodes)
        for x, b in zip(todo, codec.routes_many(*eng.table_arrays_many(todo), len(todo))):
            ahead[x] = b

    def _publish(self, nodes: Iterable[int], cause: str) -> None:
        import zmq

        eng = self.engine
        assert eng is not None
        pub = self.sockets["publish"]
        names = self.topo.nodes
        n = 0
        cache = self._table_bytes
        for x in nodes:
            self.seq[x] += 1
            packed = cache.get(x)
            if packed is not None:
                routes = zlib.decompress(packed)
            else:
                routes = self._ahead.pop(x, None)
                if routes is None:
                    routes = self._encoded_routes(x)
                if cause != "change":
                    # kept for the next interval rounds, compressed: at 1,000 nodes the
                    # tables took 34 MB as they are, 8 MB at zlib level 1 (0.35 ms a table
                    # to pack once, 0.15 ms to unpack against 0.5 ms to encode).  A changed
                    # table is not kept: under load the next decision changes it again
                    cache[x] = zlib.compress(routes, 1)
            frames = wire.table_message_encoded(names[x], self.seq[x], self.epoch, routes)
            try:
                send_frames(zmq, pub, frames)
            except zmq.Again:  # PUB drops rather than blocks; subscribers see the seq gap
                pass
            n += 1
        self.counters.publications[cause] += n

    def _snapshot_state(self) -> tuple[dict[str, Any], int]:
        """Commit, then the state to snapshot (the engine's own arrays, no copies) and the
        journal record it covers.  Consistent only until the loop changes the engine."""
        eng = self.engine
        assert eng is not None
        self.commit()
        return _engine_state(eng, copy=False, dedup=self.dedup.export()), self._last_record

    def _snapshot_background(self, cause: str = "interval") -> bool:
        """Start a snapshot in a forked child (see the module docstring); False when one
        cannot be started that way (then the caller writes it in the loop)."""
        if self._snap_child is not None:
            # one at a time: the running one covers this interval; a request wants a newer one
            return cause == "interval"
        if not (self.cfg["service.snapshot_background"] and hasattr(os, "fork")):
            return False
        if self._down is not None or self.journal is None:
            raise StorageDown(self._down or "the journal is closed")
        with self.lock:
            state, rec = self._snapshot_state()
            tmp = self.snapshots.prepare(rec)
            t0 = time.perf_counter()
            try:
                with warnings.catch_warnings():   # 3.12+: fork with threads; the child
                    warnings.simplefilter("ignore", DeprecationWarning)   # is safe, see below
                    pid = os.fork()
            except OSError as e:
                self.log.warning("snapshot: fork failed; writing it in the loop", reason=_os_reason(e))
                return False
            if pid == 0:   # pragma: no cover - the child (coverage does not follow os._exit)
                _snapshot_child(self.snapshots, tmp, state, rec)
            self.counters.snapshot_pause.observe(time.perf_counter() - t0)
        self._snap_child = (pid, tmp, rec, self.clock.monotonic())
        self._snap_cause = cause
        return True

    def _reap_snapshot(self, wait: bool = False) -> None:
        """A finished snapshot child: install its file and only then retire the journal
        segments it covers; a failed one is logged and its file removed (nothing lost)."""
        if self._snap_child is None:
            return
        pid, tmp, rec, started = self._snap_child
        done, status = os.waitpid(pid, 0 if wait else os.WNOHANG)
        if done == 0:
            if self.clock.monotonic() - started > SNAPSHOT_CHILD_LIMIT_S:
                os.kill(pid, signal.SIGKILL)
                os.waitpid(pid, 0)
                status = -1
                self.log.error("snapshot child overdue: killed", pid=pid,
                               limit_s=SNAPSHOT_CHILD_LIMIT_S)
            else:
                return
        self._snap_child = None
        cause = self._snap_cause
        code = os.waitstatus_to_exitcode(status) if status != -1 else -9
        why: str | None = None
        if code != 0:
            why = SNAPSHOT_CHILD_EXITS.get(code, f"child exit status {code}")
        elif self._down is not None or self.journal is None:
            why = f"the journal cannot be written ({self._down})"
        else:
            try:
                self.snapshots.trust(self.snapshots.install(tmp, rec))
            except OSError as e:
                why = _os_reason(e)
        if why is not None:
            with contextlib.suppress(OSError):
                os.unlink(tmp)
            self.log.error("snapshot failed; the journal keeps every record", cause=cause,
                           reason=why)
            self._answer_snapshot(wire.encode_error(f"bad_request: snapshot failed: {why}"), False)
            return
        self._snapshot_done(cause, rec)
        self._answer_snapshot(wire.encode_reply({"snapshot": {"record": rec}}), True)

    def _answer_snapshot(self, reply: bytes, ok: bool) -> None:
        """Send the answer a control ``snapshot`` request waited for (if one did)."""
        sock, self._snap_reply = self._snap_reply, None
        if sock is None:
            return
        import zmq

        self.counters.control_request("snapshot", ok)
        with contextlib.suppress(zmq.ZMQError):
            sock.send(reply, zmq.NOBLOCK)

    def _snapshot_done(self, cause: str, rec: int) -> None:
        self.last_snapshot_at = self.clock.wall()
        self.last_snapshot_record = rec
        # a note in the journal: the snapshots that exist now, so recovery can tell one
        # that goes missing later (a failure here is a storage failure, handled as one)
        with self.lock:
            self._append("snapshot", {"record": rec, "kept": [n for n, _ in self.snapshots.list()]})
            self.commit()
            self._snapshot_mark = self._last_record
        # retire only before the oldest intact kept snapshot (two at least): a newest one found bad
        # or deleted later still has a fallback with the journal after it
        if self.journal is not None:
            self.journal.retire_before(self.snapshots.retire_point())
        self.counters.snapshots[cause] += 1
        self.log.info("snapshot", cause=cause, record=rec, journal_bytes=self.journal_bytes())

    def _snapshot(self, cause: str) -> int:
        """A snapshot written in the loop (control ``snapshot``, shutdown, or when no child
        can be forked): streamed from the engine's arrays, durable when this returns."""
        eng = self.engine
        assert eng is not None
        if self._down is not None or self.journal is None:
            raise StorageDown(self._down or "the journal is closed")
        self._reap_snapshot(wait=True)     # a child still writing: let it finish first
        with self.lock:
            state, rec = self._snapshot_state()
            t0 = time.perf_counter()
            try:
                self.snapshots.trust(self.snapshots.write(state, rec))
            except OSError as e:
                # the journal still holds everything: a failed snapshot loses nothing
                for tmp in glob.glob(os.path.join(self.snapshots.dir, f".snap-*.tmp{os.getpid()}")):
                    with contextlib.suppress(OSError):
                        os.unlink(tmp)
                self.log.error("snapshot failed; the journal keeps every record", cause=cause,
                               reason=_os_reason(e))
                raise StartError(f"snapshot failed: {_os_reason(e)}") from None
            finally:
                self.counters.snapshot_pause.observe(time.perf_counter() - t0)
        self._snapshot_done(cause, rec)
        return rec

    # -- reload ---------------------------------------------------------------------------
    def _reconfigure_engine(self, settings: EngineSettings) -> None:
        assert self.engine is not None
        if self.journal is None:
            raise StorageDown(self._down or "the journal is closed")
        with self.lock:
            self.engine.reconfigure(settings)
            self._journal_config()
            self._touched = True

    def _effective(self, cfg: _config.Config) -> _config.Config:
        """The config this process runs with, given the one a reload read (a hook: a shard
        worker keeps the rate limits off); what the reload records."""
        return cfg

    def _do_reload(self) -> dict[str, Any]:
        """Re-read the config (SIGHUP, control ``reload``); what changed, or why not."""
        args = self.reload_args
        src = getattr(args, "config", None) if args is not None else None
        try:
            if args is None:
                raise InputError("the service was started without a command line to re-read")
            new = load_config(args, self.inputs.base if self.inputs is not None else None)
            # compared as this process would run it: a mode split_fits turned is no change
            tun, restart = self.cfg.tunable_diff(self._fit_mode(new, self.topo.n)[0])
            given = self._effective(self.cfg_given.with_overrides(tun, where=f"{src or 'defaults'} (reload)"))
            merged = self._fit_mode(given, self.topo.n)[0]
            settings = EngineSettings.from_config(merged)
        except (InputError, ValueError) as e:
            self.counters.reloads["rejected"] += 1
            self.log.error("reload rejected; keeping the running config", file=src,
                           reason=str(e).replace("\n", "; "))
            return {"applied": False, "reason": str(e)}
        assert self.engine is not None
        state_dir = self.cfg["service.state_dir"]
        prev = self.documents
        try:
            new_id = _statedir.store(state_dir, None, given).config
        except OSError as e:
            new_id = None   # the config record then names none: never the previous one
            self.log.error("reload: cannot record the new config document; the journal "
                           "keeps the engine settings", reason=_os_reason(e))
        docs = dataclasses.replace(prev, config=new_id)
        if settings != self.engine.settings or docs != prev:
            # a new effective config is a config record naming its document, even when
            # the engine settings are unchanged (replay makes the same reconfigure call)
            try:
                self.documents = docs
                self._reconfigure_engine(settings)
                self.commit()
            except StorageDown as e:
                self.documents = prev
                self.counters.reloads["rejected"] += 1
                self.log.error("reload not applied: the journal cannot be written", reason=str(e))
                return {"applied": False, "reason": f"unavailable: {e}"}
            with contextlib.suppress(OSError):   # the record names it; the pointer is a shortcut
                _statedir.set_current(state_dir, docs)
        self.cfg, self.cfg_given = merged, given
        self.pipeline.reconfigure(merged)
        self.counters.reloads["applied"] += 1
        self.log.info("reloaded", file=src, changed=",".join(sorted(tun)) or "-",
                      needs_restart=",".join(restart) or "-")
        return {"applied": True, "changed": sorted(tun), "needs_restart": list(restart)}

    # -- shutdown -------------------------------------------------------------------------
    def _shutdown(self) -> int:
        limit = self.cfg["service.shutdown_timeout_s"]
        dog = threading.Timer(limit, _overdue, args=(limit,))
        dog.daemon = True
        dog.start()
        try:
            self._flush_pending()
            if self._down is not None:
                self.log.warning("stopping while the journal cannot be written: no final "
                                 "snapshot; what is stored is what was acknowledged",
                                 reason=self._down)
            else:
                if self._touched:
                    self._decide_and_publish(self.clock.monotonic(), bounded=False)
                with contextlib.suppress(StartError, StorageDown):   # logged; the journal has it all
                    self._snapshot("shutdown")
            self._pub_queue.clear()
            self._publish(range(self.topo.n), "final")
            self._tables_reply_work(math.inf)     # a tables reply still being built
        finally:
            self.close()
            dog.cancel()
        self.log.info("stopped", record=self._last_record)
        return 0

    def _flush_pending(self) -> None:
        """At shutdown: make everything appended durable, then send the answers that
        waited for it (``unavailable`` if that fails)."""
        if not self._pending:
            return
        import zmq

        with contextlib.suppress(StorageDown):
            self.commit()
        if self._down is not None:
            self._fail_pending(zmq)
        self._release(zmq)

    def close(self) -> None:
        """Release everything (idempotent); queued replies get ``service.linger_s``."""
        self._stop_syncer()
        self.optimum.close()
        if self._snap_child is not None:     # an unfinished snapshot: never installed
            pid, tmp, _, _ = self._snap_child
            self._snap_child = None
            with contextlib.suppress(OSError):
                os.kill(pid, signal.SIGKILL)
                os.waitpid(pid, 0)
            with contextlib.suppress(OSError):
                os.unlink(tmp)
        if not hasattr(self, "listeners"):
            self.listeners = None
        _listeners.close_transport(self, (self._sig_tx, self._sig_rx))
        self._sig_tx = self._sig_rx = None
        if self.journal is not None:
            with contextlib.suppress(StorageDown):
                self.commit()
            j, self.journal = self.journal, None
            if j is not None:
                with contextlib.suppress(OSError):
                    j.close()
        if self.state_lock is not None:
            self.state_lock.release()
            self.state_lock = None


_FAST_IO: tuple[Any, Any, Any, int, int, int] | None = None


def _fast_io(zmq: Any) -> tuple[Any, Any, Any, int, int, int]:
    """The backend socket's ``send``, ``recv`` and ``get`` and the flags as plain ints
    (NOBLOCK, SNDMORE | NOBLOCK, RCVMORE): see :func:`send_frames`."""
    global _FAST_IO
    if _FAST_IO is None:
        b = zmq.backend.Socket
        nb = int(zmq.NOBLOCK)
        _FAST_IO = (b.send, b.recv, b.get, nb, int(zmq.SNDMORE) | nb, int(zmq.RCVMORE))
    return _FAST_IO


def send_frames(zmq: Any, sock: Any, parts: list[Any]) -> None:
    """``sock.send_multipart(parts, zmq.NOBLOCK)``, frame by frame through the backend
    socket with plain int flags: pyzmq's ``send_multipart`` combines its flag enums anew
    for every frame, which measured 18 us an acknowledgement here against 3 us.  Raises
    as ``send_multipart`` does (``zmq.Again``; ``EHOSTUNREACH`` on the first frame of a
    ROUTER's message to a peer that is gone: nothing of it was sent)."""
    send, _, _, nb, more, _ = _FAST_IO or _fast_io(zmq)
    # the backend's methods are called with the socket as ``self``: only ever a real
    # socket (a Cython method does not check the type of what it is given)
    if not isinstance(sock, zmq.backend.Socket):     # a stand-in (tests)
        sock.send_multipart(parts, nb)
        return
    last = len(parts) - 1
    for i in range(last):
        send(sock, parts[i], more)
    send(sock, parts[last], nb)


def recv_frames(zmq: Any, sock: Any) -> list[bytes]:
    """``sock.recv_multipart(zmq.NOBLOCK)`` through the backend socket with plain int
    flags (see :func:`send_frames`); ``zmq.Again`` when nothing waits."""
    _, recv, get, nb, _, rcvmore = _FAST_IO or _fast_io(zmq)
    if not isinstance(sock, zmq.backend.Socket):     # a stand-in (tests)
        return sock.recv_multipart(nb)
    parts = [recv(sock, nb)]
    while get(sock, rcvmore):
        parts.append(recv(sock, nb))
    return parts


def _snapshot_child(store: Any, tmp: str, state: Any, rec: int) -> None:
    """The forked snapshot child: write and fsync ``tmp`` from copy-on-write memory, then
    ``os._exit`` — never return into the service.  Only this thread exists here: it touches
    no zmq socket or context, no logger, no lock another thread may have held at the fork
    (the parent's threads are gone), and never runs the garbage collector (a collected
    zmq object would close a socket the parent still uses)."""
    code = 2
    try:
        gc.disable()
        for sig in (signal.SIGTERM, signal.SIGINT, signal.SIGHUP):
            signal.signal(sig, signal.SIG_DFL)   # not the parent's handlers (they write to zmq)
        store.write_file(tmp, state, rec)
        code = 0
    except OSError:
        code = 1
    except BaseException:  # noqa: BLE001 - anything at all: report by status, never return
        code = 2
    finally:
        os._exit(code)


def _os_reason(e: BaseException) -> str:
    """An OSError as its errno name and text (``ENOSPC: No space left on device``)."""
    import errno

    if isinstance(e, OSError) and e.errno is not None:
        return f"{errno.errorcode.get(e.errno, e.errno)}: {e.strerror}"
    return f"{type(e).__name__}: {e}"


def _overdue(limit: float) -> None:
    print(f"routerd serve: shutdown took longer than {limit:g} s; exiting now", file=sys.stderr, flush=True)
    os._exit(1)


