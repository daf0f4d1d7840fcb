"""Duplicate-window flood against a real ``routerd serve`` (issue 13 item 4).

``python bench/bench_dedup_flood.py [--quick] [--batches N] [--names K] [--rows R]``
starts ``python -m routerd serve`` (the demo lab, ipc:// endpoints and its state dir in a
temp dir under /tmp, ``fsync: never``, snapshots every 20 s) and sends it N batches from
one DEALER socket, cycling over K reporter names, each batch with R named hop rows that
all name an unknown destination — so every batch is acknowledged with R rejections, the
most the duplicate window keeps per batch (256) — 64 batches in flight.  It samples the
service's RSS every 0.2 s and reports the peak (``VmHWM`` at the end) over the RSS before
the flood, the longest acknowledgement wait, and the service's own dedup figures.

The ratio is the peak RSS increase over the configured ``service.dedup_budget_bytes`` plus
``service.dedup_marks_budget_bytes`` (when the service has them; else over the RSS before).
Run it with ``PYTHONPATH=<old tree>`` for the "before" figure (the old code grows until
4,096 names x 1,024 batches; keep N moderate on a shared machine).
"""
from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from typing import Any

import msgpack
import zmq


def _status(pid: int, key: str) -> float:
    with open(f"/proc/{pid}/status") as fh:
        for line in fh:
            if line.startswith(key + ":"):
                return int(line.split()[1]) / 1024
    return 0.0


def run(quick: bool = False, batches: int | None = None, names: int = 4096, rows: int = 300) -> dict[str, dict]:
    n_batches = batches or (8_000 if quick else 60_000)   # quick: about 3.6x what the budget holds
    base = tempfile.mkdtemp(prefix="rdflood", dir="/tmp")
    cfg = os.path.join(base, "c.yaml")
    with open(cfg, "w") as fh:
        fh.write("service:\n  journal:\n    fsync: never\n  snapshot_interval_s: 20\n"
                 "  max_rows: 1000\n  metrics: 127.0.0.1:0\n")
    eps = {k: f"ipc://{base}/{k}" for k in ("ingest", "publish", "control")}
    cmd = [sys.executable, "-m", "routerd", "serve", "--config", cfg, "--state-dir",
           os.path.join(base, "state"), *[x for k, v in eps.items() for x in (f"--{k}", v)]]
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True)
    ctx = zmq.Context()
    try:
        assert proc.stdout is not None
        for line in proc.stdout:
            if line.startswith("routerd: ready"):
                break
        else:
            raise RuntimeError("service did not start")
        pid = proc.pid
        time.sleep(0.5)
        rss0 = _status(pid, "VmRSS")
        s = ctx.socket(zmq.DEALER)
        s.linger = 0
        s.rcvtimeo = 120_000
        s.connect(eps["ingest"])
        hop = ["w1", "w2", "no-such-node", 0.001]
        sent = got = 0
        stalled = False
        worst = 0.0
        sent_at: dict[int, float] = {}
        peak_sample = rss0
        last_sample = time.monotonic()
        t_start = time.monotonic()
        while got < n_batches:
            while sent < n_batches and sent - got < 64:
                k = sent % names
                b = sent // names + 1
                body = msgpack.packb({"v": 1, "reporter": f"flood-{k:05d}", "batch": b,
                                      "hops": [hop] * rows})
                s.send_multipart([b"", body])
                sent_at[sent] = time.monotonic()
                sent += 1
            try:
                parts = s.recv_multipart()
            except zmq.Again:   # the service held every answer back for 2 minutes
                stalled = True
                break
            rep = msgpack.unpackb(parts[-1])
            if "error" in rep:
                raise RuntimeError(f"refused: {rep['error']}")
            # batches come back in order on one connection: the oldest outstanding one
            oldest = min(sent_at)
            worst = max(worst, time.monotonic() - sent_at.pop(oldest))
            got += 1
            if time.monotonic() - last_sample > 0.2:
                peak_sample = max(peak_sample, _status(pid, "VmRSS"))
                last_sample = time.monotonic()
        took = time.monotonic() - t_start
        hwm = _status(pid, "VmHWM")
        health: dict[str, Any] = {}
        if not stalled:
            c = ctx.socket(zmq.REQ)
            c.linger = 0
            c.rcvtimeo = 120_000
            c.connect(eps["control"])
            c.send(msgpack.packb({"op": "health"}))
            health = msgpack.unpackb(c.recv(), strict_map_key=False)
            c.close()
        s.close()
    finally:
        proc.terminate()
        try:
            proc.wait(60)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()
        ctx.destroy(linger=0)
        shutil.rmtree(base, ignore_errors=True)
    dd: dict[str, Any] = health.get("dedup") or {}
    budget = (dd.get("budget_bytes", 0) + dd.get("marks_budget_bytes", 0)) / 2**20
    grow = max(hwm, peak_sample) - rss0
    return {
        "dedup_flood_rss_growth_mb": {
            "value": round(grow, 1), "unit": "MB", "batches": n_batches, "names": names,
            "rows_rejected_per_batch": rows, "seconds": round(took, 1),
            "rss_before_mb": round(rss0, 1), "peak_rss_mb": round(max(hwm, peak_sample), 1),
            "ratio": round(grow / budget, 2) if budget else round(grow / rss0, 2),
            "against": (f"dedup budgets {budget:.0f} MB" if budget else "RSS before the flood"),
            "dedup": dd, "dedup_entries": health.get("counts", {}).get("dedup_entries"),
            "batches_acknowledged": got, "stalled_120s": stalled,
            "worst_ack_ms": round(worst * 1e3, 1)},
    }


if __name__ == "__main__":
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--batches", type=int)
    ap.add_argument("--names", type=int, default=4096)
    ap.add_argument("--rows", type=int, default=300)
    a = ap.parse_args()
    print(json.dumps(run(a.quick, a.batches, a.names, a.rows), indent=1, default=str))
