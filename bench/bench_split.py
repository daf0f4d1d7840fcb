"""Split-mode decision cost (issue 14: ``engine.mode = split`` must scale to 1,000 nodes).

Figures, each a ratio measured in one run (interleaved trials, best of each):

* ``split_decide_ratio_n{N}`` — one split-mode :meth:`Engine.decide` (every destination,
  as split mode always decides) divided by one greedy-mode decide with every destination
  due, on the same topology after the same rows, both on the compiled path;
* ``split_decide_ratio_n{N}_reference`` — the same split decide on the numpy reference
  path (``engine.kernels = reference``) over the compiled one (at 100 nodes only in
  ``--quick``: the reference takes seconds per call at 1,000 nodes).

The graphs are bench_engine's ring with random chords (our own, seeded), with 2 Mb/s links
so the rows' latencies load them.
"""
from __future__ import annotations

import time
from typing import Any

import numpy as np

from bench_engine import random_rows, ring_with_chords
from routerd.core import kernels as _kernels
from routerd.core import topology as T
from routerd.core.engine import Engine, EngineSettings

SIZES = (100, 1000)


def loaded(n: int) -> T.Topology:
    t = ring_with_chords(n, n, 0)
    specs = [T.LinkSpec(t.nodes[int(t.src[k])], t.nodes[int(t.dst[k])], float(t.delay_s[k]), 2e6, 64,
                        f"l{k}") for k in range(t.n_links)]
    return T.build(f"ring-chords-{n}-2M", list(t.nodes), specs)


def run(quick: bool) -> dict[str, dict[str, Any]]:
    figs: dict[str, dict[str, Any]] = {}
    if not _kernels.available():
        return figs
    for n in SIZES:
        t = loaded(n)
        rng = np.random.default_rng(7)
        sp = Engine(t, EngineSettings(mode="split", kernels="compiled"))
        gr = Engine(t, EngineSettings(mode="greedy", kernels="compiled"))
        do_ref = n <= 100 or not quick
        # (quick at 1,000 nodes the reference is not measured: not built either, ~2 s)
        ref = Engine(t, EngineSettings(mode="split", kernels="reference")) if do_ref else None
        now = 0.0
        for _ in range(2 if quick else 5):      # warm-up decisions
            now += 0.1
            b = random_rows(t, 4 * n, rng)
            for e in (sp, gr) if ref is None else (sp, ref, gr):
                e.observe(b, now)
                e.decide(now)
        best = {"split": np.inf, "greedy": np.inf, "reference": np.inf}
        for _ in range(2 if quick else 4):
            now += 0.1
            b = random_rows(t, 4 * n, rng)
            sp.observe(b, now)
            gr.observe(b, now)
            t0 = time.perf_counter()
            sp.decide(now)
            t1 = time.perf_counter()
            gr._dirty[:] = True
            gr.decide(now)
            t2 = time.perf_counter()
            best["split"] = min(best["split"], t1 - t0)
            best["greedy"] = min(best["greedy"], t2 - t1)
            if ref is not None:
                ref.observe(b, now)
                t3 = time.perf_counter()
                ref.decide(now)
                best["reference"] = min(best["reference"], time.perf_counter() - t3)
        figs[f"split_decide_ratio_n{n}"] = {
            "value": best["split"] / best["greedy"], "unit": "ratio",
            "ratio": best["split"] / best["greedy"],
            "against": f"greedy decide with every destination due ({best['greedy'] * 1e3:.1f} ms); "
                       f"split decide {best['split'] * 1e3:.1f} ms, compiled path", "nodes": n}
        if do_ref:
            figs[f"split_decide_ratio_n{n}_reference"] = {
                "value": best["reference"] / best["split"], "unit": "ratio",
                "ratio": best["reference"] / best["split"],
                "against": f"split decide on the compiled path ({best['split'] * 1e3:.1f} ms); "
                           f"reference {best['reference'] * 1e3:.1f} ms", "nodes": n}
    return figs


if __name__ == "__main__":
    import json
    import sys
    print(json.dumps(run("--quick" in sys.argv), indent=1))
