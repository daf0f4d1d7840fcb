"""The policy adapters: shortest against Kleinrock's network delay formula, ecmp's split,
qrouting's cached tables against the engine's published weights, and qrouting against
shortest on the demo lab's bottleneck."""
from __future__ import annotations

import numpy as np
import pytest

from routerd.core import topology
from routerd.core.errors import InputError
from routerd.io import config, topofiles
from routerd.sim import policies
from routerd.sim.run import DEMO_TOPOLOGY, run
from sim_helpers import assert_little


def mesh() -> dict:
    # six nodes, a ring with two chords, capacities from 4 to 12 Mbit/s: our own example
    cap = {("a", "b"): 8e6, ("b", "c"): 4e6, ("c", "d"): 12e6, ("d", "e"): 6e6,
           ("e", "f"): 8e6, ("f", "a"): 10e6, ("a", "d"): 6e6, ("b", "e"): 5e6}
    return {"topology": {"name": "mesh6", "nodes": list("abcdef"), "defaults": {"buffer_pkts": 100000},
                         "links": [{"between": [a, b], "delay_s": 0.001 * (1 + i % 3), "capacity_bps": c}
                                   for i, ((a, b), c) in enumerate(cap.items())]}}


def kleinrock_T(topo: topology.Topology, gamma: float, mean_bits: float) -> float:
    """Kleinrock's independence approximation (Bertsekas & Gallager, Data Networks, 2nd ed.,
    §3.6): T = (1/gamma) sum_l lambda_l / (mu C_l - lambda_l) + (1/gamma) sum_l lambda_l d_l,
    with link flows lambda_l from the delay-shortest routes under uniform demand."""
    n = topo.n
    nh = topo.spt_next_hops()
    lam = np.zeros(topo.n_links)
    per_pair = gamma / (n * (n - 1))
    for s in range(n):
        for d in range(n):
            x = s
            while x != d and s != d:
                y = int(nh[x, d])
                lam[topo.link_index[(x, y)]] += per_pair
                x = y
    mu_c = topo.capacity_bps / mean_bits
    return float((lam / (mu_c - lam)).sum() / gamma + (lam * topo.delay_s).sum() / gamma)


@pytest.mark.parametrize("gamma", [1500.0, 3000.0])
def test_shortest_on_a_mesh_matches_kleinrock(gamma: float) -> None:
    t = topology.from_mapping(mesh())
    s = run({"policy": "shortest", "rate_pps": gamma, "duration_s": 60.0, "seed": 3,
             "topology": mesh(), "size_dist": "exp", "packet_bytes": 1000.0, "warmup_s": 5.0,
             "series": False})["summary"]
    T = kleinrock_T(t, gamma, 8000.0)
    assert_little(s)
    # The independence approximation is not exact (a packet keeps its length from hop to
    # hop); its error on meshes like this is a few percent, larger than the run's CI
    # (about 1-3%), so the bound is the CI plus 4% of T (measured gaps: 0.7% at 1500/s, 1.8% at 3000/s).
    assert abs(s["mean_delivery_s"] - T) <= 1.5 * s["mean_delivery_ci95_s"] + 0.04 * T, (s["mean_delivery_s"], T)


def test_ecmp_splits_over_equal_cost_hops_and_keeps_flows_together() -> None:
    # a square a-b-d, a-c-d with equal delays: a has two equal-cost next hops to d
    doc = {"topology": {"name": "square", "nodes": list("abcd"),
                        "defaults": {"capacity_bps": 1e8, "buffer_pkts": 1000},
                        "links": [{"between": ["a", "b"], "delay_s": 0.001},
                                  {"between": ["a", "c"], "delay_s": 0.001},
                                  {"between": ["b", "d"], "delay_s": 0.001},
                                  {"between": ["c", "d"], "delay_s": 0.001}]}}
    t = topology.from_mapping(doc)
    p = policies.Ecmp()
    p.attach(t, np.random.default_rng(0), config.load(None))
    a, b, c, d = (t.index[x] for x in "abcd")
    assert p.choices[a][d] == (b, c) and p.table[a][d] == -2
    assert p.table[a][b] == b  # a single shortest hop goes straight into the fast path
    picks = [p.next_hop(a, d, f, 0.0) for f in range(4000)]
    share = picks.count(b) / len(picks)
    assert 0.45 < share < 0.55  # binomial sd 0.008: a 6-sd band
    assert all(p.next_hop(a, d, f, 1.0) == picks[f] for f in range(100))  # per-flow stable
    # the links a->b and a->c carry mirror-image flows; with many flows per pair the hash
    # splits each pair evenly, so their loads agree
    s = run({"policy": "ecmp", "rate_pps": 2000.0, "duration_s": 10.0, "seed": 1,
             "topology": doc, "series": False, "overrides": ["sim.flows_per_pair=512"]})
    util = {(ln["from"], ln["to"]): ln["utilisation"] for ln in s["links"]}
    assert util[("a", "b")] == pytest.approx(util[("a", "c")], rel=0.1)
    assert_little(s["summary"])


def test_qrouting_tables_are_the_engines_published_weights() -> None:
    topo = topofiles.load(DEMO_TOPOLOGY)
    # greedy: its exploration shares are the split entries checked (split mode's shares
    # move from one next hop only under load, which these rows do not make)
    cfg = config.load(None, ["engine.mode=greedy", "engine.explore.min_rate=0.05",
                             "engine.explore.max_rate=0.1"])
    p = policies.QRouting()
    p.attach(topo, np.random.default_rng(0), cfg)
    # feed some observations through the policy's own hooks, then tick
    rng = np.random.default_rng(5)
    for i in range(3000):
        x = int(rng.integers(topo.n))
        y = int(rng.choice(topo.neighbours[x]))
        d = int(rng.integers(topo.n))
        if d != x:
            p.on_hop(x, y, d, float(rng.uniform(0.001, 0.05)), 0.01)
    p.tick(0.05)
    assert p.rows_applied > 2000
    eng = p.engine
    explored = 0
    for x in range(topo.n):
        for d in range(topo.n):
            w = eng.weights(x, d)
            entry = p.table[x][d]
            if not w:
                assert entry == -1
            elif len(w) == 1 or all(v == 0 for _, v in w[1:]):
                assert entry == w[0][0]
            else:
                explored += 1
                assert entry == -2
                hops, cum = p.split(x, d)
                assert list(hops) == [h for h, _ in w]
                assert np.allclose(np.diff([0.0, *cum]), [v for _, v in w])
    assert explored > 0
    # sampling follows the weights (binomial bound, 5 sd)
    x, d = next((x, d) for x in range(topo.n) for d in range(topo.n) if p.table[x][d] == -2)
    w = dict(eng.weights(x, d))
    m = 20000
    picks = [p.next_hop(x, d, 0, 0.1) for _ in range(m)]
    for h, v in w.items():
        assert abs(picks.count(h) / m - v) <= 5 * np.sqrt(v * (1 - v) / m) + 1e-9


def test_registry_names_and_errors() -> None:
    assert set(policies.NAMES) >= {"shortest", "ecmp", "qrouting", "mindelay"}
    assert policies.get("qrouting") is policies.QRouting
    with pytest.raises(InputError, match="is not a policy"):
        policies.get("telepathy")


def demo(policy: str, rate: float) -> dict:
    return run({"policy": policy, "rate_pps": rate, "duration_s": 20.0, "seed": 11,
                "series": False})["summary"]


@pytest.mark.slow
def test_qrouting_beats_shortest_on_the_demo_bottleneck() -> None:
    # The demo lab: every delay-shortest path between the halls crosses one 2 Mbit/s trunk
    # (250 packets/s of 1000 bytes); a 10 Mbit/s detour is 4 ms longer.
    low_s, low_q = demo("shortest", 200.0), demo("qrouting", 200.0)
    hi_s, hi_q = demo("shortest", 1800.0), demo("qrouting", 1800.0)
    for s in (low_s, low_q, hi_s, hi_q):
        assert_little(s)
    # measured: low load 6.3 vs 6.5 ms; at 1800 packets/s 6.7 vs 66 ms, 0 vs ~4400 drops
    assert low_q["mean_delivery_s"] <= 1.05 * low_s["mean_delivery_s"]
    assert hi_s["link_util_max"] > 0.99  # the trunk is saturated under shortest
    assert hi_s["mean_delivery_s"] >= 4.0 * hi_q["mean_delivery_s"]
    assert hi_s["dropped"] > 1000
    assert hi_q["dropped"] <= hi_s["dropped"] / 10



# ---- reroute: shortest paths recomputed after a detection delay -------------------------------
def _networkx_next_hops(topo: topology.Topology, down: set[tuple[int, int]]) -> dict:
    """Reference: networkx's Dijkstra (networkx.shortest_path_length, weight = delay_s)
    over the live directed links; every neighbour on some shortest path is acceptable."""
    import networkx as nx

    g = nx.DiGraph()
    g.add_nodes_from(range(topo.n))
    for k, (a, b) in enumerate(zip(topo.src.tolist(), topo.dst.tolist())):
        if (a, b) not in down:
            g.add_edge(a, b, w=float(topo.delay_s[k]))
    dist = {d: nx.single_source_dijkstra_path_length(g.reverse(), d, weight="w") for d in range(topo.n)}
    ok: dict = {}
    for x in range(topo.n):
        for d in range(topo.n):
            if x == d or x not in dist[d]:
                continue
            ok[(x, d)] = {y for y in g.successors(x)
                          if y in dist[d] and abs(g[x][y]["w"] + dist[d][y] - dist[d][x]) < 1e-12}
    return ok


def test_reroute_recomputes_after_the_detection_delay_and_avoids_the_dead_link() -> None:
    # our own mesh: a-d (a chord) carries a's traffic to d until it fails
    t = topology.from_mapping(mesh())
    cfg = config.load(None, ["sim.reroute.detect_s=0.3", "sim.reroute.tick_s=0.01"])
    p = policies.make("reroute")
    p.attach(t, np.random.default_rng(0), cfg)
    a, d = t.index["a"], t.index["d"]
    assert p.table[a][d] == d
    p.on_link(a, d, False, 1.0)
    p.on_link(d, a, False, 1.0)
    for now in (1.0, 1.1, 1.29):           # before the detection time: routes unchanged
        p.tick(now)
        assert p.table[a][d] == d
    p.tick(1.3)                              # detected: every route avoids a-d
    ref = _networkx_next_hops(t, {(a, d), (d, a)})
    for (x, dd), hops in ref.items():
        assert p.table[x][dd] in hops, (t.nodes[x], t.nodes[dd])
    assert all(p.table[x][dd] >= 0 for x, dd in ref)
    p.on_link(a, d, True, 5.0)
    p.on_link(d, a, True, 5.0)
    p.tick(5.2)
    assert p.table[a][d] != d                # repair not yet detected
    p.tick(5.31)
    assert p.table == t.spt_next_hops().tolist()
    assert p.stats()["reroute_recomputations"] == 2


def test_reroute_gives_no_route_to_a_cut_off_node() -> None:
    doc = {"topology": {"name": "line", "nodes": ["a", "b", "c"], "defaults": {"capacity_bps": 1e6, "buffer_pkts": 64},
                        "links": [{"between": ["a", "b"], "delay_s": 0.001},
                                  {"between": ["b", "c"], "delay_s": 0.001}]}}
    t = topology.from_mapping(doc)
    p = policies.make("reroute")
    p.attach(t, np.random.default_rng(0), config.load(None, ["sim.reroute.detect_s=0"]))
    p.on_link(1, 2, False, 0.5)
    p.tick(0.5)
    assert p.table[0][2] == -1 and p.table[1][2] == -1 and p.table[0][1] == 1


def test_reroute_in_the_simulator_loses_only_what_the_detection_delay_costs() -> None:
    # the mesh's chord a-d fails at 4 s: shortest keeps sending onto it, reroute stops
    # after 0.3 s of detection (what was queued plus 0.3 s of sends are lost)
    scen = {"scenario": {"name": "cut", "links": [{"at_s": 4, "between": ["a", "d"], "down": True}]}}
    spec = {"rate_pps": 1500.0, "duration_s": 10.0, "seed": 2, "topology": mesh(),
            "scenario": scen, "size_dist": "exp", "warmup_s": 1.0, "series": False}
    sh = run({**spec, "policy": "shortest"})["summary"]
    rr = run({**spec, "policy": "reroute", "overrides": ["sim.reroute.detect_s=0.3"]})["summary"]
    for s in (sh, rr):
        assert_little(s)
    # shortest loses the chord's share of the traffic for 6 s; reroute about 0.3 s of it
    per_s = sh["dropped_link_down"] / 6.0    # what the chord carried per second
    assert 0 < rr["dropped_link_down"] <= per_s * (0.3 + 0.01) * 1.3 + 10, (rr, per_s)
