"""The split mode in the simulator against issue 14's targets, on a network of our own
(two rings of four joined by a short and a long bridge, 2 Mb/s links, 64-packet
buffers, uniform pairs, exponential sizes: mindelay's M/M/1 model).  The full grid
(abilene, geant, two generated topologies, 3 seeds) is bench/compare_variants.py's
report, not a unit test; these are one-seed checks with the margins the report shows."""
from __future__ import annotations

import math
from typing import Any

import numpy as np
import pytest

from routerd.core import topology as T
from routerd.sim import analytic as A
from routerd.sim import mindelay as M
from routerd.sim.run import run
from sim_helpers import assert_little

pytestmark = pytest.mark.slow


def bridges() -> dict[str, Any]:
    links = []
    for c in "ab":
        r = [f"{c}{i}" for i in range(4)]
        for i in range(4):
            links.append({"between": [r[i], r[(i + 1) % 4]], "delay_s": 0.002})
    links += [{"between": ["a0", "b0"], "delay_s": 0.001}, {"between": ["a2", "b2"], "delay_s": 0.006}]
    return {"topology": {"name": "bridges", "nodes": [f"{c}{i}" for c in "ab" for i in range(4)],
                         "defaults": {"capacity_bps": 2e6, "buffer_pkts": 64}, "links": links}}


def saturation() -> float:
    """Total rate at which shortest's busiest link is at capacity (uniform pairs, 1000 B)."""
    topo = T.from_mapping(bridges())
    frac = A.single_path_fractions(topo, topo.spt_next_hops())
    n, src, dst = A.link_arrays(topo)
    df, _ = A.flows_from_fractions(n, src, dst, frac, M.offered_demand(topo, 1.0))
    return float(np.min(topo.capacity_bps / 8000.0 / df.sum(axis=0)))


def sim(policy: str, load: float, **kw: Any) -> dict[str, Any]:
    spec = {"topology": bridges(), "policy": "qrouting" if policy == "split" else policy,
            "rate_pps": load * saturation(), "duration_s": 20.0, "warmup_s": 5.0, "seed": 1,
            "series": True, "size_dist": "exp",
            # split learning alone (the guide is on by default; a test's own overrides win)
            "overrides": (["engine.mode=split", "engine.optimum.guide=false"] if policy == "split"
                          else []) + kw.pop("overrides", [])}
    spec.update(kw)
    r = run(spec)
    assert_little(r["summary"])
    return r


def cv_second_half(r: dict[str, Any]) -> float:
    t = np.asarray(r["series"]["t_s"], dtype=float)
    m = np.asarray(r["series"]["mean_delivery_s"], dtype=float)
    h = m[(t > t[-1] / 2) & np.isfinite(m)]
    return float(h.std() / h.mean())


@pytest.mark.parametrize("load", [0.2, 0.6, 0.9])
def test_split_close_to_mindelay_with_no_more_drops_and_no_more_variation(load: float) -> None:
    sp, md = sim("split", load), sim("mindelay", load)
    s, m = sp["summary"], md["summary"]
    # measured on this network (seed 1): 1.00, 1.01, 0.99 of mindelay
    assert s["mean_delivery_s"] <= 1.05 * m["mean_delivery_s"], (s["mean_delivery_s"], m["mean_delivery_s"])
    assert s["delivery_ratio"] >= m["delivery_ratio"] - 0.001
    assert cv_second_half(sp) <= 1.5 * cv_second_half(md)
    # zero loops published (the engine raises on one); the statistic counts repairs only
    assert s["policy_engine_split_publications"] > 0


def test_split_past_shortest_saturation_leaves_the_overloaded_bridge() -> None:
    # at 1.2x shortest's saturation the short bridge starts overloaded; the ring nodes'
    # shares on it linger uphill and block their neighbours' new next hops towards the
    # long bridge until drained (engine.split.uphill_drain).  Measured on this network
    # (seed 1, 30 s, 10 s warm-up): 1.016 of mindelay, drops 0.15% against 0.14%; with
    # engine.split.uphill_drain=0, 4.57x and 2.7% drops (20 s run)
    sp = sim("split", 1.2, duration_s=30.0, warmup_s=10.0)
    md = sim("mindelay", 1.2, duration_s=30.0, warmup_s=10.0)
    s, m = sp["summary"], md["summary"]
    assert s["mean_delivery_s"] <= 1.05 * m["mean_delivery_s"], (s["mean_delivery_s"], m["mean_delivery_s"])
    assert s["delivery_ratio"] >= m["delivery_ratio"] - 0.001
    assert cv_second_half(sp) <= 1.5 * cv_second_half(md)


def test_split_at_light_load_is_no_worse_than_shortest_and_repairs_almost_nothing() -> None:
    sp, sh = sim("split", 0.2), sim("shortest", 0.2)
    assert sp["summary"]["mean_delivery_s"] <= 1.02 * sh["summary"]["mean_delivery_s"]
    # loop repairs per second near zero (measured: 8 in 20 s, all in the first seconds)
    assert sp["summary"]["policy_engine_loops_prevented"] / 20.0 <= 1.0


def test_split_cold_start_settles_within_ten_seconds() -> None:
    # every estimate the same at the start: the first tables are arbitrary loop-free trees
    r = sim("split", 0.6, duration_s=30.0, warmup_s=0.0,
            overrides=["engine.initial.mode=constant", "engine.initial.value_s=0.05"])
    t = np.asarray(r["series"]["t_s"], dtype=float)
    m = np.asarray(r["series"]["mean_delivery_s"], dtype=float)
    c = np.asarray(r["series"]["delivered"], dtype=float)
    final = float((m[t > 20] * c[t > 20]).sum() / c[t > 20].sum())
    after = (t > 10) & np.isfinite(m)
    # from 10 s on, every second within 10% of the final level (plus Poisson noise: the
    # per-second CV of mindelay here is about 6%, so 2 sigma of it on top)
    assert np.all(np.abs(m[after] - final) <= (0.10 + 0.12) * final), (m[after], final)
    w = (t > 10) & (t <= 15)
    early = float((m[w] * c[w]).sum() / c[w].sum())
    assert abs(early - final) <= 0.10 * final, (early, final)


def test_split_link_cut_loses_only_what_was_queued_and_recovers() -> None:
    # the short bridge (shortest's busiest link) fails at 8 s and comes back at 14 s
    scen = {"scenario": {"name": "cut", "links": [{"at_s": 8, "between": ["a0", "b0"], "down": True},
                                                  {"at_s": 14, "between": ["a0", "b0"], "up": True}]}}
    r = sim("split", 0.6, duration_s=24.0, warmup_s=0.0, scenario=scen)
    s = r["summary"]
    # at most what the two directions' queues hold (64 packets each): nothing is sent
    # onto the dead link after the engine hears of it
    assert s["dropped_link_down"] <= 2 * 64
    t = np.asarray(r["series"]["t_s"], dtype=float)
    m = np.asarray(r["series"]["mean_delivery_s"], dtype=float)
    c = np.asarray(r["series"]["delivered"], dtype=float)

    def level(a: float, b: float) -> float:
        w = (t > a) & (t <= b)
        return float((m[w] * c[w]).sum() / c[w].sum())

    pre, during, after = level(4, 8), level(11, 14), level(19, 24)
    # settled within 5 s of the cut: the seconds 11-14 agree with 9-11 within 10% plus noise
    assert abs(level(9, 13) - during) <= 0.15 * during
    # back within 5 s of the repair (19 s on) to within 10% of before the cut
    assert after <= 1.10 * pre, (pre, after)
    assert math.isfinite(during)
    # the optimum without the bridge, recomputed (mindelay on the topology without it),
    # against the level during the outage (aim: within 10%)
    topo = T.from_mapping(bridges())
    keep = [k for k in range(topo.n_links)
            if {topo.nodes[int(topo.src[k])], topo.nodes[int(topo.dst[k])]} != {"a0", "b0"}]
    doc = bridges()
    doc["topology"]["links"] = [ln for ln in doc["topology"]["links"] if set(ln["between"]) != {"a0", "b0"}]
    cut = T.from_mapping(doc)
    assert len(keep) == cut.n_links
    res = M.for_topology(cut, M.offered_demand(cut, 0.6 * saturation()), 1000.0)
    assert res.feasible
    assert during <= 1.10 * res.delay_s + 0.002, (during, res.delay_s)


def test_the_boost_after_a_link_event_brings_traffic_back_to_a_repaired_link_sooner() -> None:
    # the same cut as above, with and without engine.split.event_boost: in the three
    # seconds after the first second past the repair (15-18 s) the boosted run is back
    # within 15% of its level before the cut; without the boost it is still 20-30% above
    # (measured: 1.04x against 1.27x; the same seed, so the same packets until the cut)
    scen = {"scenario": {"name": "cut", "links": [{"at_s": 8, "between": ["a0", "b0"], "down": True},
                                                  {"at_s": 14, "between": ["a0", "b0"], "up": True}]}}
    lv = {}
    for b in ("1", "3"):
        r = sim("split", 0.6, duration_s=20.0, warmup_s=0.0, scenario=scen,
                overrides=[f"engine.split.event_boost={b}"])
        t = np.asarray(r["series"]["t_s"], dtype=float)
        m = np.asarray(r["series"]["mean_delivery_s"], dtype=float)
        c = np.asarray(r["series"]["delivered"], dtype=float)
        lv[b] = [float((m[w] * c[w]).sum() / c[w].sum()) for w in ((t > 4) & (t <= 8), (t > 15) & (t <= 18))]
    pre, back = lv["3"]
    assert back <= 1.15 * pre, lv
    assert back < lv["1"][1], lv


def live_within_band(spec: dict[str, Any]) -> tuple[float, float]:
    """Five in-process seeds, then the live service on seed 1's spec: asserts the live mean
    inside their two-sided 95% prediction interval (see the test below); (mean, half width)."""
    means = [run({**spec, "seed": k})["summary"]["mean_delivery_s"] for k in range(1, 6)]
    m, s = float(np.mean(means)), float(np.std(means, ddof=1))
    half = max(2.776 * s * math.sqrt(1 + 1 / 5), 0.03 * m)
    live = run({**spec, "policy": "service"})["summary"]
    assert live["policy"] == "service" and live["policy_service_rows_rejected"] == 0
    assert abs(live["mean_delivery_s"] - m) <= half, (live["mean_delivery_s"], m, half, means)
    return m, half


def test_closed_loop_split_matches_in_process() -> None:
    """The live service in split mode (``--policy service``, engine.mode=split) against
    five in-process runs over five traffic seeds (the issue's "within the seeds'
    interval"; runs that differ only in their draws spread by 0.1 ms, far less than the
    closed loop's own timing, and made the band fail a sound closed loop): inside the
    two-sided 95% prediction interval mean ± t(4, 0.975) · s · sqrt(1 + 1/5) (the issue's 95%;
    Student's t prediction interval for one new observation, Hahn & Meeker, Statistical
    Intervals, 1991, ch. 4; t(4, 0.975) = 2.776 from standard t tables, from memory), with a floor of 3% of the mean for the
    decisions reaching packets one or two intervals later (sim/closedloop.py).  At real
    time (speed 1): split measures link rates on the service's own clock, so at another
    speed its rates would be off by that factor against the simulated latencies."""
    spec = {"topology": bridges(), "policy": "qrouting", "rate_pps": 0.9 * saturation(),
            "duration_s": 12.0, "warmup_s": 4.0, "seed": 1, "series": False, "size_dist": "exp",
            "overrides": ["engine.mode=split", "engine.optimum.guide=false", "sim.service.speed=1"]}
    m, half = live_within_band(spec)
    static = run({**spec, "policy": "shortest"})["summary"]
    assert static["mean_delivery_s"] - m > 3 * half       # the band is not vacuous


def test_guided_split_reaches_the_optimum_where_learning_alone_lags() -> None:
    # engine.optimum.guide on simulated time (routerd.sim.policies._Guide): every 2 s flow
    # deviation on the demand measured from the accepted rows seeds the shares.  Measured
    # on this network (seed 1, 20 s, 5 s warm-up, 1.2x): guided 0.995 of mindelay with no
    # drop; split alone 1.397 with 10 drops (it needs longer: the test above)
    ov = ["engine.optimum.guide=true", "engine.optimum.interval_s=2"]
    g, md = sim("split", 1.2, overrides=list(ov)), sim("mindelay", 1.2)
    s, m = g["summary"], md["summary"]
    assert s["mean_delivery_s"] <= 1.05 * m["mean_delivery_s"], (s["mean_delivery_s"], m["mean_delivery_s"])
    assert s["dropped"] + s["ttl_expired"] <= m["dropped"] + m["ttl_expired"] + 0.001 * s["offered"]
    assert s["policy_optimum_guides"] >= 5 and s["policy_optimum_seeded_destinations"] > 0, s
    # no wall clock in it: the same run again gives the same packets
    again = sim("split", 1.2, overrides=list(ov))["summary"]
    assert [again[k] for k in ("delivered", "dropped", "mean_delivery_s", "policy_optimum_guides")] \
        == [s[k] for k in ("delivered", "dropped", "mean_delivery_s", "policy_optimum_guides")]


def test_guided_cold_start_is_seeded_early_from_a_fair_demand() -> None:
    # a cold start past shortest's saturation (1.2x, every estimate equal): the
    # shortest-path tree overloads the short bridge until a guide lands.  The first run
    # comes engine.optimum.first_s (0.5 s) after the start, not a whole interval later, and
    # the demand it measures is a normalised mean (routerd.core.demand.Rates), not the first
    # short interval at full weight.  Measured on this network (seed 1, 16 s): mean delivery
    # over seconds 1-4 at 2.69x the level of seconds 10-16, 10 drops, 8 guides; with the first
    # run at 2 s and the plain smoothing 3.74x, 45 drops, 7 guides
    r = sim("split", 1.2, duration_s=16.0, warmup_s=0.0,
            overrides=["engine.optimum.guide=true", "engine.optimum.interval_s=2",
                       "engine.initial.mode=constant", "engine.initial.value_s=0.05"])
    sr, s = r["series"], r["summary"]
    t = np.asarray(sr["t_s"], dtype=float)
    m = np.asarray(sr["mean_delivery_s"], dtype=float)
    c = np.asarray(sr["delivered"], dtype=float)

    def level(a: float, b: float) -> float:
        k = (t > a) & (t <= b) & (c > 0)
        return float((m[k] * c[k]).sum() / c[k].sum())

    # runs at 0.5, 2.5, ..., 14.5 s, each seeded engine.optimum.budget_s (1 s) later
    assert s["policy_optimum_guides"] == 8, s
    assert s["policy_optimum_left_destinations"] == 0, s
    assert level(1.0, 4.0) <= 3.2 * level(10.0, 16.0), (level(1.0, 4.0), level(10.0, 16.0))


def test_guide_runs_one_at_a_time_when_the_interval_is_shorter_than_the_budget() -> None:
    # the service's runner waits for its child before the next run; the simulated guide
    # too: a run every 0.5 s with results landing engine.optimum.budget_s (1 s) later seeds
    # every other interval instead of replacing each result before it lands (0 guides)
    r = sim("split", 0.6, duration_s=6.0, warmup_s=0.0,
            overrides=["engine.optimum.guide=true", "engine.optimum.interval_s=0.5"])
    s = r["summary"]
    assert s["policy_optimum_guides"] >= 3, s
    assert s["policy_optimum_runs"] <= s["policy_optimum_guides"] + 1, s


def test_guided_split_through_a_link_cut_seeds_over_the_live_links() -> None:
    # rows the engine rejects while the bridge is down are left out of the counts (a
    # masked column is a strided array: the compiled meter once refused it), and every
    # guide after the cut seeds routes over the live links only
    scen = {"scenario": {"name": "cut", "links": [{"at_s": 6, "between": ["a0", "b0"], "down": True},
                                                  {"at_s": 12, "between": ["a0", "b0"], "up": True}]}}
    r = sim("split", 0.6, duration_s=16.0, warmup_s=0.0, scenario=scen,
            overrides=["engine.optimum.guide=true", "engine.optimum.interval_s=2"])
    s = r["summary"]
    assert s["policy_optimum_guides"] >= 6 and s["dropped_link_down"] <= 2 * 64, s


def test_closed_loop_guided_split_matches_in_process() -> None:
    """The live service with engine.optimum.guide (its optimiser in a child process on the
    wall clock, its guide records applied by the loop) against the in-process guide on
    simulated time, at 1.2x where guiding matters: the band of
    :func:`test_closed_loop_split_matches_in_process` (five seeds, Student's t prediction
    interval, 3% floor).  Measured here: live 19.45 ms, in-process 19.40 +- 1.08 ms,
    unguided split 25.7-32.6 ms over three seeds."""
    ov = ["engine.mode=split", "sim.service.speed=1"]
    spec = {"topology": bridges(), "policy": "qrouting", "rate_pps": 1.2 * saturation(),
            "duration_s": 16.0, "warmup_s": 6.0, "seed": 1, "series": False, "size_dist": "exp",
            "overrides": ov + ["engine.optimum.guide=true", "engine.optimum.interval_s=2"]}
    m, half = live_within_band(spec)
    alone = [run({**spec, "seed": k, "overrides": ov + ["engine.optimum.guide=false"]})["summary"]
             ["mean_delivery_s"] for k in (1, 2, 3)]
    assert float(np.mean(alone)) - m > 3 * half, (alone, m, half)   # the band is not vacuous


def test_the_guide_runs_only_where_the_service_would_run_one() -> None:
    # greedy mode has no shares to seed; a network above engine.optimum.max_nodes gets no
    # optimiser; interval 0 turns it off
    on = ["engine.optimum.guide=true", "engine.optimum.interval_s=2"]
    for extra, mode in (([], "greedy"), (["engine.optimum.max_nodes=2"], "split"),
                        (["engine.optimum.interval_s=0"], "split")):
        r = run({"topology": bridges(), "policy": "qrouting", "rate_pps": 0.2 * saturation(),
                 "duration_s": 3.0, "seed": 1, "overrides": on + extra + [f"engine.mode={mode}"]})
        assert "policy_optimum_runs" not in r["summary"], (extra, mode)


def test_report_drops_leave_out_packets_still_in_flight() -> None:
    # the comparison report's drop share (bench/compare_variants.py) counts packets a queue
    # dropped or a TTL expired, not those still travelling when the run ends; conservation
    # of packets (common practice): offered = delivered + dropped + expired + in flight
    import os
    import sys
    sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", "bench"))
    import compare_variants as CV
    s = sim("split", 1.2, duration_s=6.0, warmup_s=0.0)["summary"]
    assert s["offered"] == s["delivered"] + s["dropped"] + s["ttl_expired"] + s["in_flight_at_end"]
    assert s["in_flight_at_end"] > 0 and s["dropped"] > 0, s
    assert CV.lost_share(s) == pytest.approx((s["dropped"] + s["ttl_expired"]) / s["offered"])
    assert 1.0 - s["delivery_ratio"] - CV.lost_share(s) == pytest.approx(
        s["in_flight_at_end"] / s["offered"])


def test_a_report_job_can_refine_what_its_label_sets() -> None:
    # bench/compare_variants.py: the label's settings come first and the job's own overrides
    # after them, so a job's engine.optimum.interval_s wins over guided's (it used to lose)
    import os
    import sys

    from routerd.io import config
    sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", "bench"))
    import compare_variants as CV
    cfg = config.load(None, CV.label_overrides("guided", ["engine.optimum.interval_s=7"]))
    assert cfg["engine.mode"] == "split" and cfg["engine.optimum.guide"]
    assert cfg["engine.optimum.interval_s"] == 7.0
    assert config.load(None, CV.label_overrides("guided"))["engine.optimum.interval_s"] == 2.0
    assert CV.label_overrides("dual", ["engine.variant=plain"])[-1] == "engine.variant=plain"
    # every label means the same whatever the defaults: the variants are greedy mode's,
    # split runs without the guide, guided with it
    for label in CV.VARIANTS:
        c = config.load(None, CV.label_overrides(label))
        want = {"split": ("split", False), "guided": ("split", True)}.get(label, ("greedy", c["engine.optimum.guide"]))
        assert (c["engine.mode"], c["engine.optimum.guide"]) == want, label
        assert c["engine.variant"] == (label if label in CV.VARIANTS[:5] else "plain"), label


def test_a_network_above_split_max_nodes_runs_greedy_and_the_result_says_why() -> None:
    # config.split_fits: the simulator's learner runs greedy above engine.split.max_nodes,
    # as the service would, and the result carries the sentence routerd simulate prints
    base = {"topology": bridges(), "policy": "qrouting", "rate_pps": 0.2 * saturation(),
            "duration_s": 1.0, "seed": 1}
    small = run({**base, "overrides": ["engine.split.max_nodes=3"]})
    assert len(small["notes"]) == 1 and "running greedy" in small["notes"][0]
    assert "engine.split.max_nodes (3)" in small["notes"][0]
    assert "notes" not in run(base)          # fits: runs split, nothing to say


def test_the_guide_runs_through_a_partition() -> None:
    # the default (guided split) on the demo lab with a relay cut off from both its
    # neighbours: the guide leaves out the demand no routing can carry (it raised
    # "traffic ... has no route" and ended the run with a traceback)
    import os
    import tempfile

    from routerd.sim.run import DEMO_TOPOLOGY
    doc = ("scenario:\n  name: isolate-r1\n  description: r1 cut off\n  load:\n"
           "    - {step: 1.0, at_s: 0}\n  links:\n"
           "    - {at_s: 2, between: [w6, r1], down: true}\n"
           "    - {at_s: 2, between: [r1, r2], down: true}\n")
    with tempfile.TemporaryDirectory() as d:
        path = os.path.join(d, "iso.yaml")
        with open(path, "w", encoding="utf-8") as fh:
            fh.write(doc)
        r = run({"topology": DEMO_TOPOLOGY, "policy": "qrouting", "rate_pps": 400.0,
                 "duration_s": 8.0, "seed": 1, "scenario": path, "series": False})
    s = r["summary"]
    assert s["policy_optimum_runs"] >= 2 and s["delivered"] > 0
