"""Scale-out by destination: the shard worker and the front.

Owns: the worker (:class:`ShardWorker`, a :class:`Service` that publishes and answers only
for its own destinations and announces itself upstream), the front (:class:`Front`: the
one ingest, tables, control and metrics endpoint in front of N workers), the supervisor
that runs N local workers (``routerd serve --shards N``), the live merge of the workers'
tables, and a reporter that splits by destination itself (:class:`ShardReporter`).  Which
shard owns which destination (:class:`ShardMap`), the ``shard-K-of-N`` layout and the
merge of tables replayed from the shards' journals are :mod:`routerd.io.shards`'s (``routerd
replay`` uses them too); this module re-exports them.  It imports the daemon (the worker
is a Service); the daemon never imports it (:mod:`routerd.service.serve` dispatches).
Must not import: the simulator, ``routerd.tools``.  Every message shape is
:mod:`routerd.io.wire`'s; every journal access is :mod:`routerd.io.journal`'s; time is
read through a :mod:`routerd.io.clock` clock.

Theory of operation
-------------------
Exactness.  Q-routing's update for destination d reads and writes only d's estimates
(``Q[:, d, :]``, ``N[:, d, :]``, ``td[:, d]``), and :meth:`Engine.decide` decides each
destination from its own column (greedy, hysteresis, loop fallback, exploration); the
only shared state is the link state, and every link row goes to every worker.  So a worker
that receives exactly the hop rows whose destination it owns, in the same order, plus all
link rows, holds for its destinations the very values one process would hold — bit for
bit — as long as ``decide`` runs at the same places in each destination's stream (it
does when a reporter waits for each acknowledgement, and ``service.debounce_s`` is 0).
A worker's engine holds only its own destinations (``Engine(owned=)``, its columns of
every per-destination array: memory about 1/N of one process's engine, and ``decide``
after a link change works on those only); under a variant other than plain, whose state
spans destinations, it holds them all (:func:`routerd.io.shards.engine_owned`).

Ingest path.  The front decodes each frame once (:func:`wire.decode_ingest`, the same
checks as one process: frame errors and decode-time row rejections are answered by the
front), applies the per-reporter rate limits, and splits the decoded rows by the owner of
their destination.  Each non-empty piece is a columnar batch with the *original* reporter
name and batch number (so each worker's duplicate window works as one process's does),
sent to its worker behind a token frame ``[token, b"", payload]`` that the worker echoes
(:meth:`ShardWorker._envelope`) — so a reply is matched to its piece even after a worker
restart lost some.  The front acknowledges a batch when every piece is acknowledged (=
journaled by its worker), with one ack in the original row numbering: decode-time
rejections, each piece's rejections mapped back (piece row r < h_w is hop row
``rows_w[r]``, a later one is link row ``link_rows[r - h_w]``), ``accepted`` = every
piece's accepted hop rows plus the accepted link rows once.  The split depends only on the
batch's bytes, so a re-sent batch is split the same way and each worker re-acknowledges
its piece from its duplicate window: the combined ack is the same.  An error from any
piece (a worker whose journal cannot be written) or no answer within
``shard.timeout_s`` answers the batch with ``unavailable`` (nothing is acknowledged; the
pieces that did get journaled are duplicates when the reporter sends the batch again).
A piece for a worker that is down waits in the front's queue (up to ``service.hwm_msgs``
per worker) and is delivered when the worker is back.

Variants.  ``engine.variant: full_echo`` keeps a per-link latency average fed by every
row; under sharding each worker learns it from its own rows, so its tables are close to,
not equal to, one process's (the front says so at start-up).  The other variants keep
per-entry state.

Guards.  The row guards (floor, ceiling, jump) run in each worker on its rows: the floor
and the ceiling look at one row, so they decide as one process does; the jump guard keeps
a reference per link from the rows each worker sees (off by default; with it on, a
sharded service holds rows back per shard).  Rate limits are per reporter and run in the
front (workers run with them off).

Tables.  Each worker publishes, per node, the routes for its own destinations, with its
own seq.  The front keeps the latest part per (node, worker) and publishes, per node, one
message with all destinations and its own ``seq`` (+1 per node per publication, one
epoch per front run): the protocol of one process.  While a worker is down its last part
stays in the merged tables and the other workers' changes keep going out.

Control.  ``nodes`` is answered by the front; ``tables``, ``estimates``, ``snapshot``,
``link`` and ``reload`` go to every worker and their answers are merged (``link`` and
``reload``: every worker applies them); ``health`` adds each worker's health under
``shards``.

Security.  CURVE is the front's, as one service's: the ZAP authenticator over the allow
file, CURVE on ingest, pull, publish and control, each frame's ``User-Id`` into the
pipeline (a reporter held to its name and nodes), the control right for state-changing
ops, the read-only control endpoint without CURVE.  The front talks to workers without
it: a worker drops the keys and refuses to start with them when one of its own endpoints
could be reached from other hosts (:func:`worker_security`).

Metrics.  Each worker serves its own page with ``shard="K"`` on every series (at
``shard.metrics_port_base + K`` when set, :func:`worker_metrics`), scraped directly by
Prometheus; the front's page has only its own series (``shard="front"``), so a hung
worker never stalls a scrape of the front.

Workers and hosts.  ``routerd serve --shard K/N`` runs worker K of N with its state in
``STATE/shard-K-of-N``.  ``--upstream EP`` is the front's *shard endpoint* (a PULL the
front binds, ``--shard-listen``): the worker announces itself there every
``shard.hello_interval_s`` with its endpoints, topology and epoch, and the front connects
to the endpoints it announces.  ``routerd serve --shards N`` starts the front and N local
workers on ipc:// endpoints (restarting one that dies); with ``--external-workers`` it
starts none and waits for N workers to announce themselves (other hosts).
"""
from __future__ import annotations

import argparse
import contextlib
import os
import re
import signal
import struct
import subprocess
import sys
import tempfile
import threading
import time
import zlib
from collections import OrderedDict
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from routerd import __version__
from routerd.core import topology as _topology
from routerd.core.errors import InputError
from routerd.io import config as _config
from routerd.io import security as _security
from routerd.io import statedir as _statedir
from routerd.io import wire
from routerd.io.childproc import die_with_parent, ready_line
from routerd.io.clock import SYSTEM, Clock
from routerd.io.metricsaddr import page_url, parse_address

# the map, the shard dirs and the table merge live below this module (``routerd replay``
# reads sharded state dirs with them too); re-exported here for the service's callers
from routerd.io.shards import (  # noqa: F401 - re-exported
    ShardMap,
    engine_owned,
    merge_tables,
    owned_routes,
    replay_shards,
    shard_dir,
    sharded_state,
    stable_hash,
)

from . import daemon as _service
from . import listeners as _listeners
from .daemon import Service
from .pipeline import Fed, envelope, extra_frames

#: Leading bytes of the token frame the front puts before each piece (echoed back).
TOKEN_PREFIX = b"rdshard:"
_TOKEN = struct.Struct("<Q")
_SHARD_RE = re.compile(r"^(\d+)/(\d+)$")
#: Set by the front for the workers it starts (they stop when it dies).
FRONT_PID_ENV = "ROUTERD_SHARD_FRONT_PID"
#: Engine variants with state shared across destinations (routerd.core.variants): under
#: sharding each worker keeps its own copy from its own rows.
INEXACT_VARIANTS: dict[str, str] = {
    "full_echo": "its per-link expected latency is learnt by each worker from its own rows"}
#: Keys a worker runs with whatever its config says: rate limits are the front's (per
#: reporter, whole batches).
WORKER_OVERRIDES: dict[str, Any] = {"guards.rate.batches_per_s": 0.0, "guards.rate.rows_per_s": 0.0}


def worker_metrics(cfg: _config.Config, k: int) -> str | None:
    """Worker k's metrics address by ``shard.metrics_port_base`` (the host of
    ``service.metrics``, port base + k), or None when the base is 0."""
    base = int(cfg["shard.metrics_port_base"])
    if not base:
        return None
    if base + k > 65535:
        raise InputError(f"shard.metrics_port_base {base} + shard {k} is above port 65535")
    host = parse_address(cfg["service.metrics"])[0]
    return f"[{host}]:{base + k}" if ":" in host else f"{host}:{base + k}"


# ---- the worker's flag ------------------------------------------------------------------
def parse_shard(spec: str) -> tuple[int, int]:
    """``"K/N"`` → (K, N) with 0 <= K < N; ValueError naming the rule."""
    m = _SHARD_RE.match(spec or "")
    if not m or not 0 <= int(m.group(1)) < int(m.group(2)):
        raise ValueError(f"--shard {spec!r} is not K/N with 0 <= K < N (e.g. 0/2)")
    return int(m.group(1)), int(m.group(2))


# ---- command line -------------------------------------------------------------------------
def configure(p: argparse.ArgumentParser) -> None:
    """The sharding flags of ``routerd serve`` (:func:`routerd.service.serve.configure`)."""
    g = p.add_argument_group("sharding (split the destinations over several workers)")
    g.add_argument("--shards", metavar="N", type=int, help="run a front and N workers: each "
                   "worker owns the destinations whose name hashes to it (or shard.map); the "
                   "front keeps the ingest, tables, control and metrics endpoints")
    g.add_argument("--shard", metavar="K/N", help="run worker K of N only (state in "
                   "STATE/shard-K-of-N); give --upstream to announce it to a front")
    g.add_argument("--upstream", metavar="EP", help="worker: the front's shard endpoint "
                   "(its --shard-listen); the worker announces its endpoints there")
    g.add_argument("--shard-listen", metavar="EP", help="front: where workers announce "
                   "themselves (default: ipc:// in the state dir; tcp://HOST:PORT for "
                   "workers on other hosts)")
    g.add_argument("--external-workers", action="store_true", help="front: start no "
                   "workers; wait for N to announce themselves on --shard-listen")


def stray_flags(args: argparse.Namespace, *, front: bool, worker: bool) -> str | None:
    """Why sharding flags do not fit the role asked for (None: they do): ``--upstream``
    belongs to a worker, ``--shard-listen`` and ``--external-workers`` to a front."""
    if getattr(args, "upstream", None) and not worker:
        return "--upstream belongs to a worker (--shard K/N)"
    for flag, given in (("--shard-listen", getattr(args, "shard_listen", None)),
                        ("--external-workers", getattr(args, "external_workers", False))):
        if given and not front:
            return f"{flag} belongs to a front (--shards N)"
    return None


def run(args: argparse.Namespace) -> int:
    """``routerd serve --shards N`` (the front, and its workers unless external) or
    ``routerd serve --shard K/N`` (one worker); :func:`routerd.service.serve.run` sends
    those here."""
    from routerd.io import inputs as _inputs

    try:
        root = _inputs.load_config(args)["service.state_dir"]
        if args.shard is not None:
            if args.shards is not None:
                raise InputError("give --shards N (front and workers) or --shard K/N (one "
                                 "worker), not both")
            stray = stray_flags(args, front=False, worker=True)
            if stray:
                raise InputError(stray)
            k, n = parse_shard(args.shard)
            # a worker's documents are in its own dir, the front's in the root
            chosen = _service.choose_inputs(args, shard_dir(root, k, n))
            cfg, topo = chosen.cfg, chosen.topo
            smap = ShardMap.build(topo, n, cfg["shard.map"])
        else:
            if args.shards < 1:
                raise InputError(f"--shards {args.shards} is below 1")
            stray = stray_flags(args, front=True, worker=False)
            if stray:
                raise InputError(stray)
            chosen = _front_inputs(args, root, args.shards)
            cfg, topo = chosen.cfg, chosen.topo
            smap = ShardMap.build(topo, args.shards, cfg["shard.map"])
        worker_metrics(cfg, (k if args.shard is not None else smap.n_shards - 1))  # port in range
        if args.shard is not None:
            wsec = worker_security(cfg, k, smap.n_shards)
    except (InputError, ValueError) as e:
        print(f"routerd serve: cannot start:\n{e}", file=sys.stderr)
        return 2
    if args.shard is not None:
        return _run_worker(args, cfg, topo, smap, k, chosen, wsec)
    front = Front(cfg, topo, smap, args, inputs=chosen)
    try:
        front.start()
    except _service.StartError as e:
        print(f"routerd serve: cannot start: {e}", file=sys.stderr)
        front.close()
        return 2
    except BaseException:
        front.close()
        raise
    return front.serve()


# ---- the worker --------------------------------------------------------------------------
def _front_inputs(args: argparse.Namespace, root: str, n: int) -> Any:
    """A front's config and topology: what the flags give, else its own recorded documents
    (in the root); a root without them whose workers recorded theirs (workers started on
    their own) takes the topology of the first such shard, never its config (a worker's
    endpoints).  Which network the directory was written for: the shards' journals."""
    shards = [shard_dir(root, k, n) for k in range(n)]
    if _statedir.current(root) is None:
        for d in shards:
            cur = _statedir.current(d)
            if cur is not None and cur.topology:
                return _service.choose_inputs(args, d, _statedir.DocRefs(
                    cur.topology, None, cur.topology_id), journals=shards)
    return _service.choose_inputs(args, root, journals=shards)


def worker_security(cfg: _config.Config, k: int, n: int) -> dict[str, Any]:
    """The security keys a worker runs with: none.  CURVE is the front's (its reporters,
    their rights, the control right, the read-only endpoint); the front speaks to its
    workers without it, so a worker's endpoints must be local (ipc://, or TCP on a loopback
    address) when the config turns CURVE on — InputError otherwise."""
    if cfg["security.server_key"] or cfg["security.allow"]:
        for name in ("ingest", "pull", "publish", "control"):
            ep = cfg[f"service.{name}"]
            if ep and _security.exposed(ep):
                raise InputError(
                    f"shard {k}/{n}: the config turns CURVE on (security.server_key, "
                    f"security.allow), and the worker's {name} endpoint {ep} can be reached "
                    "from other hosts without it: CURVE runs on the front, which talks to "
                    "its workers without it; bind the worker's endpoints to ipc:// (or "
                    "127.0.0.1)")
    return {"security.server_key": None, "security.allow": None,
            "security.control_readonly": None}


def _run_worker(args: argparse.Namespace, cfg: _config.Config, topo: _topology.Topology,
                smap: ShardMap, k: int, chosen: Any = None,
                security: Mapping[str, Any] | None = None) -> int:
    _follow_front()
    n = smap.n_shards
    sec = dict(security if security is not None else worker_security(cfg, k, n))
    over = {"service.state_dir": shard_dir(cfg["service.state_dir"], k, n), **WORKER_OVERRIDES,
            **sec}
    if getattr(args, "metrics", None) is None and (mp := worker_metrics(cfg, k)) is not None:
        over["service.metrics"] = mp
    wcfg = cfg.with_overrides(over, where=f"shard {k}/{n}")
    rargs = argparse.Namespace(**vars(args))
    rargs.state_dir = over["service.state_dir"]     # a reload re-reads the same state dir
    svc = ShardWorker(wcfg, topo, smap, k, args.upstream, reload_args=rargs, inputs=chosen,
                      overrides=sec)
    try:
        svc.start()
    except _service.StartError as e:
        print(f"routerd serve: cannot start: {e}", file=sys.stderr)
        svc.close()
        return 2
    return svc.serve()


def _follow_front() -> None:
    """A worker the front started stops when the front dies (Linux PR_SET_PDEATHSIG)."""
    pid = os.environ.get(FRONT_PID_ENV)
    if not pid:
        return
    die_with_parent(signal.SIGTERM)
    if str(os.getppid()) != pid:   # the front died before the call above
        raise SystemExit(1)


class ShardWorker(Service):
    """A :class:`Service` owning the destinations of shard k of n: it publishes and answers
    for those only, echoes the front's token frames, and announces itself on ``upstream``.

    ``clock``: every time it reads, announcements included (:mod:`routerd.io.clock`), as
    the :class:`Service`'s."""

    #: the live optimality gap needs every destination's rows and tables (health says so)
    optimum_off = True

    def __init__(self, cfg: _config.Config, topo: _topology.Topology, smap: ShardMap,
                 k: int, upstream: str | None, *, clock: Clock = SYSTEM,
                 overrides: Mapping[str, Any] | None = None, **kw: Any):
        super().__init__(cfg, topo, clock=clock, **kw)
        self._overrides = {**WORKER_OVERRIDES, **(overrides or {})}
        self.smap = smap
        self.shard = k
        self.own = smap.owned(k)
        self.own_mask = smap.owner == k
        self._own_names = frozenset(topo.nodes[d] for d in self.own.tolist())
        self.upstream = upstream
        self._hello: Any = None
        self._next_hello = 0.0

    # -- what the worker holds, publishes and answers: its own destinations --------
    def metrics_labels(self) -> dict[str, str]:
        return {"shard": str(self.shard)}

    def _fit_mode(self, cfg: _config.Config, n: int) -> tuple[_config.Config, str | None]:
        return _config.split_fits(cfg, n, shard_worker=True)

    def _engine_owned(self, settings: Any) -> Any:
        # only its destinations' columns (memory 1/N); under a variant, every one
        return engine_owned(self.smap, self.shard, settings.variant, settings.mode)

    def _routes(self, x: int) -> dict[str, list[list[Any]]]:
        return owned_routes(self.engine, x, self.own_mask)

    def _control(self, op: str, req: Mapping[str, Any]) -> dict[str, Any]:
        eng = self.engine
        if op == "tables":
            return {"tables": {self.topo.nodes[x]: owned_routes(eng, x, self.own_mask)
                               for x in range(self.topo.n)}}
        if op == "estimates":
            est = wire.estimates_by_name(eng, self.topo.index[req["node"]])
            return {"estimates": {d: v for d, v in est.items() if d in self._own_names}}
        out = super()._control(op, req)
        if op == "health":
            out["shard"] = self._shard_info()
        return out

    def health(self) -> dict[str, Any]:
        out = super().health()
        out["shard"] = self._shard_info()
        return out

    def _shard_info(self) -> dict[str, Any]:
        return {"index": self.shard, "of": self.smap.n_shards, "destinations": int(self.own.size)}

    def _effective(self, cfg: _config.Config) -> _config.Config:
        # a reload keeps the rate limits and CURVE the front's (and records the config as run)
        return cfg.with_overrides(self._overrides, where="shard worker")

    def info(self) -> Mapping[str, str]:
        return {**super().info(), "shard": f"{self.shard}/{self.smap.n_shards}"}

    def _lock_what(self) -> str:
        return f"routerd serve --shard {self.shard}/{self.smap.n_shards}"

    def _envelope(self, env: list[bytes], body: list[bytes]) -> tuple[list[bytes], list[bytes]]:
        # [token, b"", payload] from the front: the token goes back with the answer
        if len(body) == 3 and body[0].startswith(TOKEN_PREFIX) and body[1] == b"":
            return env + body[:2], body[2:]
        return env, body

    # -- announcing itself upstream -------------------------------------------------
    def start(self) -> None:
        super().start()
        if self.upstream:
            import zmq

            s = self.ctx.socket(zmq.PUSH)
            s.linger = 0
            s.sndhwm = 4
            s.connect(self.upstream)
            self._hello = s
            self._send_hello()

    def _banner(self) -> None:
        with contextlib.suppress(OSError, ValueError):
            print(f"routerd shard {self.shard}/{self.smap.n_shards}: owns {self.own.size} of "
                  f"{self.topo.n} destinations ({self.smap.source}); upstream "
                  f"{self.upstream or '- (none)'}", file=self.out, flush=True)
        super()._banner()

    def _send_hello(self) -> None:
        import zmq

        msg = {"v": wire.VERSION, "hello": "shard", "shard": self.shard,
               "of": self.smap.n_shards, "topology": self.topo.digest, "epoch": self.epoch,
               "pid": os.getpid(), "ingest": self.endpoints["ingest"],
               "publish": self.endpoints["publish"], "control": self.endpoints["control"],
               "metrics": self.endpoints.get("metrics"),
               "owned_digest": zlib.crc32(self.own.astype("<i8").tobytes())}
        with contextlib.suppress(zmq.ZMQError):
            self._hello.send(wire.encode_request(msg), zmq.NOBLOCK)
        self._next_hello = self.clock.monotonic() + self.cfg["shard.hello_interval_s"]

    def _housekeeping(self) -> None:
        super()._housekeeping()
        if self._hello is not None and self.clock.monotonic() >= self._next_hello:
            self._send_hello()

    def _timeout_ms(self) -> int:
        t = super()._timeout_ms()
        if self._hello is not None:
            t = min(t, max(0, int((self._next_hello - self.clock.monotonic()) * 1000) + 1))
        return t

    def close(self) -> None:
        if self._hello is not None:
            self._hello.close(0)
            self._hello = None
        super().close()


# ---- the front ------------------------------------------------------------------------------
@dataclass
class _Pending:
    """One batch in flight: where its answer goes and what is still missing."""

    env: list[bytes] | None           # None: came by PULL, nobody to answer
    reporter: str
    batch: int
    deadline: float
    decode_rejected: list[list[Any]]
    n_links: int
    pieces: dict[int, tuple[np.ndarray, tuple[int, ...]]]   # shard -> (hop rows, link rows)
    acks: dict[int, dict[str, Any]] = field(default_factory=dict)
    error: str | None = None


@dataclass
class _Worker:
    k: int
    hello: dict[str, Any] | None = None
    last_hello: float = -1e18
    dealer: Any = None
    sub: Any = None
    tokens: int = 0
    proc: subprocess.Popen[str] | None = None
    restart_at: float | None = None
    restarts: int = 0
    raw: dict[int, bytes] = field(default_factory=dict)              # node -> newest part
    parts: dict[int, tuple[int, bytes]] = field(default_factory=dict)  # node -> route entries


class Front:
    """The ingest, tables, control and metrics endpoint in front of N shard workers.

    ``clock``: every time the front reads (:mod:`routerd.io.clock`): its epoch (wall),
    deadlines, debounce, supervision and uptime (monotonic), its waits (sleep); sockets are
    still polled with real timeouts.  CPU budgets (``service.publish_budget_s``) are
    measured with :func:`time.perf_counter`, the time the process actually spends."""

    def __init__(self, cfg: _config.Config, topo: _topology.Topology, smap: ShardMap,
                 args: argparse.Namespace | None = None, out: Any = None, inputs: Any = None,
                 *, clock: Clock = SYSTEM):
        from routerd.io.logs import EventLog

        from .pipeline import Pipeline

        self.inputs = inputs     # statedir.Chosen: where cfg and topo came from
        self.clock = clock
        self.cfg = cfg
        self.topo = topo
        self.smap = smap
        self.args = args
        self.out = out or sys.stdout
        self.log = EventLog(cfg["service.log_format"], name="routerd.front")
        # the ingest stages up to the split (routerd.service.pipeline: decode, duplicates,
        # rate limits; no engine).  Its duplicate window holds the combined acks, so a
        # re-sent batch is answered before any split (as one process does); after a front
        # restart each worker's durable window answers
        self.pipeline = Pipeline(topo, cfg)
        self.external = bool(getattr(args, "external_workers", False))
        self.workers = [_Worker(k) for k in range(smap.n_shards)]
        self.pending: dict[bytes, _Pending] = {}
        self.expiry: OrderedDict[bytes, float] = OrderedDict()
        self.ctx: Any = None
        self.sockets: dict[str, Any] = {}
        self.endpoints: dict[str, str] = {}
        self.epoch = clock.wall_ns()
        self.seq = [0] * topo.n
        self._due: OrderedDict[int, float] = OrderedDict()   # node -> not before (monotonic)
        self._stop = False
        self._next_token = 1
        self.started = clock.monotonic()
        self.state_root = os.path.abspath(cfg["service.state_dir"])
        self._ipc_dir: str | None = None
        self.metrics_server: Any = None
        self.listeners: _listeners.Listeners | None = None
        self._next_gate_tick = 0.0
        self.counts: dict[str, int] = {k: 0 for k in (
            "batches_accepted", "batches_duplicate", "batches_refused", "batches_unavailable", "pieces_sent",
            "pieces_acked", "pieces_late", "publications", "parts_received", "acks_undeliverable")}
        self.state_lock: _statedir.StateLock | None = None
        # CURVE as on one service (routerd.io.security): the server keys, and the ZAP
        # authenticator over the allow file (the pipeline holds the allow list itself)
        self.server_keys: tuple[bytes, bytes] | None = None
        self.auth: Any = None

    @property
    def allow(self) -> _security.Allow | None:
        """The allowed reporters: CURVE is on when set."""
        return self.pipeline.allow

    # -- start-up ---------------------------------------------------------------------
    def _load_security(self) -> None:
        """Key and allow file, checked before anything binds (as the service's)."""
        from .daemon import load_security

        loaded = load_security(self.cfg, self.topo, self.log)
        if loaded is not None:
            self.server_keys, self.pipeline.allow = loaded

    def start(self) -> None:
        import zmq

        from routerd.io.fsmode import private_dir

        from .daemon import OVERSIZE_ANSWER_SLACK, StartError, bind_endpoint

        cfg = self.cfg
        try:
            parse_address(cfg["service.metrics"])
            private_dir(self.state_root)
            # the root holds the front's ipc files and the shards' dirs: one front per root
            self.state_lock = _statedir.StateLock(self.state_root, "routerd serve --shards "
                                                  f"{self.smap.n_shards} (front)").acquire()
        except ValueError as e:
            raise StartError(str(e)) from None
        except _statedir.StateDirBusy as e:
            raise StartError(str(e)) from None
        except OSError as e:
            raise StartError(f"state dir {self.state_root}: {e.strerror}") from None
        self._load_security()
        self.ctx = zmq.Context()
        if self.allow is not None:
            # the ZAP handler must run before the first CURVE socket binds
            self.auth = _security.start_authenticator(self.ctx, self.allow)
        listen = getattr(self.args, "shard_listen", None) or f"ipc://{self._ipc('front-shards')}"
        # the service's socket options (routerd.service.listeners) and CURVE: the reporters'
        # and operators' endpoints as on one service; the workers' announcements (and the
        # front's connections to them) without it: local ipc:// (see worker_security)
        opts = _listeners.SocketOptions.from_config(cfg, slack=OVERSIZE_ANSWER_SLACK)

        def mk(kind: int, name: str, ep: str, curve: bool = True) -> Any:
            return bind_endpoint(self, kind, name, ep, opts,   # claims ipc files first
                                 curve=self.server_keys if curve else None)

        mk(zmq.ROUTER, "ingest", cfg["service.ingest"])
        if cfg["service.pull"]:
            mk(zmq.PULL, "pull", cfg["service.pull"])
        mk(zmq.PUB, "publish", cfg["service.publish"])
        mk(zmq.REP, "control", cfg["service.control"])
        if cfg["security.control_readonly"]:
            mk(zmq.REP, "control_ro", cfg["security.control_readonly"], curve=False)
        mk(zmq.PULL, "shards", listen, curve=False)
        self._warn_exposed(listen)
        self._start_metrics()
        self._install_signals()
        if not self.external:
            for w in self.workers:
                self._spawn(w)
        self._await_workers()
        try:
            # the front has no journal: its documents and the pointer to them are its
            # record, written once every worker has taken the topology (they check it
            # against their journals)
            _statedir.set_current(self.state_root, _statedir.store(self.state_root, self.topo, self.cfg))
        except OSError as e:
            raise StartError(f"state dir {self.state_root}: recording the topology and "
                             f"config: {e.strerror or e}") from None
        self._cap_connections()
        self._banner()

    def _warn_exposed(self, listen: str) -> None:
        """Endpoints other hosts can reach without CURVE, said at start-up (as the service)."""
        cfg = self.cfg
        open_eps = [] if self.allow is not None else [
            (k, cfg[f"service.{k}"]) for k in ("ingest", "pull", "publish", "control")]
        open_eps += [("control-readonly", cfg["security.control_readonly"]), ("shards", listen)]
        for name, ep in open_eps:
            if ep and _security.exposed(ep):
                self.log.warning("endpoint reachable from other hosts without CURVE: anyone "
                                 "there can use it (give --server-key and --allow, or bind "
                                 "to 127.0.0.1)", endpoint=name, address=ep)

    def _cap_connections(self) -> None:
        """The connection cap over the front's listening sockets (as the service's, see
        :mod:`routerd.service.listeners`), counted once the workers' pipes and connections exist."""
        from .daemon import StartError

        _listeners.raise_nofile(self.log)
        try:
            self.listeners = _listeners.Listeners.start(
                self.sockets, self.endpoints, self.cfg["service.max_connections"], self.log)
        except ValueError as e:
            raise StartError(str(e)) from None

    def _ipc(self, name: str) -> str:
        """An ipc path for ``name``: in the state dir when short enough (ipc paths are
        limited to about 100 bytes), else in a private tmp dir."""
        p = os.path.join(self.state_root, name)
        if len(p) < 90:
            return p
        if self._ipc_dir is None:
            self._ipc_dir = tempfile.mkdtemp(prefix="rd-shards-")
        return os.path.join(self._ipc_dir, name)

    def _worker_argv(self, w: _Worker) -> list[str]:
        n = self.smap.n_shards
        a = self.args
        base = self._ipc(f"s{w.k}of{n}")
        argv = [sys.executable, "-m", "routerd", "serve", "--shard", f"{w.k}/{n}",
                "--upstream", self.endpoints["shards"],
                "--ingest", f"ipc://{base}-in", "--publish", f"ipc://{base}-pub",
                "--control", f"ipc://{base}-ctl",
                "--metrics", worker_metrics(self.cfg, w.k) or "127.0.0.1:0",
                "--state-dir", self.state_root]
        if a is not None and getattr(a, "config", None):
            argv += ["--config", os.path.abspath(a.config)]
        if self.inputs is not None and self.inputs.recorded_topology:
            argv += ["--topology", os.path.abspath(self.topo.source)]   # the recorded document
        elif self.cfg["topology.file"]:
            argv += ["--topology", self.cfg["topology.file"]]
        return argv

    def _spawn(self, w: _Worker) -> None:
        env = {**os.environ, FRONT_PID_ENV: str(os.getpid())}
        w.proc = subprocess.Popen(self._worker_argv(w), stdout=subprocess.PIPE,
                                  stderr=subprocess.STDOUT, text=True, env=env)
        w.restart_at = None
        t = threading.Thread(target=self._pipe_log, args=(w.k, w.proc), daemon=True)
        t.start()

    def _pipe_log(self, k: int, proc: subprocess.Popen[str]) -> None:
        assert proc.stdout is not None
        for line in proc.stdout:
            with contextlib.suppress(OSError, ValueError):
                print(f"[shard {k}] {line.rstrip()}", file=sys.stderr, flush=True)

    def _await_workers(self) -> None:
        from .daemon import StartError

        limit = self.cfg["shard.start_timeout_s"]
        deadline = self.clock.monotonic() + limit
        while self.clock.monotonic() < deadline:
            self._take_hellos(timeout_ms=100)
            if all(w.hello is not None for w in self.workers):
                return
            for w in self.workers:
                if w.proc is not None and w.proc.poll() is not None:
                    raise StartError(f"shard {w.k} exited with status {w.proc.returncode} "
                                     "while starting (its log lines are above)")
        missing = [w.k for w in self.workers if w.hello is None]
        raise StartError(f"shards {missing} did not announce themselves on "
                         f"{self.endpoints['shards']} within {limit:g} s")

    def _start_metrics(self) -> None:
        from prometheus_client import start_http_server
        from prometheus_client.registry import CollectorRegistry

        from .daemon import StartError

        host, port = parse_address(self.cfg["service.metrics"])
        reg = CollectorRegistry(auto_describe=False)
        reg.register(_FrontCollector(self))
        try:
            self.metrics_server, _t = start_http_server(port, addr=host, registry=reg)
        except OSError as e:
            raise StartError(f"metrics address {self.cfg['service.metrics']}: {e.strerror or e}") from None
        self.endpoints["metrics"] = page_url(host, self.metrics_server.server_address[1])

    def _install_signals(self) -> None:
        if threading.current_thread() is not threading.main_thread():
            return

        def on_signal(signum: int, _f: Any) -> None:
            if signum == signal.SIGHUP:
                self._reload_all = True
            else:
                self._stop = True

        self._reload_all = False
        for s in (signal.SIGTERM, signal.SIGINT, signal.SIGHUP):
            signal.signal(s, on_signal)

    def request_stop(self) -> None:
        self._stop = True

    def _banner(self) -> None:
        t = self.topo
        n = self.smap.n_shards
        lines = [
            (f"routerd {__version__}: serving topology {t.name!r} — {t.n} nodes, {t.n_links} "
             f"directed links (topology id {t.digest}), sharded by destination over {n} workers"),
            (f"  ingest   {self.endpoints['ingest']}   ROUTER: batches, split by destination; "
             "each acknowledged once every piece is journaled"),
            f"  pull     {self.endpoints.get('pull', '- (off)')}   PULL: the same batches, fire-and-forget",
            f"  publish  {self.endpoints['publish']}   PUB: tables/<node>, merged from every worker",
            (f"  control  {self.endpoints['control']}   REP: tables, estimates, health, nodes; "
             "snapshot, link, reload (answered for the whole network)"
             + (" (control keys only)" if self.allow is not None else "")),
            *([f"  control-readonly  {self.endpoints['control_ro']}   REP without CURVE: "
               "tables, estimates, health, nodes"] if "control_ro" in self.endpoints else []),
            (f"  metrics  {self.endpoints['metrics']}   (the front's own series; each worker "
             "serves its own page, label shard)"),
            (f"  security CURVE on every ZeroMQ endpoint but the workers'; {len(self.allow)} "
             f"keys allowed ({'; '.join(_security.describe(self.allow))})"
             if self.allow is not None
             else "  security off: any local peer may report (give --server-key and --allow)"),
            (f"  shards   {self.endpoints['shards']}   PULL: workers announce themselves here "
             f"(map: {self.smap.source}; destinations per shard {self.smap.counts()})"),
        ]
        v = self.cfg["engine.variant"]
        if v in INEXACT_VARIANTS:
            lines.append(f"  caution  engine.variant {v}: {INEXACT_VARIANTS[v]}; the shards' "
                         "tables are not exactly one process's")
        for w in self.workers:
            h = w.hello or {}
            lines.append(f"  shard {w.k}/{n}  pid {h.get('pid')}  ingest {h.get('ingest')}  "
                         f"state {shard_dir(self.state_root, w.k, n)}")
        lines.extend(f"  input    {x}" for x in (self.inputs.said if self.inputs else ()))
        lines.append(ready_line(os.getpid(), self.epoch))
        with contextlib.suppress(OSError, ValueError):
            print("\n".join(lines), file=self.out, flush=True)
        self.log.info("started", workers=n, nodes=t.n, **self.endpoints)

    # -- workers announcing themselves -----------------------------------------------------
    def _take_hellos(self, timeout_ms: int = 0) -> None:
        import zmq

        s = self.sockets["shards"]
        if not s.poll(timeout_ms):
            return
        while True:
            try:
                data = s.recv(zmq.NOBLOCK)
            except zmq.Again:
                return
            self._hello(data)

    def _hello(self, data: bytes) -> None:
        try:
            h = wire.decode_reply(data)
        except wire.BadReply as e:
            self.log.warning("shard endpoint: unreadable announcement", reason=str(e))
            return
        k, n = h.get("shard"), h.get("of")
        if h.get("hello") != "shard" or not isinstance(k, int) or n != self.smap.n_shards \
                or not 0 <= k < self.smap.n_shards:
            self.log.warning("shard endpoint: announcement refused", shard=k, of=n,
                             reason=f"this front runs {self.smap.n_shards} shards")
            return
        if h.get("topology") != self.topo.digest:
            self.log.warning("shard endpoint: announcement refused", shard=k,
                             reason=f"topology {h.get('topology')} is not {self.topo.digest}")
            return
        want = zlib.crc32(self.smap.owned(k).astype("<i8").tobytes())
        if h.get("owned_digest") != want:
            self.log.warning("shard endpoint: announcement refused", shard=k,
                             reason="the worker's destination map differs from the front's "
                             "(same shard.map on both?)")
            return
        w = self.workers[k]
        old = w.hello
        w.hello = h
        w.last_hello = self.clock.monotonic()
        if old is None or any(old.get(x) != h.get(x) for x in ("ingest", "publish")):
            self._connect(w)
        if old is not None and old.get("epoch") != h.get("epoch"):
            self.log.info("shard restarted", shard=k, pid=h.get("pid"), epoch=h.get("epoch"))

    def _connect(self, w: _Worker) -> None:
        import zmq

        assert w.hello is not None
        for s in (w.dealer, w.sub):
            if s is not None:
                s.close(0)
        d = self.ctx.socket(zmq.DEALER)
        d.linger = 0
        d.sndhwm = d.rcvhwm = self.cfg["service.hwm_msgs"]
        d.setsockopt(zmq.RECONNECT_IVL, 50)
        d.setsockopt(zmq.RECONNECT_IVL_MAX, 1000)
        d.connect(w.hello["ingest"])
        sub = self.ctx.socket(zmq.SUB)
        sub.linger = 0
        sub.rcvhwm = 100_000
        sub.setsockopt(zmq.RECONNECT_IVL, 50)
        sub.setsockopt(zmq.SUBSCRIBE, wire.TABLE_TOPIC)
        sub.connect(w.hello["publish"])
        w.dealer, w.sub = d, sub
        self._rebuild_poller = True

    def _up(self, w: _Worker) -> bool:
        alive = w.proc is None or w.proc.poll() is None
        return alive and w.hello is not None and \
            self.clock.monotonic() - w.last_hello < 3 * self.cfg["shard.hello_interval_s"]

    # -- the loop ----------------------------------------------------------------------------
    def serve(self) -> int:
        import zmq

        self._rebuild_poller = True
        poller: Any = None
        try:
            while not self._stop:
                if self._rebuild_poller:
                    poller = zmq.Poller()
                    for s in self.sockets.values():
                        if s.type in (zmq.ROUTER, zmq.PULL, zmq.REP):
                            poller.register(s, zmq.POLLIN)
                    monitors = self.listeners.monitors() if self.listeners is not None else []
                    for m in monitors:
                        poller.register(m, zmq.POLLIN)
                    for w in self.workers:
                        for s in (w.dealer, w.sub):
                            if s is not None:
                                poller.register(s, zmq.POLLIN)
                    self._rebuild_poller = False
                ev = dict(poller.poll(self._poll_ms()))
                if getattr(self, "_reload_all", False):
                    self._reload_all = False
                    self._fan_out({"op": "reload"})
                if self.listeners is not None:
                    if any(m in ev for m in monitors):
                        self.listeners.read()
                    if self.clock.monotonic() >= self._next_gate_tick:
                        self.listeners.tick()
                        self._next_gate_tick = self.clock.monotonic() + 1.0
                if self.sockets["shards"] in ev:
                    self._take_hellos()
                for w in self.workers:
                    if w.sub is not None and w.sub in ev:
                        self._take_parts(w)
                    if w.dealer is not None and w.dealer in ev:
                        self._take_acks(w)
                if self.sockets["ingest"] in ev:
                    self._drain(self.sockets["ingest"], routed=True)
                if "pull" in self.sockets and self.sockets["pull"] in ev:
                    self._drain(self.sockets["pull"], routed=False)
                if self.sockets["control"] in ev:
                    self._control_one()
                if "control_ro" in self.sockets and self.sockets["control_ro"] in ev:
                    self._control_one("control_ro")
                self._expire()
                self._supervise()
                self._publish_due(self.cfg["service.publish_budget_s"])
        except Exception as e:  # noqa: BLE001 - a bug of ours: say so, stop the workers
            import traceback

            self.log.error("front: internal error; stopping", error=f"{type(e).__name__}: {e}",
                           traceback=traceback.format_exc().replace("\n", " | "))
            self._stop_workers()
            self.close()
            return 1
        return self._shutdown()

    # -- ingest ----------------------------------------------------------------------------------
    def _drain(self, sock: Any, routed: bool) -> None:
        import zmq

        allow = self.allow
        for _ in range(self.cfg["service.max_drain"]):
            try:   # under CURVE, with the allowed reporter of the frame's User-Id
                parts, peer = _security.recv_with_peer(sock, zmq.NOBLOCK, allow)
            except zmq.Again:
                return
            env, body = envelope(parts, routed)
            if len(body) != 1:
                self._answer(env if routed else None, self._count(extra_frames(len(body))))
                continue
            self._ingest_one(env if routed else None, body[0], peer)

    def _count(self, fed: Fed) -> bytes:
        """A pipeline outcome in the front's counts; its answer."""
        key = "batches_unavailable" if fed.counts.refused == "unavailable" else \
            f"batches_{fed.counts.result}"
        self.counts[key] += 1
        return fed.answer

    def _answer(self, env: list[bytes] | None, out: bytes) -> None:
        import zmq

        if env is None:
            return
        try:
            self.sockets["ingest"].send_multipart(env + [out], zmq.NOBLOCK)
        except zmq.ZMQError:
            self.counts["acks_undeliverable"] += 1

    def _ingest_one(self, env: list[bytes] | None, payload: bytes,
                    peer: _security.Reporter | None = None) -> None:
        import zmq

        cfg = self.cfg
        ing = self.pipeline.admit(payload, peer, self.clock.monotonic())
        if isinstance(ing, Fed):   # refused, or a duplicate answered from the window
            self._answer(env, self._count(ing))
            return
        hops = ing.hops
        names = self.topo.nodes
        links = [[names[a], names[b], "up" if u else "down"] for a, b, u in ing.links]
        owner = self.smap.owner[hops.dst] if len(hops) else np.empty(0, np.int64)
        pieces: dict[int, tuple[np.ndarray, tuple[int, ...]]] = {}
        frames: dict[int, bytes] = {}
        for k in range(self.smap.n_shards):
            idx = np.flatnonzero(owner == k)
            if not idx.size and not links:
                continue
            frames[k] = wire.encode_ingest_cols(
                ing.reporter, ing.batch, self.topo.digest, hops.src[idx], hops.via[idx],
                hops.dst[idx], hops.latency[idx], hops.estimate[idx], links=links)
            pieces[k] = (ing.hop_rows[idx], ing.link_rows)
        decode_rej = [[int(r), s] for r, s in ing.rejected]
        if not pieces:
            # nothing reached any engine: the decode-time answer is the whole answer
            self._answer(env, self._count(self.pipeline.settle(
                ing.reporter, ing.batch, 0, sorted(decode_rej))))
            return
        missing = [k for k in pieces if self.workers[k].dealer is None]
        if missing:
            self.counts["batches_unavailable"] += 1
            self._answer(env, wire.encode_error(
                f"unavailable: shards {missing} have not announced themselves; nothing of "
                "this batch was stored, send it again later", ing.batch))
            return
        token = TOKEN_PREFIX + _TOKEN.pack(self._next_token)
        self._next_token += 1
        p = _Pending(env, ing.reporter, ing.batch, self.clock.monotonic() + cfg["shard.timeout_s"], decode_rej,
                     len(links), pieces)
        for k, fr in frames.items():
            try:
                self.workers[k].dealer.send_multipart([token, b"", fr], zmq.NOBLOCK)
            except zmq.Again:
                p.error = (f"unavailable: shard {k} has {cfg['service.hwm_msgs']} pieces "
                           "queued and takes no more now; send it again later")
                break
            self.counts["pieces_sent"] += 1
        if p.error is not None:
            self.counts["batches_unavailable"] += 1
            self._answer(env, wire.encode_error(p.error, ing.batch))
            return
        self.pending[token] = p
        self.expiry[token] = p.deadline

    def _take_acks(self, w: _Worker) -> None:
        import zmq

        for _ in range(10_000):
            try:
                parts = w.dealer.recv_multipart(zmq.NOBLOCK)
            except zmq.Again:
                return
            token = parts[0] if parts else b""
            p = self.pending.get(token)
            if p is None or w.k not in p.pieces or w.k in p.acks:
                self.counts["pieces_late"] += 1
                continue
            try:
                rep = wire.decode_reply(parts[-1])
            except wire.BadReply as e:
                rep = {"error": f"unavailable: shard {w.k} answered badly ({e})"}
            self.counts["pieces_acked"] += 1
            if "error" in rep:
                p.error = str(rep["error"])
                self._finish(token, p)
                continue
            p.acks[w.k] = rep
            if len(p.acks) == len(p.pieces):
                self._finish(token, p)

    def _finish(self, token: bytes, p: _Pending) -> None:
        self.pending.pop(token, None)
        self.expiry.pop(token, None)
        if p.error is not None:
            self.counts["batches_unavailable"] += 1
            self._answer(p.env, wire.encode_error(p.error, p.batch))
            return
        rejected, accepted = combine_acks(p.decode_rejected, p.n_links, p.pieces, p.acks)
        self._answer(p.env, self._count(self.pipeline.settle(p.reporter, p.batch, accepted, rejected)))

    def _expire(self) -> None:
        now = self.clock.monotonic()
        while self.expiry:
            token, t = next(iter(self.expiry.items()))
            if t > now:
                return
            p = self.pending[token]
            late = sorted(set(p.pieces) - set(p.acks))
            p.error = (f"unavailable: shards {late} did not acknowledge within "
                       f"{self.cfg['shard.timeout_s']:g} s; the batch is not acknowledged, "
                       "send it again (what was stored is not applied twice)")
            self._finish(token, p)

    # -- tables ------------------------------------------------------------------------------------
    def _take_parts(self, w: _Worker) -> None:
        """Keep each worker's newest table part per node as it came (decoded only when
        the merged table goes out: parts arriving faster than publications cost a copy,
        not a decode).  Order needs no check: one PUB connection delivers in order."""
        import zmq

        topic = len(wire.TABLE_TOPIC)
        not_before = self.clock.monotonic() + self.cfg["service.debounce_s"]
        for _ in range(10_000):
            try:
                frames = w.sub.recv_multipart(zmq.NOBLOCK)
            except zmq.Again:
                return
            if len(frames) != 2:
                continue
            x = self.topo.index.get(bytes(frames[0][topic:]).decode("utf-8", "replace"))
            if x is None:
                continue
            w.raw[x] = frames[1]
            w.parts.pop(x, None)
            self.counts["parts_received"] += 1
            if x not in self._due:
                # parts of one decision round from several workers go out as one table
                self._due[x] = not_before

    def _part(self, w: _Worker, x: int) -> tuple[int, bytes]:
        got = w.parts.get(x)
        if got is None:
            raw = w.raw.get(x)
            got = (0, b"")
            if raw is not None:
                try:
                    got = routes_entries(raw)
                except ValueError as e:
                    self.log.warning("shard: unreadable table part", shard=w.k, reason=str(e))
            w.parts[x] = got
        return got

    def merged(self, x: int) -> dict[str, Any]:
        """Node x's table: every worker's part (their destinations are disjoint)."""
        return wire.decode_table(self._message(x, 0))["routes"]

    def _message(self, x: int, seq: int) -> list[bytes]:
        """The publication of node x: the workers' route entries spliced under one map
        header (no decode, no re-encode: the same bytes each worker encoded)."""
        return splice_table(self.topo.nodes[x], seq, self.epoch,
                            [self._part(w, x) for w in self.workers])

    def _publish_due(self, budget_s: float, final: bool = False) -> None:
        import zmq

        now = self.clock.monotonic()
        end = time.perf_counter() + budget_s     # CPU spent publishing: not the clock's time
        pub = self.sockets["publish"]
        while self._due:
            x, t = next(iter(self._due.items()))
            if t > now and not final:
                return      # queued in time order: the rest are later still
            del self._due[x]
            self.seq[x] += 1
            frames = self._message(x, self.seq[x])
            with contextlib.suppress(zmq.Again):
                pub.send_multipart(frames, zmq.NOBLOCK)
            self.counts["publications"] += 1
            if time.perf_counter() >= end:
                break

    def _poll_ms(self) -> int:
        if not self._due:
            return 100
        t = next(iter(self._due.values()))
        return max(0, min(100, int((t - self.clock.monotonic()) * 1000) + 1))

    # -- control -------------------------------------------------------------------------------------
    def _ask(self, w: _Worker, req: Mapping[str, Any]) -> dict[str, Any]:
        from routerd.agent import client

        if w.hello is None:
            return {"error": f"unavailable: shard {w.k} has not announced itself"}
        try:
            return client.control(w.hello["control"], req, self.cfg["shard.control_timeout_s"],
                                  context=self.ctx)
        except (TimeoutError, wire.BadReply) as e:
            return {"error": f"unavailable: shard {w.k}: {e}"}

    def _fan_out(self, req: Mapping[str, Any]) -> list[dict[str, Any]]:
        return [self._ask(w, req) for w in self.workers]

    def _control_one(self, name: str = "control") -> None:
        import zmq

        sock = self.sockets[name]
        readonly = name == "control_ro"
        curve = self.allow is not None and not readonly
        try:
            parts, peer = _security.recv_with_peer(sock, zmq.NOBLOCK,
                                                   self.allow if curve else None)
        except zmq.Again:
            return
        if len(parts) != 1:
            out = wire.encode_error(f"extra_frames: a control request is one frame, got {len(parts)}")
        else:
            req = wire.decode_control(parts[0], self.topo)
            if isinstance(req, wire.WireError):
                out = wire.encode_error(req.reason)
            elif (why := _security.control_refusal(req["op"], peer, curve=curve,
                                                   readonly=readonly)) is not None:
                out = wire.encode_error(why)
            else:
                out = wire.encode_reply(self.control(req))
        sock.send(out)

    def control(self, req: Mapping[str, Any]) -> dict[str, Any]:
        """One checked control request → the reply map for the whole network."""
        op = req["op"]
        if op == "nodes":
            nodes = wire.nodes_reply(self.topo)
            nodes.pop("v", None)
            return nodes
        if op == "health":
            return self.health()
        fwd = {k: v for k, v in req.items() if k != "v"}
        reps = self._fan_out(fwd)
        errs = [r["error"] for r in reps if "error" in r]
        if errs and op in ("tables", "estimates"):
            return {"error": errs[0]}
        if op == "tables":
            return {"tables": merge_tables(r["tables"] for r in reps)}
        if op == "estimates":
            est: dict[str, Any] = {}
            for r in reps:
                est.update(r["estimates"])
            return {"estimates": est}
        out: dict[str, Any] = {op: [r.get(op, r) for r in reps]}
        if errs:
            out["error"] = f"{len(errs)} of {len(reps)} shards failed: {errs[0]}"
        if op == "link" and not errs:
            first = dict(reps[0]["link"])
            first["changed"] = any(r["link"]["changed"] for r in reps)
            out = {"link": first}
        return out

    def health(self) -> dict[str, Any]:
        shards: list[dict[str, Any]] = []
        for w in self.workers:
            h = self._ask(w, {"op": "health"}) if self._up(w) else {"error": "down"}
            shards.append({"shard": w.k, "up": "error" not in h, "restarts": w.restarts,
                           "pid": (w.hello or {}).get("pid"),
                           "metrics": (w.hello or {}).get("metrics"), "health": h})
        up = sum(1 for s in shards if s["up"])
        return {"status": "stopping" if self._stop else ("ok" if up == len(shards) else "degraded"),
                "uptime_s": self.clock.monotonic() - self.started, "epoch": self.epoch,
                "version": __version__,
                "topology": {"name": self.topo.name, "id": self.topo.digest,
                             "nodes": self.topo.n, "links": self.topo.n_links},
                "front": {"in_flight": len(self.pending), **self.counts},
                "connections": self.listeners.figures() if self.listeners is not None else {},
                "security": {"curve": self.allow is not None,
                             "reporters": [] if self.allow is None else
                             [r.name for r in self.allow.reporters]},
                "shards_up": up, "shards": shards}

    # -- supervision and shutdown -------------------------------------------------------------------
    def _supervise(self) -> None:
        if self.external:
            return
        now = self.clock.monotonic()
        for w in self.workers:
            if w.proc is None:
                continue
            if w.restart_at is None and w.proc.poll() is not None:
                w.restart_at = now + self.cfg["shard.restart_delay_s"]
                self.log.warning("shard exited; restarting it", shard=w.k,
                                 status=w.proc.returncode,
                                 delay_s=self.cfg["shard.restart_delay_s"])
            elif w.restart_at is not None and now >= w.restart_at:
                w.restarts += 1
                self._spawn(w)

    def _stop_workers(self) -> None:
        for w in self.workers:
            if w.proc is not None and w.proc.poll() is None:
                with contextlib.suppress(OSError):
                    w.proc.send_signal(signal.SIGTERM)

    def _shutdown(self) -> int:
        self.log.info("stopping", shards=self.smap.n_shards)
        for token, p in list(self.pending.items()):
            p.error = "unavailable: the service is stopping; send it again later"
            self._finish(token, p)
        if not self.external:
            self._stop_workers()
            deadline = self.clock.monotonic() + self.cfg["service.shutdown_timeout_s"]
            while self.clock.monotonic() < deadline and any(
                    w.proc is not None and w.proc.poll() is None for w in self.workers):
                self._drain_parts(0.05)
            for w in self.workers:
                if w.proc is not None and w.proc.poll() is None:
                    w.proc.kill()
                    w.proc.wait(5)
            self._drain_parts(0.1)
        self._due = OrderedDict((x, 0.0) for x in range(self.topo.n))
        self._publish_due(3600.0, final=True)
        self.close()
        self.log.info("stopped")
        return 0

    def _drain_parts(self, wait_s: float) -> None:
        end = self.clock.monotonic() + wait_s
        while True:
            for w in self.workers:
                if w.sub is not None:
                    self._take_parts(w)
            if self.clock.monotonic() >= end:
                return
            self.clock.sleep(0.01)

    def close(self) -> None:
        """Release everything (idempotent); local workers still running are stopped."""
        if not self.external:
            self._stop_workers()
            for w in self.workers:
                if w.proc is not None and w.proc.poll() is None:
                    try:
                        w.proc.wait(self.cfg["service.shutdown_timeout_s"])
                    except subprocess.TimeoutExpired:
                        w.proc.kill()
                        w.proc.wait(5)
        _listeners.close_transport(self, [s for w in self.workers for s in (w.dealer, w.sub)])
        for w in self.workers:
            w.dealer = w.sub = None
        if self._ipc_dir is not None:
            import shutil

            shutil.rmtree(self._ipc_dir, ignore_errors=True)
            self._ipc_dir = None
        if self.state_lock is not None:   # last: the workers are gone by now
            self.state_lock.release()
            self.state_lock = None


def routes_entries(body: bytes) -> tuple[int, bytes]:
    """A table publication's body → (number of destinations, the bytes of its ``routes``
    map entries).  ValueError if it is not a v1 table body."""
    import msgpack

    u = msgpack.Unpacker(raw=False, strict_map_key=False, max_ext_len=0)
    u.feed(body)
    try:
        for _ in range(u.read_map_header()):
            key = u.unpack()
            if key != "routes":
                u.skip()
                continue
            m = u.read_map_header()
            start = u.tell()
            for _ in range(2 * m):
                u.skip()
            return m, body[start:u.tell()]
    except (msgpack.UnpackException, ValueError, TypeError) as e:
        raise ValueError(f"table body does not parse: {e}") from None
    raise ValueError("table body has no 'routes'")


def splice_table(node: str, seq: int, epoch: Any, parts: Sequence[tuple[int, bytes]]) -> list[bytes]:
    """The two frames of :func:`wire.table_message` for ``node`` whose routes are the
    concatenated entries of ``parts`` (disjoint destinations, see :func:`routes_entries`)."""
    import msgpack

    pk = msgpack.Packer(use_bin_type=True)
    head = wire.table_message(node, seq, epoch, {})[1]   # ... "routes": {} (an empty map, last)
    assert head[-1] == 0x80
    body = b"".join([head[:-1], pk.pack_map_header(sum(m for m, _ in parts)),
                     *(b for _, b in parts)])
    return [wire.TABLE_TOPIC + node.encode(), body]


def combine_acks(decode_rejected: Sequence[Sequence[Any]], n_links: int,
                 pieces: Mapping[int, tuple[np.ndarray, tuple[int, ...]]],
                 acks: Mapping[int, Mapping[str, Any]]) -> tuple[list[list[Any]], int]:
    """Every piece's ack → (rejections in the batch's row numbering, sorted; accepted).

    Piece row r of shard k is hop row ``rows_k[r]`` while r < h_k (its hop count), else
    link row ``link_rows[r - h_k]``.  Every piece carries every link row, so each link
    row's fate is taken once (from the first piece); ``accepted`` counts hop rows of every
    piece and link rows once.
    """
    rej: dict[int, str] = {int(r): str(s) for r, s in decode_rejected}
    accepted = 0
    links_done = False
    for k in sorted(pieces):
        rows, link_rows = pieces[k]
        a = acks[k]
        h = len(rows)
        link_rej = 0
        for r, s in a.get("rejected", ()):
            r = int(r)
            if r < h:
                rej[int(rows[r])] = str(s)
            else:
                link_rej += 1
                if not links_done:
                    rej[int(link_rows[r - h])] = str(s)
        accepted += int(a.get("accepted", 0)) - (n_links - link_rej)
        if not links_done and n_links:
            accepted += n_links - link_rej
            links_done = True
    return [[r, s] for r, s in sorted(rej.items())], accepted


class _FrontCollector:
    """The front's metrics page: its own series only, with ``shard="front"`` (each worker
    serves its own page, every series labelled ``shard="K"``, and Prometheus scrapes them
    directly: deploy/prometheus.yml; a scrape here never waits for a worker).

    It runs in the HTTP server's thread and takes no lock: it reads only values the loop
    replaces whole or counts in place (``counts``, a dict with fixed keys of ints; ``len``
    of ``pending``; each worker's ``hello``, a dict swapped for a new one; ``listeners``
    read once), so a scrape sees each figure at some moment of the loop, never a torn one.
    The front holds no engine (nothing like :attr:`Service.lock` guards)."""

    def __init__(self, front: Front):
        self.front = front

    def describe(self) -> list[Any]:
        return []

    def collect(self) -> Iterable[Any]:
        from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily

        from .metrics import connection_families, with_labels

        f = self.front
        lst = f.listeners
        if lst is not None:   # the front's own connection figures
            for m in connection_families(lst.figures()):
                yield with_labels(m, {"shard": "front"})
        c = CounterMetricFamily("routerd_shard_front_batches", "Batches at the front, by result",
                                labels=["shard", "result"])
        for k in ("accepted", "duplicate", "refused", "unavailable"):
            c.add_metric(["front", k], float(f.counts[f"batches_{k}"]))
        yield c
        p = CounterMetricFamily("routerd_shard_front_pieces", "Pieces sent to workers and "
                                "acknowledged by them", labels=["shard", "result"])
        for k in ("sent", "acked", "late"):
            p.add_metric(["front", k], float(f.counts[f"pieces_{k}"]))
        yield p
        pub = CounterMetricFamily("routerd_shard_front_publications", "Merged table "
                                  "publications", labels=["shard"])
        pub.add_metric(["front"], float(f.counts["publications"]))
        yield pub
        g = GaugeMetricFamily("routerd_shard_front_in_flight", "Batches waiting for "
                              "their pieces' acknowledgements", labels=["shard"])
        g.add_metric(["front"], float(len(f.pending)))
        yield g
        up = GaugeMetricFamily("routerd_shard_up", "1 when the worker has announced itself "
                               "recently", labels=["shard"])
        for w in f.workers:
            up.add_metric([str(w.k)], 1.0 if f._up(w) else 0.0)
        yield up


# ---- a reporter that splits by destination itself --------------------------------------------
class ShardReporter:
    """One :class:`routerd.agent.client.Reporter` per worker, rows routed by the owner of their
    destination (the front's map), link rows to every worker: a client that sends to the
    workers directly (no front on the ingest path).  ``workers``: each worker's ingest
    endpoint in shard order (the front's control ``health`` lists them)."""

    def __init__(self, workers: Sequence[str], reporter_name: str, topo: _topology.Topology,
                 smap: ShardMap | None = None, **kw: Any):
        from routerd.agent.client import Reporter

        self.smap = smap or ShardMap.build(topo, len(workers))
        if self.smap.n_shards != len(workers):
            raise ValueError(f"{len(workers)} worker endpoints for {self.smap.n_shards} shards")
        self.topo = topo
        self.reporters = [Reporter(ep, reporter_name, topology_nodes=topo, **kw) for ep in workers]

    def add_hop(self, frm: str, via: str, dst: str, latency_s: float,
                estimate_s: float | None = None) -> None:
        k = int(self.smap.owner[self.topo.index[dst]])
        self.reporters[k].add_hop(frm, via, dst, latency_s, estimate_s)

    def add_link(self, frm: str, to: str, state: str) -> None:
        for r in self.reporters:
            r.add_link(frm, to, state)

    def flush(self) -> None:
        for r in self.reporters:
            r.flush()

    def close(self, flush: bool = True) -> None:
        for r in self.reporters:
            r.close(flush)

