"""The service's snapshots in process: a background (forked) snapshot holds the state of
the moment it was taken, becomes the snapshot only once durable, and only then are
journal segments retired; the in-loop path streams the same format."""
from __future__ import annotations

import os
from typing import Any

import numpy as np

from routerd.core.engine import Engine, EngineSettings
from routerd.io import config, journal, wire
from routerd.io import topofiles as TF
from routerd.service.daemon import Service

DEMO = os.path.join(os.path.dirname(__file__), "..", "routerd", "data", "demo-lab.yaml")
TOPO = TF.load(DEMO)


def _start(state_dir: str, **kw: Any) -> Service:
    cfg = config.load(None).with_overrides({
        "service.state_dir": state_dir, "service.journal.fsync": "never",
        "service.journal.segment_bytes": 4096, **kw})
    s = Service(cfg, TOPO)
    s.restore(state_dir)
    return s


def _feed(s: Service, reporter: str, first: int, count: int, seed: int) -> None:
    rng = np.random.default_rng(seed)
    links = [(TOPO.nodes[a], TOPO.nodes[b]) for a, b in zip(TOPO.src.tolist(), TOPO.dst.tolist())]
    for b in range(first, first + count):
        rows = []
        for i in rng.integers(0, len(links), 40).tolist():
            x, y = links[i]
            d = TOPO.nodes[int(rng.integers(0, TOPO.n))]
            if d != x:
                rows.append([x, y, d, float(rng.uniform(0.0005, 0.01))])
        out, _ = s.ingest(wire.encode_ingest_rows(reporter, b, rows))
        assert "accepted" in wire.decode_reply(out)
    s.commit()


def test_background_snapshot_is_the_state_at_the_fork_and_retires_after_install(tmp_path: Any) -> None:
    d = str(tmp_path / "state")
    s = _start(d)
    try:
        _feed(s, "a", 1, 60, seed=1)
        want = Engine.from_state(TOPO, s.engine.settings, s.engine.export_state())
        jdir = journal.journal_dir(d)
        segs = journal._segments(jdir)
        assert len(segs) > 3
        assert s._snapshot_background()
        pid, tmp, rec, _ = s._snap_child
        assert rec == s._last_record
        # the engine moves on while the child writes
        _feed(s, "a", 61, 30, seed=2)
        assert not s.engine.same_state(want)
        assert journal._segments(jdir)[0] == segs[0]       # nothing retired before install
        s._reap_snapshot(wait=True)
        assert s._snap_child is None and not os.path.exists(tmp)
        state, no = journal.SnapshotStore(journal.snapshot_dir(d)).latest()
        assert no == rec and s.last_snapshot_record == rec
        got = Engine.from_state(TOPO, EngineSettings(), state["engine"])
        assert got.same_state(want)                       # the state at the fork, bit for bit
        assert state["dedup"]["marks"] == [["a", -1]]
        # one intact snapshot retires nothing (a bad one later must still have the journal)
        assert journal._segments(jdir)[0] == segs[0]
        assert s.counters.snapshots["interval"] == 1 and s.counters.snapshot_pause.count == 1
        # a second one, once installed, lets the journal before the first go
        _feed(s, "a", 91, 30, seed=5)
        assert s._snapshot_background()
        rec = s._snap_child[2]
        assert journal._segments(jdir)[0] == segs[0]       # nothing retired before install
        s._reap_snapshot(wait=True)
        assert journal._segments(jdir)[0][0] > segs[0][0]   # retired once durable
        assert s.counters.snapshots["interval"] == 2
    finally:
        s.close()
    # a restart from it plus the journal tail equals the live engine
    s2 = _start(d)
    try:
        assert s2.restored["snapshot_record"] == rec
    finally:
        s2.close()


def test_a_failed_child_loses_nothing(tmp_path: Any, monkeypatch: Any) -> None:
    d = str(tmp_path / "state")
    s = _start(d)
    try:
        _feed(s, "a", 1, 10, seed=3)
        segs = journal._segments(journal.journal_dir(d))

        def boom(*a: Any) -> None:
            raise OSError(28, "No space left on device")
        monkeypatch.setattr(journal.SnapshotStore, "write_file", staticmethod(boom))
        assert s._snapshot_background()
        s._reap_snapshot(wait=True)
        assert journal.SnapshotStore(journal.snapshot_dir(d)).list() == []
        assert os.listdir(journal.snapshot_dir(d)) == []          # the temp file is gone too
        assert journal._segments(journal.journal_dir(d)) == segs
        assert s.counters.snapshots["interval"] == 0
    finally:
        s.close()


def test_background_off_writes_in_the_loop(tmp_path: Any) -> None:
    d = str(tmp_path / "state")
    s = _start(d, **{"service.snapshot_background": False})
    try:
        _feed(s, "a", 1, 5, seed=4)
        assert not s._snapshot_background()
        last = s._last_record
        assert s._snapshot("interval") == last
        assert journal.SnapshotStore(journal.snapshot_dir(d)).latest()[1] == last
        # then a note of the snapshots kept, for recovery to tell one that goes missing
        assert s._last_record == last + 1
    finally:
        s.close()


class _FakeRep:
    """Stands in for the control REP socket: one request in, answers collected."""

    def __init__(self, request: bytes):
        self.request: bytes | None = request
        self.sent: list[bytes] = []

    def recv_multipart(self, flags: int = 0) -> list[bytes]:
        import zmq

        if self.request is None:
            raise zmq.Again()
        r, self.request = self.request, None
        return [r]

    def send(self, data: bytes, flags: int = 0) -> None:
        self.sent.append(data)


def test_control_snapshot_is_answered_once_the_child_has_written_it(tmp_path: Any) -> None:
    import zmq

    d = str(tmp_path / "state")
    s = _start(d)
    try:
        _feed(s, "a", 1, 5, seed=5)
        sock = _FakeRep(wire.encode_request({"op": "snapshot"}))
        assert s._control_one(zmq, sock) is None          # no answer yet: a child writes it
        assert s._snap_child is not None and not sock.sent
        rec = s._snap_child[2]
        s._reap_snapshot(wait=True)
        assert wire.decode_reply(sock.sent[0]) == {"v": 1, "snapshot": {"record": rec}}
        assert journal.SnapshotStore(journal.snapshot_dir(d)).latest()[1] == rec
        assert s.counters.snapshots["request"] == 1
        assert s.counters.control[("snapshot", "ok")] == 1
    finally:
        s.close()


def test_control_tables_is_built_over_turns_and_equals_the_one_go_reply(tmp_path: Any,
                                                                      monkeypatch: Any) -> None:
    """The control ``tables`` reply is encoded a slice per loop turn (so a big network's
    reply cannot hold the loop), and its bytes are the one-go reply's (dicts packed by
    msgpack) for the same engine."""
    import zmq

    from routerd.service import daemon

    for mode in ("greedy", "split"):
        s = _start(str(tmp_path / mode), **{"engine.mode": mode})
        try:
            _feed(s, "a", 1, 20, seed=6)
            s.engine.decide(s.clock.wall())
            want = wire.encode_reply({"tables": wire.tables_by_name(s.engine)})
            # whole in the first slice
            sock = _FakeRep(wire.encode_request({"op": "tables"}))
            assert s._control_one(zmq, sock) is None and sock.sent == [want]
            # three nodes a pass, no time: one pass a turn, answered only when whole
            monkeypatch.setattr(daemon, "TABLE_ENTRIES_AHEAD", 3 * TOPO.n)
            monkeypatch.setattr(daemon, "TABLES_REPLY_SLICE_S", 0.0)
            sock = _FakeRep(wire.encode_request({"op": "tables"}))
            assert s._control_one(zmq, sock) is None and not sock.sent
            turns = 1
            while not sock.sent:
                assert s._timeout_ms() == 0          # the loop comes back at once
                s._tables_reply_work(daemon.TABLES_REPLY_SLICE_S)   # a turn's slice
                turns += 1
            assert turns == -(-TOPO.n // 3) and sock.sent == [want]
            assert not s._tables_replies and s.counters.control[("tables", "ok")] == 2
            monkeypatch.undo()
        finally:
            s.close()
