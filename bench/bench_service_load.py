"""The service under steady load: table latency, loop stalls and peak memory.

A real ``routerd serve`` (default config: fsync ``batch`` in the writer thread) takes a
steady background load of acknowledged columnar batches from a second process (1,000 rows
every 10 ms = 100 k observations/s, random (link, destination) rows with latencies of 1-3x
the link delay: bench_engine's synthetic ring with chords, our own graph), while this
process measures:

* ``table_latency_p50_s`` / ``table_latency_p99_s`` — on a 100-node network, from sending
  a batch with one link-down row ``[x, y, "down"]`` (x's table uses y as a next hop) to a
  subscriber receiving a table of x in which y no longer appears; the link is reported up
  again between trials.  Ratio to the service's own acknowledgement round trip (p50, a
  one-row batch under the same load, fsync included), measured in the same run.
* ``loop_stall_max_s`` — the longest turn of the service's loop (health ``loop.max_turn_s``:
  receive, pipeline, journal, answers, decisions, publishing) over both runs below, 1,000-node
  start-up and snapshot included; ratio to the same acknowledgement round trip.
* ``loop_stall_max_cpu_s`` — the loop turn with the most CPU time of the loop's own thread
  (health ``loop.max_turn_cpu_s``) over both runs: a turn's work without the time it waited
  for a core on a shared machine; ratio to ``loop_stall_max_s``.
* ``rss_peak_mb_n1000`` — the service's peak resident memory (``VmHWM``) on a 1,000-node
  network over start-up, 30 s at 100 k rows/s (3 s with ``--quick``) and a snapshot (a
  control ``snapshot``: written by a forked child, whose own pages are not in this figure);
  ratio to its RSS when it said ready.
* ``load_rows_per_s_n100`` / ``_n1000`` — the load actually carried (acknowledged rows/s);
  ratio to the 100 k/s asked for.
"""
from __future__ import annotations

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
ROOT = os.path.dirname(HERE)
for p in (ROOT, HERE):
    if p not in sys.path:
        sys.path.insert(0, p)

from bench_ingest import Service, req, table_watch  # noqa: E402
from routerd.io import wire  # noqa: E402

RATE = 100_000          # background observations per second
BATCH = 1000
WINDOW = 16


def ring_file(base: str, n: int, node_link: bool = False) -> tuple[Any, str]:
    """The ring-with-chords file the service reads: our YAML (what a user writes; the
    1,000-node run's memory figure covers start-up, parsing included), or with
    ``node_link`` the same topology as node-link JSON (read in a few ms)."""
    import yaml

    from bench_engine import ring_with_chords, write_node_link
    from routerd.core import topology as T

    t = ring_with_chords(n, n)
    doc = T.to_mapping(t)
    if node_link:
        path = os.path.join(base, f"ring{n}.json")
        write_node_link(t, path)
    else:
        path = os.path.join(base, f"ring{n}.yaml")
        with open(path, "w", encoding="utf-8") as fh:
            # libyaml's emitter when there: the pure-Python one takes seconds at 1,000 nodes
            yaml.dump(doc, fh, Dumper=getattr(yaml, "CSafeDumper", yaml.SafeDumper))
    # the load generator reads the arrays it needs from here, not the YAML again
    np.savez(path + ".npz", src=t.src, dst=t.dst, delay_s=t.delay_s, digest=t.digest)
    # what the service reads from the file (to_mapping -> from_mapping is exact), without
    # parsing it again here
    return T.from_mapping(doc, source=path), path


# ---- the load generator (its own process) -------------------------------------------------
def load(ep: str, topo_path: str, rate: float, seconds: float, out: str) -> None:
    """Acknowledged columnar batches of BATCH rows paced at ``rate`` rows/s, WINDOW in
    flight; writes the acknowledged rows/s to ``out``."""
    z = np.load(topo_path + ".npz")
    src, dst, delay_s, digest = z["src"], z["dst"], z["delay_s"], str(z["digest"])
    n, n_links = int(max(src.max(), dst.max())) + 1, len(src)
    rng = np.random.default_rng(7)
    frames = []
    for v in range(16):
        link = rng.integers(0, n_links, BATCH)
        x, y = src[link], dst[link]
        d = rng.integers(0, n - 1, BATCH)
        d = np.where(d >= x, d + 1, d)
        lat = delay_s[link] * rng.uniform(1.0, 3.0, BATCH)
        frames.append((x, y, d, lat))
    ctx = zmq.Context()
    s = ctx.socket(zmq.DEALER)
    s.linger = 0
    s.connect(ep)
    period = BATCH / rate
    sent = got = 0
    t0 = time.perf_counter()
    end = t0 + seconds
    nxt = t0
    while True:
        now = time.perf_counter()
        if now >= end and got == sent:
            break
        if now < end and sent - got < WINDOW and now >= nxt:
            x, y, d, lat = frames[sent % len(frames)]
            s.send_multipart([b"", wire.encode_ingest_cols("load", sent + 1, digest, x, y, d, lat)])
            sent += 1
            nxt = max(nxt + period, now - 0.05)     # catch up at most 50 ms of lag
            continue
        can_send = now < end and sent - got < WINDOW
        wait = min(nxt, end) - now if can_send else 0.1
        if s.poll(max(1, int(wait * 1000))):
            while s.poll(0):
                s.recv_multipart()
                got += 1
    dt = time.perf_counter() - t0
    with open(out, "w", encoding="utf-8") as fh:
        fh.write(str(got * BATCH / dt))
    ctx.destroy(0)


def start_load(svc: Service, topo_path: str, seconds: float, base: str, name: str
               ) -> tuple[subprocess.Popen, str]:
    out = os.path.join(base, f"{name}.rate")
    p = subprocess.Popen([sys.executable, os.path.abspath(__file__), "--load", svc.ep["ingest"],
                          topo_path, str(RATE), str(seconds), out], cwd=ROOT)
    return p, out


def finish_load(p: subprocess.Popen, out: str) -> float:
    p.wait(120)
    with open(out, encoding="utf-8") as fh:
        return float(fh.read())


def health(ctx: zmq.Context, svc: Service) -> dict[str, Any]:
    return msgpack.unpackb(req(ctx, svc.ep["control"], msgpack.packb({"op": "health"})), raw=False)


def vm(pid: int, key: str) -> float:
    """A /proc/PID/status memory line in MB (Linux)."""
    with open(f"/proc/{pid}/status", encoding="utf-8") as fh:
        for line in fh:
            if line.startswith(key + ":"):
                return int(line.split()[1]) / 1024.0
    raise RuntimeError(f"no {key} in /proc/{pid}/status")


def ack_rtt(ctx: zmq.Context, svc: Service, topo: Any, n: int) -> list[float]:
    d = ctx.socket(zmq.DEALER)
    d.linger = 0
    d.connect(svc.ep["ingest"])
    out = []
    try:
        a, b = topo.nodes[int(topo.src[0])], topo.nodes[int(topo.dst[0])]
        c = next(z for z in topo.nodes if z not in (a, b))
        for i in range(n):
            f = wire.encode_ingest_rows("rtt", i + 1, [[a, b, c, float(topo.delay_s[0]) * 2]])
            t0 = time.perf_counter()
            d.send_multipart([b"", f])
            d.recv_multipart()
            out.append(time.perf_counter() - t0)
            time.sleep(0.005)
    finally:
        d.close(0)
    return out


def link_down_latency(ctx: zmq.Context, svc: Service, topo: Any, trials: int,
                      rng: np.random.Generator) -> list[float]:
    """Seconds from a link-down row (x -> y, y a next hop in x's table) to a table of x
    without y."""
    sub, d = table_watch(ctx, svc)
    out: list[float] = []
    bno = 0

    def send(links: list[list[str]]) -> None:
        nonlocal bno
        bno += 1
        d.send_multipart([b"", wire.encode_ingest_rows("probe", bno, [], links)])
        d.recv_multipart()

    try:
        time.sleep(0.3)
        for _ in range(trials):
            tables = msgpack.unpackb(req(ctx, svc.ep["control"], msgpack.packb({"op": "tables"})),
                                     raw=False)["tables"]
            # a node with two or more neighbours, and a neighbour its table uses
            cand = []
            for k in rng.permutation(topo.n_links)[:50]:
                x, y = topo.nodes[int(topo.src[k])], topo.nodes[int(topo.dst[k])]
                if len(topo.neighbours[topo.index[x]]) < 2:
                    continue
                if any(h == y for ws in tables[x].values() for h, _ in ws):
                    cand.append((x, y))
            if not cand:
                continue
            x, y = cand[0]
            while sub.poll(0):
                sub.recv_multipart()
            t0 = time.perf_counter()
            d.send_multipart([b"", wire.encode_ingest_rows("probe", bno + 1, [], [[x, y, "down"]])])
            bno += 1
            deadline = t0 + 1.0
            seen = None
            while True:
                left = deadline - time.perf_counter()
                if left <= 0 or not sub.poll(int(left * 1000) + 1):
                    break
                msg = wire.decode_table(sub.recv_multipart())
                if msg["node"] == x and not any(h == y for ws in msg["routes"].values() for h, _ in ws):
                    seen = time.perf_counter() - t0
                    break
            d.recv_multipart()     # the ack
            if seen is None:
                raise RuntimeError(f"link {x}->{y} down: no table of {x} without {y} within 1 s")
            out.append(seen)
            send([[x, y, "up"]])
            time.sleep(0.02)
    finally:
        sub.close(0)
        d.close(0)
    return out


def _fig(value: float, unit: str, ratio: float, against: str) -> dict[str, Any]:
    return {"value": float(value), "unit": unit, "ratio": float(ratio), "against": against}


def run(quick: bool) -> dict[str, dict[str, Any]]:
    rng = np.random.default_rng(2027)
    base = tempfile.mkdtemp(prefix="rdl-", dir="/tmp")
    ctx = zmq.Context()
    svcs: list[Service] = []
    loads: list[subprocess.Popen] = []
    figs: dict[str, dict[str, Any]] = {}
    phases: dict[str, float] = {}        # where this module's time goes (seconds)
    mark = [time.perf_counter()]

    def phase(name: str) -> None:
        now = time.perf_counter()
        phases[name] = round(now - mark[0], 2)
        mark[0] = now

    try:
        # 100 nodes: latency under load
        topo, tpath = ring_file(base, 100, node_link=True)   # no memory figure at 100
        svc = Service(base, "n100", tpath)
        svcs.append(svc)
        phase("start_n100")
        trials = 25 if quick else 150
        secs = 4.5 if quick else 25.0
        p, out = start_load(svc, tpath, secs, base, "n100")
        loads.append(p)
        time.sleep(1.0)
        rtt = ack_rtt(ctx, svc, topo, 50 if quick else 200)
        lat = link_down_latency(ctx, svc, topo, trials, rng)
        carried = finish_load(p, out)
        phase("load_n100")
        h = health(ctx, svc)
        stall = float(h["loop"]["max_turn_s"])
        parts = h["loop"].get("max_turn_parts_s", {})
        where = "100"
        cpu, cpu_parts = float(h["loop"]["max_turn_cpu_s"]), h["loop"]["max_turn_cpu_parts_s"]
        cpu_where = "100"
        svc.kill()      # its figures are in: no final decision and snapshot
        phase("stop_n100")
        rtt50 = float(np.percentile(rtt, 50))
        for q in (50, 99):
            v = float(np.percentile(lat, q))
            figs[f"table_latency_p{q}_s"] = _fig(
                v, "s", v / rtt50, f"the service's ack round trip p50 under the same load "
                f"({rtt50 * 1e6:.0f} us); link-down row to the subscriber, 100-node ring, "
                f"{RATE / 1000:g} k obs/s background, default config, {len(lat)} trials")
        figs["load_rows_per_s_n100"] = _fig(carried, "rows/s", carried / RATE,
                                            f"{RATE / 1000:g} k rows/s asked (acknowledged)")
        # 1,000 nodes: peak memory and stalls over start-up, load and a snapshot
        topo1, tpath1 = ring_file(base, 1000)
        svc1 = Service(base, "n1000", tpath1)
        svcs.append(svc1)
        ready = vm(svc1.proc.pid, "VmRSS")
        phase("start_n1000")
        secs1 = 3.0 if quick else 30.0
        p, out = start_load(svc1, tpath1, secs1, base, "n1000")
        loads.append(p)
        carried1 = finish_load(p, out)
        phase("load_n1000")
        req(ctx, svc1.ep["control"], msgpack.packb({"op": "snapshot"}), timeout_ms=120000)
        phase("snapshot_n1000")
        peak = vm(svc1.proc.pid, "VmHWM")
        h1 = health(ctx, svc1)
        if float(h1["loop"]["max_turn_s"]) > stall:
            stall, parts = float(h1["loop"]["max_turn_s"]), h1["loop"].get("max_turn_parts_s", {})
            where = "1,000"
        if float(h1["loop"]["max_turn_cpu_s"]) > cpu:
            cpu, cpu_parts = float(h1["loop"]["max_turn_cpu_s"]), h1["loop"]["max_turn_cpu_parts_s"]
            cpu_where = "1,000"
        svc1.kill()     # its figures are in: no final 1,000-node snapshot (about 2 s)
        phase("kill_n1000")
        figs["rss_peak_mb_n1000"] = _fig(peak, "MB", peak / ready,
                                         f"the same service's RSS when ready ({ready:.0f} MB); "
                                         f"start-up, {secs1:g} s at {RATE / 1000:g} k rows/s, a snapshot")
        figs["load_rows_per_s_n1000"] = _fig(carried1, "rows/s", carried1 / RATE,
                                             f"{RATE / 1000:g} k rows/s asked (acknowledged)")
        def show(p: dict[str, float]) -> str:
            return ", ".join(f"{k} {v * 1e3:.1f} ms" for k, v in p.items())

        figs["loop_stall_max_s"] = _fig(stall, "s", stall / rtt50,
                                        f"the 100-node service's ack round trip p50 ({rtt50 * 1e6:.0f} us); "
                                        f"longest loop turn of the 100- and 1,000-node runs (the "
                                        f"{where}-node one: {show(parts)}; cpu: the loop thread's "
                                        "own CPU time in that turn)")
        figs["loop_stall_max_s"]["phases_s"] = phases
        figs["loop_stall_max_s"]["decide_n1000"] = h1["loop"].get("decide", {})
        figs["loop_stall_max_cpu_s"] = _fig(cpu, "s", cpu / max(stall, 1e-9),
                                            f"the longest turn's wall time ({stall * 1e3:.1f} ms); "
                                            "the loop turn that took the most CPU of the loop's "
                                            f"thread, both runs (the {cpu_where}-node one: "
                                            f"{show(cpu_parts)}): what waiting for a core, the GIL "
                                            "or the disk leaves out of loop_stall_max_s")
    finally:
        for p in loads:
            if p.poll() is None:
                p.kill()
                p.wait(5)
        for s in svcs:
            s.stop()
        ctx.destroy(0)
        shutil.rmtree(base, ignore_errors=True)
    return figs


if __name__ == "__main__":
    if len(sys.argv) == 7 and sys.argv[1] == "--load":
        load(sys.argv[2], sys.argv[3], float(sys.argv[4]), float(sys.argv[5]), sys.argv[6])
    else:
        import json

        print(json.dumps(run("--quick" in sys.argv), indent=2))
