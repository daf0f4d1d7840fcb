"""Sharding by destination (routerd/shard.py): real processes on ipc:// in tmp dirs.

The reference is one ``routerd serve`` process fed the same observation stream: the
sharded service must give the same acknowledgements (row numbers and reasons) and the same
tables, bit for bit (weights are msgpack float64 on both sides).  Why it must: Q-routing's
update for destination d reads and writes only d's estimates (Boyan & Littman, "Packet
routing in dynamically changing networks", NIPS 6, 1994, eq. 1 — the update is indexed by
the destination), and the engine's decisions are made per destination column.
"""
from __future__ import annotations

import os
import shutil
import signal
import threading
import time
from collections.abc import Iterator
from typing import Any

import msgpack
import numpy as np
import pytest
import zmq
from service_harness import ServiceProc, service_args

from routerd import config as _config
from routerd import journal as J
from routerd import shard, wire
from routerd.client import Reporter, TableSubscriber
from routerd.service import load_topology

pytestmark = pytest.mark.slow

CONF = """\
service:
  debounce_s: 0
  publish_interval_s: 0.3
  snapshot_interval_s: 3600
  journal:
    fsync: never
"""


@pytest.fixture
def base() -> Iterator[str]:
    import tempfile

    b = tempfile.mkdtemp(prefix="rd-sh-", dir="/tmp")
    with open(os.path.join(b, "conf.yaml"), "w") as fh:
        fh.write(CONF)
    try:
        yield b
    finally:
        shutil.rmtree(b, ignore_errors=True)


def _topo() -> Any:
    return load_topology(_config.load(None))


def _stream(seed: int, n_batches: int, rows: int) -> list[bytes]:
    """Batches of our own making on the demo lab: noisy hop latencies around each link's
    delay, some with the neighbour's estimate, a link going down and up again, and rows
    every stage must refuse (unknown names, negative latency, from == dst, a hop over the
    link while it is down, a bad link state)."""
    topo = _topo()
    rng = np.random.default_rng(seed)
    names = topo.nodes
    links = [(names[a], names[b], float(d)) for a, b, d in
             zip(topo.src.tolist(), topo.dst.tolist(), topo.delay_s.tolist())]
    down = links[3]
    out = []
    for i in range(n_batches):
        hops: list[list[Any]] = []
        lk: list[list[Any]] = []
        for _ in range(rows):
            a, b, d = links[int(rng.integers(len(links)))]
            dst = names[int(rng.integers(len(names)))]
            lat = d * (1.0 + float(rng.exponential(0.5)))
            if rng.random() < 0.3:
                hops.append([a, b, dst, lat, float(rng.uniform(0, 0.02))])
            else:
                hops.append([a, b, dst, lat])
        if i % 7 == 3:
            hops.append(["nowhere", names[0], names[1], 0.001])      # unknown_node (decode)
            hops.append([names[0], names[1], names[0], 0.001])        # at_destination (engine)
            hops.append([down[0], down[1], names[5], -1.0])           # bad_latency (engine)
        if i == n_batches // 3:
            lk.append([down[0], down[1], "down"])
            lk.append([names[0], names[1], "sideways"])               # bad_link_state
        if n_batches // 3 < i < 2 * n_batches // 3:
            hops.append([down[0], down[1], names[2], 0.002])         # link_down (engine)
        if i == 2 * n_batches // 3:
            lk.append([down[0], down[1], "up"])
        out.append(wire.encode_ingest_rows("rep-a", 1000 + i, hops, lk))
    return out


def _feed(sp: ServiceProc, frames: list[bytes]) -> list[dict[str, Any]]:
    """One batch at a time, each after the previous one's acknowledgement."""
    s = sp.socket(zmq.DEALER, "ingest")
    acks = []
    try:
        for f in frames:
            s.send_multipart([b"", f])
            acks.append(msgpack.unpackb(s.recv_multipart()[-1], raw=False))
    finally:
        s.close(0)
    return acks


def _published(sp: ServiceProc, want: dict[str, Any], timeout_s: float = 10.0) -> dict[str, Any]:
    with TableSubscriber(sp.endpoints["publish"], context=sp._ctx) as sub:
        sub.wait_for(lambda s: all(s.tables.get(n) == t for n, t in want.items()), timeout_s)
        return dict(sub.tables)


def _start(b: str, name: str, *extra: str) -> ServiceProc:
    d = os.path.join(b, name)
    os.makedirs(d)
    return ServiceProc(d, service_args(d, "--config", os.path.join(b, "conf.yaml"), *extra))


def test_same_tables_and_acks_with_1_2_and_4_shards(base: str) -> None:
    frames = _stream(7, 60, 40)
    frames += [frames[5], wire.encode_ingest_rows("rep-a", 1005, [])]  # re-sent, then reused
    ref = _start(base, "one")
    try:
        ref_acks = _feed(ref, frames)
        ref_tables = ref.control({"op": "tables"})["tables"]
    finally:
        ref.kill()
    # the stream exercises every stage's refusals (else the row mapping is not tested)
    reasons = {r for a in ref_acks for _, r in a["rejected"]}
    assert {"unknown_node", "at_destination", "bad_latency", "link_down",
            "bad_link_state"} <= reasons, reasons
    assert ref_acks[-2] == ref_acks[-1] == ref_acks[5]   # acknowledged as the first time
    for n in (1, 2, 4):
        sp = _start(base, f"s{n}", "--shards", str(n))
        try:
            acks = _feed(sp, frames)
            assert acks == ref_acks, f"{n} shards: acknowledgements differ"
            tables = sp.control({"op": "tables"})["tables"]
            assert tables == ref_tables, f"{n} shards: tables differ from one process's"
            pub = _published(sp, ref_tables)
            assert {k: pub.get(k) for k in ref_tables} == ref_tables, f"{n} shards: published"
            node = _topo().nodes[0]
            est = sp.control({"op": "estimates", "node": node})
            assert len(est["estimates"]) == _topo().n - 1
            h = sp.control({"op": "health"})
            assert h["status"] == "ok" and h["shards_up"] == n
            if n == 2:
                text = sp.metrics_text()
                assert 'routerd_observations_total{result="accepted",shard="1"}' in text
                assert 'shard="0"' in text and 'shard="front"' in text
        finally:
            sp.kill()
        # the journals of every shard, replayed offline and merged, give the same tables
        got = shard.replay_shards(os.path.join(base, f"s{n}", "state"), _topo(), n)
        assert got == ref_tables, f"{n} shards: offline replay of the shard journals differs"


def test_killed_worker_loses_no_acknowledged_batch(base: str) -> None:
    with open(os.path.join(base, "conf.yaml"), "a") as fh:
        fh.write("shard:\n  restart_delay_s: 1.5\n")
    topo = _topo()
    smap = shard.ShardMap.build(topo, 2)
    rng = np.random.default_rng(11)
    m = len(topo.src)
    sent: dict[int, tuple[np.ndarray, ...]] = {}
    acked: dict[int, Any] = {}
    sp = _start(base, "kill", "--shards", "2")
    seen: list[float] = []
    done = threading.Event()

    def listen() -> None:   # every publication of the front, with its arrival time
        with TableSubscriber(sp.endpoints["publish"], context=sp._ctx) as sub:
            while not done.is_set():
                if sub.poll(0.05):
                    seen.append(time.monotonic())

    th = threading.Thread(target=listen, daemon=True)
    th.start()
    try:
        rep = Reporter(sp.endpoints["ingest"], "rep-k", topology_nodes=topo, batch_rows=200,
                       max_pending=8, timeout_s=1.0, retries=30, first_batch=1,
                       on_ack=lambda a: acked.__setitem__(a.batch, a), context=sp._ctx)
        killed_at = None
        for b in range(1, 121):
            li = rng.integers(m, size=200)
            cols = (topo.src[li], topo.dst[li], rng.integers(topo.n, size=200),
                    topo.delay_s[li] * (1.0 + rng.exponential(0.5, 200)))
            cols = tuple(c[cols[0] != cols[2]] for c in cols)   # no from == dst rows
            sent[b] = cols
            names = topo.nodes
            for s, v, d, lat in zip(*(c.tolist() for c in cols)):
                rep.add_hop(names[s], names[v], names[d], lat)
            rep.send_now()
            if b == 40:
                pid = sp.control({"op": "health"})["shards"][1]["pid"]
                os.kill(pid, signal.SIGKILL)
                killed_at = time.monotonic()
        rep.flush()
        rep.close()
        h = sp.control({"op": "health"})
        assert h["shards"][1]["restarts"] == 1 and h["shards_up"] == 2, h
        assert any("shard exited" in ln for ln in sp.stderr_lines)
        assert any("shard restarted" in ln for ln in sp.stderr_lines)
        assert sorted(acked) == list(range(1, 121))
        # the other worker kept the tables going out while shard 1 was down (restart
        # delay 1.5 s): publications arrived in the second after the kill
        assert killed_at is not None
        assert any(killed_at + 0.3 < t < killed_at + 1.3 for t in seen), "no tables while down"
        tables = sp.control({"op": "tables"})["tables"]
    finally:
        done.set()
        th.join(5)
        sp.kill()
    # every acknowledged row is in its shard's journal exactly once, as sent
    for k in range(2):
        recs = [r for r in J.iter_records(J.journal_dir(shard.shard_dir(
            os.path.join(base, "kill", "state"), k, 2))) if r.kind == "batch"]
        nos = [r.body["batch"] for r in recs]
        assert len(nos) == len(set(nos)), f"shard {k}: a batch journaled twice"
        by = {r.body["batch"]: J.batch_hops(r.body) for r in recs}
        for b, (s, v, d, lat) in sent.items():
            own = smap.owner[d] == k
            if not own.any():
                assert b not in by
                continue
            hb = by[b]
            assert np.array_equal(hb.src, s[own]) and np.array_equal(hb.dst, d[own])
            assert np.array_equal(hb.latency, lat[own])
    # and the shards' journals replayed offline give the tables the front served
    assert shard.replay_shards(os.path.join(base, "kill", "state"), topo, 2) == tables
