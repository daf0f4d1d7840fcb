"""The live optimality gap: the model's optimal mean delay beside the published routing's.

Owns: the locked counter of accepted hop rows (:class:`Meter`), one optimiser run on
plain arrays within a wall-clock budget (:func:`compute`, run in a child process), and
the background runner the service starts (:class:`Optimum`: a thread, a one-process
pool, the last result, ``health()`` and the metrics figures).  The counting, the rates,
the packet-size estimate, the run's inputs and the run itself are
:mod:`routerd.core.demand`'s (the simulator's guided split mode uses them too).
The method and the model are :mod:`routerd.core.flowdev` (flow deviation; Kleinrock's
M/M/1 links plus propagation); the metric names are :mod:`routerd.service.metrics`'.

Must not import: the simulator, zmq, the daemon.  It reads the engine only through
:meth:`Engine.published_shares` and ``live``, under the lock the service hands in, and
never writes it: the engine's replayed state is untouched — except through a ``guide``
record the loop applies and journals (below), so replay reproduces that too.

Theory of operation
-------------------
*Measure.*  Every accepted hop row ``(x, y, d, latency)`` is one packet for d leaving
x on the link x → y.  Flow conservation at each node gives the traffic that *enters the
network* at x for d::

    r[x, d] = out[x, d] - in[x, d]        out: rows from x for d,  in: rows into x for d

(a packet that starts at x leaves x once and never arrived there; a transit packet does
both).  The :class:`Meter` counts ``out`` and ``in`` per (node, destination), and per
link the rows and their latency sum, in the ingest path (a few ``bincount``-like adds
per batch, under its own small lock).  At each run the counts since the last run become
rates (÷ the time between runs) and are smoothed with the time constant
``engine.optimum.window_s`` (``rate += (1 - exp(-dt/window)) (new - rate)`` once the
measurements are a few windows old; before that a normalised mean, so the first, least
representative interval does not keep full weight: :class:`routerd.core.demand.Rates`).  Demand
floors at 0 (a packet lost after arriving at x is in ``in`` but not ``out``).  Unlike
split mode's ``SplitState.measured_demand`` it needs no published shares and works in
every mode.

*Packet size.*  The model needs capacities in packets/s, so a mean packet size:
``engine.optimum.packet_bytes``, or (0) the one the links imply.  An M/M/1 link with
rate F and measured sojourn ``s = L - p`` has service time ``1/C = s / (1 + F s)``
(:func:`routerd.core.splitting.service_time`); ``C · 8 · bytes = capacity_bps`` gives
the size; the row-weighted mean over links with at least 4 rows in the window is taken,
links off the median by more than a factor of 2 left out (:func:`routerd.core.demand.estimate`).

*Run.*  Every ``engine.optimum.interval_s`` the runner thread takes the service lock
just long enough to copy the engine's published shares and live links, builds the
inputs (live links only; shares turned into per-link fractions,
:func:`routerd.core.flowdev.slot_fractions`) and sends them to a child process
(``spawn``, niced, dies with the service; started, and its imports done, when the runner
starts with the service, so that cost does not land in the middle of serving), which runs
:func:`compute`: flow deviation on
the measured demand over the live links, stopped after ``engine.optimum.budget_s`` with
the best routing so far (its relative gap reported; the optimum lies in
``[optimal_lower, optimal]``), and the same model evaluated on the published routing's
flows for the same demand (:func:`routerd.core.flowdev.routing_delay`).  The ratio
published / optimal is the gap (1.0 = the tables are at the model's optimum).  The
thread waits for the child, so a run never overlaps the next, and after a run of r
seconds it rests at least 4 r (:func:`next_start`): the child takes at most a fifth of
one core whatever the network's size; the intervals given up for that are counted as
skipped.  Ingest never waits for any of it: the
loop only feeds the meter.

Why the figures can be missing (``reason`` in ``health``): ``off``
(``engine.optimum.interval_s`` is 0), ``too_large`` (more nodes than
``engine.optimum.max_nodes``), ``sharded`` (a shard worker sees only its own
destinations' rows and tables), ``waiting`` (no run yet), ``no_demand`` (no traffic
measured), ``no_packet_size`` (no busy link to infer it from and none configured),
``failed`` (the run raised: its message is in ``error``).  The published delay alone
may be missing (``published_reason``) when the tables leave some measured demand
without a route, or its model delay is infinite (a link at or over capacity).

*Guide* (``engine.optimum.guide = true``, split mode only).  A feasible result's splits
(over the live links of the run) become slot shares and wait for the loop: in its
housekeeping the loop takes them (:meth:`Optimum.take_guide`, a
:func:`routerd.io.journal.guide_body`), applies them with
:func:`routerd.io.journal.apply_guide` (:meth:`Engine.seed_shares` →
:func:`routerd.core.splitting.seed`: whole destinations, live slots only, every route
kept, the graph checked acyclic, else the destination keeps its shares) and journals
the record, so replay seeds at the same place.  The learner's next decision moves and
publishes the seeded shares by its own rules (strictly downhill gains, publish
threshold).  Why the optimiser's splits are loop-free: flow deviation cancels
circulations and gives flow-free keys their shortest marginal-length link, so each
destination's split graph is acyclic (:mod:`routerd.core.flowdev`); links that died
since the run are dropped by the seed rule.
"""
from __future__ import annotations

import concurrent.futures as _futures
import contextlib
import math
import multiprocessing
import os
import sys
import threading
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from routerd.core import demand as _demand
from routerd.core import flowdev as _fd
from routerd.core.demand import Rates, estimate, guide_shares, inputs_for, model_capacity, solve
from routerd.core.topology import Topology
from routerd.io import journal as _journal

__all__ = ["REASONS", "REST_FACTOR", "Meter", "Optimum", "Rates", "compute", "estimate", "inputs_for",
           "next_start"]

#: Why no optimum is shown (a fixed set: health's ``reason``).
REASONS = ("off", "too_large", "sharded", "waiting", "no_demand", "no_packet_size", "failed")
_LITTLE = sys.byteorder == "little"     # record columns are little-endian
#: After a run of r seconds the next starts no sooner than REST_FACTOR * r later: the
#: optimiser's child takes at most 1 / (1 + REST_FACTOR) of one core, whatever the network.
REST_FACTOR = 4.0


def next_start(start: float, end: float, interval: float) -> float:
    """When the run after one from ``start`` to ``end`` may start: the next interval, or
    later when the run was long (the duty bound, :data:`REST_FACTOR`)."""
    return max(start + interval, end + REST_FACTOR * (end - start))


class Meter(_demand.Meter):
    """:class:`routerd.core.demand.Meter` with a lock: the loop adds, the runner thread takes."""

    def __init__(self, topo: Topology, kernels: Any = "auto"):
        self._lock = threading.Lock()
        super().__init__(topo, kernels)

    def add(self, src: np.ndarray, via: np.ndarray, dst: np.ndarray, latency: np.ndarray) -> None:
        """Count accepted rows (node indices; latency in seconds)."""
        with self._lock:
            super().add(src, via, dst, latency)

    def add_record(self, body: Mapping[str, Any]) -> None:
        """Count the accepted hops of a journal ``batch`` record body (its int32/float64
        column bytes, :func:`routerd.io.journal.batch_body`), without copying them."""
        fb = body["from"]
        if not len(fb) // 4:
            return
        if _LITTLE:
            with self._lock:
                if self.add_columns(fb, body["via"], body["dst"], body["latency_s"]):
                    return
        self.add(np.frombuffer(fb, dtype="<i4"), np.frombuffer(body["via"], dtype="<i4"),
                 np.frombuffer(body["dst"], dtype="<i4"),
                 np.frombuffer(body["latency_s"], dtype="<f8"))

    def take(self) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """(out, in, link rows, link latency sums) since the last take; counting restarts."""
        with self._lock:
            return super().take()


def compute(job: Mapping[str, Any], budget_s: float, max_iter: int = 500) -> dict[str, Any]:
    """One optimiser run (in the child process): the optimum for the demand over the
    live links within ``budget_s``, and the model's delay of the published fractions.
    Returns plain floats and flags (see :meth:`Optimum.health`)."""
    t0 = time.perf_counter()        # a duration, measured where the work runs
    deadline = t0 + budget_s
    n, src, dst = int(job["n"]), job["src"], job["dst"]
    cap, prop, dem = job["cap_pps"], job["prop_s"], job["demand"]
    res = solve(job, max_iter, stop=lambda: time.perf_counter() > deadline)
    out: dict[str, Any] = {
        "optimal_delay_s": float(res.delay_s) if res.feasible else math.inf,
        "optimal_lower_s": float(res.delay_lower_s),
        "rel_gap": float(res.rel_gap), "iterations": int(res.iterations),
        "converged": bool(res.converged), "stopped": bool(res.stopped),
        "feasible": bool(res.feasible), "optimal_max_utilisation": float(res.max_utilisation),
        "demand_pps": float(res.gamma),
        # measured demand the live links cannot carry at all (a partition), left out
        "unroutable_pps": float(job.get("unroutable_pps", 0.0)),
    }
    if res.load_factor_bound < 1.0:
        out["load_factor_bound"] = float(res.load_factor_bound)
    try:
        pub, flows = _fd.routing_delay(n, src, dst, cap, prop, job["frac"], dem)
        out["published_delay_s"] = float(pub)
        out["published_max_utilisation"] = float((flows / cap).max()) if len(cap) else 0.0
        out["published_reason"] = None if math.isfinite(pub) else "a link at or over capacity"
    except ValueError as e:
        out["published_delay_s"] = math.nan
        out["published_max_utilisation"] = math.nan
        out["published_reason"] = str(e)
    if job.get("guide") and res.feasible:
        out["fractions"] = res.fractions          # (n, live links): seeds split mode's shares
    out["run_s"] = time.perf_counter() - t0
    return out


def _child_ready() -> int:
    """A run that does nothing: submitted first, so the child's start-up (an interpreter,
    numpy, this module's imports: 0.3-0.5 s of a core) is done when the service starts,
    not at the first interval in the middle of serving."""
    return os.getpid()


def _child_init() -> None:
    """The optimiser's process: lower priority than the service, gone with it."""
    from routerd.io.childproc import die_with_parent

    die_with_parent()
    parent = multiprocessing.parent_process()
    if parent is not None and os.getppid() != parent.pid:
        # the service died while this child was starting (it starts with the service, so
        # a service killed at once leaves it here): too late for the signal, go now
        os._exit(0)
    try:
        os.nice(10)
    except OSError:
        pass


@dataclass
class _State:
    runs: int = 0
    failed: int = 0
    skipped: int = 0
    last: dict[str, Any] | None = None
    last_at: float | None = None           # the service clock's monotonic time
    reason: str = "waiting"
    error: str | None = None
    demand_pps: float = 0.0
    packet_bytes: float = 0.0
    run_s_total: float = 0.0
    guides: int = 0                        # guide records applied
    guided: int = 0                        # destinations the last one seeded
    guide_left: int = 0                    # destinations it left alone (a route or a loop)
    slow_links: int = 0                    # links the last run modelled below their configured capacity


class Optimum:
    """The background runner (module docstring).  ``feed`` is called by the loop with each
    accepted batch record; ``start``/``close`` by the service; ``health()`` and
    ``stats()`` from any thread.

    ``engine_view``: returns ``(topology, published shares, live slots, owned)``, and
    optionally the learner's slow-link memory (:func:`routerd.core.demand.learner_slow`) — called
    under ``lock`` by the runner thread.  ``clock``: the service's monotonic clock
    (ages, intervals).  ``executor``: where :func:`compute` runs (default: one spawned
    child process; tests may pass a thread pool)."""

    def __init__(self, cfg: Any, topo: Topology, engine_view: Callable[[], tuple[Any, ...]],
                 lock: Any, monotonic: Callable[[], float], *,
                 executor: _futures.Executor | None = None, off: str | None = None):
        self.interval = float(cfg["engine.optimum.interval_s"])
        #: the first run comes this long after the runner starts (then every interval)
        self.first = min(float(cfg["engine.optimum.first_s"]), self.interval)
        self.budget = float(cfg["engine.optimum.budget_s"])
        self.window = float(cfg["engine.optimum.window_s"])
        self.packet_bytes_cfg = float(cfg["engine.optimum.packet_bytes"])
        self.max_nodes = int(cfg["engine.optimum.max_nodes"])
        self.guide = bool(cfg["engine.optimum.guide"])
        #: why guide=true does nothing (None: it works, or it is off)
        self.guide_off = ("engine.mode is not split: only split mode has shares to seed"
                          if self.guide and cfg["engine.mode"] != "split" else None)
        self._guide: np.ndarray | None = None
        self.topo = topo
        self._view = engine_view
        self._lock = lock
        self._mono = monotonic
        self._executor = executor
        self._own_executor = executor is None
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self._state_lock = threading.Lock()
        self.state = _State()
        self._taken_at = monotonic()
        if self.interval <= 0:
            self.state.reason = "off"
        elif topo.n > self.max_nodes:
            self.state.reason = "too_large"
        elif off is not None:
            self.state.reason = off
        # the counts (2 n^2 + 2 L floats, twice) only when it runs: 32 MB at 1,000 nodes
        self.meter = Meter(topo, cfg["engine.kernels"]) if self.enabled else None
        self.rates = Rates.empty(topo.n, topo.n_links) if self.enabled else None

    @classmethod
    def for_service(cls, svc: Any) -> Optimum:
        """The runner of a :class:`routerd.service.daemon.Service` (its config, topology,
        lock, clock and engine; a class attribute ``optimum_off`` turns it off)."""
        def view() -> tuple[Any, ...]:
            return (svc.topo, *_demand.published_view(svc.engine), _demand.learner_slow(svc.engine))
        return cls(svc.cfg, svc.topo, view, svc.lock, svc.clock.monotonic,
                   off="sharded" if getattr(svc, "optimum_off", None) else None)

    @property
    def enabled(self) -> bool:
        return self.state.reason not in ("off", "too_large", "sharded")

    # -- the loop's side ------------------------------------------------------------------
    def feed(self, body: Mapping[str, Any]) -> None:
        """An accepted ``batch`` record: count its hops (cheap; never waits for a run)."""
        if self.meter is not None:
            self.meter.add_record(body)

    # -- the runner -----------------------------------------------------------------------
    def start(self) -> None:
        if not self.enabled or self._thread is not None:
            return
        self._thread = threading.Thread(target=self._run, name="routerd-optimum", daemon=True)
        self._thread.start()

    def close(self) -> None:
        self._stop.set()
        t = self._thread
        if t is not None:
            t.join(timeout=1.0)      # a run in the child ends by its budget; the thread is a daemon
        if self._own_executor and self._executor is not None:
            self._executor.shutdown(wait=False, cancel_futures=True)
            self._executor = None

    def _run(self) -> None:
        self._warm_up()
        nxt = self._mono() + self.first
        while not self._stop.wait(max(0.0, nxt - self._mono())):
            start = self._mono()
            self.run_once()
            nxt = next_start(start, self._mono(), self.interval)
            missed = int((nxt - start) // self.interval) - 1
            if missed > 0:
                with self._state_lock:
                    self.state.skipped += missed    # intervals given up to keep the duty bound

    def run_once(self) -> dict[str, Any] | None:
        """Measure, then one optimiser run (blocking this thread, not the loop); the
        result, or None with ``state.reason`` saying why not."""
        if self.meter is None or self.rates is None:
            return None                              # off: state.reason says why
        now = self._mono()
        self.rates.update(self.meter.take(), now - self._taken_at, now, self.window)
        self._taken_at = now
        demand = self.rates.demand()
        total = float(demand.sum())
        size = estimate(self.topo, self.rates, self.window, self.packet_bytes_cfg)
        with self._state_lock:
            self.state.demand_pps = total
            self.state.packet_bytes = size
        if total <= 0:
            return self._no("no_demand")
        if size <= 0:
            return self._no("no_packet_size")
        try:
            with self._lock:
                got = self._view()
            topo, shares, live, owned = got[:4]
            # the learner's journaled slow-link memory (a view may leave it out: none)
            cap = model_capacity(topo, self.rates, self.window, size,
                                 got[4] if len(got) > 4 else None)
            with self._state_lock:
                self.state.slow_links = int(np.count_nonzero(cap < topo.capacity_bps / (8.0 * size)))
            job = inputs_for(topo, shares, live, demand, size, owned, cap)
            job["guide"] = self.guide and self.guide_off is None
            res = self._submit(job)
        except Exception as e:  # noqa: BLE001 - a failed run is reported, never fatal to the service
            with self._state_lock:
                self.state.failed += 1
                self.state.reason = "failed"
                self.state.error = f"{type(e).__name__}: {e}"
            return None
        with self._state_lock:
            st = self.state
            st.runs += 1
            st.last = res
            st.last_at = self._mono()
            st.reason = "ok"
            st.error = None
            st.run_s_total += float(res["run_s"])
            frac = res.pop("fractions", None)
            if frac is not None:
                # the newest replaces an untaken one
                self._guide = guide_shares(self.topo, job["keep"], frac)
        return res

    # -- guide: the loop takes, applies and journals -----------------------------------
    def guide_due(self) -> bool:
        return self._guide is not None

    def take_guide(self, t: float) -> dict[str, Any] | None:
        """The waiting splits as a ``guide`` record body at time ``t`` (None: none)."""
        with self._state_lock:
            W, self._guide = self._guide, None
        return None if W is None else _journal.guide_body(t, W)

    def guided(self, seeded: tuple[int, int]) -> None:
        """What :func:`routerd.io.journal.apply_guide` did (for health and metrics)."""
        with self._state_lock:
            self.state.guides += 1
            self.state.guided, self.state.guide_left = seeded

    def _no(self, reason: str) -> None:
        with self._state_lock:
            self.state.reason = reason
        return None

    def _pool(self) -> _futures.Executor:
        if self._executor is None:
            self._executor = _futures.ProcessPoolExecutor(
                max_workers=1, mp_context=multiprocessing.get_context("spawn"),
                initializer=_child_init)
        return self._executor

    def _warm_up(self) -> None:
        """The runner thread's first act (the service is starting): start the child and
        wait for it to be ready, so its start-up costs no core while the loop serves.  A
        child that cannot start is reported by the first run, not here."""
        if not self._own_executor:
            return
        with contextlib.suppress(Exception):
            self._pool().submit(_child_ready).result(timeout=120.0)

    def _submit(self, job: dict[str, Any]) -> dict[str, Any]:
        fut = self._pool().submit(compute, job, self.budget)
        # the budget bounds the search; the set-up and clean-up around it are bounded by
        # max_nodes (measured in the README); a stuck child is reported, not waited for
        return fut.result(timeout=self.budget + 120.0)

    # -- readers --------------------------------------------------------------------------
    def health(self) -> dict[str, Any]:
        """The ``optimum`` section of the control ``health`` answer."""
        with self._state_lock:
            st = self.state
            last = dict(st.last) if st.last is not None else None
            out: dict[str, Any] = {
                "available": st.reason == "ok" or last is not None,
                "reason": None if st.reason == "ok" else st.reason,
                "error": st.error,
                "interval_s": self.interval, "budget_s": self.budget, "window_s": self.window,
                "demand_pps": st.demand_pps, "packet_bytes": st.packet_bytes,
                "slow_links": st.slow_links,
                "runs": st.runs, "runs_failed": st.failed, "runs_skipped": st.skipped,
                "age_s": None if st.last_at is None else max(0.0, self._mono() - st.last_at),
                "guide": {"on": self.guide and self.guide_off is None, "why_off": self.guide_off,
                          "applied": st.guides, "seeded_destinations": st.guided,
                          "left_destinations": st.guide_left},
            }
        if self.state.reason == "too_large":
            out["error"] = f"{self.topo.n} nodes is more than engine.optimum.max_nodes ({self.max_nodes})"
        if last is not None:
            opt, pub = last["optimal_delay_s"], last["published_delay_s"]
            out.update({
                "optimal_delay_s": _num(opt), "optimal_lower_s": _num(last["optimal_lower_s"]),
                "published_delay_s": _num(pub), "published_reason": last["published_reason"],
                "gap_ratio": _num(pub / opt) if opt > 0 and math.isfinite(opt) else None,
                "rel_gap": _num(last["rel_gap"]), "iterations": last["iterations"],
                "converged": last["converged"], "stopped": last["stopped"],
                "feasible": last["feasible"],
                "optimal_max_utilisation": _num(last["optimal_max_utilisation"]),
                "published_max_utilisation": _num(last["published_max_utilisation"]),
                "demand_pps_run": last["demand_pps"], "last_run_s": last["run_s"],
                "unroutable_pps": last.get("unroutable_pps", 0.0),
            })
        return out

    def stats(self) -> dict[str, float]:
        """Figures for the metrics page (NaN where there is none yet)."""
        with self._state_lock:
            st = self.state
            last = st.last
            f = {"runs": float(st.runs), "failed": float(st.failed), "skipped": float(st.skipped),
                 "run_s_total": st.run_s_total, "demand_pps": st.demand_pps,
                 "enabled": 1.0 if self.enabled else 0.0, "guides": float(st.guides),
                 "guided": float(st.guided),
                 "age_s": math.nan if st.last_at is None else max(0.0, self._mono() - st.last_at)}
        nan = math.nan
        if last is None:
            f.update(optimal=nan, lower=nan, published=nan, ratio=nan, run_s=nan, rel_gap=nan,
                     unroutable=nan)
        else:
            opt, pub = last["optimal_delay_s"], last["published_delay_s"]
            f.update(optimal=opt, lower=last["optimal_lower_s"], published=pub,
                     ratio=pub / opt if opt > 0 and math.isfinite(opt) else nan,
                     run_s=last["run_s"], rel_gap=last["rel_gap"],
                     unroutable=last.get("unroutable_pps", 0.0))
        return f


def _num(v: float) -> float | None:
    """A float for JSON-ish answers: None for NaN/inf (msgpack carries them, readers choke)."""
    return float(v) if math.isfinite(v) else None
