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

1. drain up to ``service.max_drain`` frames from the ingest sockets; hand each to the
   ingest pipeline (:mod:`routerd.service.pipeline`: decode, CURVE binding, storage
   state, duplicates, rate limits, rights, guards, engine — a pure object whose
   docstring is the theory of operation) with the clock's time, append the journal
   records it returns and take its counts;
2. group commit: one :meth:`Journal.flush_sync` (one fsync) for everything appended,
   *then* send every acknowledgement — an ack always means "durably journaled";
3. answer at most one control request (REP) — state-changing ones after step 2's commit;
4. when tables are pending and ``service.debounce_s`` has passed since the last decision,
   call :meth:`Engine.decide` (journaled as a ``tick`` so replay makes the same calls in
   the same places) and queue the nodes whose table changed; every
   ``service.publish_interval_s`` queue every node.  Queued tables go out oldest first
   for at most ``service.publish_budget_s`` per turn (a node queued twice goes out once,
   with its latest table), so a round of changes on a large network never holds ingest
   up for long;
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
import math
import os
import signal
import sys
import threading
import time
import warnings
from collections import OrderedDict
from collections.abc import Iterable, Mapping
from dataclasses import asdict
from typing import Any


from routerd import __version__
from routerd.io import wire
from routerd.io import config as _config
from routerd.core import guards as _guards
from routerd.core import kernels as _kernels
from routerd.io import journal as _journal
from routerd.io.logs import EventLog
from routerd.io.metricsaddr import page_url
from . import listeners as _listeners
from routerd.io import security as _security
from routerd.io import statedir as _statedir
from routerd.core import topology as _topology
from routerd.io.inputs import load_config, load_topology
from routerd.io.values import endpoint_problem
from . import dedup as _dedup
from . import pipeline as _pipeline
from routerd.io import clock as _clock
from routerd.io.cautions import CAUTIONS
from .dedup import Dedup
from routerd.core.engine import Engine, EngineSettings
from routerd.core.errors import InputError, Problem
from routerd.io.journal import engine_state as _engine_state

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

#: A snapshot child still running after this long is killed (and its file removed).
SNAPSHOT_CHILD_LIMIT_S = 600.0
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
                   "(default: the config's topology.file, else the built-in demo lab)")
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


# ---- logging -----------------------------------------------------------------------------
# ---- the service -------------------------------------------------------------------------
class Service:
    """One running daemon.  ``start()`` binds and restores, ``serve()`` loops until a
    stop signal and returns the exit status; ``request_stop()`` works from any thread."""

    def __init__(self, cfg: _config.Config, topo: _topology.Topology, *,
                 reload_args: argparse.Namespace | None = None, out: Any = None,
                 inputs: _statedir.Chosen | None = None, clock: _clock.Clock = _clock.SYSTEM):
        from . import metrics as _metrics

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
        self._touched = False
        self._last_decide = -math.inf
        self._next_publish_all = 0.0
        self._next_snapshot = 0.0
        self._stop = False
        self._reload = False
        self._sig_tx: Any = None
        self._sig_rx: Any = None
        self._last_record = 0
        self._unsynced = False
        self._unsynced_since = 0.0
        self.listeners: _listeners.Listeners | None = None
        self._next_gate_tick = 0.0
        self._snap_child: tuple[int, str, int, float] | None = None   # pid, tmp, record, start
        self._snap_cause = "interval"
        self._snap_reply: Any = None     # the control socket owed the answer to a "snapshot"
        self.state_lock: _statedir.StateLock | None = None
        self.recovery: _journal.RecoveryReport | None = None   # what start-up recovery found
        self._snapshot_mark: int | None = None    # the last record when the last snapshot was noted

    # -- the pipeline's state, as the rest of the service has always named it ----------
    @property
    def engine(self) -> Engine | None:
        return self.pipeline.engine

    @engine.setter
    def engine(self, engine: Engine | None) -> None:
        self.pipeline.engine = engine

    @property
    def dedup(self) -> Dedup:
        return self.pipeline.dedup

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

        from . import metrics as _metrics
        from routerd.io.fsmode import private_dir

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
        try:
            sk, al = _security.check_pair(self.cfg)
            if sk is None or al is None:
                return
            self.server_keys = _security.load_server_key(sk)
            self.allow = _security.load_allow(al, self.topo)
        except InputError as e:
            raise StartError(f"security:\n{e}") from None
        exposure = _security.key_file_exposure(sk)
        if exposure:
            self.log.warning(exposure)   # once, at start-up

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
                                 recovery=rec)
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
            self.documents = _statedir.store(state_dir, self.topo, self.cfg)
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
        seen: dict[str, str] = {}
        for name in ("ingest", "pull", "publish", "control"):
            ep = cfg[f"service.{name}"]
            if ep:
                self._claim(name, ep, seen)
        if cfg["security.control_readonly"]:
            self._claim("control-readonly", cfg["security.control_readonly"], seen)

    def _claim(self, name: str, ep: str, seen: dict[str, str]) -> None:
        if ep in seen and "*" not in ep:
            raise StartError(f"{name} endpoint {ep}: also given as the {seen[ep]} endpoint")
        seen[ep] = name
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
            self.metrics_server, self.metrics_port, _ = _metrics.serve(addr, self)
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
    def _append(self, kind: str, body: Mapping[str, Any]) -> None:
        # sync=False: the loop commits once per turn (group commit) before any ack
        if self.journal is None:
            raise StorageDown(self._down or "the journal is closed")
        try:
            self._last_record = self.journal.append(kind, body, sync=False)
        except (OSError, _journal.JournalError) as e:
            self._storage_failed(f"journal append: {_os_reason(e)}")
            raise StorageDown(self._down) from None
        if not self._unsynced:
            self._unsynced = True
            self._unsynced_since = self.clock.monotonic()

    def _journal_link(self, a: int, b: int, up: bool, t: float) -> None:
        self._append("link", {"from": a, "to": b, "up": up, "t": t})

    def _journal_tick(self, t: float) -> None:
        self._append("tick", {"t": t})

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

    def commit(self) -> None:
        """Make this turn's appends durable as the fsync policy promises (group commit):
        ``batch`` — one fsync now; ``interval`` — once ``fsync_interval_s`` has passed since
        the first unsynced append (the poll wakes for it); ``never`` — the OS decides."""
        if not self._unsynced or self.journal is None:
            return
        pol = self.journal.fsync
        try:
            if pol == "batch":
                self.journal.commit()
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
            r = _journal.restore(cfg["service.state_dir"], self.topo, EngineSettings.from_config(cfg),
                                 on_record=self._remember_record)
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
        try:
            while not self._stop:
                events = dict(poller.poll(self._timeout_ms()))
                if self._sig_rx in events:
                    self._read_signals(zmq)
                if any(m in events for m in monitors):
                    self._read_monitor()
                if self._reload:
                    self._reload = False
                    self._do_reload()
                acks: list[tuple[Any, list[Any], int | None]] = []
                reply: bytes | None = None
                reply_ro: bytes | None = None
                self._turn_failed = False
                with self.lock:
                    if ingest in events:
                        self._drain(zmq, ingest, "router", acks)
                    if pull is not None and pull in events:
                        self._drain(zmq, pull, "pull", None)
                    if control in events:
                        reply = self._control_one(zmq, control)
                    if control_ro is not None and control_ro in events:
                        reply_ro = self._control_one(zmq, control_ro, readonly=True)
                # group commit: one fsync (policy "batch") covers every batch of this turn
                with contextlib.suppress(StorageDown):
                    self.commit()
                if self._turn_failed:
                    # something of this turn may not be stored: acknowledge none of it
                    acks = [(sk, parts[:-1] + [self._unacknowledge(parts[-1], b)], b)
                            for sk, parts, b in acks]
                    if reply is not None:
                        reply = wire.encode_error(f"unavailable: the journal cannot be written "
                                                  f"({self._down})")
                for sock, parts, _ in acks:
                    self._send_ack(zmq, sock, parts)
                if reply is not None:
                    control.send(reply)
                if reply_ro is not None and control_ro is not None:
                    control_ro.send(reply_ro)
                self._housekeeping()
        except Exception as e:  # noqa: BLE001 - a bug of ours: say so loudly, keep the journal consistent
            import traceback

            self.log.error("internal error; stopping without a final snapshot (the journal "
                           "holds every acknowledged batch)", error=f"{type(e).__name__}: {e}",
                           traceback=traceback.format_exc().replace("\n", " | "))
            self.close()
            return 1
        return self._shutdown()

    def _timeout_ms(self) -> int:
        now = self.clock.monotonic()
        if self._pub_queue:
            return 0          # tables still due: take what arrived, then publish more
        t = min(self._next_publish_all, self._next_snapshot)
        if self.listeners is not None and self.listeners.waiting():
            t = min(t, self._next_gate_tick)
        if self._snap_child is not None:
            t = min(t, now + 0.05)      # look for the snapshot child's end
        if self._touched:
            t = min(t, self._last_decide + self.cfg["service.debounce_s"])
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
            return sock.recv_multipart(zmq.NOBLOCK), None
        frames = sock.recv_multipart(zmq.NOBLOCK, copy=False)
        assert self.allow is not None
        peer = self.allow.for_user_id(_security.user_id(frames[-1]))
        return [f.bytes for f in frames], peer

    def _drain(self, zmq: Any, sock: Any, name: str, acks: list[Any] | None) -> None:
        routed = acks is not None
        curve = self.allow is not None
        for _ in range(self.cfg["service.max_drain"]):
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
                acks.append((sock, env + [out], bno))

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
                self._append(kind, body)
        except StorageDown:
            return self._unavailable(fed.batch), fed.batch
        self.counters.add(fed.counts)
        if fed.touched:
            self._touched = True
        return fed.answer, fed.batch

    def _envelope(self, env: list[bytes], body: list[bytes]) -> tuple[list[bytes], list[bytes]]:
        """Hook (routerd.service.shard's worker): move leading body frames into the reply envelope."""
        return env, body

    def _routes(self, x: int) -> dict[str, list[list[Any]]]:
        """Hook (routerd.service.shard's worker): the table of node x as published."""
        assert self.engine is not None
        return wire.routes_by_name(self.engine, x)

    def _send_ack(self, zmq: Any, sock: Any, parts: list[Any]) -> None:
        try:
            sock.send_multipart(parts, zmq.NOBLOCK)
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
        if readonly and op not in _security.READ_OPS:
            self.counters.control_request(op, False)
            return wire.encode_error(f"not_authorised: op {op!r} changes state; the read-only "
                                     f"control endpoint serves {', '.join(_security.READ_OPS)}")
        if curve and not _security.may_control(peer, op):
            self.counters.control_request(op, False)
            who = "no allowed key" if peer is None else f"the key of {peer.name!r}"
            return wire.encode_error(f"not_authorised: op {op!r} changes state and came with "
                                     f"{who}, which has no control right (control: true in "
                                     "the allow file)")
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
            self.counters.link_reports_accepted += 1
            self.log.info("link override", link=f"{req['from']}->{req['to']}", state=req["state"],
                          changed=changed)
            return {"link": {"from": req["from"], "to": req["to"], "state": req["state"],
                             "changed": changed}}
        raise StartError(f"op {op!r} is not served")  # wire.decode_control admits only known ops

    def health(self) -> dict[str, Any]:
        c = self.counters
        st = self.engine.statistics() if self.engine is not None else None
        return {
            "status": "stopping" if self._stop else "degraded" if self._down is not None else "ok",
            "uptime_s": self.uptime_s(),
            "epoch": self.epoch,
            "version": __version__,
            "kernels": _kernels.status(self.cfg["engine.kernels"]),
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
            "security": {"curve": self.allow is not None,
                         "reporters": [] if self.allow is None else
                         [r.name for r in self.allow.reporters]},
        }

    # -- decisions, tables, snapshots ----------------------------------------------------
    def _housekeeping(self) -> None:
        now = self.clock.monotonic()
        cfg = self.cfg
        if self.listeners is not None and now >= self._next_gate_tick:
            self.listeners.tick()
            self._next_gate_tick = now + 1.0
        if self._down is not None:
            # no decisions (they would be journaled) and no snapshots; tables keep going out
            self.try_resume()
        if self._down is not None:
            if now >= self._next_publish_all:
                self._queue_publish(range(self.topo.n), "interval")
                self._next_publish_all = now + cfg["service.publish_interval_s"]
            if self._pub_queue:
                self._publish_due(cfg["service.publish_budget_s"])
            return
        if self._touched and now - self._last_decide >= cfg["service.debounce_s"]:
            self._decide_and_publish(now)
        if now >= self._next_publish_all:
            if self._touched:
                self._decide_and_publish(now)
            self._queue_publish(range(self.topo.n), "interval")
            self._next_publish_all = now + cfg["service.publish_interval_s"]
        if self._pub_queue:
            self._publish_due(cfg["service.publish_budget_s"])
        if self._snap_child is not None:
            self._reap_snapshot()
        if now >= self._next_snapshot and self._down is None:
            if self._last_record != self._snapshot_mark:
                with contextlib.suppress(StartError, StorageDown):   # logged, retried next interval
                    if not self._snapshot_background():
                        self._snapshot("interval")
            self._next_snapshot = now + cfg["service.snapshot_interval_s"]

    def _decide_and_publish(self, now_mono: float) -> None:
        eng = self.engine
        assert eng is not None
        with self.lock:
            t = self.clock.wall()
            d = eng.decide(t)
            try:
                self._journal_tick(t)
            except StorageDown:
                return   # the engine was put back to what is stored; decide again on resume
        self._touched = False
        self._last_decide = now_mono
        if d.changed_nodes:
            self._queue_publish(sorted(d.changed_nodes), "change")

    def _queue_publish(self, nodes: Iterable[int], cause: str) -> None:
        """Mark tables due.  A node already due keeps its place: it goes out once, with the
        table as it is when its turn comes (changes coalesce, memory stays <= n)."""
        q = self._pub_queue
        for x in nodes:
            if x not in q:
                q[x] = cause

    def _publish_due(self, budget_s: float) -> None:
        """Publish due tables, oldest first, for at most ``budget_s`` this turn — so a big
        round of changes cannot hold up ingest for longer than that."""
        q = self._pub_queue
        end = time.perf_counter() + budget_s
        while q:
            x, cause = q.popitem(last=False)
            self._publish((x,), cause)
            if time.perf_counter() >= end:
                break

    def _publish(self, nodes: Iterable[int], cause: str) -> None:
        import zmq

        eng = self.engine
        assert eng is not None
        pub = self.sockets["publish"]
        names = self.topo.nodes
        n = 0
        for x in nodes:
            self.seq[x] += 1
            frames = wire.table_message(names[x], self.seq[x], self.epoch, self._routes(x))
            try:
                pub.send_multipart(frames, zmq.NOBLOCK)
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
            tun, restart = self.cfg.tunable_diff(new)
            merged = self._effective(self.cfg.with_overrides(tun, where=f"{src or 'defaults'} (reload)"))
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
            new_id = _statedir.store(state_dir, None, merged).config
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
        self.cfg = merged
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
            if self._down is not None:
                self.log.warning("stopping while the journal cannot be written: no final "
                                 "snapshot; what is stored is what was acknowledged",
                                 reason=self._down)
            else:
                if self._touched:
                    self._decide_and_publish(self.clock.monotonic())
                with contextlib.suppress(StartError, StorageDown):   # logged; the journal has it all
                    self._snapshot("shutdown")
            self._pub_queue.clear()
            self._publish(range(self.topo.n), "final")
        finally:
            self.close()
            dog.cancel()
        self.log.info("stopped", record=self._last_record)
        return 0

    def close(self) -> None:
        """Release everything (idempotent); queued replies get ``service.linger_s``."""
        if self._snap_child is not None:     # an unfinished snapshot: never installed
            pid, tmp, _, _ = self._snap_child
            self._snap_child = None
            with contextlib.suppress(OSError):
                os.kill(pid, signal.SIGKILL)
                os.waitpid(pid, 0)
            with contextlib.suppress(OSError):
                os.unlink(tmp)
        if self.metrics_server is not None:
            self.metrics_server.shutdown()
            self.metrics_server.server_close()
            self.metrics_server = None
        if getattr(self, "listeners", None) is not None:
            self.listeners.close()
            self.listeners = None
        for s in self.sockets.values():
            s.close()
        self.sockets = {}
        for s in (self._sig_tx, self._sig_rx):
            if s is not None:
                s.close(0)
        self._sig_tx = self._sig_rx = None
        if self.auth is not None:
            self.auth.stop()
            self.auth = None
        if self.ctx is not None:
            self.ctx.term()
            self.ctx = None
            _listeners.release_ipc(self.endpoints.values())   # bound by us (claimed first)
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


