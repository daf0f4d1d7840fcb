"""routerd.agent.client against a small in-test fake service (ROUTER + REP threads on ipc://)
that decodes with routerd.io.wire and acknowledges; and, marked slow, against a real
``routerd serve`` for what only the daemon does: CURVE and its token-bucket rate limit.
The daemon's own end-to-end tests live with the service."""
from __future__ import annotations

import os
import shutil
import tempfile
import threading
import time
from collections.abc import Iterator
from typing import Any

import numpy as np
import pytest
import zmq

from routerd.agent import client
from routerd.core import topology
from routerd.io import security, topofiles, wire
from service_harness import ServiceProc, free_udp_ports, service_args, short_base

DEMO = "routerd/data/demo-lab.yaml"


@pytest.fixture(scope="module")
def topo() -> topology.Topology:
    return topofiles.load(DEMO)


@pytest.fixture()
def ctx() -> Iterator[zmq.Context]:
    c = zmq.Context()
    yield c
    # every socket the client made must be closed by now (term would hang on an open one;
    # destroy closes what a failed test left open, so a failure never hangs the suite)
    left = [s for s in list(getattr(c, "_sockets", ())) if not s.closed]
    c.destroy(linger=0)
    assert not left, f"{len(left)} sockets left open"


@pytest.fixture()
def eps() -> Iterator[tuple[str, str, str]]:
    d = tempfile.mkdtemp(prefix="rdc", dir="/tmp")    # ipc paths must stay short
    yield f"ipc://{d}/ingest", f"ipc://{d}/control", f"ipc://{d}/tables"
    shutil.rmtree(d, ignore_errors=True)


class FakeService:
    """Decodes batches with wire.decode_ingest, applies each (reporter, batch) once,
    acknowledges every copy.  ``drop_acks``: how many acks of each batch to swallow."""

    def __init__(self, ctx: zmq.Context, topo: topology.Topology, ingest: str, control: str,
                 *, drop_acks: int = 0, hold: bool = False, error: str | None = None,
                 nodes_topo: topology.Topology | None = None, defer: str | None = None,
                 defer_copies: int = 0):
        """``defer``: a refusal the first ``defer_copies`` copies of each batch get (not
        applied, as the service's rate_limited / unavailable); -1: every copy."""
        self.topo, self.drop_acks, self.hold, self.error = topo, drop_acks, hold, error
        self.defer, self.defer_copies = defer, defer_copies
        self.arrivals: dict[tuple[str, int], list[float]] = {}
        self.deferred = 0
        self.nodes_topo = nodes_topo or topo
        self.router = ctx.socket(zmq.ROUTER)
        self.router.linger = 0
        self.router.bind(ingest)
        self.rep = ctx.socket(zmq.REP)
        self.rep.linger = 0
        self.rep.bind(control)
        self.applied: dict[tuple[str, int], wire.Ingest] = {}
        self.order: list[tuple[str, int]] = []
        self.copies: dict[tuple[str, int], int] = {}
        self.acks_sent: dict[tuple[str, int], bytes] = {}
        self.errors: list[wire.WireError] = []
        self._stop = threading.Event()
        self._t = threading.Thread(target=self._run, daemon=True)
        self._t.start()

    def _run(self) -> None:
        poller = zmq.Poller()
        poller.register(self.router, zmq.POLLIN)
        poller.register(self.rep, zmq.POLLIN)
        while not self._stop.is_set():
            for sock, _ in poller.poll(20):
                if sock is self.rep:
                    req = wire.decode_control(self.rep.recv(), self.nodes_topo)
                    if isinstance(req, wire.WireError):
                        self.rep.send(wire.encode_error(req))
                    else:
                        self.rep.send(wire.encode_reply(wire.nodes_reply(self.nodes_topo)))
                    continue
                frames = self.router.recv_multipart()
                ident, payload = frames[0], frames[-1]
                assert frames[1:-1] == [b""]          # the documented envelope
                out = self._handle(payload)
                if out is not None:
                    self.router.send_multipart([ident, b"", out])
        self.router.close()
        self.rep.close()

    def _handle(self, payload: bytes) -> bytes | None:
        ing = wire.decode_ingest(payload, self.topo)
        if isinstance(ing, wire.WireError):
            self.errors.append(ing)
            return wire.encode_error(ing)
        if self.error is not None:
            return wire.encode_error(self.error, ing.batch)
        key = (ing.reporter, ing.batch)
        self.copies[key] = self.copies.get(key, 0) + 1
        self.arrivals.setdefault(key, []).append(time.monotonic())
        if self.defer is not None and key not in self.applied and (
                self.defer_copies < 0 or self.copies[key] <= self.defer_copies):
            self.deferred += 1
            return wire.encode_error(self.defer, ing.batch)
        if key not in self.applied:
            self.applied[key] = ing
            self.order.append(key)
            self.acks_sent[key] = wire.encode_ack(ing.batch, len(ing.hops) + len(ing.links),
                                                  ing.rejections())
        if self.hold or self.copies[key] <= self.drop_acks:
            return None
        return self.acks_sent[key]

    def rows(self) -> list[tuple[str, str, str, float]]:
        names = self.topo.nodes
        out = []
        for key in self.order:
            h = self.applied[key].hops
            out += [(names[a], names[b], names[c], float(x))
                    for a, b, c, x in zip(h.src, h.via, h.dst, h.latency)]
        return out

    def close(self) -> None:
        self._stop.set()
        self._t.join(5)
        assert not self._t.is_alive()


@pytest.fixture()
def fake(ctx: zmq.Context, topo: topology.Topology, eps: tuple[str, str, str]) -> Iterator[Any]:
    made: list[FakeService] = []

    def make(**kw: Any) -> FakeService:
        f = FakeService(ctx, topo, eps[0], eps[1], **kw)
        made.append(f)
        return f
    yield make
    for f in made:
        f.close()


def _hops(topo: topology.Topology, m: int, seed: int = 0) -> list[tuple[str, str, str, float]]:
    rng = np.random.default_rng(seed)
    out = []
    for _ in range(m):
        x = int(rng.integers(0, topo.n))
        y = int(rng.choice(topo.neighbours[x]))
        d = int(rng.integers(0, topo.n))
        out.append((topo.nodes[x], topo.nodes[y], topo.nodes[d], float(rng.random() * 0.01)))
    return out


# ---- delivery ---------------------------------------------------------------------------------
@pytest.mark.parametrize("columnar", [True, False])
def test_every_row_delivered_once_in_order(ctx: zmq.Context, topo: topology.Topology,
                                           eps: tuple[str, str, str], fake: Any,
                                           columnar: bool) -> None:
    svc = fake()
    hops = _hops(topo, 2500)
    acks: list[client.Ack] = []
    with client.Reporter(eps[0], "probe-a", control=eps[1], columnar=columnar, batch_rows=1000,
                         timeout_s=1.0, context=ctx, on_ack=acks.append) as rep:
        for h in hops:
            rep.add_hop(*h)
        rep.add_link("w1", "w2", "down")
        rep.flush()
        assert rep.pending == 0 and rep.pending_rows == 0
        assert rep.accepted == 2501 and not rep.rejected
    assert svc.rows() == hops
    batches = [b for _, b in svc.order]
    assert batches == list(range(batches[0], batches[0] + 3))     # consecutive numbers
    assert [a.batch for a in acks] == batches and [a.accepted for a in acks] == [1000, 1000, 501]
    assert all(svc.applied[k].columnar == columnar for k in svc.order)
    last = svc.applied[svc.order[-1]]
    assert last.links == ((topo.index["w1"], topo.index["w2"], False),)
    assert last.link_rows == (500,)                               # after the 500 hop rows


def test_estimates_travel(ctx: zmq.Context, topo: topology.Topology,
                          eps: tuple[str, str, str], fake: Any) -> None:
    svc = fake()
    with client.Reporter(eps[0], "p", topology_nodes=topo, context=ctx, timeout_s=1.0) as rep:
        rep.add_hop("w1", "w2", "w3", 0.001, 0.004)
        rep.add_hop("w1", "w2", "w3", 0.002)
    h = svc.applied[svc.order[0]].hops
    assert h.estimate[0] == 0.004 and np.isnan(h.estimate[1])


def test_named_rows_unknown_node_rejected_by_service(ctx: zmq.Context, topo: topology.Topology,
                                                     eps: tuple[str, str, str], fake: Any) -> None:
    fake()
    with client.Reporter(eps[0], "p", columnar=False, context=ctx, timeout_s=1.0) as rep:
        rep.add_hop("w1", "w2", "w3", 0.001)
        rep.add_hop("w1", "saturn", "w3", 0.001)
        rep.flush()
        assert rep.accepted == 1 and rep.rejected == {"unknown_node": 1}
        assert rep.last_ack is not None and rep.last_ack.rejected == ((1, "unknown_node"),)


def test_columnar_unknown_node_is_a_local_error(ctx: zmq.Context, topo: topology.Topology,
                                                eps: tuple[str, str, str]) -> None:
    rep = client.Reporter(eps[0], "p", topology_nodes=topo.nodes, context=ctx)
    assert rep.topology_id == topo.digest                 # computed from the names
    with pytest.raises(client.UnknownNode, match="'saturn'"):
        rep.add_hop("w1", "saturn", "w3", 0.001)
    with pytest.raises(ValueError, match="'sideways'"):
        rep.add_link("w1", "w2", "sideways")
    rep.close(flush=False)
    with pytest.raises(ValueError, match="node list"):
        client.Reporter(eps[0], "p", context=ctx)          # columnar, no way to get the list


def test_lost_acks_resent_with_same_number(ctx: zmq.Context, topo: topology.Topology,
                                           eps: tuple[str, str, str], fake: Any) -> None:
    svc = fake(drop_acks=2)
    hops = _hops(topo, 300, seed=3)
    with client.Reporter(eps[0], "p", topology_nodes=topo, batch_rows=100, timeout_s=0.1,
                         retries=5, context=ctx) as rep:
        for h in hops:
            rep.add_hop(*h)
        rep.flush()
        assert rep.resends >= 6 and rep.batches_sent == 3
    assert all(c == 3 for c in svc.copies.values())       # each batch arrived three times
    assert svc.rows() == hops                             # and was applied once


def test_service_down_then_up(ctx: zmq.Context, topo: topology.Topology,
                              eps: tuple[str, str, str], fake: Any) -> None:
    rep = client.Reporter(eps[0], "p", topology_nodes=topo, timeout_s=0.05, retries=2, context=ctx)
    rep.add_hop("w1", "w2", "w3", 0.001)
    t0 = time.monotonic()
    with pytest.raises(client.DeliveryError) as ei:
        rep.flush()
    assert time.monotonic() - t0 < 5
    assert len(ei.value.batches) == 1 and rep.pending == 1     # still pending, not lost
    svc = fake()
    rep.flush()                                                # a fresh retry budget
    assert rep.pending == 0 and len(svc.order) == 1
    rep.close()


def test_memory_bound_blocks_then_raises(ctx: zmq.Context, topo: topology.Topology,
                                         eps: tuple[str, str, str], fake: Any) -> None:
    fake(hold=True)                         # takes batches, never acknowledges
    rep = client.Reporter(eps[0], "p", topology_nodes=topo, batch_rows=10, max_pending=2,
                          timeout_s=0.05, retries=1, context=ctx)
    for h in _hops(topo, 20):
        rep.add_hop(*h)                     # two full batches: both pending
    assert rep.pending == 2
    t0 = time.monotonic()
    with pytest.raises(client.DeliveryError, match="limit is 2"):
        for h in _hops(topo, 10):
            rep.add_hop(*h)                 # the third batch waits for room, none comes
    assert 0.05 <= time.monotonic() - t0 < 5
    assert rep.pending == 2 and rep.pending_rows == 30
    rep.close(flush=False)


def test_wrong_topology_resent_by_name(ctx: zmq.Context, topo: topology.Topology,
                                       eps: tuple[str, str, str], fake: Any) -> None:
    """The service's node list changed (another order): the batch comes back refused as a
    whole, is resent by name, and the reporter learns the new list."""
    other = topology.build(topo.name, list(reversed(topo.nodes)),
                           [topology.LinkSpec(topo.nodes[a], topo.nodes[b], float(dl), 1e7, 50, "x")
                            for a, b, dl in zip(topo.src, topo.dst, topo.delay_s)])
    svc = fake(nodes_topo=other)
    svc.topo = other
    with client.Reporter(eps[0], "p", topology_nodes=topo, control=eps[1], context=ctx,
                         timeout_s=1.0) as rep:
        rep.add_hop("w1", "w2", "e3", 0.001)
        rep.flush()
        assert rep.topology_id == other.digest and rep.accepted == 1
        rep.add_hop("e1", "e2", "w3", 0.002)
        rep.flush()
    assert [e.code for e in svc.errors] == ["wrong_topology"]
    assert svc.rows() == [("w1", "w2", "e3", 0.001), ("e1", "e2", "w3", 0.002)]
    assert [svc.applied[k].columnar for k in svc.order] == [False, True]


def test_whole_batch_error_is_final_counted_and_kept(ctx: zmq.Context, topo: topology.Topology,
                                                     eps: tuple[str, str, str], fake: Any) -> None:
    text = "bad_reporter: field 'reporter' is 'p', which this service does not accept"
    svc = fake(error=text)
    rep = client.Reporter(eps[0], "p", topology_nodes=topo, context=ctx, timeout_s=1.0)
    rep.add_hop("w1", "w2", "w3", 0.001)
    rep.add_hop("w1", "w2", "e3", 0.001)
    with pytest.raises(client.ServiceError) as ei:
        rep.flush()
    assert ei.value.reason == text and ei.value.batch is not None
    assert rep.pending == 0 and rep.resends == 0                 # final: never sent again
    assert rep.refused == {"bad_reporter": 1} and rep.refused_rows == 2
    assert list(rep.refused_batches) == [(ei.value.batch, text, 2)]
    assert rep.last_error == text and not rep.deferred
    rep.close()
    assert not svc.applied


# ---- refusals to be retried: rate_limited, unavailable ----------------------------------------
@pytest.mark.parametrize("code", client.DEFER_CODES)
def test_deferred_batches_kept_and_resent_with_same_number(ctx: zmq.Context, topo: topology.Topology,
                                                           eps: tuple[str, str, str], fake: Any,
                                                           code: str) -> None:
    """The service refuses each batch twice (nothing applied), then takes it: every row is
    applied once, in batches with their first numbers, after a backoff between copies."""
    svc = fake(defer=f"{code}: try again later", defer_copies=2)
    hops = _hops(topo, 300, seed=5)
    backoff = 0.02
    with client.Reporter(eps[0], "p", topology_nodes=topo, batch_rows=100, max_pending=2,
                         timeout_s=1.0, retries=1, backoff_s=backoff, backoff_max_s=0.2,
                         context=ctx) as rep:
        for h in hops:
            rep.add_hop(*h)
            assert rep.pending <= 2                      # the memory bound holds throughout
        rep.flush()
        assert rep.pending == 0 and rep.accepted == 300 and not rep.refused
        assert rep.deferred == {code: 6} and rep.batches_sent == 3 and rep.resends == 6
        assert rep.last_error == f"{code}: try again later"
    assert svc.rows() == hops                            # each row applied once, in order
    batches = [b for _, b in svc.order]
    assert batches == list(range(batches[0], batches[0] + 3))
    assert all(c == 3 for c in svc.copies.values())
    for times in svc.arrivals.values():
        # the backoff doubles per refusal of a batch, jitter at most -25 %: lower bounds only
        gaps = np.diff(times)
        assert gaps[0] >= 0.75 * backoff and gaps[1] >= 0.75 * 2 * backoff, gaps


def test_endless_deferral_raises_keeps_the_batch_and_resumes(ctx: zmq.Context,
                                                             topo: topology.Topology,
                                                             eps: tuple[str, str, str],
                                                             fake: Any) -> None:
    svc = fake(defer="rate_limited: reporter 'p' is over its rate", defer_copies=-1)
    rep = client.Reporter(eps[0], "p", topology_nodes=topo, timeout_s=1.0, backoff_s=0.005,
                          backoff_max_s=0.02, max_deferrals=3, context=ctx)
    rep.add_hop("w1", "w2", "w3", 0.001)
    t0 = time.monotonic()
    with pytest.raises(client.DeliveryError, match=r"refused 4 times .*rate_limited") as ei:
        rep.flush()
    assert time.monotonic() - t0 < 5
    assert ei.value.last_error.startswith("rate_limited") and len(ei.value.batches) == 1
    assert rep.pending == 1 and rep.deferred == {"rate_limited": 4} and not rep.refused
    svc.defer = None                                     # the bucket refills
    rep.flush()                                          # a fresh budget, the same number
    assert rep.pending == 0 and svc.order == [("p", ei.value.batches[0])]
    rep.close()


def test_late_refusal_of_an_acknowledged_batch_is_ignored(ctx: zmq.Context,
                                                          topo: topology.Topology,
                                                          eps: tuple[str, str, str],
                                                          fake: Any) -> None:
    """An ack lost, the batch resent, the copy refused after the first copy's ack came:
    the refusal belongs to nothing pending and changes nothing."""
    fake()
    rep = client.Reporter(eps[0], "p", topology_nodes=topo, timeout_s=1.0, context=ctx)
    rep.add_hop("w1", "w2", "w3", 0.001)
    rep.flush()
    done = rep.last_ack.batch
    rep._reply(wire.encode_error("unavailable: the journal cannot be written", done))
    rep._reply(wire.encode_error("bad_reporter: no", done))
    assert rep.late_acks == 2 and not rep.deferred and not rep.refused and rep.pending == 0
    rep.close()


def test_first_batch_number_from_the_clock(ctx: zmq.Context, topo: topology.Topology,
                                           eps: tuple[str, str, str], fake: Any) -> None:
    svc = fake()
    for _ in range(2):   # a restarted reporter with the same name must not reuse numbers
        with client.Reporter(eps[0], "same", topology_nodes=topo, context=ctx, timeout_s=1.0) as rep:
            rep.add_hop("w1", "w2", "w3", 0.001)
    (a, b) = [n for _, n in svc.order]
    assert b > a and abs(a - time.time_ns() // 1000) < 60_000_000


# ---- control ----------------------------------------------------------------------------------
def test_control_nodes_and_timeout(ctx: zmq.Context, topo: topology.Topology,
                                   eps: tuple[str, str, str], fake: Any) -> None:
    fake()
    rep = client.control(eps[1], {"op": "nodes"}, 1.0, context=ctx)
    assert rep == {"v": 1, "nodes": list(topo.nodes), "topology": topo.digest}
    rep = client.control(eps[1], {"op": "fly"}, 1.0, context=ctx)
    assert rep["error"].startswith("unknown_op")
    t0 = time.monotonic()
    with pytest.raises(TimeoutError, match="no reply"):
        client.control(eps[2], {"op": "health"}, 0.2, context=ctx)   # nobody there
    assert time.monotonic() - t0 < 3


def test_control_pipe_answers_in_order_and_recovers_after_a_timeout(
        ctx: zmq.Context, topo: topology.Topology, eps: tuple[str, str, str], fake: Any) -> None:
    nodes = {"v": 1, "nodes": list(topo.nodes), "topology": topo.digest}
    with client.ControlPipe(eps[1], 0.3, context=ctx) as pipe:
        # nobody bound yet: the request is owed; the pipe drops it with its socket
        with pytest.raises(TimeoutError, match=r"no reply from .* to 1 of 1 control requests"):
            pipe.ask([{"op": "nodes"}])
        fake()
        pipe.timeout_s = 2.0
        reps = pipe.ask([{"op": "nodes"}, {"op": "fly"}, {"op": "nodes"}])   # three in flight
        assert reps[0] == nodes and reps[2] == nodes
        assert reps[1]["error"].startswith("unknown_op")
        assert pipe.ask([]) == []
    pipe.close()                                                             # idempotent
    with pytest.raises(client.TransportError, match="is closed"):
        pipe.ask([{"op": "nodes"}])


# ---- tables -----------------------------------------------------------------------------------
def test_subscriber_keeps_latest_and_counts_gaps(ctx: zmq.Context, eps: tuple[str, str, str]) -> None:
    pub = ctx.socket(zmq.PUB)
    pub.linger = 0
    pub.bind(eps[2])
    sub = client.TableSubscriber(eps[2], context=ctx)
    try:
        # PUB/SUB joins late: publish a warm-up node until the subscription is in place
        deadline = time.monotonic() + 5
        while sub.received == 0 and time.monotonic() < deadline:
            pub.send_multipart(wire.table_message("warm", 1, 1, {}))
            sub.poll(0.05)
        assert sub.received
        routes = {"e1": [["w2", 0.9], ["w6", 0.1]]}
        for seq in (1, 2, 5, 6, 6):                    # 3 and 4 lost; 6 twice
            pub.send_multipart(wire.table_message("w1", seq, 7, routes | {"seq": [[str(seq), 1.0]]}))
        pub.send_multipart([b"tables/w1", b"\xc1"])   # malformed
        pub.send_multipart(wire.table_message("w1", 1, 8, routes))   # a restart: new epoch
        assert sub.wait_for(lambda s: s.epoch.get("w1") == 8, 5)
        assert sub.gaps["w1"] == 2 and sub.gaps_total == 2
        assert sub.stale["w1"] == 1 and sub.malformed == 1 and sub.restarts == 1
        assert sub.seq["w1"] == 1 and sub.tables["w1"] == routes
    finally:
        sub.close()
        pub.close()


def test_subscriber_node_filter_is_exact(ctx: zmq.Context, eps: tuple[str, str, str]) -> None:
    pub = ctx.socket(zmq.PUB)
    pub.linger = 0
    pub.bind(eps[2])
    sub = client.TableSubscriber(eps[2], ["w1"], context=ctx)
    try:
        deadline = time.monotonic() + 5
        seq = 0
        while "w1" not in sub.tables and time.monotonic() < deadline:
            seq += 1
            pub.send_multipart(wire.table_message("w10", seq, 1, {}))   # prefix of no interest
            pub.send_multipart(wire.table_message("w1", seq, 1, {}))
            sub.poll(0.05)
        assert "w1" in sub.tables and set(sub.tables) == {"w1"}
    finally:
        sub.close()
        pub.close()


# ---- against a real routerd serve (slow) ------------------------------------------------------
def _floor_hops(topo: topology.Topology, frm: str, m: int) -> list[tuple[str, str, str, float]]:
    """Hops leaving ``frm`` at twice their link's propagation delay (above the guards' floor)."""
    x = topo.index[frm]
    out = []
    for i in range(m):
        y = int(topo.neighbours[x][i % len(topo.neighbours[x])])
        d = topo.nodes[(x + 1 + i % (topo.n - 1)) % topo.n]      # never frm itself
        k = topo.link_index[(x, y)]
        out.append((frm, topo.nodes[y], d, 2.0 * float(topo.delay_s[k])))
    return out


class CurveService:
    """``routerd serve --server-key --allow`` on ipc:// in a short /tmp dir, with keys for
    probe-w1 (node w1), watcher (no nodes), ops (control), sim-curve (every node),
    agent/w1 (node w1) and a stranger the allow file does not list."""

    def __init__(self, topo: topology.Topology):
        self.base = short_base(None)
        self.keys = os.path.join(self.base, "keys")
        _, sec = security.create_keys(self.keys, "svc")
        self.server_pub = os.path.join(self.keys, "svc.key")
        for n in ("probe-w1", "watcher", "ops", "sim-curve", "agent-w1", "stranger"):
            security.create_keys(self.keys, n)
        allow = os.path.join(self.base, "allow.yaml")
        with open(allow, "w") as fh:
            fh.write("probe-w1: {public_key: keys/probe-w1.key, nodes: [w1]}\n"
                     "watcher: {public_key: keys/watcher.key, nodes: []}\n"
                     "ops: {public_key: keys/ops.key, nodes: [], control: true}\n"
                     f"sim-curve: {{public_key: keys/sim-curve.key, nodes: [{', '.join(topo.nodes)}]}}\n"
                     "agent/w1: {public_key: keys/agent-w1.key, nodes: [w1]}\n")
        cfg = os.path.join(self.base, "svc.yaml")
        with open(cfg, "w") as fh:
            fh.write("service:\n  publish_interval_s: 0.3\n")
        try:
            self.sp = ServiceProc(self.base, service_args(self.base, "--server-key", sec,
                                                          "--allow", allow, "--config", cfg))
        except BaseException:
            shutil.rmtree(self.base, ignore_errors=True)
            raise
        self.ep = self.sp.endpoints

    def secret(self, who: str) -> str:
        return os.path.join(self.keys, f"{who}.key_secret")

    def client_keys(self, who: str) -> security.ClientKeys:
        return security.ClientKeys.load(self.secret(who), self.server_pub)

    def close(self) -> None:
        self.sp.kill()
        shutil.rmtree(self.base, ignore_errors=True)


@pytest.fixture(scope="module")
def curve_svc(topo: topology.Topology) -> Iterator[CurveService]:
    c = CurveService(topo)
    try:
        yield c
    finally:
        c.close()


def _health(svc: CurveService, ctx: zmq.Context) -> dict[str, Any]:
    return client.control(svc.ep["control"], {"op": "health"}, 5.0, context=ctx,
                          curve=svc.client_keys("ops"))


@pytest.mark.slow
def test_curve_reporter_subscriber_and_control_with_allowed_keys(
        ctx: zmq.Context, topo: topology.Topology, curve_svc: CurveService) -> None:
    ep = curve_svc.ep
    hops = _floor_hops(topo, "w1", 40)
    acks: list[client.Ack] = []
    # columnar: the node list comes over control, itself CURVE with the reporter's key
    with client.Reporter(ep["ingest"], "probe-w1", control=ep["control"], batch_rows=20,
                         timeout_s=2.0, curve=curve_svc.client_keys("probe-w1"), context=ctx,
                         on_ack=acks.append) as rep:
        assert rep.topology_id == topo.digest
        for h in hops:
            rep.add_hop(*h)
        rep.add_hop("w2", "w1", "e1", 0.05)              # not w1's hop: refused by the key's rights
        rep.flush()
        assert rep.accepted == 40 and rep.rejected == {"not_authorised": 1}, rep.rejected
        assert [a.accepted for a in acks] == [20, 20, 0] and not rep.refused
    with client.TableSubscriber(ep["publish"], context=ctx,
                                curve=curve_svc.client_keys("watcher")) as sub:
        assert sub.wait_for(lambda s: set(s.tables) == set(topo.nodes), 10), sub.tables.keys()
    snap = client.control(ep["control"], {"op": "snapshot"}, 5.0, context=ctx,
                          curve=curve_svc.client_keys("ops"))
    assert snap["snapshot"]["record"] >= 1, snap
    no = client.control(ep["control"], {"op": "snapshot"}, 5.0, context=ctx,
                        curve=curve_svc.client_keys("watcher"))
    assert no["error"].startswith("not_authorised")          # allowed, but not for control


@pytest.mark.slow
def test_curve_without_an_allowed_key_nothing_gets_through(
        ctx: zmq.Context, topo: topology.Topology, curve_svc: CurveService) -> None:
    ep = curve_svc.ep
    before = _health(curve_svc, ctx)["counts"]["batches"].get("accepted", 0)
    for curve in (None, curve_svc.client_keys("stranger")):
        rep = client.Reporter(ep["ingest"], "probe-w1", topology_nodes=topo, timeout_s=0.2,
                              retries=1, curve=curve, context=ctx)
        rep.add_hop(*_floor_hops(topo, "w1", 1)[0])
        t0 = time.monotonic()
        with pytest.raises(client.DeliveryError) as ei:
            rep.flush()
        assert time.monotonic() - t0 < 5 and rep.pending == 1
        assert ("CURVE on" in str(ei.value)) == (curve is not None)
        rep.close(flush=False)
        with pytest.raises(TimeoutError, match="no reply"):
            client.control(ep["control"], {"op": "health"}, 0.3, context=ctx, curve=curve)
        with client.TableSubscriber(ep["publish"], context=ctx, curve=curve) as sub:
            assert sub.poll(1.0) == 0 and not sub.tables     # tables go out every 0.3 s
    assert _health(curve_svc, ctx)["counts"]["batches"].get("accepted", 0) == before


@pytest.mark.slow
def test_closed_loop_runs_against_a_curve_service(curve_svc: CurveService) -> None:
    from routerd.core.errors import InputError
    from routerd.sim.run import run

    ep = curve_svc.ep
    eps = f"ingest={ep['ingest']},publish={ep['publish']},control={ep['control']}"
    keys = (f"sim.service.server_key={curve_svc.server_pub}", "sim.service.speed=4",
            "sim.service.timeout_s=1")
    spec = {"policy": "service:" + eps, "rate_pps": 40, "duration_s": 2, "seed": 1,
            "series": False}
    out = run({**spec, "overrides": keys + (f"sim.service.client_key={curve_svc.secret('sim-curve')}",
                                            "sim.service.reporter=sim-curve")})
    s = out["summary"]
    assert s["policy_service_rows_accepted"] > 0 and s["policy_service_batches"] > 0
    assert "policy_service_rows_rejected_not_authorised" not in s
    with pytest.raises(InputError, match="CURVE on"):
        run({**spec, "overrides": keys + (f"sim.service.client_key={curve_svc.secret('stranger')}",)})
    with pytest.raises(InputError, match="without sim.service.server_key"):
        run({**spec, "overrides": (f"sim.service.client_key={curve_svc.secret('sim-curve')}",)})


@pytest.mark.slow
def test_agent_reports_and_takes_tables_over_curve(topo: topology.Topology,
                                                   curve_svc: CurveService) -> None:
    """``routerd agent`` for w1 with key paths relative to its config file (run from /): its
    neighbours' agents are not running, so it detects its three links down, reports them
    (w1's own link rows, within its rights) and takes w1's table — all through CURVE."""
    import json
    import subprocess
    import sys

    import yaml

    base = curve_svc.base
    x = topo.index["w1"]
    ports = iter(free_udp_ports(2 * len(topo.neighbours[x]) + 2))

    def port() -> int:
        return next(ports)

    links = [{"between": ["w1", topo.nodes[y]], "addresses": [f"127.0.0.1:{port()}",
                                                             f"127.0.0.1:{port()}"]}
             for y in topo.neighbours[x]]
    with open(os.path.join(base, "underlay.yaml"), "w") as fh:
        yaml.safe_dump({"underlay": {"links": links}}, fh)
    cfg = {"service": {"ingest": curve_svc.ep["ingest"], "publish": curve_svc.ep["publish"]},
           "agent": {"underlay": "underlay.yaml", "client_key": "keys/agent-w1.key_secret",
                     "server_key": "keys/svc.key", "reporter": "agent/w1",
                     "local": f"127.0.0.1:{port()}", "deliver": f"127.0.0.1:{port()}",
                     "metrics": "127.0.0.1:0", "probe_interval_s": 0.05,
                     "report_interval_s": 0.05}}
    path = os.path.join(base, "agent.yaml")
    with open(path, "w") as fh:
        yaml.safe_dump(cfg, fh)
    status = os.path.join(base, "agent-status.json")
    r = subprocess.run([sys.executable, "-m", "routerd", "agent", "--config", path, "--node", "w1",
                        "--duration", "2.5", "--status-file", status],
                       capture_output=True, text=True, timeout=60, cwd="/", check=False)
    assert r.returncode == 0, r.stderr
    with open(status, encoding="utf-8") as fh:
        st = json.load(fh)
    assert st["report"]["curve"] is True and st["report"]["refused"] == {}, st["report"]
    assert st["report"]["accepted"] >= 3 and st["report"]["pending_batches"] == 0, st["report"]
    assert {ln["state"] for ln in st["links"].values()} == {"down"}
    # w1's own table, published again and again; empty once the service applied the three
    # link-down rows (w1 has no way out left)
    assert st["table"]["seq"] > 1 and st["table"]["routes"] == {}, st["table"]
    assert st["counts"]["delivery_errors"] == 0


@pytest.mark.slow
def test_rate_limited_batches_are_delivered_by_a_real_service(ctx: zmq.Context,
                                                              topo: topology.Topology) -> None:
    """guards.rate: 5 batches/s, a burst of 2.  Twelve batches sent at once: the service
    refuses the excess as rate_limited, the reporter keeps and resends them, and every
    batch is applied exactly once."""
    base = short_base(None)
    try:
        cfg = os.path.join(base, "svc.yaml")
        with open(cfg, "w") as fh:
            fh.write("guards:\n  rate:\n    batches_per_s: 5\n    burst_batches: 2\n")
        sp = ServiceProc(base, service_args(base, "--config", cfg))
        try:
            hops = _floor_hops(topo, "w3", 60)
            with client.Reporter(sp.endpoints["ingest"], "burst", topology_nodes=topo,
                                 batch_rows=5, max_pending=16, timeout_s=2.0, backoff_s=0.05,
                                 backoff_max_s=0.5, context=ctx) as rep:
                for h in hops:
                    rep.add_hop(*h)                 # 12 full batches, all sent at once
                rep.flush()
                assert rep.accepted == 60 and not rep.rejected and not rep.refused
                assert rep.deferred["rate_limited"] >= 5 and rep.batches_sent == 12
                deferred = rep.deferred["rate_limited"]
            h = client.control(sp.endpoints["control"], {"op": "health"}, 5.0, context=ctx)
            c = h["counts"]
            assert c["batches"]["accepted"] == 12 and c["batches"].get("duplicate", 0) == 0
            assert c["frames_refused"]["rate_limited"] == deferred
        finally:
            sp.kill()
    finally:
        shutil.rmtree(base, ignore_errors=True)
