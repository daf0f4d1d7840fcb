"""Bounded split decisions (``engine.split.destinations_per_decision``): what they save and
what they cost, against ``mindelay`` in the same runs.

Usage: ``python bench/split_blocks.py [--topologies KEY ...] [--loads X ...] [--fractions F ...]
[--seeds N] [--duration S] [--jobs N] [--steady-only] [--out FILE]``

For each topology, load (x shortest's saturation, as in ``bench/compare_variants.py``) and
fraction f of the destinations a decision takes (1 = all, the default config; f < 1 sets
``destinations_per_decision`` to ceil(f n)), the default learner (guided split) runs the
variants report's steady scenario (``--size-dist exp``, its link capacities, buffers and
warm-up) for each seed, beside ``mindelay`` on the same seeds.  Per point: mean delivery
over mindelay's, drop shares, the coefficient of variation of per-second delay (second
half) over mindelay's, and the CPU seconds the learner's run took per simulated second
(``time.process_time`` in the worker: the whole simulation, packets included).  With the
cut scenario (the report's busiest-link cut and restore at 0.5x, default on): packets lost
to the dead link and seconds to settle within 10% of the optimum without it, beside the
rerouting baseline (``reroute``) in the same scenario; and the
report's cold start (1.2x, 40 s: seconds until the 2-s rolling mean is within 10% of the
last third's level for good); ``--steady-only`` leaves both out.

Topologies: topohub's SNDlib backbones with their demand matrices (germany50: 50 nodes,
ta2: 65; geant: 22), the larger networks where a decision's cost matters.
"""
from __future__ import annotations

import argparse
import math
import multiprocessing as mp
import os
import sys
import time
from collections.abc import Callable
from concurrent.futures import ProcessPoolExecutor
from typing import Any

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))

import compare_variants as C

TOPOLOGIES = ("topohub:sndlib/geant", "topohub:sndlib/germany50", "topohub:sndlib/ta2")
KEY = "engine.split.destinations_per_decision"


def _timed(job: dict[str, Any]) -> dict[str, Any]:
    t0 = time.process_time()
    out = C.one(job)
    out["cpu_s"] = time.process_time() - t0
    return out


def per_of(frac: float, n: int) -> int:
    """destinations_per_decision for a fraction of n (0: all)."""
    return 0 if frac >= 1.0 else max(1, math.ceil(frac * n))


def _scenario_table(ok: list[dict[str, Any]], exp: str, topologies: list[str],
                    fractions: list[float], infos: dict[str, dict[str, Any]], head: str,
                    cells: Callable[[list[dict[str, Any]]], list[str]]) -> list[str]:
    """A markdown table of scenario ``exp``'s runs: a row per (topology, fraction) with
    runs, its columns after the first two ``head`` (``|``-separated) and ``cells(runs)``."""
    runs = [r for r in ok if r["exp"] == exp]
    if not runs:
        return []
    cols = head.count("|") + 1
    out = ["", f"| topology | destinations a decision | {head} |", "|---" * (cols + 2) + "|"]
    for key in topologies:
        n = infos[key]["topo"].n
        rows: list[tuple[str, list[dict[str, Any]]]] = [
            (str(per_of(f, n) or n), [r for r in runs if r["topology"] == key and r.get("frac") == f])
            for f in fractions]
        rows.append(("reroute (baseline)", [r for r in runs if r["topology"] == key
                                            and r["label"] == "reroute"]))
        for what, rs in rows:
            if rs:
                out.append(f"| {key.split(':')[-1]} | {what} | " + " | ".join(cells(rs)) + " |")
    return out


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="split_blocks", description=__doc__.split("\n")[0])
    ap.add_argument("--topologies", nargs="*", default=list(TOPOLOGIES))
    ap.add_argument("--loads", nargs="*", type=float, default=[0.9, 1.2])
    ap.add_argument("--fractions", nargs="*", type=float, default=[1.0, 0.25, 0.125])
    ap.add_argument("--seeds", type=int, default=3)
    ap.add_argument("--duration", type=float, default=30.0)
    ap.add_argument("--jobs", type=int, default=2)
    ap.add_argument("--steady-only", action="store_true",
                    help="leave out the cut and cold-start scenarios")
    ap.add_argument("--out", default="")
    a = ap.parse_args(argv)
    infos: dict[str, dict[str, Any]] = {}
    for key in a.topologies:
        topo = C.load_topology(key)
        dem = C.uses_demands(key)
        sat, link = C.shortest_saturation_pps(topo, dem)
        infos[key] = {"topo": topo, "sat_pps": sat, "busiest_link": link, "demands": dem,
                      "mindelay_limit": 9.0}
    jobs: list[dict[str, Any]] = []
    for key in a.topologies:
        n = infos[key]["topo"].n
        for j in C.steady_jobs({key: infos[key]}, tuple(a.loads), a.duration, a.seeds):
            if j["label"] == "mindelay":
                jobs.append(j)
            elif j["label"] == "guided":
                for f in a.fractions:
                    jobs.append({**j, "frac": f, "spec": {**j["spec"], "overrides": [
                        f"{KEY}={per_of(f, n)}"]}})
        if not a.steady_only:
            for j in C.scenario_jobs(key, infos[key], a.seeds, 1.0):
                if j["exp"] == "cut" and j["label"] == "reroute":   # the rerouting baseline
                    jobs.append(j)
                if j["exp"] in ("cut", "cold") and j["label"] == "guided":
                    for f in a.fractions:
                        jobs.append({**j, "frac": f, "spec": {**j["spec"], "overrides": list(
                            j["spec"].get("overrides", ())) + [f"{KEY}={per_of(f, n)}"]}})
    t0 = time.perf_counter()
    with ProcessPoolExecutor(max_workers=max(1, a.jobs), mp_context=mp.get_context("fork")) as pool:
        res = list(pool.map(_timed, jobs))
    wall = time.perf_counter() - t0
    lines = [(f"# Bounded split decisions against mindelay ({a.seeds} seeds, {a.duration:g} s, "
              f"--size-dist exp, guided split; {wall:.0f} s wall)"), "",
             ("| topology | n | load | destinations a decision | mean / mindelay "
              "| drops split / mindelay | CV / mindelay's | CPU s per simulated s |"),
             "|---|---|---|---|---|---|---|---|"]
    errors = [r for r in res if "error" in r]
    for r in errors:
        lines.append(f"error: {r['topology']} {r['load']} {r['label']}: {r['error']}")
    ok = [r for r in res if "error" not in r]
    for key in a.topologies:
        n = infos[key]["topo"].n
        for lf in a.loads:
            md = [r for r in ok if r["exp"] == "steady" and r["label"] == "mindelay"
                  and r["topology"] == key and r["load"] == lf]
            m_md = C._mean([r["summary"]["mean_delivery_s"] for r in md])
            for f in a.fractions:
                sp = [r for r in ok if r["exp"] == "steady" and r.get("frac") == f
                      and r["topology"] == key and r["load"] == lf]
                if not sp or not md:
                    continue
                m_sp = C._mean([r["summary"]["mean_delivery_s"] for r in sp])
                cv = C._mean([r["cv"] for r in sp]) / C._mean([r["cv"] for r in md])
                dr_sp = C._mean([r["drop_share"] for r in sp])
                dr_md = C._mean([r["drop_share"] for r in md])
                cpu = C._mean([r["cpu_s"] / a.duration for r in sp])
                per = per_of(f, n)
                lines.append(f"| {key.split(':')[-1]} | {n} | {lf:g}x | {per or n} "
                             f"| {m_sp / m_md:.3f} | {100 * dr_sp:.2f}% / {100 * dr_md:.2f}% "
                             f"| {cv:.2f} | {cpu:.3f} |")
    lines += _scenario_table(
        ok, "cold", a.topologies, a.fractions, infos,
        "cold start (1.2x): s until within 10% of the last third's level for good, per seed",
        lambda rs: [" ".join(f"{g['learn_s']:.1f}{'' if g['learn_reached'] else ' (not reached)'}"
                             for g in (C._scenario_times(r, 1.0) for r in rs))])
    lines += _scenario_table(
        ok, "cut", a.topologies, a.fractions, infos,
        "lost to the dead link (per seed) | settle within 10% of the optimum without it, s",
        lambda rs: [" ".join(f"{g['lost_link_down']:.0f}" for g in figs)
                    + " | " + " ".join(f"{g['cut_settle_s']:.1f}" for g in figs)
                    for figs in [[C.scenario_figures(r, 1.0) for r in rs]]])
    text = "\n".join(lines) + "\n"
    print(text)
    if a.out:
        with open(a.out, "w") as fh:
            fh.write(text)
    return 1 if errors else 0


if __name__ == "__main__":
    raise SystemExit(main())
