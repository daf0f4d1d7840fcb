"""Engine variants against the optimum and against plain Q-routing, measured in one run.

Figures (every ratio between runs of this same call, same machine, same seeds):

* ``variants_best_over_mindelay`` — the best variant's mean delivery time on topohub's
  SNDlib abilene (its demand matrix, 2 Mb/s links) at the load where ``shortest``
  saturates, divided by ``mindelay``'s (the flow-deviation optimum) in the same run;
  aim <= 1.15;
* ``variants_cold_start_speedup`` — plain's time to settle within 10% of its steady
  delivery time from a cold start, divided by the fastest variant's (aim >= 2);
* ``variants_spike_recovery_speedup`` — the same for the return within 5% of the
  pre-spike delivery time after a x2 congestion spike ends;
* ``variants_<name>_rows_per_s`` — ``Engine.observe`` throughput of each variant with its
  own rule (rows one by one in Python) on abilene, against the plain core's vectorised
  path on the same rows (best of 3 trials each, interleaved).

Definitions and the report: ``bench/compare_variants.py``.  Quick: every variant but
full_echo, runs at half length (< 20 s on 2 cores; the spike and cold-start times are
then often "never settled", reported as lower bounds); otherwise every variant.
"""
from __future__ import annotations

import os
import sys
from typing import Any

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))

import time

import numpy as np

import compare_variants as C
from routerd.core.engine import Engine, EngineSettings, HopBatch
from routerd.core.topology import Topology


def observe_rates(t: Topology, rows: int) -> dict[str, float]:
    """Rows/s of Engine.observe per variant on the same random batches (best of 3)."""
    rng = np.random.default_rng(5)
    ks = rng.integers(0, t.n_links, rows)
    xs, ys = t.src[ks], t.dst[ks]
    ds = rng.integers(0, t.n, rows)
    ok = xs != ds
    b = HopBatch.of(xs[ok], ys[ok], ds[ok], rng.uniform(1e-3, 2e-2, int(ok.sum())))
    chunks = [b.take(np.arange(i, min(len(b), i + 512))) for i in range(0, len(b), 512)]
    best: dict[str, float] = {}
    for _ in range(3):
        for v in ("plain", "full_echo", "predictive", "confidence"):
            e = Engine(t, EngineSettings(mode="greedy", variant=v))
            t0 = time.perf_counter()
            for i, c in enumerate(chunks):
                e.observe(c, now=0.01 * i)
            el = time.perf_counter() - t0
            best[v] = max(best.get(v, 0.0), len(b) / el)
    return best


def run(quick: bool) -> dict[str, dict[str, Any]]:
    key = C.TOPOLOGIES[0]
    # only load 1x runs here: mindelay's feasibility there, not how far above it stays so
    info = C.topology_info(key, limit_steps=0)
    variants = ("plain", "predictive", "dual", "confidence") if quick else C.VARIANTS
    dur, scale = (8.0, 0.5) if quick else (30.0, 1.0)
    steady = [j for j in C.steady_jobs({key: info}, (1.0,), dur, 1)
              if j["label"] in variants + ("mindelay",)]
    scen = [j for j in C.scenario_jobs(key, info, 1, scale)
            if j["label"] in variants and j["exp"] in ("cold", "spike")]
    res = C.run_jobs(steady + scen, 2)
    bad = [r for r in res if "error" in r]
    if bad:
        raise RuntimeError(f"{bad[0]['label']} {bad[0]['exp']}: {bad[0]['error']}")
    md = next(r for r in res if r["exp"] == "steady" and r["label"] == "mindelay")
    md_ms = 1e3 * md["summary"]["mean_delivery_s"]
    per = {r["label"]: 1e3 * r["summary"]["mean_delivery_s"]
           for r in res if r["exp"] == "steady" and r["label"] in variants}
    best = min(per, key=lambda v: per[v])
    out: dict[str, dict[str, Any]] = {
        "variants_best_over_mindelay": {
            "value": per[best], "unit": "ms", "ratio": per[best] / md_ms,
            "against": f"mindelay {md_ms:.1f} ms, same run ({key}, {info['sat_pps']:.0f} packets/s = "
                       f"shortest's saturation; best: {best})"}}
    for exp, fig, name in (("cold", "learn_s", "variants_cold_start_speedup"),
                           ("spike", "spike_recovery_s", "variants_spike_recovery_speedup")):
        figs = {r["label"]: C.scenario_figures(r, scale) for r in res if r["exp"] == exp}
        ts = {v: f[fig] for v, f in figs.items()}
        reached = {v: next(x for k, x in f.items() if k.endswith("_reached")) for v, f in figs.items()}
        others = {v: t for v, t in ts.items() if v != "plain"}
        fast = min(others, key=lambda v: others[v])
        tb = max(others[fast], C.BIN_S)   # one series bin: the resolution
        note = "" if reached["plain"] else " (plain never settled: the ratio is a lower bound)"
        out[name] = {"value": others[fast], "unit": "s", "ratio": ts["plain"] / tb,
                     "against": f"plain Q-routing {ts['plain']:.1f} s, same run (fastest: {fast}){note}"}
    rates = observe_rates(info["topo"], 20_000 if quick else 100_000)
    for v in ("full_echo", "predictive", "confidence"):
        out[f"variants_{v}_rows_per_s"] = {
            "value": rates[v], "unit": "rows/s", "ratio": rates[v] / rates["plain"],
            "against": f"plain core {rates['plain']:.0f} rows/s on the same batches of 512 ({key})"}
    return out


if __name__ == "__main__":
    import json

    print(json.dumps(run("--quick" in sys.argv), indent=1))
