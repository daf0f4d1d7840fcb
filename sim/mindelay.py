"""The min-delay yardstick as a simulator policy: ``mindelay`` forwards by the optimum.

Owns the ``mindelay`` policy adapter (:class:`MinDelay`), the offered demand the
simulator injects (:func:`offered_demand`) and a per-process cache of results.  The
method itself — the flow deviation method (Fratta, Gerla & Kleinrock, "The flow
deviation method: an approach to store-and-forward communication network design",
Networks 3, 1973) for bifurcated per-destination routing on M/M/1 links, its theory of
operation, the delay model and the split arrays — is :mod:`routerd.core.flowdev`, moved
there so the service's live optimality gap runs the same code without the simulator;
its names are re-exported here (``flow_deviation``, ``for_topology``, ``slot_shares``,
``MinDelayResult``, ``mm1_*``, ``RHO_LEVELS``).

Must not import: the simulator core, sockets, files, plotting.  numpy only (plus the
project's pure modules).
"""
from __future__ import annotations

import bisect
import math
from collections.abc import Mapping
from typing import Any

import numpy as np

from routerd.core.flowdev import (
    RHO_LEVELS,
    MinDelayResult,
    flow_deviation,
    for_topology,
    mm1_cost,
    mm1_delay,
    mm1_marginal,
    routing_delay,
    slot_fractions,
    slot_shares,
)
from routerd.core.topology import Topology

from .policy import Policy

__all__ = ["RHO_LEVELS", "MinDelay", "MinDelayResult", "flow_deviation", "for_topology",
           "mm1_cost", "mm1_delay", "mm1_marginal", "offered_demand", "routing_delay",
           "slot_fractions", "slot_shares"]


# ---- the policy adapter --------------------------------------------------------------

def offered_demand(topo: Topology, rate_pps: float, *, use_demands: bool = False,
                   demand: np.ndarray | None = None) -> np.ndarray:
    """The (n, n) offered matrix in packets/s the simulator injects at ``rate_pps``.

    An explicit ``demand`` matrix is taken as it is.  With ``use_demands`` the topology's
    demand matrix is scaled to sum to the rate; otherwise every ordered pair of distinct
    nodes gets an equal share (uniform source and destination).
    """
    n = topo.n
    if demand is not None:
        m = np.array(demand, dtype=float)
        if m.shape != (n, n):
            raise ValueError(f"demand matrix has shape {m.shape}, expected ({n}, {n})")
        np.fill_diagonal(m, 0.0)
        return m
    if use_demands:
        if topo.demands is None:
            raise ValueError(f"topology {topo.name!r} has no demand matrix")
        m = np.array(topo.demands, dtype=float)
        np.fill_diagonal(m, 0.0)
        s = float(m.sum())
        if s <= 0:
            raise ValueError(f"topology {topo.name!r} has an all-zero demand matrix")
        return m * (float(rate_pps) / s)
    m = np.full((n, n), float(rate_pps) / (n * (n - 1)))
    np.fill_diagonal(m, 0.0)
    return m


_RATE_KEYS = ("rate_pps", "rate", "offered_pps")
_BYTES_KEYS = ("mean_packet_bytes", "packet_bytes", "mean_bytes")
_DEMAND_KEYS = ("demand_pps", "demand_matrix", "demand")
_USE_DEMANDS_KEYS = ("use_demands", "demands")


def _lookup(settings: Any, keys: tuple[str, ...]) -> Any:
    """First of ``keys`` found on ``settings`` (attribute or mapping key, or ``sim.KEY``)."""
    for k in keys:
        if isinstance(settings, Mapping):
            if k in settings and settings[k] is not None:
                return settings[k]
            sk = f"sim.{k}"
            if sk in settings and settings[sk] is not None:
                return settings[sk]
        else:
            v = getattr(settings, k, None)
            if v is not None:
                return v
            get = getattr(settings, "get", None)
            if callable(get):
                try:
                    v = get(f"sim.{k}")
                except (KeyError, TypeError, ValueError):  # a config that refuses unknown keys
                    v = None
                if v is not None:
                    return v
    return None


class MinDelay(Policy):
    """Forwards by the flow-deviation optimum for the offered demand.

    The routing is computed once, when the simulator announces the offered load
    (:meth:`offered`: packets/s per pair and the mean packet size).  A shell that does
    not call ``offered`` may put the same facts in ``settings`` instead (attributes or
    mapping keys: ``demand_pps`` as an n × n matrix, or ``rate_pps`` with ``use_demands``
    to scale the topology's matrix, else uniform pairs; and ``mean_packet_bytes``); the
    routing is then computed at attach.  Each packet at x for d picks a next hop with
    probability equal to its split share, drawn from the run's Generator.  Static: link
    events do not change the routing (packets sent onto a dead link are dropped), just
    like ``shortest``.
    """

    name = "mindelay"

    def attach(self, topology: Topology, rng: np.random.Generator, settings: Any) -> None:
        super().attach(topology, rng, settings)
        self.result: MinDelayResult | None = None
        self._u: list[float] = []
        self._ui = 0
        mean_bytes = _lookup(settings, _BYTES_KEYS)
        demand = _lookup(settings, _DEMAND_KEYS)
        if demand is not None and np.ndim(demand) != 2:
            demand = None  # e.g. a boolean --demands flag under the same name
        rate = _lookup(settings, _RATE_KEYS)
        if mean_bytes is None or (demand is None and rate is None):
            return  # wait for offered()
        if demand is None:
            use = _lookup(settings, _USE_DEMANDS_KEYS)
            demand = offered_demand(topology, float(rate), use_demands=bool(use))
        self.offered(offered_demand(topology, 0.0, demand=np.asarray(demand)),
                     8.0 * float(mean_bytes))

    def offered(self, demand_pps: np.ndarray, mean_bits: float) -> None:
        demand = offered_demand(self.topo, 0.0, demand=np.asarray(demand_pps))
        self.result = _cached(self.topo, demand, float(mean_bits) / 8.0)
        self._build_tables()

    def _build_tables(self) -> None:
        assert self.result is not None
        topo, frac = self.topo, self.result.fractions
        n = topo.n
        table = [[-1] * n for _ in range(n)]
        self._multi: dict[tuple[int, int], tuple[list[float], list[int]]] = {}
        fr = frac.tolist()
        dst_l = topo.dst.tolist()
        for x in range(n):
            links = [int(k) for k in topo.slot_link[x] if k >= 0]
            for d in range(n):
                if d == x:
                    continue
                shares = [(fr[d][k], dst_l[k]) for k in links if fr[d][k] > 0]
                if len(shares) == 1:
                    table[x][d] = shares[0][1]
                elif shares:
                    cum, acc = [], 0.0
                    for sh, _ in shares:
                        acc += sh
                        cum.append(acc)
                    cum[-1] = math.inf  # rounding can never send a draw past the last hop
                    table[x][d] = -2
                    self._multi[(x, d)] = (cum, [y for _, y in shares])
        self.table = table

    def next_hop(self, x: int, d: int, flow: int, now: float) -> int:
        if self.table is None:
            raise RuntimeError("mindelay: the offered load was never given (offered() or settings)")
        y = self.table[x][d]
        if y != -2:
            return y
        if self._ui >= len(self._u):
            self._u = self.rng.random(4096).tolist()
            self._ui = 0
        u = self._u[self._ui]
        self._ui += 1
        cum, hops = self._multi[(x, d)]
        return hops[bisect.bisect_right(cum, u)]

    def split(self, x: int, d: int) -> dict[int, float]:
        """The shares of x's next hops for destination d (for inspection and tests)."""
        assert self.result is not None
        out: dict[int, float] = {}
        for k in self.topo.slot_link[x]:
            if k >= 0 and self.result.fractions[d, k] > 0:
                out[int(self.topo.dst[k])] = float(self.result.fractions[d, k])
        return out

    def stats(self) -> dict[str, float]:
        r = self.result
        if r is None:
            return {}
        out = {
            "mindelay_feasible": float(r.feasible),
            "mindelay_iterations": float(r.iterations),
            "mindelay_rel_gap": float(r.rel_gap),
            "mindelay_max_utilisation": float(r.max_utilisation),
        }
        if r.feasible and r.gamma > 0:
            out["mindelay_model_delay_s"] = float(r.delay_s)
            # the optimum's T lies in [model_delay_lower_s, model_delay_s]
            out["mindelay_model_delay_lower_s"] = float(r.delay_lower_s)
        if r.load_factor_bound < 1.0:
            out["mindelay_load_factor_bound"] = float(r.load_factor_bound)
        return out


#: results of recent computations in this process: a sweep runs the same topology and
#: demand for several seeds, and the routing does not depend on the seed.
_CACHE: dict[tuple[Any, ...], MinDelayResult] = {}
_CACHE_MAX = 8


def _cached(topo: Topology, demand: np.ndarray, mean_bytes: float) -> MinDelayResult:
    key = (topo.digest, topo.src.tobytes(), topo.dst.tobytes(), topo.capacity_bps.tobytes(),
           topo.delay_s.tobytes(), demand.tobytes(), mean_bytes)
    hit = _CACHE.get(key)
    if hit is None:
        hit = for_topology(topo, demand, mean_bytes)
        if len(_CACHE) >= _CACHE_MAX:
            _CACHE.pop(next(iter(_CACHE)))
        _CACHE[key] = hit
    return hit
