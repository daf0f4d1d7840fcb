"""Sharding by destination (routerd/service/shard.py): real processes on ipc:// in tmp dirs.

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

from routerd.agent.client import Reporter, TableSubscriber
from routerd.io import config as _config
from routerd.io import journal as J
from routerd.io import wire
from routerd.io.inputs import load_topology
from routerd.service import shard
from service_harness import ServiceProc, service_args

# a decision after every batch (no debounce, no decision cap, every due destination): the
# engine's state depends on where the decisions fall in the batch stream, so one process and
# N shards compare only when that is the same
# greedy: a worker then holds 1/N of the engine, and the tables are a function of the
# batches and where decisions fall; split mode's share steps scale with the wall-clock
# time between decisions and its guide runs in one process only (workers have no optimum),
# so one process and N workers fed the same batches do not publish the same split tables
CONF = """\
engine:
  mode: greedy
service:
  debounce_s: 0
  max_decisions_per_s: 0
  decide_budget_s: 0
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


@pytest.mark.slow
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
                rl = sp.control({"op": "reload"})["reload"]   # every worker re-reads its config
                assert [r["applied"] for r in rl] == [True, True], rl
                assert all(r["needs_restart"] == [] for r in rl), rl
                # the front's page: its own series only (no worker is scraped from it);
                # each worker's page: every series labelled with its shard.  Parsed by
                # prometheus_client's own parser
                import urllib.request

                from prometheus_client.parser import text_string_to_metric_families

                fams = list(text_string_to_metric_families(sp.metrics_text()))
                assert {smp.labels.get("shard") for f in fams for smp in f.samples} <= \
                    {"front", "0", "1"}
                assert not any(f.name == "routerd_observations" for f in fams)
                assert any(f.name == "routerd_shard_front_batches" for f in fams)
                for s_ in h["shards"]:
                    with urllib.request.urlopen(s_["metrics"], timeout=10) as r:
                        wf = list(text_string_to_metric_families(r.read().decode()))
                    assert all(smp.labels.get("shard") == str(s_["shard"])
                               for f in wf for smp in f.samples)
                    obs = [smp for f in wf if f.name == "routerd_observations"
                           for smp in f.samples if smp.labels.get("result") == "accepted"]
                    assert len(obs) == 1 and obs[0].value > 0
        finally:
            sp.kill()
        # the journals of every shard, replayed offline and merged, give the same tables
        got = shard.replay_shards(os.path.join(base, f"s{n}", "state"), _topo(), n)
        assert got == ref_tables, f"{n} shards: offline replay of the shard journals differs"
        if n == 2:   # the same through the command: routerd replay STATE --out DIR
            import json
            import subprocess
            import sys

            out = os.path.join(base, "replay2")
            r = subprocess.run([sys.executable, "-m", "routerd", "replay",
                                os.path.join(base, "s2", "state"), "--out", out],
                               capture_output=True, text=True, timeout=120, check=False)
            assert r.returncode == 0, r.stderr
            with open(os.path.join(out, "tables.json")) as fh:
                assert json.load(fh)["tables"] == ref_tables


@pytest.mark.slow
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


@pytest.mark.slow
def test_workers_on_their_own_behind_an_external_front(base: str) -> None:
    """The multi-host shape on one host: workers started separately (``--shard K/N
    --upstream``), a front that starts none (``--external-workers``), and a client that
    splits by destination itself (:class:`shard.ShardReporter`) next to one that goes
    through the front."""
    conf = os.path.join(base, "conf.yaml")
    fd = os.path.join(base, "front")
    os.makedirs(fd)
    listen = f"ipc://{fd}/shards"
    ws = []
    try:
        for k in range(2):
            d = os.path.join(base, f"w{k}")
            os.makedirs(d)
            args = service_args(d, "--config", conf, "--shard", f"{k}/2", "--upstream", listen)
            args[args.index("--state-dir") + 1] = os.path.join(base, "state")   # one root
            ws.append(ServiceProc(d, args))
        front = ServiceProc(fd, service_args(fd, "--config", conf, "--shards", "2",
                                             "--external-workers", "--shard-listen", listen))
        try:
            topo = _topo()
            h = front.control({"op": "health"})
            assert h["shards_up"] == 2
            eps = [s["health"]["shard"]["index"] for s in h["shards"]]
            assert eps == [0, 1]
            direct = shard.ShardReporter([w.endpoints["ingest"] for w in ws], "direct", topo,
                                         batch_rows=64, context=front._ctx)
            via = Reporter(front.endpoints["ingest"], "via-front", topology_nodes=topo,
                           batch_rows=64, context=front._ctx)
            rng = np.random.default_rng(3)
            names = topo.nodes
            for _ in range(400):
                li = int(rng.integers(len(topo.src)))
                a, b = names[int(topo.src[li])], names[int(topo.dst[li])]
                d = names[int(rng.integers(topo.n))]
                if d == a:
                    continue
                lat = float(topo.delay_s[li]) * (1 + float(rng.exponential(0.3)))
                direct.add_hop(a, b, d, lat)
                via.add_hop(a, b, d, lat)
            direct.add_link(names[0], names[1], "down")
            via.add_link(names[0], names[1], "down")
            direct.close()
            via.close()
            tables = front.control({"op": "tables"})["tables"]
            assert len(tables) == topo.n
            # each worker's journal holds only its destinations' rows, from both reporters
            smap = shard.ShardMap.build(topo, 2)
            for k in range(2):
                recs = [r for r in J.iter_records(J.journal_dir(shard.shard_dir(
                    os.path.join(base, "state"), k, 2))) if r.kind == "batch"]
                assert {r.body["reporter"] for r in recs} == {"direct", "via-front"}
                for r in recs:
                    assert (smap.owner[J.batch_hops(r.body).dst] == k).all()
            stop_front = front.proc
            stop_front.send_signal(signal.SIGTERM)
            assert front.wait() == 0
            assert all(w.proc.poll() is None for w in ws), "a front stops no external worker"
        finally:
            front.kill()
        assert shard.replay_shards(os.path.join(base, "state"), topo, 2) == tables
    finally:
        for w in ws:
            w.kill()


@pytest.mark.slow
def test_map_file_and_command_line_refusals(base: str, tmp_path: Any) -> None:
    import subprocess
    import sys

    topo = _topo()
    # CRC-32 as zlib computes it (ISO-HDLC / IEEE 802.3 polynomial): the standard check
    # value of "123456789" is 0xCBF43926 (the CRC catalogue's "check" entry)
    assert shard.stable_hash("123456789") == 0xCBF43926
    m = shard.ShardMap.build(topo, 3)
    assert m.counts() == np.bincount([shard.stable_hash(x) % 3 for x in topo.nodes],
                                     minlength=3).tolist()
    f = tmp_path / "map.yaml"
    f.write_text(f"{topo.nodes[0]}: 2\n{topo.nodes[1]}: 0\n")
    m2 = shard.ShardMap.build(topo, 3, str(f))
    assert m2.owner[0] == 2 and m2.owner[1] == 0 and (m2.owner[2:] == m.owner[2:]).all()
    f.write_text(f"{topo.nodes[0]}: 3\n")
    with pytest.raises(shard.InputError, match=r"3 is not a shard in 0\.\.2"):
        shard.ShardMap.build(topo, 3, str(f))
    f.write_text("nowhere: 0\n")
    with pytest.raises(shard.InputError, match="'nowhere' is not a node"):
        shard.ShardMap.build(topo, 3, str(f))
    for bad, msg in ((["--shard", "2/2"], "is not K/N with 0 <= K < N"),
                     (["--shards", "2", "--shard", "0/2"], "not both"),
                     (["--shards", "0"], "below 1"),
                     (["--shards", "2", "--upstream", "ipc:///x"], "belongs to a worker")):
        r = subprocess.run([sys.executable, "-m", "routerd", "serve", *bad, "--state-dir",
                            str(tmp_path / "st")], capture_output=True, text=True, timeout=60, check=False)
        assert r.returncode == 2 and msg in r.stderr, (bad, r.stderr)


def test_workers_run_without_curve_on_local_endpoints_only() -> None:
    """CURVE is the front's: a worker drops the security keys (and never binds the
    read-only control endpoint), and refuses to start with them when one of its own
    endpoints could be reached from other hosts without CURVE."""
    off = {"security.server_key": None, "security.allow": None, "security.control_readonly": None}
    plain = _config.load().with_overrides({"security.control_readonly": "ipc:///tmp/x"})
    assert shard.worker_security(plain, 0, 2) == off
    keyed = {"security.server_key": "svc.key_secret", "security.allow": "allow.yaml"}
    local = _config.load().with_overrides(
        {**keyed, "service.ingest": "ipc:///tmp/w0-in", "service.control": "tcp://127.0.0.1:7001"})
    assert shard.worker_security(local, 0, 2) == off
    far = local.with_overrides({"service.publish": "tcp://0.0.0.0:7002"})
    with pytest.raises(shard.InputError, match=r"shard 1/2: .*publish endpoint tcp://0\.0\.0\.0:7002"):
        shard.worker_security(far, 1, 2)


def test_worker_metrics_ports_follow_the_base() -> None:
    cfg = _config.load()
    assert shard.worker_metrics(cfg, 3) is None            # base 0: the worker's own address
    cfg = cfg.with_overrides({"shard.metrics_port_base": 9320, "service.metrics": "10.1.2.3:9307"})
    assert [shard.worker_metrics(cfg, k) for k in (0, 3)] == ["10.1.2.3:9320", "10.1.2.3:9323"]
    v6 = cfg.with_overrides({"service.metrics": "[::1]:9307"})
    assert shard.worker_metrics(v6, 1) == "[::1]:9321"
    with pytest.raises(shard.InputError, match="above port 65535"):
        shard.worker_metrics(cfg.with_overrides({"shard.metrics_port_base": 65535}), 1)


def test_combine_acks_maps_piece_rows_back() -> None:
    # batch: hop rows 0..5 (row 2 refused at decode), link rows 6, 7; shard 0 got hop
    # rows [0, 3], shard 1 rows [1, 4, 5]; both got both links (piece rows h, h + 1); an
    # ack's accepted counts its piece's hop and link rows, as one process's would
    pieces = {0: (np.array([0, 3]), (6, 7)), 1: (np.array([1, 4, 5]), (6, 7))}
    acks = {0: {"accepted": 2, "rejected": [[1, "link_down"], [3, "not_neighbour"]]},
            1: {"accepted": 3, "rejected": [[0, "bad_latency"], [4, "not_neighbour"]]}}
    rej, acc = shard.combine_acks([[2, "unknown_node"]], 2, pieces, acks)
    assert rej == [[1, "bad_latency"], [2, "unknown_node"], [3, "link_down"], [7, "not_neighbour"]]
    assert acc == 1 + 2 + 1       # hop rows 0, 4, 5 and link row 6


def test_front_reads_time_from_its_clock(tmp_path: Any) -> None:
    """The front's epoch, uptime, worker liveness, debounce and waits follow the clock it
    is given (routerd.io.clock), so a FakeClock moves them without sleeping."""
    import io as _io

    from routerd.io.childproc import parse_ready
    from routerd.io.clock import FakeClock

    clk = FakeClock(start=100.0)
    topo = _topo()
    cfg = _config.load(None).with_overrides({"service.state_dir": str(tmp_path)}, where="test")
    out = _io.StringIO()
    f = shard.Front(cfg, topo, shard.ShardMap.build(topo, 2), out=out, clock=clk)
    epoch0 = clk.wall_ns()
    assert f.epoch == epoch0
    assert not hasattr(f, "lock")                  # issue 17: nothing used it
    clk.advance(5.0)
    h = f.health()
    assert h["uptime_s"] == 5.0 and h["shards_up"] == 0 and h["status"] == "degraded"
    # a worker is up while its announcements are recent: 3 hello intervals on the clock
    w = f.workers[0]
    w.hello = {"pid": 1}
    w.last_hello = clk.monotonic()
    assert f._up(w)
    clk.advance(3 * cfg["shard.hello_interval_s"])
    assert not f._up(w)
    # a table due later waits on the clock (the poll timeout is capped at 100 ms)
    f._due[0] = clk.monotonic() + 0.05
    assert 50 <= f._poll_ms() <= 51
    clk.advance(0.05)
    assert f._poll_ms() == 1
    # the shutdown wait sleeps on the clock: virtual time moves, the test does not wait
    t0 = clk.monotonic()
    f._drain_parts(0.5)
    assert clk.monotonic() - t0 >= 0.5
    # the readiness line is childproc's, with the clock's epoch
    f.endpoints = {k: f"ipc:///tmp/x-{k}"
                   for k in ("ingest", "publish", "control", "metrics", "shards")}
    f._banner()
    assert parse_ready(out.getvalue().splitlines()[-1]) == (os.getpid(), epoch0)


def _rss_bytes(pid: int) -> int:
    """Resident set size of a process (Linux /proc/PID/status, VmRSS in kB)."""
    with open(f"/proc/{pid}/status") as fh:
        for line in fh:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) * 1024
    raise AssertionError(f"no VmRSS for pid {pid}")


@pytest.mark.slow
def test_1000_nodes_2_workers_memory_tables_and_a_killed_worker(
        base: str, monkeypatch: pytest.MonkeyPatch) -> None:
    """At 1,000 nodes: each of 2 workers holds only its destinations (its resident memory
    above the front's, which holds no engine, is well under one process's), the front
    serves the tables one process serves for the same batches, and a worker killed with
    SIGKILL mid-stream loses no acknowledged batch (the reporter re-sends what was
    answered unavailable; the tables still match, every batch journaled once per shard)."""
    import yaml

    import service_harness
    from conftest import ring_with_chords
    from routerd.core import topology as T
    from routerd.io import topofiles as TF

    monkeypatch.setattr(service_harness, "START_TIMEOUT_S", 120.0)   # 1,000-node start-up
    topo = ring_with_chords(1000, 1000, seed=1000)
    tfile = os.path.join(base, "ring1000.yaml")
    with open(tfile, "w") as fh:
        yaml.safe_dump(T.to_mapping(topo), fh)
    topo = TF.load(tfile)
    # few whole-table rounds; a decision after every batch, with every due destination (a
    # deferred or bounded one falls at other points in one process than in the shards, and
    # where decisions fall changes the tables: CONF's reason), one batch in flight (several
    # taken in one loop turn share one decision)
    with open(os.path.join(base, "conf.yaml"), "w") as fh:
        fh.write("engine:\n  mode: greedy\n"     # 1/N engines and equal tables: CONF's reason
                 "service:\n  publish_interval_s: 600\n  snapshot_interval_s: 3600\n"
                 "  decide_budget_s: 0\n  debounce_s: 0\n  max_decisions_per_s: 0\n"
                 "  journal:\n    fsync: never\nshard:\n  restart_delay_s: 0.5\n"
                 # a worker's 1,000-node tables can take seconds on a busy 2-core machine
                 "  control_timeout_s: 60\n")
    procs: dict[str, ServiceProc] = {}
    try:
        procs["one"] = _start(base, "one", "--topology", tfile)
        procs["two"] = _start(base, "two", "--topology", tfile, "--shards", "2")
        one, two = procs["one"], procs["two"]
        h = two.control({"op": "health"})
        pids = [s["pid"] for s in h["shards"]]
        assert [s["health"]["shard"]["destinations"] for s in h["shards"]] == \
            shard.ShardMap.build(topo, 2).counts()
        rng = np.random.default_rng(17)
        m = len(topo.src)
        names = topo.nodes
        acked: dict[str, dict[int, Any]] = {"one": {}, "two": {}}
        reps = {nm: Reporter(sp.endpoints["ingest"], "rep-m", topology_nodes=topo,
                             batch_rows=1000, max_pending=1, timeout_s=2.0, retries=60,
                             first_batch=1, context=sp._ctx,
                             on_ack=lambda a, nm=nm: acked[nm].__setitem__(a.batch, a))
                for nm, sp in procs.items()}

        def send(n_batches: int) -> None:
            for _ in range(n_batches):
                li = rng.integers(m, size=1000)
                cols = (topo.src[li], topo.dst[li], rng.integers(topo.n, size=1000),
                        topo.delay_s[li] * (1.0 + rng.exponential(0.5, 1000)))
                keep = cols[0] != cols[2]
                rows = list(zip(*(c[keep].tolist() for c in cols)))
                for rep in reps.values():
                    for s_, v, d, lat in rows:
                        rep.add_hop(names[s_], names[v], names[d], lat)
                    rep.send_now()
            for rep in reps.values():
                rep.flush()

        send(12)
        rss = {"one": _rss_bytes(one.proc.pid), "front": _rss_bytes(two.proc.pid),
               **{f"w{k}": _rss_bytes(p) for k, p in enumerate(pids)}}
        os.kill(pids[1], signal.SIGKILL)
        send(12)
        for rep in reps.values():
            rep.close()
        assert sorted(acked["one"]) == sorted(acked["two"]) == list(range(1, 25))
        assert [acked["two"][b].accepted for b in range(1, 25)] == \
            [acked["one"][b].accepted for b in range(1, 25)]
        h = two.control({"op": "health"})
        assert h["shards"][1]["restarts"] == 1 and h["shards_up"] == 2, h
        t0 = time.monotonic()
        ref = one.control({"op": "tables"}, timeout_ms=130000)
        got = two.control({"op": "tables"}, timeout_ms=130000)
        assert "tables" in ref and "tables" in got, (ref.get("error"), got.get("error"))
        ref, got = ref["tables"], got["tables"]
        print(f"\ntables by control: {time.monotonic() - t0:.1f} s")
        assert got == ref
    finally:
        for sp in procs.values():
            sp.kill()
    print(f"\nRSS at 1,000 nodes (MB): {({k: round(v / 1e6) for k, v in rss.items()})}")
    # memory: the front runs the same code without an engine, so what a process holds
    # above it is (mostly) its engine; each worker's is about half of one process's
    base_rss = rss["front"]
    for k in ("w0", "w1"):
        assert rss[k] - base_rss < 0.65 * (rss["one"] - base_rss), rss
    # every batch is in each shard's journal exactly once
    for k in range(2):
        nos = [r.body["batch"] for r in J.iter_records(J.journal_dir(shard.shard_dir(
            os.path.join(base, "two", "state"), k, 2))) if r.kind == "batch"]
        assert sorted(nos) == list(range(1, 25)), (k, nos)


def test_a_worker_keeps_its_owned_engine_through_a_reload_asking_for_a_variant(
        tmp_path: Any) -> None:
    """A worker's engine holds its destinations only (the plain rule in greedy mode; split
    mode keeps state across destinations, so its workers hold every one); engine.variant is
    not a tunable, so a reload asking for one says it needs a restart and keeps the engine."""
    import argparse

    conf = tmp_path / "w.yaml"
    conf.write_text(f"service:\n  state_dir: {tmp_path / 'st'}\nengine:\n  mode: greedy\n")
    topo = _topo()
    cfg = _config.load(str(conf))
    smap = shard.ShardMap.build(topo, 2)
    args = argparse.Namespace(config=str(conf), set=[], topology=None, state_dir=None)
    w = shard.ShardWorker(cfg, topo, smap, 0, None, reload_args=args)
    try:
        w.restore(str(tmp_path / "st"))
        assert w.engine is not None and w.engine.partial
        assert w.engine.owned.tolist() == smap.owned(0).tolist()
        conf.write_text(f"service:\n  state_dir: {tmp_path / 'st'}\nengine:\n  mode: greedy\n"
                        "  variant: predictive\n")
        r = w._do_reload()
        assert r["needs_restart"] == ["engine.variant"], r
        assert w.engine.settings.variant == "plain" and w.engine.partial
    finally:
        w.close()


def test_sharding_flags_of_another_role_are_refused(tmp_path: Any) -> None:
    # --upstream, --shard-listen or --external-workers without the role they belong to were
    # ignored: a plain service (or a worker) started instead of what was asked for
    import subprocess
    import sys

    eps = [f"--{k}=ipc://{tmp_path}/{k}" for k in ("ingest", "publish", "control")]
    for flags, expect in ((["--upstream", f"ipc://{tmp_path}/up"], "--upstream belongs to a worker"),
                          (["--external-workers"], "--external-workers belongs to a front"),
                          (["--shard-listen", f"ipc://{tmp_path}/sl"], "--shard-listen belongs to a front"),
                          (["--shard", "0/2", "--external-workers"], "--external-workers belongs to a front")):
        r = subprocess.run([sys.executable, "-m", "routerd", "serve", *flags, *eps, "--metrics",
                            "127.0.0.1:0", "--state-dir", str(tmp_path / "st")],
                           capture_output=True, text=True, timeout=20, check=False)
        assert r.returncode == 2 and expect in r.stderr, (flags, r.stderr)
        assert not (tmp_path / "st").exists()


def test_a_worker_runs_greedy_under_the_split_default_and_says_why(tmp_path: Any) -> None:
    # split (the default) keeps state across destinations; a worker holds its own only: it
    # runs greedy, on its 1/N engine, and says so.  A greedy worker's state dir from before
    # the default changed restarts as it was (it crashed: a partial engine cannot be split)
    conf = tmp_path / "w.yaml"
    conf.write_text(f"service:\n  state_dir: {tmp_path / 'st'}\n")      # no engine.mode
    topo = _topo()
    smap = shard.ShardMap.build(topo, 2)
    for _ in range(2):                  # a fresh state dir, then a restart on it
        w = shard.ShardWorker(_config.load(str(conf)), topo, smap, 0, None)
        try:
            w.restore(str(tmp_path / "st"))
            assert w.engine is not None and w.engine.partial
            assert w.engine.settings.mode == "greedy" and w.cfg["engine.mode"] == "greedy"
            assert w.mode_note is not None and w.mode_note.startswith("a shard worker runs greedy")
            assert w.cfg_given["engine.mode"] == "split"
        finally:
            w.close()
