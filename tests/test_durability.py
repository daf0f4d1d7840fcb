"""Durability of a state directory under real processes: one writer per directory (the
lock), recovery from damage, and the crash-and-corrupt loop.

Runs real ``routerd serve`` processes on ipc:// endpoints under a short /tmp dir
(tests/service_harness.py).
"""
from __future__ import annotations

import os
import signal
import subprocess
import sys

import msgpack
import numpy as np
import pytest
import zmq

from routerd.io import journal, wire
from service_harness import DEMO, ServiceProc, service_args, stream_until_killed


def journal_bytes(state_dir: str) -> dict[str, bytes]:
    """Every file under journal/ and snapshots/, name -> content."""
    out: dict[str, bytes] = {}
    for sub in ("journal", "snapshots"):
        d = os.path.join(state_dir, sub)
        for name in sorted(os.listdir(d)) if os.path.isdir(d) else []:
            with open(os.path.join(d, name), "rb") as fh:
                out[f"{sub}/{name}"] = fh.read()
    return out


def settled_bytes(state_dir: str) -> dict[str, bytes]:
    """The files once the service has journaled its debounced decision (nothing changes
    for 0.5 s)."""
    import time

    prev = journal_bytes(state_dir)
    for _ in range(40):
        time.sleep(0.5)
        cur = journal_bytes(state_dir)
        if cur == prev:
            return cur
        prev = cur
    raise AssertionError("the state dir never settled")


def run_cli(*argv: str, timeout: float = 60) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "routerd", *argv], capture_output=True,
                          text=True, timeout=timeout, check=False)


def send_some(sp: ServiceProc, reporter: str, first: int, n: int, rng: np.random.Generator) -> None:
    d = sp.socket(zmq.DEALER, "ingest")
    try:
        for b in range(first, first + n):
            link = rng.integers(0, DEMO.n_links, 20)
            dd = rng.integers(0, DEMO.n - 1, 20)
            dd = np.where(dd >= DEMO.src[link], dd + 1, dd)
            d.send_multipart([b"", wire.encode_ingest_cols(reporter, b, DEMO.digest, DEMO.src[link],
                                                           DEMO.dst[link], dd, DEMO.delay_s[link] * 2)])
            rep = msgpack.unpackb(d.recv_multipart()[-1], raw=False)
            assert rep.get("accepted") == 20, rep
    finally:
        d.close(0)


# ---- item 2: one writer per state directory ----------------------------------------------
@pytest.mark.slow
def test_second_serve_on_a_live_state_dir_exits_2_and_writes_nothing(base: str) -> None:
    # no guide: its records and decisions (every engine.optimum.interval_s) would move the
    # first service's journal with no input, and the check below is byte for byte
    quiet = ("--set", "engine.optimum.guide=false")
    sp = ServiceProc(base, service_args(base, *quiet))
    try:
        send_some(sp, "first", 0, 5, np.random.default_rng(1))
        before = settled_bytes(sp.state_dir)
        assert any(k.startswith("journal/") for k in before)
        # the very same command line (ipc endpoints too), and one with endpoints of its own
        other = os.path.join(base, "x")
        os.mkdir(other)
        for args in (service_args(base, *quiet),
                     [*service_args(other)[:-2], "--state-dir", sp.state_dir, *quiet]):
            r = run_cli("serve", *args)
            assert r.returncode == 2, r.stdout + r.stderr
            assert f"pid {sp.proc.pid}" in r.stderr and os.path.abspath(sp.state_dir) in r.stderr, r.stderr
            assert "ready" not in r.stdout
            assert journal_bytes(sp.state_dir) == before       # byte for byte
        # the first one still owns its sockets and keeps acknowledging
        send_some(sp, "first", 5, 3, np.random.default_rng(2))
        # replay reading the live dir is fine; replay writing into it is not
        out_inside = os.path.join(sp.state_dir, "replay-out")
        r = run_cli("replay", sp.state_dir, "--out", out_inside, "--no-plot", "--quiet")
        assert r.returncode == 2, r.stdout + r.stderr
        assert f"pid {sp.proc.pid}" in r.stderr and not os.path.exists(out_inside)
        r = run_cli("replay", sp.state_dir, "--out", os.path.join(base, "ro"), "--no-plot", "--quiet")
        assert r.returncode == 0, r.stdout + r.stderr
    finally:
        sp.kill()
    # the holder is gone (kill -9): its lock died with it
    sp = ServiceProc(base, service_args(base))
    sp.kill()
    assert journal.iter_records(journal.journal_dir(sp.state_dir)) is not None


# ---- acceptance: the crash-and-corrupt loop ----------------------------------------------------
LOOP_CFG = """\
service:
  snapshot_interval_s: 0.15
  debounce_s: 0.02
  journal:
    segment_bytes: 8192
"""
CORRUPTIONS = ("flip_before_snapshot", "torn_tail", "delete_snapshot", "lock_race")


def record_spans(state_dir: str) -> list[tuple[str, int, int, int]]:
    """(segment path, record number, offset, length) of every record, read by hand."""
    import struct

    out = []
    for _, seg in journal._segments(journal.journal_dir(state_dir)):
        with open(seg, "rb") as fh:
            data = fh.read()
        off = 16
        while off + 20 <= len(data):
            length, no = struct.unpack_from("<IQ", data, off + 4)
            if off + 20 + length > len(data):
                break
            out.append((seg, no, off, 20 + length))
            off += 20 + length
    return out


def corrupt(state_dir: str, what: str, rng: np.random.Generator) -> str:
    """Damage the state dir of a killed service; returns what was done (for messages)."""
    snaps = journal.SnapshotStore(journal.snapshot_dir(state_dir)).list()
    if what == "flip_before_snapshot" and snaps:
        newest = snaps[-1][0]
        spans = [s for s in record_spans(state_dir) if s[1] <= newest]
        if spans:
            seg, no, off, length = spans[int(rng.integers(len(spans)))]
            at = off + int(rng.integers(length))
            with open(seg, "r+b") as fh:
                fh.seek(at)
                b = fh.read(1)[0]
                fh.seek(at)
                fh.write(bytes([b ^ (1 << int(rng.integers(8)))]))
            return f"flipped a bit of record {no} (snapshot at {newest})"
        what = "torn_tail"
    if what == "delete_snapshot" and snaps:
        no, path = snaps[int(rng.integers(len(snaps)))]
        os.unlink(path)
        return f"deleted snapshot {no} of {[n for n, _ in snaps]}"
    # a torn tail: half a record appended, as a write cut short leaves it
    seg = journal._segments(journal.journal_dir(state_dir))[-1][1]
    with open(seg, "ab") as fh:
        fh.write(b"RJ\x00\x00" + int(rng.integers(50, 500)).to_bytes(4, "little")
                 + bytes(rng.integers(0, 256, int(rng.integers(0, 30)), dtype=np.uint8)))
    return "torn tail"


def engine_counts(sp: ServiceProc) -> np.ndarray:
    """The service's per-entry update counts N, read from a snapshot it writes on request."""
    import time

    from routerd.agent import client

    rec = client.control(sp.endpoints["control"], {"op": "snapshot"}, timeout_s=10)["snapshot"]["record"]
    path = os.path.join(journal.snapshot_dir(sp.state_dir), journal.snapshot_name(rec))
    for _ in range(50):       # written before the reply; the loop may have moved past it
        if os.path.exists(path):
            break
        time.sleep(0.05)
    state, _ = journal.SnapshotStore.read(path)
    return np.asarray(state["engine"]["N"])


@pytest.mark.slow
def test_crash_and_corrupt_loop(base: str) -> None:
    """20 rounds of kill -9 under a reporter, one seeded random corruption per round,
    each round checked against an independent engine fed every acknowledged batch once:
    zero acknowledged rows lost, zero applied twice."""
    import time

    from routerd.agent import client
    from routerd.core.engine import Engine, EngineSettings

    cfg = os.path.join(base, "loop.yaml")
    with open(cfg, "w", encoding="utf-8") as fh:
        fh.write(LOOP_CFG)
    args = [*service_args(base), "--config", cfg]
    rng = np.random.default_rng(20261203)
    ref = Engine(DEMO, EngineSettings())
    applied: set[int] = set()
    pending: dict[int, bytes] = {}        # sent, never acknowledged: the reporter sends them again
    nxt = 0
    t0 = time.monotonic()
    stats = {"acked": 0, "resent": 0, "duplicates": 0, "rows": 0, "rounds": 0}
    seen_kinds: set[str] = set()
    last_damage = "none"

    def feed(batch: int, frame: bytes, ack: dict) -> None:
        assert "error" not in ack, (batch, ack)
        if batch in applied:
            return
        ing = wire.decode_ingest(frame, DEMO)
        assert not isinstance(ing, wire.WireError)
        keep = np.ones(len(ing.hops), dtype=bool)
        for row, _reason in ack.get("rejected", ()):
            keep[row] = False
        res = ref.observe(ing.hops.take(np.flatnonzero(keep)), now=0.0)
        assert not res.rejected
        applied.add(batch)
        stats["rows"] += res.accepted

    for rnd in range(21):                  # 20 crash rounds, then a last clean check
        sp = ServiceProc(base, args)
        try:
            h = client.control(sp.endpoints["control"], {"op": "health"})
            rec = h["recovery"]
            assert not [f for f in rec["findings"] if f["action"] == "stop"], (rnd, last_damage, rec["lines"])
            if last_damage.startswith("flipped"):
                assert any(f["kind"] == "corrupt" and f["where"] == "before" for f in rec["findings"]) \
                    or any(f["action"] == "cut" for f in rec["findings"]), (last_damage, rec["lines"])
            if last_damage == "torn tail":
                assert any(f["action"] == "cut" for f in rec["findings"]), rec["lines"]
            # the reporter sends what was never acknowledged again: applied once, or a duplicate
            d = sp.socket(zmq.DEALER, "ingest")
            try:
                for b in sorted(pending):
                    d.send_multipart([b"", pending[b]])
                    try:
                        got = d.recv_multipart()
                    except zmq.Again:      # say what the service was doing, not only "Again"
                        raise AssertionError(
                            f"round {rnd}: no ack in 10 s for resent batch {b} after {last_damage}; "
                            f"service exit code {sp.proc.poll()}; stderr tail:\n"
                            + "\n".join(sp.stderr_lines[-30:])) from None
                    ack = msgpack.unpackb(got[-1], raw=False)
                    stats["resent"] += 1
                    feed(b, pending[b], ack)
            finally:
                d.close(0)
            pending.clear()
            # every acknowledged row is in the engine exactly once: the total and per entry
            h = client.control(sp.endpoints["control"], {"op": "health"})
            stats["duplicates"] += h["counts"]["batches"].get("duplicate", 0)
            assert h["counts"]["engine_updates"] == ref.statistics().updates, (rnd, last_damage)
            assert np.array_equal(engine_counts(sp), ref.N), (rnd, last_damage)
            if rnd == 20:
                sp.signal(signal.SIGTERM)
                assert sp.wait(20) == 0
                break
            what = CORRUPTIONS[int(rng.integers(len(CORRUPTIONS)))]
            seen_kinds.add(what)
            sent: dict[int, bytes] = {}

            def race(sp: ServiceProc = sp) -> None:
                r = run_cli("serve", *args)
                assert r.returncode == 2 and f"pid {sp.proc.pid}" in r.stderr, r.stderr

            acked = stream_until_killed(sp, "loop", nxt, rng, int(rng.integers(20, 90)), sent=sent,
                                        before_kill=race if what == "lock_race" else None)
        finally:
            sp.kill()
        for b in sorted(acked):
            feed(b, sent[b], acked[b])
        stats["acked"] += len(acked)
        pending = {b: f for b, f in sent.items() if b not in acked}
        nxt += len(sent)
        last_damage = "lock race" if what == "lock_race" else corrupt(sp.state_dir, what, rng)
        stats["rounds"] += 1
    took = time.monotonic() - t0
    print(f"crash-and-corrupt loop: {stats['rounds']} rounds, {stats['acked']} batches acknowledged "
          f"before the kills, {stats['resent']} re-sent ({stats['duplicates']} already journaled), "
          f"{stats['rows']} rows, corruptions {sorted(seen_kinds)}, {took:.1f} s")
    assert stats["rounds"] == 20 and seen_kinds == set(CORRUPTIONS)


@pytest.mark.slow
def test_banner_health_and_replay_report_recovery_alike(base: str) -> None:
    """One damaged directory: the start-up banner's ``recovery`` lines, ``health``'s
    ``recovery`` and ``routerd replay``'s printed lines and ``replay.json`` say the same."""
    import json
    import time

    from routerd.agent import client

    cfg = os.path.join(base, "c.yaml")
    with open(cfg, "w", encoding="utf-8") as fh:
        fh.write("service:\n  snapshot_interval_s: 1000\n  journal:\n    segment_bytes: 4096\n")
    args = [*service_args(base), "--config", cfg]
    sp = ServiceProc(base, args)
    rng = np.random.default_rng(3)
    try:
        for i in range(3):
            send_some(sp, "r", 40 * i, 40, rng)
            client.control(sp.endpoints["control"], {"op": "snapshot"}, timeout_s=10)
        send_some(sp, "r", 120, 30, rng)
        time.sleep(0.3)
        sp.proc.send_signal(signal.SIGKILL)
        sp.proc.wait(10)
    finally:
        sp.kill()
    snaps = journal.SnapshotStore(journal.snapshot_dir(sp.state_dir)).list()
    assert len(snaps) == 3
    # three kinds at once: the newest snapshot deleted (recovery falls back to the one
    # before), a record that one covers flipped (reported, costs nothing), a torn tail (cut)
    os.unlink(snaps[-1][1])
    spans = [s for s in record_spans(sp.state_dir) if s[1] <= snaps[-2][0]]
    assert spans, "the journal is kept back to the oldest kept snapshot"
    seg, no, off, length = spans[-1]
    with open(seg, "r+b") as fh:
        fh.seek(off + length // 2)
        fh.write(b"\xee")
    last = journal._segments(journal.journal_dir(sp.state_dir))[-1][1]
    with open(last, "ab") as fh:
        fh.write(b"RJ\x00")
    out = os.path.join(base, "replay")
    r = run_cli("replay", sp.state_dir, "--out", out, "--no-plot")
    assert r.returncode == 0, r.stderr
    replay_lines = [ln[len("recovery "):] for ln in r.stdout.splitlines() if ln.startswith("recovery ")]
    with open(os.path.join(out, "replay.json"), encoding="utf-8") as fh:
        replay_rec = json.load(fh)["recovery"]
    sp = ServiceProc(base, args)
    try:
        banner = [ln[len("  recovery "):] for ln in sp.stdout_lines if ln.startswith("  recovery ")]
        health = client.control(sp.endpoints["control"], {"op": "health"})["recovery"]
    finally:
        sp.kill()
    assert replay_lines == banner == health["lines"] and len(banner) >= 3, (replay_lines, banner)
    assert replay_rec == health
    assert health["snapshots_missing"] == [os.path.basename(snaps[-1][1])]
    kinds = [(f["kind"], f["where"], f["action"]) for f in health["findings"]]
    assert kinds == [("corrupt", "before", "skip"), ("torn", "after", "cut")], kinds
    assert health["findings"][0]["lost"] == [no, no] and not health["set_aside"]
    assert health["snapshot"]["record"] == snaps[-2][0]
