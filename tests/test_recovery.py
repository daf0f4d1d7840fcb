"""Start-up recovery of a state directory (routerd/io/journal.py ``recover_state``): it starts
from the newest intact snapshot, needs only the records after it, reports damage before it
at no cost, stops loudly at damage after it, and replay reads the directory the same way.

The state dirs are written the way the service writes them (start record, batches, ticks,
snapshots with their journal note, retirement at ``SnapshotStore.retire_point``); "the
service's start-up" is :meth:`routerd.service.Service._restore`, run in-process (no sockets).
"""
from __future__ import annotations

import argparse
import json
import os
import shutil
import struct

import numpy as np
import pytest

from routerd.core import engine as E
from routerd.io import config, wire
from routerd.io import journal as J
from routerd.io.inputs import load_topology
from routerd.service.daemon import Service
from routerd.tools import replay as R

DEMO = load_topology(config.load(None))


class Writer:
    """Journals engine calls exactly as the service does; snapshots like Service._snapshot."""

    def __init__(self, d: str, seed: int = 1, segment_bytes: int = 2048,
                 settings: E.EngineSettings | None = None, drop: tuple[str, ...] = ()):
        self.dir = d
        self.rng = np.random.default_rng(seed)
        self.eng = E.Engine(DEMO, settings or E.EngineSettings())
        self.j = J.Journal(J.journal_dir(d), segment_bytes=segment_bytes)
        self.snaps = J.SnapshotStore(J.snapshot_dir(d))
        self.drop = drop          # settings fields left out, as a version before them wrote
        self.j.append("start", {"topology": DEMO.digest, "nodes": list(DEMO.nodes),
                                "settings": self._settings(), "epoch": 1})
        self.t = 1000.0
        self.b = 0
        self.batch_records: dict[int, int] = {}      # batch number -> record number

    def batch(self) -> None:
        t, rng = DEMO, self.rng
        k = rng.integers(0, t.n_links, 12)
        d = rng.integers(0, t.n - 1, 12)
        d = np.where(d >= t.src[k], d + 1, d)
        hb = E.HopBatch.of(t.src[k], t.dst[k], d, t.delay_s[k] * rng.uniform(1, 3, 12))
        self.t += 0.01
        self.b += 1
        res, _ = J.apply_batch(self.eng, hb, [], self.t)
        self.batch_records[self.b] = self.j.append("batch", J.batch_body(
            "w", self.b, self.t, J.accepted_part(hb, res.rejected),
            ack={"accepted": res.accepted, "rejected": [list(r) for r in res.rejected]}))
        if self.b % 4 == 0:
            self.eng.decide(self.t)
            self.j.append("tick", {"t": self.t})

    def _settings(self) -> dict:
        return {k: v for k, v in J.settings_to_dict(self.eng.settings).items() if k not in self.drop}

    def snapshot(self) -> int:
        rec = self.j.last_record
        self.snaps.write({**J.engine_state(self.eng, dedup=[]), "settings": self._settings()}, rec)
        if "snapshot" in J.KINDS:
            self.j.append("snapshot", {"record": rec, "kept": [n for n, _ in self.snaps.list()]})
        self.j.retire_before(self.snaps.retire_point())
        return rec

    def run(self, batches: int, snapshot_at: tuple[int, ...] = ()) -> None:
        for i in range(1, batches + 1):
            self.batch()
            if i in snapshot_at:
                self.snapshot()
        self.j.close()


def start_up(d: str, cfg: config.Config | None = None) -> Service:
    """What ``routerd serve`` does with the state dir before it binds anything."""
    svc = Service(cfg or config.load(None), DEMO, out=open(os.devnull, "w"))  # noqa: SIM115
    svc.restore(d)
    return svc


def stop(svc: Service) -> None:
    svc.close()
    svc.out.close()


def record_span(seg: str, no: int) -> tuple[int, int]:
    """(offset, length) of record ``no`` in segment file ``seg``."""
    with open(seg, "rb") as fh:
        data = fh.read()
    off = 16
    while off < len(data):
        length, rno = struct.unpack_from("<IQ", data, off + 4)
        if rno == no:
            return off, 20 + length
        off += 20 + length
    raise AssertionError(f"record {no} not in {seg}")


def segment_of(d: str, no: int) -> str:
    segs = J._segments(J.journal_dir(d))
    return [p for f, p in segs if f <= no][-1]


def flip(d: str, no: int, at: int = 30) -> None:
    seg = segment_of(d, no)
    off, length = record_span(seg, no)
    with open(seg, "r+b") as fh:
        fh.seek(off + min(at, length - 1))
        b = fh.read(1)
        fh.seek(off + min(at, length - 1))
        fh.write(bytes([b[0] ^ 0x40]))


def files(d: str) -> set[str]:
    return {os.path.join(sub, n) for sub in ("journal", "snapshots")
            for n in os.listdir(os.path.join(d, sub))}


# ---- issue 13 item 3 ------------------------------------------------------------------------
def test_a_flipped_byte_the_snapshot_covers_costs_nothing(tmp_path: pytest.TempPathFactory) -> None:
    d = str(tmp_path / "s")
    w = Writer(d)
    w.run(120, snapshot_at=(40, 80))
    victim = w.batch_records[60]                   # an old batch, covered by the snapshot at 80
    assert segment_of(d, victim)                   # still in the journal (not retired)
    flip(d, victim)
    before = files(d)
    svc = start_up(d)
    try:
        assert svc.engine is not None and svc.engine.same_state(w.eng), "acknowledged batches lost"
        rec = svc.health()["recovery"]
        (f,) = rec["findings"]
        assert (f["kind"], f["where"], f["action"]) == ("corrupt", "before", "skip")
        assert f["lost"] == [victim, victim] and f"CRC mismatch in record {victim}" in f["detail"]
        assert not rec["set_aside"] and not rec["clean"]
        assert rec["snapshot"]["record"] >= w.batch_records[80] > victim
        assert any("nothing lost" in ln for ln in rec["lines"])
    finally:
        stop(svc)
    assert before <= files(d)                      # nothing cut, renamed or deleted


def test_a_single_snapshot_corrupt_or_deleted_loses_nothing(tmp_path: pytest.TempPathFactory) -> None:
    for damage in ("corrupt", "delete"):
        d = str(tmp_path / damage)
        w = Writer(d)
        w.run(100, snapshot_at=(60,))
        ((_, snap),) = J.SnapshotStore(J.snapshot_dir(d)).list()
        # fewer than two snapshots: the journal is kept from record 1
        assert J._segments(J.journal_dir(d))[0][0] == 1
        if damage == "corrupt":
            with open(snap, "r+b") as fh:
                fh.seek(os.path.getsize(snap) // 2)
                fh.write(b"\xff\xfe")
        else:
            os.unlink(snap)
        svc = start_up(d)
        try:
            assert svc.engine is not None and svc.engine.same_state(w.eng), damage
            rec = svc.health()["recovery"]
            assert rec["snapshot"] is None and not rec["findings"]
            name = os.path.basename(snap)
            if damage == "corrupt":
                assert rec["snapshots_skipped"] and rec["snapshots_skipped"][0].startswith(name)
            else:
                assert rec["snapshots_missing"] == [name]       # said, not silent
                assert any(name in ln and "missing" in ln for ln in rec["lines"])
        finally:
            stop(svc)


def test_a_deleted_middle_segment_stops_the_journal_there(tmp_path: pytest.TempPathFactory) -> None:
    d = str(tmp_path / "s")
    w = Writer(d)
    w.run(120, snapshot_at=(20, 30))
    ref_dir = str(tmp_path / "ref")
    shutil.copytree(d, ref_dir)
    segs = J._segments(J.journal_dir(d))
    base = J.SnapshotStore(J.snapshot_dir(d)).list()[-1][0]
    mid = [(f, p) for f, p in segs if f > base + 1][len(segs) // 3]
    nxt = segs[[p for _, p in segs].index(mid[1]) + 1][0]
    os.unlink(mid[1])
    svc = start_up(d)
    try:
        # the state as of the record before the hole: nothing after it applied on top
        want = J.restore(ref_dir, DEMO, E.EngineSettings()).engine
        ref = E.Engine.from_state(DEMO, want.settings, J.unpack(J.pack(J.SnapshotStore.read(
            J.SnapshotStore(J.snapshot_dir(ref_dir)).list()[-1][1])[0]))["engine"])
        J.replay_into(ref, (r for r in J.iter_records(J.journal_dir(ref_dir), base) if r.no < mid[0]))
        assert svc.engine is not None and svc.engine.same_state(ref)
        assert not svc.engine.same_state(w.eng)
        rec = svc.health()["recovery"]
        (f,) = rec["findings"]
        assert (f["kind"], f["where"], f["action"], f["lost"]) == ("gap", "after", "stop", [mid[0], nxt - 1])
        later = [os.path.basename(p) for fst, p in segs if fst >= nxt]
        assert rec["set_aside"] == [n + ".bad" for n in later]
        assert all(os.path.exists(os.path.join(J.journal_dir(d), n + ".bad")) for n in later)
        assert any("stops here" in ln for ln in rec["lines"])
        assert svc.journal.last_record >= mid[0]       # numbering goes on after the stop
    finally:
        stop(svc)


def test_a_deleted_snapshot_behind_a_stop_is_still_reported(tmp_path: pytest.TempPathFactory) -> None:
    """Two faults: the newest snapshot deleted, and the journal after the one before it
    damaged.  The journal stops at the damage; the notes after it still name the snapshot."""
    d = str(tmp_path / "s")
    w = Writer(d)
    w.run(90, snapshot_at=(30, 60))
    snaps = J.SnapshotStore(J.snapshot_dir(d)).list()
    os.unlink(snaps[-1][1])
    flip(d, w.batch_records[45])                   # after the snapshot at 30: a stop
    svc = start_up(d)
    try:
        rec = svc.health()["recovery"]
        assert [f["action"] for f in rec["findings"]] == ["stop"]
        assert rec["snapshots_missing"] == [os.path.basename(snaps[-1][1])]
    finally:
        stop(svc)


# ---- the rules table, walked ----------------------------------------------------------------
def _bare(tmp: str, name: str, n: int = 40) -> str:
    d = os.path.join(tmp, name)
    j = J.Journal(d, segment_bytes=1024)
    for i in range(n):
        j.append("tick", {"t": float(i), "pad": "x" * 20})
    j.close()
    return d


def test_every_rule_of_the_recovery_table(tmp_path: pytest.TempPathFactory) -> None:
    tmp = str(tmp_path)
    seen: set[tuple[str, str]] = set()
    for (kind, where), action in J.RECOVERY_RULES.items():
        d = _bare(tmp, f"{kind}-{where}")
        segs = J._segments(d)
        if kind == "torn":
            with open(segs[-1][1], "ab") as fh:
                fh.write(b"RJ\x00\x00\xff\x00")
            base = 60 if where == "before" else 20       # the journal ends at 40
        elif kind == "corrupt":
            f, p = segs[1]
            off, _ = record_span(p, f + 1)
            with open(p, "r+b") as fh:
                fh.seek(off + 25)
                fh.write(b"\x00\x00")
            base = f + 1 if where == "before" else f     # record f+1 is covered, or not
        else:
            f, p = segs[1]
            os.unlink(p)
            base = segs[2][0] - 1 if where == "before" else f
        rep = J.recover(d, base=base, apply=False)
        got = [(x.kind, x.where, x.action) for x in rep.findings]
        assert got == [(kind, where, action)], (kind, where, got)
        seen.add((kind, where))
        # apply: a stop keeps everything after it aside, a skip changes nothing, a cut trims
        names = sorted(os.listdir(d))
        rep2 = J.recover(d, base=base)
        assert rep2.findings == rep.findings and rep2.quarantined == rep.quarantined
        after = sorted(os.listdir(d))
        if action == "skip":
            assert after == names
        elif action == "stop":
            assert rep.quarantined and all(n + ".bad" in after or n not in rep.quarantined for n in names)
            assert len([n for n in after if n.endswith(".bad")]) == len(rep.quarantined) + (
                1 if rep.findings[0].kept_as and rep.findings[0].kept_as not in rep.quarantined else 0)
        else:
            assert after == names and J.recover(d, base=base).clean
    assert seen == set(J.RECOVERY_RULES)


# ---- replay reads the directory the same way -------------------------------------------------
def _replay(src: str, out: str) -> dict:
    from routerd.tools import cli

    args: argparse.Namespace = cli.build_parser().parse_args(["replay", src, "--out", out, "--no-plot"])
    return R.replay_command(args)


@pytest.mark.parametrize("damage", ["flip_covered", "flip_after", "torn", "snapshot_deleted",
                                    "snapshot_corrupt", "segment_deleted"])
def test_replay_and_start_up_agree(tmp_path: pytest.TempPathFactory, damage: str) -> None:
    d = str(tmp_path / "s")
    w = Writer(d, seed=7)
    w.run(110, snapshot_at=(30, 60, 90))
    snaps = J.SnapshotStore(J.snapshot_dir(d)).list()
    segs = J._segments(J.journal_dir(d))
    if damage == "flip_covered":
        flip(d, w.batch_records[75])
    elif damage == "flip_after":
        flip(d, w.batch_records[100])
    elif damage == "torn":
        with open(segs[-1][1], "ab") as fh:
            fh.write(b"RJ\x00\x00\x10\x00\x00\x00")
    elif damage == "snapshot_deleted":
        os.unlink(snaps[-1][1])
    elif damage == "snapshot_corrupt":
        with open(snaps[-1][1], "r+b") as fh:
            fh.seek(40)
            fh.write(b"\x00\x01\x02")
    else:
        os.unlink(next(p for f, p in segs if f > snaps[-1][0] + 1))
    res = _replay(d, str(tmp_path / "out"))
    svc = start_up(d)
    try:
        health = svc.health()["recovery"]
        # identical reports (health goes out as msgpack: compare through it)
        assert J.unpack(J.pack(health)) == json.loads(json.dumps(res["info"]["recovery"]))
        assert not health["clean"]
        printed = [ln[len("recovery "):] for ln in res["printed"] if ln.startswith("recovery ")]
        assert printed == health["lines"] and printed
        with open(tmp_path / "out" / "tables.json") as fh:
            assert json.load(fh)["tables"] == wire.tables_by_name(svc.engine)
        if damage == "snapshot_deleted":
            assert health["snapshots_missing"] == [os.path.basename(snaps[-1][1])]
        stopped = health["findings"] and health["findings"][-1]["action"] != "skip"
        assert (res["info"]["journal_stopped"] is not None) == bool(stopped)
        if damage in ("flip_covered", "snapshot_deleted", "snapshot_corrupt", "torn"):
            assert svc.engine is not None and svc.engine.same_state(w.eng), damage
    finally:
        stop(svc)
    # after the service applied its recovery, a replay of the directory gives its tables
    res2 = _replay(d, str(tmp_path / "out2"))
    with open(tmp_path / "out2" / "tables.json") as fh:
        assert json.load(fh)["tables"] == json.loads(json.dumps(wire.tables_by_name(svc.engine)))
    assert res2["info"]["records"] >= 1


# ---- a state dir written under the names before the rename ---------------------------------
def _to_old_names(d: str) -> tuple[list[str], list[str]]:
    """Rename every segment and snapshot of ``d`` to the names routerd 0.1.0 wrote
    (``journal/seg-<first record, 20 digits>.rj``, ``snapshots/snap-<record, 20 digits>.rs``)."""
    segs, snaps = [], []
    for first, path in J._segments(J.journal_dir(d)):
        new = os.path.join(J.journal_dir(d), f"seg-{first:020d}.rj")
        os.rename(path, new)
        segs.append(os.path.basename(new))
    for no, path in J.SnapshotStore(J.snapshot_dir(d)).list():
        new = os.path.join(J.snapshot_dir(d), f"snap-{no:020d}.rs")
        os.rename(path, new)
        snaps.append(os.path.basename(new))
    return segs, snaps


def test_a_state_dir_with_the_old_file_names_recovers_replays_and_goes_on(
        tmp_path: pytest.TempPathFactory) -> None:
    d = str(tmp_path / "s")
    w = Writer(d, seed=3)
    w.run(110, snapshot_at=(30, 60, 90))
    old_segs, old_snaps = _to_old_names(d)
    assert len(old_segs) > 2 and len(old_snaps) == 3
    assert files(d) == {os.path.join("journal", n) for n in old_segs} | {
        os.path.join("snapshots", n) for n in old_snaps}

    res = _replay(d, str(tmp_path / "out"))
    assert res["info"]["recovery"]["clean"]
    svc = start_up(d)
    try:
        rec = svc.health()["recovery"]
        assert rec["clean"] and not rec["findings"] and not rec["snapshots_missing"]
        assert rec["snapshot"]["record"] == w.snaps.list()[-1][0]     # the newest old-named one
        assert svc.engine is not None and svc.engine.same_state(w.eng)
        with open(tmp_path / "out" / "tables.json") as fh:
            assert json.load(fh)["tables"] == json.loads(json.dumps(wire.tables_by_name(svc.engine)))
    finally:
        stop(svc)
    # one old-named segment given on its own is still a segment to replay
    assert R.locate(os.path.join(J.journal_dir(d), old_segs[-1])).journal_dir

    # the new version goes on in the same directory: new files get the new names, the old
    # ones are read, appended to and retired like any other
    w.j = J.Journal(J.journal_dir(d), segment_bytes=2048)
    w.snaps = J.SnapshotStore(J.snapshot_dir(d))
    w.run(60, snapshot_at=(30,))
    names = files(d)
    assert any(n.startswith(os.path.join("snapshots", "upto-")) and n.endswith(".rdsnap") for n in names)
    assert any(n.startswith(os.path.join("journal", "from-")) and n.endswith(".rdj") for n in names)
    assert any(n.endswith(".rs") for n in names), "the older snapshots are kept as before"
    res = _replay(d, str(tmp_path / "out2"))
    svc = start_up(d)
    try:
        rec = svc.health()["recovery"]
        assert rec["clean"] and rec["snapshot"]["record"] == w.snaps.list()[-1][0]
        assert svc.engine is not None and svc.engine.same_state(w.eng)
        with open(tmp_path / "out2" / "tables.json") as fh:
            assert json.load(fh)["tables"] == json.loads(json.dumps(wire.tables_by_name(svc.engine)))
    finally:
        stop(svc)
    # the newest snapshot lost: the fallback is an old-named one, and the note names the lost one
    newest = w.snaps.list()[-1][1]
    os.unlink(newest)
    svc = start_up(d)
    try:
        rec = svc.health()["recovery"]
        assert rec["snapshots_missing"] == [os.path.basename(newest)]
        assert rec["snapshot"]["file"].endswith(".rs")
        assert svc.engine is not None and svc.engine.same_state(w.eng)
    finally:
        stop(svc)


# ---- a state dir written before the learning mode existed --------------------------------------
def test_a_state_dir_from_before_the_learning_mode_restores_the_greedy_engine_it_ran(
        tmp_path: pytest.TempPathFactory) -> None:
    """Its start record and snapshot carry no ``mode`` (nor ``split_*``) setting: that engine
    was greedy, whatever the default is today (split), so start-up and replay rebuild it as
    greedy — from the snapshot and, with the snapshot gone, from the start record."""
    d = str(tmp_path / "s")
    before = tuple(f for f in J.settings_to_dict(E.EngineSettings())
                   if f == "mode" or f.startswith("split_"))
    w = Writer(d, seed=11, settings=E.EngineSettings(mode="greedy"), drop=before)
    w.run(70, snapshot_at=(40,))
    greedy = config.load(None).with_overrides({"engine.mode": "greedy"})
    for case in ("snapshot", "journal only"):
        if case == "journal only":
            ((_, snap),) = J.SnapshotStore(J.snapshot_dir(d)).list()
            os.unlink(snap)
        r = J.restore(d, DEMO, E.EngineSettings())
        assert r.engine.settings.mode == "greedy" and r.engine.same_state(w.eng), case
        res = _replay(d, str(tmp_path / f"out-{case}"))
        with open(tmp_path / f"out-{case}" / "tables.json") as fh:
            assert json.load(fh)["tables"] == json.loads(json.dumps(wire.tables_by_name(w.eng))), case
        assert res["info"]["records"] >= 1
        svc = start_up(d, greedy)        # its config asks for greedy too: nothing to change
        try:
            assert svc.engine is not None and svc.engine.same_state(w.eng), case
        finally:
            stop(svc)
