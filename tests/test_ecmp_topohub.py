"""ECMP link loads under uniform demand against topohub's precomputed per-edge figures.

topohub (1.5.1, ``topohub.graph.calculate_utilization``) routes one unit of demand for
every ordered pair of nodes ('uni' mode) over *hop-count* shortest paths, splitting the
flow arriving at a node evenly over all its next hops that lie on a shortest path, hop
by hop; it stores each edge's load in both directions (``ecmp_fwd`` = source → target,
``ecmp_bwd`` = target → source) as a percentage of the most loaded directed link,
rounded to two decimals in its JSON files.

The simulator's ``ecmp`` picks among delay-shortest next hops by a hash of the flow id.
With every link given the same delay, delay-shortest is hop-shortest, and the expected
share of each equal-cost next hop is the even split: :func:`routerd.sim.analytic.ecmp_link_loads`
computes exactly that, and a simulated run must carry it.
"""
from __future__ import annotations

import copy
import math
import warnings
from typing import Any

import numpy as np
import pytest

from routerd.core import topology
from routerd.io import topofiles
from routerd.sim import analytic, policies
from routerd.sim.run import run

KEYS = ["sndlib/abilene", "sndlib/polska", "gabriel/25/0"]
ROUNDING = 0.005 + 1e-9  # topohub writes two decimals


def topohub_doc(key: str) -> dict[str, Any]:
    import topohub

    # topohub.get leaves its data file for the garbage collector to close (its warning)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ResourceWarning)
        return copy.deepcopy(topohub.get(key))


def equal_delay_topology(doc: dict[str, Any]) -> topology.Topology:
    """The document as a Topology with node labels = topohub ids and 1 ms on every link."""
    doc = copy.deepcopy(doc)
    for nd in doc["nodes"]:
        nd.pop("name", None)
    for e in doc["edges"]:
        e["delay_s"] = 0.001
    return topofiles.from_node_link(doc, source="topohub", defaults=topology.LinkDefaults(10e6, 100000))


def uniform(n: int) -> np.ndarray:
    m = np.ones((n, n))
    np.fill_diagonal(m, 0.0)
    return m


def percent_errors(doc: dict[str, Any], t: topology.Topology, load: np.ndarray) -> np.ndarray:
    u = load / load.max() * 100.0
    err = []
    for e in doc["edges"]:
        a, b = t.index[str(e["source"])], t.index[str(e["target"])]
        err.append(u[t.link_index[(a, b)]] - e["ecmp_fwd"]["uni"])
        err.append(u[t.link_index[(b, a)]] - e["ecmp_bwd"]["uni"])
    return np.abs(np.array(err))


@pytest.mark.parametrize("key", KEYS)
def test_ecmp_loads_match_topohub_uniform_figures(key: str) -> None:
    doc = topohub_doc(key)
    t = equal_delay_topology(doc)
    load = analytic.ecmp_link_loads(t, uniform(t.n))
    err = percent_errors(doc, t, load)
    assert err.max() <= ROUNDING, err.max()  # measured: <= 0.005 on all three
    # the check tells rules apart: a single shortest path per pair is far off
    single = analytic.single_path_fractions(t, t.spt_next_hops())
    f, _ = analytic.flows_from_fractions(t.n, t.src, t.dst, single, uniform(t.n))
    assert percent_errors(doc, t, f.sum(axis=0)).max() > 5.0


@pytest.mark.parametrize("key", KEYS)
def test_analytic_split_is_the_simulator_ecmp_rule(key: str) -> None:
    # same equal-cost sets as the ecmp policy builds, each hop getting an even share
    t = equal_delay_topology(topohub_doc(key))
    p = policies.make("ecmp")
    p.attach(t, np.random.default_rng(0), None)
    frac = analytic.ecmp_fractions(t.n, t.src, t.dst, t.delay_s)
    for x in range(t.n):
        for d in range(t.n):
            if x == d:
                continue
            hops = p.choices[x][d]  # type: ignore[attr-defined]
            for y in t.neighbours[x]:
                share = frac[d, t.link_index[(x, y)]]
                assert share == pytest.approx(1.0 / len(hops) if y in hops else 0.0)


def hashed_loads(t: topology.Topology, flows_per_pair: int, rate: float) -> np.ndarray:
    """Expected link loads (packets/s) under the policy's own hash, flow by flow."""
    p = policies.make("ecmp")
    p.attach(t, np.random.default_rng(0), None)
    per_flow = rate / (t.n * (t.n - 1)) / flows_per_pair
    load = np.zeros(t.n_links)
    for s in range(t.n):
        for d in range(t.n):
            if s == d:
                continue
            for r in range(flows_per_pair):
                flow = (s * t.n + d) * flows_per_pair + r  # routerd.sim.traffic's flow id layout
                x = s
                while x != d:
                    y = p.next_hop(x, d, flow, 0.0)
                    load[t.link_index[(x, y)]] += per_flow
                    x = y
    return load


def test_simulated_ecmp_utilisation_matches_the_analytic_loads() -> None:
    t = equal_delay_topology(topohub_doc("sndlib/abilene"))
    rate, fpp, duration, warm = 3000.0, 256, 20.0, 2.0
    expect = analytic.ecmp_link_loads(t, uniform(t.n) * rate / (t.n * (t.n - 1)))
    hashed = hashed_loads(t, fpp, rate)
    # hashing 256 flows per pair realises the even split closely (binomial spread)
    assert np.abs(hashed - expect).max() <= 0.05 * expect.max()
    res = run({"policy": "ecmp", "rate_pps": rate, "duration_s": duration, "seed": 11,
               "topology": t, "warmup_s": warm, "series": False,
               "overrides": (f"sim.flows_per_pair={fpp}",)})
    s = res["summary"]
    assert s["dropped"] == 0 and s["ttl_expired"] == 0
    win = duration - warm
    tx = 8000.0 / t.capacity_bps  # fixed 1000-byte packets
    util = np.array([ln["utilisation"] for ln in res["links"]])
    # The packets a link carries in the window are a sum of independent Poisson flows
    # (each flow id is a Poisson substream), so their count is Poisson: sd = sqrt(mean).
    # Against the hash-exact expectation: 4 sd.
    count_sd = np.sqrt(hashed * win)
    assert np.all(np.abs(util - hashed * tx) <= 4 * count_sd * tx / win + 1e-12)
    # against the even-split figures: the same 4 sd plus the hashing spread measured above
    slack = np.abs(hashed - expect) * tx
    assert np.all(np.abs(util - expect * tx) <= 4 * count_sd * tx / win + slack + 1e-12)
    rel = np.abs(util - expect * tx).max() / (expect * tx).max()
    assert rel < 0.05, rel
    assert math.isfinite(s["mean_delivery_s"])
