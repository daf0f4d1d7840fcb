"""Measured comparison of the engine variants (routerd/core/variants.py) and the split mode
(routerd/core/splitting.py) against ``mindelay`` (the flow-deviation optimum), ``shortest`` and
``reroute`` (shortest paths recomputed after link events): one report with tables and plots.

Usage: ``python bench/compare_variants.py [--out DIR] [--quick] [--jobs N] [--seeds N]``
(default ``bench/reports/variants``).  Writes ``DIR/report.md``, ``DIR/steady.csv``,
``DIR/scenarios.csv``, ``DIR/report.json`` and PNGs (matplotlib, Agg).

What is measured (every figure from :func:`routerd.sim.run.run`, the simulator the policies share):

* steady state — topohub's SNDlib ``abilene`` and ``geant`` with their own demand
  matrices (``demands=True``), every link at ``CAPACITY_BPS`` (the files carry no
  capacity; 2 Mb/s with 1000-byte packets makes ``shortest`` saturate at a few hundred
  to a few thousand packets/s).  The load axis is a multiple of ``shortest``'s
  saturation rate, computed analytically (the demand routed on the delay-shortest
  paths; the busiest link at capacity).  Mean delivery time of packets delivered after
  the warm-up, delivery ratio, and the exploration overhead: the share of forwarded
  packets sent to a next hop other than the greedy one (counted in the adapter);
* learning from a cold start (``engine.initial.mode=constant``: every estimate the same,
  so the start tables are the loop fallback's shortest paths): time until the 2-s
  rolling mean delivery time is within 10% of its steady value (mean of the last third
  of the run) and stays there for 3 s;
* a congestion spike (load x2 for 10 s) and its end: time after the spike until the
  rolling mean is within 5% of the pre-spike mean and stays there for 3 s;
* a link failure (the busiest link under ``shortest``, both directions) and its repair:
  after the failure, time to settle within 10% of the level at the end of the outage;
  after the repair, time to return within 5% of the pre-failure mean.  At 0.8x the network without that link is overloaded on abilene (mindelay proves it
  infeasible), so a second cut at ``CUT_LOAD`` (0.5x) is measured against the optimum
  recomputed without the link (:func:`optimum_without`): packets lost to the dead link,
  time to settle within 10% of that optimum, time back within 10% of the level before;
* a second cold start at ``COLD_MID_LOAD`` (0.6x);
* our own topologies (``ours:two-clusters``, ``ours:geometric``, built here with uniform
  pairs) beside topohub's; every run uses exponential packet sizes (mindelay's M/M/1
  model); the per-second CV of the delivery time in each steady run's second half.

A time that never comes is reported as the rest of the run, marked ``>``.
Must not import: zmq, prometheus.  matplotlib only inside the plotting function.
"""
from __future__ import annotations

import argparse
import csv
import json
import math
import multiprocessing as mp
import os
import sys
import time
from concurrent.futures import ProcessPoolExecutor
from typing import Any

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

from routerd.core import topology as T
from routerd.io import topofiles as TF
from routerd.sim import analytic as A
from routerd.sim import mindelay as M
from routerd.sim.policies import QRouting
from routerd.sim.run import run as run_sim

CAPACITY_BPS = 2.0e6
PACKET_BYTES = 1000.0
BUFFER_PKTS = 64
TOPOLOGIES = ("topohub:sndlib/abilene", "topohub:sndlib/geant", "ours:two-clusters",
              "ours:geometric")
#: greedy-mode variants (engine.variant), the split mode (engine.mode=split) and the split
#: mode guided by the live optimum (``guided``: GUIDED's settings)
VARIANTS = ("plain", "full_echo", "predictive", "dual", "confidence", "split", "guided")
#: split mode with engine.optimum.guide: flow deviation on the measured demand every 2 s
#: of simulated time seeds the shares (routerd.sim.policies._Guide; the defaults since
#: issue 14, spelled out so the label keeps its meaning whatever the defaults)
GUIDED = ("engine.mode=split", "engine.optimum.guide=true", "engine.optimum.interval_s=2")
#: the settings of the labels that are not an engine.variant (split: without the guide)
MODES = {"split": ("engine.mode=split", "engine.optimum.guide=false"), "guided": GUIDED}
#: the labels issue 14's targets are checked for
SPLITS = ("split", "guided")
#: baselines: static shortest paths, shortest paths recomputed after failures, the optimum
BASELINES = ("shortest", "reroute", "mindelay")
LOADS = (0.2, 0.6, 0.9, 1.0, 1.2)
SIZE_DIST = "exp"   # the M/M/1 model mindelay optimises
BIN_S = 0.5
#: scenario figures and their "reached in every seed" flags
FIGS = (("learn_s", "learn_reached"), ("learn_mid_s", "learn_mid_reached"),
        ("spike_recovery_s", "spike_reached"),
        ("failure_settle_s", "failure_reached"), ("repair_recovery_s", "repair_reached"),
        ("cut_settle_s", "cut_settle_reached"), ("cut_back_s", "cut_back_reached"))
#: the loads of the feasible cut (the network without its busiest link still carries it)
#: and of the moderate cold start
CUT_LOAD = 0.5
COLD_MID_LOAD = 0.6


class CountingQRouting(QRouting):
    """The qrouting adapter, counting packets sent off the greedy next hop."""

    def attach(self, topology: Any, rng: Any, settings: Any) -> None:
        super().attach(topology, rng, settings)
        self.off_greedy = 0

    def next_hop(self, x: int, d: int, flow: int, now: float) -> int:
        h = super().next_hop(x, d, flow, now)
        if h != self._greedy_hop[x][d]:
            self.off_greedy += 1
        return h

    def stats(self) -> dict[str, float]:
        s = super().stats()
        s["off_greedy_packets"] = float(self.off_greedy)
        return s


def load_topology(key: str) -> T.Topology:
    if key == "ours:two-clusters":
        return T.from_mapping(two_clusters(), source=key)
    if key == "ours:geometric":
        return T.from_mapping(geometric(), source=key)
    return TF.load(key, T.LinkDefaults(CAPACITY_BPS, BUFFER_PKTS))


def uses_demands(key: str) -> bool:
    """topohub's SNDlib files carry demand matrices; our own topologies use uniform pairs."""
    return key.startswith("topohub:")


def _doc(name: str, nodes: list[str], links: list[tuple[str, str, float]]) -> dict[str, Any]:
    return {"topology": {"name": name, "nodes": nodes,
                         "defaults": {"capacity_bps": CAPACITY_BPS, "buffer_pkts": BUFFER_PKTS},
                         "links": [{"between": [a, b], "delay_s": d} for a, b, d in links]}}


def two_clusters() -> dict[str, Any]:
    """Two rings of six with two chords each, joined by a short bridge (1 ms) and a long
    one (8 ms): shortest paths pile every cross pair onto the short bridge.  Our own."""
    links: list[tuple[str, str, float]] = []
    for c in "pq":
        ring = [f"{c}{i}" for i in range(6)]
        for i in range(6):
            links.append((ring[i], ring[(i + 1) % 6], 0.002))
        links += [(ring[0], ring[3], 0.003), (ring[1], ring[4], 0.003)]
    links += [("p0", "q0", 0.001), ("p3", "q3", 0.008)]
    return _doc("two-clusters", [f"{c}{i}" for c in "pq" for i in range(6)], links)


def geometric(n: int = 16, radius: float = 0.4, seed: int = 7) -> dict[str, Any]:
    """A random geometric graph: n points uniform in the unit square (numpy's seeded
    Generator), linked within ``radius``, delay 10 ms per unit of distance; components
    joined by their closest pair.  Our own."""
    rng = np.random.default_rng(seed)
    pts = rng.random((n, 2))
    dist = np.hypot(*(pts[:, None, :] - pts[None, :, :]).transpose(2, 0, 1))
    names = [f"g{i}" for i in range(n)]
    edges = {(i, j) for i in range(n) for j in range(i + 1, n) if dist[i, j] < radius}
    comp = list(range(n))

    def root(i: int) -> int:
        while comp[i] != i:
            i = comp[i]
        return i

    for i, j in edges:
        comp[root(i)] = root(j)
    while len({root(i) for i in range(n)}) > 1:
        best = min(((dist[i, j], i, j) for i in range(n) for j in range(n)
                    if root(i) != root(j)), key=lambda t: t[0])
        edges.add((min(best[1], best[2]), max(best[1], best[2])))
        comp[root(best[1])] = root(best[2])
    return _doc("geometric", names, [(names[i], names[j], round(0.01 * float(dist[i, j]), 6) + 1e-4)
                                     for i, j in sorted(edges)])


def shortest_saturation_pps(topo: T.Topology, demands: bool = True) -> tuple[float, int]:
    """(total rate at which shortest's busiest link reaches capacity, that link)."""
    frac = A.single_path_fractions(topo, topo.spt_next_hops())
    n, src, dst = A.link_arrays(topo)
    df, _ = A.flows_from_fractions(n, src, dst, frac, M.offered_demand(topo, 1.0, use_demands=demands))
    f = df.sum(axis=0)
    cap = topo.capacity_bps / (8.0 * PACKET_BYTES)
    with np.errstate(divide="ignore"):
        r = np.where(f > 0, cap / f, np.inf)
    k = int(np.argmin(r))
    return float(r[k]), k


def mindelay_limit(topo: T.Topology, sat: float, demands: bool = True, steps: int = 8) -> float:
    """The largest load factor (x shortest's saturation) mindelay routes within capacity,
    found to ``2 / 2**steps`` above 1x (1.0 when it is not feasible above 1x, or steps=0)."""
    lo, hi = 1.0, 3.0
    if not M.for_topology(topo, M.offered_demand(topo, sat * lo, use_demands=demands), PACKET_BYTES).feasible:
        return lo
    for _ in range(steps):
        mid = 0.5 * (lo + hi)
        ok = M.for_topology(topo, M.offered_demand(topo, sat * mid, use_demands=demands), PACKET_BYTES).feasible
        lo, hi = (mid, hi) if ok else (lo, mid)
    return lo


def lost_share(summary: dict[str, Any]) -> float:
    """Packets dropped (full buffer, dead link) or expired (TTL) over packets offered.  Not
    1 - delivery ratio: that also counts the packets still in flight when the run ends,
    which no queue dropped (about mean delay / run length: more for a slower policy)."""
    off = float(summary["offered"])
    return (float(summary["dropped"]) + float(summary["ttl_expired"])) / off if off else math.nan


def label_overrides(label: str, own: Any = ()) -> list[str]:
    """A learning label's settings, then the job's own overrides: the later one wins, so a
    job can refine what its label sets (``guided``'s interval, say) instead of losing to it."""
    return list(MODES.get(label, ("engine.mode=greedy", f"engine.variant={label}"))) + list(own)


def one(job: dict[str, Any]) -> dict[str, Any]:
    """One simulation; the policy label is ``shortest``, ``mindelay`` or a variant name."""
    label = job["label"]
    spec = dict(job["spec"])
    pol = None
    if label in VARIANTS:
        spec["policy"] = "qrouting"
        spec["overrides"] = label_overrides(label, spec.get("overrides", ()))
        pol = CountingQRouting()
    else:
        spec["policy"] = label
    t0 = time.perf_counter()
    try:
        res = run_sim(spec, policy=pol)
    except Exception as e:  # noqa: BLE001 - recorded in the report, the others go on
        return {**job, "error": f"{type(e).__name__}: {e}"}
    s = res["summary"]
    carried = sum(lk["packets"] for lk in res["links"])
    off = s.get("policy_off_greedy_packets", 0.0)
    out = {**job, "summary": s, "wall_s": time.perf_counter() - t0,
           "off_greedy_share": off / carried if carried else 0.0}
    if job["exp"] == "steady":
        # coefficient of variation of the per-second mean delivery time, second half
        sr = res["series"]
        t = np.asarray(sr["t_s"], dtype=float)
        m = np.asarray(sr["mean_delivery_s"], dtype=float)
        h = m[(t > spec["duration_s"] / 2) & np.isfinite(m)]
        out["cv"] = float(h.std() / h.mean()) if h.size > 1 and h.mean() > 0 else math.nan
        out["drop_share"] = lost_share(s)
        out["loops_per_s"] = s.get("policy_engine_loops_prevented", 0.0) / spec["duration_s"]
    if spec.get("series") and job["exp"] != "steady":
        sr = res["series"]
        out["series"] = {"t_s": sr["t_s"], "mean_delivery_s": sr["mean_delivery_s"],
                         "delivered": sr["delivered"], "dropped": sr["dropped"]}
    return out


def run_jobs(jobs: list[dict[str, Any]], n_jobs: int) -> list[dict[str, Any]]:
    if n_jobs <= 1:
        return [one(j) for j in jobs]
    with ProcessPoolExecutor(max_workers=n_jobs, mp_context=mp.get_context("fork")) as pool:
        return list(pool.map(one, jobs))


# ---- reading the time series ---------------------------------------------------------------

def trailing_sum(x: Any, window_s: float = 2.0) -> np.ndarray:
    """Per bin, the sum of ``x`` over the bins of the last ``window_s`` seconds."""
    w = max(1, round(window_s / BIN_S))
    cs = np.concatenate([[0.0], np.cumsum(np.asarray(x, dtype=float))])
    idx = np.arange(len(cs) - 1)
    return cs[idx + 1] - cs[np.maximum(0, idx + 1 - w)]


def rolling(series: dict[str, Any], window_s: float = 2.0) -> tuple[np.ndarray, np.ndarray]:
    """(bin end times, delivery-weighted rolling mean delivery time over window_s)."""
    t = np.asarray(series["t_s"], dtype=float)
    m = np.asarray(series["mean_delivery_s"], dtype=float)
    c = np.asarray(series["delivered"], dtype=float)
    s = np.where(c > 0, np.nan_to_num(m) * c, 0.0)
    num, den = trailing_sum(s, window_s), trailing_sum(c, window_s)
    with np.errstate(invalid="ignore", divide="ignore"):
        return t, np.where(den > 0, num / den, np.nan)


def level(series: dict[str, Any], t0: float, t1: float) -> float:
    """Delivery-weighted mean delivery time of the bins ending in (t0, t1]."""
    t = np.asarray(series["t_s"], dtype=float)
    m = np.nan_to_num(np.asarray(series["mean_delivery_s"], dtype=float))
    c = np.asarray(series["delivered"], dtype=float)
    sel = (t > t0) & (t <= t1)
    return float((m[sel] * c[sel]).sum() / c[sel].sum()) if c[sel].sum() > 0 else math.nan


def settle_time(series: dict[str, Any], start: float, ref: float, tol: float, end: float,
                hold_s: float = 3.0) -> tuple[float, bool]:
    """Seconds after ``start`` until the rolling mean is within tol of ref and stays so
    for hold_s (before ``end``); (time, reached)."""
    t, r = rolling(series)
    ok = np.abs(r - ref) <= tol * ref
    hold = max(1, round(hold_s / BIN_S))
    cand = np.flatnonzero(t > start)
    for i in cand.tolist():
        if t[i] + hold_s > end + 1e-9:
            break
        if ok[i:i + hold].all() and len(ok[i:i + hold]) == hold:
            # the window ending at t[i] started at t[i] - 2 s: count from the bin itself
            return float(max(0.0, t[i] - start)), True
    return float(end - start), False


# ---- the experiments --------------------------------------------------------------------------

def topology_info(key: str, limit_steps: int = 8) -> dict[str, Any]:
    """What the jobs need to know of one topology: the model, shortest's saturation rate and
    busiest link, whether it runs on its demand matrix, and how far mindelay stays feasible
    (``limit_steps`` bisection steps above 1x; 0 when only load 1x is run: one optimisation
    instead of nine, most of a quick run's time)."""
    topo = load_topology(key)
    dem = uses_demands(key)
    sat, link = shortest_saturation_pps(topo, dem)
    return {"topo": topo, "sat_pps": sat, "busiest_link": link, "demands": dem,
            "mindelay_limit": mindelay_limit(topo, sat, dem, limit_steps),
            "busiest": f"{topo.nodes[int(topo.src[link])]} -> {topo.nodes[int(topo.dst[link])]}"}


def steady_jobs(topos: dict[str, dict[str, Any]], loads: tuple[float, ...], duration: float,
                seeds: int) -> list[dict[str, Any]]:
    jobs = []
    for key, info in topos.items():
        for lf in loads:
            for label in BASELINES + VARIANTS:
                if label == "mindelay" and lf > info["mindelay_limit"]:
                    continue
                if label == "reroute":   # no link event in a steady run: it is shortest
                    continue
                for seed in range(1, seeds + 1):
                    jobs.append({"exp": "steady", "topology": key, "load": lf, "label": label,
                                 "seed": seed,
                                 "spec": {"topology": info["topo"], "rate_pps": lf * info["sat_pps"],
                                          "duration_s": duration, "warmup_s": duration / 3,
                                          "seed": seed, "demands": info["demands"], "series": True,
                                          "size_dist": SIZE_DIST, "packet_bytes": PACKET_BYTES}})
    return jobs


def scenario_jobs(key: str, info: dict[str, Any], seeds: int, scale: float) -> list[dict[str, Any]]:
    topo = info["topo"]
    k = info["busiest_link"]
    a, b = topo.nodes[int(topo.src[k])], topo.nodes[int(topo.dst[k])]
    sc = {
        "cold": ({"scenario": {"name": "cold-start"}}, 1.2, 40.0 * scale,
                 ["engine.initial.mode=constant", "engine.initial.value_s=0.05"]),
        "spike": ({"scenario": {"name": "spike", "load": [{"step": 2.0, "at_s": 10 * scale},
                                                         {"step": 1.0, "at_s": 20 * scale}]}},
                  0.55, 40.0 * scale, []),
        "failure": ({"scenario": {"name": "failure", "links": [
            {"at_s": 10 * scale, "between": [a, b], "down": True},
            {"at_s": 25 * scale, "between": [a, b], "up": True}]}}, 0.8, 45.0 * scale, []),
    }
    # the same cut at a load the network without the link can still carry, against the
    # optimum recomputed without it (mindelay's model delay on the topology with that
    # link's capacity near zero, both directions)
    sc["cut"] = ({"scenario": {"name": "cut", "links": [
        {"at_s": 10 * scale, "between": [a, b], "down": True},
        {"at_s": 25 * scale, "between": [a, b], "up": True}]}}, CUT_LOAD, 40.0 * scale, [])
    sc["cold-mid"] = ({"scenario": {"name": "cold-start"}}, COLD_MID_LOAD, 30.0 * scale,
                      ["engine.initial.mode=constant", "engine.initial.value_s=0.05"])
    ref = optimum_without(topo, k, CUT_LOAD * info["sat_pps"], info["demands"])
    only = {"cut": ("shortest", "reroute", "plain") + SPLITS, "cold-mid": ("shortest", "plain") + SPLITS}
    jobs = []
    for name, (scen, lf, dur, ov) in sc.items():
        for label in ("shortest", "reroute") + VARIANTS:
            if label == "reroute" and name not in ("failure", "cut"):
                continue
            if name in only and label not in only[name]:
                continue
            for seed in range(1, seeds + 1):
                jobs.append({"exp": name, "topology": key, "load": lf, "label": label, "seed": seed,
                             "ref_s": ref,
                             "spec": {"topology": topo, "rate_pps": lf * info["sat_pps"],
                                      "duration_s": dur, "warmup_s": 0.0, "seed": seed,
                                      "demands": info["demands"], "series": True, "scenario": scen,
                                      "size_dist": SIZE_DIST, "packet_bytes": PACKET_BYTES,
                                      "overrides": ov}})
    return jobs


def optimum_without(topo: T.Topology, k: int, rate_pps: float, demands: bool) -> float:
    """mindelay's model delay (s) with link k and its reverse all but removed (capacity
    1e-3 b/s: flow deviation routes around it), inf when that demand no longer fits."""
    import dataclasses

    a, b = int(topo.src[k]), int(topo.dst[k])
    cap = topo.capacity_bps.astype(float).copy()
    cap[[k, topo.link_index[(b, a)]]] = 1e-3
    t2 = dataclasses.replace(topo, capacity_bps=cap)
    r = M.for_topology(t2, M.offered_demand(t2, rate_pps, use_demands=demands), PACKET_BYTES)
    return float(r.delay_s) if r.feasible else math.inf


def scenario_figures(r: dict[str, Any], scale: float) -> dict[str, Any]:
    out = _scenario_times(r, scale)
    out["delivery_ratio"] = r["summary"]["delivery_ratio"]
    # packets lost to the dead link (queued on it when it went down, or sent onto it)
    out["lost_link_down"] = float(r["summary"].get("dropped_link_down", 0.0))
    return out


def _scenario_times(r: dict[str, Any], scale: float) -> dict[str, Any]:
    s, exp = r["series"], r["exp"]
    dur = r["spec"]["duration_s"]
    if exp == "cold":
        steady = level(s, dur * 2 / 3, dur)
        tt, ok = settle_time(s, 0.0, steady, 0.10, dur)
        return {"learn_s": tt, "learn_reached": ok, "steady_s": steady}
    if exp == "cold-mid":
        steady = level(s, dur * 2 / 3, dur)
        tt, ok = settle_time(s, 0.0, steady, 0.10, dur)
        return {"learn_mid_s": tt, "learn_mid_reached": ok, "steady_s": steady}
    if exp == "cut":
        pre = level(s, 5 * scale, 10 * scale)
        during = level(s, 20 * scale, 25 * scale)
        ref = float(r.get("ref_s", math.nan))
        t1, ok1 = settle_time(s, 10 * scale, ref, 0.10, 25 * scale) if math.isfinite(ref) else (15.0, False)
        t2, ok2 = settle_time(s, 25 * scale, pre, 0.10, dur)
        return {"cut_settle_s": t1, "cut_settle_reached": ok1, "cut_back_s": t2,
                "cut_back_reached": ok2, "pre_s": pre, "during_s": during,
                "optimum_without_s": ref, "during_over_optimum": during / ref}
    if exp == "spike":
        pre = level(s, 5 * scale, 10 * scale)
        tt, ok = settle_time(s, 20 * scale, pre, 0.05, dur)
        return {"spike_recovery_s": tt, "spike_reached": ok, "pre_s": pre,
                "peak_s": level(s, 10 * scale, 20 * scale)}
    pre = level(s, 5 * scale, 10 * scale)
    during = level(s, 20 * scale, 25 * scale)
    t1, ok1 = settle_time(s, 10 * scale, during, 0.10, 25 * scale)
    t2, ok2 = settle_time(s, 25 * scale, pre, 0.05, dur)
    return {"failure_settle_s": t1, "failure_reached": ok1, "repair_recovery_s": t2,
            "repair_reached": ok2, "pre_s": pre, "during_s": during}


def _mean(xs: list[float]) -> float:
    xs = [x for x in xs if isinstance(x, (int, float)) and math.isfinite(x)]
    return sum(xs) / len(xs) if xs else math.nan


def summarise(steady: list[dict[str, Any]], scen: list[dict[str, Any]], topos: dict[str, Any],
              scale: float) -> dict[str, Any]:
    pts: dict[tuple[str, float, str], dict[str, float]] = {}
    for r in steady:
        if "error" in r:
            continue
        key = (r["topology"], r["load"], r["label"])
        pts.setdefault(key, {"mean": [], "ratio": [], "lost": [], "off": [], "cv": [], "loops": []})  # type: ignore[dict-item]
        pts[key]["mean"].append(r["summary"]["mean_delivery_s"])  # type: ignore[attr-defined]
        pts[key]["ratio"].append(r["summary"]["delivery_ratio"])  # type: ignore[attr-defined]
        pts[key]["lost"].append(lost_share(r["summary"]))  # type: ignore[attr-defined]
        pts[key]["off"].append(r["off_greedy_share"])  # type: ignore[attr-defined]
        pts[key]["cv"].append(r.get("cv", math.nan))  # type: ignore[attr-defined]
        pts[key]["loops"].append(r.get("loops_per_s", 0.0))  # type: ignore[attr-defined]
    steady_rows = [{"topology": k[0], "load": k[1], "policy": k[2],
                    "mean_delivery_ms": 1e3 * _mean(v["mean"]),  # type: ignore[arg-type]
                    "delivery_ratio": _mean(v["ratio"]),  # type: ignore[arg-type]
                    "lost_share": _mean(v["lost"]),  # type: ignore[arg-type]
                    "off_greedy_share": _mean(v["off"]),  # type: ignore[arg-type]
                    "cv": _mean(v["cv"]),  # type: ignore[arg-type]
                    "loops_prevented_per_s": _mean(v["loops"]),  # type: ignore[arg-type]
                    "seeds": len(v["mean"])}
                   for k, v in sorted(pts.items())]
    sc_rows: dict[tuple[str, str, str], dict[str, list[Any]]] = {}
    for r in scen:
        if "error" in r:
            continue
        f = scenario_figures(r, scale)
        d = sc_rows.setdefault((r["topology"], r["exp"], r["label"]), {})
        for k, v in f.items():
            d.setdefault(k, []).append(v)
    scen_out = []
    for (topo, exp, label), d in sorted(sc_rows.items()):
        row: dict[str, Any] = {"topology": topo, "scenario": exp, "policy": label}
        for k, v in d.items():
            row[k] = all(v) if isinstance(v[0], bool) else _mean(v)
        scen_out.append(row)
    # headline: at loads >= 1 (shortest saturated) where mindelay exists
    head: dict[str, Any] = {}
    for topo in topos:
        best = []
        for lf in sorted({k[1] for k in pts if k[0] == topo}):
            if (topo, lf, "mindelay") not in pts:
                continue
            md = _mean(pts[(topo, lf, "mindelay")]["mean"])  # type: ignore[arg-type]
            per = {v: _mean(pts[(topo, lf, v)]["mean"]) / md  # type: ignore[arg-type]
                   for v in VARIANTS if (topo, lf, v) in pts}
            sh = _mean(pts[(topo, lf, "shortest")]["mean"]) / md  # type: ignore[arg-type]
            bv = min(per, key=lambda v: per[v])
            best.append({"load": lf, "best": bv, "best_over_mindelay": per[bv],
                         "shortest_over_mindelay": sh, "per_variant": per})
        head[topo] = best
    rec: dict[str, dict[str, float]] = {}
    hit: dict[str, dict[str, bool]] = {}
    for row in scen_out:
        for k, rk in FIGS:
            if k in row:
                rec.setdefault(f"{row['topology']}|{k}", {})[row["policy"]] = row[k]
                hit.setdefault(f"{row['topology']}|{k}", {})[row["policy"]] = bool(row[rk])
    # plain's time / the variant's (one series bin at least: the resolution).  Only
    # meaningful when the variant settled in every seed; when plain did not, a lower bound
    speedups: dict[str, dict[str, dict[str, Any]]] = {}
    for k, tv in rec.items():
        if "plain" in tv:
            speedups[k] = {v: {"ratio": tv["plain"] / max(tv[v], BIN_S),
                               "kind": ("n/a" if not hit[k][v] else
                                        "exact" if hit[k]["plain"] else "lower bound")}
                           for v in VARIANTS if v in tv and v != "plain"}
    return {"steady": steady_rows, "scenarios": scen_out, "headline": head, "times": rec,
            "speedup_vs_plain": speedups, "reached": hit}


# ---- output ----------------------------------------------------------------------------------

def write_csv(path: str, rows: list[dict[str, Any]]) -> None:
    keys: list[str] = []
    for r in rows:
        keys += [k for k in r if k not in keys]
    with open(path, "w", newline="") as fh:
        w = csv.DictWriter(fh, fieldnames=keys)
        w.writeheader()
        w.writerows(rows)


#: how each policy is drawn (ours): the optimum and the static baseline dashed and wide,
#: under the learners; split last and on top, with its own marker
STYLE = {"shortest": dict(color="#1f4e9c", ls="--", lw=2.2, marker="s", zorder=2),
         "reroute": dict(color="#6f9fd8", ls="--", lw=1.8, marker="D", zorder=2),
         "mindelay": dict(color="#e07b00", ls="--", lw=3.2, marker="o", zorder=1),
         "plain": dict(color="#2e8b3a", ls="-", lw=1.2, marker=".", zorder=3),
         "full_echo": dict(color="#c0392b", ls="-", lw=1.2, marker=".", zorder=3),
         "predictive": dict(color="#8e5fb5", ls="-", lw=1.2, marker=".", zorder=3),
         "dual": dict(color="#8a5a44", ls="-", lw=1.2, marker=".", zorder=3),
         "confidence": dict(color="#d46aa8", ls="-", lw=1.2, marker=".", zorder=3),
         "split": dict(color="#111111", ls="-", lw=1.6, marker="^", zorder=4),
         "guided": dict(color="#00a6a6", ls=":", lw=2.0, marker="v", zorder=5)}


def plots(out: str, summ: dict[str, Any], scen: list[dict[str, Any]]) -> list[str]:
    """steady.png (delivery time and drops against load, per topology) and one figure per
    scenario (seed 1: delivery time and the share of packets dropped per 2 s, the link
    failure shaded), in the project's figure conventions (routerd.sim.plotstyle)."""
    from routerd.sim import plotstyle as PS

    plt = PS.pyplot()
    files = []
    topos = sorted({r["topology"] for r in summ["steady"]})
    fig, axes = plt.subplots(2, len(topos), figsize=(5 * len(topos) + 1.6, 6.4), squeeze=False,
                             sharex=True, gridspec_kw={"height_ratios": [2.2, 1]})
    for col, topo in enumerate(topos):
        ax, axd = axes[0][col], axes[1][col]
        rows_t = [r for r in summ["steady"] if r["topology"] == topo]
        for pol in BASELINES + VARIANTS:
            rows = [r for r in rows_t if r["policy"] == pol]
            if not rows:
                continue
            st = {k: v for k, v in STYLE[pol].items() if k != "marker"}
            x = [r["load"] for r in rows]
            ax.plot(x, [r["mean_delivery_ms"] for r in rows], marker=STYLE[pol]["marker"],
                    ms=5, label=pol, **st)
            axd.plot(x, [100.0 * r["lost_share"] for r in rows],
                     marker=STYLE[pol]["marker"], ms=4, **st)
        PS.ms_log_axis(ax, *PS.log_limits(r["mean_delivery_ms"] for r in rows_t))
        PS.zero_visible(axd, 1.15 * max([100.0 * r["lost_share"] for r in rows_t]
                                        + [0.5]))
        for a_ in (ax, axd):
            a_.axvline(1.0, color="grey", lw=0.8, ls=":")
            a_.grid(alpha=0.3)
        ax.set_title(topo.split("/")[-1])
        axd.set_xlabel("offered load (x shortest's saturation rate)")
        if col == 0:
            ax.set_ylabel("mean delivery time (ms, log)")
            axd.set_ylabel("lost (%): dropped or TTL")
    PS.legend_outside(axes[0][-1])
    fig.tight_layout()
    p = os.path.join(out, "steady.png")
    fig.savefig(p, dpi=80)
    plt.close(fig)
    files.append(p)
    for exp, title in (("cold", "cold start (every estimate equal)"),
                       ("spike", "congestion spike (load x2)"),
                       ("failure", "link failure and repair"),
                       ("cut", "busiest link cut and restored")):
        rs = [r for r in scen if r["exp"] == exp and r["seed"] == 1 and "series" in r]
        if not rs:
            continue
        fig, (ax, axd) = PS.time_figure(plt, 2, 6.0, ratios=(2.2, 1))
        top = 0.5
        for r in rs:
            st = {k: v for k, v in STYLE[r["label"]].items() if k != "marker"}
            t, m = rolling(r["series"])
            ax.plot(t, 1e3 * m, label=r["label"], **st)
            td = np.asarray(r["series"]["t_s"], dtype=float)
            dr = np.asarray(r["series"]["dropped"], dtype=float)
            dl = np.asarray(r["series"]["delivered"], dtype=float)
            dsum, tot = trailing_sum(dr), trailing_sum(dr + dl)   # the delays' 2-s window
            share = 100.0 * np.divide(dsum, tot, out=np.zeros_like(dsum), where=tot > 0)
            axd.plot(td, share, **st)
            top = max(top, float(share.max(initial=0.0)))
        PS.ms_log_axis(ax, *PS.log_limits(1e3 * v for r in rs for v in rolling(r["series"])[1]))
        PS.zero_visible(axd, 1.15 * top)
        links = rs[0]["spec"]["scenario"]["scenario"].get("links", [])
        events = [(float(e["at_s"]), "down" if e.get("down") else "up",
                   "-".join(e["between"])) for e in links]
        spans, _ = PS.link_spans(events, float(rs[0]["spec"]["duration_s"]))
        PS.mark_link_spans((ax, axd), spans, label_ax=ax)
        ax.set_ylabel("delivery time, 2-s rolling (ms, log)")
        axd.set_ylabel("dropped, 2-s (%)")
        axd.set_xlabel("time (s)")
        for a_ in (ax, axd):
            a_.grid(alpha=0.3)
        ax.set_title(f"{rs[0]['topology'].split('/')[-1]}: {title} (seed 1, "
                     f"{rs[0]['load']:g}x load)")
        PS.legend_outside(ax)
        p = os.path.join(out, f"{exp}.png")
        fig.savefig(p, dpi=80)
        plt.close(fig)
        files.append(p)
    return files


def _fmt_t(v: float, reached: bool) -> str:
    return f"{v:.1f}" if reached else f"> {v:.1f}"


def split_targets(summ: dict[str, Any]) -> list[dict[str, Any]]:
    """Per (policy, topology, load): split and guided split against mindelay and shortest
    (issue 14's steady aims)."""
    by = {(r["topology"], r["load"], r["policy"]): r for r in summ["steady"]}
    out = []
    for topo, lf, pol in sorted((k for k in by if k[2] in SPLITS),
                                key=lambda k: (SPLITS.index(k[2]), k)):
        r = by[(topo, lf, pol)]
        md, sh = by.get((topo, lf, "mindelay")), by.get((topo, lf, "shortest"))
        row: dict[str, Any] = {"policy": pol, "topology": topo, "load": lf, "split_ms": r["mean_delivery_ms"],
                               "loops_per_s": r["loops_prevented_per_s"]}
        if md is not None:
            row["over_mindelay"] = r["mean_delivery_ms"] / md["mean_delivery_ms"]
            row["extra_drop_pp"] = 100 * (r["lost_share"] - md["lost_share"])
            row["cv_over_mindelay"] = r["cv"] / md["cv"] if md["cv"] > 0 else math.nan
        if sh is not None:
            row["over_shortest"] = r["mean_delivery_ms"] / sh["mean_delivery_ms"]
        out.append(row)
    return out


def targets_md(summ: dict[str, Any]) -> list[str]:
    rows = split_targets(summ)
    L = ["", "## split and guided split against issue 14's steady-state aims", "",
         ("Aims: delivery <= 1.05 x mindelay; drops <= mindelay's + 0.1 percentage point; CV of "
          "the per-second delay in the second half <= 1.5 x mindelay's; at 0.2x within 2% of "
          "shortest; loop repairs per second near zero at 0.2x.  Drops here are packets dropped or "
          "expired over packets offered (those still in flight at the end are not counted).  "
          "`guided`: split mode with the live optimum seeding its shares every 2 s."), "",
         "| policy | topology | load | delivery (ms) | / mindelay | extra drops (pp) | CV / mindelay's | / shortest | loop repairs/s |",
         "|---|---|---|---|---|---|---|---|---|"]

    def f(v: Any, fmt: str, aim: float | None = None, le: bool = True) -> str:
        if v is None or not isinstance(v, float) or not math.isfinite(v):
            return "-"
        txt = format(v, fmt)
        if aim is not None and not (v <= aim if le else v >= aim):
            txt += " (missed)"
        return txt

    for r in rows:
        L.append(f"| {r['policy']} | {r['topology']} | {r['load']:.2f} | {r['split_ms']:.1f} | "
                 f"{f(r.get('over_mindelay'), '.3f', 1.05)} | {f(r.get('extra_drop_pp'), '.2f', 0.1)} | "
                 f"{f(r.get('cv_over_mindelay'), '.2f', 1.5)} | "
                 f"{f(r.get('over_shortest'), '.3f', 1.02 if r['load'] <= 0.2 else None)} | "
                 f"{r['loops_per_s']:.1f} |")
    L.append("")
    for pol in SPLITS:
        mine = [r for r in rows if r["policy"] == pol]
        met = sum(1 for r in mine if r.get("over_mindelay", math.inf) <= 1.05)
        L.append(f"{pol} within 1.05 x mindelay at {met} of {len(mine)} points "
                 "(points where mindelay is infeasible have no ratio).  ")
    L.append("")
    return L


def report_md(out: str, summ: dict[str, Any], meta: dict[str, Any]) -> str:
    L = ["# Engine variants against mindelay and shortest", "",
         (f"Generated by `bench/compare_variants.py` ({meta['mode']}; {meta['wall_s']:.0f} s wall, "
         f"{meta['runs']} simulations, seeds 1..{meta['seeds']}).  Every link at "
         f"{CAPACITY_BPS / 1e6:g} Mb/s (`capacity_bps`; the topohub files give none), "
         f"{BUFFER_PKTS}-packet buffers (the files give none either), {PACKET_BYTES:g}-byte packets, the topologies' own demand matrices."), ""]
    L += ["| topology | shortest saturates at (packets/s) | busiest link | mindelay feasible up to (x) |",
          "|---|---|---|---|"]
    for k, i in meta["topologies"].items():
        L.append(f"| {k} | {i['sat_pps']:.0f} | {i['busiest']} | {i['mindelay_limit']:.2f} |")
    L += ["", "## Headline: at loads where shortest saturates (load >= 1)", "",
          "| topology | load | best variant | best / mindelay | shortest / mindelay | all variants / mindelay |",
          "|---|---|---|---|---|---|"]
    for topo, rows in summ["headline"].items():
        for r in rows:
            per = ", ".join(f"{v} {x:.2f}" for v, x in r["per_variant"].items())
            L.append(f"| {topo} | {r['load']:.2f} | {r['best']} | {r['best_over_mindelay']:.3f} | "
                     f"{r['shortest_over_mindelay']:.2f} | {per} |")
    L += ["", "Aim: best variant within 15% of mindelay (ratio <= 1.15).", "",
          "## Steady state (mean delivery ms / delivery ratio / share sent off the greedy hop)", ""]
    topos = sorted({r["topology"] for r in summ["steady"]})
    pols = ("shortest", "mindelay") + VARIANTS
    for topo in topos:
        L += [f"### {topo}", "", "| load | " + " | ".join(pols) + " |", "|---" * (len(pols) + 1) + "|"]
        for lf in sorted({r["load"] for r in summ["steady"] if r["topology"] == topo}):
            cells = []
            for p in pols:
                r = next((r for r in summ["steady"] if r["topology"] == topo and r["load"] == lf
                          and r["policy"] == p), None)
                if r is None:
                    cells.append("infeasible" if p == "mindelay" else "-")
                else:
                    off = f" / {100 * r['off_greedy_share']:.1f}%" if p in VARIANTS else ""
                    cells.append(f"{r['mean_delivery_ms']:.1f} / {r['delivery_ratio']:.3f}{off}")
            L.append(f"| {lf:.2f} | " + " | ".join(cells) + " |")
        L.append("")
    L += ["![steady](steady.png)", "", "## Scenarios (seconds; `>` = not reached before the end)", ""]
    L += ["| topology | scenario | policy | figure | time (s) | speed-up vs plain | delivery ratio (whole run) | lost to the dead link |",
          "|---|---|---|---|---|---|---|---|"]
    for row in summ["scenarios"]:
        for k, rk in FIGS:
            if k in row:
                sp = summ["speedup_vs_plain"].get(f"{row['topology']}|{k}", {}).get(row["policy"])
                sps = ("" if sp is None else "n/a (did not settle)" if sp["kind"] == "n/a"
                       else f">= {sp['ratio']:.2f}x" if sp["kind"] == "lower bound"
                       else f"{sp['ratio']:.2f}x")
                L.append(f"| {row['topology']} | {row['scenario']} | {row['policy']} | {k} | "
                         f"{_fmt_t(row[k], bool(row[rk]))} | {sps} | {row['delivery_ratio']:.3f} | "
                         f"{row.get('lost_link_down', 0.0):.0f} |")
    cuts = [r for r in summ["scenarios"] if r["scenario"] == "cut"]
    if cuts:
        L += ["", (f"### The busiest link cut at {CUT_LOAD:g}x and restored 15 s later "
                   "(a load the network without it can carry)"), "",
              ("Aims: no loss beyond what was queued on the link (at most two 64-packet "
               "buffers); within 10% of the optimum recomputed without the link within 5 s; "
               "back within 10% of the level before within 5 s of the repair."), "",
              "| policy | lost to the dead link | delivery during / optimum without the link | settled to it (s) | back after repair (s) |",
              "|---|---|---|---|---|"]
        for r in cuts:
            L.append(f"| {r['policy']} | {r.get('lost_link_down', 0.0):.0f} | "
                     f"{r.get('during_over_optimum', math.nan):.2f} | "
                     f"{_fmt_t(r['cut_settle_s'], bool(r['cut_settle_reached']))} | "
                     f"{_fmt_t(r['cut_back_s'], bool(r['cut_back_reached']))} |")
    L += ["", "## Against the aims (computed from the tables above)", ""]
    for topo, rows in summ["headline"].items():
        for r in rows:
            ok = r["best_over_mindelay"] <= 1.15
            L.append(f"- {topo} at {r['load']:.2f}x: best variant {r['best']} at "
                     f"{r['best_over_mindelay']:.3f}x mindelay — {'met' if ok else 'NOT met'} (aim <= 1.15).")
    for k, d in sorted(summ["speedup_vs_plain"].items()):
        topo, fig = k.split("|")
        fast = [f"{v} {x['ratio']:.1f}x{' (lower bound)' if x['kind'] == 'lower bound' else ''}"
                for v, x in d.items() if x["kind"] != "n/a" and x["ratio"] >= 2.0]
        L.append(f"- {topo} {fig}: >= 2x faster than plain: {', '.join(fast) if fast else 'none'}.")
    L += ["", ("`shortest` never reroutes: during the outage it drops what it sends onto the dead "
          "link, so its delivery time there counts only the packets that avoid it (see its "
          "delivery ratio).  `reroute` is the honest baseline: delay-shortest paths recomputed "
          "over the live links 0.3 s after each link event (`sim.reroute.detect_s`).")]
    L += ["", "![cold](cold.png)", "", "![spike](spike.png)", "", "![failure](failure.png)", "", "![cut](cut.png)", "",
          ("Definitions: see the module docstring of `bench/compare_variants.py`.  Times are "
          "means over seeds; a run that never settles counts as the rest of its run."), ""]
    L += targets_md(summ)
    p = os.path.join(out, "report.md")
    with open(p, "w") as fh:
        fh.write("\n".join(L))
    return p


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="compare_variants", description=__doc__.split("\n")[0])
    ap.add_argument("--out", default=os.path.join(os.path.dirname(os.path.abspath(__file__)),
                                                  "reports", "variants"))
    ap.add_argument("--quick", action="store_true", help="abilene only, short runs, 3 loads")
    ap.add_argument("--jobs", type=int, default=2)
    ap.add_argument("--seeds", type=int, default=3)
    ap.add_argument("--duration", type=float, default=30.0, help="seconds per steady run (default 30)")
    a = ap.parse_args(argv)
    if a.jobs < 1 or a.seeds < 1:
        ap.error("--jobs and --seeds must be at least 1")
    t0 = time.perf_counter()
    os.makedirs(a.out, exist_ok=True)
    keys = TOPOLOGIES[:1] if a.quick else TOPOLOGIES
    topos: dict[str, dict[str, Any]] = {}
    for k in keys:
        topos[k] = topology_info(k)
        print(f"{k}: shortest saturates at {topos[k]['sat_pps']:.0f} packets/s; mindelay feasible to "
              f"x{topos[k]['mindelay_limit']:.2f}", file=sys.stderr)
    loads = (0.2, 0.9, 1.2) if a.quick else LOADS
    scale = 0.5 if a.quick else 1.0
    steady = run_jobs(steady_jobs(topos, loads, 12.0 if a.quick else a.duration, 1 if a.quick else a.seeds), a.jobs)
    print(f"steady state done ({time.perf_counter() - t0:.0f} s)", file=sys.stderr)
    scen = run_jobs(scenario_jobs(keys[0], topos[keys[0]], 1 if a.quick else a.seeds, scale), a.jobs)
    errors = [r for r in steady + scen if "error" in r]
    summ = summarise(steady, scen, topos, scale)
    meta = {"mode": "quick" if a.quick else "full", "wall_s": time.perf_counter() - t0,
            "runs": len(steady) + len(scen), "seeds": 1 if a.quick else a.seeds,
            "topologies": {k: {kk: v for kk, v in i.items() if kk != "topo"} for k, i in topos.items()},
            "errors": [{"label": r["label"], "exp": r["exp"], "error": r["error"]} for r in errors]}
    write_csv(os.path.join(a.out, "steady.csv"), summ["steady"])
    write_csv(os.path.join(a.out, "scenarios.csv"), summ["scenarios"])
    with open(os.path.join(a.out, "report.json"), "w") as fh:
        json.dump({"meta": meta, **summ}, fh, indent=1, default=float)
    plots(a.out, summ, scen)
    p = report_md(a.out, summ, meta)
    print(p)
    for e in errors:
        print(f"error: {e['exp']} {e['label']}: {e['error']}", file=sys.stderr)
    return 1 if errors else 0


if __name__ == "__main__":
    raise SystemExit(main())
