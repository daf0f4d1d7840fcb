"""Sweep parallelism: the same grid of runs on 2 worker processes against 1.

``sweep_parallel_ratio`` = wall time with ``--jobs 1`` ÷ wall time with ``--jobs 2`` for
the same specs, both measured in this run (target on 2 free cores: >= 1.7).  Its
``ratio`` field divides that by the speed-up a bare CPU-bound task gets from the same
pool in the same run (``sweep_bare_parallel_ratio``, the ceiling on this machine right
now), so a machine shared with other work does not pass for a slow sweep.  The grid
is the demo lab at a busy and a light rate, ``shortest`` and ``qrouting``, four seeds:
16 runs of unequal length, so the figure includes the pool's start-up and its tail
(the last runs finishing while the other worker idles).  Repeated and the best of each
kept (3 interleaved rounds, not quick), since other processes share the machine.
"""
from __future__ import annotations

import os
import sys
import time
from typing import Any

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

from routerd.sim.commands_sweep import run_grid


def _burn(n: int) -> int:
    """A bare CPU-bound task of the same length scale as a run (pure Python arithmetic)."""
    acc = 0
    for i in range(n):
        acc = (acc + i * i) % 1000003
    return acc


def bare_ratio(tasks: int, n: int) -> tuple[float, float]:
    from concurrent.futures import ProcessPoolExecutor

    t0 = time.perf_counter()
    for _ in range(tasks):
        _burn(n)
    t1 = time.perf_counter() - t0
    t0 = time.perf_counter()
    with ProcessPoolExecutor(max_workers=2) as pool:
        list(pool.map(_burn, [n] * tasks))
    t2 = time.perf_counter() - t0
    return t1, t2


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
    repeats = 1 if quick else 3
    one, two, b1, b2 = [], [], [], []
    for _ in range(repeats):
        one.append(timed(specs, 1))
        two.append(timed(specs, 2))
        a, b = bare_ratio(16, 400_000 if quick else 1_500_000)
        b1.append(a)
        b2.append(b)
    t1, t2 = min(one), min(two)
    bare = min(b1) / min(b2)
    cpus = os.cpu_count() or 1
    return {
        "sweep_parallel_ratio": {
            "value": t1 / t2, "unit": "ratio", "ratio": (t1 / t2) / bare,
            "against": f"the same {len(specs)} runs on 1 worker ({t1:.2f} s vs {t2:.2f} s on 2; "
                       f"ratio field: share of the bare pool speed-up {bare:.2f}; {cpus} CPUs seen)",
        },
        "sweep_bare_parallel_ratio": {
            "value": bare, "unit": "ratio", "ratio": bare / 2.0,
            "against": "a bare CPU-bound task, 16 of them on 1 process vs a 2-process pool "
                       "(ratio field: share of the ideal 2)",
        },
        "sweep_runs_per_s_2_workers": {
            "value": len(specs) / t2, "unit": "runs/s", "ratio": t1 / t2,
            "against": f"1 worker: {len(specs) / t1:.2f} runs/s",
        },
    }


if __name__ == "__main__":
    import json

    print(json.dumps(run("--quick" in sys.argv), indent=2))
