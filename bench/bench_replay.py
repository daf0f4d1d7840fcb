"""Replay and trace-import benchmarks.

Every figure's ratio is to a baseline measured in the same run:

* ``replay_obs_per_s`` — ``routerd replay``'s core (:func:`routerd.tools.replay.replay`: read the
  journal segments, check CRCs, decode msgpack bodies, apply them with
  ``journal.replay_into``, compare at every tick) in observations/s; ratio to the engine's
  own rate on the same batches held in memory (``Engine.observe`` + ``Engine.decide`` at
  the same points) — the ceiling replay approaches when reading costs nothing.
* ``replay_compare3_obs_per_s`` — the same journal with three ``--compare`` variants (four
  engines in lockstep), observations/s of journal; ratio to the single replay.
* ``trace_import_pkts_per_s`` — :func:`routerd.sim.trace.load_capture` on a pcap (walk, decode
  every Ethernet/IPv4/UDP packet with dpkt, map both addresses, build the arrays) in
  packets/s; ratio to dpkt's bare iteration over the same file (``for ts, buf in
  dpkt.pcap.Reader(f)``), the floor any dpkt-based reader pays.

The journal is our own: random hop observations on a 60-node ring with chords (seeded),
256-row batches, a decision every 4 batches, as the service would journal them.
"""
from __future__ import annotations

import os
import shutil
import socket
import struct
import tempfile
import time
from typing import Any

import numpy as np

from bench_engine import ring_with_chords
from routerd.core import topology as T
from routerd.core.engine import Engine, EngineSettings, HopBatch
from routerd.io import journal as J
from routerd.tools import replay as R


def ring(n: int, seed: int = 0) -> T.Topology:
    """A ring of n nodes with n chords (bench_engine's synthetic graph, the same one)."""
    return ring_with_chords(n, n, seed)


def batches(topo: T.Topology, count: int, m: int, seed: int = 1) -> list[HopBatch]:
    rng = np.random.default_rng(seed)
    out = []
    for _ in range(count):
        k = rng.integers(0, topo.n_links, m)
        x, y = topo.src[k].astype(np.int64), topo.dst[k].astype(np.int64)
        d = rng.integers(0, topo.n - 1, m)
        d = np.where(d >= x, d + 1, d)
        out.append(HopBatch.of(x, y, d, topo.delay_s[k] * (1 + rng.exponential(0.5, m))))
    return out


def write_journal(d: str, topo: T.Topology, bs: list[HopBatch], every: int) -> None:
    s = EngineSettings(mode="greedy")
    j = J.Journal(J.journal_dir(d), fsync="never")
    j.append("start", {"topology": topo.digest, "nodes": list(topo.nodes),
                       "settings": J.settings_to_dict(s), "epoch": 1})
    t = 0.0
    for i, b in enumerate(bs):
        t += 0.01
        j.append("batch", J.batch_body("bench", i, t, b))
        if i % every == every - 1:
            t += 0.001
            j.append("tick", {"t": t})
    j.close()


def engine_rate(topo: T.Topology, bs: list[HopBatch], every: int) -> float:
    eng = Engine(topo, EngineSettings(mode="greedy"))
    t0 = time.perf_counter()
    t = 0.0
    for i, b in enumerate(bs):
        t += 0.01
        eng.observe(b, now=t)
        if i % every == every - 1:
            t += 0.001
            eng.decide(t)
    return sum(len(b) for b in bs) / (time.perf_counter() - t0)


def replay_rate(d: str, topo: T.Topology, variants: list[R.Variant]) -> float:
    src = R.Source(J.journal_dir(d), None)
    t0 = time.perf_counter()
    res = R.replay(src, topo, variants)
    return res["counts"]["hops"] / (time.perf_counter() - t0)


def eth_ip_udp(src: bytes, dst: bytes, n: int) -> bytes:
    udp = struct.pack("!HHHH", 4000, 5000, 8 + n, 0) + b"\x00" * n
    ip = struct.pack("!BBHHHBBH4s4s", 0x45, 0, 20 + len(udp), 1, 0, 64, 17, 0, src, dst) + udp
    return b"\x02" * 6 + b"\x04" * 6 + b"\x08\x00" + ip


def write_capture(path: str, topo: T.Topology, count: int) -> str:
    import dpkt

    rng = np.random.default_rng(2)
    hosts = [socket.inet_aton(f"10.{i // 250}.{i % 250}.1") for i in range(topo.n)]
    with open(path, "wb") as fh:
        w = dpkt.pcap.Writer(fh)
        t = 1.7e9
        for a, b in zip(rng.integers(0, topo.n, count).tolist(), rng.integers(0, topo.n, count).tolist()):
            t += 1e-4
            w.writepkt(eth_ip_udp(hosts[a], hosts[b], 64), ts=t)
    amap = path + ".map.yaml"
    with open(amap, "w", encoding="utf-8") as fh:
        fh.writelines(f"{nm}: [10.{i // 250}.{i % 250}.0/24]\n" for i, nm in enumerate(topo.nodes))
    return amap


def run(quick: bool) -> dict[str, dict[str, Any]]:
    from routerd.sim import trace as TR

    topo = ring(60)
    nb = 200 if quick else 600
    reps = 3 if quick else 5
    bs = batches(topo, nb, 256)
    tmp = tempfile.mkdtemp(prefix="routerd-bench-replay-")
    figs: dict[str, dict[str, Any]] = {}
    try:
        write_journal(tmp, topo, bs, 4)
        vs = [R.Variant("a", {"margin": 0.2}), R.Variant("b", {"explore_max": 0.05}),
              R.Variant("c", {"alpha": 0.3, "step_mode": "constant"})]
        # interleaved, best of each: a shared machine's load drifts between measurements
        eng = rep = rep3 = 0.0
        for _ in range(reps):
            eng = max(eng, engine_rate(topo, bs, 4))
            rep = max(rep, replay_rate(tmp, topo, []))
            rep3 = max(rep3, replay_rate(tmp, topo, vs))
        figs["replay_obs_per_s"] = {"value": rep, "unit": "observations/s", "ratio": rep / eng,
                                    "against": "the engine's own observe+decide rate on the same "
                                               "batches in memory"}
        figs["replay_compare3_obs_per_s"] = {"value": rep3, "unit": "observations/s", "ratio": rep3 / rep,
                                             "against": "the same replay without variants"}
        cap = os.path.join(tmp, "c.pcap")
        count = 20_000 if quick else 200_000
        amap_path = write_capture(cap, topo, count)
        amap = TR.load_address_map(amap_path, topo)

        def bare() -> float:
            import dpkt

            t0 = time.perf_counter()
            k = 0
            with open(cap, "rb") as fh:
                for _ts, _buf in dpkt.pcap.Reader(fh):
                    k += 1
            return k / (time.perf_counter() - t0)

        def ours() -> float:
            t0 = time.perf_counter()
            src = TR.load_capture(cap, topo, amap)
            dt = time.perf_counter() - t0
            return src.report.records / dt

        fl = imp = 0.0
        for _ in range(reps):
            fl = max(fl, bare())
            imp = max(imp, ours())
        figs["trace_import_pkts_per_s"] = {"value": imp, "unit": "packets/s", "ratio": imp / fl,
                                           "against": "dpkt's bare pcap.Reader iteration over the same file"}
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    return figs


if __name__ == "__main__":
    import json
    import sys

    print(json.dumps(run("--quick" in sys.argv), indent=1))
