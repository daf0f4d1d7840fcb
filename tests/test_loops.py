"""Forwarding-loop analysis (routerd/core/loops.py) against networkx as the reference.

Tables are functional graphs (each node has at most one next hop), so their loops are
exactly the simple cycles networkx finds (``networkx.simple_cycles``); depths are checked
against a brute-force walk.
"""
from __future__ import annotations

import networkx as nx
import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from routerd.core import loops

SET = settings(max_examples=80, deadline=None)


def _canon(cyc: list[int]) -> tuple[int, ...]:
    k = cyc.index(min(cyc))
    return tuple(cyc[k:] + cyc[:k])


def _nx_loops(nh: np.ndarray) -> set[tuple[int, tuple[int, ...]]]:
    out = set()
    for i, row in enumerate(nh.tolist()):
        g = nx.DiGraph()
        g.add_nodes_from(range(len(row)))
        g.add_edges_from((x, y) for x, y in enumerate(row) if y >= 0)
        out |= {(i, _canon(c)) for c in nx.simple_cycles(g)}
    return out


@st.composite
def planted_tables(draw: st.DrawFn) -> tuple[np.ndarray, list[tuple[int, tuple[int, ...]]]]:
    """Random functional graphs that lead into -1 terminals, with cycles planted into them."""
    m = draw(st.integers(1, 4))
    n = draw(st.integers(1, 40))
    seed = draw(st.integers(0, 2 ** 32 - 1))
    rng = np.random.default_rng(seed)
    nh = np.full((m, n), -1, dtype=np.int64)
    planted: list[tuple[int, tuple[int, ...]]] = []
    for i in range(m):
        order = rng.permutation(n)
        # acyclic base: each node points to an earlier node in `order` or is terminal
        for k in range(1, n):
            if rng.random() < 0.85:
                nh[i, order[k]] = order[rng.integers(0, k)]
        # plant disjoint cycles on fresh node sets
        free = list(rng.permutation(n))
        for _ in range(draw(st.integers(0, 3))):
            size = draw(st.integers(1, 6))
            if size > len(free) or (size == 1 and not draw(st.booleans())):
                continue
            cyc = [int(free.pop()) for _ in range(size)]
            if size == 1:  # a self-pointer is a loop too
                nh[i, cyc[0]] = cyc[0]
            else:
                for a, b in zip(cyc, cyc[1:] + cyc[:1]):
                    nh[i, a] = b
            planted.append((i, _canon(cyc)))
    return nh, planted


@SET
@given(planted_tables())
def test_find_loops_finds_every_planted_loop(case) -> None:  # type: ignore[no-untyped-def]
    nh, planted = case
    found = loops.find_loops(nh)
    got = {(i, tuple(c)) for i, c in found}
    assert len(got) == len(found)  # each loop listed once
    assert set(planted) <= got  # every planted loop is found
    assert got == _nx_loops(nh)  # and nothing but real loops (networkx as reference)
    for _, c in found:
        assert c[0] == min(c)
    mask = loops.cycle_mask(nh)
    want = np.zeros_like(mask)
    for i, c in got:
        want[i, list(c)] = True
    assert np.array_equal(mask, want)


def _walk_depth(row: list[int], x: int, d: int) -> int:
    n = len(row)
    seen, h, y = set(), 0, x
    while y != d:
        if y < 0 or y in seen:
            return n + 1
        seen.add(y)
        y = row[y]
        h += 1
    return min(h, n + 1)


@SET
@given(planted_tables(), st.data())
def test_depths_match_a_brute_force_walk(case, data) -> None:  # type: ignore[no-untyped-def]
    nh, _ = case
    m, n = nh.shape
    dests = np.array([data.draw(st.integers(0, n - 1)) for _ in range(m)])
    nh = nh.copy()
    nh[np.arange(m), dests] = -1  # the destination forwards nothing
    dep = loops.depths(nh, dests)
    for i in range(m):
        row = nh[i].tolist()
        for x in range(n):
            assert dep[i, x] == _walk_depth(row, x, int(dests[i])), (i, x)


def test_edge_cases() -> None:
    assert loops.find_loops(np.zeros((0, 5), dtype=int)) == []
    assert loops.cycle_mask(np.zeros((0, 3), dtype=int)).shape == (0, 3)
    assert loops.find_loops(np.array([[-1]])) == []
    assert loops.find_loops(np.array([[1, 0, -1]])) == [(0, [0, 1])]
    # a long chain into a loop: the loop is found, the chain is not on it
    n = 1000
    row = np.arange(1, n + 1)
    row[-1] = n - 4  # ... -> 996 -> 997 -> 998 -> 999 -> 996
    assert loops.find_loops(row[None, :]) == [(0, [996, 997, 998, 999])]
    assert loops.cycle_mask(row[None, :]).sum() == 4
