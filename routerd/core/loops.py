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


def _successor(nh: np.ndarray) -> np.ndarray:
    """Flat successor array over all tables: (m * (n + 1),), sinks at each row's end.

    Node x of table i is ``i * (n + 1) + x``; -1 entries point at the row's sink, which
    points at itself.  One flat ``take`` per jump is much cheaper than
    ``take_along_axis``.
    """
    m, n = nh.shape
    w = n + 1
    it = np.int32 if m * w < 2 ** 31 else np.int64   # half the memory traffic when it fits
    f = np.empty((m, w), dtype=it)
    f[:, :n] = nh
    f[:, n] = n
    f[f < 0] = n
    f += (np.arange(m, dtype=it) * w)[:, None]
    return f.reshape(-1)


def cycle_mask(nh: np.ndarray) -> np.ndarray:
    """Boolean mask, same shape as ``nh`` (m, n): True where the node lies on a loop.

    ``nh[i, x]`` is x's next hop in table i, or -1 (terminal).
    """
    nh = np.asarray(nh)
    m, n = nh.shape
    if m == 0:
        return np.zeros((0, n), dtype=bool)
    g = _successor(nh)
    for _ in range(_jumps(n + 1)):
        g = g.take(g)
    on = np.zeros(m * (n + 1), dtype=bool)
    on[g] = True
    return on.reshape(m, n + 1)[:, :n]


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
    w = n + 1
    if m == 0:
        return np.zeros((0, n), dtype=np.int64)
    r = np.arange(m)
    f = _successor(nh)
    dflat = (r * w + np.asarray(dests, dtype=np.int64)).astype(f.dtype)
    f[dflat] = dflat  # the destination absorbs
    hop = np.ones(m * w, dtype=np.int32)  # saturates below: at most n + 1 is kept
    hop[dflat] = 0
    hop[r * w + n] = 0
    cap = n + 1
    for _ in range(_jumps(n + 1)):
        hop = np.minimum(hop + hop.take(f), cap)  # capped: no overflow however long
        f = f.take(f)
    reached = (f == np.repeat(dflat, w)).reshape(m, w)[:, :n]
    return np.where(reached, np.minimum(hop.reshape(m, w)[:, :n], n + 1), n + 1)
