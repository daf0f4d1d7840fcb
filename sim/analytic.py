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

Pure numpy; must not import the simulator core, sockets, files or plotting.
"""
from __future__ import annotations

import numpy as np

from routerd.core import loops as _loops
from routerd.core.topology import Topology


def by_source(n: int, src: np.ndarray) -> np.ndarray:
    """(L, n) one-hot matrix S[k, x] = 1 if link k leaves x: ``v @ S`` sums per-link values per node."""
    S = np.zeros((len(src), n))
    S[np.arange(len(src)), np.asarray(src, dtype=np.int64)] = 1.0
    return S


def link_arrays(topo: Topology) -> tuple[int, np.ndarray, np.ndarray]:
    """(n, src, dst) of a topology as int64 arrays."""
    return topo.n, topo.src.astype(np.int64), topo.dst.astype(np.int64)


def all_distances(n: int, src: np.ndarray, dst: np.ndarray, w: np.ndarray) -> np.ndarray:
    """(n, n) D[x, d]: least total weight of a path x → d over links ``src[k] → dst[k]``.

    Weights must be >= 0.  Unreachable pairs are inf.  Vectorised Bellman–Ford over all
    destinations at once: pass h finds every shortest path of at most h links, so the
    loop ends after (longest shortest path in links + 1) passes, at most n.
    """
    src = np.asarray(src, dtype=np.int64)
    dst = np.asarray(dst, dtype=np.int64)
    w = np.asarray(w, dtype=float)
    if w.shape != src.shape:
        raise ValueError(f"weights have shape {w.shape}, links {src.shape}")
    if np.any(~(w >= 0)):
        raise ValueError("link weights must be >= 0 and not NaN")
    order = np.argsort(src, kind="stable")
    s_sorted = src[order]
    starts = np.flatnonzero(np.r_[True, s_sorted[1:] != s_sorted[:-1]])
    heads = s_sorted[starts]
    D = np.full((n, n), np.inf)
    np.fill_diagonal(D, 0.0)
    for _ in range(n):
        cand = w[order, None] + D[dst[order]]  # (L, n): x → d through link k, then best
        best = np.minimum.reduceat(cand, starts, axis=0)
        new = D.copy()
        new[heads] = np.minimum(D[heads], best)
        if np.array_equal(new, D):
            break
        D = new
    return D


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


def flows_from_fractions(n: int, src: np.ndarray, dst: np.ndarray, frac: np.ndarray,
                         demand: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per-destination link flows and node throughputs of a split routing.

    Returns ``(dest_flows, through)``: ``dest_flows[d, k]`` is link k's flow bound for d,
    ``through[d, x]`` the flow for d that passes node x (its own offered traffic
    included).  Solves ``(I - P_d^T) t_d = r_d`` for every destination, where
    ``P_d[x, y]`` is the share x sends to y.  Raises ValueError if the splits of some
    destination hold a loop that traps traffic (the system is then singular).
    """
    src = np.asarray(src, dtype=np.int64)
    dst = np.asarray(dst, dtype=np.int64)
    frac = np.asarray(frac, dtype=float)
    r = np.array(demand, dtype=float)
    np.fill_diagonal(r, 0.0)
    t = np.zeros((n, n))  # t[d, x]
    step = max(1, 2_000_000 // (n * n))  # destinations per block: bounded memory
    for d0 in range(0, n, step):
        ds = np.arange(d0, min(n, d0 + step))
        flat = np.zeros((len(ds), n * n))  # flat[d, x * n + y]: share x sends to y
        np.add.at(flat.T, src * n + dst, frac[ds].T)  # parallel links add up
        P = flat.reshape(len(ds), n, n)
        P[np.arange(len(ds)), ds, :] = 0.0  # nothing leaves the destination for itself
        A = np.eye(n)[None, :, :] - P.transpose(0, 2, 1)
        try:
            t[ds] = np.linalg.solve(A, r.T[ds][:, :, None])[:, :, 0]
        except np.linalg.LinAlgError:
            raise ValueError("the splits trap traffic in a loop (flow balance is singular)") from None
    if not np.all(np.isfinite(t)) or np.any(t < -1e-9 * max(1.0, float(r.sum()))):
        raise ValueError("the splits trap traffic in a loop (no finite flow balance)")
    t = np.maximum(t, 0.0)
    dest_flows = t[:, src] * frac
    dest_flows[src[None, :] == np.arange(n)[:, None]] = 0.0
    return dest_flows, t


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


def find_cycle(n: int, src: np.ndarray, dst: np.ndarray) -> list[int] | None:
    """Indices (into src/dst) of the links of one directed cycle, in order, or None."""
    src_l = np.asarray(src).tolist()
    adj: list[list[tuple[int, int]]] = [[] for _ in range(n)]
    for k, (a, b) in enumerate(zip(src_l, np.asarray(dst).tolist())):
        adj[a].append((b, k))
    colour = [0] * n  # 0 new, 1 on the stack, 2 done
    via = [-1] * n  # link that entered the node on the current DFS path
    for root in range(n):
        if colour[root]:
            continue
        stack = [(root, 0)]
        colour[root] = 1
        while stack:
            u, i = stack[-1]
            if i < len(adj[u]):
                stack[-1] = (u, i + 1)
                v, k = adj[u][i]
                if colour[v] == 0:
                    colour[v] = 1
                    via[v] = k
                    stack.append((v, 0))
                elif colour[v] == 1:  # back edge: the cycle is v → ... → u → v
                    cyc = [k]
                    x = u
                    while x != v:
                        kk = via[x]
                        cyc.append(kk)
                        x = src_l[kk]
                    return cyc[::-1]
            else:
                colour[u] = 2
                stack.pop()
    return None


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


def tree_flows(n: int, src: np.ndarray, dst: np.ndarray, best_link: np.ndarray,
               demand: np.ndarray) -> np.ndarray:
    """Per-destination link flows when node x sends all its traffic for d on ``best_link[d, x]``.

    ``best_link[d, x]`` is a link index, or -1 for x == d.  The links must form an
    in-tree towards each d (no loops).  Accumulates from the leaves level by level, all
    destinations at once (depths by pointer doubling, :func:`routerd.core.loops.depths`).
    """
    dst = np.asarray(dst, dtype=np.int64)
    r = np.array(demand, dtype=float)
    np.fill_diagonal(r, 0.0)
    nh = np.where(best_link >= 0, dst[np.maximum(best_link, 0)], -1)  # (d, x) next node
    dests = np.arange(n)
    depth = _loops.depths(nh, dests)
    stuck = depth > n  # no route to d (or a loop): allowed only where nothing is offered
    if np.any(stuck & (r.T > 0)):
        dd, xx = np.nonzero(stuck & (r.T > 0))
        raise ValueError(f"traffic from node {int(xx[0])} to node {int(dd[0])} has no route "
                         "(the best links do not lead there)")
    depth = np.where(stuck, 0, depth)
    t = r.T.copy()  # t[d, x]
    out = np.zeros((n, len(dst)))
    for h in range(int(depth.max()), 0, -1):
        dd, xx = np.nonzero(depth == h)
        vals = t[dd, xx]
        np.add.at(t, (dd, nh[dd, xx]), vals)
        out[dd, best_link[dd, xx]] = vals
    return out
