"""routerd serve: learning end to end, bad input, lifecycle (SIGTERM, SIGHUP), start-up errors.

Real service processes on ipc:// endpoints in tmp dirs (tests/service_harness.py); every
process is killed in a ``finally``.  The reference for "learned the right routes" is
networkx's Dijkstra (``nx.all_pairs_dijkstra_path_length``) over the same link delays.
"""
from __future__ import annotations

import argparse
import math
import os
import signal
import time

import msgpack
import networkx as nx
import numpy as np
import pytest
import zmq

from routerd.agent import client
from routerd.core import kernels
from routerd.core.engine import Engine
from routerd.io import config, journal, wire
from routerd.io.inputs import load_config, load_topology
from service_harness import ServiceProc, running, service_args

DEMO = load_topology(config.load(None))



def write(path: str, text: str) -> str:
    with open(path, "w", encoding="utf-8") as fh:
        fh.write(text)
    return path


def nx_graph(topo, delays: np.ndarray) -> nx.DiGraph:
    g = nx.DiGraph()
    for k in range(topo.n_links):
        g.add_edge(topo.nodes[topo.src[k]], topo.nodes[topo.dst[k]], weight=float(delays[k]))
    return g


def off_shortest(tables: dict, g: nx.DiGraph) -> list[tuple[str, str, str]]:
    """(node, destination, next hop) where the greedy next hop is on no shortest path."""
    # reference: networkx Dijkstra; a next hop y of x for d is on a shortest path iff
    # w(x, y) + dist(y, d) == dist(x, d) (Bellman's optimality condition)
    dist = dict(nx.all_pairs_dijkstra_path_length(g))
    bad = []
    for x, routes in tables.items():
        for d in g.nodes:
            if d == x:
                continue
            ws = routes.get(d)
            if not ws:
                bad.append((x, d, "-"))
                continue
            y = ws[0][0]
            if abs(g[x][y]["weight"] + dist[y][d] - dist[x][d]) > 1e-9 * max(1.0, dist[x][d]):
                bad.append((x, d, y))
    return bad


def random_rows(topo, rng, m: int, delays: np.ndarray):
    link = rng.integers(0, topo.n_links, m)
    x, y = topo.src[link].astype(np.int64), topo.dst[link].astype(np.int64)
    d = rng.integers(0, topo.n - 1, m)
    d = np.where(d >= x, d + 1, d)
    return x, y, d, delays[link]


# A tracking setting: a constant step of 0.5.  Q-routing carries bad news slowly (estimates
# bootstrap off neighbours that still hold the old, low value), so with the default decaying
# step the degraded-trunk phase below takes ~700 batches offline; with 0.5, ~110.
LEARN_CFG = """\
engine:
  mode: greedy      # the greedy learner: split mode starts on live shortest paths by its repair
  step: {mode: constant, alpha: 0.5}
  initial: {mode: constant, value_s: 0.05}   # start far from the answer: it must be learned
  hysteresis: {margin: 0.0}
service:
  debounce_s: 0.01
  publish_interval_s: 0.5
"""


# ---- learning ---------------------------------------------------------------------------
@pytest.mark.slow
def test_learns_dijkstra_then_follows_a_degraded_link(base: str) -> None:
    cfg = write(os.path.join(base, "learn.yaml"), LEARN_CFG)
    topo = DEMO
    rng = np.random.default_rng(7)
    delays = topo.delay_s.copy()
    with running(base, config=cfg) as sp:
        sub = client.TableSubscriber(sp.endpoints["publish"])
        rep = client.Reporter(sp.endpoints["ingest"], "learner", control=sp.endpoints["control"],
                              batch_rows=256, max_pending=8)
        try:
            def send(batches: int) -> None:
                for _ in range(batches):
                    x, y, d, lat = random_rows(topo, rng, 256, delays)
                    rep.add_hops([topo.nodes[i] for i in x], [topo.nodes[i] for i in y],
                                 [topo.nodes[i] for i in d], lat.tolist())
                rep.flush()
                sub.poll(0.05)

            def tables_after_decision() -> dict:
                time.sleep(0.05)          # > debounce_s: the last batch has been decided
                return client.control(sp.endpoints["control"], {"op": "tables"})["tables"]

            g0 = nx_graph(topo, delays)
            assert off_shortest(tables_after_decision(), g0), \
                "constant initial estimates should not already give shortest paths"
            learned_after = None
            for rnd in range(1, 41):
                send(10)
                if not off_shortest(tables_after_decision(), g0):
                    learned_after = rnd * 10
                    break
            assert learned_after is not None, off_shortest(tables_after_decision(), g0)[:10]

            # degrade the trunk (both directions) 40-fold: west-east routes must leave it
            for a, b in (("w3", "e3"), ("e3", "w3")):
                delays[topo.link(a, b)] = 0.04
            g1 = nx_graph(topo, delays)
            moved = off_shortest(tables_after_decision(), g1)
            assert moved, "the degradation must make some current routes wrong"
            moved_after = None
            for rnd in range(1, 61):
                send(5)
                if not off_shortest(tables_after_decision(), g1):
                    moved_after = rnd * 5
                    break
            # bound: 300 batches of 256 rows (76,800 rows, ~1,600 per directed link)
            assert moved_after is not None, off_shortest(tables_after_decision(), g1)[:10]
            assert rep.accepted == rep.batches_sent * 256

            # the subscriber saw every node's seq rise, without gaps, within one epoch
            sub.wait_for(lambda s: len(s.seq) == topo.n, 5.0)
            assert set(sub.seq) == set(topo.nodes)
            assert all(s >= 3 for s in sub.seq.values()), sub.seq
            assert set(sub.epoch.values()) == {sp.epoch}
            assert sub.gaps_total == 0 and sub.restarts == 0 and not sub.stale
            # what the subscriber holds is what control says
            sub.poll(1.0)
            ctl = client.control(sp.endpoints["control"], {"op": "tables"})["tables"]
            for node in ("w1", "e6", "r2"):
                assert sub.tables[node] == ctl[node]
            print(f"learned after {learned_after} batches; followed the degraded trunk after "
                  f"{moved_after} more")
        finally:
            rep.close(flush=False)
            sub.close()


# ---- bad input --------------------------------------------------------------------------
BAD_CFG = """\
engine:
  mode: greedy      # the hand-worked update below: split's decisions also refresh entries
service:
  max_message_bytes: 65536
  dedup_batches: 50
  debounce_s: 0.01
"""


def metric_values(text: str) -> dict[tuple[str, tuple], float]:
    from prometheus_client.parser import text_string_to_metric_families

    out = {}
    for fam in text_string_to_metric_families(text):
        for s in fam.samples:
            out[(s.name, tuple(sorted(s.labels.items())))] = s.value
    return out


def rejected(vals: dict, reason: str) -> float:
    return vals[("routerd_observations_total", (("reason", reason), ("result", "rejected")))]


def refused(vals: dict, reason: str) -> float:
    return vals[("routerd_batches_total", (("reason", reason), ("result", "refused")))]


@pytest.mark.slow
def test_bad_input_is_answered_counted_and_good_rows_still_apply(base: str) -> None:
    cfg = write(os.path.join(base, "bad.yaml"), BAD_CFG)
    with running(base, config=cfg) as sp:
        ctx = zmq.Context.instance()
        d = sp.socket(zmq.DEALER, "ingest", rcvtimeo_ms=5000)

        def ask(*frames: bytes) -> dict:
            d.send_multipart([b"", *frames])
            return msgpack.unpackb(d.recv_multipart()[-1], raw=False)

        def batch(n: int, **kw) -> bytes:
            return msgpack.packb({"v": 1, "reporter": "bad", "batch": n, **kw}, use_bin_type=True)

        # whole frames that cannot be read
        assert ask(b"\xc1\x00").get("error", "").startswith("not_msgpack")
        assert ask(msgpack.packb([1, 2])).get("error", "").startswith("not_a_map")
        r = ask(msgpack.packb({"v": 2, "reporter": "bad", "batch": 1}))
        assert r["error"].startswith("bad_version") and r["batch"] == 1
        assert ask(msgpack.packb({"v": 1, "reporter": 5, "batch": 1}))["error"].startswith("bad_reporter")
        assert ask(msgpack.packb({"v": 1, "reporter": "bad", "batch": "one"}))["error"].startswith("bad_batch")
        assert ask(batch(2, hops="w1"))["error"].startswith("bad_hops")
        assert ask(batch(3, hops=[], extra=1))["error"].startswith("unknown_field")
        assert ask(batch(4, cols={}, topology="nope"))["error"].startswith("wrong_topology")
        assert ask(batch(5), b"second payload")["error"].startswith("extra_frames")
        big = batch(6, hops=[["w1", "w2", "w3", 0.001]] * 4000)    # > 65,536 bytes
        assert len(big) > 65536
        assert ask(big)["error"].startswith("oversized")

        # one mixed batch: the good rows apply, each bad one is named
        before = client.control(sp.endpoints["control"], {"op": "estimates", "node": "w1"})
        q0 = before["estimates"]["w3"]["w2"]
        rows = [
            ["w1", "w2", "w3", 0.0123],            # 0 good
            ["w1", "w2", "w3", float("nan")],      # 1 NaN
            ["w1", "w2", "w3", float("inf")],      # 2 inf
            ["w1", "w2", "w3", -0.001],            # 3 negative
            ["w1", "zz", "w3", 0.001],             # 4 unknown node
            ["w1", "e1", "w3", 0.001],             # 5 e1 is not w1's neighbour
            ["w2", "w1", "w4", 0.002],             # 6 good
            ["w1", "w2", "w3", "fast"],            # 7 wrong type
            ["w1", "w2"],                          # 8 malformed row
            ["w3", "w3", "w3", 0.001],             # 9 w3 is not its own neighbour
        ]
        ack = ask(batch(10, hops=rows, links=[["w1", "w2", "sideways"], ["w1", "e1", "down"]]))
        assert ack["accepted"] == 2
        assert ack["rejected"] == [[1, "bad_latency"], [2, "bad_latency"], [3, "bad_latency"],
                                   [4, "unknown_node"], [5, "not_neighbour"], [7, "bad_latency"],
                                   [8, "bad_row"], [9, "not_neighbour"],
                                   [10, "bad_link_state"], [11, "not_neighbour"]]
        after = client.control(sp.endpoints["control"], {"op": "estimates", "node": "w1"})
        q1 = after["estimates"]["w3"]["w2"]
        # first update of that entry: step c / 1^kappa = 1, so Q = latency + min_z Q[w2, w3, z]
        # (the Q-routing update, Boyan & Littman 1994; w2's best for w3 is its 0.5 ms link)
        assert q0 != q1 and math.isclose(q1, 0.0123 + 0.0005, rel_tol=1e-12)

        # a re-sent batch is acknowledged again, not applied again
        again = ask(batch(10, hops=rows, links=[["w1", "w2", "sideways"], ["w1", "e1", "down"]]))
        assert again == ack
        assert client.control(sp.endpoints["control"], {"op": "estimates", "node": "w1"}) == after

        # a link reported down: the hops over it are refused until it comes back up
        assert ask(batch(11, links=[["w3", "e3", "down"]]))["accepted"] == 1
        r = ask(batch(12, hops=[["w3", "e3", "e4", 0.001]]))
        assert r["accepted"] == 0 and r["rejected"] == [[0, "link_down"]]
        assert ask(batch(13, links=[["w3", "e3", "up"]]))["accepted"] == 1

        # a flood of tiny batches: all answered, memory for duplicates stays bounded
        # (in waves of 500, each read before the next: an ack that finds the peer's queues
        # full is dropped and counted by design, so 3,000 unread acks at once tested the
        # queue sizes and the I/O threads' timing, not the service)
        flood, wave = 3000, 500
        acks = []
        for w0 in range(0, flood, wave):
            for i in range(w0, w0 + wave):
                d.send_multipart([b"", wire.encode_ingest_rows("flood", i, [["w4", "w5", "w6", 0.0005]])])
            acks += [msgpack.unpackb(d.recv_multipart()[-1], raw=False) for _ in range(wave)]
        assert sorted(a["batch"] for a in acks) == list(range(flood))
        assert all(a["accepted"] == 1 for a in acks)

        # a frame far beyond the limit is cut off by libzmq (MAXMSGSIZE): no answer, the
        # peer is disconnected and counted, and the service goes on serving
        cut = sp.socket(zmq.DEALER, "ingest", rcvtimeo_ms=1500)
        cut.send_multipart([b"", b"\x00" * (65536 + (1 << 20) + 10)])
        with pytest.raises(zmq.Again):
            cut.recv_multipart()
        cut.close(0)

        h = client.control(sp.endpoints["control"], {"op": "health"})
        assert h["status"] == "ok"
        # which engine path runs, in health and once in the banner (routerd/core/kernels.py)
        assert h["kernels"] == kernels.status("auto")
        assert sum("engine kernels: " in ln for ln in sp.stdout_lines) == 1
        # bounded: reporter "bad" has 4 applied batches, "flood" keeps only its last 50
        assert h["counts"]["dedup_entries"] == 4 + 50

        deadline = time.monotonic() + 5
        while True:
            vals = metric_values(sp.metrics_text())
            if vals[("routerd_ingest_disconnects_total", ())] >= 1 or time.monotonic() > deadline:
                break
            time.sleep(0.1)
        assert vals[("routerd_ingest_disconnects_total", ())] >= 1
        expect_rows = {"bad_latency": 4, "unknown_node": 1, "not_neighbour": 3, "bad_row": 1,
                       "bad_link_state": 1, "link_down": 1, "duplicate": 12,
                       "bad_estimate": 0, "at_destination": 0}
        for reason, n in expect_rows.items():
            assert rejected(vals, reason) == n, reason
        for reason in ("not_msgpack", "not_a_map", "bad_version", "bad_reporter", "bad_batch",
                       "bad_hops", "unknown_field", "wrong_topology", "extra_frames", "oversized"):
            assert refused(vals, reason) == 1, reason
        assert refused(vals, "too_many_rows") == 0
        assert vals[("routerd_observations_total", (("result", "accepted"),))] == 2 + flood
        assert vals[("routerd_batches_total", (("result", "duplicate"),))] == 1
        assert vals[("routerd_link_reports_total", ())] == 2
        # and it still serves: a good batch is acknowledged and applied
        assert ask(batch(99, hops=[["e1", "e2", "e3", 0.0007]]))["accepted"] == 1
        d.close(0)
        del ctx


# ---- lifecycle ----------------------------------------------------------------------------
def wait_log(sp: ServiceProc, needle: str, timeout: float = 10.0) -> str:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        for line in list(sp.stderr_lines):
            if needle in line:
                return line
        time.sleep(0.05)
    raise AssertionError(f"no log line with {needle!r} in:\n{sp.log()}")


@pytest.mark.slow
def test_sigterm_final_snapshot_final_tables_and_restart_restores(base: str) -> None:
    sp = ServiceProc(base, service_args(base))
    try:
        sub = client.TableSubscriber(sp.endpoints["publish"])
        rep = client.Reporter(sp.endpoints["ingest"], "term", topology_nodes=DEMO, batch_rows=64)
        rng = np.random.default_rng(3)
        for _ in range(20):
            x, y, d, lat = random_rows(DEMO, rng, 64, DEMO.delay_s * 3)
            rep.add_hops([DEMO.nodes[i] for i in x], [DEMO.nodes[i] for i in y],
                         [DEMO.nodes[i] for i in d], lat.tolist())
        rep.flush()
        rep.close()
        est = {n: client.control(sp.endpoints["control"], {"op": "estimates", "node": n})["estimates"]
               for n in ("w1", "e3", "r2")}
        sub.poll(0.5)
        seen = sub.received
        t0 = time.monotonic()
        sp.signal(signal.SIGTERM)
        assert sp.wait(15) == 0
        took = time.monotonic() - t0
        assert took < 10, took
        # the final tables: every node once more
        sub.poll(1.0)
        assert sub.received - seen >= DEMO.n
        sub.close()
        assert "stopped" in sp.log()
        store = journal.SnapshotStore(journal.snapshot_dir(sp.state_dir))
        state, rec = store.latest()
        recs = list(journal.iter_records(journal.journal_dir(sp.state_dir)))
        # the final snapshot covers every record; the last one is its note
        assert recs[-1].kind == "snapshot" and recs[-1].body["record"] == rec == recs[-2].no
        dedup = {r: list(bs) for r, bs, _, _ in state["dedup"]["windows"]}
        assert len(dedup["term"]) == 20
    finally:
        sp.kill()
    # the estimates the final snapshot holds: in greedy mode the ones read before the stop;
    # split mode's shutdown decision (journaled, then snapshotted) also refreshes entries
    final = Engine.from_state(DEMO, journal.settings_from_dict(state["settings"]), state["engine"])
    held = {n: wire.estimates_by_name(final, DEMO.index[n]) for n in est}
    if final.settings.mode == "greedy":
        assert held == est
    # a restart on the same state dir restores the snapshot: the same estimates
    sp2 = ServiceProc(base, service_args(base))
    try:
        assert any(f"restored snapshot at record {rec}" in line for line in sp2.stdout_lines)
        assert sp2.epoch != sp.epoch
        for n, e in held.items():
            assert client.control(sp2.endpoints["control"], {"op": "estimates", "node": n})["estimates"] == e
        sp2.signal(signal.SIGINT)
        assert sp2.wait(15) == 0
    finally:
        sp2.kill()


@pytest.mark.slow
def test_sighup_applies_good_tunables_and_rejects_a_bad_file(base: str) -> None:
    cfg = os.path.join(base, "hup.yaml")
    write(cfg, "engine:\n  explore: {max_rate: 0.1}\nservice:\n  publish_interval_s: 1.0\n")
    sp = ServiceProc(base, service_args(base, "--config", cfg))
    try:
        ctl = sp.endpoints["control"]
        # good: two tunables, and one key that needs a restart (reported, not applied)
        write(cfg, "engine:\n  explore: {max_rate: 0.05}\nservice:\n  publish_interval_s: 0.5\n"
                   "  max_drain: 64\n")
        sp.signal(signal.SIGHUP)
        line = wait_log(sp, "reloaded")
        assert "engine.explore.max_rate" in line and "service.publish_interval_s" in line
        assert "needs_restart=service.max_drain" in line
        # bad: a value out of range, then a file that is not YAML — each rejected, logged
        write(cfg, "engine:\n  explore: {max_rate: 1.4}\n")
        sp.signal(signal.SIGHUP)
        line = wait_log(sp, "reload rejected")
        assert "engine.explore.max_rate" in line and "1.4" in line
        write(cfg, "engine: [unclosed\n")
        sp.signal(signal.SIGHUP)
        deadline = time.monotonic() + 10
        while sum("reload rejected" in x for x in sp.stderr_lines) < 2:
            assert time.monotonic() < deadline, sp.log()
            time.sleep(0.05)
        assert client.control(ctl, {"op": "health"})["status"] == "ok"
        vals = metric_values(sp.metrics_text())
        assert vals[("routerd_reloads_total", (("result", "applied"),))] == 1
        assert vals[("routerd_reloads_total", (("result", "rejected"),))] == 2
        sp.signal(signal.SIGTERM)
        assert sp.wait(15) == 0
        # the running settings were the good reload's: the final snapshot says so, and the
        # journal holds the config record a replay applies
        state, _ = journal.SnapshotStore(journal.snapshot_dir(sp.state_dir)).latest()
        assert state["settings"]["explore_max"] == 0.05
        recs = [r for r in journal.iter_records(journal.journal_dir(sp.state_dir)) if r.kind == "config"]
        assert recs and recs[-1].body["settings"]["explore_max"] == 0.05
    finally:
        sp.kill()


@pytest.mark.slow
def test_start_up_errors_are_clear(base: str) -> None:
    import subprocess
    import sys

    def serve(*args: str) -> subprocess.CompletedProcess:
        return subprocess.run([sys.executable, "-m", "routerd", "serve", *args], capture_output=True,
                              text=True, timeout=60, check=False)

    bad = write(os.path.join(base, "bad.yaml"), "service:\n  debounce_s: -1\n")
    r = serve("--config", bad, *service_args(base))
    assert r.returncode == 2 and "service.debounce_s" in r.stderr and "below 0" in r.stderr
    r = serve(*service_args(base, "--topology", os.path.join(base, "missing.yaml")))
    assert r.returncode == 2 and "does not exist" in r.stderr
    r = serve(*service_args(base, "--ingest", "tcp://127.0.0.1:notaport"))
    # refused when the config is read (routerd.io.values), before anything binds
    assert r.returncode == 2 and "service.ingest: 'tcp://127.0.0.1:notaport' has no valid " \
        "port" in r.stderr
    # a state dir written for another topology is refused, not reinterpreted
    other = write(os.path.join(base, "tiny.yaml"), "topology:\n  name: tiny\n  defaults: "
                  "{capacity_bps: 1.0e6, buffer_pkts: 10}\n  nodes: [a, b]\n  links:\n"
                  "    - {between: [a, b], delay_s: 0.001}\n")
    sd = os.path.join(base, "other-state")
    sp = ServiceProc(base, service_args(base, "--topology", other, "--state-dir", sd))
    try:
        sp.signal(signal.SIGTERM)
        assert sp.wait(15) == 0
    finally:
        sp.kill()
    # (with no --topology it would start on the topology the state dir recorded)
    other2 = write(os.path.join(base, "tiny2.yaml"), "topology:\n  name: tiny2\n  defaults: "
                   "{capacity_bps: 1.0e6, buffer_pkts: 10}\n  nodes: [a, c]\n  links:\n"
                   "    - {between: [a, c], delay_s: 0.001}\n")
    r = serve(*service_args(base, "--state-dir", sd, "--topology", other2))
    assert r.returncode == 2 and "another topology" in r.stderr, r.stderr


# ---- units ------------------------------------------------------------------------------
def test_flags_override_the_config_and_topology_paths_are_relative_to_it(tmp_path) -> None:
    sub = tmp_path / "etc"
    sub.mkdir()
    cfg = sub / "c.yaml"
    cfg.write_text("topology:\n  file: ../topo.yaml\nservice:\n  ingest: tcp://127.0.0.1:1\n"
                   "  control: tcp://127.0.0.1:2\n")
    ns = argparse.Namespace(config=str(cfg), topology=None, ingest="ipc:///tmp/x", pull=None,
                            publish=None, control=None, metrics="127.0.0.1:0", state_dir=None)
    c = load_config(ns)
    assert c["service.ingest"] == "ipc:///tmp/x"          # the flag wins
    assert c["service.control"] == "tcp://127.0.0.1:2"    # the file where no flag is given
    assert c["service.metrics"] == "127.0.0.1:0"
    assert c["service.publish"] == config.SCHEMA["service.publish"].default
    assert c["topology.file"] == str(tmp_path / "topo.yaml")
    ns.topology = "topohub:sndlib/abilene"
    assert load_config(ns)["topology.file"] == "topohub:sndlib/abilene"


def test_serve_flags_are_exactly_the_documented_ones() -> None:
    from routerd.service.serve import configure  # the command: the service's flags + sharding

    p = argparse.ArgumentParser()
    configure(p)
    flags = {s for a in p._actions for s in a.option_strings} - {"-h", "--help"}
    assert flags == {"--config", "--topology", "--ingest", "--pull", "--publish", "--control",
                     "--metrics", "--state-dir",
                     # issue 7: CURVE and the read-only control endpoint
                     "--server-key", "--allow", "--control-readonly",
                     # issue 16: --set on every command that takes a config
                     "--set",
                     # sharding (routerd/service/shard.py's; serve.py adds them)
                     "--shards", "--shard", "--upstream", "--shard-listen", "--external-workers"}
    # with neither a config nor flags: the built-in demo lab on loopback
    c = load_config(p.parse_args([]))
    assert load_topology(c).name == "demo-lab"
    for k in ("service.ingest", "service.publish", "service.control"):
        assert c[k].startswith("tcp://127.0.0.1:")
    assert c["service.metrics"].startswith("127.0.0.1:")


@pytest.mark.slow
def test_control_ops_pull_endpoint_and_json_logs(base: str) -> None:
    cfg = write(os.path.join(base, "j.yaml"), "service:\n  log_format: json\n  debounce_s: 0.01\n")
    with running(base, pull=True, config=cfg) as sp:
        ctl = sp.endpoints["control"]
        nodes = client.control(ctl, {"op": "nodes"})
        assert nodes == {"v": 1, "nodes": list(DEMO.nodes), "topology": DEMO.digest}
        t = client.control(ctl, {"op": "tables"})["tables"]
        assert set(t) == set(DEMO.nodes) and set(t["w1"]) == set(DEMO.nodes) - {"w1"}
        for ws in t["w1"].values():
            assert math.isclose(sum(w for _, w in ws), 1.0)
        e = client.control(ctl, {"op": "estimates", "node": "w3"})["estimates"]
        assert set(e["e3"]) == {"w2", "w4", "e3"}          # w3's neighbours
        assert "error" in client.control(ctl, {"op": "estimates", "node": "nowhere"})
        assert client.control(ctl, {"op": "bogus"})["error"].startswith("unknown_op")
        r = client.control(ctl, {"op": "link", "from": "w3", "to": "e3", "state": "down"})
        assert r["link"]["changed"] is True
        assert "e3" not in client.control(ctl, {"op": "estimates", "node": "w3"})["estimates"]["e4"]
        assert client.control(ctl, {"op": "link", "from": "w3", "to": "e3", "state": "down"})["link"]["changed"] is False
        assert "error" in client.control(ctl, {"op": "link", "from": "w3", "to": "e1", "state": "down"})
        # the override reaches the published tables: no w3 route crosses the trunk
        time.sleep(0.1)
        t = client.control(ctl, {"op": "tables"})["tables"]
        assert all(h != "e3" for ws in t["w3"].values() for h, _ in ws)
        snap = client.control(ctl, {"op": "snapshot"})["snapshot"]
        h = client.control(ctl, {"op": "health"})
        assert h["last_snapshot"]["record"] == snap["record"] and h["status"] == "ok"
        # raw REP garbage: answered, the REP socket stays usable
        s = sp.socket(zmq.REQ, "control")
        s.send(b"\xc1")
        assert msgpack.unpackb(s.recv(), raw=False)["error"].startswith("not_msgpack")
        s.close(0)
        # fire-and-forget: applied and counted like acknowledged batches
        push = sp.socket(zmq.PUSH, "pull")
        for i in range(50):
            push.send(wire.encode_ingest_rows("probe", i, [["e1", "e2", "e3", 0.0006]] * 4))
        push.send(b"not msgpack")
        deadline = time.monotonic() + 10
        while client.control(ctl, {"op": "health"})["counts"]["observations_accepted"] < 200:
            assert time.monotonic() < deadline
            time.sleep(0.05)
        push.close(0)
        vals = metric_values(sp.metrics_text())
        assert vals[("routerd_ingest_frames_total", (("socket", "pull"),))] == 51
        assert refused(vals, "not_msgpack") == 1
        # a late subscriber has every node's table within one publish interval (2 s here)
        late = client.TableSubscriber(sp.endpoints["publish"])
        try:
            t0 = time.monotonic()
            assert late.wait_for(lambda s: len(s.tables) == DEMO.n, 3.5)
            assert time.monotonic() - t0 < 2.0 + 1.0
            assert late.tables["w3"] == client.control(ctl, {"op": "tables"})["tables"]["w3"]
        finally:
            late.close()
        sp.signal(signal.SIGTERM)
        assert sp.wait(15) == 0
    import json

    logs = [json.loads(x) for x in sp.stderr_lines if x.startswith("{")]
    assert {"started", "link override", "snapshot", "stopping", "stopped"} <= {x["msg"] for x in logs}
    assert all({"ts", "level", "msg"} <= set(x) for x in logs)


@pytest.mark.slow
@pytest.mark.parametrize("policy", ["interval", "never"])
def test_other_fsync_policies_acknowledge_and_stop_cleanly(base: str, policy: str) -> None:
    cfg = write(os.path.join(base, "f.yaml"),
                f"service:\n  journal:\n    fsync: {policy}\n    fsync_interval_s: 0.2\n")
    sp = ServiceProc(base, [*service_args(base), "--config", cfg])
    try:
        t0 = time.monotonic()
        with client.Reporter(sp.endpoints["ingest"], "f", topology_nodes=DEMO, batch_rows=8,
                             max_pending=1) as rep:          # one batch at a time
            for i in range(160):
                rep.add_hop("w1", "w2", "e3", 0.002 + i * 1e-6)
        took = time.monotonic() - t0
        assert rep.accepted == 160 and took < 10, took
        h = client.control(sp.endpoints["control"], {"op": "health"})
        assert h["journal"]["fsync"] == policy and h["counts"]["observations_accepted"] == 160
        time.sleep(0.5)    # idle: the poll must still wake for the interval's fsync
        took = time.monotonic() - t0
        vals = metric_values(sp.metrics_text())
        fsyncs = vals[("routerd_journal_fsyncs_total", ())]
        if policy == "never":
            assert fsyncs == 0
        else:   # at most one per interval (plus the start-up one), not one per batch
            assert 1 <= fsyncs <= 2 + took / 0.2, fsyncs
        sp.signal(signal.SIGTERM)
        assert sp.wait(15) == 0
    finally:
        sp.kill()
    # nothing acknowledged is missing from the journal the clean stop left behind
    n = sum(len(journal.batch_hops(r.body)) for r in
            journal.iter_records(journal.journal_dir(sp.state_dir)) if r.kind == "batch")
    assert n == 160
