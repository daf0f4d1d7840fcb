"""Memory bounds (issue 13 item 4, issue 15): RSS growth after many updates of one entry,
and where a 1,000-node engine's memory goes.

``python bench/bench_memory.py [--quick] [--updates N]`` applies N updates to one Q entry
(engine defaults, 64-row batches of the same (x, d, y), the vector path, plus single-row
calls, the scalar path) and reports the process's peak RSS increase (``ru_maxrss``) and
the longest single call.  The ratio is against the RSS increase of the same loop on a
second, fresh engine's first 10 % of the updates, measured in the same run: a bounded
table makes it ~1.

``engine_peak_mb_n1000``: in a fresh process, the peak RSS (VmHWM) a 1,000-node engine
(bench_engine's ring with 1,000 chords, K = 11, defaults) adds over the imports, through
construction, 50 random 1,000-row batches and decisions and one decision with every
destination due; ratio to the bytes of ``Q`` (float64, the one array that cannot be
narrower), with every engine array's MB beside it (``arrays_mb``).

Also importable: ``run(quick) -> dict`` for ``bench/run.py``.
"""
from __future__ import annotations

import argparse
import json
import resource
import time

import numpy as np


def _rss_mb() -> float:
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 1024
    return float("nan")


def _hammer(updates: int) -> tuple[float, float]:
    from routerd.core.engine import Engine, EngineSettings, HopBatch
    from routerd.core.topology import from_mapping

    topo = from_mapping({"topology": {"name": "three", "nodes": ["a", "b", "c"], "defaults": {"capacity_bps": 1e7, "buffer_pkts": 50}, "links": [
        {"between": ["a", "b"], "delay_s": 0.001}, {"between": ["b", "c"], "delay_s": 0.001}]}})
    e = Engine(topo, EngineSettings(mode="greedy"))
    rows = 64
    b = HopBatch.of([0] * rows, [1] * rows, [2] * rows, np.full(rows, 0.01))
    base = _rss_mb()
    peak = base
    worst = 0.0
    done = 0
    while done < updates:
        t0 = time.perf_counter()
        e.observe(b)
        e.observe_one(0, 1, 2, 0.01)
        worst = max(worst, time.perf_counter() - t0)
        done += rows + 1
        if done % (rows * 4096) < rows + 1:
            peak = max(peak, _rss_mb())
    peak = max(peak, _rss_mb())
    return peak - base, worst


def _engine_worker(n: int) -> dict[str, object]:
    """In this (fresh) process: the peak RSS a ``n``-node engine adds (see the module doc)."""
    import os
    import sys

    sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
    from bench_engine import random_rows, ring_with_chords
    from routerd.core.engine import Engine, EngineSettings

    def status(key: str) -> float:
        with open("/proc/self/status") as fh:
            for line in fh:
                if line.startswith(key + ":"):
                    return int(line.split()[1]) / 1024
        return float("nan")

    t = ring_with_chords(n, n)
    t.shortest_paths()                      # the topology's own cache, not the engine's
    with open("/proc/self/clear_refs", "w") as fh:
        fh.write("5")                       # VmHWM := VmRSS (Linux)
    base = status("VmRSS")
    e = Engine(t, EngineSettings(mode="greedy"))
    rng = np.random.default_rng(1)
    for i in range(50):
        e.observe(random_rows(t, 1000, rng), now=i * 0.01)
        if i % 5 == 4:
            e.decide(i * 0.01)
    e._dirty[:] = True
    e.decide(1.0)
    shared = (t.slot_of, *t.shortest_paths())      # the topology's, not the engine's
    arrays = {k: round(v.nbytes / 2**20, 1) for k, v in sorted(vars(e).items())
              if isinstance(v, np.ndarray) and v.nbytes >= 2**20 and k != "_qdec"
              and not any(np.shares_memory(v, a) for a in shared)}
    return {"peak_mb": status("VmHWM") - base, "q_mb": e.Q.nbytes / 2**20, "arrays_mb": arrays,
            "counts": str(e.N.dtype)}


def run(quick: bool = False, updates: int | None = None) -> dict[str, dict]:
    import subprocess
    import sys

    r = subprocess.run([sys.executable, __file__, "--engine-worker", "1000"], capture_output=True,
                       text=True, check=True)
    w = json.loads(r.stdout.strip().splitlines()[-1])
    n = updates or (1_000_000 if quick else 10_000_000)
    grow_small, _ = _hammer(max(n // 10, 1000))
    grow, worst = _hammer(n)
    return {
        "one_entry_rss_growth_mb": {
            "value": round(grow, 1), "unit": "MB", "updates": n,
            "ratio": round((grow + 1) / (grow_small + 1), 2),
            "against": f"RSS growth after {n // 10} updates (+1 MB each)",
            "worst_call_ms": round(worst * 1e3, 2),
            "max_rss_mb": round(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024, 1)},
        "engine_peak_mb_n1000": {
            "value": round(w["peak_mb"], 1), "unit": "MB", "ratio": round(w["peak_mb"] / w["q_mb"], 3),
            "against": f"the bytes of Q ({w['q_mb']:.1f} MB, float64); peak RSS over the imports "
                       "through construction, 50 batches of 1,000 rows with decisions and one "
                       "decision with every destination due, in a fresh process",
            "counts": w["counts"], "arrays_mb": w["arrays_mb"]},
    }


if __name__ == "__main__":
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--updates", type=int)
    ap.add_argument("--engine-worker", type=int, metavar="N")
    a = ap.parse_args()
    if a.engine_worker:
        print(json.dumps(_engine_worker(a.engine_worker)))
    else:
        print(json.dumps(run(a.quick, a.updates), indent=1))
