"""routerd.io.clock: the real clock, the fake one, and the client's timeouts on a fake clock."""
from __future__ import annotations

import shutil
import tempfile
import threading
import time
from collections.abc import Iterator

import pytest
import zmq

from routerd.agent import client
from routerd.io import topofiles
from routerd.io.clock import SYSTEM, Clock, FakeClock, SystemClock


def test_both_clocks_satisfy_the_interface() -> None:
    assert isinstance(SYSTEM, Clock) and isinstance(FakeClock(), Clock)
    assert isinstance(SYSTEM, SystemClock)


def test_system_clock_reads_the_host() -> None:
    a, w = SYSTEM.monotonic(), SYSTEM.wall_ns()
    assert abs(a - time.monotonic()) < 1.0 and abs(w - time.time_ns()) < 1e9
    assert abs(SYSTEM.wall() - w / 1e9) < 1.0
    SYSTEM.sleep(0)
    SYSTEM.sleep(-1.0)                     # nothing to wait for: returns at once
    assert SYSTEM.monotonic() >= a


def test_fake_clock_moves_only_when_told() -> None:
    c = FakeClock(start=5.0, wall_start_ns=1_000_000_000)
    assert c.monotonic() == 5.0 and c.wall_ns() == 1_000_000_000 and c.wall() == 1.0
    time.sleep(0.01)
    assert c.monotonic() == 5.0            # real time passing changes nothing
    assert c.advance(0.25) == 5.25
    assert c.wall_ns() == 1_250_000_000    # both readings move together
    c.sleep(0.5)                           # jumps instead of waiting
    assert c.monotonic() == 5.75 and c.wall_ns() == 1_750_000_000
    c.sleep(0)
    c.sleep(-3)                            # as time.sleep: nothing happens
    assert c.monotonic() == 5.75
    with pytest.raises(ValueError, match="only moves forward"):
        c.advance(-0.1)
    with pytest.raises(ValueError, match="only moves forward"):
        c.advance(float("nan"))


def test_fake_clock_sums_many_small_steps_exactly() -> None:
    c = FakeClock()
    for _ in range(1000):
        c.advance(0.001)
    # integer nanoseconds inside: no float drift over many steps
    assert c.wall_ns() - FakeClock().wall_ns() == 1_000_000_000
    assert c.monotonic() == 1.0


def test_fake_clock_is_shared_across_threads() -> None:
    c = FakeClock()
    seen: list[float] = []
    t = threading.Thread(target=lambda: [c.advance(0.001) for _ in range(500)])
    t.start()
    for _ in range(500):
        seen.append(c.monotonic())
    t.join()
    assert seen == sorted(seen) and c.monotonic() == pytest.approx(0.5)


@pytest.fixture()
def ingest() -> Iterator[str]:
    d = tempfile.mkdtemp(prefix="rdk", dir="/tmp")      # ipc paths must stay short
    yield f"ipc://{d}/ingest"
    shutil.rmtree(d, ignore_errors=True)


def test_reporter_retry_budget_runs_on_its_clock(ingest: str) -> None:
    """A silent service: the batch is resent every timeout_s of *virtual* time and given up
    after ``retries`` resends, however long the machine takes between our steps."""
    ctx = zmq.Context()
    silent = ctx.socket(zmq.ROUTER)
    silent.linger = 0
    silent.bind(ingest)
    clock = FakeClock(wall_start_ns=1_700_000_000_000_000_000)
    topo = topofiles.load("routerd/data/demo-lab.yaml")
    rep = client.Reporter(ingest, "p", topology_nodes=topo, timeout_s=2.0, retries=2,
                          context=ctx, clock=clock)
    try:
        assert rep._next_batch == 1_700_000_000_000_000   # batch numbers: the clock's µs
        rep.add_hop(topo.nodes[0], topo.nodes[1], topo.nodes[2], 0.001)
        rep.send_now()
        assert rep.batches_sent == 1 and rep.resends == 0
        time.sleep(0.05)                    # real time: means nothing to the reporter
        rep.pump(0)
        assert rep.resends == 0
        clock.advance(1.999)
        rep.pump(0)
        assert rep.resends == 0
        clock.advance(0.001)                # exactly timeout_s after the first send
        rep.pump(0)
        assert rep.resends == 1
        clock.advance(2.0)
        rep.pump(0)
        assert rep.resends == 2
        clock.advance(2.0)
        with pytest.raises(client.DeliveryError, match="after 2 resends"):
            rep.pump(0)
        assert rep.pending == 1             # kept, not lost
        got = 0
        while silent.poll(100):
            silent.recv_multipart()
            got += 1
        assert got == 3                     # the first send and two resends, nothing more
    finally:
        rep.close(flush=False)
        silent.close()
        ctx.term()


def test_subscriber_wait_for_times_out_on_its_clock(ingest: str) -> None:
    clock = FakeClock()
    ctx = zmq.Context()
    sub = client.TableSubscriber(ingest.replace("ingest", "tables"), context=ctx, clock=clock)
    try:
        ticks = iter(range(100))

        def pred(_s: client.TableSubscriber) -> bool:
            next(ticks)
            clock.advance(0.3)              # each check costs 0.3 s of virtual time
            return False

        assert sub.wait_for(pred, 1.0) is False
        assert clock.monotonic() == pytest.approx(1.2)    # four checks, then out of time
    finally:
        sub.close()
        ctx.term()
