"""Engine variants (routerd/core/variants.py) against their papers' rules.

* Full echo: Boyan & Littman, "Packet routing in dynamically changing networks: a
  reinforcement learning approach", NIPS 6 (1994) — every neighbour's estimate updates its
  own entry; damping as our control for the oscillation Shilova et al. (2016) report.
* Predictive Q-routing: Choi & Yeung, "Predictive Q-routing: a memory-based reinforcement
  learning approach to adaptive traffic control", NIPS 8 (1996) — P = max(Q + dt R, B)
  (the issue's worked example: Q = 20, R = -0.5, dt = 10, B = 12 gives 15).
* Dual reinforcement Q-routing: Kumar & Miikkulainen (1997) — the backward update at y
  about x for the packet's source.
* Confidence-based Q-routing: Kumar & Miikkulainen (1998) — eta = max(C_new, 1 - C_old),
  C_k = C_0 lambda^k for an unused entry.
* Every variant keeps the core's properties: batched == sequential (hypothesis), bounded
  exploration and loop-free weighted graphs (networkx as the reference acyclicity check).
"""
from __future__ import annotations

import math

import networkx as nx
import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from routerd.core import loops
from routerd.core import topology as T
from routerd.core import variants as V
from routerd.core.engine import Engine, EngineSettings, HopBatch, settings_with
from routerd.core.errors import ConfigError
from routerd.io import config
from routerd.sim.policies import QRouting
from routerd.sim.run import run
from test_engine import HYP, _forwarding_graphs, _random_q, line, row_lists, slot

VARIANTS = ("full_echo", "predictive", "dual", "confidence")


def cs(variant: str, **kw: object) -> EngineSettings:
    """Constant step, constant start values, no hysteresis: hand arithmetic stays simple."""
    # greedy mode: the variants are greedy-mode rules (split mode takes the plain rule only)
    base: dict[str, object] = {"mode": "greedy", "step_mode": "constant", "alpha": 0.5,
                               "initial_mode": "constant", "initial_value_s": 10.0,
                               "ceiling_s": 100.0, "margin": 0.0, "variant": variant}
    base.update(kw)
    return EngineSettings(**base)  # type: ignore[arg-type]


def diamond() -> T.Topology:
    """x with two ways to d: via y (short) and via z (long); all links both ways."""
    specs = []
    for i, (a, b, dl) in enumerate([("x", "y", 0.001), ("y", "d", 0.001), ("x", "z", 0.003),
                                    ("z", "d", 0.003)]):
        specs += [T.LinkSpec(a, b, dl, 1e6, 10, f"l{i}"), T.LinkSpec(b, a, dl, 1e6, 10, f"l{i}r")]
    return T.build("diamond", ["x", "y", "z", "d"], specs)


# ---- settings and config ---------------------------------------------------------------

def test_config_keys_reach_the_settings() -> None:
    cfg = config.load(None).with_overrides({"engine.mode": "greedy", "engine.variant": "confidence",
                                            "engine.confidence.decay": 0.5})
    s = EngineSettings.from_config(cfg)
    assert s.variant == "confidence" and s.conf_decay == 0.5
    assert EngineSettings.from_config(config.load(None)).variant == "plain"


def test_bad_variant_settings_are_refused_with_the_rule() -> None:
    with pytest.raises(ValueError, match="variant 'echo' is not one of"):
        EngineSettings(variant="echo")
    with pytest.raises(ValueError, match=r"echo_damping 0 is not in \(0, 1\]"):
        EngineSettings(echo_damping=0)
    with pytest.raises(ConfigError, match="engine.variant"):
        config.load(None).with_overrides({"engine.variant": "echo"})


# ---- predictive (Choi & Yeung 1996) ------------------------------------------------------

def test_predictive_worked_example() -> None:
    # the example: Q = 20, R = -0.5, dt = 10, B = 12 -> max(20 - 5, 12) = 15
    p = V.predict(np.array([20.0]), np.array([12.0]), np.array([-0.5]), np.array([0.0]), 10.0)
    assert p.tolist() == [15.0]
    # long enough without news, the floor B holds: max(20 - 15, 12) = 12
    assert V.predict(np.array([20.0]), np.array([12.0]), np.array([-0.5]), np.array([0.0]), 30.0).tolist() == [12.0]


def test_predictive_update_by_hand() -> None:
    t = line("x", "y", "d")
    e = Engine(t, cs("predictive", pred_beta=0.7, pred_gamma=0.9))
    x, y, d = t.index["x"], t.index["y"], t.index["d"]
    j = slot(t, "x", "y")
    st = e._variant
    assert isinstance(st, V.Predictive)
    # first row at t = 4: dQ = 1 + 5 - 10 = -4 < 0 -> Q = 10 - 2 = 8, B = 8,
    # R = 0 + 0.7 * (-4) / (4 - 0) = -0.7, U = 4
    e.observe(HopBatch.of([x], [y], [d], [1.0], [5.0]), now=4.0)
    assert e.Q[x, d, j] == 8.0 and st.B[x, d, j] == 8.0
    assert st.R[x, d, j] == pytest.approx(-0.7) and st.U[x, d, j] == 4.0
    # second row at t = 5: dQ = 1 + 11 - 8 = 4 > 0 -> Q = 10, B stays 8, R = 0.9 * -0.7
    e.observe(HopBatch.of([x], [y], [d], [1.0], [11.0]), now=5.0)
    assert e.Q[x, d, j] == 10.0 and st.B[x, d, j] == 8.0
    assert st.R[x, d, j] == pytest.approx(-0.63) and st.U[x, d, j] == 5.0
    # decisions read the prediction at t = 7: max(10 - 2 * 0.63, 8) = 8.74
    e.decide(7.0)
    assert e._qdec[x, d, j] == pytest.approx(8.74)


def test_predictive_retries_a_path_without_news() -> None:
    # x prefers z while y's entry is bad; y's entry recovers on paper (R < 0) and with
    # time its prediction falls below z's: x goes back to y with no new row at all
    t = diamond()
    e = Engine(t, cs("predictive", initial_mode="shortest"))
    x, y, z, d = (t.index[k] for k in "xyzd")
    jy = slot(t, "x", "y")
    st = e._variant
    assert e.Q[x, d, slot(t, "x", "z")] == pytest.approx(0.006)
    e.Q[x, d, jy], st.B[x, d, jy], st.R[x, d, jy], st.U[x, d, jy] = 0.020, 0.002, -0.001, 0.0
    e._dirty[:] = True
    e.decide(1.0)   # prediction max(0.020 - 0.001, 0.002) = 0.019 > 0.006: z
    assert e.next_hops()[x, d] == z
    e.decide(15.0)  # max(0.020 - 0.015, 0.002) = 0.005 < 0.006: y again, Q is still 0.020
    assert e.next_hops()[x, d] == y and e.Q[x, d, jy] == 0.020
    plain = Engine(t, cs("plain", initial_mode="shortest"))
    plain.Q[x, d, jy] = 0.020
    plain._dirty[:] = True
    plain.decide(15.0)
    assert plain.next_hops()[x, d] == z


# ---- confidence (Kumar & Miikkulainen 1998) ---------------------------------------------

@pytest.mark.parametrize("lam", [0.5, 0.9, 0.99])
def test_confidence_decay_is_c0_lambda_to_the_k(lam: float) -> None:
    # C_k = C_0 * lambda^k after k unused decay intervals
    for k in range(6):
        assert V.decayed(0.8, k * 2.0, lam, 2.0) == pytest.approx(0.8 * lam ** k, rel=1e-12)


def test_confidence_update_by_hand() -> None:
    t = line("x", "y", "d")
    e = Engine(t, cs("confidence", conf_initial=0.25, conf_decay=0.5, conf_interval_s=1.0,
                     conf_min_step=0.0))
    x, y, d = t.index["x"], t.index["y"], t.index["d"]
    j = slot(t, "x", "y")
    st = e._variant
    assert isinstance(st, V.Confidence)
    # at t = 2, C_old = 0.25 * 0.5^2 = 0.0625; the row gives C_new = 0.8:
    # eta = max(0.8, 1 - 0.0625) = 0.9375; target 1 + 5 = 6 -> Q = 10 + 0.9375 (6 - 10) = 6.25
    # C = 0.0625 + 0.9375 (0.8 - 0.0625) = 0.75390625
    e.observe(HopBatch.of([x], [y], [d], [1.0], [5.0]), now=2.0, confidence=np.array([0.8]))
    assert e.Q[x, d, j] == pytest.approx(6.25) and st.C[x, d, j] == pytest.approx(0.75390625)
    # the hop to the destination itself is sure: C_new = 1, eta = 1 -> Q = the latency
    jd = slot(t, "y", "d")
    e.observe(HopBatch.of([y], [d], [d], [0.5]), now=2.0)
    assert e.Q[y, d, jd] == 0.5 and st.C[y, d, jd] == 1.0
    # no confidence given: y's own (just set to 1) is used -> eta = 1, Q = 1 + 0.5
    e.observe(HopBatch.of([x], [y], [d], [1.0]), now=2.0)
    assert e.Q[x, d, j] == 1.5 and st.C[x, d, j] == 1.0


def test_confidence_stale_entry_is_overwritten_faster() -> None:
    # a sure entry left alone for 20 intervals (lambda = 0.8: C = 0.8^20 ~ 0.0115) takes
    # news with eta = max(C_new, 1 - C) ~ 0.99; a fresh sure one with only eta = C_new
    t = line("x", "y", "d")
    e = Engine(t, cs("confidence", conf_initial=1.0, conf_decay=0.8, conf_min_step=0.0))
    x, y, d = t.index["x"], t.index["y"], t.index["d"]
    j = slot(t, "x", "y")
    e.observe(HopBatch.of([x], [y], [d], [1.0], [1.0]), now=0.0, confidence=np.array([0.1]))
    fresh = e.Q[x, d, j]
    assert fresh == pytest.approx(10 + 0.1 * (2 - 10))
    e2 = Engine(t, cs("confidence", conf_initial=1.0, conf_decay=0.8, conf_min_step=0.0))
    e2.observe(HopBatch.of([x], [y], [d], [1.0], [1.0]), now=20.0, confidence=np.array([0.1]))
    eta = 1 - 0.8 ** 20
    assert e2.Q[x, d, j] == pytest.approx(10 + eta * (2 - 10))
    assert e2.Q[x, d, j] < fresh - 6


# ---- full echo (Boyan & Littman 1994) ----------------------------------------------------

def test_full_echo_updates_every_live_neighbour_by_hand() -> None:
    t = diamond()
    e = Engine(t, cs("full_echo", echo_damping=0.5, echo_smoothing=0.5))
    x, y, z, d = (t.index[k] for k in "xyzd")
    jy, jz = slot(t, "x", "y"), slot(t, "x", "z")
    # a row for the hop x -> y (latency 0.002, y reports 4):
    #   Q[x,d,y] = 10 + 0.5 (0.002 + 4 - 10) = 7.001
    # echo from z: L[x,z] = its propagation 0.003, V(z, d) = min Q[z, d, .] = 10 (start)
    #   Q[x,d,z] = 10 + 0.5 * 0.5 (0.003 + 10 - 10) = 10.00075
    # and the other slot of x (none: x has only y and z)
    e.observe(HopBatch.of([x], [y], [d], [0.002], [4.0]), now=1.0)
    assert e.Q[x, d, jy] == pytest.approx(7.001)
    assert e.Q[x, d, jz] == pytest.approx(10.00075)
    # the link's expected latency moved half way to the sample: (0.001 + 0.002) / 2
    assert e._variant.L[x, jy] == pytest.approx(0.0015)
    # a dead neighbour is not echoed
    e.set_link(x, z, False, now=1.0)
    before = e.Q[x, d, jz]
    e.observe(HopBatch.of([x], [y], [d], [0.002], [4.0]), now=2.0)
    assert e.Q[x, d, jz] == before


def test_full_echo_damping_one_is_the_published_rule() -> None:
    t = diamond()
    e = Engine(t, cs("full_echo", echo_damping=1.0))
    x, y, _z, d = (t.index[k] for k in "xyzd")
    e.observe(HopBatch.of([x], [y], [d], [0.002], [4.0]), now=1.0)
    assert e.Q[x, d, slot(t, "x", "z")] == pytest.approx(10 + 0.5 * 0.003)


# ---- dual (Kumar & Miikkulainen 1997): the simulator adapter's backward rows --------------

def test_dual_adapter_emits_the_backward_row() -> None:
    cfg = config.load(None).with_overrides({"engine.mode": "greedy", "engine.variant": "dual",
                                            "sim.flows_per_pair": 4})
    t = line("s", "x", "y", "d")
    p = QRouting()
    p.attach(t, np.random.default_rng(0), cfg)
    s_, x, y, d = (t.index[k] for k in ("s", "x", "y", "d"))
    assert p.hop_flow
    flow = (s_ * t.n + d) * 4 + 3          # the traffic sources' flow id of pair (s, d)
    p.on_hop(x, y, d, 0.004, 1.0, flow)
    fwd, back = p._rows[-2], p._rows[-1]
    assert fwd[1:5] == (x, y, d, 0.004)
    # at y, about x, towards the packet's source s, with x's estimate for s
    assert back == (1.0, y, x, s_, 0.004, p._V[x][s_])
    plain = QRouting()
    plain.attach(t, np.random.default_rng(0), config.load(None).with_overrides({"engine.mode": "greedy"}))
    assert not plain.hop_flow


# ---- every variant: batched == sequential, bounded exploration, loop freedom ---------------

def _seq_equal(t: T.Topology, rows: list[tuple], s: EngineSettings, down: list[int],
               conf: list[float] | None) -> None:
    a, b = Engine(t, s), Engine(t, s)
    for k in down:
        for e in (a, b):
            e.set_link(int(t.src[k]), int(t.dst[k]), False, now=0.5)
    ra = a.observe(HopBatch.of(*zip(*rows)), now=1.0,
                   confidence=None if conf is None else np.array(conf))
    acc, rej, tds = 0, [], []
    for i, (x, y, d, lat, est) in enumerate(rows):
        if conf is None:
            r = b.observe_one(x, y, d, lat, None if math.isnan(est) else est, now=1.0)
        else:
            r = b.observe(HopBatch.of([x], [y], [d], [lat], [est]), now=1.0,
                          confidence=np.array([conf[i]]))
        acc += r.accepted
        rej += [(i, reason) for _, reason in r.rejected]
        tds += r.td_errors.tolist()
    assert a.same_state(b)
    assert ra.accepted == acc and list(ra.rejected) == rej and ra.td_errors.tolist() == tds
    assert a.statistics().rejected == b.statistics().rejected
    a.decide(2.0)
    b.decide(2.0)
    assert a.same_state(b)


@HYP
@given(data=st.data(), variant=st.sampled_from(VARIANTS), with_conf=st.booleans())
def test_batched_equals_sequential_for_every_variant(small_ring: T.Topology, data: st.DataObject,
                                                     variant: str, with_conf: bool) -> None:
    rows = data.draw(row_lists(small_ring, max_size=60))
    down = data.draw(st.lists(st.integers(0, small_ring.n_links - 1), max_size=2, unique=True))
    conf = ([data.draw(st.one_of(st.just(math.nan), st.floats(0, 1))) for _ in rows]
            if with_conf else None)
    _seq_equal(small_ring, rows, EngineSettings(mode="greedy", variant=variant), down, conf)


@HYP
@given(seed=st.integers(0, 2 ** 32 - 1), n=st.integers(4, 16), chords=st.integers(0, 12),
       variant=st.sampled_from(VARIANTS), hi=st.floats(0, 0.3), downs=st.integers(0, 2))
def test_exploration_bounded_and_no_loops_for_every_variant(make_ring, seed, n, chords, variant,  # type: ignore[no-untyped-def]
                                                            hi, downs) -> None:
    t = make_ring(n, chords, seed=seed % 1000)
    s = EngineSettings(mode="greedy", variant=variant, explore_max=hi, explore_cap=0.3, td_ref=0.05)
    e = Engine(t, s)
    rng = np.random.default_rng(seed)
    for k in rng.choice(t.n_links, size=min(downs, t.n_links), replace=False).tolist():
        e.set_link(int(t.src[k]), int(t.dst[k]), False)
    for r in range(3):
        _random_q(e, rng)
        # rows move the variant's own state too (predictive R < 0, confidence, echo)
        ks = rng.integers(0, t.n_links, 40)
        xs, ys = t.src[ks], t.dst[ks]
        ds = rng.integers(0, t.n, 40)
        ok = xs != ds
        e.observe(HopBatch.of(xs[ok], ys[ok], ds[ok], rng.uniform(0, 0.01, int(ok.sum()))), now=1.0 + r)
        e.decide(1.5 + 3 * r)
        nh = e.next_hops()
        assert loops.find_loops(nh.T) == []
        for d, g in enumerate(_forwarding_graphs(e)):
            assert nx.is_directed_acyclic_graph(g), d
        for x in range(t.n):
            for d, ws in e.routes(x).items():
                assert sum(w for _, w in ws) == pytest.approx(1.0, abs=1e-12)
                assert ws[0][1] >= 1 - s.eps_max - 1e-12
                assert all(e.link_is_up(x, y) for y, _ in ws)


@pytest.mark.parametrize("variant", VARIANTS)
def test_state_round_trip_and_reload_keep_variant_state(variant: str) -> None:
    t = diamond()
    s = cs(variant)
    e = Engine(t, s)
    x, y, d = t.index["x"], t.index["y"], t.index["d"]
    e.observe(HopBatch.of([x, x], [y, y], [d, d], [0.002, 0.001]), now=3.0)
    e.decide(3.5)
    back = Engine.from_state(t, s, e.export_state())
    assert back.same_state(e)
    if e._variant is not None:
        other = Engine(t, s)
        other.Q[:] = e.Q
        other.N[:] = e.N
        other.td[:] = e.td
        assert not other.same_state(e) or variant == "full_echo"
    e.reconfigure(settings_with(s, margin=0.1))
    assert e.same_state(back) or e._variant is None or e._variant.same(back._variant)


# ---- in the simulator: what each paper claims, on a scenario of our own ----------------------

def _run(variant: str, **kw: object) -> dict:
    spec = {"policy": "qrouting", "rate_pps": 1800, "duration_s": 10, "seed": 3, "series": True,
                "overrides": ["engine.mode=greedy", f"engine.variant={variant}"]}
    spec.update(kw)
    return run(spec)


@pytest.mark.slow
@pytest.mark.parametrize("variant", VARIANTS)
def test_every_variant_routes_the_demo_lab_past_shortest(variant: str) -> None:
    # the demo lab at 1800 packets/s: the static shortest paths saturate the trunk
    # (delivery ratio < 0.9); a learner spreads the load and delivers nearly everything
    sh = run({"policy": "shortest", "rate_pps": 1800, "duration_s": 10, "seed": 3, "series": False})["summary"]
    s = _run(variant)["summary"]
    assert sh["delivery_ratio"] < 0.9
    assert s["delivery_ratio"] > 0.99, s
    assert s["mean_delivery_s"] < 0.5 * sh["mean_delivery_s"], (s["mean_delivery_s"], sh["mean_delivery_s"])


# a scenario of our own: s reaches d by a short thin way (via a, 2 Mb/s) or a long fat
# one (via b, 4 Mb/s); traffic s -> d only.  A rush (300 packets/s > the thin way's
# 250) pushes s onto b; at 10 s the load falls to a quarter and a is the better way again
TWO_WAYS = {"topology": {
    "name": "two-ways", "defaults": {"capacity_bps": 4.0e6, "buffer_pkts": 64},
    "nodes": ["s", "a", "b", "d"],
    "links": [{"between": ["s", "a"], "delay_s": 0.002, "capacity_bps": 2.0e6},
              {"between": ["a", "d"], "delay_s": 0.002, "capacity_bps": 2.0e6},
              {"between": ["s", "b"], "delay_s": 0.006},
              {"between": ["b", "d"], "delay_s": 0.006}],
    "demands": [{"from": "s", "to": "d", "rate": 1.0}]}}
RUSH_THEN_CALM = {"scenario": {"name": "rush-then-calm",
                               "load": [{"step": 1.0, "at_s": 0}, {"step": 0.25, "at_s": 10}]}}
S, A_, B_, D = 0, 1, 2, 3


def _two_ways(variant: str, seed: int, duration: float = 25.0) -> tuple[QRouting, list[tuple[float, int, dict]]]:
    p = QRouting()
    samples: list[tuple[float, int, dict]] = []

    def obs(view: dict) -> None:
        e = p.engine
        samples.append((view["t_s"], int(e.next_hops()[S, D]),
                        {"N": e.N.copy(), "Q": e.Q.copy()}))

    run({"policy": "qrouting", "topology": TWO_WAYS, "rate_pps": 300.0, "duration_s": duration,
         "seed": seed, "demands": True, "scenario": RUSH_THEN_CALM, "series": True,
         "warmup_s": 0.0, "overrides": ["engine.mode=greedy", f"engine.variant={variant}",
                                 "sim.series_interval_s=0.25"]},
        policy=p, observer=obs)
    return p, samples


@pytest.mark.slow
def test_predictive_retries_the_abandoned_way_when_load_falls() -> None:
    # Choi & Yeung (1996): plain Q-routing does not re-try a way abandoned under
    # congestion (no news about it), predictive Q-routing does as its prediction recovers
    calm = {}
    for v in ("plain", "predictive"):
        tot = 0
        for seed in (1, 2, 3, 4):
            _, smp = _two_ways(v, seed)
            assert any(h == B_ for t, h, _ in smp if 5 < t <= 10), (v, seed)  # the rush moved s to b
            back = [t for t, h, _ in smp if t > 10 and h == A_]
            if v == "predictive":
                assert back and back[0] - 10 <= 3.0, (seed, back[:1])
            tot += sum(1 for t, h, _ in smp if t > 10 and h == A_)
        calm[v] = tot
    assert calm["predictive"] > calm["plain"], calm


@pytest.mark.slow
def test_confidence_of_unused_entries_decays_and_used_ones_stay_sure() -> None:
    # Kumar & Miikkulainen (1998): entries without news lose confidence (C_0 lambda^k)
    p, _ = _two_ways("confidence", 1, duration=15.0)
    e = p.engine
    st = e._variant
    c = st.confidence_now(e)
    age = e.now - st.U
    lam, iv = e.settings.conf_decay, e.settings.conf_interval_s
    present = np.isfinite(e.Q)
    stale = present & (age > 5.0)
    assert stale.any()
    assert np.all(c[stale] <= lam ** 5 + 1e-12)
    assert np.allclose(c[stale], st.C[stale] * lam ** (age[stale] / iv))
    g = int(e.greedy[S, D])
    assert age[S, D, g] < 1.0 and c[S, D, g] > 0.5, (age[S, D, g], c[S, D, g])


@pytest.mark.slow
def test_full_echo_keeps_the_way_not_taken_up_to_date() -> None:
    # Boyan & Littman (1994): with full echo every hop also refreshes the estimates of
    # the neighbours not taken; plain leaves them as they were
    counts = {}
    for v in ("plain", "full_echo"):
        _, smp = _two_ways(v, 1, duration=15.0)
        first = next(x for x in smp if x[0] > 10)
        last = smp[-1]
        j = 1 if last[1] == A_ else 0          # s's slots are (a, b): the one not taken
        counts[v] = int(last[2]["N"][S, D, j] - first[2]["N"][S, D, j])
    assert counts["full_echo"] > 100 and counts["full_echo"] > 10 * max(1, counts["plain"]), counts


@pytest.mark.slow
def test_dual_learns_the_way_back_without_traffic_back() -> None:
    # Kumar & Miikkulainen (1997): backward rows carried by s -> d packets teach d about
    # the way to s, though d itself sends nothing (plain leaves d's entries for s alone)
    learned = {}
    for v in ("plain", "dual"):
        p, _ = _two_ways(v, 1, duration=8.0)
        learned[v] = int(p.engine.N[D, S].sum())
        if v == "dual":
            assert p.backward_rows > 1000
            # d's estimate for s: about the hop latencies back along the used ways
            # (propagation 4 ms via a, 12 ms via b, plus transmission and queueing)
            v_ds = p.engine.estimate(D, S)
            assert 0.004 < v_ds < 0.1, v_ds
    assert learned["plain"] == 0 and learned["dual"] > 1000, learned


@pytest.mark.parametrize("variant", VARIANTS)
def test_journal_snapshot_and_settings_restore_the_variant(variant: str) -> None:
    # what the service writes (routerd.io.journal: settings as a dict, state packed as
    # msgpack) brings the same variant and its arrays back, and the next rows agree
    from routerd.io import journal as J
    t = diamond()
    e = Engine(t, cs(variant))
    x, y, d = t.index["x"], t.index["y"], t.index["d"]
    e.observe(HopBatch.of([x, x, y], [y, y, d], [d, d, d], [0.002, 0.001, 0.003]), now=2.0)
    e.decide(2.5)
    st = J.unpack(J.pack(J.engine_state(e)))
    s2 = J.settings_from_dict(st["settings"])
    assert s2 == e.settings and s2.variant == variant
    back = Engine.from_state(t, s2, st["engine"])
    assert back.same_state(e)
    for eng in (e, back):
        eng.observe(HopBatch.of([x], [y], [d], [0.004]), now=6.0)
        eng.decide(6.5)
    assert back.same_state(e)
