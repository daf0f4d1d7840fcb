"""Group commit in the journal writer thread, the publication order, the decision rate cap
and tables encoded from the engine's arrays (issue 15, the service part).

In process, no sockets: the service's pieces are driven directly with a fake clock and a
recording stand-in for a socket."""
from __future__ import annotations

import errno
import os
import select
import tempfile
import time
from collections.abc import Iterator
from contextlib import contextmanager, suppress
from typing import Any

import numpy as np
import pytest
import zmq

from routerd.core import kernels as _kernels
from routerd.core.engine import Engine, EngineSettings, HopBatch
from routerd.core.topology import Topology
from routerd.io import config, journal, wire
from routerd.io.clock import FakeClock
from routerd.service.daemon import Service, load_topology

DEMO = load_topology(config.load(None))


@pytest.fixture
def base() -> Iterator[str]:
    d = tempfile.mkdtemp(prefix="rgc-", dir="/tmp")
    yield d
    import shutil

    shutil.rmtree(d, ignore_errors=True)


def _frame(rng: np.random.Generator, batch: int, m: int = 40, topo: Topology = DEMO) -> bytes:
    link = rng.integers(0, topo.n_links, m)
    x, y = topo.src[link], topo.dst[link]
    d = rng.integers(0, topo.n - 1, m)
    d = np.where(d >= x, d + 1, d)
    lat = topo.delay_s[link] * rng.uniform(1.0, 3.0, m)
    return wire.encode_ingest_cols("gc", batch, topo.digest, x, y, d, lat)


class _Sock:
    """Records what the service sends (a socket stand-in for _send_ack)."""

    def __init__(self) -> None:
        self.sent: list[list[Any]] = []

    def send_multipart(self, parts: list[Any], flags: int = 0) -> None:
        self.sent.append(parts)


def _service(base: str, clock: FakeClock | None = None, **keys: Any) -> Service:
    cfg = config.load(None).with_overrides(
        {"service.state_dir": os.path.join(base, "st"), **keys}, where="test")
    svc = Service(cfg, DEMO, clock=clock or FakeClock())
    svc.restore(cfg["service.state_dir"])
    return svc


def _wait_wake(fd: int) -> None:
    r, _, _ = select.select([fd], [], [], 10.0)
    assert r, "the writer thread never reported"


# ---- journal.Syncer --------------------------------------------------------------------------
# Both writer loops: the Python one (the reference) and the compiled one (routerd.io._fsync,
# no GIL), where built.
LOOPS = [pytest.param(False, id="python"),
         pytest.param(True, id="compiled", marks=pytest.mark.skipif(
             journal._fsync_core() is None, reason="routerd.io._fsync is not built here"))]
# the service picks the compiled loop unless every reference path is asked for
SERVICE_LOOPS = [pytest.param({"engine.kernels": "reference"}, False, id="python"),
                 pytest.param({}, True, id="compiled", marks=pytest.mark.skipif(
                     journal._fsync_core() is None or not _kernels.available(),
                     reason="the compiled kernels or routerd.io._fsync are not built here"))]


@contextmanager
def _failing_fsync(j: journal.Journal) -> Iterator[None]:
    """Make the journal's fdatasync fail for real: under its descriptor lock (which both
    writer loops respect) its descriptor becomes a pipe's, and fdatasync of a pipe is
    EINVAL.  Records are appended before; the real descriptor comes back after (or is
    closed, when the journal was closed meanwhile: a service whose storage failed)."""
    r, w = os.pipe()
    with j._fd_lock:
        real, j._fd = j._fd, w
    try:
        yield
    finally:
        with j._fd_lock:
            if j._fd == w:
                j._fd = real
            else:                  # the journal gave up on it (closed): ours to close
                os.close(real)
        for fd in (r, w):
            with suppress(OSError):
                os.close(fd)


@pytest.mark.parametrize("compiled", LOOPS)
def test_syncer_makes_requested_records_durable_and_reports_through_its_pipe(
        base: str, compiled: bool) -> None:
    j = journal.Journal(os.path.join(base, "j"), fsync="batch")
    s = journal.Syncer(j, compiled=compiled)
    try:
        assert s.compiled is compiled
        assert s.durable == 0
        for i in range(5):
            j.append("tick", {"t": float(i)}, sync=False)
        s.request(j.last_record)
        _wait_wake(s.wake_fd)
        s.drain()
        assert s.durable == 5 and s.error is None and s.syncs >= 1
        # a request for what is already durable starts no sync
        s.request(3)
        assert not select.select([s.wake_fd], [], [], 0.05)[0]
    finally:
        s.close()
        j.close()


def test_syncer_keeps_the_error_and_nothing_more_becomes_durable(base: str, monkeypatch: Any) -> None:
    j = journal.Journal(os.path.join(base, "j"), fsync="batch")
    j.append("tick", {"t": 0.0}, sync=True)
    s = journal.Syncer(j, compiled=False)
    try:
        def broken() -> None:
            raise OSError(errno.EIO, "Input/output error")

        monkeypatch.setattr(j, "sync_written", broken)
        j.append("tick", {"t": 1.0}, sync=False)
        s.request(j.last_record)
        _wait_wake(s.wake_fd)
        assert isinstance(s.error, OSError) and s.error.errno == errno.EIO
        assert s.durable == 1     # record 2 is written but not known to be on disk
    finally:
        s.close()
        j.close()


@pytest.mark.parametrize("compiled", LOOPS)
def test_a_real_fsync_failure_is_kept_and_nothing_more_becomes_durable(
        base: str, compiled: bool) -> None:
    j = journal.Journal(os.path.join(base, "j"), fsync="batch")
    j.append("tick", {"t": 0.0}, sync=True)
    s = journal.Syncer(j, compiled=compiled)
    try:
        j.append("tick", {"t": 1.0}, sync=False)
        with _failing_fsync(j):
            s.request(j.last_record)
            _wait_wake(s.wake_fd)
            assert isinstance(s.error, OSError) and s.error.errno == errno.EINVAL
        assert s.durable == 1     # record 2 is written but not known to be on disk
        s.drain()
        j.append("tick", {"t": 2.0}, sync=False)
        s.request(j.last_record)  # after a failure the thread syncs no more
        assert not select.select([s.wake_fd], [], [], 0.05)[0] and s.durable == 1
    finally:
        s.close()
        j.close()


@pytest.mark.parametrize("compiled", LOOPS)
def test_a_segment_roll_waits_for_the_sync_in_progress_and_the_next_sync_covers_the_new_segment(
        base: str, compiled: bool) -> None:
    # small segments: every few records the journal closes its descriptor and opens a new one
    j = journal.Journal(os.path.join(base, "j"), fsync="batch", segment_bytes=1024)
    s = journal.Syncer(j, compiled=compiled)
    try:
        for i in range(40):
            j.append("tick", {"t": float(i), "pad": "x" * 200}, sync=False)
            s.request(j.last_record)
        while s.durable < j.last_record:
            _wait_wake(s.wake_fd)
            s.drain()
        assert s.error is None and j.segments > 5
    finally:
        s.close()
        j.close()
    assert [r.body["t"] for r in journal.Journal(os.path.join(base, "j")).records()] == \
        [float(i) for i in range(40)]


def test_the_compiled_loop_is_refused_where_it_is_not_built(base: str, monkeypatch: Any) -> None:
    j = journal.Journal(os.path.join(base, "j"), fsync="batch")
    monkeypatch.setattr(journal, "_fsync_core", lambda: None)
    try:
        with pytest.raises(RuntimeError, match=r"routerd\.io\._fsync\) is not built"):
            journal.Syncer(j, compiled=True)
        s = journal.Syncer(j)            # the default falls back to the Python loop
        assert s.compiled is False
        s.close()
    finally:
        j.close()


# ---- the service: answers wait for the fsync that covers them ---------------------------------
@pytest.mark.parametrize("keys, compiled", SERVICE_LOOPS)
def test_answers_wait_for_the_writer_threads_fsync(base: str, keys: dict[str, Any],
                                                   compiled: bool) -> None:
    svc = _service(base, **keys)
    rng = np.random.default_rng(3)
    sock = _Sock()
    try:
        syncer = svc._syncer_for_journal()
        assert syncer is not None and syncer.compiled is compiled
        out, b = svc.ingest(_frame(rng, 1))
        svc._pending.append((svc._last_record, sock, [b"id", b"", out], b))
        # the descriptor's lock held here: the thread's fsync cannot start (both loops)
        with syncer.journal._fd_lock:
            svc._request_sync()
            assert not select.select([syncer.wake_fd], [], [], 0.05)[0]
            svc._release(zmq)
            assert sock.sent == []                       # not durable yet: nothing goes out
        _wait_wake(syncer.wake_fd)
        svc._synced(zmq)
        assert len(sock.sent) == 1 and "error" not in wire.decode_reply(sock.sent[0][-1])
        assert svc.counters.fsyncs >= 1
    finally:
        svc.close()


@pytest.mark.parametrize("keys, compiled", SERVICE_LOOPS)
def test_a_failed_fsync_in_the_writer_thread_answers_unavailable_and_puts_the_service_down(
        base: str, keys: dict[str, Any], compiled: bool) -> None:
    svc = _service(base, **keys)
    rng = np.random.default_rng(4)
    sock = _Sock()
    try:
        syncer = svc._syncer_for_journal()
        assert syncer is not None and syncer.compiled is compiled
        out, b = svc.ingest(_frame(rng, 1))
        assert "error" not in wire.decode_reply(out)
        svc._pending.append((svc._last_record, sock, [b"id", b"", out], b))
        svc._flush_held()
        with _failing_fsync(syncer.journal):
            svc._request_sync()
            _wait_wake(syncer.wake_fd)
            svc._synced(zmq)
        rep = wire.decode_reply(sock.sent[0][-1])
        assert rep["error"].startswith("unavailable:") and "EINVAL" in rep["error"]
        assert svc.health()["storage"]["ok"] is False and svc._syncer is None
    finally:
        svc.close()


# ---- publication order -----------------------------------------------------------------------
def test_changed_tables_go_out_before_the_interval_round_and_a_link_source_first(base: str) -> None:
    svc = _service(base)
    sent: list[tuple[int, str]] = []
    svc._publish = lambda nodes, cause: sent.extend((x, cause) for x in nodes)  # type: ignore[method-assign]
    try:
        svc._queue_publish(range(DEMO.n), "interval")
        svc._queue_publish([5, 2], "change")
        svc._publish_due(10.0)
        assert sent[:2] == [(5, "change"), (2, "change")]
        assert [x for x, _ in sent].count(5) == 1 and len(sent) == DEMO.n
        # a decision after a link row: the link's source leads the change queue
        sent.clear()
        rng = np.random.default_rng(5)
        for b in range(3):
            svc.ingest(_frame(rng, b + 1, 200))
        a, z = DEMO.nodes[int(DEMO.src[0])], DEMO.nodes[int(DEMO.dst[0])]
        svc.ingest(wire.encode_ingest_rows("gc", 9, [], [[a, z, "down"]]))
        assert svc._urgent == {int(DEMO.src[0])}
        svc._decide_and_publish(svc.clock.monotonic())
        svc._publish_due(10.0)
        assert sent and sent[0] == (int(DEMO.src[0]), "change")
    finally:
        svc.close()


def test_interval_rounds_resend_the_kept_table_bytes(base: str) -> None:
    """A table sent by an interval round is kept zlib-compressed (34 MB of tables at 1,000
    nodes take 8 MB) and sent again as the same bytes; a changed table is encoded afresh
    and not kept (under load the next decision changes it again)."""
    svc = _service(base)
    sock = _Sock()
    had = svc.sockets.get("publish")
    svc.sockets["publish"] = sock
    try:
        eng = svc.engine
        assert eng is not None
        fresh = [wire.table_routes(wire.routes_by_name(eng, x)) for x in range(DEMO.n)]
        svc._publish(range(DEMO.n), "interval")
        assert set(svc._table_bytes) == set(range(DEMO.n))
        assert sum(map(len, svc._table_bytes.values())) < sum(map(len, fresh))
        svc._publish(range(DEMO.n), "interval")
        svc._publish([3], "change")
        bodies = [wire.decode_table(f) for f in sock.sent]
        for i, x in enumerate(list(range(DEMO.n)) * 2 + [3]):
            assert bodies[i]["node"] == DEMO.nodes[x]
            assert sock.sent[i][1].endswith(fresh[x])          # the routes' bytes, as encoded
        svc._table_bytes.pop(3)
        svc._publish([3], "change")
        assert 3 not in svc._table_bytes
    finally:
        if had is None:
            svc.sockets.pop("publish")
        else:
            svc.sockets["publish"] = had
        svc.close()


# ---- the decision rate cap -------------------------------------------------------------------
def test_decisions_are_capped_by_a_token_bucket_and_link_changes_bypass_it(base: str) -> None:
    clock = FakeClock()
    svc = _service(base, clock, **{"service.max_decisions_per_s": 20.0,
                                   "service.debounce_s": 0.002})
    try:
        svc._touched = True
        done = 0
        for _ in range(10):            # the burst: max(1, 20 * 0.1) = 2 decisions at once
            if svc._decision_due(clock.monotonic()):
                svc._decide_and_publish(clock.monotonic())
                svc._touched = True
                done += 1
            clock.advance(0.003)
        assert done == 2               # then one per 50 ms: 30 ms refill 0.6 of a token
        assert not svc._decision_due(clock.monotonic())
        at = svc._decision_at()
        assert at > clock.monotonic()
        svc._urgent.add(0)             # a link changed state: decided now, past cap and debounce
        assert svc._decision_due(clock.monotonic())
        for _ in range(3):             # again and again within the debounce, deep in debt
            svc._decide_and_publish(clock.monotonic())
            svc._touched = True
            svc._urgent.add(0)
            assert svc._decision_due(clock.monotonic())
        svc._urgent.clear()            # each took its token: the debt is one burst at most
        assert svc._decide_tokens == -2.0 and not svc._decision_due(clock.monotonic())
        clock.advance(svc._decision_at() - clock.monotonic())
        assert svc._decision_due(clock.monotonic())
    finally:
        svc.close()


def test_routine_decisions_wait_for_a_snapshot_child(base: str) -> None:
    """While a snapshot child shares the engine's pages copy-on-write, routine decisions
    wait for its end (at most SNAPSHOT_DEFER_S; a 1,000-node decision right after the fork
    took 36-40 ms in page faults, against the 50 ms loop stall target), and the loop wakes
    to look for the end; a link's change is decided at once all the same."""
    from routerd.service.daemon import SNAPSHOT_DEFER_S

    clock = FakeClock()
    svc = _service(base, clock, **{"service.max_decisions_per_s": 0.0, "service.debounce_s": 0.01})
    try:
        svc._touched = True
        clock.advance(0.01)
        assert svc._decision_due(clock.monotonic())
        svc._snap_child = (-1, "", 0, clock.monotonic())    # a child started now
        assert not svc._decision_due(clock.monotonic())
        assert clock.monotonic() < svc._decision_at() <= clock.monotonic() + 0.05  # it wakes
        svc._urgent.add(0)
        assert svc._decision_due(clock.monotonic())          # a link's change: at once
        svc._urgent.clear()
        clock.advance(SNAPSHOT_DEFER_S)
        assert svc._decision_due(clock.monotonic())          # waited long enough
        svc._snap_child = None
    finally:
        svc._snap_child = None
        svc.close()


def test_no_cap_means_only_the_debounce(base: str) -> None:
    clock = FakeClock()
    svc = _service(base, clock, **{"service.max_decisions_per_s": 0.0, "service.debounce_s": 0.01})
    try:
        svc._touched = True
        for _ in range(5):
            assert svc._decision_due(clock.monotonic())
            svc._decide_and_publish(clock.monotonic())
            svc._touched = True
            assert not svc._decision_due(clock.monotonic())
            clock.advance(0.01)
    finally:
        svc.close()


def test_a_decision_takes_what_fits_its_budget_and_replay_follows(base: str) -> None:
    """service.decide_budget_s bounds a decision's destinations by the measured cost of one
    (issue 15: one decision of 600 destinations took 74-144 ms at 1,000 nodes); the rest
    stay due and are decided next, the tick carries the limit and replay applies it, so
    the state after a restart is the live one.  Link rows and shutdown decide everything."""
    clock = FakeClock()
    # greedy: split mode decides every destination at every call (Engine.decide ignores
    # the limit), so only greedy mode has a budgeted decision to check
    svc = _service(base, clock, **{"service.max_decisions_per_s": 0.0, "service.debounce_s": 0.0,
                                   "service.decide_budget_s": 3.0, "engine.mode": "greedy"})
    rng = np.random.default_rng(2)
    try:
        eng = svc.engine
        assert eng is not None
        svc._decide_and_publish(clock.monotonic())       # the start's own decision
        svc._decide_cost = 1.0                           # 1 s a destination: 3 fit in 3 s
        for b in range(4):
            svc.ingest(_frame(rng, b + 1, 200))
        svc.commit()
        due = eng.pending()
        assert due > 6
        calls = 0
        while svc._touched:
            before = eng.full_pass_destinations
            svc._decide_and_publish(clock.monotonic())
            assert eng.full_pass_destinations - before <= 3   # never more than the limit
            calls += 1
        assert calls >= 2 and eng.pending() == 0
        # the clock ends a decision: one whose budget is already spent stops after its
        # first part (a quarter of its limit, rounded up), whatever the estimate planned
        svc.ingest(_frame(rng, 5, 200))
        svc.commit()
        due, before = eng.pending(), eng.full_pass_destinations
        assert due > 8
        with svc.lock:
            svc._decide_in_parts(eng, clock.wall(), due - 1, time.perf_counter() - 10.0)
        assert eng.full_pass_destinations - before == -(-(due - 1) // 4)
        while svc._touched:                                # the rest, within the budget
            svc._decide_and_publish(clock.monotonic())
        assert eng.pending() == 0
        svc.ingest(_frame(rng, 8, 200))
        a, z = DEMO.nodes[int(DEMO.src[0])], DEMO.nodes[int(DEMO.dst[0])]
        svc.ingest(wire.encode_ingest_rows("gc", 6, [], [[a, z, "down"]]))
        svc._decide_and_publish(clock.monotonic())       # a link row: everything at once
        assert eng.pending() == 0 and not svc._touched
        svc.commit()
        live = Engine.from_state(DEMO, eng.settings, eng.export_state())
    finally:
        svc.close()
    ticks: list[dict] = []
    r = journal.restore(os.path.join(base, "st"), DEMO, live.settings,
                        on_tick=lambda rec, d: ticks.append(rec.body))
    limits = [t_.get("limit") for t_ in ticks]
    # journaled only where it bound (the last call of the loop may have had 3 or fewer due),
    # a tick per part: a limit of 3 runs as three parts of 1
    assert set(limits) - {None} == {1, -(-(due - 1) // 4)}
    assert limits.count(1) >= 3 * (calls - 1) >= 3
    assert limits[-1] is None                          # the link row's decision
    assert r.engine.same_state(live) and r.engine.pending() == 0


# ---- tables from arrays ----------------------------------------------------------------------
@pytest.mark.parametrize("mode", ["greedy", "split"])
@pytest.mark.parametrize("n", [12, 40])
def test_table_codec_gives_the_bytes_of_the_dict_encoder(n: int, kernel_path: str,
                                                         mode: str) -> None:
    """Published tables (arrays through the codec) == the dict encoder over Engine.routes,
    to the bit: split mode's shares too (they were once rebuilt from 1 - eps and an equal
    eps share, which differed in the last bits)."""
    import sys

    sys.path.insert(0, os.path.join(os.path.dirname(os.path.dirname(__file__)), "bench"))
    from bench_engine import ring_with_chords

    topo = ring_with_chords(n, n)
    eng = Engine(topo, EngineSettings(kernels=kernel_path, mode=mode))
    codec = wire.TableCodec(topo.nodes)
    rng = np.random.default_rng(n)
    for step in range(4):
        if step:
            link = rng.integers(0, topo.n_links, 400)
            x, y = topo.src[link], topo.dst[link]
            d = rng.integers(0, topo.n - 1, 400)
            d = np.where(d >= x, d + 1, d)
            lat = topo.delay_s[link] * rng.uniform(0.5, 6.0, 400)
            eng.observe(HopBatch(x, y, d, lat, np.full(400, np.nan)), now=float(step))
            if step == 3:
                eng.set_link(int(topo.src[0]), int(topo.dst[0]), False, now=3.0)
        eng.decide(float(step))
        for z in range(topo.n):
            want = wire.table_routes(wire.routes_by_name(eng, z))
            got = codec.routes(*eng.table_arrays(z))
            assert got == want
            msg = wire.decode_table(wire.table_message_encoded(topo.nodes[z], 7, 1, got))
            assert msg["routes"] == wire.routes_by_name(eng, z) and msg["seq"] == 7


@pytest.mark.parametrize("n", [12, 40])
def test_table_codec_many_tables_in_one_pass_give_each_tables_bytes(n: int) -> None:
    """routes_many over any set of nodes (repeats, a single one, all) == routes per node."""
    import sys

    sys.path.insert(0, os.path.join(os.path.dirname(os.path.dirname(__file__)), "bench"))
    from bench_engine import ring_with_chords

    topo = ring_with_chords(n, n)
    eng = Engine(topo)
    codec = wire.TableCodec(topo.nodes)
    rng = np.random.default_rng(100 + n)
    link = rng.integers(0, topo.n_links, 600)
    x, y = topo.src[link], topo.dst[link]
    d = rng.integers(0, topo.n - 1, 600)
    d = np.where(d >= x, d + 1, d)
    eng.observe(HopBatch(x, y, d, topo.delay_s[link] * rng.uniform(0.5, 6.0, 600),
                         np.full(600, np.nan)), now=1.0)
    eng.set_link(int(topo.src[0]), int(topo.dst[0]), False, now=1.0)
    eng.decide(1.0)
    for xs in ([0], list(range(topo.n)), [3, 1, 3, n - 1], rng.permutation(topo.n)[:5].tolist()):
        got = codec.routes_many(*eng.table_arrays_many(xs), len(xs))
        assert got == [codec.routes(*eng.table_arrays(z)) for z in xs]


def test_table_codec_many_with_a_long_list_and_an_empty_table() -> None:
    names = [f"n{i}" for i in range(20)]
    codec = wire.TableCodec(names)
    # node 0: 2 destinations, one with 17 next hops; node 1: no entry; node 2: one entry
    owner = np.array([0, 0, 2])
    dsts = np.array([1, 2, 5])
    counts = np.array([17, 1, 2])
    hops = np.arange(20)
    w = np.linspace(0.0, 1.0, 20)
    got = codec.routes_many(owner, dsts, counts, hops, w, 3)
    assert got == [codec.routes(dsts[:2], counts[:2], hops[:18], w[:18]),
                   wire.table_routes({}), codec.routes(dsts[2:], counts[2:], hops[18:], w[18:])]
    counts2 = np.array([1, 1, 2])
    got = codec.routes_many(owner, dsts, counts2, hops[:4], w[:4], 3)
    assert got == [codec.routes(dsts[:2], counts2[:2], hops[:2], w[:2]),
                   wire.table_routes({}), codec.routes(dsts[2:], counts2[2:], hops[2:4], w[2:4])]


def test_table_codec_long_lists_and_big_maps() -> None:
    """More than 15 next hops (list16) and more than 15 destinations (map16) — msgpack's
    container heads — through the codec's fallback and its gather."""
    names = [f"n{i}" for i in range(40)]
    codec = wire.TableCodec(names)
    dsts = np.arange(1, 40)
    counts = np.full(39, 1)
    counts[3] = 17
    hops = np.concatenate([np.full(int(c), 2 + i % 5) for i, c in enumerate(counts)])
    w = np.linspace(0.0, 1.0, len(hops))
    routes: dict[str, list[list[Any]]] = {}
    i = 0
    for d, c in zip(dsts.tolist(), counts.tolist()):
        routes[names[d]] = [[names[int(h)], float(x)] for h, x in zip(hops[i:i + c], w[i:i + c])]
        i += c
    assert codec.routes(dsts, counts, hops, w) == wire.table_routes(routes)
    counts[3] = 1
    hops2 = np.concatenate([np.full(int(c), 3) for c in counts])
    w2 = np.linspace(0.1, 0.9, len(hops2))
    r2 = {names[d]: [[names[3], float(x)]] for d, x in zip(dsts.tolist(), w2)}
    assert codec.routes(dsts, counts, hops2, w2) == wire.table_routes(r2)
    e = np.zeros(0, dtype=np.int64)
    assert codec.routes(e, e, e, np.zeros(0)) == wire.table_routes({})


# ---- the received frame journaled as it is ---------------------------------------------------
@pytest.mark.parametrize("estimate", [False, True])
def test_a_wholly_accepted_columnar_frame_is_journaled_from_its_own_bytes(
        estimate: bool, monkeypatch: Any) -> None:
    from routerd.service.pipeline import Pipeline

    rng = np.random.default_rng(11)
    m = 60
    link = rng.integers(0, DEMO.n_links, m)
    x, y = DEMO.src[link], DEMO.dst[link]
    d = rng.integers(0, DEMO.n - 1, m)
    d = np.where(d >= x, d + 1, d)
    lat = DEMO.delay_s[link] * rng.uniform(1.0, 3.0, m)
    est = np.where(rng.random(m) < 0.5, np.nan, lat * 2) if estimate else None
    frame = wire.encode_ingest_cols("raw", 1, DEMO.digest, x, y, d, lat, est)
    ing = wire.decode_ingest(frame, DEMO)
    assert not isinstance(ing, wire.WireError) and ing.raw_cols is not None
    # the same body as encoding the decoded rows again, byte for byte (a frame without
    # estimates: no estimate column, read back as NaN)
    from_raw = journal.batch_body("raw", 1, 0.5, ing.hops, raw=ing.raw_cols)
    again = journal.batch_body("raw", 1, 0.5, ing.hops)
    if not estimate:
        assert "estimate_s" not in from_raw
        assert np.isnan(journal.batch_hops(from_raw).estimate).all()
        again.pop("estimate_s")
    assert from_raw == again
    ha, hb = journal.batch_hops(from_raw), journal.batch_hops(again)
    for k in ("src", "via", "dst", "latency", "estimate"):
        np.testing.assert_array_equal(getattr(ha, k), getattr(hb, k))
    cfg = config.load(None)
    pl = Pipeline(DEMO, cfg, engine=Engine(DEMO))
    seen: list[Any] = []
    real = journal.batch_body

    def spy(*a: Any, **k: Any) -> Any:
        seen.append(k.get("raw"))
        return real(*a, **k)

    monkeypatch.setattr(journal, "batch_body", spy)
    fed = pl.feed(frame, None, 1.0, 1.0)
    (kind, body), = fed.records
    ack = wire.decode_reply(fed.answer)
    if ack["rejected"]:      # some rows trimmed: the accepted part is encoded again
        assert len(body["from"]) == 4 * (m - len(ack["rejected"])) and seen == [None]
    else:                    # all taken: the frame's own bytes go in the record
        assert seen[0] is not None and body["from"] is seen[0]["from"]
        assert body["from"] == ing.raw_cols["from"]
    # replay reads back what the engine applied: same state
    ref = Engine(DEMO)
    journal.replay_into(ref, [journal.Record(1, "batch", journal.unpack(journal.pack(body)))])
    assert ref.same_state(pl.engine)
    # one row out of range: no raw columns, the accepted part is re-encoded
    bad = wire.encode_ingest_cols("raw", 2, DEMO.digest, np.r_[x, 999], np.r_[y, 0],
                                  np.r_[d, 1], np.r_[lat, 0.1])
    ing2 = wire.decode_ingest(bad, DEMO)
    assert not isinstance(ing2, wire.WireError) and ing2.raw_cols is None
