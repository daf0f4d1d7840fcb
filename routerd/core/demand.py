"""Measured demand and link rates from hop rows, and the flow-deviation optimum they feed.

Owns: the counts of accepted hop rows (:class:`Meter`), their smoothing into rates
(:class:`Rates`), the mean packet size the model needs (:func:`estimate`), the plain
arrays of one optimiser run (:func:`inputs_for`), the run itself without any clock
(:func:`solve`) and its splits as the engine's slot shares (:func:`guide_shares`).

Two shells use them: the service's background optimiser (:mod:`routerd.service.optimum`,
which adds a lock, a wall-clock budget, a child process and the health figures) and the
simulator's ``qrouting`` adapter in split mode with ``engine.optimum.guide`` (which runs
them on simulated time).  The theory (flow conservation per node, the exponential
smoothing, the M/M/1 packet size) is in :mod:`routerd.service.optimum`'s docstring; the
method is :mod:`routerd.core.flowdev`'s.
"""
from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from routerd.core import flowdev as _fd
from routerd.core import kernels as _kernels
from routerd.core.splitting import (
    SLOW_ROWS,
    median,
    remembered_service_time,
    service_time,
    slow_links,
)
from routerd.core.topology import Topology

__all__ = ["BUSY_ROWS", "Meter", "Rates", "estimate", "guide_shares", "inputs_for", "model_capacity",
           "published_view", "solve"]

#: Least rows a link needs in the window to count towards the packet-size estimate.
BUSY_ROWS = 4.0
#: a link whose packet-size figure is off the median by more than this factor does not
#: enter :func:`estimate`'s mean
SIZE_TRIM = 2.0


class Meter:
    """Counts hop rows per (node, destination) in and out and per link since the last
    :meth:`take`.  Not thread-safe: the service's subclass adds a lock."""

    def __init__(self, topo: Topology, kernels: Any = "auto"):
        #: the compiled ``meter_add`` (one pass, the same additions in the same order as
        #: the four ``np.add.at`` of the reference), or None for the numpy reference
        self.kernels = _kernels.select(kernels) if isinstance(kernels, str) else kernels
        n = topo.n
        self.n = n
        self.n_links = topo.n_links
        li = np.full(n * n, -1, dtype=np.int64)       # (x * n + y) -> link index
        li[topo.src.astype(np.int64) * n + topo.dst.astype(np.int64)] = np.arange(topo.n_links)
        self._link_of = li
        self._zero()
        self.rows = 0                                 # every row ever counted

    def _zero(self) -> None:
        n = self.n
        self._out = np.zeros(n * n)
        self._in = np.zeros(n * n)
        self._lk = np.zeros(self.n_links)
        self._lat = np.zeros(self.n_links)

    def add(self, src: np.ndarray, via: np.ndarray, dst: np.ndarray, latency: np.ndarray) -> None:
        """Count rows (node indices; latency in seconds)."""
        n = self.n
        src = np.ascontiguousarray(src, dtype=np.int64)    # the compiled pass takes rows
        via = np.ascontiguousarray(via, dtype=np.int64)    # of any array (a column of a
        dst = np.ascontiguousarray(dst, dtype=np.int64)    # masked 2-D one is strided)
        kern = self.kernels
        if kern is not None:
            lat = np.ascontiguousarray(latency, dtype=np.float64)
            kern.meter_add(self._out, self._in, self._lk, self._lat, self._link_of,
                           src, via, dst, lat, n)
        else:
            k = self._link_of[src * n + via]
            np.add.at(self._out, src * n + dst, 1.0)
            np.add.at(self._in, via * n + dst, 1.0)
            np.add.at(self._lk, k, 1.0)
            np.add.at(self._lat, k, np.asarray(latency, dtype=float))
        self.rows += len(src)

    def add_columns(self, fb: Any, vb: Any, db: Any, lb: Any) -> bool:
        """Count rows given as little-endian int32 (from, via, destination) and float64
        (latency) column bytes without copying them: True, or False (nothing counted)
        where the compiled pass does not apply (then decode them and call :meth:`add`)."""
        m = len(fb) // 4
        kern = self.kernels
        if kern is None or not (len(vb) == len(db) == len(fb) == 4 * m and len(lb) == 8 * m):
            return False
        kern.meter_add_cols(self._out, self._in, self._lk, self._lat, self._link_of,
                            fb, vb, db, lb, self.n)
        self.rows += m
        return True

    def take(self) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """(out, in, link rows, link latency sums) since the last take; counting restarts."""
        got = (self._out.reshape(self.n, self.n), self._in.reshape(self.n, self.n),
               self._lk, self._lat)
        self._zero()
        return got


@dataclass
class Rates:
    """Smoothed measurements: ``out``/``into`` per (x, d) and ``link``/``lat`` per link,
    in rows/s and latency-seconds/s.

    Each is the *normalised* exponentially weighted mean of the interval rates: an
    interval of ``dt`` seconds that ended ``age`` seconds ago weighs
    ``(1 - exp(-dt / window)) exp(-age / window)``, and the sum is divided by the total
    weight (``weight``, which tends to 1).  Once the measurements are a few windows old this
    is the plain recursion ``rate += (1 - exp(-dt / window)) (new - rate)``; before that it
    is a time-weighted mean of every interval so far, where the plain recursion would keep
    the first interval at full weight for a window or more.  That first interval is the
    least representative one (from a cold start: queues filling, packets not yet through
    their first hop, a bottleneck carrying only its capacity): measured on abilene's cold
    start at 1.2x with the plain recursion, a first run at 0.5-1 s saw the demand 8-11% low
    and the run at 10 s still 3% low (10 s window)."""

    out: np.ndarray
    into: np.ndarray
    link: np.ndarray
    lat: np.ndarray
    t: float = -math.inf      # when they were last brought up to date (the caller's clock)
    weight: float = 0.0       # the total weight of the intervals so far (0: none yet)
    #: per link: the service time (s) last measured on a link found slow by
    #: :func:`model_capacity` (0: none), and when (the caller's clock)
    slow_tau: np.ndarray | None = None
    slow_t: np.ndarray | None = None

    @classmethod
    def empty(cls, n: int, n_links: int) -> Rates:
        return cls(np.zeros((n, n)), np.zeros((n, n)), np.zeros(n_links), np.zeros(n_links))

    def update(self, counts: tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray],
               dt: float, now: float, window: float) -> None:
        """Fold in the counts of the last ``dt`` seconds (the first update takes them as
        they are; see the class docstring)."""
        if dt <= 0:
            return
        fresh = 1.0 - math.exp(-dt / window)
        self.weight = (1.0 - fresh) * self.weight + fresh
        a = fresh / self.weight
        for name, c in zip(("out", "into", "link", "lat"), counts):
            cur = getattr(self, name)
            cur += a * (c / dt - cur)
        self.t = now

    def demand(self) -> np.ndarray:
        """(n, n) packets/s entering at x for d: out - in, floored at 0, no diagonal."""
        r = np.maximum(self.out - self.into, 0.0)
        np.fill_diagonal(r, 0.0)
        return r


def estimate(topo: Topology, rates: Rates, window: float, packet_bytes: float = 0.0) -> float:
    """The mean packet size (bytes) for the model: ``packet_bytes`` when set, else the
    row-weighted mean over busy links of capacity × M/M/1 service time / 8, links whose
    own figure is off the median by more than a factor of :data:`SIZE_TRIM` left out;
    0.0 when unknown.

    Weighted by rows because a link's figure is a ratio of its sample means: its error
    shrinks with its row count, and the pooled (row-weighted) estimate uses every row alike
    (common practice for a ratio estimator).  The plain median over links that this
    replaced weighed a link of 10 rows like one of 1,000.  Measured on the geometric
    graph's cold start at 1.2x (guided split, 3 seeds): both run 2-8% low at the first
    run, 0.5 s in (queues still filling); at the next run, 2 s later, the median said 984
    bytes for 1,000 where the weighted mean said 999, and the cold start's time to within
    10% went from 23, 7, 14 s to 7, 13, 6 s.  The trim keeps what the median was for: a
    link the model does not fit (a queue far from its M/M/1 steady state) cannot drag
    the figure far."""
    if packet_bytes > 0:
        return float(packet_bytes)
    F = rates.link
    busy = F * window >= BUSY_ROWS
    if not busy.any():
        return 0.0
    L = rates.lat[busy] / F[busy]
    tau = service_time(L, F[busy], topo.delay_s[busy])
    sizes = tau * topo.capacity_bps[busy] / 8.0
    mid = median(sizes)
    if not (mid > 0 and math.isfinite(mid)):
        return 0.0
    near = (sizes >= mid / SIZE_TRIM) & (sizes <= mid * SIZE_TRIM)
    w = F[busy][near]
    size = float(np.dot(w, sizes[near]) / w.sum())
    return size if size > 0 and math.isfinite(size) else 0.0


def model_capacity(topo: Topology, rates: Rates, window: float, packet_bytes: float,
                   learner: tuple[np.ndarray, np.ndarray] | None = None) -> np.ndarray:
    """(n_links,) capacities in packets/s for the model: each link's configured capacity
    over the packet size, except where the link was measured slower.

    A link's capacity follows from its measured rate F and queueing-plus-transmission
    time s by M/M/1 (Kleinrock, Queueing Systems vol. 1, 1975: ``s = 1/(C - F)``, so the
    service time ``1/C = s / (1 + F s)``, :func:`routerd.core.splitting.service_time`).
    Where that service time, on enough rows in the window, is over the configured one by
    the learner's factor (:func:`routerd.core.splitting.slow_links`: a capacity under an
    eighth of the configured one), the link is slower than the topology file says (a
    degraded tunnel, a rate limit the file does not know): the model takes the measured
    figure.  The factor is wide and the rows few for the reasons
    :meth:`routerd.core.splitting.SplitState.note_slow` gives (a slow link carries few
    rows; the M/M/1 fit of a queue far from its steady state is off by a factor up to
    about 2 near capacity).  Once such a link's traffic has moved away nothing measures it
    any more, so the figure is remembered (in ``rates``) and fades back to the configured
    one as the learner's does (:func:`routerd.core.splitting.remembered_service_time`; a
    64 kb/s link on a 4 Mb/s line looks half as fast as its line after about 40 s):
    without it the optimum put traffic back on the slow link as soon as its rows stopped,
    and a guided learner followed (measured in ``routerd lab`` with a 4 Mb/s link cut to
    64 kb/s: delivery recovered, then went back to 290 ms four seconds later).  A link
    measured within the factor forgets its figure at once.  Updates the memory in
    ``rates`` at ``rates.t``.

    ``learner``: :func:`learner_slow`'s memory of the split learner, which is journaled
    while this one is not.  A link this memory lacks, and its own measurements of the
    window do not clear (fewer than the trigger's rows), takes the learner's figure at
    the learner's age: after a restart the optimiser would otherwise model a link the
    restored learner keeps its traffic off at its configured capacity, and the guide
    would seed the traffic back onto it until it was measured slow again."""
    cfg = topo.capacity_bps / (8.0 * float(packet_bytes))        # packets/s
    tau0 = 1.0 / cfg                                             # 0 where no capacity
    nl = topo.n_links
    if rates.slow_tau is None or rates.slow_t is None:
        rates.slow_tau, rates.slow_t = np.zeros(nl), np.zeros(nl)
    F = rates.link
    rows = F * window
    busy = rows > 0
    with np.errstate(invalid="ignore", divide="ignore"):
        L = np.where(busy, rates.lat / np.where(busy, F, 1.0), topo.delay_s)
    tau = service_time(L, F, topo.delay_s)
    slow = slow_links(rows, tau, tau0)
    rates.slow_tau[(rows >= SLOW_ROWS) & ~slow] = 0.0
    rates.slow_tau[slow] = tau[slow]
    rates.slow_t[slow] = rates.t
    if learner is not None:
        l_tau, l_age = learner
        take = (l_tau > 0) & ~(rates.slow_tau > 0) & ~(rows >= SLOW_ROWS)
        rates.slow_tau[take] = l_tau[take]
        rates.slow_t[take] = rates.t - l_age[take]
    out = cfg.copy()
    rem = rates.slow_tau > 0
    out[rem] = 1.0 / remembered_service_time(tau0, rates.slow_tau, rates.slow_t, rates.t)[rem]
    return out


def published_view(engine: Any) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
    """What :func:`inputs_for` needs of an engine: its published shares, the slots of live
    links that exist, the destinations it owns (the caller holds whatever lock guards it)."""
    return engine.published_shares(), engine.live & engine._present, engine.owned


def learner_slow(engine: Any) -> tuple[np.ndarray, np.ndarray] | None:
    """Per link of the engine's topology, the split learner's memory of links it found
    slow (:meth:`routerd.core.splitting.SplitState.note_slow`): ``(service time, age)``,
    the service time 0 where it remembers none and the age in the learner's own time
    (from when it measured it to its newest observation).  None without a split learner.
    The learner's memory is journaled state; an optimiser that starts afresh (a
    restarted service) takes it through :func:`model_capacity`."""
    st = getattr(engine, "_split", None)
    if st is None:
        return None
    sl = engine.topo.slot_link
    tau = np.zeros(engine.topo.n_links)
    age = np.zeros(engine.topo.n_links)
    on = (sl >= 0) & (st.slow_tau > 0)
    tau[sl[on]] = st.slow_tau[on]
    age[sl[on]] = np.maximum(float(engine.now) - st.slow_t[on], 0.0)
    return tau, age


def inputs_for(topo: Topology, shares: np.ndarray, live_slots: np.ndarray, demand: np.ndarray,
               packet_bytes: float, owned: np.ndarray | None = None,
               cap_pps: np.ndarray | None = None) -> dict[str, Any]:
    """The plain arrays :func:`solve` takes: live links only (capacities in packets/s:
    ``cap_pps`` per link, e.g. :func:`model_capacity`'s, else the configured ones), the
    published shares as per-link fractions over them, the demand less what the live links
    cannot carry at all (``unroutable_pps``: between nodes they do not join)."""
    if cap_pps is None:
        cap_pps = topo.capacity_bps / (8.0 * packet_bytes)
    sl = topo.slot_link
    alive = np.zeros(topo.n_links, dtype=bool)
    alive[sl[(sl >= 0) & live_slots]] = True
    keep = np.flatnonzero(alive)
    frac = _fd.slot_fractions(topo, shares, owned)[:, keep]
    src, dst = topo.src[keep].astype(np.int64), topo.dst[keep].astype(np.int64)
    # demand between nodes the live links do not join (a partition: a node cut off, its
    # rows still in the window) can be carried by no routing: left out of the run, and
    # said (``unroutable_pps``); flow deviation refuses demand without a route.  Only
    # with a link down: a topology is strongly connected (routerd.core.topology checks),
    # and the pass costs 50 ms at 300 nodes, every run, in the service's runner thread
    unroutable = 0.0
    if not alive.all():
        hops = _fd.all_distances(topo.n, src, dst, np.ones(len(keep)))
        cut = ~np.isfinite(hops) & (np.asarray(demand) > 0)
        unroutable = float(np.asarray(demand)[cut].sum())
        if unroutable > 0:
            demand = np.where(cut, 0.0, demand)
    return {"n": topo.n, "keep": keep, "src": src, "dst": dst,
            "cap_pps": np.asarray(cap_pps, dtype=float)[keep], "prop_s": topo.delay_s[keep].copy(),
            "frac": frac, "demand": demand, "packet_bytes": float(packet_bytes),
            "unroutable_pps": unroutable}


def solve(job: Mapping[str, Any], max_iter: int = 500,
          stop: Callable[[], bool] | None = None) -> _fd.MinDelayResult:
    """Flow deviation on :func:`inputs_for`'s arrays to a relative gap of 1e-3, at most
    ``max_iter`` iterations, or until ``stop`` answers True (the caller's clock, if any)."""
    return _fd.flow_deviation(int(job["n"]), job["src"], job["dst"], job["cap_pps"], job["prop_s"],
                              job["demand"], tol=1e-3, max_iter=max_iter, stop=stop)


def guide_shares(topo: Topology, keep: np.ndarray, fractions: np.ndarray) -> np.ndarray:
    """A result's per-link fractions over the live links ``keep`` as (n, n, K) slot
    shares, what :meth:`routerd.core.engine.Engine.seed_shares` takes."""
    full = np.zeros((topo.n, topo.n_links))
    full[:, keep] = fractions
    return _fd.slot_shares_of(topo, full)
