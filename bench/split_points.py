"""Split mode at chosen (topology, load) points of the variants report, against mindelay.

Usage: ``python bench/split_points.py [--points TOPO:LOAD ...] [--seeds N] [--jobs N]
[--cold] [--cut] [--set KEY=VALUE ...] [--cache FILE]``

The same runs as ``bench/compare_variants.py``'s steady grid (its topologies, specs,
``one`` and its CV definition), for ``split`` and ``mindelay`` only, so a change to the
split mode can be measured where it misses issue 14's targets without regenerating the
whole report.  mindelay's runs do not depend on the engine and are cached (``--cache``,
JSON keyed by topology, load, seed and duration).  ``--cold`` adds the report's cold
start (``cold``, 1.2x, 40 s: seconds until the 2-s rolling mean is within 10% of the
last third's level and stays there for 3 s), beside the same figure of mindelay's run of
the same scenario: the static optimum from the first packet learns nothing, so its time is
the definition's floor (queues filling, the rolling mean's noise around its own last
third; measured up to 28 s on the geometric graph); ``--cut`` the report's busiest-link cut and
restore (``cut``, 0.5x: seconds to settle within 10% of the optimum without the link,
seconds back within 10% of the level before, packets lost to the dead link).  ``--set`` passes engine overrides to split.
Prints one line per point: split / mindelay mean delivery, drop shares, CV ratio.
"""
from __future__ import annotations

import argparse
import json
import os
import sys
from typing import Any

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))

import compare_variants as C

MISSED = ("ours:two-clusters:1.0", "ours:two-clusters:1.2", "ours:geometric:1.0",
          "ours:geometric:1.2", "topohub:sndlib/geant:1.2")


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="split_points", description=__doc__.split("\n")[0])
    ap.add_argument("--points", nargs="*", default=list(MISSED))
    ap.add_argument("--seeds", type=int, default=3)
    ap.add_argument("--jobs", type=int, default=1)
    ap.add_argument("--duration", type=float, default=30.0)
    ap.add_argument("--cold", action="store_true")
    ap.add_argument("--cut", action="store_true")
    ap.add_argument("--set", dest="overrides", action="append", default=[])
    ap.add_argument("--cache", default="/tmp/split_points_mindelay.json")
    a = ap.parse_args(argv)
    pts = [(p.rsplit(":", 1)[0], float(p.rsplit(":", 1)[1])) for p in a.points]
    infos: dict[str, dict[str, Any]] = {}
    for key in {k for k, _ in pts}:
        topo = C.load_topology(key)
        dem = C.uses_demands(key)
        sat, link = C.shortest_saturation_pps(topo, dem)
        infos[key] = {"topo": topo, "sat_pps": sat, "busiest_link": link, "demands": dem,
                      "mindelay_limit": 9.0}
    cache: dict[str, Any] = {}
    if os.path.exists(a.cache):
        with open(a.cache) as fh:
            cache = json.load(fh)
    jobs = []
    for key, lf in pts:
        for j in C.steady_jobs({key: infos[key]}, (lf,), a.duration, a.seeds):
            if j["label"] == "split":
                j["spec"]["overrides"] = list(a.overrides)
                jobs.append(j)
            elif j["label"] == "mindelay" and f"{key}|{lf}|{j['seed']}|{a.duration}" not in cache:
                jobs.append(j)
    scen = (("cold",) if a.cold else ()) + (("cut",) if a.cut else ())
    if scen:
        for key in dict.fromkeys(k for k, _ in pts):
            for j in C.scenario_jobs(key, infos[key], a.seeds, 1.0):
                if j["exp"] in scen and j["label"] == "split":
                    j["spec"]["overrides"] = list(j["spec"]["overrides"]) + list(a.overrides)
                    jobs.append(j)
                    if j["exp"] == "cold":
                        # the same run under the static optimum: the definition's own floor
                        # (the rolling mean's noise and the queues' first fill), no learning
                        jobs.append({**j, "label": "mindelay",
                                     "spec": {**j["spec"], "overrides": []}})
    res = C.run_jobs(jobs, a.jobs)
    for r in res:
        if "error" in r:
            print(f"error: {r['topology']} {r['load']} {r['label']}: {r['error']}")
        elif r["label"] == "mindelay" and r["exp"] == "steady":
            cache[f"{r['topology']}|{r['load']}|{r['seed']}|{a.duration}"] = {
                "mean": r["summary"]["mean_delivery_s"], "drop": r["drop_share"], "cv": r["cv"]}
    with open(a.cache, "w") as fh:
        json.dump(cache, fh)
    worst = 0.0
    for key, lf in pts:
        sp = [r for r in res if r["label"] == "split" and r["exp"] == "steady"
              and r["topology"] == key and r["load"] == lf and "error" not in r]
        md = [cache[f"{key}|{lf}|{s}|{a.duration}"] for s in range(1, a.seeds + 1)]
        if not sp:
            continue
        m_sp = C._mean([r["summary"]["mean_delivery_s"] for r in sp])
        m_md = C._mean([m["mean"] for m in md])
        cv_sp = C._mean([r["cv"] for r in sp])
        cv_md = C._mean([m["cv"] for m in md])
        dr_sp = C._mean([r["drop_share"] for r in sp])
        dr_md = C._mean([m["drop"] for m in md])
        worst = max(worst, m_sp / m_md)
        print(f"{key} {lf:.1f}: split {1e3 * m_sp:.1f} ms / mindelay {1e3 * m_md:.1f} ms = "
              f"{m_sp / m_md:.3f} (<= 1.05); drops {100 * dr_sp:.2f}% vs {100 * dr_md:.2f}% "
              f"(+{100 * (dr_sp - dr_md):.2f} pp, <= 0.1); CV {cv_sp:.3f} / {cv_md:.3f} = "
              f"{cv_sp / cv_md:.2f} (<= 1.5); per seed "
              + " ".join(f"{1e3 * r['summary']['mean_delivery_s']:.1f}" for r in sp))
    floor = {(r["topology"], r["seed"]): C._scenario_times(r, 1.0) for r in res
             if r["exp"] == "cold" and r["label"] == "mindelay" and "error" not in r}
    for r in res:
        if r["exp"] == "cold" and r["label"] == "split" and "error" not in r:
            f = C._scenario_times(r, 1.0)
            o = floor.get((r["topology"], r["seed"]))
            print(f"cold {r['topology']} seed {r['seed']}: within 10% after {f['learn_s']:.1f} s "
                  f"(reached {f['learn_reached']}; steady {1e3 * f['steady_s']:.1f} ms)"
                  + (f"; mindelay's own run {o['learn_s']:.1f} s (steady "
                     f"{1e3 * o['steady_s']:.1f} ms)" if o else ""))
    for r in res:
        if r["exp"] == "cut" and "error" not in r:
            f = C.scenario_figures(r, 1.0)
            print(f"cut {r['topology']} seed {r['seed']}: settle {f['cut_settle_s']:.1f} s "
                  f"(reached {f['cut_settle_reached']}), back {f['cut_back_s']:.1f} s "
                  f"(reached {f['cut_back_reached']}), lost {f['lost_link_down']:.0f}; during "
                  f"{f['during_over_optimum']:.3f} x the optimum without the link")
    print(f"worst split/mindelay: {worst:.3f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
