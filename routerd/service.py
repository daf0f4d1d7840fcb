"""``routerd serve``: the daemon shell — sockets, journal, snapshots, metrics, signals.

Owns the event loop and nothing else: no learning logic (that is :mod:`routerd.engine`),
no message shapes (:mod:`routerd.wire`), no file formats (:mod:`routerd.journal`), no
metric names (:mod:`routerd.metrics`).  Must not import: the simulator.

Theory of operation
-------------------
One thread runs one ``zmq.Poller`` over the work sockets (ingest ROUTER, optional PULL,
control REP), the ingest socket's monitor (disconnections) and a stop pipe (an inproc
PAIR the signal handlers write to).  The poll timeout is the time to the next deadline
(debounced decision, periodic publication, snapshot), so there are no sleeps.  One loop
iteration:

1. drain up to ``service.max_drain`` frames from the ingest sockets; for each, decode
   (:func:`wire.decode_ingest`); with CURVE on, hold it to the key's reporter
   (:mod:`routerd.security`: the name must match, rows outside its nodes are rejected
   ``not_authorised``); skip a duplicate (same reporter and batch number, kept in a
   bounded per-reporter window); refuse it whole when the reporter is over its token
   bucket (``rate_limited``); pass its hop rows through the plausibility guards
   (:mod:`routerd.guards`); apply what is left to the engine and append it to the journal;
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
5. every ``service.snapshot_interval_s`` write a snapshot and retire the journal
   segments it covers.

Start-up restores the newest readable snapshot, then replays the journal after it with
:func:`journal.replay_into` — the same code path an offline replay uses — so the state
after a restart equals the state before it.  The snapshot carries the engine settings in
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
import json
import math
import os
import signal
import sys
import threading
import time
from collections import OrderedDict
from collections.abc import Iterable, Mapping
from dataclasses import asdict
from importlib import resources
from typing import Any

import numpy as np

from . import __version__, wire
from . import config as _config
from . import guards as _guards
from . import journal as _journal
from . import kernels as _kernels
from . import security as _security
from . import topology as _topology
from .cautions import CAUTIONS
from .engine import Engine, EngineSettings, HopBatch
from .errors import InputError
from .journal import accepted_part as _accepted_part
from .journal import apply_batch as _apply_batch
from .journal import batch_body as _batch_body
from .journal import engine_state as _engine_state

#: Service-side row rejection reasons (added to :data:`wire.REASONS` for the metrics):
#: duplicates, rows outside the reporter's rights, and the plausibility guards' reasons.
SERVICE_REASONS = ("duplicate", _security.NOT_AUTHORISED) + _guards.REASONS
#: Service-side whole-frame refusals (added to :data:`wire.FRAME_ERRORS`): a batch whose
#: key is not the named reporter's, a reporter over its rate, a journal that cannot be
#: written (nothing of the batch was stored: send it again later).
SERVICE_FRAME_ERRORS = (_security.NOT_AUTHORISED, _guards.RATE_LIMITED, "unavailable")
#: Frames up to this much above ``service.max_message_bytes`` are still read so they can
#: be answered ``oversized``; beyond it libzmq's MAXMSGSIZE cuts the peer off unanswered
#: (counted as a disconnect), so a hostile peer cannot make us buffer arbitrarily much.
OVERSIZE_ANSWER_SLACK = 1 << 20
#: Rejections remembered per deduplicated batch (a re-ack repeats at most this many).
DEDUP_REJECTIONS = 256

_FLAG_KEYS = {"ingest": "service.ingest", "pull": "service.pull", "publish": "service.publish",
              "control": "service.control", "metrics": "service.metrics",
              "state_dir": "service.state_dir", "server_key": "security.server_key",
              "allow": "security.allow", "control_readonly": "security.control_readonly"}
_PATH_KEYS = ("security.server_key", "security.allow")


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
    from . import shard as _shard

    _shard.configure(p)   # --shards N, --shard K/N, --upstream, --shard-listen


def load_config(args: argparse.Namespace) -> _config.Config:
    """The config file (or defaults) with the command-line flags on top."""
    cfg = _config.load(getattr(args, "config", None))
    ov: dict[str, Any] = {}
    for attr, key in _FLAG_KEYS.items():
        v = getattr(args, attr, None)
        if v is not None:
            ov[key] = os.path.abspath(v) if key in _PATH_KEYS else v
    if getattr(args, "config", None):
        for key in _PATH_KEYS:   # a config's key and allow files are relative to the config file
            f = cfg[key]
            if key not in ov and f and not os.path.isabs(f):
                ov[key] = os.path.normpath(os.path.join(os.path.dirname(os.path.abspath(args.config)), f))
    if getattr(args, "topology", None):
        ov["topology.file"] = os.path.abspath(args.topology) if not args.topology.startswith(
            "topohub:") else args.topology
    elif cfg["topology.file"] and getattr(args, "config", None):
        tf = cfg["topology.file"]
        if not tf.startswith("topohub:") and not os.path.isabs(tf):
            # a config's topology file is relative to the config file (as `validate` reads it)
            ov["topology.file"] = os.path.normpath(os.path.join(os.path.dirname(
                os.path.abspath(args.config)), tf))
    return cfg.with_overrides(ov, where=f"{args.config or 'defaults'} + command line") if ov else cfg


def load_topology(cfg: _config.Config) -> _topology.Topology:
    d = _topology.LinkDefaults(cfg["topology.default_capacity_bps"], cfg["topology.default_buffer_pkts"])
    spec = cfg["topology.file"]
    if spec:
        return _topology.load(spec, d)
    ref = resources.files("routerd") / "data" / "demo-lab.yaml"
    with resources.as_file(ref) as path:
        return _topology.load(str(path), d)


def run(args: argparse.Namespace) -> int:
    if getattr(args, "shards", None) is not None or getattr(args, "shard", None) is not None:
        from . import shard as _shard  # the front or one worker (routerd/shard.py)

        return _shard.run(args)
    try:
        cfg = load_config(args)
        topo = load_topology(cfg)
    except InputError as e:
        print(f"routerd serve: cannot start:\n{e}", file=sys.stderr)
        return 2
    svc = Service(cfg, topo, reload_args=args)
    try:
        svc.start()
    except StartError as e:
        print(f"routerd serve: cannot start: {e}", file=sys.stderr)
        svc.close()
        return 2
    return svc.serve()


class StartError(Exception):
    """The service cannot start (an endpoint in use, a state dir for another topology...)."""


# ---- logging -----------------------------------------------------------------------------
class Log:
    """Plain text or JSON lines on stderr; one line per event, fields as key=value."""

    def __init__(self, fmt: str = "text", stream: Any = None):
        self.fmt = fmt
        self.stream = stream or sys.stderr

    def _emit(self, level: str, msg: str, fields: Mapping[str, Any]) -> None:
        ts = time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime()) + f".{int(time.time() * 1000) % 1000:03d}Z"
        if self.fmt == "json":
            line = json.dumps({"ts": ts, "level": level, "msg": msg, **fields}, default=str)
        else:
            extra = " ".join(f"{k}={v}" for k, v in fields.items())
            line = f"{ts} {level:<5} {msg}" + (f" {extra}" if extra else "")
        try:
            print(line, file=self.stream, flush=True)
        except (OSError, ValueError):  # a closed log pipe must not stop the service
            pass

    def info(self, msg: str, **f: Any) -> None:
        self._emit("INFO", msg, f)

    def warning(self, msg: str, **f: Any) -> None:
        self._emit("WARN", msg, f)

    def error(self, msg: str, **f: Any) -> None:
        self._emit("ERROR", msg, f)


# ---- duplicate detection -----------------------------------------------------------------
class Dedup:
    """Recent batch numbers per reporter, with the acknowledgement each got.

    Bounded: ``per_reporter`` batches per reporter (oldest forgotten first) and
    ``reporters`` reporters (least recently seen forgotten first); at most
    :data:`DEDUP_REJECTIONS` rejections are kept per batch.
    """

    def __init__(self, per_reporter: int, reporters: int):
        self.per_reporter = per_reporter
        self.reporters = reporters
        self._by: OrderedDict[str, OrderedDict[int, tuple[int, tuple[tuple[int, str], ...]]]] = OrderedDict()

    def get(self, reporter: str, batch: int) -> tuple[int, tuple[tuple[int, str], ...]] | None:
        w = self._by.get(reporter)
        return None if w is None else w.get(batch)

    def put(self, reporter: str, batch: int, accepted: int, rejected: Iterable[Any]) -> None:
        w = self._by.get(reporter)
        if w is None:
            w = self._by[reporter] = OrderedDict()
            while len(self._by) > self.reporters:
                self._by.popitem(last=False)
        else:
            self._by.move_to_end(reporter)
        rej: list[tuple[int, str]] = []
        for r, s in rejected:
            if len(rej) >= DEDUP_REJECTIONS:
                break
            rej.append((int(r), str(s)))
        w[batch] = (int(accepted), tuple(rej))
        while len(w) > self.per_reporter:
            w.popitem(last=False)

    def export(self) -> list[Any]:
        return [[rep, [[b, a, [list(x) for x in rj]] for b, (a, rj) in w.items()]]
                for rep, w in self._by.items()]

    def restore(self, data: Iterable[Any]) -> None:
        for rep, entries in data:
            for b, a, rj in entries:
                self.put(str(rep), int(b), int(a), [tuple(x) for x in rj])

    def __len__(self) -> int:
        return sum(len(w) for w in self._by.values())


# ---- the service -------------------------------------------------------------------------
class Service:
    """One running daemon.  ``start()`` binds and restores, ``serve()`` loops until a
    stop signal and returns the exit status; ``request_stop()`` works from any thread."""

    def __init__(self, cfg: _config.Config, topo: _topology.Topology, *,
                 reload_args: argparse.Namespace | None = None, out: Any = None):
        from . import metrics as _metrics

        self.cfg = cfg
        self.topo = topo
        self.reload_args = reload_args
        self.out = out or sys.stdout
        self.log = Log(cfg["service.log_format"])
        self.counters = _metrics.Counters(row_reasons=wire.REASONS + SERVICE_REASONS,
                                          frame_reasons=wire.FRAME_ERRORS + SERVICE_FRAME_ERRORS)
        self.guards = _guards.Guards(topo, _guards.GuardSettings.from_config(cfg))
        self.allow: _security.Allow | None = None      # CURVE on when set
        self.server_keys: tuple[bytes, bytes] | None = None
        self.auth: Any = None
        self._down: str | None = None      # why the journal cannot be written (None: it can)
        self._turn_failed = False
        self._next_resume = 0.0
        self.storage_failures = 0
        self.storage_resumed = 0
        # engine + counters vs. the metrics thread; re-entrant: a control "snapshot" runs
        # under the loop's hold of it
        self.lock = threading.RLock()
        self.engine: Engine | None = None
        self.dedup = Dedup(cfg["service.dedup_batches"], cfg["service.dedup_reporters"])
        self.journal: Any = None
        self.snapshots: Any = None
        self.ctx: Any = None
        self.sockets: dict[str, Any] = {}
        self.endpoints: dict[str, str] = {}
        self.metrics_server: Any = None
        self.metrics_port: int | None = None
        self.epoch = time.time_ns()           # rises on every start: subscribers see a restart
        self.seq = [0] * topo.n
        self.started = time.monotonic()
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
        self._monitor: Any = None

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
        return None if self.last_snapshot_at is None else max(0.0, time.time() - self.last_snapshot_at)

    def trust_state(self) -> dict[str, float]:
        """Storage and guard figures for the metrics page."""
        return {"writable": 1.0 if self._down is None else 0.0,
                "failures": float(self.storage_failures), "clipped": float(self.guards.stats.clipped)}

    def uptime_s(self) -> float:
        return time.monotonic() - self.started

    def info(self) -> Mapping[str, str]:
        return {"version": __version__, "topology": self.topo.digest}

    # -- start-up -------------------------------------------------------------------------
    def start(self) -> None:
        import zmq

        from . import metrics as _metrics
        from .fsmode import private_dir

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
            private_dir(state_dir)        # 0700 when created here (routerd.fsmode)
        except OSError as e:
            raise StartError(f"state dir {state_dir}: {e.strerror}") from None
        self._restore(state_dir)
        self.ctx = zmq.Context()
        if self.allow is not None:
            # the ZAP handler must run before the first CURVE socket binds
            self.auth = _security.start_authenticator(self.ctx, self.allow)
        self._bind_all(zmq)
        self._start_metrics()
        self._install_signals()
        now = time.monotonic()
        self._next_publish_all = now            # a fresh subscriber gets tables at once
        self._next_snapshot = now + cfg["service.snapshot_interval_s"]
        self._banner()
        if cfg["service.gc_freeze"]:
            # everything alive now (topology, engine arrays' owners, modules) lives as long
            # as the process: keep the collector from walking it on every generation-2 pass
            gc.collect()
            gc.freeze()

    def _warn_exposed(self) -> None:
        """Endpoints other hosts can reach without CURVE: said at start-up (the defaults
        bind to loopback only)."""
        cfg = self.cfg
        open_eps = [] if self.allow is not None else [
            (k, cfg[f"service.{k}"]) for k in ("ingest", "pull", "publish", "control")]
        open_eps.append(("control-readonly", cfg["security.control_readonly"]))
        for name, ep in open_eps:
            if _security.exposed(ep):
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

    def _restore(self, state_dir: str) -> None:
        """Open the journal (recovery cuts a torn or corrupt tail), then the newest good
        snapshot plus the journal after it — :func:`journal.restore`, the offline path."""
        cfg = self.cfg
        want = EngineSettings.from_config(cfg)
        self.dedup = Dedup(cfg["service.dedup_batches"], cfg["service.dedup_reporters"])
        try:
            snaps = _journal.SnapshotStore(_journal.snapshot_dir(state_dir))
        except OSError as e:
            raise StartError(f"snapshots in {state_dir}: {e}") from None
        newest = max((no for no, _ in snaps.list()), default=0)
        try:
            self.journal = _journal.Journal(
                _journal.journal_dir(state_dir), fsync=cfg["service.journal.fsync"],
                fsync_interval_s=cfg["service.journal.fsync_interval_s"],
                segment_bytes=cfg["service.journal.segment_bytes"], start_after=newest)
        except OSError as e:
            raise StartError(f"journal in {state_dir}: {e}") from None
        for line in self.journal.recovery.lines()[1:]:
            self.log.warning("journal recovery", detail=line)
        try:
            r = _journal.restore(state_dir, self.topo, want, on_record=self._remember_record)
        except (ValueError, _journal.JournalError) as e:
            raise StartError(f"state dir {state_dir}: {e} (another topology needs another "
                             "--state-dir)") from None
        for p in r.snapshot_problems:
            self.log.warning("snapshot fallback", detail=p)
        if r.read.stopped is not None:
            c = r.read.stopped
            self.log.warning("journal read stopped early", segment=c.segment, offset=c.offset,
                          detail=c.detail)
        if r.snapshot_record:
            # the snapshot's windows first, then the tail's batches on top (on_record ran
            # before we got here, so put the tail back after the restore)
            tail = self.dedup
            self.dedup = Dedup(cfg["service.dedup_batches"], cfg["service.dedup_reporters"])
            self.dedup.restore(r.state.get("dedup", ()))
            self.dedup.restore(tail.export())
            self.restored["snapshot_record"] = r.snapshot_record
            self.last_snapshot_record = r.snapshot_record
            kept = snaps.list()
            if kept:
                self.last_snapshot_at = os.path.getmtime(kept[-1][1])
        self.restored["replayed"] = r.replay.records
        self.snapshots = snaps
        self.engine = r.engine
        self._last_record = self.journal.last_record
        try:
            self._append("start", {"topology": self.topo.digest, "nodes": list(self.topo.nodes),
                                   "settings": asdict(r.engine.settings), "epoch": self.epoch})
            if r.engine.settings != want:
                self._reconfigure_engine(want)
            self._commit()
        except StorageDown as e:
            raise StartError(f"state dir {state_dir}: {e}") from None

    def _bind_all(self, zmq: Any) -> None:
        cfg = self.cfg
        hwm = cfg["service.hwm_msgs"]
        linger_ms = int(cfg["service.linger_s"] * 1000)
        hb_ms = int(cfg["service.heartbeat_s"] * 1000)
        maxmsg = cfg["service.max_message_bytes"] + OVERSIZE_ANSWER_SLACK

        def mk(kind: int, name: str, ep: str, *, maxsize: int | None = maxmsg) -> Any:
            s = self.ctx.socket(kind)
            s.sndhwm = hwm
            s.rcvhwm = hwm
            s.linger = linger_ms
            if maxsize is not None:
                s.setsockopt(zmq.MAXMSGSIZE, maxsize)
            if hb_ms > 0:
                s.setsockopt(zmq.HEARTBEAT_IVL, hb_ms)
                s.setsockopt(zmq.HEARTBEAT_TIMEOUT, 3 * hb_ms)
                s.setsockopt(zmq.HEARTBEAT_TTL, 3 * hb_ms)
            if kind == zmq.ROUTER:
                # an ack for a peer that is gone (or whose queue is full) raises instead of
                # vanishing, so it is counted
                s.setsockopt(zmq.ROUTER_MANDATORY, 1)
            if self.server_keys is not None and name != "control_ro":
                _security.make_server(s, *self.server_keys)    # before bind
            try:
                s.bind(ep)
            except zmq.ZMQError as e:
                s.close(0)
                raise StartError(f"{name} endpoint {ep}: {e.strerror}") from None
            self.sockets[name] = s
            self.endpoints[name] = s.last_endpoint.decode()
            return s

        mk(zmq.ROUTER, "ingest", cfg["service.ingest"])
        if cfg["service.pull"]:
            mk(zmq.PULL, "pull", cfg["service.pull"])
        mk(zmq.PUB, "publish", cfg["service.publish"], maxsize=None)
        mk(zmq.REP, "control", cfg["service.control"])
        if cfg["security.control_readonly"]:
            mk(zmq.REP, "control_ro", cfg["security.control_readonly"])
        self._monitor = self.sockets["ingest"].get_monitor_socket(zmq.EVENT_DISCONNECTED)
        pipe = f"inproc://routerd-stop-{id(self)}"
        self._sig_rx = self.ctx.socket(zmq.PAIR)
        self._sig_rx.linger = 0
        self._sig_rx.bind(pipe)
        self._sig_tx = self.ctx.socket(zmq.PAIR)
        self._sig_tx.linger = 0
        self._sig_tx.sndhwm = 16
        self._sig_tx.connect(pipe)

    def _start_metrics(self) -> None:
        from . import metrics as _metrics

        addr = self.cfg["service.metrics"]
        try:
            self.metrics_server, self.metrics_port, _ = _metrics.serve(addr, self)
        except OSError as e:
            raise StartError(f"metrics address {addr}: {e.strerror or e}") from None
        host = _metrics.parse_address(addr)[0]
        shown = f"[{host}]" if ":" in host else host
        self.endpoints["metrics"] = f"http://{shown}:{self.metrics_port}/metrics"

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
            self._unsynced_since = time.monotonic()

    def _journal_link(self, a: int, b: int, up: bool, t: float) -> None:
        self._append("link", {"from": a, "to": b, "up": up, "t": t})

    def _journal_tick(self, t: float) -> None:
        self._append("tick", {"t": t})

    def _journal_config(self) -> None:
        assert self.engine is not None
        self._append("config", {"settings": asdict(self.engine.settings)})

    def _remember_record(self, rec: Any) -> None:
        """Rebuild the duplicate windows from replayed batch records."""
        if rec.kind == "batch" and "ack" in rec.body:
            b, ack = rec.body, rec.body["ack"]
            self.dedup.put(b["reporter"], b["batch"], ack.get("accepted", 0), ack.get("rejected", ()))

    def _commit(self) -> None:
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
        stored).  :meth:`_try_resume` reopens the journal every ``service.storage_retry_s``."""
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
        self._next_resume = time.monotonic() + self.cfg["service.storage_retry_s"]

    def _rebuild_from_disk(self) -> None:
        """Engine and duplicate windows from the state directory, read-only."""
        cfg = self.cfg
        fresh = Dedup(cfg["service.dedup_batches"], cfg["service.dedup_reporters"])
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
            self.dedup = Dedup(cfg["service.dedup_batches"], cfg["service.dedup_reporters"])
            self.dedup.restore(r.state.get("dedup", ()))
            self.dedup.restore(tail.export())
        with self.lock:
            self.engine = r.engine

    def _try_resume(self) -> None:
        if self._down is None or time.monotonic() < self._next_resume:
            return
        reason, dedup = self._down, self.dedup
        self._down = None
        try:
            self._restore(self.cfg["service.state_dir"])
        except StartError as e:
            if self.journal is not None:
                with contextlib.suppress(OSError):
                    self.journal.close()
                self.journal = None
            if self._down is None:   # it failed before writing: the state in hand stands
                self._down, self.dedup = reason, dedup
            self._next_resume = time.monotonic() + self.cfg["service.storage_retry_s"]
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
        self.counters.refuse("unavailable")
        return wire.encode_error(f"unavailable: the journal cannot be written ({self._down}); "
                                 "nothing of this batch was stored, send it again later", batch)

    # -- the loop -------------------------------------------------------------------------
    def serve(self) -> int:
        import zmq

        poller = zmq.Poller()
        ingest = self.sockets["ingest"]
        pull = self.sockets.get("pull")
        control = self.sockets["control"]
        control_ro = self.sockets.get("control_ro")
        for s in (ingest, pull, control, control_ro, self._monitor, self._sig_rx):
            if s is not None:
                poller.register(s, zmq.POLLIN)
        try:
            while not self._stop:
                events = dict(poller.poll(self._timeout_ms()))
                if self._sig_rx in events:
                    self._read_signals(zmq)
                if self._monitor in events:
                    self._read_monitor(zmq)
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
                    self._commit()
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
        now = time.monotonic()
        if self._pub_queue:
            return 0          # tables still due: take what arrived, then publish more
        t = min(self._next_publish_all, self._next_snapshot)
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

    def _read_monitor(self, zmq: Any) -> None:
        from zmq.utils.monitor import recv_monitor_message

        while True:
            try:
                ev = recv_monitor_message(self._monitor, zmq.NOBLOCK)
            except zmq.Again:
                return
            if ev.get("event") == zmq.EVENT_DISCONNECTED:
                self.counters.ingest_disconnects += 1

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
            env: list[bytes] = []
            body = parts
            if routed:
                env, body = parts[:1], parts[1:]
            if body and body[0] == b"" and len(body) > 1:
                env, body = env + [b""], body[1:]
            env, body = self._envelope(env, body)
            bno: int | None = None
            if len(body) != 1:
                self.counters.refuse("extra_frames")
                out = wire.encode_error(f"extra_frames: expected one payload frame (after an "
                                        f"optional empty delimiter), got {len(body)}")
            else:
                out, bno = self._ingest_one(body[0], peer)
            if acks is not None:
                acks.append((sock, env + [out], bno))

    def _ingest_one(self, payload: bytes, peer: _security.Reporter | None = None
                    ) -> tuple[bytes, int | None]:
        """One frame → its answer (and its batch number when it could be read)."""
        cfg = self.cfg
        c = self.counters
        ing = wire.decode_ingest(payload, self.topo, max_rows=cfg["service.max_rows"],
                                 max_bytes=cfg["service.max_message_bytes"])
        if isinstance(ing, wire.WireError):
            c.refuse(ing.code)
            return wire.encode_error(ing), ing.batch
        if self.allow is not None and (peer is None or peer.name != ing.reporter):
            c.refuse(_security.NOT_AUTHORISED)
            who = "no allowed key" if peer is None else f"the key of reporter {peer.name!r}"
            return wire.encode_error(f"not_authorised: the batch names reporter "
                                     f"{wire._show(ing.reporter)} but came with {who}",
                                     ing.batch), ing.batch
        if self._down is not None:
            return self._unavailable(ing.batch), ing.batch
        seen = self.dedup.get(ing.reporter, ing.batch)
        if seen is not None:
            c.batches["duplicate"] += 1
            c.reject("duplicate", ing.rows_total)
            return wire.encode_ack(ing.batch, seen[0], seen[1]), ing.batch
        if not self.guards.admit(ing.reporter, ing.rows_total, time.monotonic()):
            c.refuse(_guards.RATE_LIMITED)
            g = self.guards.settings
            return wire.encode_error(
                f"rate_limited: reporter {wire._show(ing.reporter)} is over its rate "
                f"({g.rate_batches_per_s:g} batches/s, {g.rate_rows_per_s:g} rows/s; 0 = "
                "unlimited); nothing was applied, send it again later", ing.batch), ing.batch
        try:
            return self._apply_ingest(self._screen(ing, peer)), ing.batch
        except StorageDown:
            return self._unavailable(ing.batch), ing.batch

    def _screen(self, ing: wire.Ingest, peer: _security.Reporter | None) -> wire.Ingest:
        """Authorisation (CURVE on) and the plausibility guards: the rows that may reach
        the engine, the others added to the batch's rejections in wire numbering."""
        hops = ing.hops
        rows = ing.hop_rows
        rej = list(ing.rejected)
        links, link_rows = ing.links, ing.link_rows
        if peer is not None:
            ok = _security.hop_rights(peer, hops.src)
            if not ok.all():
                rej += [(int(rows[i]), _security.NOT_AUTHORISED) for i in np.flatnonzero(~ok)]
                keep = np.flatnonzero(ok)
                hops, rows = hops.take(keep), rows[keep]
            lok = _security.link_rights(peer, links)
            if not all(lok):
                rej += [(r, _security.NOT_AUTHORISED) for r, k in zip(link_rows, lok) if not k]
                links = tuple(x for x, k in zip(links, lok) if k)
                link_rows = tuple(r for r, k in zip(link_rows, lok) if k)
        chk = self.guards.check(hops.src, hops.via, hops.dst, hops.latency, hops.estimate)
        if chk.rejected or chk.clipped:
            k = chk.keep
            rej += [(int(rows[i]), r) for i, r in chk.rejected]
            hops = HopBatch(hops.src[k], hops.via[k], hops.dst[k], chk.latency, hops.estimate[k])
            rows = rows[k]
        if hops is ing.hops and links is ing.links:
            return ing
        return dataclasses.replace(ing, hops=hops, hop_rows=rows, links=links,
                                   link_rows=link_rows, rejected=tuple(rej))

    def _apply_ingest(self, ing: wire.Ingest) -> bytes:
        eng = self.engine
        assert eng is not None
        c = self.counters
        now = time.time()
        t0 = time.perf_counter()
        # hops first, then links: journal.apply_batch, the one order replay uses too
        res, changed = _apply_batch(eng, ing.hops, ing.links, now)
        dt = time.perf_counter() - t0
        rejected = ing.rejections(res.rejected)
        accepted = res.accepted + len(ing.links)
        # StorageDown from here: the engine holds a batch the journal lacks — the failure
        # handler has already put the engine back to what is stored
        self._append("batch", _batch_body(ing.reporter, ing.batch, now,
                                          _accepted_part(ing.hops, res.rejected), ing.links,
                                          {"accepted": accepted, "rejected": rejected}))
        c.batches["accepted"] += 1
        c.observations_accepted += res.accepted
        c.link_reports_accepted += len(ing.links)
        for _, reason in rejected:
            c.reject(reason)
        if res.accepted:
            c.td_error.observe_many(np.abs(res.td_errors))
        c.update_duration.observe(dt)
        if res.accepted or any(changed):
            self._touched = True
        self.dedup.put(ing.reporter, ing.batch, accepted, rejected)
        return wire.encode_ack(ing.batch, accepted, rejected)

    def _envelope(self, env: list[bytes], body: list[bytes]) -> tuple[list[bytes], list[bytes]]:
        """Hook (routerd.shard's worker): move leading body frames into the reply envelope."""
        return env, body

    def _routes(self, x: int) -> dict[str, list[list[Any]]]:
        """Hook (routerd.shard's worker): the table of node x as published."""
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
            rec = self._snapshot("request")
            return {"snapshot": {"record": rec}}
        if op == "reload":
            return {"reload": self._do_reload()}
        if op == "link":
            if self._down is not None:
                raise StorageDown(self._down)
            a, b = t.index[req["from"]], t.index[req["to"]]
            up = req["state"] == "up"
            now = time.time()
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
            "journal": {"bytes": self.journal_bytes(), "last_record": self._last_record,
                        "fsync": self.cfg["service.journal.fsync"]},
            "last_snapshot": None if self.last_snapshot_at is None else {
                "record": self.last_snapshot_record, "age_s": self.snapshot_age_s()},
            "restored": dict(self.restored),
            "storage": {"ok": self._down is None, "reason": self._down,
                        "failures": self.storage_failures, "resumed": self.storage_resumed},
            "guards": {"rejected": dict(self.guards.stats.rejected),
                       "clipped": self.guards.stats.clipped,
                       "rate_limited_batches": self.guards.stats.rate_limited_batches,
                       "reporters_tracked": self.guards.reporters_tracked},
            "security": {"curve": self.allow is not None,
                         "reporters": [] if self.allow is None else
                         [r.name for r in self.allow.reporters]},
        }

    # -- decisions, tables, snapshots ----------------------------------------------------
    def _housekeeping(self) -> None:
        now = time.monotonic()
        cfg = self.cfg
        if self._down is not None:
            # no decisions (they would be journaled) and no snapshots; tables keep going out
            self._try_resume()
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
        if now >= self._next_snapshot and self._down is None:
            if self._last_record != self.last_snapshot_record:
                with contextlib.suppress(StartError, StorageDown):   # logged, retried next interval
                    self._snapshot("interval")
            self._next_snapshot = now + cfg["service.snapshot_interval_s"]

    def _decide_and_publish(self, now_mono: float) -> None:
        eng = self.engine
        assert eng is not None
        with self.lock:
            t = time.time()
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

    def _snapshot(self, cause: str) -> int:
        eng = self.engine
        assert eng is not None
        if self._down is not None or self.journal is None:
            raise StorageDown(self._down or "the journal is closed")
        with self.lock:
            self._commit()
            state = _engine_state(eng, dedup=self.dedup.export())
            rec = self._last_record
        try:
            self.snapshots.write(state, rec)
        except OSError as e:
            # the journal still holds everything: a failed snapshot loses nothing
            for tmp in glob.glob(os.path.join(self.snapshots.dir, f".snap-*.tmp{os.getpid()}")):
                with contextlib.suppress(OSError):
                    os.unlink(tmp)
            self.log.error("snapshot failed; the journal keeps every record", cause=cause,
                           reason=_os_reason(e))
            raise StartError(f"snapshot failed: {_os_reason(e)}") from None
        # retire only what every kept snapshot covers: a corrupt newest one has a fallback
        self.journal.retire_before(self.snapshots.retire_point())
        self.last_snapshot_at = time.time()
        self.last_snapshot_record = rec
        self.counters.snapshots[cause] += 1
        self.log.info("snapshot", cause=cause, record=rec, journal_bytes=self.journal_bytes())
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

    def _do_reload(self) -> dict[str, Any]:
        """Re-read the config (SIGHUP, control ``reload``); what changed, or why not."""
        args = self.reload_args
        src = getattr(args, "config", None) if args is not None else None
        try:
            if args is None:
                raise InputError("the service was started without a command line to re-read")
            new = load_config(args)
            tun, restart = self.cfg.tunable_diff(new)
            merged = self.cfg.with_overrides(tun, where=f"{src or 'defaults'} (reload)")
            settings = EngineSettings.from_config(merged)
        except (InputError, ValueError) as e:
            self.counters.reloads["rejected"] += 1
            self.log.error("reload rejected; keeping the running config", file=src,
                           reason=str(e).replace("\n", "; "))
            return {"applied": False, "reason": str(e)}
        assert self.engine is not None
        if settings != self.engine.settings:
            try:
                self._reconfigure_engine(settings)
                self._commit()
            except StorageDown as e:
                self.counters.reloads["rejected"] += 1
                self.log.error("reload not applied: the journal cannot be written", reason=str(e))
                return {"applied": False, "reason": f"unavailable: {e}"}
        self.cfg = merged
        self.guards.reconfigure(_guards.GuardSettings.from_config(merged))
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
                    self._decide_and_publish(time.monotonic())
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
        if self.metrics_server is not None:
            self.metrics_server.shutdown()
            self.metrics_server.server_close()
            self.metrics_server = None
        if getattr(self, "_monitor", None) is not None:
            import zmq

            with contextlib.suppress(zmq.ZMQError):
                self.sockets["ingest"].disable_monitor()
            self._monitor.close(0)
            self._monitor = None
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
        if self.journal is not None:
            with contextlib.suppress(StorageDown):
                self._commit()
            j, self.journal = self.journal, None
            if j is not None:
                with contextlib.suppress(OSError):
                    j.close()


def _os_reason(e: BaseException) -> str:
    """An OSError as its errno name and text (``ENOSPC: No space left on device``)."""
    import errno

    if isinstance(e, OSError) and e.errno is not None:
        return f"{errno.errorcode.get(e.errno, e.errno)}: {e.strerror}"
    return f"{type(e).__name__}: {e}"


def _overdue(limit: float) -> None:
    print(f"routerd serve: shutdown took longer than {limit:g} s; exiting now", file=sys.stderr, flush=True)
    os._exit(1)


