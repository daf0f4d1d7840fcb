"""Snapshot cost at 1,000 nodes (issue 13 item 4): how long the event loop is held and
how much memory a snapshot takes on top of the engine.

``python bench/bench_snapshot.py [--quick] [--nodes N]`` runs each way of snapshotting in
a fresh process (so ``ru_maxrss`` is that way's own peak) on a ring with N chords
(``bench_engine.ring_with_chords``, K ~ 10 at 1,000 nodes), an in-process ``Service``
with its state dir under /tmp, the engine warmed with random batches:

* ``inloop`` — ``Service._snapshot("interval")`` as the loop calls it when no child can
  be forked (and as the control ``snapshot`` op and shutdown call it): the loop is held
  for the whole write;
* ``background`` — ``Service._snapshot_background()``: the loop is held for the fork;
  then, while the child writes, the "loop" keeps applying 4,096-row batches (the
  copy-on-write faults they cause are part of their time) and the longest such turn and
  the child's private memory (``Private_*`` of /proc/PID/smaps_rollup) are recorded.

The peak RSS is the process's VmHWM, reset (``/proc/self/clear_refs`` 5) just before the
snapshot, so the engine's own construction does not count.

Figures: ``snapshot_loop_hold_ms_<way>`` (ratio: to the same process's median 4,096-row
turn without a snapshot) and ``snapshot_extra_mb_<way>`` (peak RSS during the snapshot over the RSS before,
plus the child's private memory; ratio to the engine's state bytes).  With
``PYTHONPATH=<old tree>`` only ``inloop`` runs (the old code has no background way):
that is the "before" figure.
"""
from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from typing import Any

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))


def _rss_mb(pid: str = "self") -> float:
    with open(f"/proc/{pid}/status") as fh:
        for line in fh:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 1024
    return 0.0


def _reset_peak() -> None:
    """Reset this process's peak RSS (VmHWM) to its current RSS (Linux: clear_refs 5)."""
    with open("/proc/self/clear_refs", "w") as fh:
        fh.write("5")


def _peak_mb() -> float:
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024
    return float(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss) / 1024


def _private_mb(pid: int) -> float:
    try:
        with open(f"/proc/{pid}/smaps_rollup") as fh:
            return sum(int(line.split()[1]) for line in fh
                       if line.startswith(("Private_Clean:", "Private_Dirty:"))) / 1024
    except OSError:
        return 0.0


def _worker(way: str, n: int) -> dict[str, Any]:
    sys.path.insert(0, HERE)
    from bench_engine import ring_with_chords
    from routerd.core.engine import HopBatch
    from routerd.io import config
    from routerd.service.daemon import Service

    topo = ring_with_chords(n, n, seed=1)
    tmp = tempfile.mkdtemp(prefix="rdsnap", dir="/tmp")
    try:
        cfg = config.load(None).with_overrides({"service.state_dir": tmp,
                                                "service.journal.fsync": "never"})
        s = Service(cfg, topo)
        s.restore(tmp)
        eng = s.engine
        rng = np.random.default_rng(0)
        src = np.repeat(np.arange(n), topo.slots.shape[1])
        slots = topo.slots.reshape(-1)
        ok = slots >= 0
        src, via = src[ok], slots[ok].astype(np.int64)

        def batch() -> HopBatch:
            i = rng.integers(0, src.size, 4096)
            d = rng.integers(0, n, 4096)
            keep = d != src[i]
            return HopBatch.of(src[i][keep], via[i][keep], d[keep], rng.uniform(1e-4, 1e-2, int(keep.sum())))

        turns = []
        for _ in range(60):
            t0 = time.perf_counter()
            eng.observe(batch(), now=1.0)
            turns.append(time.perf_counter() - t0)
        base_turn = float(np.median(turns))
        state_mb = sum(a.nbytes for a in (eng.Q, eng.N, eng.td, eng.greedy, eng.eps, eng.alt, eng.live)) / 2**20
        s._append("tick", {"t": 1.0})   # something for the snapshot to cover
        rss0 = _rss_mb()
        _reset_peak()
        child_mb = 0.0
        worst_turn = 0.0
        if way == "inloop":
            t0 = time.perf_counter()
            s._snapshot("interval")
            hold = time.perf_counter() - t0
        else:
            t0 = time.perf_counter()
            assert s._snapshot_background()
            hold = time.perf_counter() - t0
            pid = s._snap_child[0]
            while s._snap_child is not None:
                t1 = time.perf_counter()
                eng.observe(batch(), now=2.0)
                worst_turn = max(worst_turn, time.perf_counter() - t1)
                child_mb = max(child_mb, _private_mb(pid))
                s._reap_snapshot()
            assert s.counters.snapshots["interval"] == 1, "the background snapshot failed"
        peak = _peak_mb()
        snap_bytes = sum(os.path.getsize(os.path.join(tmp, "snapshots", f))
                         for f in os.listdir(os.path.join(tmp, "snapshots")))
        s.close()
        return {"hold_s": hold, "base_turn_s": base_turn, "worst_turn_s": worst_turn,
                "extra_mb": max(0.0, peak - rss0) + child_mb, "child_private_mb": child_mb,
                "rss_before_mb": rss0, "state_mb": state_mb, "snapshot_mb": snap_bytes / 2**20}
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


def _ways() -> list[str]:
    from routerd.service.daemon import Service

    return ["inloop", "background"] if hasattr(Service, "_snapshot_background") else ["inloop"]


def run(quick: bool = False, nodes: int | None = None) -> dict[str, dict]:
    n = nodes or (300 if quick else 1000)
    out: dict[str, dict] = {}
    for way in _ways():
        r = subprocess.run([sys.executable, __file__, "--worker", way, "--nodes", str(n)],
                           capture_output=True, text=True, check=True)
        m = json.loads(r.stdout.strip().splitlines()[-1])
        out[f"snapshot_loop_hold_ms_{way}"] = {
            "value": round(m["hold_s"] * 1e3, 1), "unit": "ms", "nodes": n,
            "ratio": round(m["hold_s"] / m["base_turn_s"], 2),
            "against": "median 4,096-row observe turn in the same process",
            "worst_turn_during_ms": round(m["worst_turn_s"] * 1e3, 1),
            "base_turn_ms": round(m["base_turn_s"] * 1e3, 1)}
        out[f"snapshot_extra_mb_{way}"] = {
            "value": round(m["extra_mb"], 1), "unit": "MB", "nodes": n,
            "ratio": round(m["extra_mb"] / m["state_mb"], 3),
            "against": f"engine state {m['state_mb']:.0f} MB",
            "child_private_mb": round(m["child_private_mb"], 1),
            "snapshot_file_mb": round(m["snapshot_mb"], 1), "rss_before_mb": round(m["rss_before_mb"], 1)}
    return out


if __name__ == "__main__":
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--nodes", type=int)
    ap.add_argument("--worker")
    a = ap.parse_args()
    if a.worker:
        print(json.dumps(_worker(a.worker, a.nodes or 1000)))
    else:
        print(json.dumps(run(a.quick, a.nodes), indent=1))
