"""Sharding benchmarks: ingest with 1 and 2 workers behind the front, and a 1,000-node engine split.

Measured in one run on this machine (two cores shared by the client, the front and the
workers), ipc:// endpoints in a tmp dir, ``service.journal.fsync: never`` (an fsync per
group commit measures the disk, not the split), the optimality gap's runner off (one
optimiser per process would bill the split), columnar batches of 1,024 rows on a
ring-with-chords graph of our own (200 nodes, 400 links: enough engine work per row that
the split has something to spread), 16 batches in flight (like ``routerd.agent.client.Reporter``):

* ``shard_ingest_w1_rows_per_s`` — the front with one worker, ratio to one plain process;
* ``shard_ingest_w2_rows_per_s`` — the front with two workers, ratio to the front with one
  (the scaling figure: on two cores the client, the front and the workers share them);
* ``shard_ingest_w4_rows_per_s`` — the front with four workers, ratio to the front with one;
* ``shard_front_rows_per_s`` — what the front's own work (decode, split, encode the
  pieces, combine the acks) costs per row, in this process: its ceiling, ratio to the
  plain process's measured ingest;
* ``shard_engine_*_n1000`` — on a 1,000-node graph: engine state bytes of the largest
  worker of N = 2 and 4 (each holds only its destinations' columns, ``Engine(owned=)``),
  ratio to one process's; update rate (observe + the decide that follows) of one process
  against one worker of two and of four taking its share of the same rows;
* ``shard_rss_*_n1000`` (full runs) — resident memory of real processes at 1,000 nodes after
  the same 8 batches: one process and the largest worker for N = 1, 2, 4; the ratio is
  the worker's share of the whole engine's state, (worker - base) / (one - base), base =
  one process less its engine state bytes (what a process holds besides the engine).
"""
from __future__ import annotations

import os
import shutil
import subprocess
import sys
import tempfile
import time
from typing import Any

import numpy as np
import yaml
import zmq

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
for p in (ROOT, HERE):
    if p not in sys.path:
        sys.path.insert(0, p)

from bench_engine import random_rows, ring_with_chords, write_node_link
from bench_ingest import Frames, acked
from routerd.core import topology as T
from routerd.core.engine import Engine, EngineSettings
from routerd.io import topofiles as TF
from routerd.io import wire
from routerd.io.childproc import parse_ready
from routerd.service import shard

ROWS = 1024
# the optimality gap's runner off (engine.optimum.interval_s 0): each service and each
# worker would start its own optimiser child and run it every 5 s on the same topology,
# about a second of a core each — four workers' worth of it against one worker's in the
# scaling figures, and about ten child interpreters starting beside the measurements
CONF = {"service": {"journal": {"fsync": "never"}, "snapshot_interval_s": 3600,
                    "publish_interval_s": 2.0},
        "engine": {"optimum": {"interval_s": 0}}}


def _fig(value: float, unit: str, ratio: float, against: str, **kw: Any) -> dict[str, Any]:
    return {"value": float(value), "unit": unit, "ratio": float(ratio), "against": against, **kw}


class _Proc:
    def __init__(self, base: str, name: str, tfile: str, conf: str, *extra: str):
        d = os.path.join(base, name)
        os.makedirs(d)
        self.ep = {"ingest": f"ipc://{d}/in", "control": f"ipc://{d}/ctl"}
        cmd = [sys.executable, "-m", "routerd", "serve", "--topology", tfile, "--config", conf,
               "--ingest", self.ep["ingest"], "--publish", f"ipc://{d}/pub",
               "--control", self.ep["control"], "--metrics", "127.0.0.1:0",
               "--state-dir", os.path.join(d, "state"), *extra]
        self.name = name
        self.proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL,
                                     text=True, cwd=ROOT)

    def ready(self) -> None:
        assert self.proc.stdout is not None
        for line in self.proc.stdout:
            if parse_ready(line):
                return
        raise RuntimeError(f"{self.name} did not start (exit {self.proc.wait()})")

    def stop(self) -> None:
        if self.proc.poll() is None:
            self.proc.terminate()
        if self.proc.poll() is None:
            try:
                self.proc.wait(30)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(5)
        if self.proc.stdout is not None:
            self.proc.stdout.close()


def _ingest(ctx: zmq.Context, p: _Proc, frames: Frames, dt: float, first: int) -> float:
    def ok(a: dict[str, Any]) -> None:
        if a.get("accepted") != frames.rows:
            raise RuntimeError(f"a benchmark batch was not accepted: {a}")

    acked(ctx, p.ep["ingest"], frames, 0.15, first, ok)           # warm-up
    rate, _ = acked(ctx, p.ep["ingest"], frames, dt, first + 100_000)
    return rate


def _front_ceiling(topo: T.Topology, frames: Frames, smap: shard.ShardMap, budget: float) -> float:
    """Rows/s of the front's per-batch work, in this process: decode, split, encode the
    pieces, combine their acks (the acks are made up: every row accepted)."""
    n = 0
    t0 = time.perf_counter()
    while time.perf_counter() - t0 < budget:
        ing = wire.decode_ingest(frames.frame(n), topo)
        assert not isinstance(ing, wire.WireError)
        h = ing.hops
        owner = smap.owner[h.dst]
        pieces, acks = {}, {}
        for k in range(smap.n_shards):
            idx = np.flatnonzero(owner == k)
            wire.encode_ingest_cols(ing.reporter, ing.batch, topo.digest, h.src[idx], h.via[idx],
                                    h.dst[idx], h.latency[idx], h.estimate[idx])
            pieces[k] = (ing.hop_rows[idx], ing.link_rows)
            acks[k] = {"accepted": int(idx.size), "rejected": []}
        shard.combine_acks([], 0, pieces, acks)
        n += 1
    return n * frames.rows / (time.perf_counter() - t0)


def _state_bytes(eng: Engine) -> int:
    return sum(v.nbytes for v in eng.export_state().values() if isinstance(v, np.ndarray))


def _engine_split(quick: bool) -> dict[str, dict[str, Any]]:
    t = ring_with_chords(1000, 1000, seed=1000)
    rng = np.random.default_rng(5)
    # through a saved state, as the workers' engines below: every array's pages touched
    # (a fresh engine's zero arrays fault in on first write, which would bill one side)
    start = Engine(t, EngineSettings(mode="greedy")).export_state()   # the same start for the workers' engines
    eng_one = Engine.from_state(t, EngineSettings(mode="greedy"), start)
    state = _state_bytes(eng_one)
    batches = [random_rows(t, 4096, rng) for _ in range(1 if quick else 8)]
    t_one = 0.0
    rows_one = 0
    for i, b in enumerate(batches):
        t0 = time.perf_counter()
        eng_one.observe(b, now=float(i))
        eng_one.decide(float(i))
        t_one += time.perf_counter() - t0
        rows_one += len(b)
    r_one = rows_one / t_one
    figs = {
        "shard_engine_state_bytes_n1000_one": _fig(
            state, "bytes", 1.0, "itself: one process's engine, (n, n, K) arrays",
            nodes=t.n, slots=eng_one.k),
        "shard_engine_rows_per_s_n1000_one": _fig(
            r_one, "rows/s", 1.0, "itself: observe 4,096 rows for every destination + decide",
            nodes=t.n),
    }
    for n in (2, 4):
        smap = shard.ShardMap.build(t, n)
        # every worker's engine (its columns only); the largest is the figure
        sizes = [_state_bytes(Engine(t, EngineSettings(mode="greedy"), owned=smap.owned(k))) for k in range(n)]
        own0 = smap.owner == 0
        # worker 0 from the same start as the whole engine: its columns (exact)
        w0 = Engine.from_state(t, EngineSettings(mode="greedy"), start, owned=smap.owned(0))
        t_w0, rows_w0 = 0.0, 0
        for i, b in enumerate(batches):
            mine = b.take(np.flatnonzero(own0[b.dst]))
            t0 = time.perf_counter()
            w0.observe(mine, now=float(i))
            w0.decide(float(i))
            t_w0 += time.perf_counter() - t0
            rows_w0 += len(mine)
        r_w0 = rows_w0 / t_w0
        figs[f"shard_engine_state_bytes_n1000_w{n}"] = _fig(
            max(sizes), "bytes", max(sizes) / state, f"one process's engine: the largest of {n} "
            "workers holds only its destinations' columns", nodes=t.n, workers=n,
            per_worker=sizes)
        figs[f"shard_engine_rows_per_s_n1000_w0of{n}"] = _fig(
            r_w0, "rows/s", r_w0 / r_one, f"one process on the whole batch: worker 0 of {n} "
            "takes its share (observe + decide of its destinations)", nodes=t.n,
            destinations=int(own0.sum()))
        figs[f"shard_engine_batch_s_n1000_w0of{n}"] = _fig(
            t_w0 / len(batches), "s", t_w0 / t_one, "one process's time for the whole batch",
            nodes=t.n, workers=n)
    return figs


def _rss(pid: int) -> int:
    with open(f"/proc/{pid}/status") as fh:
        for line in fh:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) * 1024
    raise RuntimeError(f"no VmRSS for {pid}")


def _rss_figs(ctx: zmq.Context, base: str) -> dict[str, dict[str, Any]]:
    """Resident memory of real processes at 1,000 nodes, after the same 8 batches of
    1,024 rows (the engines' pages touched as in service), one process then N = 1, 2, 4."""
    import msgpack

    topo = ring_with_chords(1000, 1000, seed=1000)
    tfile = os.path.join(base, "ring1000.yaml")
    with open(tfile, "w") as fh:
        yaml.safe_dump(T.to_mapping(topo), fh)
    topo = TF.load(tfile)
    conf = os.path.join(base, "conf_rss.yaml")
    with open(conf, "w") as fh:
        yaml.safe_dump({**CONF, "service": {**CONF["service"], "publish_interval_s": 600.0}}, fh)
    frames = Frames("cols", ROWS, topo, np.random.default_rng(9))
    whole = _state_bytes(Engine(topo, EngineSettings(mode="greedy")))
    out: dict[str, dict[str, Any]] = {}
    one_rss = 0
    for n in (0, 1, 2, 4):
        p = _Proc(base, f"rss{n}", tfile, conf, *(("--shards", str(n)) if n else ()))
        try:
            p.ready()
            for i in range(8):   # duration 0: one batch, acknowledged
                acked(ctx, p.ep["ingest"], frames, 0.0, 7_000_000 + n * 1000 + i)
            if not n:
                one_rss = _rss(p.proc.pid)
                out["shard_rss_bytes_n1000_one"] = _fig(one_rss, "bytes", 1.0, "itself",
                                                        nodes=topo.n)
                continue
            s = ctx.socket(zmq.REQ)
            s.linger = 0
            s.connect(p.ep["control"])
            s.send(msgpack.packb({"op": "health"}))
            h = msgpack.unpackb(s.recv(), raw=False, strict_map_key=False)
            s.close(0)
            ws = [_rss(w["pid"]) for w in h["shards"]]
            base_rss = one_rss - whole
            out[f"shard_rss_bytes_n1000_w{n}"] = _fig(
                max(ws), "bytes", (max(ws) - base_rss) / whole,
                "one process's engine state: the largest worker's resident memory less what "
                "a process holds besides its engine (one process's RSS less its engine "
                "state)", nodes=topo.n, workers=n, per_worker=ws, front=_rss(p.proc.pid),
                engine_state=whole)
        finally:
            p.stop()
    return out


def run(quick: bool) -> dict[str, dict[str, Any]]:
    dt = 0.8 if quick else 4.0
    base = tempfile.mkdtemp(prefix="rd-bsh-", dir="/tmp")
    ctx = zmq.Context()
    procs: list[_Proc] = []
    figs: dict[str, dict[str, Any]] = {}
    try:
        topo = ring_with_chords(200, 200, seed=200)
        # node-link JSON: eleven services start below (front and workers), and the
        # pure-Python YAML parser took about 0.8 s of a core in each (none of the figures
        # is about start-up; the same topology and digest as the YAML file)
        tfile = os.path.join(base, "ring200.json")
        write_node_link(topo, tfile)
        topo = TF.load(tfile)
        frames = Frames("cols", ROWS, topo, np.random.default_rng(3))
        # debounce 0.5 s: few table rounds, so the figure is about ingest; the default
        # 0.05 s (full runs only) adds a table round per worker every 50 ms
        settings = [("", 0.5)] + ([] if quick else [("_debounce005", 0.05)])
        rates: dict[str, float] = {}
        for tag, deb in settings:
            conf = os.path.join(base, f"conf{tag}.yaml")
            with open(conf, "w") as fh:
                yaml.safe_dump({**CONF, "service": {**CONF["service"], "debounce_s": deb}}, fh)
            names = [f"one{tag}", f"w1{tag}", f"w2{tag}", f"w4{tag}"]
            group = [_Proc(base, nm, tfile, conf, *extra) for nm, extra in
                     zip(names, ((), ("--shards", "1"), ("--shards", "2"), ("--shards", "4")))]
            procs += group
            for p in group:       # started together, waited for together
                p.ready()
            # interleaved rounds, best of each: the machine is shared, load comes and goes
            for r in range(1 if quick else 3):
                for i, (name, p) in enumerate(zip(names, group)):
                    rate = _ingest(ctx, p, frames, dt, (r * 4 + i) * 1_000_000)
                    rates[name] = max(rates.get(name, 0.0), rate)
            for p in group:   # their figures are in: no final decisions and snapshots,
                p.proc.kill()    # which ran beside the measurements below
                p.proc.wait(10)
        front = _front_ceiling(topo, frames, shard.ShardMap.build(topo, 2), 0.5 if quick else 2.0)
        for tag, deb in settings:
            one, w1, w2 = rates[f"one{tag}"], rates[f"w1{tag}"], rates[f"w2{tag}"]
            w4 = rates[f"w4{tag}"]
            figs[f"shard_ingest_one{tag}_rows_per_s"] = _fig(
                one, "rows/s", 1.0, "itself: one routerd serve process", nodes=topo.n,
                debounce_s=deb)
            figs[f"shard_ingest_w1{tag}_rows_per_s"] = _fig(
                w1, "rows/s", w1 / one, "one plain process (the front's cost: one more hop "
                "and its decode/split)", nodes=topo.n, debounce_s=deb)
            figs[f"shard_ingest_w2{tag}_rows_per_s"] = _fig(
                w2, "rows/s", w2 / w1, "the front with one worker (this machine: "
                f"{os.cpu_count()} cores for client, front and workers)", nodes=topo.n,
                debounce_s=deb)
            figs[f"shard_ingest_w4{tag}_rows_per_s"] = _fig(
                w4, "rows/s", w4 / w1, "the front with one worker (this machine: "
                f"{os.cpu_count()} cores for client, front and workers)", nodes=topo.n,
                debounce_s=deb)
        figs["shard_front_rows_per_s"] = _fig(
            front, "rows/s", front / rates["one"], "one plain process's ingest: the front's "
            "own work per row (decode, split into 2, encode, combine) is its ceiling",
            batch=ROWS)
        figs.update(_engine_split(quick))
        if not quick:
            figs.update(_rss_figs(ctx, base))
    finally:
        for p in procs:
            p.stop()
        ctx.destroy(0)
        shutil.rmtree(base, ignore_errors=True)
    return figs


if __name__ == "__main__":
    import json

    print(json.dumps(run("--full" not in sys.argv), indent=1))
