"""Analytic link loads: what a static split routing puts on each link, no simulation.

Owns the array form of a routing used by the model-based parts of the simulator
(:mod:`routerd.sim.mindelay`, and the ECMP check against topohub's figures):

* ``frac[d, k]`` — the share of the traffic for destination ``d`` that is at node
  ``src[k]`` and leaves it on link ``k``.  For every (x, d) with x != d the shares of
  x's out-links sum to 1; links out of ``d`` carry nothing for ``d``.  Parallel links
  (two links with the same ends) are allowed here, which the :class:`Topology` model
  forbids, so worked examples with parallel links can be computed exactly;
* ``demand[s, d]`` — offered traffic from s to d (packets/s; the diagonal is ignored).

Functions: all-destination shortest distances and best links under any positive link
weights (a vectorised Bellman–Ford: every destination at once, one pass per hop of the
longest shortest path), equal-cost splits (ECMP: at every node the flow for d is split
evenly over the out-links that lie on a shortest path, the rule topohub's
``calculate_utilization`` applies hop by hop), single-path splits, and link loads of a
split routing (the linear flow balance ``t = r + P^T t`` per destination).

The array layout, all-destination distances, link loads of a split routing, cycle
finding and tree flows are :mod:`routerd.core.flowdev`'s (moved there so the service
can use them without the simulator); this module re-exports them and adds ECMP and
single-path splits.

Pure numpy; must not import the simulator core, sockets, files or plotting.
"""
from __future__ import annotations

import numpy as np

from routerd.core.flowdev import (
    all_distances,
    by_source,
    find_cycle,
    flows_from_fractions,
    link_arrays,
    tree_flows,
)
from routerd.core.topology import Topology

# the array form and its loads live in the pure core (routerd.core.flowdev: the service's
# live optimality gap uses them too); re-exported here for the simulator's callers
__all__ = ["all_distances", "by_source", "ecmp_fractions", "ecmp_link_loads", "find_cycle",
           "flows_from_fractions", "link_arrays", "on_shortest", "single_path_fractions",
           "split_cycles", "tree_flows"]


def on_shortest(src: np.ndarray, dst: np.ndarray, w: np.ndarray, D: np.ndarray,
                rel_tol: float = 1e-9) -> np.ndarray:
    """(L, n) bool: link k lies on a shortest path from src[k] to d (within rel_tol).

    Links out of d itself are never on a path to d.
    """
    cost = np.asarray(w, dtype=float)[:, None] + D[dst]
    ref = D[src]
    ok = cost <= ref * (1.0 + rel_tol) + 1e-300
    ok &= np.isfinite(ref)
    n = D.shape[0]
    ok[np.asarray(src)[:, None] == np.arange(n)[None, :]] = False
    return ok


def ecmp_fractions(n: int, src: np.ndarray, dst: np.ndarray, w: np.ndarray,
                   rel_tol: float = 1e-9) -> np.ndarray:
    """ECMP splits ``frac[d, k]``: at each node, equal shares over its shortest-path links."""
    src = np.asarray(src, dtype=np.int64)
    D = all_distances(n, src, dst, w)
    ok = on_shortest(src, dst, w, D, rel_tol).astype(float)  # (L, n)
    cnt = np.zeros((n, n))
    np.add.at(cnt, src, ok)  # cnt[x, d] = number of equal-cost links out of x towards d
    with np.errstate(divide="ignore", invalid="ignore"):
        frac = np.where(ok > 0, ok / cnt[src], 0.0)
    return np.ascontiguousarray(frac.T)


def single_path_fractions(topo: Topology, next_hop: np.ndarray) -> np.ndarray:
    """Splits of a one-path-per-pair routing: ``next_hop[x, d]`` is x's next hop for d."""
    n = topo.n
    frac = np.zeros((n, topo.n_links))
    li = topo.link_index
    for x in range(n):
        for d in range(n):
            y = int(next_hop[x, d])
            if x != d and y >= 0:
                frac[d, li[(x, y)]] = 1.0
    return frac


def split_cycles(n: int, src: np.ndarray, dst: np.ndarray, frac: np.ndarray,
                 min_share: float = 0.0) -> list[tuple[int, list[int]]]:
    """Every destination whose split graph (links with share > min_share) has a cycle.

    Returns ``[(d, [x0, x1, ..., x0]), ...]`` with one cycle per offending destination.
    """
    src, dst = np.asarray(src), np.asarray(dst)
    out = []
    for d in range(n):
        live = np.flatnonzero(np.asarray(frac[d]) > min_share)
        cyc = find_cycle(n, src[live], dst[live])
        if cyc is not None:
            nodes = [int(src[live[k]]) for k in cyc]
            out.append((d, nodes + nodes[:1]))
    return out


def ecmp_link_loads(topo: Topology, demand: np.ndarray, weights: np.ndarray | None = None,
                    rel_tol: float = 1e-9) -> np.ndarray:
    """(L,) expected load of each link under ECMP for ``demand`` (same unit as demand).

    ``weights`` is the path metric (default: the links' propagation delays, the metric
    of the simulator's delay-shortest paths); ``rel_tol`` is how close two path lengths
    must be to count as equal.  With per-flow hashing the *expected* share of each
    equal-cost link is exactly this equal split.
    """
    n, src, dst = link_arrays(topo)
    w = topo.delay_s if weights is None else np.asarray(weights, dtype=float)
    frac = ecmp_fractions(n, src, dst, w, rel_tol)
    flows, _ = flows_from_fractions(n, src, dst, frac, demand)
    return flows.sum(axis=0)


