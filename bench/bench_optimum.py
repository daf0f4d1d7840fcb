"""The live optimality gap's costs (issue 14 part B): one optimiser run, and the meter on ingest.

``python bench/bench_optimum.py [--quick]``.  Graphs of our own (``bench_engine``'s ring with
as many random chords as nodes, 1 Gb/s links, 1,000-byte packets), a random demand scaled so
that delay-shortest paths load the busiest link to 0.9, the published tables of a fresh
greedy engine:

* ``optimum_run_s_n{16,100,300}`` (quick: 16 and 100): one :func:`routerd.service.optimum.compute`
  (flow deviation within the default 1 s budget, plus the published routing's model delay);
  the ratio is that time over the default ``engine.optimum.interval_s`` — the share of one
  core the runner's child takes at the default interval;
* ``optimum_meter_ns_per_row_n100``: counting one 4,096-row batch record
  (:meth:`Meter.add_record`), the ratio against the engine's own ``observe`` of the same batch
  measured in the same run (best of several trials each: the machine is shared).

1,000 nodes is not run here: a run takes about 19 s (README, "The live optimality gap"),
beyond ``engine.optimum.max_nodes``.  Also importable: ``run(quick) -> dict`` for
``bench/run.py``.
"""
from __future__ import annotations

import argparse
import json
import os
import sys
import time

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))


def _case(n: int) -> tuple[object, object, np.ndarray]:
    from bench_engine import ring_with_chords
    from routerd.core import flowdev
    from routerd.core.engine import Engine, EngineSettings

    t = ring_with_chords(n, n, seed=n)
    cap = t.capacity_bps / 8000.0
    rng = np.random.default_rng(n)
    dem = rng.uniform(0.0, 1.0, (n, n))
    np.fill_diagonal(dem, 0.0)
    sp = flowdev.flow_deviation(n, t.src, t.dst, cap, t.delay_s, dem, max_iter=0)
    return t, Engine(t, EngineSettings(mode="greedy")), dem * (0.9 / sp.max_utilisation)


def run(quick: bool = False) -> dict[str, dict]:
    from routerd.core.engine import HopBatch
    from routerd.io import config, journal
    from routerd.service import optimum as O

    cfg = config.load(None)
    interval = float(cfg["engine.optimum.interval_s"])
    budget = float(cfg["engine.optimum.budget_s"])
    out: dict[str, dict] = {}
    for n in ((16, 100) if quick else (16, 100, 300)):
        t, eng, dem = _case(n)
        job = O.inputs_for(t, eng.published_shares(), eng.live & eng._present, dem, 1000.0,
                           eng.owned)
        best = None
        for _ in range(1 if n >= 300 else 3):
            r = O.compute(job, budget)
            if best is None or r["run_s"] < best["run_s"]:
                best = r
        assert best is not None
        out[f"optimum_run_s_n{n}"] = {
            "value": round(best["run_s"], 4), "unit": "s", "ratio": round(best["run_s"] / interval, 4),
            "against": f"engine.optimum.interval_s default ({interval:g} s): share of one core",
            "iterations": best["iterations"], "rel_gap": best["rel_gap"],
            "converged": best["converged"], "gap_ratio": best["published_delay_s"] / best["optimal_delay_s"]}
    t, eng, _ = _case(100)
    rng = np.random.default_rng(0)
    B = 4096
    k = rng.integers(0, t.n_links, B)
    hb = HopBatch.of(t.src[k], t.dst[k], rng.integers(0, t.n, B), t.delay_s[k] * 2)
    body = journal.batch_body("r", 1, 0.0, hb)
    meter = O.Meter(t)
    m = e = float("inf")
    for i in range(20):
        t0 = time.perf_counter()
        meter.add_record(body)
        m = min(m, time.perf_counter() - t0)
        t0 = time.perf_counter()
        eng.observe(hb, now=float(i))
        e = min(e, time.perf_counter() - t0)
    out["optimum_meter_ns_per_row_n100"] = {
        "value": round(m / B * 1e9, 1), "unit": "ns/row", "ratio": round(m / e, 3),
        "against": "Engine.observe of the same 4,096-row batch (same run)"}
    return out


if __name__ == "__main__":
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true")
    a = ap.parse_args()
    print(json.dumps(run(a.quick), indent=1))
