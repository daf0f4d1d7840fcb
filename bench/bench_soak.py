"""Soak: ``routerd serve`` at a steady ingest rate for 10 minutes (quick: 10 s); RSS and
open file descriptors must stay flat.  The optimality gap's runner is on with a 2 s
interval (default 5 s): its child starts with the service and its first run falls in the
warm-up, so every later run is inside the measured part.

Figures (ratios against the same run's state after warm-up, the first third and at least
``WARM_S``):

* ``soak_rss_growth`` — RSS growth after warm-up (MB), ratio to the RSS after warm-up;
* ``soak_rss_slope`` — least-squares RSS slope after warm-up (kB/s), ratio to the RSS
  after warm-up per hour (fraction per hour);
* ``soak_fd_growth`` — open descriptors added after warm-up, ratio to the count then;
* ``soak_acked`` — batches acknowledged per second, ratio to batches sent.

Run alone: ``python bench/bench_soak.py [--quick]``.  Memory is the kernel's own figure
(``VmRSS`` in ``/proc/PID/status``, proc(5)).
"""
from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from typing import Any

import msgpack
import numpy as np
import zmq

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, os.path.join(HERE, ".."))

from routerd.io import config, wire
from routerd.io.childproc import parse_ready
from routerd.io.inputs import load_topology

RATE_BATCHES_S = 200
ROWS = 100
#: seconds of warm-up at least: the optimum's child starts with the service, its first run
#: is at OPTIMUM_INTERVAL_S
WARM_S = 3.0
OPTIMUM_INTERVAL_S = 2.0


def _fig(value: float, unit: str, ratio: float, against: str) -> dict[str, Any]:
    return {"value": float(value), "unit": unit, "ratio": float(ratio), "against": against}


def _status(pid: int) -> tuple[float, int]:
    rss = 0.0
    with open(f"/proc/{pid}/status", encoding="ascii") as fh:
        for line in fh:
            if line.startswith("VmRSS:"):
                rss = int(line.split()[1]) / 1024
    return rss, len(os.listdir(f"/proc/{pid}/fd"))


def _start(base: str) -> tuple[subprocess.Popen[str], dict[str, str]]:
    conf = os.path.join(base, "c.yaml")
    with open(conf, "w", encoding="utf-8") as fh:
        fh.write("service:\n  snapshot_interval_s: 5.0\n  publish_interval_s: 1.0\n"
                 "  journal:\n    segment_bytes: 1048576\n"
                 f"engine:\n  optimum:\n    interval_s: {OPTIMUM_INTERVAL_S}\n")
    eps = {"ingest": f"ipc://{base}/in", "control": f"ipc://{base}/ctl", "publish": f"ipc://{base}/pub"}
    p = subprocess.Popen([sys.executable, "-m", "routerd", "serve", "--config", conf,
                          "--ingest", eps["ingest"], "--control", eps["control"], "--publish",
                          eps["publish"], "--metrics", "127.0.0.1:0", "--state-dir",
                          os.path.join(base, "state")],
                         stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True)
    assert p.stdout is not None
    for line in p.stdout:
        if parse_ready(line):
            break
    else:
        raise RuntimeError("routerd serve did not start")
    return p, eps


def run(quick: bool) -> dict[str, dict[str, Any]]:
    duration = 10.0 if quick else 600.0
    topo = load_topology(config.load(None))
    rng = np.random.default_rng(7)
    base = tempfile.mkdtemp(prefix="rdsoak-", dir="/tmp")
    proc, eps = _start(base)
    ctx = zmq.Context()
    try:
        d = ctx.socket(zmq.DEALER)
        d.linger = 0
        d.connect(eps["ingest"])
        sub = ctx.socket(zmq.SUB)
        sub.linger = 0
        sub.subscribe(b"")
        sub.connect(eps["publish"])
        samples: list[tuple[float, float, int]] = []
        sent = acked = 0
        t0 = time.monotonic()
        next_send = t0
        next_sample = t0 + 1.0
        while (now := time.monotonic()) - t0 < duration:
            if now >= next_send:
                link = rng.integers(0, topo.n_links, ROWS)
                dd = rng.integers(0, topo.n - 1, ROWS)
                dd = np.where(dd >= topo.src[link], dd + 1, dd)
                d.send_multipart([b"", wire.encode_ingest_cols(
                    "soak", sent, topo.digest, topo.src[link], topo.dst[link], dd,
                    topo.delay_s[link] * rng.uniform(1, 3, ROWS))])
                sent += 1
                next_send += 1.0 / RATE_BATCHES_S
            while d.poll(0):
                if "error" not in msgpack.unpackb(d.recv_multipart()[-1], raw=False):
                    acked += 1
            while sub.poll(0):
                sub.recv_multipart()
            if now >= next_sample:
                rss, fds = _status(proc.pid)
                samples.append((now - t0, rss, fds))
                next_sample += 1.0
            time.sleep(max(0.0, min(next_send, next_sample) - time.monotonic()))
        end = time.monotonic() + 2.0
        while time.monotonic() < end and acked < sent:
            if d.poll(100) and "error" not in msgpack.unpackb(d.recv_multipart()[-1], raw=False):
                acked += 1
        d.close(0)
        sub.close(0)
    finally:
        proc.kill()
        proc.wait(10)
        ctx.term()
        shutil.rmtree(base, ignore_errors=True)
    # warm-up: the first third, and at least the first WARM_S (start-up work the service
    # does once: the optimum's child process, whose pipes are descriptors, and its first run)
    warm = max(len(samples) // 3, sum(1 for s in samples if s[0] < WARM_S))
    t = np.array([s[0] for s in samples[warm:]])
    rss = np.array([s[1] for s in samples[warm:]])
    fds = [s[2] for s in samples[warm:]]
    slope_mb_s = float(np.polyfit(t, rss, 1)[0]) if len(t) > 1 else 0.0
    return {
        "soak_rss_growth": _fig(rss[-1] - rss[0], "MB", (rss[-1] - rss[0]) / rss[0],
                                "RSS after warm-up"),
        "soak_rss_slope": _fig(slope_mb_s * 1024, "kB/s", slope_mb_s * 3600 / rss[0],
                               "RSS after warm-up, per hour"),
        "soak_fd_growth": _fig(fds[-1] - fds[0], "fds", (fds[-1] - fds[0]) / fds[0],
                               "open fds after warm-up"),
        "soak_acked": _fig(acked / duration, "batches/s", acked / max(sent, 1), "batches sent"),
    }


if __name__ == "__main__":
    print(json.dumps(run("--quick" in sys.argv), indent=2))
