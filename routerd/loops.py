"""Forwarding-loop analysis of next-hop tables.  Pure numpy; no I/O.

A *greedy table* for one destination d is a functional graph: every node x points to one
next hop ``nh[x]`` (or -1: no route, or x is d).  Loops are the cycles of that graph.

Theory of operation: with ``N >= n`` pointer jumps every trajectory has either reached a
terminal (-1, mapped to an absorbing sink) or entered its cycle; the image of ``f^N``
is then exactly the set of cycle nodes plus the sink, because ``f^N`` permutes every cycle
onto itself.  Pointer doubling computes ``f^(2^k)`` in ``k = ceil(log2 n) + 1`` vectorised
gathers, for every destination at once, so checking a whole table set costs
O(n · m · log n) array work instead of a Python walk per node.

The same doubling, carrying hop counts, gives each node's depth in a loop-free table
(its number of hops to d), which the engine uses to keep exploration edges loop-free.
"""
from __future__ import annotations

import numpy as np


def _jumps(n: int) -> int:
    return max(1, int(np.ceil(np.log2(max(n, 2)))) + 1)


def cycle_mask(nh: np.ndarray) -> np.ndarray:
    """Boolean mask, same shape as ``nh`` (m, n): True where the node lies on a loop.

    ``nh[i, x]`` is x's next hop in table i, or -1 (terminal).
    """
    nh = np.asarray(nh)
    m, n = nh.shape
    sink = n
    f = np.where(nh < 0, sink, nh).astype(np.int64)
    f = np.concatenate([f, np.full((m, 1), sink, dtype=np.int64)], axis=1)
    g = f
    for _ in range(_jumps(n + 1)):
        g = np.take_along_axis(g, g, axis=1)
    on = np.zeros((m, n + 1), dtype=bool)
    rows = np.repeat(np.arange(m), n + 1)
    on[rows, g.ravel()] = True
    return on[:, :n]


def find_loops(nh: np.ndarray) -> list[tuple[int, list[int]]]:
    """Every forwarding loop in a set of tables: ``[(table_row, [x0, x1, ..., xk]), ...]``.

    Each loop is listed once, starting from its lowest node index, in forwarding order.
    """
    nh = np.asarray(nh)
    mask = cycle_mask(nh)
    out: list[tuple[int, list[int]]] = []
    for i in np.flatnonzero(mask.any(axis=1)).tolist():
        seen: set[int] = set()
        row = nh[i]
        for x in np.flatnonzero(mask[i]).tolist():
            if x in seen:
                continue
            cyc = [x]
            seen.add(x)
            y = int(row[x])
            while y != x:
                cyc.append(y)
                seen.add(y)
                y = int(row[y])
            k = cyc.index(min(cyc))
            out.append((i, cyc[k:] + cyc[:k]))
    return out


def depths(nh: np.ndarray, dests: np.ndarray) -> np.ndarray:
    """Hops from each node to its table's destination along ``nh`` (m, n).

    ``dests[i]`` is table i's destination.  Nodes whose path ends anywhere but the
    destination (no route on the way) or that lie on or lead into a loop get a large
    sentinel (``n + 1``) so they compare as farther than any reachable node.
    """
    nh = np.asarray(nh)
    m, n = nh.shape
    sink = n
    f = np.where(nh < 0, sink, nh).astype(np.int64)
    f = np.concatenate([f, np.full((m, 1), sink, dtype=np.int64)], axis=1)
    r = np.arange(m)
    f[r, dests] = dests  # the destination absorbs
    hop = np.ones((m, n + 1), dtype=np.int64)
    hop[r, dests] = 0
    hop[:, sink] = 0
    for _ in range(_jumps(n + 1)):
        hop = hop + np.take_along_axis(hop, f, axis=1)
        f = np.take_along_axis(f, f, axis=1)
    reached = f[:, :n] == dests[:, None]
    return np.where(reached, np.minimum(hop[:, :n], n + 1), n + 1)
