"""The event loop against queueing theory, plus TTL, link-down and determinism checks.

Tolerances come from each run's own 95% confidence interval (batch means for delays,
independent replications for blocking), never a guessed percentage.
"""
from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest

from routerd.core import topology
from routerd.io import config
from routerd.sim.core import CoreResult, CoreSeries, LinkEvent, run_core
from routerd.sim.policies import Shortest
from routerd.sim.policy import Policy
from routerd.sim.run import run
from routerd.sim.traffic import PoissonTraffic
from sim_helpers import assert_little, assert_little_raw

MU = 1000.0  # packets/s: 8 Mbit/s over 1000-byte packets


def one_link(buffer_pkts: int = 100000, delay_s: float = 0.0) -> dict:
    # two nodes; all traffic a -> b (the demand matrix), b -> a only keeps the graph connected
    return {"topology": {
        "name": "one-link", "nodes": ["a", "b"],
        "links": [{"from": "a", "to": "b", "delay_s": delay_s, "capacity_bps": 8.0e6,
                   "buffer_pkts": buffer_pkts},
                  {"from": "b", "to": "a", "delay_s": delay_s, "capacity_bps": 8.0e6,
                   "buffer_pkts": buffer_pkts}],
        "demands": [{"from": "a", "to": "b", "rate": 1.0}]}}


def sim_one_link(lam: float, dist: str, seed: int = 1, duration: float = 300.0, **kw) -> dict:
    return run({"policy": "shortest", "rate_pps": lam, "duration_s": duration, "seed": seed,
                "topology": one_link(**kw), "demands": True, "packet_bytes": 1000.0,
                "size_dist": dist, "warmup_s": 10.0, "series": False})["summary"]


def assert_within_ci(measured: float, ci95: float, theory: float) -> None:
    # the CI must be informative (a few percent of the value) for the check to mean anything
    assert math.isfinite(ci95) and 0 < ci95 < 0.05 * theory, (ci95, theory)
    # 1.5 half-widths is about 3 standard errors
    assert abs(measured - theory) <= 1.5 * ci95, (measured, theory, ci95)


@pytest.mark.parametrize("lam", [500.0, 800.0])
def test_mm1_mean_sojourn(lam: float) -> None:
    # M/M/1: W = 1 / (mu - lambda) (Kleinrock, Queueing Systems Vol. 1, 1975, eq. 3.26)
    s = sim_one_link(lam, "exp")
    assert_within_ci(s["mean_delivery_s"], s["mean_delivery_ci95_s"], 1.0 / (MU - lam))
    assert s["dropped"] == 0 and s["ttl_expired"] == 0
    assert_little(s)
    # the link is busy a fraction rho of the time (utilisation law)
    assert s["link_util_max"] == pytest.approx(lam / MU, rel=0.03)


def test_md1_pollaczek_khinchine() -> None:
    # M/D/1 by the Pollaczek-Khinchine mean-value formula (Kleinrock 1975, eq. 5.73):
    # W = 1/mu + rho / (2 mu (1 - rho)) for deterministic service
    lam = 800.0
    rho = lam / MU
    s = sim_one_link(lam, "fixed")
    assert_within_ci(s["mean_delivery_s"], s["mean_delivery_ci95_s"],
                     1.0 / MU + rho / (2 * MU * (1 - rho)))
    assert_little(s)


def test_propagation_adds_its_delay() -> None:
    lam = 500.0
    s = sim_one_link(lam, "exp", delay_s=0.004)
    assert_within_ci(s["mean_delivery_s"], s["mean_delivery_ci95_s"], 1.0 / (MU - lam) + 0.004)
    assert_little(s)


def test_mm1k_blocking_probability() -> None:
    # M/M/1/K blocking: P_K = (1 - rho) rho^K / (1 - rho^(K+1)) (Kleinrock 1975, eq. 3.45);
    # K counts the packet in transmission, as buffer_pkts does
    K, lam = 5, 900.0
    rho = lam / MU
    pk = (1 - rho) * rho ** K / (1 - rho ** (K + 1))
    reps = [sim_one_link(lam, "exp", seed=s, duration=60.0, buffer_pkts=K) for s in range(1, 9)]
    for s in reps:
        assert_little(s)
        assert s["dropped"] == s["dropped_buffer"]
    p = np.array([s["dropped"] / s["offered"] for s in reps])
    # 95% CI from 8 independent replications, Student's t with 7 d.o.f. = 2.365 (standard tables)
    half = 2.365 * p.std(ddof=1) / math.sqrt(len(p))
    assert 0 < half < 0.05 * pk
    assert abs(p.mean() - pk) <= 1.5 * half, (p.mean(), pk, half)


class PingPong(Policy):
    """A deliberately broken policy: node 0 and node 1 hand packets for 2 back and forth."""

    name = "pingpong"

    def next_hop(self, x: int, d: int, flow: int, now: float) -> int:
        if d == 2:
            return 1 if x == 0 else 0 if x == 1 else -1
        return d if d in self.topo.neighbours[x] else 1


def line3() -> topology.Topology:
    return topology.from_mapping({"topology": {
        "name": "line", "nodes": ["a", "b", "c"], "defaults": {"capacity_bps": 1e7, "buffer_pkts": 100},
        "links": [{"between": ["a", "b"], "delay_s": 0.001}, {"between": ["b", "c"], "delay_s": 0.001}]}})


def test_ttl_expiry_counts_a_loop() -> None:
    topo = line3()
    pol = PingPong()
    pol.attach(topo, np.random.default_rng(0), config.load(None))
    w = np.zeros((3, 3))
    w[0, 2] = 1.0  # every packet a -> c: a and b bounce it until its TTL runs out
    tr = PoissonTraffic(3, 50.0, np.random.default_rng(1), pair_weights=w, duration_s=10.0)
    raw = run_core(topo, pol, tr.packets(), duration_s=10.0, ttl=16)
    assert raw.offered > 300
    assert raw.delivered == 0 and raw.dropped == 0
    # everything that left the network left by TTL expiry, after exactly 16 hops
    assert raw.ttl_expired == raw.offered - raw.in_flight_end
    assert raw.in_flight_end <= 3
    assert_little_raw(raw)


def test_link_down_drops_queued_packets_and_counts_them() -> None:
    topo = line3()
    pol = Shortest()
    pol.attach(topo, np.random.default_rng(0), None)
    # saturate a -> b so its queue is full when the link goes down at t = 5
    w = np.zeros((3, 3))
    w[0, 1] = 1.0
    tr = PoissonTraffic(3, 1500.0, np.random.default_rng(1), pair_weights=w, duration_s=10.0)
    k = topo.link("a", "b")
    ev = [LinkEvent(5.0, (k,), "down"), LinkEvent(7.0, (k,), "up")]
    raw = run_core(topo, pol, tr.packets(), duration_s=10.0, link_events=ev)
    assert isinstance(raw, CoreResult) and isinstance(raw.series, CoreSeries)
    with pytest.raises(dataclasses.FrozenInstanceError):
        raw.offered = 0  # type: ignore[misc]
    # the keys the loop's result has (what dataclasses.asdict gives; `stopped` came with
    # partial runs on Ctrl-C)
    d = dataclasses.asdict(raw)
    assert set(d) == {
        "offered", "delivered", "dropped", "dropped_buffer", "dropped_link_down",
        "dropped_no_route", "ttl_expired", "in_flight_end", "offered_all", "delivered_all",
        "dropped_all", "ttl_expired_all", "deliveries", "hops_sum", "events", "wall_s",
        "window_s", "little_area", "left", "sys_sum", "busy_s", "carried", "series",
        "series_interval_s", "end_s", "busy_window_s", "stopped"}
    assert raw.stopped is False and raw.end_s == 10.0
    assert set(d["series"]) == {"t_s", "delivered", "delivery_sum_s", "dropped", "ttl_expired",
                                "in_network", "link_util"}
    down = raw.dropped_link_down
    # at least a full queue was lost at the cut, and 2 s of arrivals after it (1500/s)
    assert down >= 100 + 2 * 1500 * 0.9
    assert raw.dropped == raw.dropped_buffer + down + raw.dropped_no_route
    assert raw.offered == raw.delivered + raw.dropped + raw.ttl_expired + raw.in_flight_end
    # traffic flows again after the link comes back: the last series bins deliver
    assert raw.series.delivered[-1] > 1000
    assert_little_raw(raw)


def test_same_seed_same_summary_and_different_seed_differs() -> None:
    spec = {"policy": "qrouting", "rate_pps": 900.0, "duration_s": 6.0, "seed": 7,
            "scenario": {"scenario": {"load": [{"step": 1.5, "at_s": 3}],
                                      "links": [{"at_s": 4, "between": ["w3", "e3"], "down": True}]}}}
    a = run(spec)
    b = run(spec)
    c = run({**spec, "seed": 8})
    for r in (a, b, c):
        r["summary"].pop("wall_s")
    assert a == b
    assert a["summary"] != c["summary"]
    assert_little(a["summary"])


# ---- busy time: counted while a packet is sent, not when it is queued --------------------

def slow_link() -> topology.Topology:
    # 1,000 bit/s: a 1,000-bit packet takes exactly 1 s to send
    return topology.from_mapping({"topology": {
        "name": "slow", "nodes": ["a", "b"],
        "links": [{"between": ["a", "b"], "delay_s": 0.0, "capacity_bps": 1000.0,
                   "buffer_pkts": 10}]}})


def run_packets(packets: list, duration_s: float, warmup_s: float = 0.0) -> tuple[CoreResult, int]:
    topo = slow_link()
    pol = Shortest()
    pol.attach(topo, np.random.default_rng(0), None)
    raw = run_core(topo, pol, iter(packets), duration_s=duration_s, warmup_s=warmup_s,
                   series_interval_s=1.0)
    return raw, topo.link("a", "b")


def test_one_packet_spanning_an_interval_boundary_is_split_across_it() -> None:
    # worked by hand: injected at 0.7 s, sent over [0.7, 1.7]: 0.3 s of the first second,
    # 0.7 s of the second, nothing of the third
    raw, k = run_packets([(0.7, 0, 1, 1000.0, 0)], duration_s=3.0)
    util = [row[k] for row in raw.series.link_util]
    assert util == pytest.approx([0.3, 0.7, 0.0], abs=1e-12)
    assert raw.busy_s[k] == pytest.approx(1.0, abs=1e-12)


def test_back_to_back_packets_fill_the_middle_second_and_no_more() -> None:
    # two packets at 0.5 s and 0.6 s: the second waits, so [0.5, 1.5] then [1.5, 2.5].
    # Booked at enqueue (the old accounting) the first second read 2.0.
    raw, k = run_packets([(0.5, 0, 1, 1000.0, 0), (0.6, 0, 1, 1000.0, 0)], duration_s=3.0,
                         warmup_s=1.0)
    util = [row[k] for row in raw.series.link_util]
    assert util == pytest.approx([0.5, 1.0, 0.5], abs=1e-12)
    # after the warm-up mark at 1 s: 0.5 s of the first transmission and all of the second
    assert raw.busy_window_s[k] == pytest.approx(1.5, abs=1e-12)


def test_transmission_cut_by_the_end_of_the_run_counts_up_to_the_end() -> None:
    raw, k = run_packets([(2.5, 0, 1, 1000.0, 0)], duration_s=3.0)
    assert [row[k] for row in raw.series.link_util] == pytest.approx([0.0, 0.0, 0.5])
    assert raw.busy_s[k] == pytest.approx(0.5, abs=1e-12)
    assert raw.busy_window_s[k] == pytest.approx(0.5, abs=1e-12)


def test_saturated_link_is_never_more_than_fully_busy() -> None:
    # offered 1.5 x capacity into a 20-packet buffer: the link is busy all the time and
    # every interval's utilisation is at most 1 (to float rounding).  M/M/1/K: busy a
    # fraction 1 - P_0 of the time, P_0 = (1 - rho) / (1 - rho^(K+1)) (Kleinrock, Queueing
    # Systems Vol. 1, 1975, the M/M/1/K section of ch. 3; section from memory), 0.9999 here
    K, lam = 20, 1500.0
    rho = lam / MU
    p0 = (1 - rho) / (1 - rho ** (K + 1))
    r = run({"policy": "shortest", "rate_pps": lam, "duration_s": 60.0, "seed": 3,
             "topology": one_link(buffer_pkts=K), "demands": True, "packet_bytes": 1000.0,
             "size_dist": "exp", "warmup_s": 5.0, "series": True, "overrides": ["sim.series_interval_s=0.1"]})
    k = next(ln["link"] for ln in r["links"] if ln["from"] == "a")
    util = np.array([row[k] for row in r["series"]["link_util"]])
    assert len(util) >= 599   # the last sample can fall a rounding step past the end
    assert util.max() <= 1.0 + 1e-9, util.max()
    # the long-run mean equals the served load (throughput over capacity, 8 kbit packets
    # at 8 Mbit/s: mu = 1,000/s) and the M/M/1/K busy fraction
    s = r["summary"]
    served = s["throughput_pps"] / MU
    assert r["links"][k]["utilisation"] == pytest.approx(served, rel=0.01)
    assert r["links"][k]["utilisation"] == pytest.approx(1 - p0, abs=0.002)
    assert s["dropped_buffer"] > 0.3 * s["offered"]


def test_long_run_utilisation_is_rho() -> None:
    # M/M/1: the server is busy a fraction rho = lambda / mu = 1 - P_0 of the time
    # (Kleinrock, Queueing Systems Vol. 1, 1975, the M/M/1 results of ch. 3; chapter from
    # memory);
    # the tolerance is the per-interval series' own 95% interval (20 batch means)
    lam = 800.0
    r = run({"policy": "shortest", "rate_pps": lam, "duration_s": 300.0, "seed": 5,
             "topology": one_link(), "demands": True, "packet_bytes": 1000.0,
             "size_dist": "exp", "warmup_s": 10.0, "series": True})
    k = next(ln["link"] for ln in r["links"] if ln["from"] == "a")
    t = np.array(r["series"]["t_s"])
    util = np.array([row[k] for row in r["series"]["link_util"]])[t > 10.0]
    assert util.max() <= 1.0 + 1e-9
    b = util[: len(util) // 20 * 20].reshape(20, -1).mean(axis=1)
    half = 2.093 * b.std(ddof=1) / math.sqrt(20)   # Student's t, 19 d.o.f. (standard tables)
    assert_within_ci(float(util.mean()), half, lam / MU)
    assert r["links"][k]["utilisation"] == pytest.approx(util.mean(), rel=0.005)


# ---- stopping early (routerd simulate's Ctrl-C) ----------------------------------------------
@pytest.mark.parametrize("loop", ["reference", "compiled"])
def test_a_stopped_run_counts_exactly_what_happened_before_the_cut(loop: str) -> None:
    """A StopRequest made at the sample at t = 3 s ends the run there, between two events:
    its counts equal those of a run of 3 s (the series, deliveries, drops, events), and it
    says where it stopped.  Both loops (the compiled one looks at the request at every tick
    and sample, and every 65,536 events)."""
    from routerd.sim.core import StopRequest, hops_status

    if loop == "compiled" and hops_status("auto")["path"] != "compiled":
        pytest.skip(hops_status("auto")["reason"])
    spec = {"policy": "shortest", "rate_pps": 1800.0, "duration_s": 20.0, "seed": 5,
            "warmup_s": 0.5, "series": True, "overrides": [f"engine.kernels={loop}"]}
    stop = StopRequest()
    cut_at = []

    def observer(view: dict) -> None:
        if view["t_s"] >= 3.0 and not cut_at:
            cut_at.append(view["t_s"])
            stop.request()

    part = run(spec, observer=observer, stop=stop)
    whole = run({**spec, "duration_s": 3.0})
    p, w = part["summary"], whole["summary"]
    assert cut_at == [3.0] and stop.requested
    assert p["interrupted"] is True and 3.0 < p["reached_s"] < 3.01
    assert "interrupted" not in w and "reached_s" not in w
    for k in ("offered", "delivered", "dropped", "dropped_buffer", "ttl_expired",
              "in_flight_at_end", "mean_delivery_s", "p99_delivery_s", "mean_hops", "events"):
        assert p[k] == w[k], k
    assert p["dropped"] > 0                     # the demo lab's trunk overflows at this rate
    for k in ("t_s", "delivered", "mean_delivery_s", "dropped", "in_network"):
        assert part["series"][k] == whole["series"][k], k
    assert len(part["series"]["t_s"]) == 3
    assert all(0 <= ln["utilisation"] <= 1 for ln in part["links"])
    # the request is one-shot: a second one (Ctrl-C again) interrupts at once, and so does
    # one made when no run is under way
    with pytest.raises(KeyboardInterrupt):
        stop.request()
    with pytest.raises(KeyboardInterrupt):
        StopRequest().request()


def test_ctrl_c_ends_a_compiled_run_between_samples_at_a_very_high_rate() -> None:
    """At 2 M packets/s the compiled loop takes seconds of wall time per simulated second, so
    a Ctrl-C (SIGINT, turned into a StopRequest as ``routerd simulate`` does) must be seen
    between two samples (it used to wait for the next tick or sample: tens of seconds at
    10^9 packets/s).  The counts stay those of a run that ended at the cut."""
    import os
    import signal
    import threading

    from routerd.sim.core import StopRequest, hops_status

    if hops_status("auto")["path"] != "compiled":
        pytest.skip(hops_status("auto")["reason"])
    spec = {"policy": "shortest", "rate_pps": 2e6, "duration_s": 10.0, "seed": 5,
            "warmup_s": 0.0, "series": True, "overrides": ["engine.kernels=compiled"]}
    stop = StopRequest()
    old = signal.signal(signal.SIGINT, lambda signum, frame: stop.request())
    timer = threading.Timer(0.3, os.kill, (os.getpid(), signal.SIGINT))
    try:
        timer.start()
        part = run(spec, stop=stop)
    finally:
        timer.cancel()
        signal.signal(signal.SIGINT, old)
    p = part["summary"]
    assert p["interrupted"] is True
    assert 0.0 < p["reached_s"] < 1.0, p["reached_s"]     # before the first sample at 1 s
    assert part["series"]["t_s"] == []
    assert p["offered"] == p["delivered"] + p["dropped"] + p["ttl_expired"] + p["in_flight_at_end"]
    assert p["offered"] > 1000
