"""Sweep parallelism: the same grid of runs on 2 worker processes against 1.

``sweep_parallel_ratio`` = wall time with ``--jobs 1`` ÷ wall time with ``--jobs 2`` for
the same specs, both measured in this run (target on 2 free cores: >= 1.7).  The grid
is the demo lab at a busy and a light rate, ``shortest`` and ``qrouting``, four seeds:
16 runs of unequal length, so the figure includes the pool's start-up and its tail
(the last runs finishing while the other worker idles).  Repeated and the best of each
kept (not quick), since other processes share the machine.
"""
from __future__ import annotations

import os
import sys
import time
from typing import Any

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

from sim.commands_sweep import run_grid


def grid(duration_s: float) -> list[dict[str, Any]]:
    return [{"policy": p, "rate_pps": r, "seed": s, "duration_s": duration_s, "series": False}
            for p in ("shortest", "qrouting") for r in (600.0, 1500.0) for s in (1, 2, 3, 4)]


def timed(specs: list[dict[str, Any]], jobs: int) -> float:
    t0 = time.perf_counter()
    rows = run_grid(specs, jobs=jobs)
    el = time.perf_counter() - t0
    bad = [r for r in rows if "error" in r]
    if bad:
        raise RuntimeError(f"a sweep run failed: {bad[0]['error']}")
    return el


def run(quick: bool) -> dict[str, dict[str, Any]]:
    specs = grid(4.0 if quick else 12.0)
    repeats = 1 if quick else 2
    one, two = [], []
    for _ in range(repeats):
        one.append(timed(specs, 1))
        two.append(timed(specs, 2))
    t1, t2 = min(one), min(two)
    cpus = os.cpu_count() or 1
    return {
        "sweep_parallel_ratio": {
            "value": t1 / t2, "unit": "ratio", "ratio": t1 / t2,
            "against": f"the same {len(specs)} runs on 1 worker ({t1:.2f} s vs {t2:.2f} s on 2; "
                       f"{cpus} CPUs seen)",
        },
        "sweep_runs_per_s_2_workers": {
            "value": len(specs) / t2, "unit": "runs/s", "ratio": t1 / t2,
            "against": f"1 worker: {len(specs) / t1:.2f} runs/s",
        },
    }


if __name__ == "__main__":
    import json

    print(json.dumps(run("--quick" in sys.argv), indent=2))
