"""Service ingest benchmarks: observations/s through ``routerd serve`` against the bare transport.

Measured in one run, on ipc:// endpoints in a tmp dir, with the client in this process and
the server in another (this machine has two cores):

* the **service** — a real ``routerd serve`` process on the built-in demo lab;
* the **ceiling** — a bare pyzmq + msgpack server carrying the same frames with no work: a
  ROUTER that unpacks each frame and answers a small msgpack ack, and a PULL that unpacks
  and counts.

Both get byte-identical frames: hop rows for random (link, destination) pairs of the demo
lab, in the named-row format (``hops``: lists of names) and the columnar one (``cols``:
int32/float64 little-endian bytes), 1, 64 and 1,024 rows per batch; acknowledged (a DEALER
keeping 16 batches in flight, like :class:`routerd.agent.client.Reporter`) and fire-and-forget
(PUSH → PULL; the time runs until the server has counted every frame).

**fsync.** The throughput-ceiling comparison runs the service with its default config:
``service.journal.fsync: batch``, the fsync in the journal writer thread
(``service.journal.sync_thread``), every acknowledgement sent only once the fsync covering
its batch has returned.  Side runs, each next to a run of the default service: ``never``
(no fsync at all), the fsync in the loop (``sync_thread: false``, the pre-thread way) and
without ``gc.freeze()`` after start-up (``service.gc_freeze``).

Figures (``value``, ``unit``, ``ratio``, ``against``):

* ``ingest_ratio_rows`` / ``ingest_ratio_cols`` — service / ceiling rows/s, acknowledged
  (fsync ``batch``), 1,024 rows per batch, named rows / columns (the columns' target >= 0.2);
* ``ingest_rows_per_s`` / ``ingest_cols_per_s`` — the service's rows/s for those two;
* ``ingest_{rows|cols}_{ack|fire}_b{1|64|1024}_per_s`` — every cell, ratio to its ceiling;
* ``ingest_cols_ack_b1024_fsync_batch_per_s`` (the default service, ratio to ``never``),
  ``ingest_cols_ack_b1024_fsync_never_per_s``, ``ingest_cols_ack_b1024_loop_fsync_per_s``,
  ``ingest_cols_ack_b1024_no_gc_freeze_per_s`` (ratio to the default service; the last two
  not with ``--quick``);
* ``table_latency_idle_p50_s`` / ``table_latency_idle_p99_s`` — with no other load, from
  sending an observation that changes a route to the new table at a subscriber, ratio to
  the bare transport's request/reply round trip (p50) measured in the same run.  Each
  trial reports a 9 s hop on a (node, destination)'s greedy next hop; trials where the
  engine keeps that next hop anyway (its loop prevention falls back to the previous
  choice) are not counted.  Greedy mode (``engine.mode: greedy``): split mode, the
  default, answers one row with a share step scaled by observed time, not a flip.  (``table_latency_p99_s`` under load: bench_service_load.)
"""
from __future__ import annotations

import os
import shutil
import struct
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable
from typing import Any

import msgpack
import numpy as np
import zmq

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
if ROOT not in sys.path:
    sys.path.insert(0, ROOT)

from routerd.io import config, wire
from routerd.io.childproc import parse_ready
from routerd.io.inputs import load_topology

SIZES = (1, 64, 1024)
WINDOW = 16
BATCH0 = 1 << 40           # batch numbers >= 2^32 are packed as msgpack uint64: patchable
_MARK = BATCH0 + 0x5A5A5A


# ---- frames ---------------------------------------------------------------------------------
class Frames:
    """Templates of one batch shape; ``frame(n)`` patches batch number n into a template."""

    def __init__(self, fmt: str, rows: int, topo: Any, rng: np.random.Generator, variants: int = 8):
        self.rows = rows
        self.templates: list[tuple[bytes, int]] = []
        for _ in range(variants):
            link = rng.integers(0, topo.n_links, rows)
            x, y = topo.src[link], topo.dst[link]
            d = rng.integers(0, topo.n - 1, rows)
            d = np.where(d >= x, d + 1, d)
            lat = topo.delay_s[link] * rng.uniform(1.0, 3.0, rows)
            if fmt == "cols":
                f = wire.encode_ingest_cols("bench", _MARK, topo.digest, x, y, d, lat)
            else:
                names = topo.nodes
                f = wire.encode_ingest_rows("bench", _MARK, [
                    [names[a], names[b], names[c], float(t)] for a, b, c, t in zip(x, y, d, lat)])
            off = f.index(b"\xcf" + struct.pack(">Q", _MARK)) + 1
            self.templates.append((f, off))

    def frame(self, n: int) -> bytes:
        f, off = self.templates[n % len(self.templates)]
        return b"".join((f[:off], struct.pack(">Q", BATCH0 + n), f[off + 8:]))


# ---- the bare server (run in its own process) ---------------------------------------------
def bare_server(base: str) -> None:
    """ROUTER: unpack, ack.  PULL: unpack, count.  REP: answer the PULL count."""
    ctx = zmq.Context()
    r = ctx.socket(zmq.ROUTER)
    p = ctx.socket(zmq.PULL)
    c = ctx.socket(zmq.REP)
    for s in (r, p, c):
        s.linger = 0
        s.sndhwm = s.rcvhwm = 1000
    r.bind(f"ipc://{base}/bare-in")
    p.bind(f"ipc://{base}/bare-pull")
    c.bind(f"ipc://{base}/bare-ctl")
    poller = zmq.Poller()
    for s in (r, p, c):
        poller.register(s, zmq.POLLIN)
    pulled = 0
    while True:
        ev = dict(poller.poll())
        if r in ev:
            for _ in range(256):
                try:
                    parts = r.recv_multipart(zmq.NOBLOCK)
                except zmq.Again:
                    break
                obj = msgpack.unpackb(parts[-1], raw=False)
                ack = msgpack.packb({"v": 1, "batch": obj["batch"], "accepted": 0, "rejected": []})
                r.send_multipart(parts[:-1] + [ack])
        if p in ev:
            for _ in range(256):
                try:
                    data = p.recv(zmq.NOBLOCK)
                except zmq.Again:
                    break
                msgpack.unpackb(data, raw=False)
                pulled += 1
        if c in ev:
            if c.recv() == b"stop":
                c.send(b"bye")
                break
            c.send(msgpack.packb(pulled))
    ctx.destroy(0)


# ---- clients --------------------------------------------------------------------------------
def acked(ctx: zmq.Context, ep: str, frames: Frames, duration: float, first: int,
          check: Callable[[dict], None] | None = None) -> tuple[float, int]:
    """(rows/s, frames used): a DEALER with WINDOW batches in flight for ``duration``."""
    s = ctx.socket(zmq.DEALER)
    s.linger = 0
    s.sndhwm = s.rcvhwm = 1000
    s.connect(ep)
    try:
        sent = got = 0
        t0 = time.perf_counter()
        stop_at = t0 + duration
        while True:
            while sent - got < WINDOW and (sent == got or time.perf_counter() < stop_at):
                s.send_multipart([b"", frames.frame(first + sent)])
                sent += 1
            rep = s.recv_multipart()[-1]
            got += 1
            if check is not None and got == 1:
                check(msgpack.unpackb(rep, raw=False))
            if got == sent and time.perf_counter() >= stop_at:
                break
        dt = time.perf_counter() - t0
        return got * frames.rows / dt, sent
    finally:
        s.close(0)


def fire(ctx: zmq.Context, ep: str, frames: Frames, duration: float, first: int,
         count: Callable[[], int], backlog: int | None = None) -> tuple[float, int]:
    """(rows/s, frames used): PUSH for ``duration``, then wait until the server counted all.

    ``backlog`` (quick mode): at most that many frames sent and not yet counted, checked
    by asking the server's count only when the local tally says it may be exceeded, so
    the wait at the end is short and the server stays saturated."""
    s = ctx.socket(zmq.PUSH)
    s.linger = 0
    s.sndhwm = 1000
    s.connect(ep)
    try:
        base = count()
        sent = counted = 0
        t0 = time.perf_counter()
        stop_at = t0 + duration
        while time.perf_counter() < stop_at:
            for _ in range(8):
                s.send(frames.frame(first + sent))
                sent += 1
            if backlog is not None and sent - counted > backlog:   # ask only when it may be
                counted = count() - base
                while sent - counted > backlog and time.perf_counter() < stop_at:
                    time.sleep(0.0005)
                    counted = count() - base
        deadline = time.perf_counter() + 120
        while count() - base < sent:
            if time.perf_counter() > deadline:
                raise RuntimeError(f"the server counted {count() - base} of {sent} frames")
            time.sleep(0.002)
        dt = time.perf_counter() - t0
        return sent * frames.rows / dt, sent
    finally:
        s.close(0)


def req(ctx: zmq.Context, ep: str, payload: bytes, timeout_ms: int = 10000) -> bytes:
    s = ctx.socket(zmq.REQ)
    s.linger = 0
    s.rcvtimeo = timeout_ms
    s.connect(ep)
    try:
        s.send(payload)
        return s.recv()
    finally:
        s.close(0)


# ---- the service process --------------------------------------------------------------------
class Service:
    def __init__(self, base: str, name: str, topology: str | None = None,
                 engine: dict[str, Any] | None = None, **service_keys: Any):
        self.dir = os.path.join(base, name)
        os.makedirs(self.dir)
        keys = {"snapshot_interval_s": 3600.0, **service_keys}
        lines = ["engine:", *(f"  {k}: {v}" for k, v in engine.items())] if engine else []
        lines += ["service:"]
        for k, v in keys.items():
            if k.startswith("journal."):
                continue
            lines.append(f"  {k}: {v}")
        j = {k.split(".", 1)[1]: v for k, v in keys.items() if k.startswith("journal.")}
        if j:
            lines.append("  journal:")
            lines += [f"    {k}: {v}" for k, v in j.items()]
        cfg = os.path.join(self.dir, "c.yaml")
        with open(cfg, "w", encoding="utf-8") as fh:
            fh.write("\n".join(lines) + "\n")
        d = self.dir
        self.ep = {"ingest": f"ipc://{d}/in", "pull": f"ipc://{d}/pull",
                   "publish": f"ipc://{d}/pub", "control": f"ipc://{d}/ctl"}
        cmd = [sys.executable, "-m", "routerd", "serve", "--config", cfg, "--ingest", self.ep["ingest"],
               "--pull", self.ep["pull"], "--publish", self.ep["publish"], "--control",
               self.ep["control"], "--metrics", "127.0.0.1:0", "--state-dir", os.path.join(d, "state")]
        if topology is not None:
            cmd += ["--topology", topology]
        self.proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL,
                                     text=True, cwd=ROOT)
        assert self.proc.stdout is not None
        for line in self.proc.stdout:
            if parse_ready(line):
                break
        else:
            raise RuntimeError(f"service {name} did not start (exit {self.proc.wait()})")

    def batches(self, ctx: zmq.Context) -> int:
        rep = msgpack.unpackb(req(ctx, self.ep["control"], msgpack.packb({"op": "health"})), raw=False)
        return int(rep["counts"]["batches"]["accepted"])

    def kill(self) -> None:
        """End it without its shutdown (decision, final snapshot): for a service whose
        state dir is thrown away, when the snapshot would only cost time."""
        if self.proc.poll() is None:
            self.proc.kill()
            self.proc.wait(20)
        self.stop()

    def stop(self) -> None:
        if self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(20)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(5)
        if self.proc.stdout is not None:
            self.proc.stdout.close()


def _fig(value: float, unit: str, ratio: float, against: str) -> dict[str, Any]:
    return {"value": float(value), "unit": unit, "ratio": float(ratio), "against": against}


def table_watch(ctx: zmq.Context, svc: Service) -> tuple[zmq.Socket, zmq.Socket]:
    """The two sockets a table-latency trial uses (here and in bench_service_load): a SUB on
    the service's tables (deep queue: nothing dropped while a trial decodes) and a DEALER on
    its ingest endpoint.  The caller closes both."""
    sub = ctx.socket(zmq.SUB)
    sub.linger = 0
    sub.rcvhwm = 100000
    sub.setsockopt(zmq.SUBSCRIBE, wire.TABLE_TOPIC)
    sub.connect(svc.ep["publish"])
    d = ctx.socket(zmq.DEALER)
    d.linger = 0
    d.connect(svc.ep["ingest"])
    return sub, d


def table_latency(ctx: zmq.Context, svc: Service, topo: Any, trials: int,
                  rng: np.random.Generator) -> list[float]:
    """Seconds from sending one observation that makes a greedy next hop much worse to a
    subscriber holding a table of that node with another next hop for that destination."""
    sub, d = table_watch(ctx, svc)
    out: list[float] = []
    try:
        tables = msgpack.unpackb(req(ctx, svc.ep["control"], msgpack.packb({"op": "tables"})),
                                 raw=False)["tables"]
        time.sleep(0.3)      # the SUB connection is up before the first trial
        pairs = [(x, dst) for x in topo.nodes for dst in topo.nodes
                 if x != dst and len(topo.neighbours[topo.index[x]]) > 1]
        order = rng.permutation(len(pairs))[:trials]
        for n, i in enumerate(order):
            x, dst = pairs[int(i)]
            y = tables[x][dst][0][0]
            frame = wire.encode_ingest_rows("latency", n, [[x, y, dst, 9.0]])
            while sub.poll(0):
                sub.recv_multipart()
            time.sleep(0.03)      # > debounce_s: this trial is not held back by the last one
            t0 = time.perf_counter()
            d.send_multipart([b"", frame])
            deadline = t0 + 0.25   # a change arrives in ms; a trial that sees none in 0.25 s
            # is one where the engine kept the route (loop prevention fell back to it)
            while True:
                left = deadline - time.perf_counter()
                if left <= 0 or not sub.poll(int(left * 1000) + 1):
                    break
                msg = wire.decode_table(sub.recv_multipart())
                if msg["node"] == x and msg["routes"].get(dst, [[y]])[0][0] != y:
                    out.append(time.perf_counter() - t0)
                    tables[x] = msg["routes"]
                    break
            d.recv_multipart()    # the ack
    finally:
        sub.close(0)
        d.close(0)
    return out


def throughput_topology(base: str) -> tuple[Any, str]:
    """The throughput runs' network: bench_engine's synthetic ring with chords, 100 nodes
    (our own graph).  The demo lab's 240 (node, destination) keys make most rows of a
    1,024-row batch depend on each other, which measures the engine's exact sequential
    semantics, not the service; 100 nodes give ~10,000 keys.  Written as node-link JSON
    (the same topology and digest as our YAML): the services read it in a few ms where the
    pure-Python YAML parser takes about half a second at this size, and no figure here is
    about start-up."""
    sys.path.insert(0, HERE)
    from bench_engine import ring_with_chords, write_node_link
    from routerd.io import topofiles as TF

    t = ring_with_chords(100, 100)
    path = os.path.join(base, "ring100.json")
    write_node_link(t, path)
    return TF.load(path), path


def engine_only(topo: Any, frames: Frames, duration: float) -> float:
    """rows/s of decode + Engine.observe alone, in this process, on the same frames."""
    from routerd.core.engine import Engine, EngineSettings

    eng = Engine(topo, EngineSettings(mode="greedy"))
    n = 0
    t0 = time.perf_counter()
    while time.perf_counter() - t0 < duration:
        ing = wire.decode_ingest(frames.frame(n), topo)
        assert not isinstance(ing, wire.WireError)
        eng.observe(ing.hops)
        n += 1
    return n * frames.rows / (time.perf_counter() - t0)


def run(quick: bool) -> dict[str, dict[str, Any]]:
    demo = load_topology(config.load(None))
    rng = np.random.default_rng(2026)
    dur = 0.3 if quick else 2.0
    # quick: the headline 1,024-row cells keep best of two, the others and the side
    # comparisons get one trial each (the whole quick module in about half the time)
    trials_small = 1 if quick else 2
    base = tempfile.mkdtemp(prefix="rdb-", dir="/tmp")
    ctx = zmq.Context()
    procs: list[Any] = []
    figs: dict[str, dict[str, Any]] = {}
    try:
        topo, tpath = throughput_topology(base)
        bare = subprocess.Popen([sys.executable, os.path.abspath(__file__), "--bare-server", base],
                                cwd=ROOT)
        procs.append(bare)
        fast = Service(base, "default", tpath)
        procs.append(fast)
        time.sleep(0.3)
        def bare_count() -> int:
            return int(msgpack.unpackb(req(ctx, f"ipc://{base}/bare-ctl", b"count")))

        def ok(rows: int) -> Callable[[dict], None]:
            def check(a: dict) -> None:
                if a.get("accepted") != rows:
                    raise RuntimeError(f"the service did not accept a benchmark batch: {a}")
            return check

        def cell(key: str, frames: Frames, dt: float, f0: int) -> tuple[float, int]:
            if key == "b_ack":
                return acked(ctx, f"ipc://{base}/bare-in", frames, dt, f0)
            if key == "s_ack":
                return acked(ctx, fast.ep["ingest"], frames, dt, f0, ok(frames.rows))
            bl = max(32, min(512, 131072 // frames.rows)) if quick else None
            if key == "b_fire":
                return fire(ctx, f"ipc://{base}/bare-pull", frames, dt, f0, bare_count, bl)
            return fire(ctx, fast.ep["pull"], frames, dt, f0, lambda: fast.batches(ctx), bl)

        first = 0
        # warm-up: first batches pay for lazily built tables and cold caches
        warm = Frames("cols", 1024, topo, rng)
        _, used = acked(ctx, fast.ep["ingest"], warm, dur / 2, first)
        first += used
        for fmt in ("rows", "cols"):
            for size in SIZES:
                frames = Frames(fmt, size, topo, rng)
                dt = dur if size > 1 else dur / 2
                best = {"b_ack": 0.0, "s_ack": 0.0, "b_fire": 0.0, "s_fire": 0.0}
                for _ in range(2 if size >= 1024 else trials_small):   # interleaved, best
                    # of two: other load on the machine cancels
                    for key in list(best):
                        v, used = cell(key, frames, dt, first)
                        first += used
                        best[key] = max(best[key], v)
                for mode in ("ack", "fire"):
                    sv, bv = best[f"s_{mode}"], best[f"b_{mode}"]
                    figs[f"ingest_{fmt}_{mode}_b{size}_per_s"] = _fig(
                        sv, "rows/s", sv / bv, f"bare pyzmq+msgpack, same frames ({bv:.4g} rows/s)")
                if size == 1024:
                    e = max(engine_only(topo, frames, dt) for _ in range(trials_small))
                    figs[f"ingest_{fmt}_engine_only_b1024_per_s"] = _fig(
                        e, "rows/s", e / best["b_ack"], "bare pyzmq+msgpack acknowledged, same "
                        "frames: decode + Engine.observe alone, no sockets")
        for fmt, name in (("rows", "ingest_rows_per_s"), ("cols", "ingest_cols_per_s")):
            f = figs[f"ingest_{fmt}_ack_b1024_per_s"]
            figs[name] = dict(f)
            figs[f"ingest_ratio_{fmt}"] = _fig(f["ratio"], "ratio", f["ratio"],
                                              "bare pyzmq+msgpack, 1,024-row batches, acknowledged, "
                                              f"service default config (fsync batch), 100-node ring: "
                                              f"{f['value']:.4g} rows/s")
        # the default fsync policy, and the garbage collector left alone: each run next to a
        # run of the reference service, best of two each, so load from elsewhere cancels out
        frames = Frames("cols", 1024, topo, rng)
        # and the greedy learner (engine.mode greedy, no share decisions): what split's
        # decisions, publications and rate estimates cost the default service
        sides: list[tuple[str, dict[str, Any] | None, dict[str, Any]]] = [
            ("ingest_cols_ack_b1024_fsync_never_per_s", None, {"journal.fsync": "never"}),
            ("ingest_cols_ack_b1024_greedy_per_s", {"mode": "greedy"}, {})]
        if not quick:    # quick: the fsync and learner comparisons only (service starts)
            sides += [("ingest_cols_ack_b1024_loop_fsync_per_s", None, {"journal.sync_thread": "false"}),
                      ("ingest_cols_ack_b1024_no_gc_freeze_per_s", None, {"gc_freeze": "false"})]
        bare_ack = figs["ingest_cols_ack_b1024_per_s"]["value"] / figs["ingest_cols_ack_b1024_per_s"]["ratio"]
        for name, eng_keys, keys in sides:
            svc = Service(base, name, tpath, engine=eng_keys, **keys)
            procs.append(svc)
            _, used = acked(ctx, svc.ep["ingest"], warm, dur / 2, first)
            first += used
            best_v = best_ref = 0.0
            for _ in range(trials_small):
                v, used = acked(ctx, svc.ep["ingest"], frames, dur, first, ok(1024))
                first += used
                r, used = acked(ctx, fast.ep["ingest"], frames, dur, first, ok(1024))
                first += used
                best_v, best_ref = max(best_v, v), max(best_ref, r)
            svc.kill()       # its figure is in: no final decision and snapshot
            figs[name] = _fig(best_v, "rows/s", best_v / best_ref,
                              f"the default service (fsync batch in the writer thread, gc.freeze) "
                              f"next to it ({best_ref:.4g} rows/s)")
            if name.endswith("greedy_per_s"):
                # context for issue 15's ingest target: the greedy learner's figure over
                # the bare server's headline cell earlier in this run
                figs["ingest_ratio_cols_greedy"] = _fig(
                    best_v / bare_ack, "ratio", best_v / bare_ack,
                    f"bare pyzmq+msgpack, 1,024-row batches, acknowledged ({bare_ack:.4g} rows/s): "
                    f"the service with engine.mode greedy ({best_v:.4g} rows/s)")
            if name.endswith("fsync_never_per_s"):
                figs["ingest_cols_ack_b1024_fsync_batch_per_s"] = _fig(
                    best_ref, "rows/s", best_ref / best_v, f"the same service with fsync never "
                    f"next to it ({best_v:.4g} rows/s)")
        fast.kill()          # its figures are in: no final decision and snapshot
        # table latency on the demo lab with the default config, against the bare
        # request/reply round trip
        rtt = []
        one = Frames("rows", 1, demo, rng)
        s = ctx.socket(zmq.DEALER)
        s.linger = 0
        s.connect(f"ipc://{base}/bare-in")
        for i in range(200):
            t0 = time.perf_counter()
            s.send_multipart([b"", one.frame(i)])
            s.recv_multipart()
            rtt.append(time.perf_counter() - t0)
        s.close(0)
        rtt50 = float(np.percentile(rtt, 50))
        # greedy: the figure is one observation flipping a greedy next hop; in split mode
        # (the default) one row moves shares by a step scaled by observed time, no flip
        # (a link-down row reaches the tables at once in both: bench_service_load)
        lab = Service(base, "demo-lab", engine={"mode": "greedy"})
        procs.append(lab)
        lat = table_latency(ctx, lab, demo, 25 if quick else 150, rng)
        if len(lat) < 10:
            raise RuntimeError(f"only {len(lat)} route changes reached the subscriber")
        for q in (50, 99):
            v = float(np.percentile(lat, q))
            figs[f"table_latency_idle_p{q}_s"] = _fig(
                v, "s", v / rtt50, f"bare ack round trip p50 ({rtt50 * 1e6:.0f} us); demo lab, "
                f"default config, no other load, {len(lat)} route changes")
        req(ctx, f"ipc://{base}/bare-ctl", b"stop")
    finally:
        for p in procs:
            if isinstance(p, Service):
                p.stop()
            elif p.poll() is None:
                p.kill()
                p.wait(5)
        ctx.destroy(0)
        shutil.rmtree(base, ignore_errors=True)
    return figs


if __name__ == "__main__":
    if len(sys.argv) == 3 and sys.argv[1] == "--bare-server":
        bare_server(sys.argv[2])
    else:
        import json

        print(json.dumps(run("--quick" in sys.argv), indent=2))
