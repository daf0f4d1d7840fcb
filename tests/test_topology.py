"""The topology model (routerd/core/topology.py): loaders against their references, checks.

References: the topohub package's own per-topology ``graph['stats']`` (its definitions
are in ``topohub/graph.py``: ``topo_stats`` and ``path_stats``), networkx for GraphML
writing (``networkx.write_graphml``, the reference writer of the open standard), node-link
JSON and graph distances, and the ITU-T G.114 planning figure of 5 µs/km for fibre.
"""
from __future__ import annotations

import importlib.resources
import json
import math
import os
import sys
from typing import Any

import networkx as nx
import numpy as np
import pytest
import topohub
import yaml

from routerd.core import topology as T
from routerd.core.errors import TopologyError
from routerd.io import topofiles as TF

DEF = T.LinkDefaults(1e9, 100)
NAMED = ["sndlib/abilene", "sndlib/geant", "gabriel/50/0"]
SNDLIB = sorted(f"sndlib/{f[:-5]}" for f in os.listdir(importlib.resources.files(topohub) / "data" / "sndlib")
                if f.endswith(".json"))


def _nx(doc: dict) -> nx.Graph:
    return nx.node_link_graph(doc, edges="edges")


# ---- topohub import against the dataset's own figures --------------------------------------

@pytest.mark.parametrize("key", NAMED)
def test_topohub_import_matches_dataset_stats(key: str, topohub_raw) -> None:  # type: ignore[no-untyped-def]
    doc = topohub_raw(key)
    st = doc["graph"]["stats"]
    t = TF.load(f"topohub:{key}", DEF)
    ours = t.stats()
    # topohub's topo_stats: 'nodes' = len(g), 'links' = undirected edge count,
    # 'diameter_hops' = networkx.diameter(g) (unweighted)
    assert ours["nodes"] == st["nodes"] == len(doc["nodes"])
    assert ours["links"] == st["links"]
    assert t.n_links == 2 * st["links"]  # every undirected edge became two links
    assert ours["diameter_hops"] == st["diameter_hops"] == nx.diameter(_nx(doc))
    # topohub's avg_sdp_hops (topo_stats with path_stats): per pair, the mean hops of its
    # shortest edge-disjoint paths — hop-shortest ones, so the pair's hop distance —
    # weighted by the pair's demand (a->b, else b->a) or unweighted when demands sum to
    # 0; the dataset stores it rounded to 2 decimals.  Our stats() reproduces that
    # definition; here it is recomputed independently from networkx hop distances.
    G = _nx(doc)
    dem = doc["graph"].get("demands", {})
    hops = dict(nx.all_pairs_shortest_path_length(G))
    num = den = 0.0
    pairs = [(a, b) for a in G for b in G if a != b]
    w = {}
    for a, b in pairs:
        w[a, b] = dem.get(str(a), {}).get(str(b), dem.get(str(b), {}).get(str(a), 0))
    if sum(w.values()) == 0:
        w = dict.fromkeys(pairs, 1.0)
    for a, b in pairs:
        num += w[a, b] * hops[a][b]
        den += w[a, b]
    assert num / den == pytest.approx(ours["avg_sdp_hops"], rel=1e-12)
    assert ours["avg_sdp_hops"] == pytest.approx(st["avg_sdp_hops"], abs=0.005 + 1e-9)


@pytest.mark.parametrize("key", SNDLIB)
def test_every_sndlib_topology_loads_and_agrees(key: str, topohub_raw) -> None:  # type: ignore[no-untyped-def]
    st = topohub_raw(key)["graph"]["stats"]
    s = TF.load(f"topohub:{key}", DEF).stats()
    assert (s["nodes"], s["links"], s["diameter_hops"]) == (st["nodes"], st["links"], st["diameter_hops"])
    # measured here: 28 of 30 sndlib/gabriel sets agree to the stored 2 decimals; giul39
    # and norway differ by < 0.01 where an edge-disjoint path found by topohub's max-flow
    # is longer than the hop distance (its paths are drawn from an undirected subgraph)
    assert s["avg_sdp_hops"] == pytest.approx(st["avg_sdp_hops"], abs=0.01)


def test_topohub_delays_are_5us_per_km(topohub_raw) -> None:  # type: ignore[no-untyped-def]
    doc = topohub_raw("sndlib/abilene")
    t = TF.load("topohub:sndlib/abilene", DEF)
    names = {nd["id"]: nd["name"] for nd in doc["nodes"]}
    for e in doc["edges"]:
        a, b = names[e["source"]], names[e["target"]]
        for u, v in ((a, b), (b, a)):
            assert t.delay_s[t.link(u, v)] == pytest.approx(e["dist"] * 5e-6, rel=1e-12)
    # delay-shortest distances equal networkx's Dijkstra on the same weights
    G = _nx(doc)
    ref = dict(nx.all_pairs_dijkstra_path_length(G, weight=lambda u, v, e: e["dist"] * 5e-6))
    D = t.shortest_delays()
    for i, nd_i in enumerate(doc["nodes"]):
        for j, nd_j in enumerate(doc["nodes"]):
            assert D[i, j] == pytest.approx(ref[nd_i["id"]][nd_j["id"]], rel=1e-12, abs=1e-15)
    assert t.demands is not None and t.demands.sum() > 0


def test_topohub_errors() -> None:
    with pytest.raises(TopologyError, match="is not in topohub"):
        TF.load("topohub:sndlib/no-such-net", DEF)
    with pytest.raises(TopologyError, match="GROUP/NAME"):
        TF.load("topohub:../../etc/passwd", DEF)
    with pytest.raises(TopologyError, match="capacity_bps.*no default"):
        TF.load("topohub:sndlib/abilene")  # topohub carries no capacities


# ---- our YAML, GraphML, node-link JSON -----------------------------------------------------

def _yaml(tmp_path, doc: dict, name: str = "t.yaml") -> str:  # type: ignore[no-untyped-def]
    p = tmp_path / name
    p.write_text(yaml.safe_dump(doc))
    return str(p)


def good_doc() -> dict:
    return {"topology": {
        "name": "lab", "defaults": {"capacity_bps": 1.0e7, "buffer_pkts": 50},
        "nodes": ["a", "b", "c"],
        "links": [{"between": ["a", "b"], "delay_s": 0.002},
                  {"between": ["b", "c"], "delay_s": 0.001, "capacity_bps": 2.0e6},
                  {"from": "c", "to": "a", "delay_s": 0.004, "buffer_pkts": 9},
                  {"from": "a", "to": "c", "delay_s": 0.005}],
        "demands": [{"from": "a", "to": "c", "rate": 3.0}]}}


def test_yaml_loading(tmp_path) -> None:  # type: ignore[no-untyped-def]
    t = TF.load(_yaml(tmp_path, good_doc()))
    assert t.nodes == ("a", "b", "c") and t.n_links == 6
    assert t.delay_s[t.link("a", "b")] == 0.002 and t.delay_s[t.link("b", "a")] == 0.002
    assert t.capacity_bps[t.link("b", "c")] == 2.0e6 and t.capacity_bps[t.link("a", "b")] == 1.0e7
    assert t.buffer_pkts[t.link("c", "a")] == 9 and t.buffer_pkts[t.link("a", "c")] == 50
    assert t.demands is not None and t.demands[0, 2] == 3.0 and t.demands.sum() == 3.0
    with pytest.raises(KeyError, match="no link c -> b"):
        T.Topology.link(TF.load(_yaml(tmp_path, {"topology": {
            "nodes": ["a", "b", "c"], "defaults": {"capacity_bps": 1, "buffer_pkts": 1},
            "links": [{"from": "a", "to": "b", "delay_s": 0}, {"from": "b", "to": "c", "delay_s": 0},
                      {"from": "c", "to": "a", "delay_s": 0}]}}, "ring.yaml")), "c", "b")
    # round trip through our own writer
    again = T.from_mapping(T.to_mapping(t), source="again")
    assert again.nodes == t.nodes
    for f in ("src", "dst", "delay_s", "capacity_bps", "buffer_pkts"):
        assert np.array_equal(getattr(again, f), getattr(t, f))
    # D[x, d] against networkx's Dijkstra on the same directed links
    G = nx.DiGraph()
    for k in range(t.n_links):
        G.add_edge(int(t.src[k]), int(t.dst[k]), w=float(t.delay_s[k]))
    ref = dict(nx.all_pairs_dijkstra_path_length(G, weight="w"))
    D = t.shortest_delays()
    assert all(D[i, j] == pytest.approx(ref[i][j]) for i in range(3) for j in range(3))


def test_demo_lab_loads() -> None:
    t = TF.load("routerd/data/demo-lab.yaml")
    assert t.n == 16 and "demo-lab" in t.summary()


def test_command_line_defaults_fill_only_missing_values(tmp_path) -> None:  # type: ignore[no-untyped-def]
    doc = good_doc()
    del doc["topology"]["defaults"]
    with pytest.raises(TopologyError) as ei:
        TF.load(_yaml(tmp_path, doc))
    msgs = [str(p) for p in ei.value.problems]
    assert any("topology.links[0].capacity_bps: is missing and no default was given" in m
               for m in msgs), msgs
    t = TF.load(_yaml(tmp_path, doc), T.LinkDefaults(capacity_bps=5e6, buffer_pkts=7))
    assert t.capacity_bps[t.link("a", "b")] == 5e6 and t.capacity_bps[t.link("b", "c")] == 2e6
    assert t.buffer_pkts[t.link("c", "a")] == 9 and t.buffer_pkts[t.link("a", "b")] == 7


@pytest.mark.parametrize("directed", [False, True])
def test_graphml_written_by_networkx(tmp_path, directed: bool) -> None:  # type: ignore[no-untyped-def]
    G = nx.DiGraph() if directed else nx.Graph()
    edges = [("p", "q", 0.001, 1e6, 10), ("q", "r", 0.002, 2e6, 20), ("r", "p", 0.003, 3e6, 30)]
    for a, b, d, c, bf in edges:
        G.add_edge(a, b, delay_s=d, capacity_bps=c, buffer_pkts=bf)
    path = tmp_path / "net.graphml"
    nx.write_graphml(G, path)  # the reference writer
    t = TF.load(str(path))
    assert set(t.nodes) == {"p", "q", "r"}
    assert t.n_links == (3 if directed else 6)
    for a, b, d, c, bf in edges:
        k = t.link(a, b)
        assert (t.delay_s[k], t.capacity_bps[k], t.buffer_pkts[k]) == (d, c, bf)
        if not directed:
            assert t.delay_s[t.link(b, a)] == d


def test_graphml_errors_name_the_edge(tmp_path) -> None:  # type: ignore[no-untyped-def]
    G = nx.Graph()
    G.add_edge("p", "q", delay_s=0.001)
    G.add_edge("q", "r", capacity_bps=1e6)
    path = tmp_path / "bad.graphml"
    nx.write_graphml(G, path)
    with pytest.raises(TopologyError) as ei:
        TF.load(str(path))
    msgs = [str(p) for p in ei.value.problems]
    assert any(str(path) in m and "edge[1] (q - r).delay_s" in m and "is missing" in m for m in msgs), msgs
    assert any("capacity_bps" in m and "no default" in m for m in msgs), msgs
    (tmp_path / "junk.graphml").write_text("<graphml><graph>")
    with pytest.raises(TopologyError, match="not valid GraphML"):
        TF.load(str(tmp_path / "junk.graphml"))


def test_node_link_json_written_by_networkx(tmp_path) -> None:  # type: ignore[no-untyped-def]
    G = nx.Graph()
    G.add_edge(0, 1, dist=100.0)
    G.add_edge(1, 2, dist=250.0)
    G.add_edge(2, 0, dist=40.0)
    for i, nm in enumerate(["oslo", "bergen", "tromso"]):
        G.nodes[i]["name"] = nm
    p = tmp_path / "g.json"
    p.write_text(json.dumps(nx.node_link_data(G, edges="edges")))
    t = TF.load(str(p), DEF)
    assert t.nodes == ("oslo", "bergen", "tromso")
    assert t.delay_s[t.link("bergen", "tromso")] == pytest.approx(250 * 5e-6)  # ITU-T G.114


# ---- bad topology files: file, element, value, rule ------------------------------------------

def _problems(tmp_path, topo: dict, defaults: T.LinkDefaults = T.LinkDefaults()) -> list[str]:  # type: ignore[no-untyped-def]
    path = _yaml(tmp_path, {"topology": topo}, "bad.yaml")
    with pytest.raises(TopologyError) as ei:
        TF.load(path, defaults)
    msgs = [str(p) for p in ei.value.problems]
    assert all(m.startswith(path) for m in msgs), msgs  # every message names the file
    return msgs


BASE = {"defaults": {"capacity_bps": 1e6, "buffer_pkts": 10}, "nodes": ["a", "b", "c"]}
RING = [{"between": ["a", "b"], "delay_s": 0.001}, {"between": ["b", "c"], "delay_s": 0.001}]


@pytest.mark.parametrize("links,nodes,expect", [
    (RING + [{"between": ["a", "zz"], "delay_s": 0.001}], None,
     "topology.links[2]: 'zz' is not a declared node"),
    (RING + [{"from": "a", "to": "a", "delay_s": 0.001}], None,
     "topology.links[2]: 'a -> a' is a self-loop"),
    (RING + [{"from": "b", "to": "a", "delay_s": 0.003}], None,
     "topology.links[2]: 'b -> a' duplicates the link at"),
    ([{"between": ["a", "b"], "delay_s": 0.001}], None,
     "graph: 'c' not reached from node 'a': the graph is disconnected"),
    (RING + [{"between": ["a", "c"], "delay_s": -0.5}], None,
     "topology.links[2].delay_s: -0.5 must be >= 0"),
    (RING + [{"between": ["a", "c"], "delay_s": 0.001, "capacity_bps": 0}], None,
     "topology.links[2].capacity_bps: 0 must be > 0"),
    (RING + [{"between": ["a", "c"], "delay_s": float("nan")}], None,
     "topology.links[2].delay_s: nan is not a finite number"),
    (RING + [{"between": ["a", "c"], "delay_s": 0.001, "buffer_pkts": 2.5}], None,
     "topology.links[2].buffer_pkts: 2.5 must be a whole number of packets"),
    (RING + [{"between": ["a", "c"], "delay_s": "fast"}], None,
     "topology.links[2].delay_s: 'fast' is not a number"),
    (RING, ["a", "b", "c", "a"], "nodes[3]: 'a' is a duplicate node name"),
    (RING + [{"between": ["a", "c"]}], None, "topology.links[2].delay_s: is missing"),
])
def test_bad_topology_messages(tmp_path, links, nodes, expect) -> None:  # type: ignore[no-untyped-def]
    topo = dict(BASE, links=links)
    if nodes is not None:
        topo["nodes"] = nodes
    msgs = _problems(tmp_path, topo)
    assert any(expect in m for m in msgs), msgs


def test_missing_capacity_with_no_default(tmp_path) -> None:  # type: ignore[no-untyped-def]
    msgs = _problems(tmp_path, {"nodes": ["a", "b"], "links": [{"between": ["a", "b"], "delay_s": 0.001}]})
    assert any("topology.links[0].capacity_bps: is missing and no default was given" in m for m in msgs)
    assert any("topology.links[0].buffer_pkts: is missing" in m for m in msgs)


def test_every_problem_is_reported_not_just_the_first(tmp_path) -> None:  # type: ignore[no-untyped-def]
    msgs = _problems(tmp_path, dict(BASE, links=RING + [
        {"between": ["a", "zz"], "delay_s": 0.001}, {"from": "c", "to": "c", "delay_s": 0.001},
        {"between": ["a", "c"], "delay_s": float("nan"), "capacity_bps": -1}], extra_key=1))
    assert len(msgs) >= 5, msgs
    assert any("topology.extra_key" in m and "is not a known key" in m for m in msgs)


def test_other_file_errors(tmp_path) -> None:  # type: ignore[no-untyped-def]
    with pytest.raises(TopologyError, match="does not exist"):
        TF.load(str(tmp_path / "nope.yaml"))
    (tmp_path / "x.txt").write_text("")
    with pytest.raises(TopologyError, match="not a known topology extension"):
        TF.load(str(tmp_path / "x.txt"))
    (tmp_path / "y.yaml").write_text("topology: [1, 2\n")
    with pytest.raises(TopologyError, match="not valid YAML"):
        TF.load(str(tmp_path / "y.yaml"))
    (tmp_path / "z.yaml").write_text("- 1\n")
    with pytest.raises(TopologyError, match="'topology' mapping"):
        TF.load(str(tmp_path / "z.yaml"))
    with pytest.raises(TopologyError, match="needs at least 2"):
        T.build("one", ["a"], [])


# ---- the model itself -------------------------------------------------------------------

def test_slots_and_shortest_path_tree(make_ring) -> None:  # type: ignore[no-untyped-def]
    t = make_ring(30, 25, seed=3, zero_delay=True)
    assert t.slots.shape == (30, t.max_degree)
    for x in range(t.n):
        nb = list(t.neighbours[x])
        assert t.slots[x, :len(nb)].tolist() == nb and (t.slots[x, len(nb):] == -1).all()
        for j, y in enumerate(nb):
            assert t.slot_of[x, y] == j and t.src[t.slot_link[x, j]] == x and t.dst[t.slot_link[x, j]] == y
    D, NH = t.shortest_paths()
    G = nx.DiGraph()
    for k in range(t.n_links):
        G.add_edge(int(t.src[k]), int(t.dst[k]), w=float(t.delay_s[k]))
    ref = dict(nx.all_pairs_dijkstra_path_length(G, weight="w"))
    for x in range(t.n):
        for d in range(t.n):
            assert D[x, d] == pytest.approx(ref[x][d], abs=1e-15)
            if x == d:
                assert NH[x, d] == -1
            else:  # on a shortest path, and the tree is loop-free despite zero-delay ties
                y = int(NH[x, d])
                assert t.delay_s[t.link_index[(x, y)]] + D[y, d] == pytest.approx(D[x, d], abs=1e-15)
                seen, z = set(), x
                while z != d:
                    assert z not in seen
                    seen.add(z)
                    z = int(NH[z, d])
    assert not D.flags.writeable  # cached per topology: read-only
    hops = t.hop_distances
    ref_h = dict(nx.all_pairs_shortest_path_length(G))
    assert all(hops[x, d] == ref_h[x][d] for x in range(t.n) for d in range(t.n))
    # links down (weight inf) are left out
    w = t.delay_s.copy()
    w[t.link_index[(0, 1)]] = math.inf
    _, NH2 = t.shortest_paths(w)
    assert NH2[0, 1] != 1
    assert t.digest == T.build("x", t.nodes, [T.LinkSpec("h0", "h1", 0, 1, 1, "l"),
                                               T.LinkSpec("h1", "h0", 0, 1, 1, "l")] + [
        T.LinkSpec(f"h{i}", f"h{i + 1}", 0, 1, 1, "l") for i in range(1, 29)] + [
        T.LinkSpec(f"h{i + 1}", f"h{i}", 0, 1, 1, "l") for i in range(1, 29)]).digest


# ---- single-source shortest paths (the agent's fallback) ------------------------------------
@pytest.mark.parametrize("key", ["sndlib/abilene", "sndlib/geant"])
def test_shortest_from_matches_networkx_single_source_dijkstra(key: str, topohub_raw) -> None:  # type: ignore[no-untyped-def]
    """Reference: networkx.single_source_dijkstra on the same directed, weighted links,
    with some links made unusable (weight inf) as the agent does for links it sees down."""
    t = TF.load(f"topohub:{key}", DEF)
    rng = np.random.default_rng(7)
    w = t.delay_s.astype(float).copy()
    w[rng.choice(t.n_links, size=t.n_links // 8, replace=False)] = np.inf
    G = nx.DiGraph()
    G.add_nodes_from(range(t.n))
    for k, (a, b) in enumerate(zip(t.src.tolist(), t.dst.tolist())):
        if w[k] < math.inf:
            G.add_edge(a, b, w=float(w[k]))
    D_all, _ = t.shortest_paths(w)
    for s in range(t.n):
        dist, first = t.shortest_from(s, w)
        ref = nx.single_source_dijkstra_path_length(G, s, weight="w")
        for d in range(t.n):
            if d not in ref:
                assert dist[d] == math.inf and first[d] == -1
                continue
            assert dist[d] == pytest.approx(ref[d], rel=1e-12, abs=1e-15)
            assert dist[d] == pytest.approx(D_all[s, d], rel=1e-12, abs=1e-15)
            if d == s:
                assert first[d] == -1
                continue
            # the first hop is a usable link out of s that starts a shortest path to d
            y = int(first[d])
            k = t.link_index[(s, y)]
            assert w[k] < math.inf
            tail = nx.single_source_dijkstra_path_length(G, y, weight="w").get(d, math.inf)
            assert w[k] + tail == pytest.approx(ref[d], rel=1e-9, abs=1e-15)
    dist0, _ = t.shortest_from(0)                 # default weights: the delays
    assert np.allclose(dist0, t.shortest_delays()[0], rtol=1e-12, atol=0)


def test_topohub_missing_names_the_extra(monkeypatch: pytest.MonkeyPatch, tmp_path, capsys) -> None:  # type: ignore[no-untyped-def]
    """Without topohub a topohub: reference says which extra brings it, in the loader and on
    the command line (exit 2, no traceback)."""
    from routerd.tools.cli import main

    monkeypatch.setitem(sys.modules, "topohub", None)     # `import topohub` raises ImportError
    with pytest.raises(T.TopologyError) as e:
        TF.load("topohub:sndlib/abilene", DEF)
    assert "pip install 'routerd[topohub]'" in str(e.value) and "topohub:sndlib/abilene" in str(e.value)
    rc = main(["simulate", "--policy", "shortest", "--rate", "10", "--duration", "1", "--seed", "1",
               "--topology", "topohub:sndlib/abilene", "--out", str(tmp_path / "o"), "--quiet"])
    err = capsys.readouterr().err
    assert rc == 2 and "routerd[topohub]" in err and "Traceback" not in err


@pytest.mark.parametrize("equal", [False, True])
def test_shortest_paths_without_links_is_the_full_run(equal: bool) -> None:
    """Links taken out (weight inf, the engine's live tree after a link goes down): only
    destinations whose delay tree used one are grown again, and the result is the full
    all-pairs run's, bit for bit — with equal delays too, where ties abound."""
    import sys

    from routerd.core.topology import _all_pairs

    sys.path.insert(0, os.path.join(os.path.dirname(os.path.dirname(__file__)), "bench"))
    from bench_engine import ring_with_chords

    t = ring_with_chords(60, 60)
    if equal:
        doc = T.to_mapping(t)
        for lk in doc["topology"]["links"]:
            lk["delay_s"] = 0.001
        t = T.from_mapping(doc)
    rng = np.random.default_rng(5)
    for k in (0, 1, 1, 2, 5, 40):
        w = t.delay_s.copy()
        w[rng.choice(t.n_links, k, replace=False)] = np.inf
        D, NH = t.shortest_paths(w)
        D2, NH2 = _all_pairs(t.n, t.src, t.dst, w)
        np.testing.assert_array_equal(D, D2)
        np.testing.assert_array_equal(NH, NH2)
        assert D.flags.writeable and NH.flags.writeable


@pytest.mark.parametrize("weights", ["delay", "equal", "zeros", "some_down"])
def test_compiled_paths_equal_the_reference_to_the_bit(weights: str) -> None:
    """The compiled all-pairs Dijkstra (routerd.core._kernels.to_targets) gives the Python
    reference's distances and next hops to the bit — its pop order among equal distances
    and its relaxation order included (ties abound with equal or zero weights) — on every
    SNDlib backbone topohub ships and on random graphs; subsets of targets too."""
    from routerd.core import kernels
    from routerd.core.topology import _to_targets, _to_targets_reference

    if not kernels.available():
        pytest.skip("no compiled kernels in this install (the reference is all there is)")
    rng = np.random.default_rng(11)
    topos: list[Any] = [TF.load(f"topohub:{k}", DEF) for k in SNDLIB]
    for n in (2, 7, 40, 150):
        m = 3 * n
        a, b = rng.integers(0, n, m), rng.integers(0, n, m)
        keep = a != b
        topos.append((n, a[keep], b[keep], rng.uniform(1e-4, 1e-2, int(keep.sum()))))
    for t in topos:
        n, src, dst, w = ((t.n, t.src, t.dst, t.delay_s) if isinstance(t, T.Topology) else t)
        if weights == "equal":
            w = np.full(w.shape, 0.001)
        elif weights == "zeros":
            w = np.where(rng.random(w.shape) < 0.3, 0.0, np.round(w, 3))
        elif weights == "some_down":
            w = np.where(rng.random(w.shape) < 0.2, np.inf, w)
        for targets in (range(n), rng.choice(n, max(1, n // 3), replace=False).tolist()):
            D0, NH0 = _to_targets_reference(n, src, dst, w, targets)
            D1, NH1 = _to_targets(n, src, dst, w, targets)
            assert NH1.dtype == NH0.dtype == np.int32
            np.testing.assert_array_equal(D1, D0)
            np.testing.assert_array_equal(NH1, NH0)
