"""Memory bounds (issue 13 item 4): RSS growth after many updates of one entry.

``python bench/bench_memory.py [--quick] [--updates N]`` applies N updates to one Q entry
(engine defaults, 64-row batches of the same (x, d, y), the vector path, plus single-row
calls, the scalar path) and reports the process's peak RSS increase (``ru_maxrss``) and
the longest single call.  The ratio is against the RSS increase of the same loop on a
second, fresh engine's first 10 % of the updates, measured in the same run: a bounded
table makes it ~1.

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
    from routerd.engine import Engine, HopBatch
    from routerd.topology import from_mapping

    topo = from_mapping({"topology": {"name": "three", "nodes": ["a", "b", "c"], "defaults": {"capacity_bps": 1e7, "buffer_pkts": 50}, "links": [
        {"between": ["a", "b"], "delay_s": 0.001}, {"between": ["b", "c"], "delay_s": 0.001}]}})
    e = Engine(topo)
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


def run(quick: bool = False, updates: int | None = None) -> dict[str, dict]:
    n = updates or (1_000_000 if quick else 10_000_000)
    grow_small, _ = _hammer(max(n // 10, 1000))
    grow, worst = _hammer(n)
    return {
        "one_entry_rss_growth_mb": {"value": round(grow, 1), "unit": "MB", "updates": n,
                                    "ratio": round((grow + 1) / (grow_small + 1), 2),
                                    "against": f"RSS growth after {n // 10} updates (+1 MB each)"},
        "one_entry_worst_call_ms": {"value": round(worst * 1e3, 2), "unit": "ms", "ratio": None,
                                    "against": "-"},
        "max_rss_mb": {"value": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
                       "unit": "MB", "ratio": None, "against": "-"},
    }


if __name__ == "__main__":
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--updates", type=int)
    a = ap.parse_args()
    print(json.dumps(run(a.quick, a.updates), indent=1))
