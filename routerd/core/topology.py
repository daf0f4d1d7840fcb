"""The one topology model used by the engine, the simulator, the service and replay.

Owns: nodes by name, directed links (propagation delay in seconds, capacity in bit/s,
buffer in packets), the neighbour-slot layout the engine indexes by, delay-shortest
distances, optional demand matrices, :func:`build` (every check, every problem reported
once), and our own format as a parsed document (:func:`from_mapping` / :func:`to_mapping`)::

      topology:
        name: lab-ring
        defaults: {capacity_bps: 10.0e6, buffer_pkts: 64}
        nodes: [a, b, c]
        links:
          - {between: [a, b], delay_s: 0.002}           # undirected: two links
          - {from: b, to: c, delay_s: 0.001, capacity_bps: 2.0e6}  # one direction
        demands:                                          # optional, any unit
          - {from: a, to: c, rate: 3.0}

Reading files (our YAML, GraphML, node-link JSON, ``topohub:GROUP/NAME``) is
:mod:`routerd.io.topofiles`' job.  Missing capacity or buffer values come from the file's
own defaults or from the caller (a config's ``topology.default_*``, the command line),
never silently; without either, the link is an error.

Must not import: files, yaml, sockets, zmq, prometheus, ``routerd.io``, the engine, the
simulator.  ``Topology`` is an immutable value.
"""
from __future__ import annotations

import hashlib
import heapq
import math
import os
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from functools import cached_property
from typing import Any

import numpy as np

from .errors import Problem, TopologyError


@dataclass(frozen=True, slots=True)
class LinkSpec:
    """One directed link as read from a file, before it is checked."""

    src: str
    dst: str
    delay_s: float
    capacity_bps: float | None
    buffer_pkts: float | None
    where: str  # for error messages: "file: links[3]"


@dataclass(frozen=True, slots=True)
class LinkDefaults:
    """Values for links whose file gives no capacity or buffer (from the command line)."""

    capacity_bps: float | None = None
    buffer_pkts: int | None = None


@dataclass(frozen=True, eq=False)
class Topology:
    """An immutable, validated network.  Build with :func:`build` or a ``load_*`` function.

    Node ``i`` is ``nodes[i]``. Link ``k`` goes ``src[k] → dst[k]``. Neighbour slots:
    ``slots[x, j]`` is the j-th out-neighbour of x (ascending node index) or -1.
    """

    name: str
    nodes: tuple[str, ...]
    src: np.ndarray  # int32, per link
    dst: np.ndarray  # int32, per link
    delay_s: np.ndarray  # float64, per link
    capacity_bps: np.ndarray  # float64, per link
    buffer_pkts: np.ndarray  # int64, per link
    demands: np.ndarray | None = None  # (n, n) float64, arbitrary unit; None if absent
    source: str = ""
    meta: Mapping[str, Any] = field(default_factory=dict)

    # ---- basic shape -------------------------------------------------------------
    @property
    def n(self) -> int:
        return len(self.nodes)

    @property
    def n_links(self) -> int:
        return int(self.src.shape[0])

    @cached_property
    def index(self) -> dict[str, int]:
        return {name: i for i, name in enumerate(self.nodes)}

    @cached_property
    def link_index(self) -> dict[tuple[int, int], int]:
        return {(int(a), int(b)): k for k, (a, b) in enumerate(zip(self.src, self.dst))}

    @cached_property
    def neighbours(self) -> tuple[tuple[int, ...], ...]:
        out: list[list[int]] = [[] for _ in range(self.n)]
        for a, b in zip(self.src.tolist(), self.dst.tolist()):
            out[a].append(b)
        return tuple(tuple(sorted(v)) for v in out)

    @cached_property
    def max_degree(self) -> int:
        return max((len(v) for v in self.neighbours), default=0)

    @cached_property
    def slots(self) -> np.ndarray:
        """(n, K) int32: out-neighbour per slot, -1 where a node has fewer than K."""
        k = max(self.max_degree, 1)
        s = np.full((self.n, k), -1, dtype=np.int32)
        for x, nb in enumerate(self.neighbours):
            s[x, : len(nb)] = nb
        return s

    @cached_property
    def slot_link(self) -> np.ndarray:
        """(n, K) int32: link index behind each slot, -1 where absent."""
        s = np.full(self.slots.shape, -1, dtype=np.int32)
        li = self.link_index
        for x, nb in enumerate(self.neighbours):
            for j, y in enumerate(nb):
                s[x, j] = li[(x, y)]
        return s

    @cached_property
    def slot_of(self) -> np.ndarray:
        """(n, n) int16/int32: slot of neighbour y at node x, or -1 if y is not a neighbour."""
        dtype = np.int16 if self.max_degree < 32000 else np.int32
        s = np.full((self.n, self.n), -1, dtype=dtype)
        for x, nb in enumerate(self.neighbours):
            for j, y in enumerate(nb):
                s[x, y] = j
        return s

    @cached_property
    def digest(self) -> str:
        """Short stable id of the node list (wire `topology` id): indices mean the same nodes."""
        h = hashlib.sha256("\n".join(self.nodes).encode()).hexdigest()
        return h[:16]

    def link(self, a: str, b: str) -> int:
        """Index of the directed link a → b; KeyError with a clear message otherwise."""
        try:
            return self.link_index[(self.index[a], self.index[b])]
        except KeyError:
            raise KeyError(f"no link {a} -> {b} in topology {self.name!r}") from None

    # ---- paths -------------------------------------------------------------------
    def shortest_delays(self, weights: np.ndarray | None = None) -> np.ndarray:
        """(n, n) matrix D[x, d]: least total link weight from x to d (default: delay_s).

        Dijkstra from every destination over reversed links. Unreachable: inf.  A link of
        weight inf is unusable (how callers leave out links that are down).
        """
        if weights is None:
            return self._paths[0]
        return self.shortest_paths(weights)[0]

    def shortest_paths(self, weights: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
        """(D, NH): least-weight distances and a next-hop table on those paths.

        ``NH[x, d]`` is x's next hop in the shortest-path tree Dijkstra grows from d (-1 on
        the diagonal and where d is unreachable).  Being a tree it has no loop even when
        zero-weight links make several paths tie; among tied paths the first one found
        wins, which is deterministic for a given topology.  Without ``weights`` (delays)
        the read-only result is computed once per topology.
        """
        if weights is None:
            return self._paths
        w = np.asarray(weights, dtype=float)
        if w.shape == self.delay_s.shape:
            out = np.isinf(w) & np.isfinite(self.delay_s)
            if np.array_equal(np.where(out, self.delay_s, w), self.delay_s):
                return self._without(out)
        return _all_pairs(self.n, self.src, self.dst, w)

    def _without(self, out: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """:meth:`shortest_paths` with the links ``out`` taken out (weight inf) and every
        other at its delay: only destinations whose delay tree uses one of them are grown
        again.  For any other destination Dijkstra's run is the same without those links —
        a link off the tree never won a relaxation (``<`` is strict: a tie keeps the first
        finder), so it left at most a stale heap entry, skipped — so its column is the
        delay tree's, bit for bit (``test_shortest_paths_without_links_is_the_full_run``)."""
        D0, NH0 = self._paths
        D, NH = D0.copy(), NH0.copy()
        k = np.flatnonzero(out)
        if k.size:
            hit = (NH0[self.src[k]] == self.dst[k][:, None]).any(axis=0)
            ds = np.flatnonzero(hit)
            if ds.size:
                w = np.where(out, np.inf, self.delay_s)
                D[:, ds], NH[:, ds] = _to_targets(self.n, self.src, self.dst, w, ds.tolist())
        return D, NH

    def shortest_from(self, source: int,
                      weights: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
        """(dist, first): one Dijkstra from ``source`` over the links (weights as
        :meth:`shortest_paths`, default delay_s; inf = unusable).

        ``dist[d]`` is the least weight from ``source`` to d, ``first[d]`` the neighbour of
        ``source`` that starts such a path (-1 for ``source`` itself and where d is
        unreachable).  For one node's own next hops this is an n-th of the all-pairs work;
        among tied paths the first one found wins (deterministic for a given topology).
        """
        w = self.delay_s if weights is None else np.asarray(weights, dtype=float)
        return _single_source(self.n, self.src, self.dst, w, int(source))

    @cached_property
    def _paths(self) -> tuple[np.ndarray, np.ndarray]:
        D, NH = _all_pairs(self.n, self.src, self.dst, self.delay_s)
        D.setflags(write=False)
        NH.setflags(write=False)
        return D, NH

    @cached_property
    def hop_distances(self) -> np.ndarray:
        return _all_pairs(self.n, self.src, self.dst, np.ones(self.n_links))[0]

    def spt_next_hops(self, dist: np.ndarray | None = None) -> np.ndarray:
        """(n, n) int32 next hop N[x, d] on a delay-shortest path (-1 on the diagonal).

        Without ``dist``: the read-only tree of :meth:`shortest_paths`, loop-free by
        construction.  With ``dist``: per (x, d) the neighbour minimising
        ``delay(x, y) + dist[y, d]``, ties to the lowest node index — loop-free only when
        every link delay is positive (zero-delay ties can point two nodes at each other).
        """
        if dist is None:
            return self._paths[1]
        D = dist
        nh = np.full((self.n, self.n), -1, dtype=np.int32)
        slots = self.slots
        valid = slots >= 0
        w = np.where(valid, self.delay_s[np.where(valid, self.slot_link, 0)], np.inf)
        for x in range(self.n):
            ys = slots[x][valid[x]]
            if ys.size == 0:
                continue
            cost = w[x][valid[x]][:, None] + D[ys, :]  # (deg, n)
            best = np.argmin(cost, axis=0)
            nh[x] = ys[best]
            nh[x, x] = -1
        return nh

    def stats(self) -> dict[str, float]:
        """Counts in the terms topohub's ``stats`` uses, plus delay figures of our own.

        ``links`` counts undirected links; ``diameter_hops`` is the longest hop-shortest
        path.  ``avg_sdp_hops`` follows topohub's definition (``topohub.graph.path_stats``
        and ``topo_stats``): per node pair, the hops of its shortest (edge-disjoint) paths
        — all of hop-shortest length, so the pair's hop distance — averaged with the
        pair's demand as weight (demand a→b, else b→a, else 0), or unweighted when the
        topology has no demands or they sum to zero.  ``avg_hops`` is the plain mean hop
        distance; ``avg_delay_path_hops`` the mean hops along delay-shortest paths.
        """
        und = {tuple(sorted((int(a), int(b)))) for a, b in zip(self.src, self.dst)}
        if self.n < 2:
            return {"nodes": self.n, "links": len(und), "diameter_hops": 0.0, "avg_hops": 0.0,
                    "avg_sdp_hops": 0.0, "avg_delay_path_hops": 0.0, "diameter_delay_s": 0.0}
        H = self.hop_distances
        off = ~np.eye(self.n, dtype=bool)
        D = self.shortest_delays()
        dem = self.demands
        if dem is not None and float(dem.sum()) > 0:
            wgt = np.where(dem > 0, dem, dem.T)
        else:
            wgt = np.ones_like(H)
        return {
            "nodes": self.n,
            "links": len(und),
            "diameter_hops": float(H[off].max()),
            "avg_hops": float(H[off].mean()),
            "avg_sdp_hops": float((H * wgt)[off].sum() / wgt[off].sum()),
            "avg_delay_path_hops": float(_tree_hops(self.spt_next_hops())[off].mean()),
            "diameter_delay_s": float(D[off].max()),
        }

    def summary(self) -> str:
        s = self.stats()
        return (
            f"topology {self.name!r}: {self.n} nodes, {self.n_links} directed links, "
            f"diameter {int(s['diameter_hops'])} hops / {s['diameter_delay_s'] * 1e3:.3f} ms"
            + (", demand matrix" if self.demands is not None else "")
        )

    def with_capacity(self, link: int, capacity_bps: float) -> Topology:
        cap = self.capacity_bps.copy()
        cap[link] = capacity_bps
        return _replace(self, capacity_bps=cap)


def _replace(t: Topology, **kw: Any) -> Topology:
    fields = dict(
        name=t.name, nodes=t.nodes, src=t.src, dst=t.dst, delay_s=t.delay_s,
        capacity_bps=t.capacity_bps, buffer_pkts=t.buffer_pkts, demands=t.demands,
        source=t.source, meta=t.meta,
    )
    fields.update(kw)
    return Topology(**fields)


def _all_pairs(n: int, src: np.ndarray, dst: np.ndarray,
               w: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """All-pairs least weights (n, n) and next hops (n, n) int32 by one Dijkstra per target."""
    return _to_targets(n, src, dst, w, range(n))


def _to_targets(n: int, src: np.ndarray, dst: np.ndarray, w: np.ndarray,
                targets: Any) -> tuple[np.ndarray, np.ndarray]:
    """Least weights and next hops towards each of ``targets``: (n, k) columns.

    On the compiled kernel (``routerd.core._kernels.to_targets``) when the install has it,
    else :func:`_to_targets_reference`; both give the same arrays to the bit
    (tests/test_topology.py).  All pairs at 1,000 nodes: about 3 s in Python, the most of
    an engine's construction."""
    comp = _compiled_paths()
    if comp is None:
        return _to_targets_reference(n, src, dst, w, targets)
    tg = np.asarray(list(targets) if not isinstance(targets, np.ndarray) else targets,
                    dtype=np.int64).reshape(-1)
    w = np.asarray(w, dtype=float)
    ok = w < math.inf                       # as the reference: only finite weights are links
    b = np.asarray(dst, dtype=np.int64)[ok]
    order = np.argsort(b, kind="stable")    # in-links of each node, in link order
    ptr = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(np.bincount(b, minlength=n), out=ptr[1:])
    frm = np.ascontiguousarray(np.asarray(src, dtype=np.int64)[ok][order])
    wt = np.ascontiguousarray(w[ok][order])
    D = np.full((n, tg.size), np.inf)
    NH = np.full((n, tg.size), -1, dtype=np.int32)
    comp.to_targets(ptr, frm, wt, tg, D, NH)
    return D, NH


def compiled_distances(n: int, src: np.ndarray, dst: np.ndarray, w: np.ndarray) -> np.ndarray | None:
    """All-pairs least weights D[x, d] over links ``src[k] → dst[k]`` (weights >= 0, inf
    for no link) on the compiled kernel, one Dijkstra per destination; None where this
    install has no compiled kernels (the caller runs its own reference).  Unreachable
    pairs are inf."""
    if _compiled_paths() is None:
        return None
    return _all_pairs(n, src, dst, w)[0]


def _compiled_paths() -> Any:
    """The compiled module when this install has it, else None (the reference runs)."""
    from . import kernels  # imports numpy and the extension only
    return kernels.select("auto")


def _to_targets_reference(n: int, src: np.ndarray, dst: np.ndarray, w: np.ndarray,
                          targets: Any) -> tuple[np.ndarray, np.ndarray]:
    """:func:`_to_targets` in Python (heapq): the reference."""
    rev: list[list[tuple[int, float]]] = [[] for _ in range(n)]
    for a, b, c in zip(src.tolist(), dst.tolist(), w.tolist()):
        if c < math.inf:
            rev[b].append((a, c))
    k = len(targets)
    D = np.full((n, k), np.inf)
    NH = np.full((n, k), -1, dtype=np.int32)
    pop, push = heapq.heappop, heapq.heappush
    for col, d in enumerate(targets):
        dist = [math.inf] * n
        via = [-1] * n
        dist[d] = 0.0
        heap = [(0.0, d)]
        while heap:
            du, u = pop(heap)
            if du > dist[u]:
                continue
            for v, c in rev[u]:
                nd = du + c
                if nd < dist[v]:
                    dist[v] = nd
                    via[v] = u
                    push(heap, (nd, v))
        D[:, col] = dist
        NH[:, col] = via
    return D, NH


def _single_source(n: int, src: np.ndarray, dst: np.ndarray, w: np.ndarray,
                   s: int) -> tuple[np.ndarray, np.ndarray]:
    """Least weights from ``s`` (n,) and the first hop of a shortest path (n,) int32."""
    out: list[list[tuple[int, float]]] = [[] for _ in range(n)]
    for a, b, c in zip(src.tolist(), dst.tolist(), w.tolist()):
        if c < math.inf:
            out[a].append((b, c))
    dist = [math.inf] * n
    first = [-1] * n
    dist[s] = 0.0
    heap = [(0.0, s)]
    pop, push = heapq.heappop, heapq.heappush
    while heap:
        du, u = pop(heap)
        if du > dist[u]:
            continue
        fu = first[u]
        for v, c in out[u]:
            nd = du + c
            if nd < dist[v]:
                dist[v] = nd
                first[v] = v if u == s else fu
                push(heap, (nd, v))
    return np.array(dist, dtype=float), np.array(first, dtype=np.int32)


def _tree_hops(nh: np.ndarray) -> np.ndarray:
    """Hops from x to d along a loop-free next-hop table ``nh[x, d]`` (inf: no route)."""
    n = nh.shape[0]
    cols = np.arange(n)[None, :]
    nxt = np.maximum(nh, 0)
    h = np.where(np.eye(n, dtype=bool), 0.0, np.inf)
    for _ in range(n):
        hn = np.where(nh >= 0, h[nxt, cols] + 1.0, h)
        if np.array_equal(hn, h):
            break
        h = hn
    return h


# ---- building and checking --------------------------------------------------------

def build(
    name: str,
    nodes: Iterable[str],
    links: Iterable[LinkSpec],
    *,
    defaults: LinkDefaults = LinkDefaults(),
    demands: Mapping[tuple[str, str], float] | None = None,
    source: str = "",
    meta: Mapping[str, Any] | None = None,
) -> Topology:
    """Check everything and build a Topology, or raise TopologyError listing every problem."""
    where0 = source or name
    problems: list[Problem] = []
    node_list = list(nodes)
    index: dict[str, int] = {}
    for i, nm in enumerate(node_list):
        if not isinstance(nm, str) or not nm:
            problems.append(Problem(f"{where0}: nodes[{i}]", nm, "is not a non-empty name"))
        elif nm in index:
            problems.append(Problem(f"{where0}: nodes[{i}]", nm, "is a duplicate node name"))
        else:
            index[nm] = i
    if len(index) < 2 and not problems:
        problems.append(Problem(f"{where0}: nodes", len(index), "nodes: a topology needs at least 2"))
    src, dst, dly, cap, buf = [], [], [], [], []
    seen: dict[tuple[int, int], str] = {}
    for ls in links:
        bad = False
        for end in (ls.src, ls.dst):
            if end not in index:
                problems.append(Problem(ls.where, end, "is not a declared node"))
                bad = True
        if bad:
            continue
        if ls.src == ls.dst:
            problems.append(Problem(ls.where, f"{ls.src} -> {ls.dst}", "is a self-loop"))
            continue
        key = (index[ls.src], index[ls.dst])
        if key in seen:
            problems.append(
                Problem(ls.where, f"{ls.src} -> {ls.dst}", f"duplicates the link at {seen[key]}")
            )
            continue
        seen[key] = ls.where
        c = ls.capacity_bps if ls.capacity_bps is not None else defaults.capacity_bps
        b = ls.buffer_pkts if ls.buffer_pkts is not None else defaults.buffer_pkts
        for label, v, positive in (
            ("delay_s", ls.delay_s, False),
            ("capacity_bps", c, True),
            ("buffer_pkts", b, True),
        ):
            if v is None:
                problems.append(
                    Problem(f"{ls.where}.{label}", None,
                            "is missing and no default was given (file defaults or command line)")
                )
                bad = True
                continue
            if isinstance(v, bool) or not isinstance(v, (int, float, np.integer, np.floating)):
                # text is turned into numbers by the readers (routerd.io.values.as_number)
                problems.append(Problem(f"{ls.where}.{label}", v, "is not a number"))
                bad = True
                continue
            fv = float(v)
            if math.isnan(fv) or math.isinf(fv):
                problems.append(Problem(f"{ls.where}.{label}", v, "is not a finite number"))
                bad = True
            elif fv < 0 or (positive and fv == 0):
                rule = "must be > 0" if positive else "must be >= 0"
                problems.append(Problem(f"{ls.where}.{label}", v, rule))
                bad = True
            elif label == "buffer_pkts" and fv != int(fv):
                problems.append(Problem(f"{ls.where}.{label}", v, "must be a whole number of packets"))
                bad = True
        if bad:
            continue
        src.append(key[0]); dst.append(key[1])
        dly.append(float(ls.delay_s)); cap.append(float(c)); buf.append(int(float(b)))  # type: ignore[arg-type]
    dem = None
    if demands is not None:
        dem = np.zeros((len(node_list), len(node_list)))
        for (a, b), v in demands.items():
            w = f"{where0}: demands[{a} -> {b}]"
            if a not in index or b not in index:
                problems.append(Problem(w, f"{a} -> {b}", "names a node that is not declared"))
                continue
            if isinstance(v, bool) or not isinstance(v, (int, float, np.integer, np.floating)):
                problems.append(Problem(w, v, "is not a number"))
                continue
            fv = float(v)
            if not math.isfinite(fv) or fv < 0:
                problems.append(Problem(w, v, "must be a finite number >= 0"))
                continue
            if a != b:
                dem[index[a], index[b]] += fv
    if not problems:
        # connectivity: every node must reach every other (strongly connected)
        n = len(node_list)
        adj: list[list[int]] = [[] for _ in range(n)]
        radj: list[list[int]] = [[] for _ in range(n)]
        for a, b in zip(src, dst):
            adj[a].append(b); radj[b].append(a)
        for graph, what in ((adj, "reached from"), (radj, "able to reach")):
            seen_n = {0}
            stack = [0]
            while stack:
                u = stack.pop()
                for v in graph[u]:
                    if v not in seen_n:
                        seen_n.add(v); stack.append(v)
            if len(seen_n) < n:
                missing = [node_list[i] for i in range(n) if i not in seen_n]
                shown = ", ".join(missing[:8]) + (" ..." if len(missing) > 8 else "")
                problems.append(
                    Problem(f"{where0}: graph", shown,
                            f"not {what} node {node_list[0]!r}: the graph is disconnected")
                )
                break
    if problems:
        # an undirected link is two directed ones: report each problem once (by its text,
        # since a value may be a list or a map and so not hashable)
        raise TopologyError(list({str(p): p for p in problems}.values()))
    return Topology(
        name=name,
        nodes=tuple(node_list),
        src=np.asarray(src, dtype=np.int32),
        dst=np.asarray(dst, dtype=np.int32),
        delay_s=np.asarray(dly, dtype=np.float64),
        capacity_bps=np.asarray(cap, dtype=np.float64),
        buffer_pkts=np.asarray(buf, dtype=np.int64),
        demands=dem,
        source=source,
        meta=dict(meta or {}),
    )


# ---- our YAML format, already parsed ----------------------------------------------------

def from_mapping(doc: Any, *, source: str = "<mapping>",
                 defaults: LinkDefaults = LinkDefaults()) -> Topology:
    """Our YAML format, already parsed (a dict with a top-level ``topology`` key)."""
    if not isinstance(doc, dict) or not isinstance(doc.get("topology"), dict):
        raise TopologyError(Problem(source, type(doc).__name__,
                                    "must be a mapping with a 'topology' mapping at the top"))
    t = doc["topology"]
    problems: list[Problem] = []
    known = {"name", "defaults", "nodes", "links", "demands", "description"}
    for k in t:
        if k not in known:
            problems.append(Problem(f"{source}: topology.{k}", k, f"is not a known key ({', '.join(sorted(known))})"))
    name = str(t.get("name") or os.path.splitext(os.path.basename(source))[0])
    fdef = t.get("defaults") or {}
    if not isinstance(fdef, dict):
        problems.append(Problem(f"{source}: topology.defaults", fdef, "must be a mapping"))
        fdef = {}
    for k in fdef:
        if k not in ("capacity_bps", "buffer_pkts"):
            problems.append(Problem(f"{source}: topology.defaults.{k}", k,
                                    "is not a known key (capacity_bps, buffer_pkts)"))
    eff = LinkDefaults(
        capacity_bps=fdef.get("capacity_bps", defaults.capacity_bps),
        buffer_pkts=fdef.get("buffer_pkts", defaults.buffer_pkts),
    )
    nodes = t.get("nodes")
    if not isinstance(nodes, list):
        problems.append(Problem(f"{source}: topology.nodes", nodes, "must be a list of node names"))
        nodes = []
    links_doc = t.get("links")
    if not isinstance(links_doc, list):
        problems.append(Problem(f"{source}: topology.links", links_doc, "must be a list of links"))
        links_doc = []
    specs: list[LinkSpec] = []
    for i, ln in enumerate(links_doc):
        w = f"{source}: topology.links[{i}]"
        if not isinstance(ln, dict):
            problems.append(Problem(w, ln, "must be a mapping"))
            continue
        extra = set(ln) - {"between", "from", "to", "delay_s", "capacity_bps", "buffer_pkts"}
        if extra:
            problems.append(Problem(w, sorted(extra), "are not known link keys"))
        if "delay_s" not in ln:
            problems.append(Problem(f"{w}.delay_s", None, "is missing"))
            continue
        ends: list[tuple[Any, Any]]
        if "between" in ln:
            b = ln["between"]
            if not (isinstance(b, list) and len(b) == 2):
                problems.append(Problem(f"{w}.between", b, "must be a list of two node names"))
                continue
            ends = [(b[0], b[1]), (b[1], b[0])]
        elif "from" in ln and "to" in ln:
            ends = [(ln["from"], ln["to"])]
        else:
            problems.append(Problem(w, ln, "needs 'between: [a, b]' or 'from' and 'to'"))
            continue
        for a, b2 in ends:
            specs.append(LinkSpec(str(a), str(b2), ln["delay_s"], ln.get("capacity_bps"),
                                  ln.get("buffer_pkts"), w))
    dem = None
    if t.get("demands") is not None:
        dem = {}
        dd = t["demands"]
        if not isinstance(dd, list):
            problems.append(Problem(f"{source}: topology.demands", dd, "must be a list"))
        else:
            for i, row in enumerate(dd):
                if not (isinstance(row, dict) and {"from", "to", "rate"} <= set(row)):
                    problems.append(Problem(f"{source}: topology.demands[{i}]", row,
                                            "must be a mapping with from, to, rate"))
                    continue
                dem[(str(row["from"]), str(row["to"]))] = row["rate"]
    try:
        topo = build(name, [str(x) for x in nodes], specs, defaults=eff, demands=dem, source=source)
    except TopologyError as e:
        raise TopologyError(problems + e.problems) from None  # type: ignore[operator]
    if problems:
        raise TopologyError(problems)
    return topo


def to_mapping(t: Topology) -> dict[str, Any]:
    """Our YAML format for a topology (directed links in index order, explicit values,
    demands when present): :func:`from_mapping` gives back the same nodes, links, values
    and demand matrix, bit for bit (a state dir keeps its topology this way).  Not kept:
    ``source`` and ``meta`` (a topohub file's published figures)."""
    doc = {
        "topology": {
            "name": t.name,
            "nodes": list(t.nodes),
            "links": [
                {"from": t.nodes[a], "to": t.nodes[b], "delay_s": float(d),
                 "capacity_bps": float(c), "buffer_pkts": int(bf)}
                for a, b, d, c, bf in zip(t.src.tolist(), t.dst.tolist(), t.delay_s.tolist(),
                                          t.capacity_bps.tolist(), t.buffer_pkts.tolist())
            ],
        }
    }
    if t.demands is not None:
        a, b = np.nonzero(t.demands)
        doc["topology"]["demands"] = [{"from": t.nodes[i], "to": t.nodes[j],
                                       "rate": float(t.demands[i, j])}
                                      for i, j in zip(a.tolist(), b.tolist())]
    return doc
