"""routerd.agent.forwarder on loopback: weights, flowlets, probes, failure detection, TTL, malformed
packets, reports and the table hold — real UDP sockets and real zmq, no root needed.

A diamond of our own: s reaches t through x (slow: 4 ms to x) or y (fast).  The agents run
in threads of this process; a stand-in service (PUB for tables, ROUTER that decodes with
routerd.io.wire and acknowledges) lets the tests choose the tables and read every row sent.
"""
from __future__ import annotations

import math
import os
import shutil
import socket
import subprocess
import sys
import tempfile
import threading
import time
from collections.abc import Callable, Iterator
from typing import Any

import pytest
import yaml
import zmq
from prometheus_client import CollectorRegistry, generate_latest
from prometheus_client.parser import text_string_to_metric_families

from routerd.agent import forwarder as A
from routerd.agent import overlay as ov
from routerd.core import topology as T
from routerd.io import config as C
from routerd.io import topofiles as TF
from routerd.io import wire
from routerd.io.clock import SYSTEM, FakeClock
from service_harness import free_udp_ports

NODES = ["s", "x", "y", "t"]
TOPO_DOC = {"topology": {"name": "diamond", "defaults": {"capacity_bps": 1e7, "buffer_pkts": 50},
                         "nodes": NODES,
                         "links": [{"between": ["s", "x"], "delay_s": 0.004},
                                   {"between": ["s", "y"], "delay_s": 0.001},
                                   {"between": ["x", "t"], "delay_s": 0.001},
                                   {"between": ["y", "t"], "delay_s": 0.001}]}}


def wait_until(pred: Callable[[], bool], timeout: float = 10.0) -> bool:
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        if pred():
            return True
        time.sleep(0.02)
    return pred()


class FakeService:
    """PUB tables/<node> and a ROUTER that acknowledges every batch (decoded by routerd.io.wire)."""

    def __init__(self, base: str, topo: T.Topology, epoch: int = 1):
        self.topo = topo
        self.ctx = zmq.Context()
        self.pub = self.ctx.socket(zmq.PUB)
        self.pub.linger = 0
        self.pub.bind(f"ipc://{base}/pub")
        self.router = self.ctx.socket(zmq.ROUTER)
        self.router.linger = 0
        self.router.bind(f"ipc://{base}/ingest")
        self.epoch = epoch
        self.seq = 0
        self.hops: list[tuple[str, str, str, float, float]] = []
        self.links: list[tuple[str, str, str]] = []
        self.tables: dict[str, dict[str, list[list[Any]]]] = {}
        self._stop = threading.Event()
        self._lock = threading.Lock()
        self._thread = threading.Thread(target=self._loop, daemon=True)
        self._thread.start()

    def set_table(self, node: str, routes: dict[str, list[list[Any]]]) -> None:
        with self._lock:
            self.tables[node] = routes

    def _loop(self) -> None:
        names = self.topo.nodes
        last_pub = 0.0
        while not self._stop.is_set():
            if self.router.poll(20):
                parts = self.router.recv_multipart()
                ing = wire.decode_ingest(parts[-1], self.topo)
                if isinstance(ing, wire.WireError):
                    out = wire.encode_error(ing)
                else:
                    h = ing.hops
                    with self._lock:
                        for a, b, c, lat, e in zip(h.src.tolist(), h.via.tolist(), h.dst.tolist(),
                                                   h.latency.tolist(), h.estimate.tolist()):
                            self.hops.append((names[a], names[b], names[c], lat, e))
                        for a, b, up in ing.links:
                            self.links.append((names[a], names[b], "up" if up else "down"))
                    out = wire.encode_ack(ing.batch, ing.rows_total, ing.rejections())
                self.router.send_multipart(parts[:-1] + [out])
            if time.monotonic() - last_pub > 0.05:
                last_pub = time.monotonic()
                with self._lock:
                    for node, routes in self.tables.items():
                        self.seq += 1
                        self.pub.send_multipart(wire.table_message(node, self.seq, self.epoch, routes))

    def close(self) -> None:
        self._stop.set()
        self._thread.join(5)
        self.pub.close(0)
        self.router.close(0)
        self.ctx.term()


class AgentThread:
    def __init__(self, agent: A.Agent, registry: CollectorRegistry):
        self.agent = agent
        self.registry = registry
        self.error: BaseException | None = None
        self.thread = threading.Thread(target=self._run, daemon=True)
        self.opened = threading.Event()
        self.thread.start()
        assert self.opened.wait(10), "agent did not open"
        if self.error:
            raise self.error

    def _run(self) -> None:
        try:
            self.agent.open()
            self.opened.set()
            self.agent.run()
        except BaseException as e:  # noqa: BLE001 - surfaced to the test
            self.error = e
            self.opened.set()
        finally:
            self.agent.close()

    def stop(self) -> None:
        self.agent.request_stop()
        self.thread.join(10)
        assert not self.thread.is_alive()

    def metric(self, name: str, labels: dict[str, str] | None = None) -> float:
        """A sample read back through prometheus_client's own text parser."""
        text = generate_latest(self.registry).decode()
        for fam in text_string_to_metric_families(text):
            for smp in fam.samples:
                if smp.name == name and (labels is None or all(smp.labels.get(k) == v for k, v in labels.items())):
                    return smp.value
        raise KeyError(name)


class Diamond:
    """Four agents on loopback plus the stand-in service, all in one tmp dir."""

    def __init__(self, base: str, **agent_keys: Any):
        self.base = base
        tp = os.path.join(base, "topo.yaml")
        with open(tp, "w") as fh:
            yaml.safe_dump(TOPO_DOC, fh)
        self.topo = TF.load(tp)
        pairs = (("s", "x"), ("s", "y"), ("x", "t"), ("y", "t"))
        ports = iter(free_udp_ports(2 * len(NODES) + 2 * len(pairs)))
        self.ports = {n: {"local": next(ports), "deliver": next(ports)} for n in NODES}
        links = []
        for a, b in pairs:
            links.append({"between": [a, b], "addresses": [f"127.0.0.1:{next(ports)}",
                                                           f"127.0.0.1:{next(ports)}"]})
        ul = os.path.join(base, "underlay.yaml")
        with open(ul, "w") as fh:
            yaml.safe_dump({"underlay": {"links": links}}, fh)
        keys = {"agent.probe_interval_s": 0.05, "agent.detect_multiplier": 3,
                "agent.report_interval_s": 0.05, "agent.table_stale_s": 0.6,
                "agent.propagation": "emulate", "agent.latency": "one_way",
                "agent.flowlet_gap_s": 0.0, **agent_keys}
        flat = {"topology.file": tp, "service.ingest": f"ipc://{base}/ingest",
                "service.publish": f"ipc://{base}/pub", "agent.underlay": ul, **keys}
        self.cfg = C.from_mapping_flat(flat, "test", base=None)
        self.config_path = os.path.join(base, "cfg.yaml")
        with open(self.config_path, "w") as fh:
            yaml.safe_dump(self.cfg.nested(), fh)
        self.underlay = A.load_underlay(ul, self.topo)
        self.service = FakeService(base, self.topo)
        self.agents: dict[str, AgentThread] = {}
        self.sink: dict[str, socket.socket] = {}
        for n in NODES:
            r = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
            r.bind(("127.0.0.1", self.ports[n]["deliver"]))
            r.settimeout(0.05)
            r.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 1 << 20)
            self.sink[n] = r
        self.tx = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
        self.tag = ov.topology_tag(self.topo.digest)

    def make(self, name: str, clock: Any = SYSTEM) -> tuple[A.Agent, CollectorRegistry]:
        reg = CollectorRegistry()
        ag = A.Agent(self.cfg, self.topo, name, registry=reg, underlay=self.underlay,
                     local=f"127.0.0.1:{self.ports[name]['local']}",
                     deliver=f"127.0.0.1:{self.ports[name]['deliver']}", clock=clock)
        return ag, reg

    def start(self, name: str) -> AgentThread:
        self.agents[name] = AgentThread(*self.make(name))
        return self.agents[name]

    def start_all(self) -> None:
        for n in NODES:
            self.start(n)
        assert wait_until(lambda: all(ln.state == "up" for a in self.agents.values()
                                      for ln in a.agent.links.values()), 10)

    def send(self, src: str, dst: str, flow: int, seq: int, ttl: int = 16) -> None:
        i = self.topo.index
        pkt = ov.data_packet(self.tag, i[src], i[dst], flow, seq, time.time_ns(), ttl, 64)
        self.tx.sendto(pkt, ("127.0.0.1", self.ports[src]["local"]))

    def received(self, node: str, timeout: float = 1.0,
                 expect: int | None = None) -> list[ov.Header]:
        """Headers arriving at ``node``'s sink until ``timeout`` s pass (or, with ``expect``,
        until that many came and 0.2 s more brought nothing)."""
        out = []
        end = time.monotonic() + timeout
        s = self.sink[node]
        while time.monotonic() < end:
            try:
                data = s.recv(65535)
            except TimeoutError:
                continue
            h = ov.decode(data, nodes=self.topo.n, topo=self.tag)
            assert not isinstance(h, ov.Malformed)
            out.append(h[0])
            end = (time.monotonic() + 0.2 if expect is not None and len(out) >= expect
                   else max(end, time.monotonic() + 0.2))
        return out

    def forwarded(self, name: str) -> int:
        return self.agents[name].agent.counts["forwarded"]

    def close(self) -> None:
        for a in self.agents.values():
            if a.thread.is_alive():
                a.stop()
        self.service.close()
        for s in list(self.sink.values()) + [self.tx]:
            s.close()


class Turns:
    """Agents of a diamond driven turn by turn on one FakeClock, in the test's own thread:
    each step moves virtual time by ``step_s`` and gives every agent one turn that does
    not wait.  Loopback UDP queues a datagram at the receiver before ``send`` returns, so
    what one agent sends in a step is read by the others in that step or the next: the
    agents' timing (probes, detection, held packets, reports) depends on the fake clock
    only, never on how fast the machine is."""

    def __init__(self, d: Diamond, step_s: float = 0.01):
        self.d = d
        self.clock = FakeClock(start=1000.0)
        self.step_s = step_s
        self.agents: dict[str, A.Agent] = {}
        self.registries: dict[str, CollectorRegistry] = {}

    def add(self, name: str) -> A.Agent:
        ag, reg = self.d.make(name, self.clock)
        ag.open()
        self.agents[name], self.registries[name] = ag, reg
        return ag

    def remove(self, name: str) -> None:
        self.agents.pop(name).close()

    def step(self, n: int = 1) -> None:
        for _ in range(n):
            self.clock.advance(self.step_s)
            for ag in self.agents.values():
                ag.turn(0.0)

    def step_until(self, pred: Callable[[], bool], max_steps: int) -> int:
        """Steps taken until ``pred()`` holds (fails the test after ``max_steps``)."""
        for i in range(max_steps + 1):
            if pred():
                return i
            self.step()
        raise AssertionError(f"not reached within {max_steps} steps of {self.step_s} s")

    def wait(self, pred: Callable[[], bool], timeout: float = 5.0) -> bool:
        """Turns without moving virtual time until ``pred()`` holds: for what arrives over
        zmq from the stand-in service's thread (tables, acknowledgements) in real time.
        Each turn waits for input up to 5 ms; nothing that depends on the clock fires."""
        end = time.monotonic() + timeout
        while not pred():
            if time.monotonic() > end:
                return False
            for ag in self.agents.values():
                ag.turn(0.005)
        return True

    def metric(self, name: str, sample: str, labels: dict[str, str] | None = None) -> float:
        text = generate_latest(self.registries[name]).decode()
        for fam in text_string_to_metric_families(text):
            for smp in fam.samples:
                if smp.name == sample and (labels is None or all(smp.labels.get(k) == v for k, v in labels.items())):
                    return smp.value
        raise KeyError(sample)

    def close(self) -> None:
        for name in list(self.agents):
            self.remove(name)


@pytest.fixture
def diamond() -> Iterator[Callable[..., Diamond]]:
    made: list[Diamond] = []
    dirs: list[str] = []

    def make(**keys: Any) -> Diamond:
        base = tempfile.mkdtemp(prefix="rda-", dir="/tmp")   # ipc:// paths stay short
        dirs.append(base)
        d = Diamond(base, **keys)
        made.append(d)
        return d

    yield make
    for d in made:
        d.close()
    for b in dirs:
        shutil.rmtree(b, ignore_errors=True)


def test_weights_are_honoured_per_flowlet(diamond: Callable[..., Diamond]) -> None:
    d = diamond()
    d.service.set_table("s", {"t": [["x", 0.8], ["y", 0.2]]})
    d.start_all()
    assert wait_until(lambda: d.agents["s"].agent.routes != {}, 5)
    n = 1000
    for i in range(n):
        d.send("s", "t", flow=i, seq=i)
        if i % 50 == 49:
            time.sleep(0.01)          # pacing: loopback UDP drops bursts beyond its buffer
    got = d.received("t", timeout=2.0)
    assert len(got) == n
    via_x = d.forwarded("x")
    # binomial(n, 0.8): mean 800, sd = sqrt(n p (1-p)) = 12.6; a 4-sd band (textbook normal
    # approximation; a false failure about once in 16,000 runs)
    sd = math.sqrt(n * 0.8 * 0.2)
    assert abs(via_x - 0.8 * n) < 4 * sd, via_x
    assert d.forwarded("x") + d.forwarded("y") == n
    assert all(h.ttl == 16 - 2 for h in got)     # two hops, one TTL each


def test_flowlet_stays_pinned_and_repins_on_table_change_and_link_down(diamond: Callable[..., Diamond]) -> None:
    d = diamond(**{"agent.flowlet_gap_s": 30.0})
    d.service.set_table("s", {"t": [["x", 0.5], ["y", 0.5]]})
    d.start_all()
    assert wait_until(lambda: d.agents["s"].agent.routes != {}, 5)
    for i in range(100):
        d.send("s", "t", flow=7, seq=i)
    assert len(d.received("t")) == 100
    fx, fy = d.forwarded("x"), d.forwarded("y")
    assert sorted((fx, fy)) == [0, 100]               # one flow, one next hop
    s = d.agents["s"]
    assert s.metric("routerd_agent_flowlet_pins_total", {"cause": "new"}) == 1
    # the entry changes: the flow moves to the only next hop left
    d.service.set_table("s", {"t": [["y", 1.0]]})
    assert wait_until(lambda: d.agents["s"].agent.routes.get(3) == ((2,), (1.0,)), 5)
    for i in range(100, 150):
        d.send("s", "t", flow=7, seq=i)
    assert len(d.received("t")) == 50
    assert d.forwarded("y") - fy == 50
    assert s.metric("routerd_agent_flowlet_pins_total", {"cause": "table"}) == 1
    # y goes away: after detection the flow leaves y (static fallback via x)
    d.agents["y"].stop()
    assert wait_until(lambda: s.agent.links[2].state == "down", 5)
    x0 = d.forwarded("x")
    for i in range(150, 170):
        d.send("s", "t", flow=7, seq=i)
    assert len(d.received("t")) == 20
    assert d.forwarded("x") - x0 == 20
    assert s.metric("routerd_agent_flowlet_pins_total", {"cause": "link"}) == 1
    assert s.metric("routerd_agent_fallback_forwarded_total") == 1   # one flowlet pinned by it


@pytest.mark.parametrize("method", ["one_way", "two_way"])
def test_probes_measure_emulated_delay_and_report_hop_rows(diamond: Callable[..., Diamond],
                                                           method: str) -> None:
    # both directions of s-x hold packets 4 ms, so the one-way delay and the NTP-style
    # two-way estimate ((t4 - t1) - (t3 - t2)) / 2 are both at least 4 ms
    d = diamond(**{"agent.latency": method})
    d.start_all()
    assert wait_until(lambda: sum(1 for h in d.service.hops if h[:2] == ("s", "x")) >= 30, 10)
    rows = [h for h in d.service.hops if h[:2] == ("s", "x")]
    # one row per destination other than s for every echo
    assert {r[2] for r in rows} == {"x", "y", "t"}
    # propagation is emulated at the receiver: each probe spends delay_s (4 ms) on the way
    lat = [r[3] for r in rows]
    assert min(lat) >= 0.004
    fast = [h[3] for h in d.service.hops if h[:2] == ("s", "y")]
    assert min(fast) >= 0.001 and sorted(fast)[len(fast) // 2] < sorted(lat)[len(lat) // 2]
    assert all(math.isnan(r[4]) for r in rows)      # no estimates: the echoes carried none
    # x's own estimates (as an engine beside it would set them) ride in its echoes and
    # come back in s's rows as the next hop's remaining estimate
    d.agents["x"].agent.set_estimates({"t": 0.25, "y": 0.5})
    n0 = len(d.service.hops)
    assert wait_until(lambda: any(h[:3] == ("s", "x", "t") and h[4] == 0.25
                                  for h in d.service.hops[n0:]), 5)
    first = next(i for i, h in enumerate(d.service.hops) if i >= n0 and h[4] == 0.25)

    def later() -> list[tuple[str, str, str, float, float]]:
        return [h for h in d.service.hops[first:] if h[:2] == ("s", "x")]

    assert wait_until(lambda: sum(1 for h in later() if h[2] == "x") >= 2, 5)   # two more echoes
    later_rows = later()
    # every destination x gave an estimate for carries it; x itself (the hop's end) none
    assert {h[2]: h[4] for h in later_rows if not math.isnan(h[4])} == {"t": 0.25, "y": 0.5}
    assert all(math.isnan(h[4]) for h in later_rows if h[2] == "x")
    with pytest.raises(ValueError, match="expected seconds"):
        d.agents["x"].agent.set_estimates({"t": -1.0})
    s = d.agents["s"]
    echoes = s.metric("routerd_agent_probes_total", {"event": "echoed"})
    assert echoes >= len(rows) / 3                  # the s-x echoes, and those of s-y
    # every echo is one latency observation; the agent keeps probing while we read the two
    # counters one after the other, so wait for a moment when neither is mid-update
    assert wait_until(lambda: s.metric("routerd_agent_hop_latency_seconds_count")
                      == s.metric("routerd_agent_probes_total", {"event": "echoed"}), 5)


def test_failure_detection_reports_down_then_up(diamond: Callable[..., Diamond]) -> None:
    # on a fake clock, stepped 10 ms at a time: probe interval 50 ms, multiplier 3
    d = diamond()
    turns = Turns(d)
    try:
        for n in NODES:
            turns.add(n)
        s = turns.agents["s"]
        # propagation is emulated (held delay_s <= 4 ms: one step): a probe goes out in
        # step 1, is answered in step 2, and the echo is taken in step 4
        assert turns.step_until(lambda: all(ln.state == "up" for a in turns.agents.values()
                                            for ln in a.links.values()), 10) == 4
        turns.step(5)                         # a report interval: the up rows are sent
        assert wait_until(lambda: ("s", "x", "up") in d.service.links, 5)
        turns.remove("x")
        last = s.links[1].last_echo
        # BFD detection time (RFC 5880 section 6.8.4): multiplier x interval = 3 x 50 ms
        # without an echo.  It cannot fire earlier; it fires at the first probe tick after.
        while s.links[1].state != "down":
            assert turns.clock.monotonic() - last <= 3 * 0.05 + 0.05 + 1e-9, "detected too late"
            turns.step()
        det = [e for e in s.detections if e["neighbour"] == "x"]
        assert len(det) == 1 and det[0]["from"] == "up"
        assert 3 * 0.05 < det[0]["after_s"] <= 3 * 0.05 + 0.05 + 1e-9
        assert det[0]["after_s"] == pytest.approx(turns.clock.monotonic() - last)
        assert det[0]["at"] == pytest.approx(turns.clock.wall())      # the clock's wall time
        assert turns.metric("s", "routerd_agent_links_down") == 1
        assert s.links[2].state == "up"       # y kept echoing throughout
        turns.step(5)
        assert wait_until(lambda: ("s", "x", "down") in d.service.links, 5)
        turns.add("x")
        turns.step_until(lambda: s.links[1].state == "up", 10)
        assert turns.metric("s", "routerd_agent_links_down") == 0
        turns.step(5)
        assert wait_until(lambda: d.service.links.count(("s", "x", "up")) >= 2, 5)
        # s-x and s-y came up at start, s-x once more
        assert turns.metric("s", "routerd_agent_link_state_changes_total", {"state": "up"}) == 3
        assert turns.metric("s", "routerd_agent_link_state_changes_total", {"state": "down"}) == 1
    finally:
        turns.close()


def test_ttl_expiry_and_malformed_packets_are_counted(diamond: Callable[..., Diamond]) -> None:
    d = diamond()
    d.service.set_table("s", {"t": [["y", 1.0]]})
    d.start_all()
    d.send("s", "t", flow=1, seq=1, ttl=0)           # cannot leave s
    d.send("s", "t", flow=1, seq=2, ttl=1)           # reaches y with 0 left: expires there
    d.send("s", "t", flow=1, seq=3, ttl=2)           # just enough
    got = d.received("t", 10.0, expect=1)
    assert [h.seq for h in got] == [3]
    assert wait_until(lambda: d.agents["s"].agent.counts["ttl_expired"] == 1
                      and d.agents["y"].agent.counts["ttl_expired"] == 1, 10)
    assert d.agents["s"].metric("routerd_agent_ttl_expired_total") == 1
    local = ("127.0.0.1", d.ports["s"]["local"])
    d.tx.sendto(b"\x01\x00", local)                                            # short
    d.tx.sendto(ov.data_packet(d.tag ^ 1, 0, 3, 1, 1, 1, 5, 40), local)        # wrong_topology
    d.tx.sendto(ov.data_packet(d.tag, 0, 3, 1, 1, 1, 5, 40) + b"!", local)     # bad_length
    d.tx.sendto(ov.probe(d.tag, 0, 1, 1, 1), local)                            # not data: dropped
    s = d.agents["s"]
    assert wait_until(lambda: s.agent.counts["malformed"] == 3, 10)
    for reason in ("short", "wrong_topology", "bad_length"):
        assert s.metric("routerd_agent_malformed_packets_total", {"reason": reason}) == 1
    # the probe was sent last and travels its own path through the agent: wait for it too
    assert wait_until(
        lambda: s.metric("routerd_agent_packets_dropped_total", {"reason": "not_data"}) == 1, 10)
    # on a link socket too: garbage from the neighbour's address is counted, not fatal
    x_end = d.underlay[(1, 0)][0]          # x's address on the s-x link
    s_end = d.underlay[(0, 1)][0]
    g = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    g.bind(("127.0.0.1", 0))
    g.close()
    d.agents["x"].stop()                    # free x's port to send from it
    g = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    g.bind(x_end)
    g.sendto(b"\x09" * 40, s_end)
    g.close()
    assert wait_until(lambda: s.metric("routerd_agent_malformed_packets_total", {"reason": "bad_version"}) == 1, 10)


def test_table_hold_and_resync(diamond: Callable[..., Diamond]) -> None:
    # on a fake clock: table_stale_s 0.6 s, steps of 10 ms
    d = diamond()
    d.service.set_table("s", {"t": [["x", 1.0]]})
    turns = Turns(d)
    try:
        for n in NODES:
            turns.add(n)
        s = turns.agents["s"]
        turns.step_until(lambda: all(ln.state == "up" for ln in s.links.values()), 10)
        assert turns.wait(lambda: s.routes != {})
        assert turns.metric("s", "routerd_agent_table_hold") == 0
        base = d.base
        d.service.close()                                   # the service is gone
        quiet_since = max(t for t in (s.table_at, s.last_ack_at) if t is not None)
        turns.step_until(lambda: turns.metric("s", "routerd_agent_table_hold") == 1, 80)
        # declared at the first report tick (every 50 ms) after 0.6 s without a table or ack
        assert 0.6 <= turns.clock.monotonic() - quiet_since <= 0.6 + 0.05 + 1e-9
        for i in range(20):
            d.send("s", "t", flow=i, seq=i)
        turns.step(3)                                       # through s and x (held 4 ms, 1 ms)
        assert len(d.received("t")) == 20                   # still forwarding, on the last table
        assert turns.agents["x"].counts["forwarded"] == 20  # ... and by it, not the fallback
        turns.remove("y")                                   # a link fails while the service is away
        turns.step_until(lambda: s.links[2].state == "down", 25)
        d.service = FakeService(base, d.topo, epoch=2)       # it comes back: a new epoch
        d.service.set_table("s", {"t": [["x", 1.0]]})
        assert turns.wait(lambda: turns.metric("s", "routerd_agent_table_hold") == 0)
        assert turns.metric("s", "routerd_agent_service_restarts_seen_total") == 1
        assert turns.metric("s", "routerd_agent_table_holds_total") == 1
        # what it saw down while the service was away reaches the new service: behind the
        # batches that piled up meanwhile, which go again after their timeout (2 s virtual)
        turns.step_until(lambda: turns.wait(lambda: ("s", "y", "down") in d.service.links, 0.01),
                         400)
        assert s.counts["delivery_errors"] == 0
    finally:
        turns.close()


def test_underlay_and_node_errors(tmp_path: Any) -> None:
    topo = T.from_mapping(TOPO_DOC, source="diamond")
    bad = tmp_path / "u.yaml"
    bad.write_text(yaml.safe_dump({"underlay": {"links": [
        {"between": ["s", "q"], "addresses": ["127.0.0.1:1", "127.0.0.1:2"]},
        {"between": ["s", "t"], "addresses": ["127.0.0.1:1", "127.0.0.1:2"]},
        {"between": ["s", "x"], "addresses": ["127.0.0.1", "127.0.0.1:2"]},
        {"between": ["s", "y"]}]}}))
    with pytest.raises(A.InputError) as ei:
        A.load_underlay(str(bad), topo)
    msg = str(ei.value)
    assert "underlay.links[0].between: 'q' is not a node" in msg
    assert "underlay.links[1].between: ['s', 't'] is not a link" in msg
    assert "underlay.links[2].addresses[0]: '127.0.0.1' is not HOST:PORT" in msg
    assert "underlay.links[3]" in msg
    good = tmp_path / "g.yaml"
    good.write_text(yaml.safe_dump({"underlay": {"links": [
        {"between": ["s", "x"], "addresses": ["127.0.0.1:1", "127.0.0.1:2"]}]}}))
    ul = A.load_underlay(str(good), topo)
    with pytest.raises(A.InputError, match="gives no addresses for them"):
        A.link_ends(0, topo, ul, str(good))
    cfg = C.from_mapping_flat({"agent.underlay": str(good)}, "t", base=None)
    with pytest.raises(A.InputError, match="'zz' is not a node"):
        A.Agent(cfg, topo, "zz", registry=CollectorRegistry())


def test_cli_refuses_unknown_node(tmp_path: Any) -> None:
    tp = tmp_path / "topo.yaml"
    tp.write_text(yaml.safe_dump(TOPO_DOC))
    cf = tmp_path / "c.yaml"
    cf.write_text(yaml.safe_dump({"topology": {"file": "topo.yaml"}, "agent": {"underlay": "none.yaml"}}))
    for node, want in (("zz", "'zz' is not a node of topology 'diamond'"),
                       ("s", "none.yaml' does not exist (agent.underlay)")):
        r = subprocess.run([sys.executable, "-m", "routerd", "agent", "--node", node, "--config",
                            str(cf)], capture_output=True, text=True, timeout=60,
                           check=False)
        assert r.returncode == 2, r.stderr
        assert want in r.stderr


def test_never_straight_back_while_another_way_exists(diamond: Callable[..., Diamond]) -> None:
    # tables of different moments: s sends t's packets to x, x's (stale) table sends them
    # back to s.  x takes another way (its fallback, x - t) instead of bouncing them.
    d = diamond()
    d.service.set_table("s", {"t": [["x", 1.0]]})
    d.service.set_table("x", {"t": [["s", 1.0]]})
    d.start_all()
    assert wait_until(lambda: d.agents["s"].agent.routes != {} and d.agents["x"].agent.routes != {}, 5)
    for i in range(10):
        d.send("s", "t", flow=i, seq=i)
    got = d.received("t")
    assert len(got) == 10 and all(h.ttl == 16 - 2 for h in got)      # s -> x -> t
    x = d.agents["x"]
    assert x.metric("routerd_agent_returns_avoided_total") == 10
    assert d.agents["s"].agent.counts["ttl_expired"] == 0


# ---- the link state machine, as data -------------------------------------------------------
def test_link_transition_table_is_total_and_closed() -> None:
    assert set(A.LINK_TRANSITIONS) == {(s, e) for s in A.LINK_STATES for e in A.LINK_EVENTS}
    for (_s, _e), (nxt, actions) in A.LINK_TRANSITIONS.items():
        assert nxt in A.LINK_STATES and set(actions) <= set(A.LINK_ACTIONS)
    assert A.USABLE_STATES < set(A.LINK_STATES) and "down" not in A.USABLE_STATES
    # RFC 5880's rule in our terms: a change is reported, a non-change is not (except resync)
    for (s, e), (nxt, actions) in A.LINK_TRANSITIONS.items():
        if e != "resync":
            assert ("report" in actions) == (nxt != s), (s, e)
            assert ("count" in actions) == (nxt != s), (s, e)
        else:
            assert nxt == s and "count" not in actions


def _bare_agent(tmp_path: Any, clock: FakeClock) -> tuple[A.Agent, CollectorRegistry]:
    """An agent of node s (not opened: no sockets) with its two links in hand."""
    tp = tmp_path / "topo.yaml"
    tp.write_text(yaml.safe_dump(TOPO_DOC))
    topo = TF.load(str(tp))
    cfg = C.from_mapping_flat({"topology.file": str(tp), "agent.probe_interval_s": 0.05,
                               "agent.detect_multiplier": 3}, "test", base=None)
    ul = {(0, 1): (("127.0.0.1", 1), ("127.0.0.1", 2)), (1, 0): (("127.0.0.1", 2), ("127.0.0.1", 1)),
          (0, 2): (("127.0.0.1", 3), ("127.0.0.1", 4)), (2, 0): (("127.0.0.1", 4), ("127.0.0.1", 3))}
    reg = CollectorRegistry()
    ag = A.Agent(cfg, topo, "s", registry=reg, underlay=ul, local="127.0.0.1:0",
                 deliver="127.0.0.1:0", clock=clock)
    for e in ag.ends:
        ag.links[e.neighbour] = A._Link(e, None, 0.0, clock.monotonic(), ag.detect_s)  # type: ignore[arg-type]
    ag._recompute_fallback()
    return ag, reg


@pytest.mark.parametrize("key", sorted(A.LINK_TRANSITIONS), ids="-".join)
def test_each_link_transition_does_what_the_table_says(tmp_path: Any, key: tuple[str, str]) -> None:
    state, event = key
    nxt, actions = A.LINK_TRANSITIONS[key]
    clock = FakeClock(start=10.0)
    ag, reg = _bare_agent(tmp_path, clock)
    try:
        ln = ag.links[2]                     # s-y: the delay-shortest way to y and t
        ln.state = state
        ln.last_echo = 9.5
        ag._recompute_fallback()
        before = {st: reg.get_sample_value("routerd_agent_link_state_changes_total", {"state": st})
                  for st in ("up", "down")}
        fb = list(ag.fallback_nh)
        clock.advance(1.0)
        ag._link_event(ln, event, clock.monotonic())
        assert ln.state == nxt
        assert ag.link_reports == ({2: nxt} if "report" in actions else {})
        changes = {st: reg.get_sample_value("routerd_agent_link_state_changes_total", {"state": st})
                   for st in ("up", "down")}
        assert changes == ({**before, nxt: before[nxt] + 1} if "count" in actions else before)
        if "count" in actions:
            assert reg.get_sample_value("routerd_agent_links_down") == (1 if nxt == "down" else 0)
        det = list(ag.detections)
        if "record" in actions:
            assert det == [{"neighbour": "y", "from": state, "after_s": pytest.approx(1.5),
                            "at": pytest.approx(clock.wall())}]
        else:
            assert det == []
        # the static fallback follows the usable links: every node by way of y (s-y-t-x,
        # 3 ms, beats s-x, 4 ms) unless s-y is down, then by way of x
        want = [-1, 1, 1, 1] if nxt not in A.USABLE_STATES else [-1, 2, 2, 2]
        assert ag.fallback_nh == want
        assert (ag.fallback_nh != fb) == ("count" in actions and (state in A.USABLE_STATES)
                                          != (nxt in A.USABLE_STATES))
    finally:
        ag.links = {}                        # no sockets of their own to close
        ag.close()


def test_link_walk_from_start_up(tmp_path: Any) -> None:
    """A walk through the table as an agent meets it: silence at start-up, an echo, a flap,
    a service restart while down."""
    clock = FakeClock()
    ag, _reg = _bare_agent(tmp_path, clock)
    try:
        ln = ag.links[1]
        walk = [("silence", "down", {1: "down"}), ("silence", "down", {}), ("resync", "down", {1: "down"}),
                ("echo", "up", {1: "up"}), ("echo", "up", {}), ("resync", "up", {}),
                ("silence", "down", {1: "down"}), ("echo", "up", {1: "up"})]
        for event, want, reports in walk:
            clock.advance(0.2)
            ag._link_event(ln, event, clock.monotonic())
            assert (ln.state, ag.link_reports) == (want, reports), event
            ag.link_reports.clear()
        assert [d["from"] for d in ag.detections] == ["init", "up"]
    finally:
        ag.links = {}                        # no sockets of their own to close
        ag.close()


def test_bad_duration_and_status_file_are_refused_and_a_failed_status_write_is_said(
        tmp_path: Any, capsys: pytest.CaptureFixture[str]) -> None:
    # --duration -1 stopped at once with exit 0, nan ran for ever; --status-file naming a
    # directory (or a failed write later) lost every status without a word
    import types

    from routerd.agent import forwarder
    from routerd.tools import cli

    for extra, expect in ((["--duration", "-1"], "--duration: -1.0 must be a finite number"),
                          (["--duration", "nan"], "--duration: nan must be a finite number"),
                          (["--status-file", str(tmp_path)], "is a directory, not a file")):
        args = cli.build_parser().parse_args(["agent", "--node", "a1", "--config",
                                              str(tmp_path / "unused.yaml"), *extra])
        assert forwarder.run(args) == 2
        assert expect in capsys.readouterr().err
    fake = types.SimpleNamespace(status_file=str(tmp_path / "gone" / "s.json"), status_error=None,
                                 status=lambda: {"ok": 1})
    forwarder.Agent.write_status(fake)  # type: ignore[arg-type]
    forwarder.Agent.write_status(fake)  # type: ignore[arg-type]
    err = capsys.readouterr().err
    assert err.count("cannot write the status file") == 1 and "No such file or directory" in err
