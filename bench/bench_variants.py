"""Engine variants against the optimum and against plain Q-routing, measured in one run.

Figures (every ratio between runs of this same call, same machine, same seeds):

* ``variants_best_over_mindelay`` — the best variant's mean delivery time on topohub's
  SNDlib abilene (its demand matrix, 2 Mb/s links) at the load where ``shortest``
  saturates, divided by ``mindelay``'s (the flow-deviation optimum) in the same run;
  aim <= 1.15;
* ``variants_cold_start_speedup`` — plain's time to settle within 10% of its steady
  delivery time from a cold start, divided by the fastest variant's (aim >= 2);
* ``variants_spike_recovery_speedup`` — the same for the return within 5% of the
  pre-spike delivery time after a x2 congestion spike ends.

Definitions and the report: ``bench/compare_variants.py``.  Quick: plain, predictive
and confidence only, short runs (< 20 s on 2 cores); otherwise every variant.
"""
from __future__ import annotations

import os
import sys
from typing import Any

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))

import compare_variants as C


def run(quick: bool) -> dict[str, dict[str, Any]]:
    key = C.TOPOLOGIES[0]
    topo = C.load_topology(key)
    sat, link = C.shortest_saturation_pps(topo)
    info = {"topo": topo, "sat_pps": sat, "busiest_link": link, "mindelay_limit": 1.0}
    variants = ("plain", "predictive", "confidence") if quick else C.VARIANTS
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
            "against": f"mindelay {md_ms:.1f} ms, same run ({key}, {sat:.0f} packets/s = "
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
    return out


if __name__ == "__main__":
    import json

    print(json.dumps(run("--quick" in sys.argv), indent=1))
