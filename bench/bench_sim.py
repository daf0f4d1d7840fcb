"""Simulator speed: packet-hops per second against a bare heapq loop, and memory per
in-flight packet.

Times are CPU time of this process (``time.process_time``): the machine is shared, and
CPU time is what the other processes disturb least.  The floor is measured in the same run: a bare heapq event loop with list-based
next-hop tables that makes the same pushes and pops for the same packets (one arrival
event per hop, one injection event per packet) and nothing else — no queues, no
statistics, no policy calls.  ``sim_hops_ratio_*`` = simulator hops/s ÷ bare hops/s.
Both simulator loops run in the same process, interleaved with the floor: figures without
a suffix are the default path (``engine.kernels = auto``: the compiled loop where
``routerd.sim._hops`` is built), ``…_compiled`` / ``…_reference`` each path by name.

Topologies: the 16-node demo lab and two of our own random meshes (a ring plus random
chords, mean degree about 4) with 100 and 500 nodes.  The rate keeps the busiest link
at moderate load, so the learner does real work without the run drowning in drops.

Policies: ``shortest``, ``ecmp``, ``qrouting`` with the default config (split mode up to
``engine.split.max_nodes``, 200 nodes, guided by the optimum every 2 s of simulated time;
greedy above: so the 500-node figure is greedy), ``qrouting_greedy`` (``engine.mode:
greedy`` everywhere: the learner's per-hop path without split's per-decision work, what
the ``qrouting`` figures measured before split became the default) and, for context on
split's networks, ``qrouting_blocks`` (``engine.split.destinations_per_decision`` = n/8:
the default config with decisions bounded, see bench/reports/split_blocks.md for what
that costs in routing quality).
"""
from __future__ import annotations

import gc
import os
import sys
import time
import tracemalloc
from heapq import heappop, heappush
from typing import Any

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

from routerd.core import topology
from routerd.io import config, topofiles
from routerd.sim import policies
from routerd.sim.core import CoreResult, hops_status, run_core
from routerd.sim.run import DEMO_TOPOLOGY
from routerd.sim.traffic import PoissonTraffic

#: the simulator's two event loops (routerd.sim.core.hops_status), measured side by side
PATHS = ("reference", "compiled")


def random_mesh(n: int, seed: int = 1) -> topology.Topology:
    """A ring plus n random chords: connected, mean degree about 4.  Our own construction."""
    rng = np.random.default_rng(seed)
    names = [f"n{i}" for i in range(n)]
    pairs = {(i, (i + 1) % n) for i in range(n)}
    while len(pairs) < 2 * n:
        a, b = (int(v) for v in rng.integers(0, n, 2))
        if a != b and (a, b) not in pairs and (b, a) not in pairs:
            pairs.add((a, b))
    links = [topology.LinkSpec(names[a], names[b], float(d), 100e6, 200, "bench")
             for (a, b), d in zip(sorted(pairs), rng.uniform(0.001, 0.005, len(pairs)))]
    links += [topology.LinkSpec(ls.dst, ls.src, ls.delay_s, ls.capacity_bps, ls.buffer_pkts, "bench")
              for ls in list(links)]
    return topology.build(f"mesh{n}", names, links)


def packets_for(topo: topology.Topology, rate: float, duration: float, seed: int) -> list[tuple]:
    tr = PoissonTraffic(topo.n, rate, np.random.default_rng(seed), duration_s=duration)
    return [p for p in tr.packets() if p[0] <= duration]


def bare_loop(topo: topology.Topology, pkts: list[tuple], end: float, nh: list[list[int]]) -> int:
    """The same pushes and pops as the simulator, with nothing else: the floor."""
    n = topo.n
    link_of: list[dict[int, int]] = [{} for _ in range(n)]
    for k, (a, b) in enumerate(zip(topo.src.tolist(), topo.dst.tolist())):
        link_of[a][b] = k
    lat = (topo.delay_s + 8000.0 / topo.capacity_bps).tolist()
    heap: list[tuple[float, int]] = []
    p_node: list[int] = []
    p_dst: list[int] = []
    free: list[int] = []
    it = iter(pkts)
    pending = next(it)
    heappush(heap, (pending[0], -1))
    hops = 0
    while heap:
        t, c = heappop(heap)
        if t > end:
            break
        if c >= 0:
            y = p_node[c]
            d = p_dst[c]
            if y == d:
                free.append(c)
                continue
            x = y
        else:
            _, x, d, _, _ = pending
            pending = next(it, None)
            if pending is not None:
                heappush(heap, (pending[0], -1))
            if free:
                c = free.pop()
                p_node[c] = x
                p_dst[c] = d
            else:
                c = len(p_dst)
                p_node.append(x)
                p_dst.append(d)
        h = nh[x][d]
        k = link_of[x][h]
        p_node[c] = h
        hops += 1
        heappush(heap, (t + lat[k], c))
    return hops


def classic_loop(topo: topology.Topology, pkts: list[tuple], end: float, nh: list[list[int]]) -> int:
    """For context only: the same bare loop in the classic two-event design (a
    "transmission done" event at the tail, then an arrival event at the head, per hop),
    the design the issue's reference figure (0.3 M hops/s, 2.5 events per hop) describes."""
    n = topo.n
    link_of: list[dict[int, int]] = [{} for _ in range(n)]
    for k, (a, b) in enumerate(zip(topo.src.tolist(), topo.dst.tolist())):
        link_of[a][b] = k
    tx = (8000.0 / topo.capacity_bps).tolist()
    prop = topo.delay_s.tolist()
    heap: list[tuple[float, int, int]] = []
    p_node: list[int] = []
    p_dst: list[int] = []
    p_prev_node: list[int] = []
    free: list[int] = []
    it = iter(pkts)
    pending = next(it)
    heappush(heap, (pending[0], -1, 0))
    hops = 0
    while heap:
        t, c, kind = heappop(heap)
        if t > end:
            break
        if c >= 0 and kind == 1:          # transmission done: propagate
            heappush(heap, (t + prop[link_of[p_prev_node[c]][p_node[c]]], c, 0))
            continue
        if c >= 0:
            y = p_node[c]
            d = p_dst[c]
            if y == d:
                free.append(c)
                continue
            x = y
        else:
            _, x, d, _, _ = pending
            pending = next(it, None)
            if pending is not None:
                heappush(heap, (pending[0], -1, 0))
            if free:
                c = free.pop()
                p_node[c] = x
                p_dst[c] = d
                p_prev_node[c] = x
            else:
                c = len(p_dst)
                p_node.append(x)
                p_dst.append(d)
                p_prev_node.append(x)
        h = nh[x][d]
        k = link_of[x][h]
        p_prev_node[c] = x
        p_node[c] = h
        hops += 1
        heappush(heap, (t + tx[k], c, 1))
    return hops


def _timed(obj: Any, name: str, acc: list[float]) -> None:
    """Wrap obj.name so the wall time spent in it adds up in acc[0]."""
    f = getattr(obj, name)

    def wrapper(*a: Any, **kw: Any) -> Any:
        t0 = time.process_time()
        try:
            return f(*a, **kw)
        finally:
            acc[0] += time.process_time() - t0

    setattr(obj, name, wrapper)


def blocks_of(n: int) -> int:
    """``engine.split.destinations_per_decision`` of the ``qrouting_blocks`` figures."""
    return -(-n // 8)


def sim_once(topo: topology.Topology, name: str, pkts: list[tuple],
             end: float, kernels: str = "auto",
             instrument: bool = False) -> tuple[int, float, CoreResult, float]:
    """One run: (hops, CPU seconds, result, CPU seconds inside the engine).  The engine's
    time is only measured with ``instrument`` (its timers cost about 2 us a call, 4% of a
    16-node qrouting run: the runs the ratios come from leave them out)."""
    cfg = config.load(None)
    if name == "qrouting_greedy":    # the greedy learner: the per-hop path without split's decisions
        cfg = cfg.with_overrides({"engine.mode": "greedy"})
        name = "qrouting"
    elif name == "qrouting_blocks":  # split deciding an eighth of the destinations at a time
        cfg = cfg.with_overrides({"engine.split.destinations_per_decision": blocks_of(topo.n)})
        name = "qrouting"
    pol = policies.make(name)
    pol.attach(topo, np.random.default_rng(2), cfg)
    in_engine = [0.0]
    eng = getattr(pol, "engine", None)
    if eng is not None and instrument:
        for meth in ("observe", "decide", "weights", "values", "set_link"):
            _timed(eng, meth, in_engine)
    gc.collect()
    t0 = time.process_time()
    raw = run_core(topo, pol, iter(pkts), duration_s=end, series_interval_s=end / 10,
                   kernels=kernels)
    wall = time.process_time() - t0
    return sum(raw.carried), wall, raw, in_engine[0]


def measure(topo: topology.Topology, rate: float, duration: float, policy: str,
            repeats: int = 3) -> dict[str, Any]:
    """Best of ``repeats`` interleaved runs of each (the machine is shared: the best run
    is the one least disturbed): the bare loop, the classic loop, and the simulator on
    each of its paths (``PATHS``; a path that is not built is left out)."""
    pkts = packets_for(topo, rate, duration, seed=1)
    nh = topo.spt_next_hops().tolist()
    bare_loop(topo, pkts[: len(pkts) // 10], duration / 10, nh)  # warm the caches
    paths = [p for p in PATHS if p == "reference" or hops_status("compiled")["path"] == p]
    # and the simulator's first-use costs (lazy imports, the compiled modules' first
    # calls), on a short run of each path measured: with --quick's single repeat, the
    # compiled path's first run carried them (16-node qrouting: about 10 ms of a 40 ms run)
    for p in paths:
        sim_once(topo, policy, pkts[: len(pkts) // 20], duration / 20, p)
    # the engine's share of a run, from one instrumented run of each path (learning
    # policies only; the timed runs below carry no timers)
    eng_s = {p: 0.0 for p in paths}
    eng_cpu = {p: 0.0 for p in paths}
    if policy.startswith("qrouting"):
        for p in paths:
            _, w, _, e = sim_once(topo, policy, pkts, duration, p, instrument=True)
            eng_s[p] = e / w
            eng_cpu[p] = e
    bw = cw = float("inf")
    bh = ch = 0
    sw = {p: float("inf") for p in paths}
    sh = {p: 0 for p in paths}
    raw: dict[str, CoreResult] = {}
    for _ in range(repeats):
        gc.collect()
        t0 = time.process_time()
        bh = bare_loop(topo, pkts, duration, nh)
        bw = min(bw, time.process_time() - t0)
        t0 = time.process_time()
        ch = classic_loop(topo, pkts, duration, nh)
        cw = min(cw, time.process_time() - t0)
        for p in paths:
            h, w, raw[p], _ = sim_once(topo, policy, pkts, duration, p)
            sh[p] = h
            sw[p] = min(sw[p], w)
    assert raw, "repeats must be >= 1"
    if len(paths) == 2:  # the two paths must agree (they are the same model)
        a, b = raw["reference"], raw["compiled"]
        assert (a.deliveries, a.carried, a.dropped_all) == (b.deliveries, b.carried, b.dropped_all)
    return {"paths": paths, "sim_hops_per_s": {p: sh[p] / sw[p] for p in paths},
            "bare_hops_per_s": bh / bw, "sim_hops": sh[paths[0]], "bare_hops": bh,
            "engine_share": eng_s, "engine_cpu_s": eng_cpu, "bare_cpu_s": bw,
            "classic_hops_per_s": ch / cw}


def memory_per_packet(quick: bool) -> tuple[float, float]:
    """Bytes per packet in flight: the slope of peak traced memory against peak packets in
    the network, between a light and a heavy run on a slow line (packets pile up in
    queues), for the simulator and for the bare loop's state (heap entry + two slots)."""
    doc = {"topology": {"name": "slow-line", "nodes": ["a", "b"],
                        "links": [{"between": ["a", "b"], "delay_s": 0.5, "capacity_bps": 8e6,
                                   "buffer_pkts": 10**7}]}}
    topo = topology.from_mapping(doc)
    out = []
    for rate in ((2000.0, 20000.0) if quick else (5000.0, 50000.0)):
        pkts = packets_for(topo, rate, 1.0, seed=3)
        pol = policies.make("shortest")
        pol.attach(topo, np.random.default_rng(0), None)
        gc.collect()
        tracemalloc.start()
        # the reference loop: tracemalloc sees Python objects, not the compiled loop's C
        # arrays (those are about 90 bytes a packet: heap entry, state, queue slot)
        raw = run_core(topo, pol, iter(pkts), duration_s=0.4, series_interval_s=0.1,
                       kernels="reference")
        _, peak = tracemalloc.get_traced_memory()
        tracemalloc.stop()
        out.append((peak, max(raw.series.in_network or [0]) or raw.in_flight_end))
    (m1, n1), (m2, n2) = out
    sim_b = (m2 - m1) / max(n2 - n1, 1)
    # the bare loop keeps one heap tuple (2 slots + a float) and two list slots per packet
    bare_b = float(sys.getsizeof((0.0, 0)) + sys.getsizeof(0.5) + 2 * 8 + 8)
    return sim_b, bare_b


def run(quick: bool) -> dict[str, dict[str, Any]]:
    figs: dict[str, dict[str, Any]] = {}
    cases = [(16, topofiles.load(DEMO_TOPOLOGY), 600.0),
             (100, random_mesh(100), 4000.0),
             (500, random_mesh(500), 8000.0)]
    duration = {16: 20.0, 100: 5.0, 500: 3.0}
    if quick:
        duration = {k: v / 4 for k, v in duration.items()}
    repeats = 1 if quick else 3
    default = hops_status("auto")["path"]
    for n, topo, rate in cases:
        # qrouting: the default config (split mode up to engine.split.max_nodes, 200 nodes,
        # whose decisions cost O(n^2 K) every sim.decision_interval_s, with the guide's flow
        # deviation every 2 s; greedy above); qrouting_greedy: engine.mode greedy throughout
        # qrouting_blocks (context, split's networks only): engine.split.destinations_per_
        # decision = n/8, the bound on a decision's cost and its price in quality in
        # bench/reports/split_blocks.md
        pols = ("shortest", "ecmp", "qrouting", "qrouting_greedy") + (
            ("qrouting_blocks",) if n <= int(config.load(None)["engine.split.max_nodes"]) else ())
        for pol in pols:
            m = measure(topo, rate, duration[n], pol, repeats)
            bare = m["bare_hops_per_s"]
            # unsuffixed: the default path (engine.kernels = auto); then each path by name
            for p, suffix in [(default, ""), *((p, f"_{p}") for p in m["paths"])]:
                hps = m["sim_hops_per_s"][p]
                figs[f"sim_hops_per_s_{pol}_{n}{suffix}"] = {
                    "value": hps, "unit": "packet-hops/s", "ratio": hps / bare,
                    "against": f"bare heapq loop, same pushes and pops ({bare:.0f} hops/s); "
                               f"{p} simulator loop",
                }
                figs[f"sim_hops_ratio_{pol}_{n}{suffix}"] = {
                    "value": hps / bare, "unit": "ratio", "ratio": hps / bare,
                    "against": f"bare heapq loop on {n} nodes ({m['bare_hops']} vs "
                               f"{m['sim_hops']} hops); {p} simulator loop",
                }
                if pol.startswith("qrouting"):
                    sh = m["engine_share"][p]
                    figs[f"sim_{pol}_engine_share_{n}{suffix}"] = {
                        "value": sh, "unit": "fraction", "ratio": sh,
                        "against": f"the qrouting run's CPU time on the {p} loop (share spent "
                                   "inside routerd.core.engine)",
                    }
                    # the most this run's sim_hops_ratio could be if nothing but the
                    # engine took time (no event loop, no forwarding, no guide): the bare
                    # loop's CPU time over the engine's in the instrumented run (its timers
                    # add about 2 us a call, so the bound is a little low)
                    ec = m["engine_cpu_s"][p]
                    if ec > 0:
                        figs[f"sim_{pol}_engine_bound_{n}{suffix}"] = {
                            "value": m["bare_cpu_s"] / ec, "unit": "ratio",
                            "ratio": m["bare_cpu_s"] / ec,
                            "against": f"bare heapq loop CPU {m['bare_cpu_s'] * 1e3:.1f} ms "
                                       f"over the engine's own {ec * 1e3:.1f} ms in the {p} "
                                       "qrouting run: the sim_hops_ratio reachable if "
                                       "everything else cost nothing",
                        }
            hps = m["sim_hops_per_s"][default]
            figs[f"sim_hops_ratio_vs_classic_{pol}_{n}"] = {
                "value": hps / m["classic_hops_per_s"], "unit": "ratio",
                "ratio": hps / m["classic_hops_per_s"],
                "against": f"context: a bare two-event-per-hop loop ({m['classic_hops_per_s']:.0f} "
                           f"hops/s); {default} simulator loop",
            }
    sim_b, bare_b = memory_per_packet(quick)
    figs["sim_bytes_per_inflight_packet"] = {
        "value": sim_b, "unit": "bytes", "ratio": sim_b / bare_b,
        "against": f"the bare loop's per-packet state ({bare_b:.0f} bytes); reference simulator "
                   "loop (tracemalloc does not see the compiled loop's C arrays)",
    }
    return figs


if __name__ == "__main__":
    import json

    print(json.dumps(run("--quick" in sys.argv), indent=2))
