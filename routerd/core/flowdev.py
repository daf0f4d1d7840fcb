"""Flow deviation: the minimum-delay static routing of a demand, and the delay model.

Owns the pure numeric part of the min-delay yardstick, used by the simulator's
``mindelay`` policy (:mod:`routerd.sim.mindelay`) and by the service's live optimality
gap (:mod:`routerd.service.optimum`): the M/M/1-plus-propagation delay model
(:func:`mm1_cost`, :func:`mm1_delay`, :func:`mm1_marginal`, :func:`routing_delay`),
the flow deviation method (:func:`flow_deviation`, :func:`for_topology`), and the array
form of a split routing with its link loads (:func:`flows_from_fractions`,
:func:`tree_flows`, :func:`all_distances`, :func:`find_cycle`, :func:`slot_shares`,
:func:`slot_fractions`).

Array layout (shared with :mod:`routerd.sim.analytic`): link ``k`` is ``src[k] → dst[k]``;
``frac[d, k]`` is the share of the traffic for destination ``d`` that is at node
``src[k]`` and leaves it on link ``k`` (for every (x, d) with x != d the shares of x's
out-links sum to 1; links out of ``d`` carry nothing for ``d``; parallel links are
allowed here, so worked examples with parallel links can be computed exactly);
``demand[s, d]`` is the offered traffic from s to d (packets/s; the diagonal is ignored).

Pure: numpy and the project's pure modules only — no sockets, files, clocks or plotting.
A caller that wants a time budget passes ``stop`` (a callable) to :func:`flow_deviation`;
the clock stays in the caller.  Must not import the simulator, the service or the engine.

Theory of operation
-------------------
Model (Kleinrock's independence approximation; Bertsekas & Gallager, Data Networks, 2nd
ed., §3.6 and §5.4).  Link l has capacity C_l = capacity_bps / (8 · mean_bytes) packets/s
and propagation delay p_l; with total flow f_l it holds on average f_l/(C_l − f_l)
packets in queue and transmission and f_l·p_l in flight.  The network's cost is the mean
number of packets in it::

    D(f) = Σ_l  f_l / (C_l − f_l) + f_l · p_l           T = D / γ   (Little's law)

with γ the total offered rate.  D is convex and depends only on the total link flows.

Flow deviation is the Frank–Wolfe method on this cost.  It takes the marginal lengths
∂D/∂f_l = C_l/(C_l − f_l)² + p_l, routes every destination's whole demand on its
shortest marginal-length in-tree (the all-or-nothing flow v), and moves to
f + α(v − f) with α ∈ [0, 1] minimising D on that segment (exact 1-D search: the
derivative is monotone).  The duality gap Σ_l ∂D/∂f_l · (f_l − v_l) bounds D(f) − D*
from above; iteration stops when it is below ``tol · D(f)`` or at ``max_iter``.

Two step rules share that frame (``method``).  ``classic`` is the textbook step: every
destination moves by one α.  It gets close fast and then crawls: old trees only shrink
by (1 − α) per step, so flow lingers on paths that are no longer shortest (measured on
abilene at 90% load: relative gap 1.4e-4 after 3000 steps, shares over 1% still on paths
0.03% longer than the best).  ``paths`` (the default) applies the same deviation one
(source, destination) pair at a time: each pair keeps its flow as a set of paths, and
for every destination in turn the marginal lengths are refreshed, the shortest-route
tree is found, and each pair moves flow from every other path it uses onto its shortest
one, by the amount that minimises D exactly.  Paths that stop being shortest are
emptied, so it converges to clean supports (same case: gap 1e-12 in 30 sweeps).  A
shift may also run backwards (from the shortest path to another one) when the last
shifts overloaded it.  Near the saturation of a cut both rules slow down (on the demo
lab at 97% on the halls' cut: relative gap 5% after 500 sweeps); the result reports its
gap, and since D(f) − gap <= D* <= D(f) the optimum's T is bracketed either way.

Feasibility.  The start (shortest paths at zero load) may overload links, where D is
infinite.  Instead of the original two-phase start we minimise a penalised cost that
equals D up to utilisation ρ and continues as D's second-order Taylor expansion beyond
ρ·C (finite, convex, C²).  The extension lies below D, so a minimiser of it that keeps
every link at or below ρ·C is a minimiser of D.  If the solution uses a link above ρ·C,
ρ is raised (0.99 → 0.999 → … → 1 − 1e-6) and the search continues from there.  While
some link is over capacity, every iteration also evaluates the weak-duality bound of the
maximum concurrent flow problem with the current marginal lengths; once it falls below
1 the demand is proven infeasible and the search stops (typically within a few
iterations).  An infeasible result says so (``feasible=False``, ``load_factor_bound``
< 1 when proven); its splits are the penalised optimum so far, still a sensible spread.
``feasible=False`` without a proof means no routing within capacity was found within
``max_iter`` (or before the caller's ``stop``).

Loop freedom.  A convex combination of in-trees can hold circulations (x → y in one
tree, y → x in another).  Circulations only add flow, so cancelling them lowers D.  At
the end every destination's flow is cleared of directed cycles (cancel the smallest
flow around each cycle until none is left); the remaining flow is acyclic, the split
fractions are read off it, shares below ``min_share`` are dropped and the rest
renormalised (dropping links cannot create a cycle).  A node that carries none of the
destination's flow forwards on its shortest marginal-length link: those links descend
strictly in marginal distance, and no flow-carrying node points to a flow-free one, so
the whole split graph of every destination is acyclic.  The reported flows are then
recomputed from the final splits, so they are exactly what the forwarding delivers.
"""
from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

from . import loops as _loops
from .topology import Topology, compiled_distances


def by_source(n: int, src: np.ndarray) -> np.ndarray:
    """(L, n) one-hot matrix S[k, x] = 1 if link k leaves x: ``v @ S`` sums per-link values per node."""
    S = np.zeros((len(src), n))
    S[np.arange(len(src)), np.asarray(src, dtype=np.int64)] = 1.0
    return S


def link_runs(ends: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The links grouped by one of their ends (``src``: per source node; ``dst``: per
    head), for per-node ``reduceat`` passes: ``(order, starts, heads)``, the links sorted
    by that end (stable: link order within a node), where each node's run starts in that
    order, and the node of each run.  Only nodes with a link have a run.  Links must be
    non-empty (``reduceat`` takes no empty input)."""
    order = np.argsort(ends, kind="stable")
    e_sorted = ends[order]
    starts = np.flatnonzero(np.r_[True, e_sorted[1:] != e_sorted[:-1]])
    return order, starts, e_sorted[starts]


def sum_by_source(v: np.ndarray, n: int, src: np.ndarray) -> np.ndarray:
    """(d, n) sums of per-link values ``v`` (d, L) over each node's outgoing links: what
    ``v @ by_source(n, src)`` computes, as segment sums over the links sorted by source
    (in link order within a node), without the dense product.  That product went to
    BLAS, whose worker threads then busy-wait on every core for a while after each
    call: in a 100-node simulation with the guide, a quarter of the process's CPU time."""
    src = np.asarray(src, dtype=np.int64)
    out = np.zeros((v.shape[0], n))
    if src.size == 0:
        return out
    order, starts, heads = link_runs(src)
    out[:, heads] = np.add.reduceat(v[:, order], starts, axis=1)
    return out


def link_arrays(topo: Topology) -> tuple[int, np.ndarray, np.ndarray]:
    """(n, src, dst) of a topology as int64 arrays."""
    return topo.n, topo.src.astype(np.int64), topo.dst.astype(np.int64)


def all_distances(n: int, src: np.ndarray, dst: np.ndarray, w: np.ndarray) -> np.ndarray:
    """(n, n) D[x, d]: least total weight of a path x → d over links ``src[k] → dst[k]``.

    Weights must be >= 0.  Unreachable pairs are inf.  On the compiled kernel when the
    install has it (:func:`routerd.core.topology.compiled_distances`, one Dijkstra per
    destination: 6x faster at 100 nodes), else :func:`all_distances_reference`.  Both
    give the same array to the bit: each computes, for every pair, the least over paths
    of the path's weights added from the destination back (w1 + (w2 + (... + 0))), and
    rounding is monotone, so the order in which paths are tried does not change the
    least (tests/test_mindelay.py holds them equal, ties and zero weights included).
    """
    src = np.asarray(src, dtype=np.int64)
    dst = np.asarray(dst, dtype=np.int64)
    w = np.asarray(w, dtype=float)
    if w.shape != src.shape:
        raise ValueError(f"weights have shape {w.shape}, links {src.shape}")
    if np.any(~(w >= 0)):
        raise ValueError("link weights must be >= 0 and not NaN")
    D = compiled_distances(n, src, dst, w) if src.size else None
    return D if D is not None else all_distances_reference(n, src, dst, w)


def all_distances_reference(n: int, src: np.ndarray, dst: np.ndarray, w: np.ndarray) -> np.ndarray:
    """:func:`all_distances` in numpy (the reference; checked arguments): vectorised
    Bellman–Ford over all destinations at once.  Pass h finds every shortest path of at
    most h links, so the loop ends after (longest shortest path in links + 1) passes, at
    most n."""
    if src.size == 0:         # no links (every one down): only each node reaches itself
        D = np.full((n, n), np.inf)
        np.fill_diagonal(D, 0.0)
        return D
    order, starts, heads = link_runs(src)
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


def flows_from_fractions(n: int, src: np.ndarray, dst: np.ndarray, frac: np.ndarray,
                         demand: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per-destination link flows and node throughputs of a split routing.

    Returns ``(dest_flows, through)``: ``dest_flows[d, k]`` is link k's flow bound for d,
    ``through[d, x]`` the flow for d that passes node x (its own offered traffic
    included).  Solves ``t_d = r_d + P_d^T t_d`` for every destination, where
    ``P_d[x, y]`` is the share x sends to y.  Acyclic splits (every routing the optimiser
    or the engine publishes) settle by propagation: pass h adds the traffic of paths of
    h links, all destinations at once, O(n·L) per pass, exact once no value changes
    (longest path + 1 passes).  Splits with a cycle fall back to the dense solve of
    ``(I - P_d^T) t_d = r_d`` (O(n^4) over all destinations: a 1,000-node network would
    take minutes).  Raises ValueError if the splits of some destination hold a loop that
    traps traffic (the system is then singular).
    """
    src = np.asarray(src, dtype=np.int64)
    dst = np.asarray(dst, dtype=np.int64)
    frac = np.asarray(frac, dtype=float)
    r = np.array(demand, dtype=float)
    np.fill_diagonal(r, 0.0)
    t = _propagate(n, src, dst, frac, r)   # t[d, x]
    if t is None:
        t = _solve_balance(n, src, dst, frac, r)
    if not np.all(np.isfinite(t)) or np.any(t < -1e-9 * max(1.0, float(r.sum()))):
        raise ValueError("the splits trap traffic in a loop (no finite flow balance)")
    t = np.maximum(t, 0.0)
    dest_flows = t[:, src] * frac
    dest_flows[src[None, :] == np.arange(n)[:, None]] = 0.0
    return dest_flows, t


def _propagate(n: int, src: np.ndarray, dst: np.ndarray, frac: np.ndarray,
               r: np.ndarray) -> np.ndarray | None:
    """t[d, x] of :func:`flows_from_fractions` by propagation; None when it does not
    settle within n + 1 passes (the splits hold a cycle)."""
    fr = np.where(src[None, :] == np.arange(n)[:, None], 0.0, frac)  # nothing leaves d for d
    if not len(dst):
        return r.T.copy()
    order, starts, heads = link_runs(dst)
    fro = fr[:, order]
    so = src[order]
    R = np.ascontiguousarray(r.T)
    t = R.copy()
    for _ in range(n + 1):
        new = R.copy()
        new[:, heads] += np.add.reduceat(t[:, so] * fro, starts, axis=1)
        if np.array_equal(new, t):
            return t
        t = new
    return None


def _solve_balance(n: int, src: np.ndarray, dst: np.ndarray, frac: np.ndarray,
                   r: np.ndarray) -> np.ndarray:
    """t[d, x] of :func:`flows_from_fractions` by dense solves (any splits)."""
    t = np.zeros((n, n))
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
    return t


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
    if len(dst):
        nh = np.where(best_link >= 0, dst[np.maximum(best_link, 0)], -1)  # (d, x) next node
    else:                     # no links: nobody has a next node
        nh = np.full((n, n), -1, dtype=np.int64)
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


# ---- the delay model and flow deviation ------------------------------------------

RHO_LEVELS = (0.99, 0.999, 0.9999, 0.99999, 0.999999)


@dataclass(frozen=True, eq=False)
class MinDelayResult:
    """The outcome of :func:`flow_deviation`.  Arrays follow the layout of the module docstring."""

    flows: np.ndarray  # (L,) total flow per link, packets/s
    dest_flows: np.ndarray  # (n, L) flow per link bound for each destination
    fractions: np.ndarray  # (n, L) split share frac[d, k] at src[k] for destination d
    cost: float  # D: mean packets in the network (model)
    delay_s: float  # T = D / γ (inf when infeasible)
    gamma: float  # total offered rate, packets/s
    rel_gap: float  # duality gap / D at the last iteration
    iterations: int
    converged: bool
    feasible: bool
    max_utilisation: float
    rho: float  # the penalty level in force at the end
    marginal: np.ndarray  # (L,) ∂D/∂f at the final flows (true cost where feasible)
    #: an upper bound on the factor by which the demand could be scaled and still fit
    #: (inf when no bound was needed); below 1 it proves the demand infeasible
    load_factor_bound: float = math.inf
    #: a lower bound on the optimum's T: (D̃(f) − gap)/γ with D̃ the penalised cost, which
    #: never exceeds D, so D* >= this · γ whatever the penalty level
    delay_lower_s: float = 0.0
    #: the caller's ``stop`` ended the search before it converged
    stopped: bool = False


# ---- the cost ---------------------------------------------------------------------

def mm1_cost(f: np.ndarray, cap: np.ndarray, prop: np.ndarray, rho: float | None = None) -> float:
    """D(f) = Σ f/(C − f) + f·p; with ``rho`` the penalised cost (inf never occurs then)."""
    return float(np.sum(_g(f, cap, rho)[0] + f * prop))


def mm1_delay(f: np.ndarray, cap: np.ndarray, prop: np.ndarray, gamma: float) -> float:
    """Kleinrock's mean delay T = D(f)/γ (inf if a link is at or above capacity)."""
    if np.any(f >= cap):
        return math.inf
    return mm1_cost(f, cap, prop) / gamma


def mm1_marginal(f: np.ndarray, cap: np.ndarray, prop: np.ndarray,
                 rho: float | None = None) -> np.ndarray:
    """∂D/∂f_l = C/(C − f)² + p (penalised beyond ρ·C when ``rho`` is given)."""
    return _g(f, cap, rho)[1] + prop


def _g(f: np.ndarray, cap: np.ndarray, rho: float | None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Queueing term g = f/(C−f) with its first and second derivatives (optionally extended)."""
    f = np.asarray(f, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        if rho is None:
            room = cap - f
            g = np.where(room > 0, f / room, np.inf)
            g1 = np.where(room > 0, cap / room**2, np.inf)
            g2 = np.where(room > 0, 2 * cap / room**3, np.inf)
            return g, g1, g2
        x0 = rho * cap
        inside = f <= x0
        room = np.where(inside, cap - f, cap - x0)
        g_in = f / room
        g1_in = cap / room**2
        g2_in = 2 * cap / room**3
        dx = f - x0
        g0 = x0 / (cap - x0)
        g = np.where(inside, g_in, g0 + g1_in * dx + 0.5 * g2_in * dx * dx)
        g1 = np.where(inside, g1_in, g1_in + g2_in * dx)
        return g, g1, g2_in


def _line_search(F: np.ndarray, step: np.ndarray, cap: np.ndarray, prop: np.ndarray,
                 rho: float, amax: float = 1.0) -> float:
    """α ∈ [0, amax] minimising D(F + α·step): safeguarded Newton on the monotone derivative."""

    def d1(a: float) -> tuple[float, float]:
        _, g1, g2 = _g(F + a * step, cap, rho)
        return float(np.dot(g1 + prop, step)), float(np.dot(g2, step * step))

    g_hi, _ = d1(amax)
    if g_hi <= 0:
        return amax
    return _root(d1, 0.0, amax, 1e-14 * amax)


def _root(d1: Callable[[float], tuple[float, float]], lo: float, hi: float, tol: float) -> float:
    """The root in [lo, hi] of a monotone increasing derivative ``d1(x) -> (g, g')`` (g < 0 at
    lo, > 0 at hi): Newton steps, bisection whenever a step would leave the bracket, until
    the bracket is ``tol`` wide (safeguarded Newton: Press et al., Numerical Recipes, 3rd
    ed. 2007, section 9.4, "rtsafe"; cited from memory)."""
    x = 0.5 * (lo + hi)
    for _ in range(60):
        g, h = d1(x)
        if g > 0:
            hi = x
        else:
            lo = x
        if hi - lo <= tol or g == 0:
            break
        nxt = x - g / h if h > 0 else 0.5 * (lo + hi)
        x = nxt if lo < nxt < hi else 0.5 * (lo + hi)
    return x


def _all_or_nothing(n: int, src: np.ndarray, dst: np.ndarray, lengths: np.ndarray,
                    demand: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(per-destination tree flows, best link per (d, x), distances) under ``lengths``."""
    D = all_distances(n, src, dst, lengths)
    best = _best_links(n, src, dst, lengths, D)
    return tree_flows(n, src, dst, best, demand), best, D


def _best_links(n: int, src: np.ndarray, dst: np.ndarray, lengths: np.ndarray,
                D: np.ndarray) -> np.ndarray:
    """(d, x) → the lowest-index link out of x on a shortest path to d (-1 for x == d)."""
    L = len(src)
    if L == 0:                # no links: no node has a way out
        return np.full((n, n), -1, dtype=np.int64)
    cost = lengths[:, None] + D[dst]  # (L, n): x → d through link k, then a shortest path
    order, starts, heads = link_runs(src)
    c_sorted = cost[order]
    low = np.minimum.reduceat(c_sorted, starts, axis=0)  # (groups, n)
    group = np.repeat(np.arange(len(starts)), np.diff(np.r_[starts, L]))
    is_best = (c_sorted == low[group]) & np.isfinite(c_sorted)
    idx = np.where(is_best, order[:, None], L)  # ties: the lowest link index wins
    pick = np.minimum.reduceat(idx, starts, axis=0)
    best = np.full((n, n), -1, dtype=np.int64)  # (x, d)
    best[heads] = np.where(pick < L, pick, -1)
    np.fill_diagonal(best, -1)
    return np.ascontiguousarray(best.T)


# ---- the method -------------------------------------------------------------------

def flow_deviation(
    n: int,
    src: np.ndarray,
    dst: np.ndarray,
    capacity_pps: np.ndarray,
    prop_s: np.ndarray,
    demand: np.ndarray,
    *,
    tol: float = 1e-4,
    max_iter: int = 500,
    min_share: float = 1e-6,
    rho_levels: tuple[float, ...] = RHO_LEVELS,
    method: str = "paths",
    stop: Callable[[], bool] | None = None,
) -> MinDelayResult:
    """Minimum-delay bifurcated routing of ``demand`` (packets/s, n × n) by flow deviation.

    Links are ``src[k] → dst[k]`` with capacity ``capacity_pps[k]`` (packets/s) and
    propagation ``prop_s[k]``; parallel links are allowed.  See the module docstring.
    ``stop``: asked before every iteration; when it answers True the search ends there
    (``stopped=True``, ``converged=False``) and the result is built from the flows so far
    (still loop-free, its gap reported) — how a shell bounds the time of one run.
    """
    src = np.asarray(src, dtype=np.int64)
    dst = np.asarray(dst, dtype=np.int64)
    cap = np.asarray(capacity_pps, dtype=float)
    prop = np.asarray(prop_s, dtype=float)
    r = np.array(demand, dtype=float)
    if r.shape != (n, n):
        raise ValueError(f"demand has shape {r.shape}, expected ({n}, {n})")
    if np.any(~np.isfinite(r)) or np.any(r < 0):
        raise ValueError("demand must be finite and >= 0")
    if np.any(~(cap > 0)) or np.any(~np.isfinite(cap)):
        raise ValueError("link capacities must be finite and > 0")
    if method not in ("paths", "classic"):
        raise ValueError(f"method {method!r} is not one of paths, classic")
    np.fill_diagonal(r, 0.0)
    gamma = float(r.sum())
    L = len(src)
    if gamma <= 0:
        z = np.zeros(L)
        frac = _fallback_fractions(n, src, dst, mm1_marginal(z, cap, prop), np.zeros((n, L)))
        # no traffic: nothing to optimise, and T = D/γ is undefined (NaN)
        return MinDelayResult(z, np.zeros((n, L)), frac, 0.0, math.nan, 0.0, 0.0, 0, True, True,
                              0.0, rho_levels[0], mm1_marginal(z, cap, prop),
                              delay_lower_s=math.nan)

    fd, best0, _ = _all_or_nothing(n, src, dst, mm1_marginal(np.zeros(L), cap, prop), r)
    shifter: list[_PathShift] = []   # made on the first step: a run that stops before needs none

    def step(F: np.ndarray, fd: np.ndarray, V: np.ndarray, vd: np.ndarray, cap: np.ndarray,
             prop: np.ndarray, rho: float) -> tuple[np.ndarray, np.ndarray]:
        if method == "classic":
            return _classic(F, fd, V, vd, cap, prop, rho)
        if not shifter:
            shifter.append(_PathShift(n, src, dst, r, best0, stop))
        return shifter[0].sweep(F, fd, V, vd, cap, prop, rho)

    F = fd.sum(axis=0)
    it = 0
    rel_gap = math.inf
    converged = False
    rho = rho_levels[0]
    bound = math.inf
    infeasible = False
    stopped = False
    lower = 0.0
    last: tuple[np.ndarray, np.ndarray] | None = None   # the last lengths and their best links
    for rho in rho_levels:
        converged = False
        while it < max_iter:
            if stop is not None and stop():
                stopped = True
                break
            if np.any(F > cap):
                bound = min(bound, _load_factor_bound(n, src, dst, cap, r, F, rho))
                if bound < 1.0:
                    infeasible = True  # proven: no routing fits, stop here
                    break
            lengths = mm1_marginal(F, cap, prop, rho)
            vd, best_now, _ = _all_or_nothing(n, src, dst, lengths, r)
            last = (lengths, best_now)
            V = vd.sum(axis=0)
            cost = mm1_cost(F, cap, prop, rho)
            gap = float(np.dot(lengths, F - V))
            rel_gap = gap / cost if cost > 0 else 0.0
            lower = max(lower, cost - gap)
            if rel_gap <= tol:
                converged = True
                break
            it += 1
            F, fd = step(F, fd, V, vd, cap, prop, rho)
        if infeasible or stopped or np.all(F <= rho * cap) or it >= max_iter:
            break

    # clean up: acyclic per-destination flows → splits → flows the forwarding delivers
    fd = fd.copy()
    scale = max(float(fd.max()), 1e-300)
    fd[fd < 1e-12 * scale] = 0.0
    for d in np.flatnonzero(_rows_with_cycles(n, src, dst, fd)).tolist():
        _cancel_cycles(n, src, dst, fd[d])   # the others hold no cycle: nothing to cancel
    lengths = mm1_marginal(F, cap, prop, rho)
    # the flows have not moved since the last lengths (a run that converged): their best
    # links are the ones the fallback would find again
    known = last[1] if last is not None and last[0].tobytes() == lengths.tobytes() else None
    frac = _fallback_fractions(n, src, dst, lengths, _shares(n, src, fd, min_share), known)
    dest_flows, _ = flows_from_fractions(n, src, dst, frac, r)
    flows = dest_flows.sum(axis=0)
    util = flows / cap
    feasible = bool(np.all(flows < cap))
    cost = mm1_cost(flows, cap, prop) if feasible else math.inf
    marg = mm1_marginal(flows, cap, prop) if feasible else mm1_marginal(flows, cap, prop, rho)
    return MinDelayResult(
        flows=flows, dest_flows=dest_flows, fractions=frac, cost=cost,
        delay_s=cost / gamma if feasible else math.inf, gamma=gamma, rel_gap=float(rel_gap),
        iterations=it, converged=converged, feasible=feasible,
        max_utilisation=float(util.max()) if L else 0.0, rho=float(rho), marginal=marg,
        load_factor_bound=float(bound), delay_lower_s=lower / gamma, stopped=stopped,
    )


def _load_factor_bound(n: int, src: np.ndarray, dst: np.ndarray, cap: np.ndarray,
                       r: np.ndarray, F: np.ndarray, rho: float) -> float:
    """Upper bound on the largest λ such that λ·demand fits within the capacities.

    Weak duality of the maximum concurrent flow problem (Shahrokhi & Matula, J. ACM 37,
    1990): for any link lengths w >= 0, λ* <= Σ_l w_l C_l / Σ_sd r_sd dist_w(s, d) —
    every unit of demand must cross at least dist_w of "length-weighted capacity".  The
    queueing part of the marginal lengths at the current flows is a good w: it is large
    exactly on the links that are overloaded.
    """
    w = _g(F, cap, rho)[1]
    Dw = all_distances(n, src, dst, w)
    pos = r > 0
    need = float(np.sum(r[pos] * Dw[pos]))  # inf if some demand has no path at all
    return float(np.dot(w, cap)) / need if need > 0 else math.inf


def _classic(F: np.ndarray, fd: np.ndarray, V: np.ndarray, vd: np.ndarray, cap: np.ndarray,
             prop: np.ndarray, rho: float) -> tuple[np.ndarray, np.ndarray]:
    """One textbook flow deviation step: every destination moves towards its tree by one α."""
    a = _line_search(F, V - F, cap, prop, rho)
    return F + a * (V - F), fd + a * (vd - fd)


class _PathShift:
    """Flow deviation one commodity at a time: shift flow from its used paths to its shortest.

    Each (source, destination) pair keeps its flow as a set of paths.  For destination d
    the marginal lengths are refreshed and the shortest-route tree to d computed; then
    every pair (s, d) moves flow from each of its other paths onto its shortest path,
    by the amount that minimises D exactly (at most what the path carries).  Unlike the
    classic step, which only shrinks old flows geometrically, this empties paths that
    are no longer shortest, so the flows converge fast and to clean supports (path
    equalisation; Bertsekas & Gallager, Data Networks, 2nd ed., §5.5–5.7, discuss why
    plain flow deviation is slow near the optimum and these per-pair variants are not).
    The inner loops are plain Python floats: paths are a handful of links long.
    """

    def __init__(self, n: int, src: np.ndarray, dst: np.ndarray, r: np.ndarray,
                 best: np.ndarray, stop: Callable[[], bool] | None = None):
        self.n, self.src, self.dst = n, src, dst
        self.stop = stop   # asked once per destination: a sweep may end part way
        order, self.starts, self.heads = link_runs(src)
        self.order = order
        self.group = np.repeat(np.arange(len(self.starts)),
                               np.diff(np.r_[self.starts, len(src)]))
        self.dst_l = dst.tolist()
        self.dst_sorted = dst[order]
        # per destination: [(s, {path (tuple of links): flow}), ...]
        self.pairs: dict[int, list[tuple[int, dict[tuple[int, ...], float]]]] = {}
        bl = best.tolist()
        rt = r.T.tolist()          # rt[d][s]: Python floats, read n^2 times
        for d in range(n):
            rows = []
            rd = rt[d]
            walk = self._walker(bl[d], d)
            for s_ in range(n):
                if s_ != d and rd[s_] > 0:
                    rows.append((s_, {walk(s_): rd[s_]}))
            if rows:
                self.pairs[d] = rows

    def _walker(self, bl: list[int], d: int) -> Callable[[int], tuple[int, ...]]:
        """The links from any source to ``d`` along the tree ``bl`` (link per node), as a
        function of the source: each node's path is made once (its next hop's path with its
        link in front), not walked again from every source that passes through it."""
        memo: dict[int, tuple[int, ...]] = {d: ()}
        dst_l, n = self.dst_l, self.n

        def walk(s: int) -> tuple[int, ...]:
            p = memo.get(s)
            if p is not None:
                return p
            stack = []
            x = s
            while x not in memo:
                if len(stack) >= n:
                    raise AssertionError("shortest-route tree has a loop")  # lengths > 0: impossible
                stack.append(x)
                x = dst_l[bl[x]]
            p = memo[x]
            for y in reversed(stack):
                p = (bl[y],) + p
                memo[y] = p
            return p
        return walk

    def _tree(self, d: int, lengths: np.ndarray) -> list[int]:
        n, order, starts, heads = self.n, self.order, self.starts, self.heads
        dist = np.full(n, np.inf)
        dist[d] = 0.0
        lo = lengths[order]
        do = self.dst_sorted
        for _ in range(n):
            best = np.minimum.reduceat(lo + dist[do], starts)
            new = dist.copy()
            new[heads] = np.minimum(dist[heads], best)
            new[d] = 0.0
            if (new == dist).all():     # np.array_equal of two (n,) arrays, without its checks
                break
            dist = new
        cost = lo + dist[do]
        low = np.minimum.reduceat(cost, starts)
        idx = np.where(cost == low[self.group], order, len(order))
        bl = np.full(n, -1, dtype=np.int64)
        bl[heads] = np.minimum.reduceat(idx, starts)
        return bl.tolist()

    def sweep(self, F: np.ndarray, fd: np.ndarray, V: np.ndarray, vd: np.ndarray,
              cap: np.ndarray, prop: np.ndarray, rho: float) -> tuple[np.ndarray, np.ndarray]:
        Fl = F.tolist()
        cl = cap.tolist()
        pl = prop.tolist()
        for d, rows in self.pairs.items():
            if self.stop is not None and self.stop():
                break     # every shift so far kept the flows balanced: a valid point
            lengths = mm1_marginal(np.asarray(Fl), cap, prop, rho)
            walk = self._walker(self._tree(d, lengths), d)
            for s_, paths in rows:
                best = walk(s_)
                if best not in paths:
                    paths[best] = 0.0
                for p in [q for q in paths if q != best]:
                    bs = set(best)
                    ps = set(p)
                    plus = [k for k in best if k not in ps]
                    minus = [k for k in p if k not in bs]
                    dlt = _shift(Fl, cl, pl, rho, plus, minus, -paths[best], paths[p])
                    if dlt == 0:
                        continue
                    for k in plus:
                        Fl[k] += dlt
                    for k in minus:
                        Fl[k] -= dlt
                    left = paths[p] - dlt
                    paths[best] = max(paths[best] + dlt, 0.0)
                    if left <= 1e-13 * (paths[best] + left):
                        del paths[p]
                    else:
                        paths[p] = left
        return self.flows(fd.shape)

    def flows(self, shape: tuple[int, ...]) -> tuple[np.ndarray, np.ndarray]:
        # each link's flow adds its paths' flows in the same order as a numpy row would
        # (a tree path holds a link once), as Python floats: one list per destination
        fd = np.zeros(shape)
        for d, rows in self.pairs.items():
            row = [0.0] * shape[1]
            for _, paths in rows:
                for p, x in paths.items():
                    for k in p:
                        row[k] += x
            fd[d] = row
        return fd.sum(axis=0), fd


def _shift(F: list[float], cap: list[float], prop: list[float], rho: float,
           plus: list[int], minus: list[int], least: float, most: float) -> float:
    """Δ ∈ [least, most] minimising D when Δ moves from the ``minus`` links to the ``plus``
    links (a negative Δ moves flow back).  Safeguarded Newton on the monotone derivative."""

    def d1(x: float) -> tuple[float, float]:
        g = h = 0.0
        for k in plus:
            a, b = _gd(F[k] + x, cap[k], rho)
            g += a + prop[k]
            h += b
        for k in minus:
            a, b = _gd(F[k] - x, cap[k], rho)
            g -= a + prop[k]
            h += b
        return g, h

    g0, _ = d1(0.0)
    if g0 == 0:
        return 0.0
    if g0 < 0:
        if most <= 0 or d1(most)[0] <= 0:
            return max(most, 0.0)
        lo, hi = 0.0, most
    else:
        if least >= 0 or d1(least)[0] >= 0:
            return min(least, 0.0)
        lo, hi = least, 0.0
    return _root(d1, lo, hi, 1e-13 * (hi - lo))


def _gd(f: float, c: float, rho: float) -> tuple[float, float]:
    """First and second derivative of the penalised queueing term at flow f (scalars)."""
    x0 = rho * c
    if f <= x0:
        room = c - f
        return c / (room * room), 2 * c / (room * room * room)
    room = c - x0
    g2 = 2 * c / (room * room * room)
    return c / (room * room) + g2 * (f - x0), g2


def _rows_with_cycles(n: int, src: np.ndarray, dst: np.ndarray, fd: np.ndarray) -> np.ndarray:
    """(m,) bool: whether row i's flow graph (links with ``fd[i, k] > 0``) holds a directed
    cycle, every row at once.  Peels sinks: a node none of whose flow-carrying links
    leads to a node still in the graph leaves it; a graph is acyclic exactly when the
    peel empties it (a non-empty acyclic graph always has a sink).  What
    :func:`find_cycle` answers (None or not) row by row, without its Python walk."""
    m = fd.shape[0]
    if not len(src) or not m:
        return np.zeros(m, dtype=bool)
    order, starts, heads = link_runs(src)
    live = fd[:, order] > 0                                   # (m, L) in source order
    do = dst[order]
    alive = np.zeros((m, n), dtype=bool)
    alive[:, heads] = np.logical_or.reduceat(live, starts, axis=1)
    for _ in range(n + 1):
        keep = np.zeros((m, n), dtype=bool)
        keep[:, heads] = np.logical_or.reduceat(live & alive[:, do], starts, axis=1)
        keep &= alive
        if np.array_equal(keep, alive):
            return np.asarray(alive.any(axis=1))
        alive = keep
    raise AssertionError("sink peeling did not settle")   # each pass removes a node


def _cancel_cycles(n: int, src: np.ndarray, dst: np.ndarray, f: np.ndarray) -> int:
    """Remove every directed cycle from one destination's flow ``f`` (in place); count them."""
    for count in range(len(f) + 1):  # each cancellation empties at least one link
        live = np.flatnonzero(f > 0)
        cyc = find_cycle(n, src[live], dst[live])
        if cyc is None:
            return count
        ks = live[cyc]
        m = float(f[ks].min())
        f[ks] -= m
        f[ks[np.argmin(f[ks])]] = 0.0
        f[f < 0] = 0.0
    raise AssertionError("cycle cancelling did not terminate")  # cannot happen: see loop bound


def _shares(n: int, src: np.ndarray, fd: np.ndarray, min_share: float) -> np.ndarray:
    """Split shares from per-destination flows; NaN rows (no flow at x for d) stay zero."""
    out_flow = sum_by_source(fd, n, src)  # (d, x)
    with np.errstate(divide="ignore", invalid="ignore"):
        frac = np.where(out_flow[:, src] > 0, fd / out_flow[:, src], 0.0)
    frac[frac < min_share] = 0.0
    tot = sum_by_source(frac, n, src)
    with np.errstate(divide="ignore", invalid="ignore"):
        frac = np.where(tot[:, src] > 0, frac / tot[:, src], 0.0)
    return frac


def _fallback_fractions(n: int, src: np.ndarray, dst: np.ndarray, lengths: np.ndarray,
                        frac: np.ndarray, best: np.ndarray | None = None) -> np.ndarray:
    """Give every (x, d) without a share its shortest marginal-length link (share 1).
    ``best``: :func:`_best_links` under these ``lengths``, if already known.  Shares are
    >= 0 (:func:`_shares`' are, by its clean-up), so a node's shares sum to 0 exactly
    when none is > 0: that is what is tested, per node, with no matrix product (a
    threaded BLAS call on a loaded machine cost more than the rest of this function)."""
    frac = frac.copy()
    unrouted = np.ones((frac.shape[0], n), dtype=bool)      # (d, x): no share out of x
    if len(src):
        order, starts, heads = link_runs(src)
        unrouted[:, heads] = ~np.logical_or.reduceat(frac[:, order] > 0, starts, axis=1)
    if best is None:
        D = all_distances(n, src, dst, lengths)
        best = _best_links(n, src, dst, lengths, D)  # (d, x)
    dd, xx = np.nonzero(unrouted & (best >= 0))
    frac[dd, best[dd, xx]] = 1.0
    return frac


def for_topology(topo: Topology, demand_pps: np.ndarray, mean_packet_bytes: float,
                 **kw: Any) -> MinDelayResult:
    """:func:`flow_deviation` on a topology, capacities converted to packets/s."""
    n, src, dst = link_arrays(topo)
    cap = topo.capacity_bps / (8.0 * float(mean_packet_bytes))
    return flow_deviation(n, src, dst, cap, topo.delay_s, demand_pps, **kw)


def slot_shares(topo: Topology, result: MinDelayResult) -> np.ndarray:
    """(n, n, K) shares W[x, d, j] of x's j-th neighbour (``topo.slots[x, j]``) for d.

    The layout of the engine's tables, so a min-delay routing can be compared with (or
    published like) a learned one.  Rows sum to 1 for x != d; absent slots hold 0.
    """
    return slot_shares_of(topo, result.fractions)


def slot_shares_of(topo: Topology, fractions: np.ndarray) -> np.ndarray:
    """:func:`slot_shares` of a fractions array ``frac[d, k]`` over the topology's links."""
    sl = topo.slot_link
    W = np.asarray(fractions).T[np.maximum(sl, 0)]  # (n, K, n): [x, j, d]
    W = np.where((sl >= 0)[:, :, None], W, 0.0)
    return np.ascontiguousarray(W.transpose(0, 2, 1))



def slot_fractions(topo: Topology, W: np.ndarray, owned: np.ndarray | None = None) -> np.ndarray:
    """(n, L) ``frac[d, k]`` of a table of slot shares ``W[x, c, j]`` (the engine's layout:
    node, destination column, neighbour slot), the inverse of :func:`slot_shares`.
    ``owned[c]`` is column c's destination (default: column c is destination c)."""
    n = topo.n
    sl = topo.slot_link
    dests = np.arange(W.shape[1]) if owned is None else np.asarray(owned, dtype=np.int64)
    frac = np.zeros((n, topo.n_links))
    xs, js = np.nonzero(sl >= 0)
    frac[dests[:, None], sl[xs, js][None, :]] = W[xs, :, js].T
    frac[topo.src[None, :] == np.arange(n)[:, None]] = 0.0   # nothing leaves d for d
    return frac


def routing_delay(n: int, src: np.ndarray, dst: np.ndarray, capacity_pps: np.ndarray,
                  prop_s: np.ndarray, frac: np.ndarray, demand: np.ndarray
                  ) -> tuple[float, np.ndarray]:
    """(T, link flows) of a given split routing ``frac`` carrying ``demand``: the same
    model the optimiser minimises (Kleinrock's M/M/1 links plus propagation, T = D/γ by
    Little's law).  T is inf when a link is at or over capacity, NaN with no demand.
    Raises ValueError when the splits trap traffic in a loop or leave offered traffic
    without a route."""
    r = np.array(demand, dtype=float)
    np.fill_diagonal(r, 0.0)
    gamma = float(r.sum())
    frac = np.asarray(frac, dtype=float)
    out = sum_by_source(frac, n, src)                    # (d, x) share total at x for d
    dd, ss = np.nonzero((r.T > 0) & ~(out > 0))
    for d_, s_ in zip(dd.tolist(), ss.tolist()):
        if s_ != d_:
            raise ValueError(f"traffic from node {s_} to node {d_} has no route in the splits")
    dest_flows, _ = flows_from_fractions(n, src, dst, frac, r)
    flows = dest_flows.sum(axis=0)
    if gamma <= 0:
        return math.nan, flows
    return mm1_delay(flows, np.asarray(capacity_pps, dtype=float),
                     np.asarray(prop_s, dtype=float), gamma), flows
