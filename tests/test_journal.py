"""Durable state (routerd/io/journal.py): record format, recovery of torn and corrupt tails,
segments and retirement, snapshots with fallback, and exact engine state after replay."""
from __future__ import annotations

import errno
import itertools
import os
import shutil
import struct
import zlib
from typing import Any

import numpy as np
import pytest

from routerd.core import engine as E
from routerd.core import topology
from routerd.io import journal as J
from routerd.io import topofiles, wire

DEMO = "routerd/data/demo-lab.yaml"


@pytest.fixture(scope="module")
def topo() -> topology.Topology:
    return topofiles.load(DEMO)


def _read(path: str) -> bytes:
    with open(path, "rb") as fh:
        return fh.read()


def _write(path: str, data: bytes) -> None:
    with open(path, "wb") as fh:
        fh.write(data)


def _fill(d: str, n: int, **kw: object) -> J.Journal:
    j = J.Journal(d, **kw)  # type: ignore[arg-type]
    for i in range(n):
        j.append("tick", {"t": float(i), "pad": "x" * (i % 7)})
    return j


# ---- record format ------------------------------------------------------------------------
def test_crc32_is_the_standard_one() -> None:
    # CRC-32 (IEEE 802.3) check value for "123456789" is 0xCBF43926 (Williams, "A Painless
    # Guide to CRC Error Detection Algorithms", 1993; the CRC catalogue's "check" field)
    assert zlib.crc32(b"123456789") == 0xCBF43926


def test_segment_layout_parsed_independently(tmp_path: pytest.TempPathFactory) -> None:
    """Parse a segment by the documented layout with struct alone."""
    d = str(tmp_path)
    j = _fill(d, 3)
    j.close()
    (path,) = [os.path.join(d, f) for f in os.listdir(d)]
    assert os.path.basename(path) == "from-000000000001.rdj"
    data = _read(path)
    assert data[:8] == b"RDJOURN1" and struct.unpack_from("<Q", data, 8) == (1,)
    off, seen = 16, []
    while off < len(data):
        magic, flags, length, no, crc = struct.unpack_from("<2sHIQI", data, off)
        body = data[off + 20: off + 20 + length]
        assert magic == b"RJ" and flags == 0
        assert crc == zlib.crc32(data[off: off + 16] + body)
        seen.append((no, J.unpack(body)))
        off += 20 + length
    assert [n for n, _ in seen] == [1, 2, 3]
    assert seen[2][1] == {"kind": "tick", "body": {"t": 2.0, "pad": "xx"}}


def test_round_trip_and_numbering(tmp_path: pytest.TempPathFactory) -> None:
    d = str(tmp_path)
    j = J.Journal(d)
    assert j.last_record == 0
    bodies = [("start", {"topology": "abc", "epoch": 1}), ("tick", {"t": 1.5}),
              ("link", {"from": 0, "to": 1, "up": False, "t": 2.0}),
              ("config", {"settings": {"alpha": 0.3}}),
              ("batch", {"reporter": "r", "batch": 1, "from": b"\x01\x00\x00\x00", "links": []})]
    nos = [j.append(k, b) for k, b in bodies]
    assert nos == [1, 2, 3, 4, 5]
    got = list(j.records())
    assert [(r.no, r.kind, r.body) for r in got] == [(i + 1, k, b) for i, (k, b) in enumerate(bodies)]
    assert [r.no for r in j.records(after=3)] == [4, 5]
    j.close()
    j = J.Journal(d)
    assert j.recovery.clean and j.recovery.records == 5 and j.last_record == 5
    assert j.append("tick", {"t": 3.0}) == 6
    j.close()
    with pytest.raises(ValueError, match="kind 'nap'"):
        J.Journal(d).append("nap", {})
    with pytest.raises(ValueError, match="fsync policy"):
        J.Journal(d, fsync="sometimes")


# ---- recovery ---------------------------------------------------------------------------------
def test_torn_tail_cut_at_every_byte_offset(tmp_path: pytest.TempPathFactory) -> None:
    src = os.path.join(str(tmp_path), "src")
    j = _fill(src, 4)
    seg = j._seg_path
    start = os.path.getsize(seg)
    j.append("batch", {"reporter": "r", "batch": 9, "t": 1.0, "from": b"abcd" * 3})
    end = os.path.getsize(seg)
    j.close()
    data = _read(seg)
    assert end - start > 20
    for cut in range(start, end):
        d = os.path.join(str(tmp_path), f"c{cut}")
        os.makedirs(d)
        with open(os.path.join(d, os.path.basename(seg)), "wb") as fh:
            fh.write(data[:cut])
        jj = J.Journal(d)
        rep = jj.recovery
        if cut == start:
            assert rep.clean          # a clean end between records
        else:
            (c,) = rep.cuts
            assert c.torn and c.offset == start and c.bytes_cut == cut - start and c.kept_as is None
            assert "torn tail" in rep.lines()[1] and f"byte {start}" in rep.lines()[1]
        assert [r.no for r in jj.records()] == [1, 2, 3, 4]
        assert jj.append("tick", {"t": 9.0}) == 5
        assert [r.kind for r in jj.records(after=4)] == ["tick"]
        jj.close()
        assert J.recover(d).clean
        shutil.rmtree(d)


def test_torn_segment_header_removed(tmp_path: pytest.TempPathFactory) -> None:
    d = str(tmp_path)
    j = _fill(d, 30, segment_bytes=1024)
    j.close()
    segs = J._segments(d)
    assert len(segs) >= 2
    first, last = segs[-1]
    n_before = sum(1 for _ in J.iter_records(d)) - sum(1 for r in J.iter_records(d) if r.no >= first)
    for k in (0, 5, 15):
        with open(last, "wb") as fh:
            fh.write(J.SEG_HEADER.pack(J.SEG_MAGIC, first)[:k])
        jj = J.Journal(d, segment_bytes=1024)
        assert jj.recovery.removed_empty == [os.path.basename(last)]
        assert jj.last_record == first - 1 == n_before
        assert jj.append("tick", {"t": 0.0}) == first
        jj.close()
        assert J.recover(d).clean


def test_corrupt_record_mid_journal(tmp_path: pytest.TempPathFactory) -> None:
    """Rule: stop at the first bad record; keep the cut bytes and the later segments aside."""
    d = str(tmp_path)
    j = _fill(d, 60, segment_bytes=1024)
    j.close()
    segs = J._segments(d)
    assert len(segs) >= 3
    first, mid = segs[1]
    data = bytearray(_read(mid))
    # find the third record of the middle segment and flip one bit of its body
    off = 16
    for _ in range(2):
        off += 20 + struct.unpack_from("<I", data, off + 4)[0]
    bad_no = first + 2
    data[off + 22] ^= 0x01
    _write(mid, data)
    before = bytes(data)
    # a read-only pass changes nothing and says where it stopped
    rr = J.ReadReport()
    assert [r.no for r in J.iter_records(d, 0, rr)][-1] == bad_no - 1
    assert rr.stopped is not None and rr.stopped.offset == off and not rr.stopped.torn
    assert _read(mid) == before
    jj = J.Journal(d)
    rep = jj.recovery
    (c,) = rep.cuts
    assert not c.torn and c.offset == off and f"CRC mismatch in record {bad_no}" in c.detail
    kept = os.path.join(d, c.kept_as or "")
    assert _read(kept) == before[off:]
    assert rep.quarantined == [os.path.basename(p) + ".bad" for _, p in segs[2:]]
    assert all(os.path.exists(p + ".bad") and not os.path.exists(p) for _, p in segs[2:])
    assert [r.no for r in jj.records()] == list(range(1, bad_no))
    assert jj.append("tick", {"t": 0.0}) == bad_no
    jj.close()
    assert J.recover(d).clean


def test_bad_record_number_is_corruption(tmp_path: pytest.TempPathFactory) -> None:
    d = str(tmp_path)
    j = _fill(d, 3)
    j.close()
    (_, seg) = J._segments(d)[0]
    data = bytearray(_read(seg))
    off = 16 + 20 + struct.unpack_from("<I", data, 16 + 4)[0]    # second record
    length = struct.unpack_from("<I", data, off + 4)[0]
    struct.pack_into("<Q", data, off + 8, 77)                    # wrong number, valid CRC
    struct.pack_into("<I", data, off + 16,
                     zlib.crc32(bytes(data[off: off + 16]) + bytes(data[off + 20: off + 20 + length])))
    _write(seg, data)
    rep = J.recover(d)
    assert rep.cuts[0].detail == "record number 77, expected 2" and rep.last_record == 1


# ---- segments ----------------------------------------------------------------------------------
def test_rollover_and_retirement(tmp_path: pytest.TempPathFactory) -> None:
    d = str(tmp_path)
    j = _fill(d, 100, segment_bytes=1024)
    segs = J._segments(d)
    assert len(segs) > 3
    # each file is named by its first record, and each starts where the previous ended
    firsts = [f for f, _ in segs]
    assert firsts[0] == 1
    counts = [sum(1 for _ in J._Walk(_read(p), f)) for f, p in segs]
    assert [firsts[0] + sum(counts[:i]) for i in range(len(firsts))] == firsts
    assert j.bytes_total == sum(os.path.getsize(p) for _, p in segs)
    cut = firsts[2] + 1          # inside the third segment
    assert j.retire_before(cut) == 2
    assert [f for f, _ in J._segments(d)] == firsts[2:]
    assert next(r.no for r in j.records(after=cut)) == cut + 1
    assert j.bytes_total == sum(os.path.getsize(p) for _, p in J._segments(d))
    # the segment being written is never retired
    j.retire_before(10**9)
    assert J._segments(d)[-1][1] == j._seg_path and len(J._segments(d)) == 1
    assert j.append("tick", {"t": 0.0}) == 101
    j.close()
    # reopening continues the numbering after retirement
    j = J.Journal(d, segment_bytes=1024)
    assert j.last_record == 101
    j.close()


def test_start_after_skips_numbers_a_snapshot_covers(tmp_path: pytest.TempPathFactory) -> None:
    d = str(tmp_path)
    j = J.Journal(d, start_after=41)
    assert j.append("tick", {"t": 0.0}) == 42
    j.close()
    j = J.Journal(d, start_after=50)      # the journal lost records a snapshot holds
    assert j.append("tick", {"t": 1.0}) == 51
    j.close()
    # covered by a snapshot at record 50: reported, read past
    rep = J.recover(d, base=50, apply=False)
    assert rep.gaps == [(43, 51)] and [f.action for f in rep.findings] == ["skip"]
    assert rep.next_record == 52 and [r.no for r in J.iter_records(d, 50)] == [51]
    # no snapshot covers it: the gap stops the journal, loudly, and what follows is kept aside
    rr = J.ReadReport()
    assert [r.no for r in J.iter_records(d, 0, rr)] == [42]
    assert rr.stopped is not None and "expected record 43" in rr.stopped.detail
    rep = J.recover(d)
    (f,) = rep.findings
    assert (f.kind, f.where, f.action, f.lost) == ("gap", "after", "stop", (43, 50))
    assert rep.quarantined == ["from-000000000051.rdj.bad"] and rep.next_record == 43


def test_fsync_policies(tmp_path: pytest.TempPathFactory, monkeypatch: pytest.MonkeyPatch) -> None:
    syncs = []
    real = os.fdatasync
    monkeypatch.setattr(J.os, "fdatasync", lambda fd: (syncs.append(fd), real(fd)))
    j = J.Journal(os.path.join(str(tmp_path), "b"), fsync="batch")
    syncs.clear()
    j.append("tick", {"t": 0.0})
    assert len(syncs) == 1
    j.append("tick", {"t": 1.0}, sync=False)
    j.append("tick", {"t": 2.0}, sync=False)
    assert len(syncs) == 1
    j.commit()
    assert len(syncs) == 2
    j.commit()                              # nothing new: no fsync
    assert len(syncs) == 2
    j.close()
    j = J.Journal(os.path.join(str(tmp_path), "n"), fsync="never")
    syncs.clear()
    for i in range(5):
        j.append("tick", {"t": float(i)})
    j.commit()
    assert syncs == []
    j.flush_sync()
    assert len(syncs) == 1
    j.close()
    j = J.Journal(os.path.join(str(tmp_path), "i"), fsync="interval", fsync_interval_s=3600)
    syncs.clear()
    j.append("tick", {"t": 0.0})
    assert syncs == [] and not j.maybe_sync()
    j.fsync_interval_s = 0.0
    assert j.maybe_sync() and len(syncs) == 1
    j.close()


def test_failed_write_leaves_no_half_record(tmp_path: pytest.TempPathFactory,
                                            monkeypatch: pytest.MonkeyPatch) -> None:
    d = str(tmp_path)
    j = _fill(d, 2)
    size = os.path.getsize(j._seg_path)
    real = os.write

    def half(fd: int, data: Any) -> int:
        b = b"".join(data) if isinstance(data, list) else bytes(data)
        real(fd, b[: len(b) // 2])
        raise OSError(errno.ENOSPC, "No space left on device")
    monkeypatch.setattr(J.os, "write", half)
    monkeypatch.setattr(J.os, "writev", half)
    with pytest.raises(OSError):
        j.append("tick", {"t": 5.0})
    assert os.path.getsize(j._seg_path) == size
    # held records: numbered at once, written by flush; a failed flush keeps none of them
    # and takes their numbers back
    assert [j.append("tick", {"t": t}, hold=True) for t in (5.5, 5.6)] == [3, 4]
    assert j.held == 2 and os.path.getsize(j._seg_path) == size
    with pytest.raises(OSError):
        j.flush()
    assert j.held == 0 and j.last_record == 2 and os.path.getsize(j._seg_path) == size
    monkeypatch.setattr(J.os, "write", real)
    monkeypatch.undo()
    assert j.append("tick", {"t": 6.0}) == 3
    # held, then a plain append: written in order (the plain one flushes them first)
    assert j.append("tick", {"t": 7.0}, hold=True) == 4
    assert j.append("tick", {"t": 8.0}, hold=True) == 5
    assert j.append("tick", {"t": 9.0}, sync=False) == 6 and j.held == 0
    j.append("tick", {"t": 10.0}, hold=True)
    j.close()                            # close writes what is held
    assert J.recover(d).clean and [r.body["t"] for r in J.iter_records(d)] == \
        [0.0, 1.0, 6.0, 7.0, 8.0, 9.0, 10.0]


# ---- snapshots ----------------------------------------------------------------------------------
def _state() -> dict:
    rng = np.random.default_rng(3)
    return {"engine": {"Q": rng.random((4, 4, 3)), "N": np.arange(12, dtype=np.int64).reshape(3, 4),
                       "alt": rng.random((2, 2)) > 0.5, "i32": np.array([1, -2], dtype=np.int32),
                       "now": 12.5},
            "dedup": {"probe-1": {17: {"accepted": 3, "rejected": [[1, "bad_latency"]]}}},
            "empty": np.zeros((0, 3))}


def _eq(a: object, b: object) -> bool:
    if isinstance(a, np.ndarray):
        return isinstance(b, np.ndarray) and a.dtype == b.dtype and a.shape == b.shape \
            and np.array_equal(a, b)
    if isinstance(a, dict):
        return isinstance(b, dict) and a.keys() == b.keys() and all(_eq(a[k], b[k]) for k in a)
    return bool(a == b)


def test_snapshot_round_trip_keep_and_fallback(tmp_path: pytest.TempPathFactory) -> None:
    d = str(tmp_path)
    s = J.SnapshotStore(d, keep=3)
    assert s.latest() is None and s.retire_point() == 0
    st = _state()
    s.write(st, 10)
    assert s.retire_point() == 0        # one snapshot: the journal before it stays (no fallback yet)
    for no in (20, 30, 40):
        st["engine"]["now"] = float(no)
        path = s.write(st, no)
    # the oldest intact one kept: a bad newest one (or two) still has the journal after it
    assert [n for n, _ in s.list()] == [20, 30, 40] and s.retire_point() == 20
    got, no = s.latest()
    assert no == 40 and _eq(got, st) and got["engine"]["Q"].flags.writeable
    # corrupt the newest: one flipped byte → CRC mismatch → the previous one
    data = bytearray(_read(path))
    data[-5] ^= 0xFF
    _write(path, data)
    got, no = s.latest()
    assert no == 30 and got["engine"]["now"] == 30.0
    assert any("CRC mismatch" in p for p in s.problems)
    assert s.retire_point() == 20       # 30 and 20 are still two intact ones
    # truncate the next one too
    p30 = s.list()[1][1]
    _write(p30, _read(p30)[:20])
    s2 = J.SnapshotStore(d)
    assert s2.latest()[1] == 20 and len(s2.problems) == 2
    assert s2.retire_point() == 0     # one intact snapshot left: retire nothing
    _write(s.list()[0][1], b"")
    assert J.SnapshotStore(d).latest() is None


def test_snapshot_temp_leftovers_removed(tmp_path: pytest.TempPathFactory) -> None:
    d = str(tmp_path)
    _write(os.path.join(d, ".snap-000000000005.tmp123"), b"half")
    s = J.SnapshotStore(d)
    assert os.listdir(d) == [] and s.latest() is None


def test_no_pickle_only_plain_arrays() -> None:
    with pytest.raises(TypeError):
        J.pack({"x": np.array([object()], dtype=object)})
    with pytest.raises(TypeError):
        J.pack({"x": object()})
    import msgpack
    with pytest.raises(ValueError):
        J.unpack(msgpack.packb(msgpack.ExtType(9, b"")))
    bad = msgpack.packb(msgpack.ExtType(1, msgpack.packb(["|O", [1], b"\0" * 8], use_bin_type=True)))
    with pytest.raises(ValueError, match="refusing"):
        J.unpack(bad)


# ---- engine state through journal and snapshots ------------------------------------------------
class Driver:
    """Drives an engine the way the service does, journaling every step."""

    def __init__(self, topo: topology.Topology, state_dir: str, seed: int,
                 settings: E.EngineSettings | None = None):
        self.topo = topo
        self.dir = state_dir
        self.rng = np.random.default_rng(seed)
        self.settings = settings or E.EngineSettings()
        self.eng = E.Engine(topo, self.settings)
        self.j = J.Journal(J.journal_dir(state_dir), segment_bytes=8192)
        self.snaps = J.SnapshotStore(J.snapshot_dir(state_dir))
        self.j.append("start", {"topology": topo.digest, "nodes": list(topo.nodes),
                                "settings": J.settings_to_dict(self.settings), "epoch": 1})
        self.t = 0.0
        self.batch = 0
        self.decisions: list[tuple[float, frozenset[int]]] = []

    def hops(self, m: int) -> E.HopBatch:
        t, rng = self.topo, self.rng
        x = rng.integers(0, t.n, m)
        y = np.array([rng.choice(t.neighbours[i]) for i in x])
        d = rng.integers(0, t.n, m)
        lat = t.delay_s[[t.link_index[(int(a), int(b))] for a, b in zip(x, y)]] * (1 + rng.exponential(2, m))
        lat[rng.random(m) < 0.05] = np.nan                      # bad rows the engine refuses
        est = np.where(rng.random(m) < 0.3, rng.random(m) * 0.01, np.nan)
        return E.HopBatch.of(x, y, d, lat, est)

    def step(self) -> None:
        self.t += 0.05
        self.batch += 1
        hops = self.hops(int(self.rng.integers(1, 80)))
        links = []
        if self.rng.random() < 0.1:
            k = int(self.rng.integers(0, self.topo.n_links))
            links = [(int(self.topo.src[k]), int(self.topo.dst[k]), bool(self.rng.random() < 0.5))]
        res, _ = J.apply_batch(self.eng, hops, links, self.t)
        self.j.append("batch", J.batch_body("r", self.batch, self.t,
                                            J.accepted_part(hops, res.rejected), links,
                                            ack={"accepted": res.accepted + len(links),
                                                 "rejected": [list(r) for r in res.rejected]}))
        if self.rng.random() < 0.05:
            k = int(self.rng.integers(0, self.topo.n_links))
            a, b, up = int(self.topo.src[k]), int(self.topo.dst[k]), bool(self.rng.random() < 0.7)
            self.eng.set_link(a, b, up, now=self.t)
            self.j.append("link", {"from": a, "to": b, "up": up, "t": self.t})
        if self.rng.random() < 0.02:
            self.settings = E.settings_with(self.settings, margin=float(self.rng.uniform(0, 0.2)),
                                            explore_max=float(self.rng.uniform(0.05, 0.2)))
            self.eng.reconfigure(self.settings)
            self.j.append("config", {"settings": J.settings_to_dict(self.settings)})
        if self.batch % 3 == 0:
            dec = self.eng.decide(self.t)
            self.j.append("tick", {"t": self.t})
            self.decisions.append((self.t, dec.changed_nodes))

    def snapshot(self) -> None:
        self.snaps.write(J.engine_state(self.eng, dedup={"r": {self.batch: {"accepted": 1}}}),
                         self.j.last_record)
        self.j.retire_before(self.snaps.retire_point())


def test_replay_from_scratch_equals_live(topo: topology.Topology, tmp_path: pytest.TempPathFactory) -> None:
    dr = Driver(topo, str(tmp_path), seed=11)
    for _ in range(150):
        dr.step()
    dr.j.close()
    seen: list[tuple[float, frozenset[int]]] = []
    r = J.restore(str(tmp_path), topo, E.EngineSettings(explore_max=0.15),
                  on_tick=lambda rec, d: seen.append((rec.body["t"], d.changed_nodes)))
    assert r.snapshot_record == 0 and r.replay.batches == 150
    assert r.engine.same_state(dr.eng)
    assert wire.tables_by_name(r.engine) == wire.tables_by_name(dr.eng)
    assert seen == dr.decisions           # every decision as the live engine made it
    # replay is deterministic
    r2 = J.restore(str(tmp_path), topo, E.EngineSettings())
    assert r2.engine.same_state(r.engine)


def test_snapshot_plus_tail_equals_live(topo: topology.Topology, tmp_path: pytest.TempPathFactory) -> None:
    dr = Driver(topo, str(tmp_path), seed=5)
    for i in range(240):
        dr.step()
        if i in (60, 120, 180):
            dr.snapshot()
    dr.j.close()
    assert J._segments(J.journal_dir(str(tmp_path)))[0][0] > 1      # something was retired
    r = J.restore(str(tmp_path), topo, E.EngineSettings())
    assert r.snapshot_record > 0 and r.state["dedup"]["r"]
    assert r.engine.same_state(dr.eng)
    assert wire.tables_by_name(r.engine) == wire.tables_by_name(dr.eng)
    # newest snapshot corrupt → the previous one plus a longer journal tail, same state
    newest = J.SnapshotStore(J.snapshot_dir(str(tmp_path))).list()[-1][1]
    data = bytearray(_read(newest))
    data[len(data) // 2] ^= 0x10
    _write(newest, data)
    r2 = J.restore(str(tmp_path), topo, E.EngineSettings())
    assert r2.snapshot_record < r.snapshot_record and r2.snapshot_problems
    assert r2.engine.same_state(dr.eng)


class LimitedDriver(Driver):
    """A service that bounds each decision to a few destinations (issue 15) and journals
    the limit with the tick (greedy mode: split mode decides every destination at every
    call and ignores the limit)."""

    def __init__(self, topo: topology.Topology, state_dir: str, seed: int):
        super().__init__(topo, state_dir, seed, E.EngineSettings(mode="greedy"))

    def step(self) -> None:
        self.t += 0.05
        self.batch += 1
        hops = self.hops(int(self.rng.integers(1, 80)))
        res, _ = J.apply_batch(self.eng, hops, [], self.t)
        self.j.append("batch", J.batch_body("r", self.batch, self.t,
                                            J.accepted_part(hops, res.rejected), [],
                                            ack={"accepted": res.accepted,
                                                 "rejected": [list(r) for r in res.rejected]}))
        limit = int(self.rng.integers(1, 4))
        dec = self.eng.decide(self.t, limit=limit)
        self.j.append("tick", {"t": self.t, "limit": limit})
        self.decisions.append((self.t, dec.changed_nodes))


def test_limited_decisions_replay_exactly(topo: topology.Topology, tmp_path: pytest.TempPathFactory) -> None:
    dr = LimitedDriver(topo, str(tmp_path), seed=3)
    for i in range(120):
        dr.step()
        if i == 60:
            dr.snapshot()
    dr.j.close()
    assert dr.eng.pending() > 0 and dr.eng._cursor > 0     # decisions were left for later
    seen: list[tuple[float, frozenset[int]]] = []
    r = J.restore(str(tmp_path), topo, E.EngineSettings(),
                  on_tick=lambda rec, d: seen.append((rec.body["t"], d.changed_nodes)))
    assert r.snapshot_record > 0
    assert r.engine.same_state(dr.eng) and r.engine.pending() == dr.eng.pending()
    assert wire.tables_by_name(r.engine) == wire.tables_by_name(dr.eng)
    assert seen == [x for x in dr.decisions if x[0] > 61 * 0.05 + 1e-9]


def test_replay_refuses_unknown_kind_and_other_topology(topo: topology.Topology) -> None:
    eng = E.Engine(topo)
    with pytest.raises(J.JournalError, match="unknown kind"):
        J.replay_into(eng, [J.Record(1, "dance", {})])
    with pytest.raises(J.JournalError, match="another|written for topology"):
        J.replay_into(eng, [J.Record(1, "start", {"topology": "ffff"})])


def test_batch_body_round_trip(topo: topology.Topology) -> None:
    hb = E.HopBatch.of([0, 1], [1, 2], [3, 3], [0.001, 0.002], [np.nan, 0.5])
    body = J.unpack(J.pack(J.batch_body("r", 4, 1.5, hb, [(0, 1, True)])))
    back = J.batch_hops(body)
    for k in ("src", "via", "dst", "latency", "estimate"):
        np.testing.assert_array_equal(getattr(back, k), getattr(hb, k))
    assert body["links"] == [[0, 1, True]] and body["t"] == 1.5
    res = E.ObserveResult(1, ((0, "bad_latency"),), np.empty(1))
    assert J.accepted_part(hb, res.rejected).src.tolist() == [1]


def _write_format1(path: str, state: dict, no: int) -> None:
    """A snapshot as the first format wrote it (one msgpack body after a 28-byte header)."""
    body = J.pack({"record_no": no, "written_at": 1.0, "state": state})
    _write(path, J.SNAP_HEADER.pack(J.SNAP_MAGIC, no, len(body), zlib.crc32(body)) + body)


def test_snapshot_first_format_still_reads(tmp_path: pytest.TempPathFactory) -> None:
    d = str(tmp_path)
    st = _state()
    _write_format1(os.path.join(d, "snap-00000000000000000007.rs"), st, 7)
    got, no = J.SnapshotStore(d).latest()
    assert no == 7 and _eq(got, st)
    J.SnapshotStore(d).write(st, 9)                      # the new format next to it
    assert _read(os.path.join(d, "upto-000000000009.rdsnap"))[:8] == J.SNAP2_MAGIC
    assert [n for n, _ in J.SnapshotStore(d).list()] == [7, 9]


@pytest.mark.parametrize("fmt", [1, 2])
def test_a_snapshot_with_int64_counts_restores_saturated(tmp_path: pytest.TempPathFactory,
                                                         fmt: int) -> None:
    """Snapshots written before counts were narrowed (issue 15) hold N as int64: they
    restore, the counts saturated at the engine's cap, and the engine goes on exactly as
    the one that wrote them (whose counts never saturate)."""
    names = ["a", "b", "c", "d"]
    t = topology.build("line", names, [topology.LinkSpec(a, b, 0.001, 1e6, 10, f"{a}{b}")
                                       for p, q in itertools.pairwise(names) for a, b in ((p, q), (q, p))])
    s = E.EngineSettings()
    w = E.Engine(t, s)
    w.N = w.N.astype(np.int64)              # the old engine: int64 counts, no cap
    w._count_cap = int(np.iinfo(np.int64).max)
    rng = np.random.default_rng(8)

    def rows(m: int) -> E.HopBatch:           # few keys: counts far past 255
        x = rng.integers(0, 2, m)
        return E.HopBatch.of(x, x + 1, np.full(m, 3), rng.uniform(0.0005, 0.02, m))

    for i in range(40):
        w.observe(rows(64), now=float(i))
    w.decide(40.0)
    st = J.engine_state(w)
    assert st["engine"]["N"].dtype == np.int64 and int(st["engine"]["N"].max()) > 1000
    d = str(tmp_path)
    if fmt == 1:
        _write_format1(os.path.join(d, "snap-00000000000000000003.rs"), st, 3)
    else:
        J.SnapshotStore(d).write(st, 3)
    got, no = J.SnapshotStore(d).latest()
    assert no == 3 and got["engine"]["N"].dtype == np.int64
    e = E.Engine.from_state(t, s, got["engine"])
    assert e.N.dtype == np.uint8
    np.testing.assert_array_equal(e.N, np.minimum(w.N, 255))
    for i in range(40, 50):
        b = rows(64)
        e.observe(b, now=float(i))
        w.observe(b, now=float(i))
    e.decide(51.0)
    w.decide(51.0)
    for k in ("Q", "td", "greedy", "eps", "alt"):
        assert np.array_equal(getattr(e, k), getattr(w, k)), k
    # and what the narrow engine writes reads back the same
    J.SnapshotStore(d).write(J.engine_state(e), 4)
    again = E.Engine.from_state(t, s, J.SnapshotStore(d).latest()[0]["engine"])
    assert again.same_state(e) and again.N.dtype == np.uint8


def test_snapshot_stream_checks_every_byte(tmp_path: pytest.TempPathFactory) -> None:
    d = str(tmp_path)
    st = _state()
    st["big"] = np.arange(3 * J.SNAP_CHUNK // 8 + 5, dtype=np.float64)   # four data chunks
    path = J.SnapshotStore(d).write(st, 5)
    got, _ = J.SnapshotStore.read(path)
    assert _eq(got, st)
    data = _read(path)
    rng = np.random.default_rng(1)
    for pos in [8, 16, 20, 40, len(data) // 2, len(data) - 30, len(data) - 1,
                *rng.integers(0, len(data), 20).tolist()]:
        bad = bytearray(data)
        bad[pos] ^= 0x01
        _write(path, bad)
        with pytest.raises(ValueError):
            J.SnapshotStore.read(path)
    for cut in [0, 9, 17, 30, len(data) // 3, len(data) - 1]:
        _write(path, data[:cut])
        with pytest.raises(ValueError):
            J.SnapshotStore.read(path)
    _write(path, data + b"\0")
    with pytest.raises(ValueError, match="bytes after it"):
        J.SnapshotStore.read(path)


def test_snapshot_write_holds_no_second_copy(tmp_path: pytest.TempPathFactory) -> None:
    # issue 13: a snapshot packed the whole state into one body (+565 MB at 1,000 nodes);
    # streamed, the writer allocates next to nothing beyond the arrays it is given
    import tracemalloc

    st = {"engine": {"Q": np.random.default_rng(0).random((64, 64, 64)),      # 2 MiB each
                     "N": np.ones((64, 64, 64), dtype=np.int64)}, "x": [1, 2]}
    nbytes = st["engine"]["Q"].nbytes * 2
    s = J.SnapshotStore(str(tmp_path))
    tracemalloc.start()
    try:
        base = tracemalloc.get_traced_memory()[0]
        tracemalloc.reset_peak()
        s.write(st, 3)
        peak = tracemalloc.get_traced_memory()[1] - base
    finally:
        tracemalloc.stop()
    # (msgpack's packer allocates a fixed 0.5 MiB buffer; the old writer peaked at 2 x nbytes)
    assert peak < nbytes / 4, (peak, nbytes)
    got, _ = s.latest()
    assert _eq(got, st)
