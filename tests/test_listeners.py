"""routerd.service.listeners: the connection cap's rules (pure Gate, the descriptor budget) and a
real ``routerd serve`` under a low descriptor limit flooded with connections (slow)."""
from __future__ import annotations

import os
import resource
import signal
import time
from typing import Any

import msgpack
import pytest
import zmq

from routerd.service import listeners as L
from service_harness import ServiceProc, service_args


# ---- the Gate, without sockets -------------------------------------------------------------
def test_transition_table_is_total_and_every_state_reachable() -> None:
    for st in L.STATES:
        for lv in L.LEVELS:
            assert L.TRANSITIONS.get((st, lv)) in L.STATES, (st, lv)
    assert set(L.TRANSITIONS.values()) == set(L.STATES)
    assert len(L.TRANSITIONS) == len(L.STATES) * len(L.LEVELS)
    # a level never holds fewer listeners than a lower one would (monotone)
    order = {s: i for i, s in enumerate(L.STATES)}
    for st in L.STATES:
        got = [order[L.TRANSITIONS[(st, lv)]] for lv in L.LEVELS]
        assert got == sorted(got), st


def test_gate_holds_work_sockets_at_the_limit_keeps_a_share_for_control_and_releases_at_low_water() -> None:
    g = L.Gate(40, ("ingest", "publish", "control"))
    assert g.work_limit == 40 - L.CONTROL_SHARE and g.low_water == int(32 * L.LOW_WATER)
    acts: list[Any] = []
    for fd in range(100, 131):
        acts += g.accepted("ingest", fd)
    assert acts == [] and g.state == "open"
    acts = g.accepted("publish", 131)           # the 32nd: the work limit
    assert acts == [("pause", ("ingest", "publish"))] and g.pauses == 1
    # one more on a work socket (queued before the hold): cut off and counted
    assert g.accepted("ingest", 132) == [("drop", 132)]
    assert g.refused["ingest"] == 1
    assert g.disconnected("ingest", 132) == []   # its disconnect takes it off the count
    # a whole burst queued before the hold (BURST per socket) is cut off without taking
    # the control share: control connections accepted while it is cut are kept
    burst = range(300, 300 + L.BURST)
    assert all(g.accepted("ingest", fd) == [("drop", fd)] for fd in burst)
    assert g.total == 32 and g.refused["ingest"] == 1 + L.BURST
    for fd in range(200, 207):
        assert g.accepted("control", fd) == []
    assert all(g.disconnected("ingest", fd) == [] for fd in burst)
    assert g.total == 39 and g.cutting["ingest"] == set()
    assert g.accepted("control", 207) == [("pause", ("control",))]
    assert g.state == "paused" and g.total == 40 and g.pauses == 1
    # an over-cap control connection is cut off too
    assert g.accepted("control", 208) == [("drop", 208)]
    g.disconnected("control", 208)
    # control is released when the control share's upper half is free again
    out = []
    for fd in range(200, 208):
        out += g.disconnected("control", fd)
    assert ("resume", ("control",)) in out and g.state == "work_paused"
    # work sockets wait for low water (no flapping at the limit)
    fds = list(range(100, 132))
    while g.total > g.low_water + 1:
        assert g.disconnected("ingest" if fds[-1] != 131 else "publish", fds.pop()) == []
    assert g.disconnected("ingest", fds.pop()) == [("resume", ("ingest", "publish"))]
    assert g.state == "open" and g.pauses == 1


def test_gate_ignores_unknown_disconnects_and_resets_on_accept_failure() -> None:
    g = L.Gate(20, ("ingest", "control"))
    assert g.disconnected("ingest", 5) == []
    g.accepted("ingest", 5)
    assert g.accept_failed("ingest") == [("reset", "ingest")]
    assert g.accept_failures["ingest"] == 1
    assert g.forget("ingest") == [] and g.total == 0


def test_fd_budget_derives_a_cap_and_refuses_a_limit_without_room() -> None:
    b = L.fd_budget(1024, 40, 3, 0)
    assert b.cap == b.derived == 1024 - 40 - L.RESERVE - 3 * L.BURST
    assert L.fd_budget(1024, 40, 3, 100).cap == 100
    assert L.fd_budget(1024, 40, 3, 10**6).cap == b.derived     # never above the limit
    with pytest.raises(ValueError, match="RLIMIT_NOFILE 64"):
        L.fd_budget(64, 40, 3, 0)


# ---- a real service under a low descriptor limit ---------------------------------------------
NOFILE = 256
FLOOD = 400       # connections opened: more than the whole descriptor limit


def _cpu_s(pid: int) -> float:
    """utime + stime of a process from /proc/PID/stat (proc(5): fields 14 and 15)."""
    with open(f"/proc/{pid}/stat") as f:
        fields = f.read().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def _low_nofile() -> None:
    resource.setrlimit(resource.RLIMIT_NOFILE, (NOFILE, NOFILE))


def _ack(sock: Any, batch: int) -> dict[str, Any]:
    body = {"v": 1, "reporter": "steady", "batch": batch,
            "hops": [["w1", "w2", "e3", 0.002, 0.003]]}
    sock.send_multipart([b"", msgpack.packb(body, use_bin_type=True)])
    if not sock.poll(10000):
        raise AssertionError(f"no acknowledgement for batch {batch}")
    return msgpack.unpackb(sock.recv_multipart()[-1], raw=False)


def _health(sp: ServiceProc) -> dict[str, Any]:
    try:
        return sp.control({"op": "health"})
    except zmq.Again:
        raise AssertionError(f"no health answer in 10 s; alive: {sp.proc.poll() is None}\n"
                             + "\n".join(sp.stderr_lines[-30:])) from None


@pytest.mark.slow
@pytest.mark.parametrize("transport", ["ipc", "tcp", "front"])
def test_more_connections_than_descriptors_neither_abort_nor_spin(base: str, transport: str) -> None:
    """``front``: the shard front (``--shards 1``, ipc) under the same flood; its worker
    inherits the limit."""
    soft, hard = resource.getrlimit(resource.RLIMIT_NOFILE)
    need = 3 * FLOOD + 200          # our side: a mailbox and a connection per socket
    if hard != resource.RLIM_INFINITY and hard < need:
        pytest.skip(f"this test's own process needs {need} descriptors (hard limit {hard})")
    resource.setrlimit(resource.RLIMIT_NOFILE, (max(soft, need), hard))
    args = service_args(base)
    if transport == "tcp":
        for flag in ("--ingest", "--publish"):
            args[args.index(flag) + 1] = "tcp://127.0.0.1:*"    # loopback, any free port
    if transport == "front":
        args += ["--shards", "1"]
    sp = ServiceProc(base, args, preexec_fn=_low_nofile)
    ctx = zmq.Context()
    ctx.max_sockets = FLOOD + 100
    flood: list[Any] = []
    try:
        steady = ctx.socket(zmq.DEALER)
        steady.linger = 0
        steady.connect(sp.endpoints["ingest"])
        assert _ack(steady, 1)["accepted"] == 1
        c0 = _cpu_s(sp.proc.pid)
        for i in range(FLOOD):
            s = ctx.socket(zmq.SUB if i % 4 == 3 else zmq.DEALER)   # a quarter subscribe
            s.linger = 0
            s.connect(sp.endpoints["publish" if i % 4 == 3 else "ingest"])
            flood.append(s)
        deadline = time.monotonic() + 20
        conn: dict[str, Any] = {}
        while time.monotonic() < deadline:
            assert sp.proc.poll() is None, f"service died ({sp.proc.returncode}):\n{sp.log()}"
            conn = _health(sp).get("connections", {})   # control keeps its share of the cap
            if "ingest" in conn.get("paused", ()):
                break
            time.sleep(0.2)
        time.sleep(1.0)                              # let reconnect attempts settle
        c1 = _cpu_s(sp.proc.pid)
        time.sleep(3.0)
        c2 = _cpu_s(sp.proc.pid)
        assert sp.proc.poll() is None, sp.log()
        # idle with the endpoints held: no spinning I/O thread (a spin burns ~3 s here)
        assert c2 - c1 < 0.5, f"{c2 - c1:.2f} s of CPU in 3 s while idle"
        # the reporter connected before the flood is still served
        try:
            assert _ack(steady, 2)["accepted"] == 1
        except AssertionError as e:
            raise AssertionError(f"{e}; health connections {conn}; service log:\n{sp.log()}") from None
        assert "ingest" in conn["paused"], conn
        conn = _health(sp)["connections"]
        assert sum(conn["open"].values()) <= conn["cap"] < NOFILE
        assert conn["pauses"] >= 1
        from prometheus_client.parser import text_string_to_metric_families

        ours = {"front"} if transport == "front" else {None}   # the front labels its own
        page = {(m.name, s.labels.get("socket")): s.value
                for m in text_string_to_metric_families(sp.metrics_text())
                for s in m.samples if s.labels.get("shard") in ours}
        assert page[("routerd_ingest_connections", "ingest")] == conn["open"]["ingest"]
        assert page[("routerd_ingest_connection_pauses", None)] == conn["pauses"]
        assert page[("routerd_ingest_connections_refused", "publish")] == conn["refused"]["publish"]
        print(f"{transport}: opened {FLOOD + 1}, open {sum(conn['open'].values())} of cap "
              f"{conn['cap']}, refused {conn['refused']}, pauses {conn['pauses']}, "
              f"CPU {c1 - c0:.2f} s during the flood, {c2 - c1:.2f} s in 3 s idle")
        assert sp.log().count("connection cap reached") <= 2 * conn["pauses"] + 2   # once per hold
        # the flood goes away: the endpoints take connections again
        for s in flood:
            s.close(0)
        flood = []
        deadline = time.monotonic() + 20
        while time.monotonic() < deadline and _health(sp)["connections"]["paused"]:
            time.sleep(0.2)
        assert _health(sp)["connections"]["paused"] == [], sp.log()
        late = ctx.socket(zmq.DEALER)
        late.linger = 0
        late.connect(sp.endpoints["ingest"])
        assert _ack(late, 3)["accepted"] == 1
        late.close(0)
        steady.close(0)
        sp.signal(signal.SIGTERM)
        assert sp.wait(30) == 0
    finally:
        for s in flood:
            s.close(0)
        ctx.destroy(0)
        sp.kill()


@pytest.mark.slow
def test_start_up_raises_the_soft_descriptor_limit_to_the_hard_one_and_says_so(base: str) -> None:
    hard = resource.getrlimit(resource.RLIMIT_NOFILE)[1]
    if hard != resource.RLIM_INFINITY and hard < 2048:
        pytest.skip(f"needs a hard descriptor limit of 2048 (it is {hard})")

    def soft_256() -> None:
        resource.setrlimit(resource.RLIMIT_NOFILE, (256, 2048))

    sp = ServiceProc(base, service_args(base), preexec_fn=soft_256)
    try:
        with open(f"/proc/{sp.proc.pid}/limits") as f:
            line = next(x for x in f if x.startswith("Max open files"))
        assert line.split()[3:5] == ["2048", "2048"], line
        assert any("raised the descriptor limit" in x and "before=256" in x and "now=2048" in x
                   for x in sp.stderr_lines), sp.log()
        conn = _health(sp)["connections"]
        assert conn["fd_limit"] == 2048 and 1800 < conn["cap"] < 2048
    finally:
        sp.kill()


# ---- ipc:// endpoints already in use -------------------------------------------------------
def test_claim_ipc_refuses_a_live_listener_and_clears_a_stale_file(base: str) -> None:
    import socket

    path = os.path.join(base, "sock")
    assert L.claim_ipc(f"ipc://{path}") is None              # no file: nothing to say
    live = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    live.bind(path)
    live.listen(1)
    with pytest.raises(L.EndpointInUse, match=f"ipc://{path}: in use by another process"):
        L.claim_ipc(f"ipc://{path}")
    assert os.path.exists(path)
    live.close()                                              # the file stays: a stale one
    assert os.path.exists(path)
    note = L.claim_ipc(f"ipc://{path}")
    assert note is not None and "stale" in note and path in note
    assert not os.path.exists(path)
    with open(path, "w") as f:                                # not a socket: never removed
        f.write("x")
    with pytest.raises(L.EndpointInUse, match="is not a socket file"):
        L.claim_ipc(f"ipc://{path}")
    assert os.path.exists(path)
    assert L.claim_ipc("tcp://127.0.0.1:7301") is None
    assert L.claim_ipc("ipc://*") is None


@pytest.mark.slow
def test_a_second_service_on_the_same_ipc_endpoints_exits_2_and_the_first_keeps_serving(base: str) -> None:
    import socket
    import subprocess
    import sys

    first = ServiceProc(base, service_args(base))
    ctx = zmq.Context()
    try:
        rep = ctx.socket(zmq.DEALER)
        rep.linger = 0
        rep.connect(first.endpoints["ingest"])
        assert _ack(rep, 1)["accepted"] == 1
        files = [first.endpoints[k][len("ipc://"):] for k in ("ingest", "publish", "control")]
        other_state = os.path.join(base, "state2")
        args = service_args(base)
        args[args.index("--state-dir") + 1] = other_state
        r = subprocess.run([sys.executable, "-m", "routerd", "serve", *args], capture_output=True,
                           text=True, timeout=60)
        assert r.returncode == 2, r.stdout + r.stderr
        assert f"ingest endpoint {first.endpoints['ingest']}: in use by another process" in r.stderr
        assert not os.path.exists(other_state)          # refused before anything was written
        # a sharded front on the same endpoint stops the same way, before starting workers
        r = subprocess.run([sys.executable, "-m", "routerd", "serve", "--shards", "1", *args],
                           capture_output=True, text=True, timeout=60)
        assert r.returncode == 2, r.stdout + r.stderr
        assert "in use by another process" in r.stderr
        # the first one's socket files are intact: its reporter and a new one get acks
        assert all(os.path.exists(f) for f in files)
        assert _ack(rep, 2)["accepted"] == 1
        fresh = ctx.socket(zmq.DEALER)
        fresh.linger = 0
        fresh.connect(first.endpoints["ingest"])
        assert _ack(fresh, 3)["accepted"] == 1
        fresh.close(0)
        rep.close(0)
        first.signal(signal.SIGTERM)
        assert first.wait(30) == 0
        assert not any(os.path.exists(f) for f in files)   # a clean stop removes its files
        # a socket file left by a process that died: removed, said so, served
        stale = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
        stale.bind(files[0])
        stale.close()
        assert os.path.exists(files[0])
        second = ServiceProc(base, args)
        try:
            assert any("removed a stale socket file" in line and files[0] in line
                       for line in second.stderr_lines), second.log()
            s = ctx.socket(zmq.DEALER)
            s.linger = 0
            s.connect(second.endpoints["ingest"])
            assert _ack(s, 4)["accepted"] == 1
            s.close(0)
        finally:
            second.kill()
    finally:
        ctx.destroy(0)
        first.kill()


# ---- the shell on real sockets, in process ---------------------------------------------------
class _Log:
    def __init__(self) -> None:
        self.lines: list[str] = []

    def info(self, msg: str, **f: Any) -> None:
        self.lines.append(msg)

    warning = error = info


def _exchange(router: Any, dealer: Any, payload: bytes, timeout_ms: int = 3000) -> bool:
    """Send ``payload``; True when the router receives it within the time (a message
    queued earlier by a reconnecting peer may come first and is skipped)."""
    dealer.send(payload)
    end = time.monotonic() + timeout_ms / 1000
    while (left := end - time.monotonic()) > 0:
        if not router.poll(int(left * 1000) + 1):
            return False
        if router.recv_multipart()[-1] == payload:
            return True
    return False


@pytest.mark.slow
@pytest.mark.parametrize("transport", ["ipc", "tcp"])
def test_hold_keeps_established_connections_stops_new_ones_and_reset_rebinds(base: str, transport: str) -> None:
    ep = f"ipc://{base}/r" if transport == "ipc" else "tcp://127.0.0.1:*"
    ctx = zmq.Context()
    try:
        opts = L.SocketOptions(hwm=100, linger_ms=0, max_message_bytes=1 << 20)
        router, _ = L.bind_socket(ctx, zmq.ROUTER, ep, opts)
        ep = router.last_endpoint.decode()
        sockets, endpoints = {"ingest": router}, {"ingest": ep}
        log = _Log()
        lst = L.Listeners(sockets, endpoints, ["ingest"], L.fd_budget(10_000, 50, 1, 0), log)

        def dealer() -> Any:
            d = ctx.socket(zmq.DEALER)
            d.linger = 0
            d.setsockopt(zmq.RECONNECT_IVL, 50)
            d.connect(ep)
            return d

        old = dealer()
        assert _exchange(router, old, b"before")
        lst._apply([("pause", ("ingest",))])
        assert "ingest" in lst._held
        new = dealer()
        assert not _exchange(router, new, b"held", 700)      # no listener to reach
        assert _exchange(router, old, b"still")              # the established one goes on
        lst._apply([("resume", ("ingest",))])
        assert router.poll(5000) and router.recv_multipart()[-1] == b"held"   # queued, delivered
        # an accept failure closes the listener (and, libzmq 4.3, its connections) ...
        lst._apply([("reset", "ingest")])
        assert "ingest" in lst._closed
        assert not _exchange(router, old, b"after reset", 500)
        # ... and a tick listens again on the same endpoint
        lst.tick()
        assert not lst._closed and not lst.waiting()
        fresh = dealer()
        assert _exchange(router, fresh, b"again", 5000)
        assert any("out of file descriptors" in x for x in log.lines)
        for d in (old, new, fresh):
            d.close(0)
        lst.close()
        router.close(0)
    finally:
        ctx.destroy(0)


@pytest.mark.slow
def test_a_held_ipc_file_that_vanished_is_bound_afresh(base: str) -> None:
    ctx = zmq.Context()
    try:
        opts = L.SocketOptions(hwm=100, linger_ms=0, max_message_bytes=1 << 20)
        ep = f"ipc://{base}/v"
        router, _ = L.bind_socket(ctx, zmq.ROUTER, ep, opts)
        log = _Log()
        lst = L.Listeners({"ingest": router}, {"ingest": ep}, ["ingest"],
                          L.fd_budget(10_000, 50, 1, 0), log)
        lst._apply([("pause", ("ingest",))])
        os.unlink(L._aside(f"{base}/v"))                 # someone cleans up /tmp
        lst._apply([("resume", ("ingest",))])
        assert any("cannot put the ipc socket file back" in x for x in log.lines), log.lines
        lst.tick()
        d = ctx.socket(zmq.DEALER)
        d.linger = 0
        d.connect(ep)
        assert _exchange(router, d, b"back", 5000)
        d.close(0)
        lst.close()
        router.close(0)
    finally:
        ctx.destroy(0)
