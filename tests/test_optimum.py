"""The live optimality gap (routerd/service/optimum.py, routerd/core/flowdev.py): the optimiser
on a case with a closed-form optimum, the measured demand recovering the offered one, the
published routing's model delay never below the optimum, the runner's health section and
metrics, and a real service read back with prometheus_client's parser (slow)."""
from __future__ import annotations

import concurrent.futures as futures
import math
import threading
import time
from typing import Any

import numpy as np
import pytest
from prometheus_client import generate_latest
from prometheus_client.parser import text_string_to_metric_families
from prometheus_client.registry import CollectorRegistry

from routerd.core import flowdev
from routerd.core.demand import BUSY_ROWS
from routerd.core.engine import Engine, EngineSettings
from routerd.io import config, journal
from routerd.io.clock import FakeClock
from routerd.io.inputs import load_topology
from routerd.service import metrics
from routerd.service import optimum as O

DEMO = load_topology(config.load(None))   # the built-in demo lab: 16 nodes, 10 Mb/s links


# ---- the optimiser and the model ---------------------------------------------------------------
def test_two_parallel_links_reach_the_square_root_optimum() -> None:
    # Two parallel M/M/1 links of C1, C2 packets/s, no propagation, demand r: the optimum
    # equalises the marginal delays C1/(C1-f1)^2 = C2/(C2-f2)^2, so (C_i - f_i) is
    # proportional to sqrt(C_i): C_i - f_i = sqrt(C_i) (C1 + C2 - r) / (sqrt C1 + sqrt C2)
    # (Kleinrock's square-root rule; Bertsekas & Gallager, Data Networks, 2nd ed., §5.4-5.7)
    # while both links carry flow (r above C1 - sqrt(C1 C2) here).
    c1, c2, r = 3.0, 1.0, 2.5
    s = (c1 + c2 - r) / (math.sqrt(c1) + math.sqrt(c2))
    f1, f2 = c1 - math.sqrt(c1) * s, c2 - math.sqrt(c2) * s
    T = (f1 / (c1 - f1) + f2 / (c2 - f2)) / r          # Little's law
    res = flowdev.flow_deviation(2, np.array([0, 0]), np.array([1, 1]), np.array([c1, c2]),
                                 np.zeros(2), np.array([[0.0, r], [0.0, 0.0]]), tol=1e-12,
                                 max_iter=200)
    assert res.flows == pytest.approx([f1, f2], rel=1e-6)
    assert res.delay_s == pytest.approx(T, rel=1e-9)
    # the same model on given splits: all on the fast link, then the optimum's own splits
    one, _ = flowdev.routing_delay(2, np.array([0, 0]), np.array([1, 1]), np.array([c1, c2]),
                                   np.zeros(2), np.array([[0.0, 0.0], [1.0, 0.0]]),
                                   np.array([[0.0, r], [0.0, 0.0]]))
    assert one == pytest.approx(1.0 / (c1 - r))       # M/M/1: T = 1/(C - λ)
    assert one > res.delay_s
    same, _ = flowdev.routing_delay(2, np.array([0, 0]), np.array([1, 1]), np.array([c1, c2]),
                                    np.zeros(2), res.fractions, np.array([[0.0, r], [0.0, 0.0]]))
    assert same == pytest.approx(res.delay_s, rel=1e-12)


def test_routing_delay_refuses_splits_that_leave_demand_without_a_route() -> None:
    with pytest.raises(ValueError, match="no route"):
        flowdev.routing_delay(2, np.array([0]), np.array([1]), np.array([1.0]), np.zeros(1),
                              np.zeros((2, 1)), np.array([[0.0, 0.5], [0.0, 0.0]]))


def test_a_stop_callback_ends_the_search_with_a_valid_loop_free_routing() -> None:
    dem = _demand(DEMO, 0.9, seed=3)
    cap = DEMO.capacity_bps / 8000.0
    asked = []

    def stop() -> bool:
        asked.append(1)
        return len(asked) > 2

    res = flowdev.flow_deviation(DEMO.n, DEMO.src, DEMO.dst, cap, DEMO.delay_s, dem, tol=1e-12,
                                 stop=stop)
    assert res.stopped and not res.converged
    tot = res.fractions @ flowdev.by_source(DEMO.n, DEMO.src)
    off = ~np.eye(DEMO.n, dtype=bool)
    assert np.allclose(tot[off.T], 1.0)
    assert all(flowdev.find_cycle(DEMO.n, DEMO.src[res.fractions[d] > 0],
                                  DEMO.dst[res.fractions[d] > 0]) is None for d in range(DEMO.n))


def test_slot_fractions_invert_slot_shares() -> None:
    res = flowdev.for_topology(DEMO, _demand(DEMO, 0.7, seed=1), 1000.0)
    W = flowdev.slot_shares(DEMO, res)
    assert np.array_equal(flowdev.slot_fractions(DEMO, W), res.fractions)


def test_propagated_flows_equal_the_dense_solve() -> None:
    res = flowdev.for_topology(DEMO, _demand(DEMO, 0.8, seed=2), 1000.0)
    r = _demand(DEMO, 0.8, seed=2)
    t = flowdev._propagate(DEMO.n, DEMO.src.astype(np.int64), DEMO.dst.astype(np.int64),
                           res.fractions, r)
    assert t is not None
    ref = flowdev._solve_balance(DEMO.n, DEMO.src.astype(np.int64), DEMO.dst.astype(np.int64),
                                 res.fractions, r)
    assert np.allclose(t, ref, rtol=1e-12, atol=1e-9)


# ---- measuring the demand ------------------------------------------------------------------------
def test_measured_demand_recovers_the_offered_demand_whatever_the_routing() -> None:
    # flow conservation: a packet leaves each node of its path once per visit and enters
    # each but its source once per visit, so out - in counts it at its source only, even
    # on a random walk with loops (common practice: node flow balance)
    rng = np.random.default_rng(7)
    n = DEMO.n
    offered = rng.integers(0, 6, (n, n)).astype(float)
    np.fill_diagonal(offered, 0.0)
    rows = _walk_rows(DEMO, offered, rng, random=True)
    meter = O.Meter(DEMO)
    for chunk in np.array_split(np.arange(len(rows[0])), 7):
        body = journal.batch_body("r", 1, 0.0, _hop_batch(rows, chunk))
        meter.add_record(body)
    rates = O.Rates.empty(n, DEMO.n_links)
    rates.update(meter.take(), dt=2.0, now=2.0, window=10.0)
    assert np.array_equal(rates.demand(), offered / 2.0)
    assert meter.rows == len(rows[0])
    assert meter.take()[0].sum() == 0          # a take restarts the counts


def test_rates_are_smoothed_with_the_window() -> None:
    rates = O.Rates.empty(2, 1)
    one = (np.array([[0.0, 10.0], [0.0, 0.0]]), np.zeros((2, 2)), np.zeros(1), np.zeros(1))
    rates.update(one, 1.0, 1.0, 5.0)
    assert rates.demand()[0, 1] == 10.0                     # the first interval as it is
    zero = (np.zeros((2, 2)), np.zeros((2, 2)), np.zeros(1), np.zeros(1))
    rates.update(zero, 1.0, 2.0, 5.0)
    # normalised exponential weights (worked by hand): the older second weighs
    # (1 - e^-0.2) e^-0.2, the newer 1 - e^-0.2, so 10 e^-0.2 / (1 + e^-0.2) = 4.50; the
    # plain recursion would still say 10 e^-0.2 = 8.19, the first second at full weight
    d = math.exp(-1.0 / 5.0)
    assert rates.demand()[0, 1] == pytest.approx(10.0 * d / (1.0 + d))
    assert rates.weight == pytest.approx(1.0 - d * d)
    # once many windows old it is the plain recursion: rate += (1 - e^-dt/w) (new - rate)
    for k in range(200):
        rates.update(one if k % 2 else zero, 1.0, 3.0 + k, 5.0)
    before = rates.demand()[0, 1]
    rates.update(one, 1.0, 203.0, 5.0)
    assert rates.weight == pytest.approx(1.0)
    assert rates.demand()[0, 1] == pytest.approx(before + (1.0 - d) * (10.0 - before))


def test_packet_size_is_inferred_from_mm1_link_latencies() -> None:
    # an M/M/1 link of C packets/s at rate F has mean sojourn 1/(C - F) (Kleinrock; Bertsekas &
    # Gallager §3.3); latency = propagation + sojourn gives back C, so the size is bps / 8 / C
    rates = O.Rates.empty(DEMO.n, DEMO.n_links)
    size = 800.0
    C = DEMO.capacity_bps / (8 * size)
    F = 0.6 * C
    rates.link[:] = F
    rates.lat[:] = F * (DEMO.delay_s + 1.0 / (C - F))
    assert O.estimate(DEMO, rates, 1.0) == pytest.approx(size, rel=1e-9)
    assert O.estimate(DEMO, rates, 1.0, packet_bytes=1500.0) == 1500.0
    assert O.estimate(DEMO, O.Rates.empty(DEMO.n, DEMO.n_links), 1.0) == 0.0


def test_packet_size_pools_links_by_rows_and_leaves_out_far_ones() -> None:
    # each link's figure is inverted from M/M/1 as above (Kleinrock; Bertsekas & Gallager
    # §3.3); links are pooled by their rows (common practice for a ratio estimator): half the
    # links see 900-byte packets at 3x the rows of the others' 1,200-byte ones, so the mean is
    # (3 * 900 + 1 * 1200) / 4 = 975, where the links' median would say 900, 1,050 or 1,200
    rates = O.Rates.empty(DEMO.n, DEMO.n_links)
    half = np.arange(DEMO.n_links) % 2 == 0
    size = np.where(half, 900.0, 1200.0)
    C = DEMO.capacity_bps / (8 * size)
    F = np.where(half, 3.0, 1.0) * 0.1 * C.min()

    def load(F: np.ndarray, C: np.ndarray) -> None:
        rates.link[:] = F
        rates.lat[:] = F * (DEMO.delay_s + 1.0 / (C - F))

    load(F, C)
    assert (F * 1.0 >= BUSY_ROWS).all()
    assert O.estimate(DEMO, rates, 1.0) == pytest.approx(975.0, rel=1e-9)
    # a link whose figure is more than twice the median (a queue the model does not fit:
    # here one that looks like 5,000-byte packets) is left out, however busy
    far = int(np.flatnonzero(~half)[0])
    size[far] = 5000.0
    C = DEMO.capacity_bps / (8 * size)
    F[far] = 0.5 * C[far]
    load(F, C)
    keep = np.arange(DEMO.n_links) != far
    want = float(np.dot(F[keep], size[keep]) / F[keep].sum())
    assert O.estimate(DEMO, rates, 1.0) == pytest.approx(want, rel=1e-9)
    assert abs(want - 975.0) < 10.0


def test_a_link_measured_far_slower_than_configured_is_modelled_at_its_measured_capacity() -> None:
    # M/M/1 (Kleinrock, Queueing Systems vol. 1, 1975): sojourn 1/(C - F), so C = F + 1/s.
    # Every link at 60% of its configured C = 10 Mb/s / (8 x 1,000 B) = 1,250 pkt/s, except
    # one that really runs at 8 pkt/s (64 kb/s) carrying 6 pkt/s: measured 6 + 1/0.5 = 8
    from routerd.core import demand as Dm
    from routerd.core import splitting as S

    rates = O.Rates.empty(DEMO.n, DEMO.n_links)
    C = DEMO.capacity_bps / (8 * 1000.0)
    F = 0.6 * C
    cut = 3
    F[cut] = 6.0
    real = C.copy()
    real[cut] = 8.0
    rates.link[:] = F
    rates.lat[:] = F * (DEMO.delay_s + 1.0 / (real - F))
    rates.t = 100.0
    window = 10.0
    cap = Dm.model_capacity(DEMO, rates, window, 1000.0)
    assert cap[cut] == pytest.approx(8.0, rel=1e-9)
    others = np.arange(DEMO.n_links) != cut
    assert np.array_equal(cap[others], C[others])          # measured at C: configured kept
    # the traffic leaves the slow link: nothing measures it, the figure fades back to the
    # configured one with time constant SLOW_MEMORY_S, in service time (1/C): one constant
    # later 1/C = (1/e) / 8 + (1 - 1/e) / 1,250, i.e. 21.5 pkt/s, still a slow link
    rates.link[cut] = rates.lat[cut] = 0.0
    rates.t = 100.0 + S.SLOW_MEMORY_S
    cap = Dm.model_capacity(DEMO, rates, window, 1000.0)
    assert cap[cut] == pytest.approx(1.0 / (1.0 / (8.0 * math.e) + (1.0 - 1.0 / math.e) / C[cut]), rel=1e-9)
    assert 21 < cap[cut] < 22
    # measured again at (or near) its configured capacity: forgotten at once
    rates.link[cut] = 0.6 * C[cut]
    rates.lat[cut] = rates.link[cut] * (DEMO.delay_s[cut] + 1.0 / (0.4 * C[cut]))
    assert Dm.model_capacity(DEMO, rates, window, 1000.0)[cut] == C[cut]
    # measured at a fifth of the configured capacity: within the trigger (an eighth), not a cut
    rates.link[cut] = 0.1 * C[cut]
    rates.lat[cut] = rates.link[cut] * (DEMO.delay_s[cut] + 1.0 / (0.2 * C[cut] - 0.1 * C[cut]))
    assert Dm.model_capacity(DEMO, rates, window, 1000.0)[cut] == C[cut]
    # the optimiser's inputs take the capacities given (live links only)
    eng = Engine(DEMO)
    cap[cut] = 8.0
    job = O.inputs_for(DEMO, eng.published_shares(), eng.live & eng._present,
                       _demand(DEMO, 0.3, seed=4), 1000.0, None, cap)
    assert np.array_equal(job["cap_pps"], cap[job["keep"]])


def test_an_optimiser_without_memory_takes_the_learners_slow_links() -> None:
    # a restarted service: the split learner's slow-link memory is restored from the state
    # dir (journaled), the optimiser's Rates start empty.  model_capacity takes the
    # learner's figure at the learner's age where it has none of its own and its window
    # has too few rows to clear it; the fade is the learner's (remembered_service_time)
    from routerd.core import demand as Dm
    from routerd.core import splitting as S

    eng = Engine(DEMO, EngineSettings(mode="split"))
    assert eng._split is not None and Dm.learner_slow(Engine(DEMO, EngineSettings(mode="greedy"))) is None
    x, j = int(DEMO.src[3]), int(DEMO.slot_of[int(DEMO.src[3]), int(DEMO.dst[3])])
    eng._split.slow_tau[x, j] = 0.125          # measured at 8 pkt/s ...
    eng._split.slow_t[x, j] = 40.0             # ... at t = 40 of the learner's clock
    eng.now = 45.0
    tau, age = Dm.learner_slow(eng)
    assert tau[3] == 0.125 and age[3] == 5.0 and np.count_nonzero(tau) == 1
    rates = O.Rates.empty(DEMO.n, DEMO.n_links)
    rates.t = 1000.0                           # the optimiser's own clock
    C = DEMO.capacity_bps / (8 * 1000.0)
    cap = Dm.model_capacity(DEMO, rates, 10.0, 1000.0, (tau, age))
    fade = math.exp(-5.0 / S.SLOW_MEMORY_S)
    assert cap[3] == pytest.approx(1.0 / (fade * 0.125 + (1.0 - fade) / C[3]), rel=1e-12)
    assert rates.slow_t[3] == 995.0 and rates.slow_tau[3] == 0.125
    others = np.arange(DEMO.n_links) != 3
    assert np.array_equal(cap[others], C[others])
    # without the learner's memory (the way it was): the configured capacity
    assert Dm.model_capacity(DEMO, O.Rates.empty(DEMO.n, DEMO.n_links), 10.0, 1000.0)[3] == C[3]
    # the optimiser's own window measures the link fine on enough rows: not taken
    fresh = O.Rates.empty(DEMO.n, DEMO.n_links)
    fresh.t = 1000.0
    fresh.link[3] = 0.6 * C[3]
    fresh.lat[3] = fresh.link[3] * (DEMO.delay_s[3] + 1.0 / (0.4 * C[3]))
    assert Dm.model_capacity(DEMO, fresh, 10.0, 1000.0, (tau, age))[3] == C[3]
    # the service's runner passes the learner's memory (Optimum.for_service's view)
    class Svc:
        topo, engine, cfg = DEMO, eng, config.load(None)
        lock = threading.RLock()
        clock = FakeClock()
    opt = O.Optimum.for_service(Svc)
    try:
        got = opt._view()
        assert len(got) == 5 and got[4] is not None and got[4][0][3] == 0.125
    finally:
        opt.close()



# ---- the published routing against the optimum --------------------------------------------------
@pytest.mark.parametrize("mode", ["greedy", "split"])
@pytest.mark.parametrize("load", [0.3, 0.6, 0.8])
def test_the_published_routings_model_delay_is_never_below_the_optimum(mode: str, load: float) -> None:
    eng = Engine(DEMO, EngineSettings(mode=mode))
    dem = _demand(DEMO, load, seed=11)
    job = O.inputs_for(DEMO, eng.published_shares(), eng.live & eng._present, dem, 1000.0, eng.owned)
    out = O.compute(job, budget_s=30.0)
    assert out["converged"] and out["feasible"]
    if not math.isfinite(out["published_delay_s"]):   # exploration or a tie overloads a link
        assert out["published_max_utilisation"] >= 1.0
        assert out["published_reason"] == "a link at or over capacity"
        return
    assert out["published_reason"] is None
    # D* lies in [lower, optimal]: the published routing can never beat the lower bound
    assert out["published_delay_s"] >= out["optimal_lower_s"]
    assert out["published_delay_s"] >= out["optimal_delay_s"] * (1 - 1e-3)   # tol of the run
    assert out["optimal_lower_s"] <= out["optimal_delay_s"]


def test_published_shares_match_the_tables_readers() -> None:
    eng = Engine(DEMO, EngineSettings(explore_min=0.05))
    W = eng.published_shares()
    for x in range(DEMO.n):
        for d in range(DEMO.n):
            got = {int(DEMO.slots[x, j]): W[x, d, j] for j in range(W.shape[2]) if W[x, d, j] > 0}
            want = dict(eng.weights(x, d))
            assert got.keys() == want.keys()
            assert all(got[y] == pytest.approx(want[y], abs=0, rel=0) for y in want)
            if d != x and want:
                assert sum(got.values()) == pytest.approx(1.0)


def test_dead_links_leave_the_model() -> None:
    eng = Engine(DEMO)
    eng.set_link(0, int(DEMO.slots[0, 0]), False, 1.0)
    eng.decide(1.0)
    live = eng.live & eng._present
    job = O.inputs_for(DEMO, eng.published_shares(), live, _demand(DEMO, 0.3, seed=4), 1000.0)
    assert len(job["src"]) == DEMO.n_links - 1
    assert not ((job["src"] == 0) & (job["dst"] == int(DEMO.slots[0, 0]))).any()
    out = O.compute(job, budget_s=30.0)
    assert math.isfinite(out["published_delay_s"])


# ---- the runner ---------------------------------------------------------------------------------
def _runner(**over: Any) -> tuple[O.Optimum, Engine, FakeClock]:
    cfg = config.load(None).with_overrides({"engine.optimum.packet_bytes": 1000.0, **over})
    eng = Engine(DEMO)
    clock = FakeClock()
    opt = O.Optimum(cfg, DEMO, lambda: (DEMO, eng.published_shares(), eng.live & eng._present,
                                        eng.owned),
                    threading.RLock(), clock.monotonic, executor=futures.ThreadPoolExecutor(1))
    return opt, eng, clock


def test_the_runner_says_why_before_it_has_demand_then_reports_the_gap() -> None:
    opt, eng, clock = _runner()
    try:
        h = opt.health()
        assert h["reason"] == "waiting" and not h["available"]
        clock.advance(1.0)
        assert opt.run_once() is None and opt.health()["reason"] == "no_demand"
        offered = _demand(DEMO, 0.5, seed=5) * 2.0       # packets over the next 2 s
        rows = _walk_rows(DEMO, np.round(offered), np.random.default_rng(1), engine=eng)
        opt.feed(journal.batch_body("r", 1, 0.0, _hop_batch(rows, np.arange(len(rows[0])))))
        clock.advance(2.0)
        res = opt.run_once()
        assert res is not None
        h = opt.health()
        assert h["available"] and h["reason"] is None and h["runs"] == 1
        # the second interval (the first, 1 s, measured nothing): the normalised
        # exponential mean with the 10 s window, each interval weighted by the share of
        # the window it covers, the older one decayed by the newer one's 2 s
        w1, w2 = (1 - math.exp(-1.0 / 10.0)) * math.exp(-2.0 / 10.0), 1 - math.exp(-2.0 / 10.0)
        want = np.round(offered).sum() / 2.0 * w2 / (w1 + w2)
        assert h["demand_pps"] == pytest.approx(want, rel=1e-12)
        assert h["gap_ratio"] >= 1 - 1e-3
        assert h["published_delay_s"] >= h["optimal_lower_s"]
        assert h["age_s"] == 0.0 and h["last_run_s"] > 0
        clock.advance(3.0)
        assert opt.health()["age_s"] == 3.0
        st = opt.stats()
        fams = _families(st)
        for name in ("routerd_model_delay_optimal_seconds", "routerd_model_delay_published_seconds",
                     "routerd_model_delay_gap_ratio", "routerd_optimum_last_run_duration_seconds",
                     "routerd_measured_demand_packets_per_second",
                     "routerd_measured_demand_unroutable_packets_per_second"):
            assert fams[name].type == "gauge", name
        # nothing cut off: no demand left out
        assert fams["routerd_measured_demand_unroutable_packets_per_second"].samples[0].value == 0.0
        runs = {s.labels["outcome"]: s.value for s in fams["routerd_optimum_runs"].samples
                if s.name.endswith("_total")}
        assert runs == {"ok": 1.0, "failed": 0.0, "skipped": 0.0}
        assert fams["routerd_model_delay_gap_ratio"].samples[0].value == pytest.approx(h["gap_ratio"])
    finally:
        opt.close()


def test_no_delay_series_before_a_result_and_reasons_when_off() -> None:
    opt, _, _ = _runner()
    fams = _families(opt.stats())
    assert "routerd_model_delay_optimal_seconds" not in fams      # absent, not NaN
    assert fams["routerd_optimum_enabled"].samples[0].value == 1.0
    off, _, _ = _runner(**{"engine.optimum.interval_s": 0.0})
    assert off.health()["reason"] == "off" and not off.enabled
    off.feed({"from": b"\0" * 4})                  # not even decoded when off
    big, _, _ = _runner(**{"engine.optimum.max_nodes": 10})
    h = big.health()
    assert h["reason"] == "too_large" and "max_nodes (10)" in h["error"]
    for o in (opt, off, big):
        o.close()


def test_a_shard_worker_runs_no_optimum_and_holds_no_counts() -> None:
    from routerd.service.shard import ShardWorker

    class Svc:
        optimum_off = ShardWorker.optimum_off
        cfg = config.load(None)
        topo = DEMO
        lock = threading.RLock()
        clock = FakeClock()

    opt = O.Optimum.for_service(Svc())
    assert opt.health()["reason"] == "sharded" and opt.meter is None and opt.run_once() is None
    Svc.optimum_off = False
    assert O.Optimum.for_service(Svc()).health()["reason"] == "waiting"


def test_a_failing_run_is_counted_and_reported_not_raised() -> None:
    opt, eng, clock = _runner()
    try:
        rows = _walk_rows(DEMO, np.ones((DEMO.n, DEMO.n)) - np.eye(DEMO.n),
                          np.random.default_rng(2), engine=eng)
        opt.feed(journal.batch_body("r", 1, 0.0, _hop_batch(rows, np.arange(len(rows[0])))))
        clock.advance(1.0)
        def gone() -> Any:
            raise RuntimeError("engine gone")

        opt._view = gone
        assert opt.run_once() is None
        h = opt.health()
        assert h["runs_failed"] == 1 and h["reason"] == "failed"
        assert h["error"] == "RuntimeError: engine gone"
    finally:
        opt.close()


def test_the_runner_rests_four_times_a_long_run_so_it_takes_a_fifth_of_a_core() -> None:
    assert O.next_start(10.0, 10.2, 5.0) == 15.0                  # short run: the interval
    assert O.next_start(10.0, 12.0, 5.0) == 20.0                  # 2 s run: rests 8 s
    start, busy = 0.0, 0.0
    for _ in range(50):                                           # runs of 3 s at a 1 s interval
        busy += 3.0
        start = O.next_start(start, start + 3.0, 1.0)
    assert busy / start == pytest.approx(1 / (1 + O.REST_FACTOR))


# ---- guide: the optimum seeds split mode's shares -----------------------------------------------
def _split_engine_with_traffic(seed: int = 0) -> Engine:
    eng = Engine(DEMO, EngineSettings(mode="split"))
    rows = _walk_rows(DEMO, np.round(_demand(DEMO, 0.6, seed=seed) * 0.2),
                      np.random.default_rng(seed), engine=eng)
    from routerd.core.engine import HopBatch
    eng.observe(HopBatch.of(*rows), now=1.0)
    eng.decide(1.0)
    return eng


def _acyclic_and_normalised(eng: Engine) -> None:
    from routerd.core import splitting

    w = eng._split.w
    assert not splitting.cyclic(w, eng._slots).any()
    tot = w.sum(axis=2)
    off = ~np.eye(DEMO.n, dtype=bool)
    assert np.allclose(tot[off], 1.0)                       # every key routed, sum 1
    assert not (w[~np.broadcast_to((eng.live & eng._present)[:, None, :], w.shape)] > 0).any()


def test_guide_seeds_the_optimum_whole_and_the_graph_stays_acyclic() -> None:
    eng = _split_engine_with_traffic()
    res = flowdev.for_topology(DEMO, _demand(DEMO, 0.8, seed=6), 1000.0)
    W = flowdev.slot_shares(DEMO, res)
    seeded, left = eng.seed_shares(W)
    assert (seeded, left) == (DEMO.n, 0)
    off = ~np.eye(DEMO.n, dtype=bool)
    assert np.allclose(eng._split.w[off], W[off])
    _acyclic_and_normalised(eng)
    d = eng.decide(2.0)                          # the learner takes it from there
    assert d is not None
    _acyclic_and_normalised(eng)


def test_guide_after_a_link_died_keeps_routes_and_drops_the_dead_link() -> None:
    eng = _split_engine_with_traffic(1)
    res = flowdev.for_topology(DEMO, _demand(DEMO, 0.8, seed=7), 1000.0)
    W = flowdev.slot_shares(DEMO, res)
    x, j = 0, 0
    eng.set_link(x, int(DEMO.slots[x, j]), False, 2.0)
    before = eng._split.w.copy()
    seeded, left = eng.seed_shares(W)
    assert seeded + left == DEMO.n and seeded > 0
    from routerd.core import splitting
    assert not splitting.cyclic(eng._split.w, eng._slots).any()
    # a destination whose key at x had the dead link as its only next hop was left alone
    # (the next decision repairs it, as after any link event); the others lost the link
    alone = (W[x, :, j] == 1.0)
    assert alone.any() and left >= 1
    assert np.array_equal(eng._split.w[:, alone, :], before[:, alone, :])
    assert not (eng._split.w[x, ~alone, j] > 0).any()
    eng.decide(3.0)
    _acyclic_and_normalised(eng)


def test_guide_refuses_destinations_whose_seed_would_loop() -> None:
    eng = _split_engine_with_traffic(2)
    W = eng._split.w.copy()
    # destination 5: make two neighbours point at each other
    d = 5
    x = 0 if d != 0 else 1
    y = int(DEMO.slots[x, 0])
    W[x, d] = 0.0
    W[x, d, 0] = 1.0
    W[y, d] = 0.0
    W[y, d, int(DEMO.slot_of[y, x])] = 1.0
    before = eng._split.w.copy()
    seeded, left = eng.seed_shares(W)
    assert left >= 1 and np.array_equal(eng._split.w[:, d], before[:, d])
    _acyclic_and_normalised(eng)


def test_a_guide_record_replays_to_the_same_engine() -> None:
    from routerd.core.engine import HopBatch

    res = flowdev.for_topology(DEMO, _demand(DEMO, 0.8, seed=8), 1000.0)
    rows = _walk_rows(DEMO, np.round(_demand(DEMO, 0.6, seed=3) * 0.2), np.random.default_rng(3))
    b = journal.batch_body("r", 1, 1.0, HopBatch.of(*rows))
    recs = [journal.Record(1, "batch", b), journal.Record(2, "tick", {"t": 1.0}),
            journal.Record(3, "guide", journal.guide_body(1.5, flowdev.slot_shares(DEMO, res))),
            journal.Record(4, "tick", {"t": 2.0})]
    live = Engine(DEMO, EngineSettings(mode="split"))
    journal.apply_batch(live, journal.batch_hops(b), (), 1.0)
    live.decide(1.0)
    assert journal.apply_guide(live, recs[2].body) == (DEMO.n, 0)
    live.decide(2.0)
    again = Engine(DEMO, EngineSettings(mode="split"))
    rep = journal.replay_into(again, recs)
    assert rep.guides == 1
    assert again.same_state(live)
    greedy = Engine(DEMO, EngineSettings(mode="greedy"))
    assert journal.apply_guide(greedy, recs[2].body) == (0, 0)   # greedy: nothing to seed


def test_the_runner_hands_the_loop_a_guide_in_split_mode_only() -> None:
    cfg = config.load(None).with_overrides({"engine.optimum.packet_bytes": 1000.0,
                                            "engine.optimum.guide": True, "engine.mode": "split"})
    eng = _split_engine_with_traffic(4)
    clock = FakeClock()
    opt = O.Optimum(cfg, DEMO, lambda: (DEMO, eng.published_shares(), eng.live & eng._present,
                                        eng.owned),
                    threading.RLock(), clock.monotonic, executor=futures.ThreadPoolExecutor(1))
    try:
        rows = _walk_rows(DEMO, np.round(_demand(DEMO, 0.6, seed=4)), np.random.default_rng(4),
                          engine=eng)
        opt.feed(journal.batch_body("r", 1, 0.0, _hop_batch(rows, np.arange(len(rows[0])))))
        clock.advance(1.0)
        assert opt.run_once() is not None and opt.guide_due()
        body = opt.take_guide(3.0)
        assert body is not None and not opt.guide_due() and body["t"] == 3.0
        opt.guided(journal.apply_guide(eng, body))
        g = opt.health()["guide"]
        assert g == {"on": True, "why_off": None, "applied": 1, "seeded_destinations": DEMO.n,
                     "left_destinations": 0}
        _acyclic_and_normalised(eng)
    finally:
        opt.close()
    greedy = O.Optimum(config.load(None).with_overrides({"engine.optimum.guide": True,
                                                         "engine.mode": "greedy"}), DEMO,
                       lambda: (), threading.RLock(), clock.monotonic)
    assert "not split" in greedy.health()["guide"]["why_off"]


# ---- a real service ------------------------------------------------------------------------------
@pytest.mark.slow
def test_a_running_service_exports_the_gap_in_metrics_and_health(base: str) -> None:
    from routerd.agent import client
    from service_harness import running

    # the rows arrive in a burst far faster than the packets they describe would: small
    # packets keep the measured rate within the model's capacities
    with running(base, "--set", "engine.optimum.interval_s=0.3",
                 "--set", "engine.optimum.packet_bytes=50") as sp:
        h0 = sp.control({"op": "health"})["optimum"]
        assert h0["interval_s"] == 0.3 and not h0["available"]
        offered = np.round(_demand(DEMO, 0.5, seed=9) * 0.5)
        rows = _walk_rows(DEMO, offered, np.random.default_rng(3), engine=Engine(DEMO))
        names = DEMO.nodes
        with client.Reporter(sp.endpoints["ingest"], "opt", control=sp.endpoints["control"],
                             batch_rows=512) as rep:
            for x, y, d, lat in zip(*rows):
                rep.add_hop(names[x], names[y], names[d], float(lat))
        deadline = time.monotonic() + 30.0
        h: dict[str, Any] = {}
        while time.monotonic() < deadline:
            h = sp.control({"op": "health"})["optimum"]
            if h.get("runs", 0) >= 1 and h["available"]:
                break
            time.sleep(0.2)
        assert h["available"], h
        assert h["demand_pps"] > 0 and h["optimal_delay_s"] > 0
        assert h["gap_ratio"] >= 1 - 1e-3 and h["published_delay_s"] >= h["optimal_lower_s"]
        text = sp.metrics_text()
    fams = {f.name: f for f in text_string_to_metric_families(text)}
    for name in ("routerd_model_delay_optimal_seconds", "routerd_model_delay_published_seconds",
                 "routerd_model_delay_gap_ratio", "routerd_measured_demand_packets_per_second",
                 "routerd_optimum_last_run_duration_seconds"):
        assert fams[name].type == "gauge", name
    runs = {s.labels["outcome"]: s.value for s in fams["routerd_optimum_runs"].samples
            if s.name.endswith("_total")}
    assert runs["ok"] >= 1 and runs["failed"] == 0


@pytest.mark.slow
def test_a_guided_split_service_replays_to_its_own_final_state(base: str) -> None:
    import signal

    from routerd.agent import client
    from service_harness import running

    with running(base, "--set", "engine.mode=split", "--set", "engine.optimum.guide=true",
                 "--set", "engine.optimum.interval_s=0.3",
                 "--set", "engine.optimum.packet_bytes=50") as sp:   # bursts: see above
        eng = Engine(DEMO, EngineSettings(mode="split"))
        rng = np.random.default_rng(5)
        names = DEMO.nodes
        applied = 0
        deadline = time.monotonic() + 40.0
        with client.Reporter(sp.endpoints["ingest"], "g", control=sp.endpoints["control"],
                             batch_rows=512) as rep:
            while time.monotonic() < deadline and applied < 2:
                rows = _walk_rows(DEMO, np.round(_demand(DEMO, 0.6, seed=int(rng.integers(99))) * 0.1),
                                  rng, engine=eng)
                for x, y, d, lat in zip(*rows):
                    rep.add_hop(names[x], names[y], names[d], float(lat))
                rep.flush()
                applied = sp.control({"op": "health"})["optimum"]["guide"]["applied"]
                time.sleep(0.2)
        assert applied >= 2
        sp.signal(signal.SIGTERM)
        assert sp.wait() == 0
    jdir = journal.journal_dir(f"{base}/state")
    recs = list(journal.iter_records(jdir))
    assert sum(r.kind == "guide" for r in recs) >= 2
    start = next(r for r in recs if r.kind == "start")
    again = Engine(DEMO, journal.settings_from_dict(start.body["settings"]))
    rep_ = journal.replay_into(again, recs)
    assert rep_.guides >= 2
    final = journal.restore(f"{base}/state", DEMO, EngineSettings(mode="split")).engine
    assert again.same_state(final)      # the journal alone, guides included, gives the same state


# ---- helpers --------------------------------------------------------------------------------------
def _demand(topo: Any, load: float, seed: int) -> np.ndarray:
    """Random demand (packets/s at 1,000-byte packets) scaled so shortest paths load the
    busiest link to ``load``."""
    rng = np.random.default_rng(seed)
    d = rng.uniform(0.0, 1.0, (topo.n, topo.n))
    np.fill_diagonal(d, 0.0)
    cap = topo.capacity_bps / 8000.0
    sp = flowdev.flow_deviation(topo.n, topo.src, topo.dst, cap, topo.delay_s, d, max_iter=0)
    return d * (load / float(np.max(sp.flows / cap)))


def _walk_rows(topo: Any, counts: np.ndarray, rng: np.random.Generator, *,
               random: bool = False, engine: Engine | None = None
               ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """One hop row per hop of counts[s, d] packets, next hops drawn from the engine's
    published shares (``random``: three in ten hops a random neighbour, loops and all)."""
    xs, ys, ds, ls = [], [], [], []
    W = (engine or Engine(topo)).published_shares()
    for s in range(topo.n):
        for d in range(topo.n):
            for _ in range(int(counts[s, d])):
                x = s
                for _ in range(10 * topo.n):
                    if x == d:
                        break
                    if random and rng.random() < 0.3:     # a detour, loops included
                        nb = topo.slots[x][topo.slots[x] >= 0]
                        y = int(rng.choice(nb))
                    else:
                        j = int(rng.choice(W.shape[2], p=W[x, d] / W[x, d].sum()))
                        y = int(topo.slots[x, j])
                    k = topo.link_index[(x, y)]
                    xs.append(x)
                    ys.append(y)
                    ds.append(d)
                    ls.append(float(topo.delay_s[k]) + 0.0008)
                    x = y
                assert x == d
    return (np.array(xs), np.array(ys), np.array(ds), np.array(ls))


def _hop_batch(rows: tuple[np.ndarray, ...], idx: np.ndarray) -> Any:
    from routerd.core.engine import HopBatch

    x, y, d, lat = rows
    return HopBatch.of(x[idx], y[idx], d[idx], lat[idx])


def _families(stats: dict[str, float]) -> dict[str, Any]:
    class Src:
        def collect(self) -> Any:
            return metrics.optimum_families(stats)

    reg = CollectorRegistry()
    reg.register(Src())  # type: ignore[arg-type]
    return {f.name: f for f in text_string_to_metric_families(generate_latest(reg).decode())}


def test_demand_a_partition_cannot_carry_is_left_out_and_said() -> None:
    # a node cut off from the rest (both its links down) while its rows are still in the
    # window: no routing carries that demand, so the optimiser's inputs leave it out and
    # say how much (flow deviation refuses demand without a route: the simulator's guide
    # crashed on it and every service run failed)
    eng = Engine(DEMO, EngineSettings(mode="split"))
    iso = int(np.argmin(np.bincount(DEMO.src, minlength=DEMO.n)))
    for k in range(DEMO.n_links):
        if iso in (int(DEMO.src[k]), int(DEMO.dst[k])):
            eng.set_link(int(DEMO.src[k]), int(DEMO.dst[k]), False, 1.0)
    eng.decide(1.0)
    dem = _demand(DEMO, 0.3, seed=4)
    job = O.inputs_for(DEMO, eng.published_shares(), eng.live & eng._present, dem, 1000.0)
    cut = np.zeros_like(dem, dtype=bool)
    cut[iso, :] = cut[:, iso] = True
    np.fill_diagonal(cut, False)
    assert float(dem[cut].sum()) > 0
    assert job["unroutable_pps"] == pytest.approx(float(dem[cut].sum()), rel=1e-12)
    assert (job["demand"][cut] == 0).all() and np.array_equal(job["demand"][~cut], dem[~cut])
    out = O.compute(job, budget_s=30.0)
    assert out["feasible"] and math.isfinite(out["optimal_delay_s"])
    assert out["unroutable_pps"] == job["unroutable_pps"]
    # nothing cut: nothing left out
    whole = O.inputs_for(DEMO, Engine(DEMO).published_shares(), Engine(DEMO).live & Engine(DEMO)._present,
                         dem, 1000.0)
    assert whole["unroutable_pps"] == 0.0 and np.array_equal(whole["demand"], dem)
