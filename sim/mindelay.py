"""The min-delay yardstick: optimal static routing for an offered demand (M/M/1 links).

Owns the flow deviation method (Fratta, Gerla & Kleinrock, "The flow deviation method:
an approach to store-and-forward communication network design", Networks 3, 1973) for
bifurcated per-destination routing, and the ``mindelay`` policy adapter that forwards by
its split fractions.

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
``max_iter``.

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

Must not import: the simulator core, sockets, files, plotting.  numpy only (plus the
project's pure modules).
"""
from __future__ import annotations

import bisect
import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from routerd.core.topology import Topology

from . import analytic
from .policy import Policy

#: ρ levels of the penalty continuation (see the module docstring).
RHO_LEVELS = (0.99, 0.999, 0.9999, 0.99999, 0.999999)


@dataclass(frozen=True, eq=False)
class MinDelayResult:
    """The outcome of :func:`flow_deviation`.  Arrays follow :mod:`routerd.sim.analytic`'s layout."""

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
    lo, hi = 0.0, amax
    a = 0.5 * amax
    for _ in range(60):
        g, h = d1(a)
        if g > 0:
            hi = a
        else:
            lo = a
        if hi - lo < 1e-14 * amax or g == 0:
            break
        nxt = a - g / h if h > 0 else 0.5 * (lo + hi)
        if not (lo < nxt < hi):
            nxt = 0.5 * (lo + hi)
        a = nxt
    return a


def _all_or_nothing(n: int, src: np.ndarray, dst: np.ndarray, lengths: np.ndarray,
                    demand: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(per-destination tree flows, best link per (d, x), distances) under ``lengths``."""
    D = analytic.all_distances(n, src, dst, lengths)
    best = _best_links(n, src, dst, lengths, D)
    return analytic.tree_flows(n, src, dst, best, demand), best, D


def _best_links(n: int, src: np.ndarray, dst: np.ndarray, lengths: np.ndarray,
                D: np.ndarray) -> np.ndarray:
    """(d, x) → the lowest-index link out of x on a shortest path to d (-1 for x == d)."""
    L = len(src)
    cost = lengths[:, None] + D[dst]  # (L, n): x → d through link k, then a shortest path
    order = np.argsort(src, kind="stable")
    s_sorted = src[order]
    starts = np.flatnonzero(np.r_[True, s_sorted[1:] != s_sorted[:-1]])
    heads = s_sorted[starts]
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
) -> MinDelayResult:
    """Minimum-delay bifurcated routing of ``demand`` (packets/s, n × n) by flow deviation.

    Links are ``src[k] → dst[k]`` with capacity ``capacity_pps[k]`` (packets/s) and
    propagation ``prop_s[k]``; parallel links are allowed.  See the module docstring.
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
    step = _classic if method == "classic" else _PathShift(n, src, dst, r, best0).sweep
    F = fd.sum(axis=0)
    it = 0
    rel_gap = math.inf
    converged = False
    rho = rho_levels[0]
    bound = math.inf
    infeasible = False
    lower = 0.0
    for rho in rho_levels:
        converged = False
        while it < max_iter:
            if np.any(F > cap):
                bound = min(bound, _load_factor_bound(n, src, dst, cap, r, F, rho))
                if bound < 1.0:
                    infeasible = True  # proven: no routing fits, stop here
                    break
            lengths = mm1_marginal(F, cap, prop, rho)
            vd, _, _ = _all_or_nothing(n, src, dst, lengths, r)
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
        if infeasible or np.all(F <= rho * cap) or it >= max_iter:
            break

    # clean up: acyclic per-destination flows → splits → flows the forwarding delivers
    fd = fd.copy()
    scale = max(float(fd.max()), 1e-300)
    fd[fd < 1e-12 * scale] = 0.0
    for d in range(n):
        _cancel_cycles(n, src, dst, fd[d])
    lengths = mm1_marginal(F, cap, prop, rho)
    frac = _fallback_fractions(n, src, dst, lengths, _shares(n, src, fd, min_share))
    dest_flows, _ = analytic.flows_from_fractions(n, src, dst, frac, r)
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
        load_factor_bound=float(bound), delay_lower_s=lower / gamma,
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
    Dw = analytic.all_distances(n, src, dst, w)
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
                 best: np.ndarray):
        self.n, self.src, self.dst = n, src, dst
        order = np.argsort(src, kind="stable")
        self.order = order
        s_sorted = src[order]
        self.starts = np.flatnonzero(np.r_[True, s_sorted[1:] != s_sorted[:-1]])
        self.heads = s_sorted[self.starts]
        self.group = np.repeat(np.arange(len(self.starts)),
                               np.diff(np.r_[self.starts, len(src)]))
        self.dst_l = dst.tolist()
        # per destination: [(s, {path (tuple of links): flow}), ...]
        self.pairs: dict[int, list[tuple[int, dict[tuple[int, ...], float]]]] = {}
        bl = best.tolist()
        for d in range(n):
            rows = []
            for s_ in range(n):
                if s_ != d and r[s_, d] > 0:
                    rows.append((s_, {self._walk(bl[d], s_, d): float(r[s_, d])}))
            if rows:
                self.pairs[d] = rows

    def _walk(self, bl: list[int], s: int, d: int) -> tuple[int, ...]:
        path: list[int] = []
        x = s
        for _ in range(self.n):
            if x == d:
                return tuple(path)
            k = bl[x]
            path.append(k)
            x = self.dst_l[k]
        raise AssertionError("shortest-route tree has a loop")  # lengths > 0: impossible

    def _tree(self, d: int, lengths: np.ndarray) -> list[int]:
        n, order, starts, heads = self.n, self.order, self.starts, self.heads
        dist = np.full(n, np.inf)
        dist[d] = 0.0
        lo = lengths[order]
        do = self.dst[order]
        for _ in range(n):
            best = np.minimum.reduceat(lo + dist[do], starts)
            new = dist.copy()
            new[heads] = np.minimum(dist[heads], best)
            new[d] = 0.0
            if np.array_equal(new, dist):
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
            lengths = mm1_marginal(np.asarray(Fl), cap, prop, rho)
            bl = self._tree(d, lengths)
            for s_, paths in rows:
                best = self._walk(bl, s_, d)
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
        fd = np.zeros(shape)
        for d, rows in self.pairs.items():
            row = fd[d]
            for _, paths in rows:
                for p, x in paths.items():
                    if p:
                        row[list(p)] += x
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
    width = hi - lo
    x = 0.5 * (lo + hi)
    for _ in range(60):
        g, h = d1(x)
        if g > 0:
            hi = x
        else:
            lo = x
        if hi - lo <= 1e-13 * width or g == 0:
            break
        nxt = x - g / h if h > 0 else 0.5 * (lo + hi)
        x = nxt if lo < nxt < hi else 0.5 * (lo + hi)
    return x


def _gd(f: float, c: float, rho: float) -> tuple[float, float]:
    """First and second derivative of the penalised queueing term at flow f (scalars)."""
    x0 = rho * c
    if f <= x0:
        room = c - f
        return c / (room * room), 2 * c / (room * room * room)
    room = c - x0
    g2 = 2 * c / (room * room * room)
    return c / (room * room) + g2 * (f - x0), g2


def _cancel_cycles(n: int, src: np.ndarray, dst: np.ndarray, f: np.ndarray) -> int:
    """Remove every directed cycle from one destination's flow ``f`` (in place); count them."""
    for count in range(len(f) + 1):  # each cancellation empties at least one link
        live = np.flatnonzero(f > 0)
        cyc = analytic.find_cycle(n, src[live], dst[live])
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
    S = analytic.by_source(n, src)
    out_flow = fd @ S  # (d, x)
    with np.errstate(divide="ignore", invalid="ignore"):
        frac = np.where(out_flow[:, src] > 0, fd / out_flow[:, src], 0.0)
    frac[frac < min_share] = 0.0
    tot = frac @ S
    with np.errstate(divide="ignore", invalid="ignore"):
        frac = np.where(tot[:, src] > 0, frac / tot[:, src], 0.0)
    return frac


def _fallback_fractions(n: int, src: np.ndarray, dst: np.ndarray, lengths: np.ndarray,
                        frac: np.ndarray) -> np.ndarray:
    """Give every (x, d) without a share its shortest marginal-length link (share 1)."""
    frac = frac.copy()
    tot = frac @ analytic.by_source(n, src)
    D = analytic.all_distances(n, src, dst, lengths)
    best = _best_links(n, src, dst, lengths, D)  # (d, x)
    dd, xx = np.nonzero((tot == 0) & (best >= 0))
    frac[dd, best[dd, xx]] = 1.0
    return frac


def for_topology(topo: Topology, demand_pps: np.ndarray, mean_packet_bytes: float,
                 **kw: Any) -> MinDelayResult:
    """:func:`flow_deviation` on a topology, capacities converted to packets/s."""
    n, src, dst = analytic.link_arrays(topo)
    cap = topo.capacity_bps / (8.0 * float(mean_packet_bytes))
    return flow_deviation(n, src, dst, cap, topo.delay_s, demand_pps, **kw)


def slot_shares(topo: Topology, result: MinDelayResult) -> np.ndarray:
    """(n, n, K) shares W[x, d, j] of x's j-th neighbour (``topo.slots[x, j]``) for d.

    The layout of the engine's tables, so a min-delay routing can be compared with (or
    published like) a learned one.  Rows sum to 1 for x != d; absent slots hold 0.
    """
    sl = topo.slot_link
    W = result.fractions.T[np.maximum(sl, 0)]  # (n, K, n): [x, j, d]
    W = np.where((sl >= 0)[:, :, None], W, 0.0)
    return np.ascontiguousarray(W.transpose(0, 2, 1))


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
