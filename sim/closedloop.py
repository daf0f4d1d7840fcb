"""The closed loop: the simulator plays the overlay around a live ``routerd serve``.

Owns: the ``service`` policy (:class:`ServicePolicy`, a :class:`routerd.sim.policy.Policy`
adapter), the ``ENDPOINTS`` syntax of ``--policy service:ENDPOINTS``
(:func:`parse_endpoints`), the service subprocess the policy starts when no endpoints
are named (:class:`ServiceProcess`), and the pacing of virtual time against the wall
clock.  Must not import: the engine (the service holds the only one), matplotlib,
prometheus, zmq (it talks to the service through :mod:`routerd.agent.client` only:
``Reporter``, ``TableSubscriber``, ``ControlPipe``).

Theory of operation
-------------------
Roles.  The simulator is the overlay: it moves the packets and measures every hop.  The
service is the routing brain: it learns from the hop rows the simulator reports and
publishes tables; the simulator forwards by the tables it last received.  Nothing is
learned on the simulator's side.

Rows.  Exactly as the in-process ``qrouting`` adapter (:class:`routerd.sim.policies.QRouting`):
when x hands a packet for d to y and it reaches y, the row
``(x, y, d, hop latency, y's remaining estimate)`` becomes due at x after the link's
propagation delay (or at once with ``sim.feedback = instant``).  y's estimate is what y
publishes (``sim.estimate = published``: the Q-value of y's published greedy next hop)
or the minimum over y's live next hops (``min``); both come from the service: the
Q-values from control ``estimates`` replies, the greedy hop from the latest table.  So
both adapters feed the engine's rule the same rows; what differs is *when*.

Ticks and pacing.  Every ``sim.decision_interval_s`` of virtual time (the in-process
adapter's decision cadence) the policy's ``tick(now)``:

1. paces: waits until the wall clock reaches ``start + now / speed``
   (``sim.service.speed``: 1 = real time), taking table publications while it waits;
   a simulation that falls behind does not wait, and the lag is counted;
2. sends the rows due by ``now`` as one batch through :class:`routerd.agent.client.Reporter`
   and waits for the acknowledgement (an ack means "journaled and applied");
3. refreshes the estimates of up to ``sim.service.estimate_nodes`` nodes (round
   robin; 0 = all) with pipelined control requests (:class:`routerd.agent.client.ControlPipe`);
4. takes every table received through :class:`routerd.agent.client.TableSubscriber` into
   the forwarding table: single next hops go into the simulator's fast-path table,
   splits (exploration weights included) are sampled with the run's generator exactly
   as the in-process adapter samples them.

Link events of the scenario are reported as link rows and flushed at once.

Feedback latency.  In process, rows applied at a tick change the tables used from that
tick on.  Here the service decides at most every ``service.debounce_s`` of wall time
(set to ``decision_interval_s / speed`` for a service this module starts, i.e. the same
virtual cadence), then publishes, and the simulator takes the tables at its next wait:
a routing change reaches the packets about one to two decision intervals later than in
process (plus the transport), and at a speed-up the service's own processing time is
stretched by the speed factor in virtual time.  Under steady load this costs nothing
measurable; around a link failure it shows as the packets that still go to the dead
link until the new tables arrive.

A CURVE-secured service (``routerd serve --server-key ... --allow ...``) is named with
``--policy service:ENDPOINTS`` as any other, plus ``sim.service.client_key`` (our
``NAME.key_secret``) and ``sim.service.server_key`` (its ``NAME.key`` or Z85 key): every
socket of the policy is then a CURVE client.  The batches carry ``sim.service.reporter``,
whose allow-file entry must list every node (the simulator reports for all of them).

The service this module starts runs ``routerd serve`` as a child process on ipc://
endpoints in a private temporary directory, with the run's topology (written out in our
YAML format) and config.  It is stopped by :meth:`ServiceProcess.stop` (SIGTERM, then
SIGKILL after the service's own shutdown bound), at interpreter exit, and — on Linux —
by the kernel when the starting thread dies (``PR_SET_PDEATHSIG``), so neither Ctrl-C
nor a killed simulator leaves a daemon behind.
"""
from __future__ import annotations

import atexit
import math
import os
import re
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from routerd.core import topology as _topology
from routerd.core.errors import InputError, Problem
from routerd.io import config as _config
from routerd.io.childproc import parse_ready

from .policy import Policy

#: the keys of the ENDPOINTS syntax: ``ingest=EP,publish=EP,control=EP[,metrics=URL]``
ENDPOINT_KEYS = ("ingest", "publish", "control", "metrics")
_REQUIRED = ("ingest", "publish", "control")
_EP_LINE = re.compile(r"^  (ingest|pull|publish|control|metrics|state)\s+(\S+)")
START_TIMEOUT_S = 30.0


class ServiceLost(InputError):
    """The service stopped answering in the middle of a closed-loop run."""


# ---- endpoints ------------------------------------------------------------------------
@dataclass(frozen=True, slots=True)
class Endpoints:
    ingest: str
    publish: str
    control: str
    metrics: str | None = None

    def spec(self) -> str:
        """Back to the ENDPOINTS syntax."""
        parts = [f"{k}={getattr(self, k)}" for k in ENDPOINT_KEYS if getattr(self, k)]
        return ",".join(parts)


def parse_endpoints(text: str, where: str = "--policy service") -> Endpoints:
    """``ingest=EP,publish=EP,control=EP[,metrics=URL]`` → :class:`Endpoints`.

    ZeroMQ endpoints must be ``tcp://`` or ``ipc://``; every problem is reported at once.
    """
    problems: list[Problem] = []
    got: dict[str, str] = {}
    for item in (s.strip() for s in text.split(",")):
        if not item:
            continue
        key, eq, val = item.partition("=")
        key = key.strip()
        if not eq or not val:
            problems.append(Problem(where, item, "must be KEY=ENDPOINT (keys: "
                                    f"{', '.join(ENDPOINT_KEYS)})"))
            continue
        if key not in ENDPOINT_KEYS:
            problems.append(Problem(where, key, f"is not an endpoint key ({', '.join(ENDPOINT_KEYS)})"))
            continue
        if key in got:
            problems.append(Problem(where, key, "is given twice"))
            continue
        if key != "metrics" and not val.startswith(("tcp://", "ipc://")):
            problems.append(Problem(f"{where}: {key}", val, "must be a tcp:// or ipc:// endpoint"))
            continue
        got[key] = val
    for k in _REQUIRED:
        if k not in got and not any(p.where == where and p.value == k for p in problems):
            problems.append(Problem(where, text, f"names no {k} endpoint (needs {', '.join(_REQUIRED)})"))
    if problems:
        raise InputError(problems)
    return Endpoints(got["ingest"], got["publish"], got["control"], got.get("metrics"))


# ---- the service process --------------------------------------------------------------
# Run in the child before the service starts: ask the kernel to send SIGTERM when the
# parent thread dies (Linux), leave if the parent is already gone, then become the service.
_CHILD = r"""
import os, sys
ppid = int(sys.argv[1])
from routerd.io.childproc import die_with_parent
die_with_parent()
if os.getppid() != ppid:
    sys.exit(3)
os.execv(sys.executable, [sys.executable, "-m", "routerd", "serve", *sys.argv[2:]])
"""


class ServiceProcess:
    """A ``routerd serve`` child process serving ``topology`` with ``cfg``'s engine settings.

    ``base``: a directory for the endpoints (ipc), the config and topology files and the
    logs; a fresh temporary one (removed by :meth:`stop`) when None.  ``state_dir``:
    the service's journal and snapshots (default ``base/state``).  ``transport``: ``ipc``
    (sockets in ``base``) or ``tcp`` (127.0.0.1, ports picked by the system).
    ``overrides``: extra config keys for the service (e.g. ``service.debounce_s``).
    """

    def __init__(self, topology: _topology.Topology, cfg: _config.Config | None = None, *,
                 base: str | None = None, state_dir: str | None = None,
                 transport: str = "ipc", overrides: Mapping[str, Any] | None = None):
        if transport not in ("ipc", "tcp"):
            raise ValueError(f"transport {transport!r} is not ipc or tcp")
        self.topology = topology
        self.cfg = cfg if cfg is not None else _config.load()
        self._own_base = base is None
        # ipc:// paths must stay under ~100 bytes: a short directory under /tmp
        self.base = base if base is not None else tempfile.mkdtemp(prefix="rd-cl-", dir="/tmp")
        os.makedirs(self.base, exist_ok=True)
        self.state_dir = os.path.abspath(state_dir or os.path.join(self.base, "state"))
        self.transport = transport
        self.overrides = dict(overrides or {})
        self.proc: subprocess.Popen[bytes] | None = None
        self.endpoints: dict[str, str] = {}
        self.pid: int | None = None
        self.epoch: int | None = None
        self.banner: list[str] = []
        self.out_path = os.path.join(self.base, "service.out")
        self.log_path = os.path.join(self.base, "service.log")
        self.returncode: int | None = None

    def _files(self) -> tuple[str, str]:
        topo_path = os.path.join(self.base, "topology.yaml")
        cfg_path = os.path.join(self.base, "service.yaml")
        import yaml

        with open(topo_path, "w", encoding="utf-8") as fh:
            fh.write("# written by the closed-loop simulator: the topology it simulates\n")
            yaml.safe_dump(_topology.to_mapping(self.topology), fh, sort_keys=False)
        ov = {"topology.file": None, **self.overrides}
        flat = self.cfg.with_overrides(ov, where="closed loop").nested()
        with open(cfg_path, "w", encoding="utf-8") as fh:
            fh.write("# written by the closed-loop simulator: the config of its run\n")
            yaml.safe_dump(flat, fh, sort_keys=True)
        return topo_path, cfg_path

    def start(self, timeout_s: float = START_TIMEOUT_S) -> dict[str, str]:
        """Start the service and wait until it is ready; returns its endpoints."""
        topo_path, cfg_path = self._files()
        if self.transport == "ipc":
            eps = [f"ipc://{self.base}/ingest", f"ipc://{self.base}/pub", f"ipc://{self.base}/ctl"]
        else:
            eps = ["tcp://127.0.0.1:*"] * 3
        args = ["--config", cfg_path, "--topology", topo_path, "--ingest", eps[0],
                "--publish", eps[1], "--control", eps[2], "--metrics", "127.0.0.1:0",
                "--state-dir", self.state_dir]
        with open(self.out_path, "wb") as out, open(self.log_path, "wb") as log:
            self.proc = subprocess.Popen(
                [sys.executable, "-c", _CHILD, str(os.getpid()), *args],
                stdin=subprocess.DEVNULL, stdout=out, stderr=log,
                start_new_session=True)      # Ctrl-C reaches us; we stop it in order
        _LIVE.add(self)
        self.pid = self.proc.pid
        deadline = time.monotonic() + timeout_s
        while True:
            lines = self._read_out()
            if any(parse_ready(ln) for ln in lines):
                break
            rc = self.proc.poll()
            if rc is not None:
                self.returncode = rc
                _LIVE.discard(self)
                raise InputError(Problem("routerd serve", rc, "exited before it was ready:\n"
                                         + self.log_tail()))
            if time.monotonic() > deadline:
                self.stop()
                raise InputError(Problem("routerd serve", f"{timeout_s:g} s",
                                         "did not become ready in time:\n" + self.log_tail()))
            time.sleep(0.05)
        self.banner = lines
        for ln in lines:
            m = _EP_LINE.match(ln)
            if m and m.group(2) != "-":
                self.endpoints[m.group(1)] = m.group(2)
            r = parse_ready(ln)
            if r:
                self.epoch = r[1]
        return dict(self.endpoints)

    def _read_out(self) -> list[str]:
        try:
            with open(self.out_path, encoding="utf-8", errors="replace") as fh:
                return fh.read().splitlines()
        except FileNotFoundError:
            return []

    def log_tail(self, lines: int = 12) -> str:
        try:
            with open(self.log_path, encoding="utf-8", errors="replace") as fh:
                return "\n".join(fh.read().splitlines()[-lines:])
        except FileNotFoundError:
            return ""

    def endpoints_spec(self) -> Endpoints:
        e = self.endpoints
        return Endpoints(e["ingest"], e["publish"], e["control"], e.get("metrics"))

    @property
    def running(self) -> bool:
        return self.proc is not None and self.proc.poll() is None

    def stop(self, timeout_s: float | None = None) -> int | None:
        """SIGTERM (the service writes its final snapshot), SIGKILL if it overstays.
        Idempotent; returns the exit status.  Removes a temporary ``base`` unless the
        state directory lives inside it and is still wanted (never: it is temporary)."""
        p = self.proc
        if p is not None and p.poll() is None:
            limit = (timeout_s if timeout_s is not None
                     else float(self.cfg["service.shutdown_timeout_s"]) + 5.0)
            try:
                p.send_signal(signal.SIGTERM)
                p.wait(limit)
            except subprocess.TimeoutExpired:
                p.kill()
                p.wait(10)
            except ProcessLookupError:
                pass
        if p is not None:
            self.returncode = p.poll()
        _LIVE.discard(self)
        if self._own_base and os.path.isdir(self.base):
            shutil.rmtree(self.base, ignore_errors=True)
        return self.returncode

    def __enter__(self) -> ServiceProcess:  # noqa: PYI034 - Self needs Python 3.11
        self.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.stop()


_LIVE: set[ServiceProcess] = set()


@atexit.register
def _stop_all() -> None:  # a safety net: every normal path stops its service itself
    for sp in list(_LIVE):
        sp.stop(timeout_s=5.0)


# ---- the policy ---------------------------------------------------------------------------
class ServicePolicy(Policy):
    """Forward by a live service's tables; report every hop to it.  See the module docstring.

    ``endpoints``: an ENDPOINTS string or :class:`Endpoints` of a running service, or None
    to start one (:class:`ServiceProcess`) for the run.  ``process``: a service already
    started by the caller (kept running at the end; the caller stops it).
    ``on_tick(policy, now)``: called after every tick (live displays).
    """

    name = "service"
    takes_argument = True

    def __init__(self, endpoints: str | Endpoints | None = None, *,
                 process: ServiceProcess | None = None,
                 on_tick: Callable[[ServicePolicy, float], None] | None = None):
        if isinstance(endpoints, str):
            endpoints = parse_endpoints(endpoints)
        self.endpoints_given = endpoints
        self.process = process
        self.on_tick = on_tick
        self._own_process: ServiceProcess | None = None
        self.reporter: Any = None
        self.subscriber: Any = None
        self._ctl: Any = None            # routerd.agent.client.ControlPipe
        self.final_tables: dict[str, dict[str, list[list[Any]]]] | None = None
        self.final_health: dict[str, Any] | None = None
        self.close_problem: str | None = None
        self.closed = False
        # statistics
        self.ticks = 0
        self.rows_sent = 0
        self.links_sent = 0
        self.link_feedback_s: list[float] = []
        self._link_wait_since: float | None = None
        self.batches = 0
        self.tables_taken = 0
        self.estimate_requests = 0
        self.lag_max_s = 0.0
        self.lag_sum_s = 0.0
        self.ticks_behind = 0
        self.wait_s = 0.0

    # -- set-up -------------------------------------------------------------------------
    def attach(self, topology: _topology.Topology, rng: np.random.Generator, settings: Any) -> None:
        super().attach(topology, rng, settings)
        from routerd.agent.client import ControlPipe, Reporter, TableSubscriber
        from routerd.io import security

        cfg = settings if settings is not None else _config.load()
        self.cfg = cfg
        curve = security.client_keys(cfg["sim.service.client_key"], cfg["sim.service.server_key"],
                                     "sim.service")
        if curve is not None and self.endpoints_given is None:
            raise InputError(Problem("sim.service.client_key", cfg["sim.service.client_key"],
                                     "is for a CURVE service named with --policy "
                                     "service:ENDPOINTS; the service a run starts itself has "
                                     "no CURVE"))
        self.tick_interval_s = self._tick = float(cfg["sim.decision_interval_s"])
        self.instant = cfg["sim.feedback"] == "instant"
        self.estimate_mode = cfg["sim.estimate"]
        self.speed = float(cfg["sim.service.speed"])
        self.timeout_s = float(cfg["sim.service.timeout_s"])
        self.ceiling = float(cfg["engine.ceiling_s"])
        # split mode: a node reports the share-weighted mean of its published next hops'
        # estimates (Engine.published_estimate's rule), not its largest share's
        self.split_mode = _config.split_fits(cfg, topology.n)[0]["engine.mode"] == "split"   # as the service runs
        n = topology.n
        self.n = n
        self.names = topology.nodes
        self.index = topology.index
        budget = int(cfg["sim.service.estimate_nodes"])
        self.estimate_budget = n if budget <= 0 else min(budget, n)
        if self.endpoints_given is not None:
            eps = self.endpoints_given
        else:
            if self.process is None:
                self._own_process = ServiceProcess(
                    topology, cfg, overrides=service_overrides(cfg))
                self._own_process.start()
                self.process = self._own_process
            eps = self.process.endpoints_spec()
        self.endpoints = eps
        self._ctl = ControlPipe(eps.control, self.timeout_s, curve=curve)
        where = f"--policy service:{eps.spec()}"
        try:
            nodes = self._ask([{"op": "nodes"}])[0]
        except TimeoutError:
            self.close()
            hint = ("" if curve is None else " (CURVE on: or the service does not allow "
                    "sim.service.client_key, or sim.service.server_key is not its key)")
            raise InputError(Problem(where, eps.control, f"no routerd serve answered there within "
                                     f"{self.timeout_s:g} s{hint}")) from None
        if nodes.get("topology") != topology.digest:
            self.close()
            raise InputError(Problem(where, nodes.get("topology"),
                                     f"is the topology id the service serves; this run simulates "
                                     f"{topology.name!r} (id {topology.digest}): start the service "
                                     f"with the same topology"))
        self.subscriber = TableSubscriber(eps.publish, curve=curve)
        self.reporter = Reporter(eps.ingest, cfg["sim.service.reporter"]
                                 or f"sim-{os.getpid()}-{id(self) & 0xFFFF:x}",
                                 topology_nodes=topology, batch_rows=1 << 20, max_pending=4,
                                 # three tries in all within sim.service.timeout_s
                                 timeout_s=self.timeout_s / 3, retries=2, curve=curve)
        # propagation delay of each link: when the row is due back at the sender
        self._prop: list[dict[int, float]] = [{} for _ in range(n)]
        for k, (a, b) in enumerate(zip(topology.src.tolist(), topology.dst.tolist())):
            self._prop[a][b] = 0.0 if self.instant else float(topology.delay_s[k])
        self._rows: list[tuple[float, int, int, int, float, float]] = []
        self.table = [[-1] * n for _ in range(n)]
        self._split: list[dict[int, tuple[tuple[int, ...], tuple[float, ...]]]] = [{} for _ in range(n)]
        self._greedy = [[-1] * n for _ in range(n)]
        self._off = [[0.0] * n for _ in range(n)]     # off-greedy weight per (x, d)
        self._weights: list[dict[int, list[tuple[int, float]]]] = [{} for _ in range(n)]
        self._est: list[dict[int, dict[int, float]]] = [{} for _ in range(n)]
        self._V = [[0.0 if x == d else self.ceiling for d in range(n)] for x in range(n)]
        self._seen: dict[str, int] = {}
        self._rr = 0
        self._u: list[float] = []
        self._ui = 0
        # the starting point: every table and estimate, asked directly
        tabs = self._ask([{"op": "tables"}])[0]["tables"]
        for x_name, routes in tabs.items():
            self._take_routes(self.index[x_name], routes)
        self._refresh_estimates(all_nodes=True)
        self._wall0 = time.monotonic()

    def _ask(self, reqs: Sequence[Mapping[str, Any]]) -> list[dict[str, Any]]:
        assert self._ctl is not None
        out = self._ctl.ask(reqs)
        self.estimate_requests += sum(1 for r in reqs if r.get("op") == "estimates")
        for r, rep in zip(reqs, out):
            if "error" in rep:
                raise ServiceLost(Problem(self._ctl.endpoint, r.get("op"),
                                          f"was refused by the service: {rep['error']}"))
        return out

    def _lost(self, endpoint: str, detail: str) -> ServiceLost:
        """The error for a service that stopped answering; says so plainly when it is the
        one we started and it has exited."""
        p = self._own_process
        if p is not None and not p.running:
            rc = p.proc.poll() if p.proc is not None else None
            return ServiceLost(Problem("routerd serve", f"pid {p.pid}",
                                       f"exited (status {rc}) in the middle of the run; "
                                       f"its last log lines:\n{p.log_tail()}"))
        return ServiceLost(Problem(endpoint, "service", f"stopped answering: {detail}"))

    # -- forwarding ---------------------------------------------------------------------
    def _take_routes(self, x: int, routes: Mapping[str, Sequence[Sequence[Any]]]) -> None:
        """One published table of node x → fast-path row, splits, greedy hops."""
        ix = self.index
        row = [-1] * self.n
        greedy = [-1] * self.n
        off = [0.0] * self.n
        split: dict[int, tuple[tuple[int, ...], tuple[float, ...]]] = {}
        weights: dict[int, list[tuple[int, float]]] = {}
        for d_name, ws in routes.items():
            d = ix.get(d_name)
            if d is None or not ws:
                continue
            hops = [(ix[h], float(w)) for h, w in ws if w > 0 and h in ix]
            if not hops:
                continue
            greedy[d] = ix[ws[0][0]] if ws[0][0] in ix else hops[0][0]
            weights[d] = hops
            off[d] = 1.0 - float(ws[0][1])
            if len(hops) == 1:
                row[d] = hops[0][0]
            else:
                row[d] = -2
                cum = np.cumsum([w for _, w in hops]).tolist()
                cum[-1] = 1.0
                split[d] = (tuple(h for h, _ in hops), tuple(cum))
        self.table[x][:] = row          # type: ignore[index]
        self._split[x] = split
        self._greedy[x] = greedy
        self._off[x] = off
        self._weights[x] = weights
        self._update_v(x)

    def next_hop(self, x: int, d: int, flow: int, now: float) -> int:
        h = self.table[x][d]  # type: ignore[index]
        if h != -2:
            return h
        hops, cum = self._split[x][d]
        # the same draws as the in-process adapter: blocks of 4096 uniforms
        if self._ui >= len(self._u):
            self._u = self.rng.random(4096).tolist()
            self._ui = 0
        u = self._u[self._ui]
        self._ui += 1
        for hh, c in zip(hops, cum):
            if u < c:
                return hh
        return hops[-1]

    # -- estimates ------------------------------------------------------------------------
    def _refresh_estimates(self, all_nodes: bool = False) -> None:
        n = self.n
        k = n if all_nodes else self.estimate_budget
        xs = [(self._rr + i) % n for i in range(k)]
        self._rr = (self._rr + k) % n
        try:
            reps = self._ask([{"op": "estimates", "node": self.names[x]} for x in xs])
        except TimeoutError as e:
            raise self._lost(self.endpoints.control, str(e)) from None
        ix = self.index
        for x, rep in zip(xs, reps):
            est: dict[int, dict[int, float]] = {}
            for d_name, by in rep["estimates"].items():
                est[ix[d_name]] = {ix[y]: float(q) for y, q in by.items()}
            self._est[x] = est
            self._update_v(x)

    def _update_v(self, y: int) -> None:
        """y's remaining estimate per destination, as y would report it."""
        est = self._est[y]
        g = self._greedy[y]
        row = self._V[y]
        published = self.estimate_mode == "published"
        for d in range(self.n):
            if d == y:
                row[d] = 0.0
                continue
            by = est.get(d)
            if not by:
                row[d] = self.ceiling
                continue
            if not published:
                row[d] = min(by.values())
            elif g[d] < 0:
                row[d] = self.ceiling          # no route: as the engine reports it
            elif self.split_mode:
                ws = self._weights[y].get(d, ())
                if all(h in by for h, _ in ws):
                    row[d] = min(sum(w * by[h] for h, w in ws), self.ceiling)
                else:
                    row[d] = min(by.values())
            else:
                # the tables and the estimates come from slightly different moments:
                # a greedy hop missing from the estimates (its link just went down) falls
                # back to the best live one
                q = by.get(g[d])
                row[d] = q if q is not None else min(by.values())

    # -- the loop's hooks -----------------------------------------------------------------
    def on_hop(self, x: int, y: int, d: int, latency_s: float, now: float) -> None:
        if x >= 0:
            self._rows.append((now + self._prop[x][y], x, y, d, latency_s, self._V[y][d]))

    def on_link(self, x: int, y: int, up: bool, now: float) -> None:
        self.reporter.add_link(self.names[x], self.names[y], "up" if up else "down")
        self.links_sent += 1
        self._flush()
        if self._link_wait_since is None:
            self._link_wait_since = time.monotonic()

    def tick(self, now: float) -> None:
        self._pace(now)
        self._send_due(now)
        self._refresh_estimates()
        self._take_tables()
        self.ticks += 1
        if self.on_tick is not None:
            self.on_tick(self, now)

    def _pace(self, now: float) -> None:
        target = self._wall0 + now / self.speed
        left = target - time.monotonic()
        if left <= 0:
            lag = -left
            self.lag_sum_s += lag
            self.lag_max_s = max(self.lag_max_s, lag)
            if lag > self._tick / self.speed:
                self.ticks_behind += 1
            self.subscriber.poll(0)
            return
        self.wait_s += left
        while left > 0:        # the wait is spent taking publications
            self.subscriber.poll(left)
            left = target - time.monotonic()

    def _send_due(self, now: float) -> None:
        rows = self._rows
        if not rows:
            return
        if self.instant:
            due, self._rows = rows, []
        else:
            due = [r for r in rows if r[0] <= now]
            self._rows = [r for r in rows if r[0] > now]
        if not due:
            return
        due.sort(key=lambda r: r[0])  # stable: ties keep arrival order (as in process)
        nm = self.names
        add = self.reporter.add_hop
        for _, x, y, d, lat, est in due:
            add(nm[x], nm[y], nm[d], lat, est)
        self.rows_sent += len(due)
        self._flush()

    def _flush(self) -> None:
        from routerd.agent.client import DeliveryError, ServiceError

        try:
            self.reporter.flush()
        except (DeliveryError, ServiceError) as e:
            raise self._lost(self.endpoints.ingest, f"batch was not acknowledged: {e}") from None
        self.batches += 1

    def _take_tables(self) -> None:
        sub = self.subscriber
        sub.poll(0)
        seen = self._seen
        if self._link_wait_since is not None and any(seen.get(k) != v for k, v in sub.seq.items()):
            # the first publication after a link report: how long a topology change takes
            # to come back as tables (wall clock; bounded above by our tick cadence)
            self.link_feedback_s.append(time.monotonic() - self._link_wait_since)
            self._link_wait_since = None
        for node, seq in sub.seq.items():
            if seen.get(node) != seq:
                seen[node] = seq
                x = self.index.get(node)
                if x is not None:
                    self._take_routes(x, sub.tables[node])
                    self.tables_taken += 1

    # -- reading ------------------------------------------------------------------------
    def exploration_share(self) -> float:
        """Mean off-greedy weight over routed (node, destination) pairs, from the tables
        in use (the engine's own definition, :meth:`Engine.exploration_share`)."""
        tot, cnt = 0.0, 0
        for x in range(self.n):
            g, off = self._greedy[x], self._off[x]
            for d in range(self.n):
                if g[d] >= 0:
                    tot += off[d]
                    cnt += 1
        return tot / cnt if cnt else 0.0

    def greedy_next_hops(self) -> np.ndarray:
        """(n, n) greedy next hop per (node, destination) in the tables in use, -1 none."""
        return np.array(self._greedy, dtype=np.int64)

    def health(self) -> dict[str, Any]:
        return self._ask([{"op": "health"}])[0]

    def stats(self) -> dict[str, float]:
        out: dict[str, float] = {
            "service_speed": self.speed,
            "service_ticks": float(self.ticks),
            "service_rows_sent": float(self.rows_sent),        # hop rows
            "service_link_rows_sent": float(self.links_sent),
            # acknowledged rows, hop and link rows together (as the wire counts them)
            "service_rows_accepted": float(self.reporter.accepted) if self.reporter else 0.0,
            "service_rows_rejected": float(sum(self.reporter.rejected.values())) if self.reporter else 0.0,
            "service_batches": float(self.batches),
            "service_resends": float(self.reporter.resends) if self.reporter else 0.0,
            "service_tables_taken": float(self.tables_taken),
            "service_table_gaps": float(self.subscriber.gaps_total) if self.subscriber else 0.0,
            "service_estimate_requests": float(self.estimate_requests),
            "pacing_wait_s": self.wait_s,
            "link_feedback_max_s": max(self.link_feedback_s, default=math.nan),
            "pacing_lag_max_s": self.lag_max_s,
            "pacing_lag_mean_s": self.lag_sum_s / self.ticks if self.ticks else 0.0,
            "pacing_ticks_behind": float(self.ticks_behind),
            "exploration_share": self.exploration_share(),
        }
        if self.reporter is not None:
            # by reason: rows of packets that were on the wire when their link went down
            # arrive afterwards and are refused as link_down, in process as well
            for reason, k in sorted(self.reporter.rejected.items()):
                out[f"service_rows_rejected_{reason}"] = float(k)
        try:
            h = self.health()
            self.final_health = h
            c = h.get("counts", {})
            out["engine_route_changes"] = float(c.get("route_changes", math.nan))
            out["engine_loops_prevented"] = float(c.get("loops_prevented", math.nan))
            out["engine_updates"] = float(c.get("engine_updates", math.nan))
        except (TimeoutError, ServiceLost):
            pass
        return out

    # -- the end ----------------------------------------------------------------------------
    def close(self) -> None:
        """Keep the service's final tables, close the sockets, stop a service we started.
        Idempotent; safe after an interrupt."""
        if self.closed:
            return
        self.closed = True
        dead = self._own_process is not None and not self._own_process.running
        if self._ctl is not None and self.final_tables is None and not dead:
            from routerd.agent.client import TransportError
            from routerd.io import wire

            try:
                self.final_tables = self._ctl.ask([{"op": "tables"}])[0].get("tables")
            except (TimeoutError, wire.BadReply, TransportError) as e:
                self.close_problem = f"final tables not read: {e}"   # the service is gone
        if self.reporter is not None:
            self.reporter.close(flush=False)   # every tick waited for its acks already
        if self.subscriber is not None:
            self.subscriber.close()
        if self._ctl is not None:
            self._ctl.close()
        if self._own_process is not None:
            self._own_process.stop()


def service_overrides(cfg: _config.Config, *, durable: bool = False) -> dict[str, Any]:
    """Config keys for a service started for a closed-loop run: decisions on the
    simulator's virtual cadence (``decision_interval_s / speed`` of wall time).  Unless
    ``durable``, the journal is not fsynced: the state directory of a service started for
    one ``simulate`` run is a temporary one, removed at the end, so an fsync per batch
    (about half the acknowledgement time measured here) would buy nothing."""
    out: dict[str, Any] = {
        "service.debounce_s": float(cfg["sim.decision_interval_s"]) / float(cfg["sim.service.speed"])}
    if not durable:
        out["service.journal.fsync"] = "never"
    return out
