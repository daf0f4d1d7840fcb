"""Crash safety of routerd serve: kill -9 in the middle of a stream, restart on the same state dir.

Every acknowledged batch must be in the journal (and be recognised as a duplicate when
re-sent after the restart), and the restarted service's estimates must equal an offline
replay of the journal (:func:`routerd.io.journal.restore`, read-only, on a copy taken right
after the kill) bit for bit (:meth:`Engine.same_state`).
"""
from __future__ import annotations

import os
import shutil
import signal
import tempfile
import time

import msgpack
import numpy as np
import pytest
import zmq

from routerd.agent import client
from routerd.core.engine import Engine, EngineSettings
from routerd.io import config, journal, wire
from routerd.io.inputs import load_topology
from service_harness import ServiceProc, service_args, stream_until_killed

DEMO = load_topology(config.load(None))



@pytest.mark.slow
def test_kill_9_mid_stream_then_restart_keeps_every_acknowledged_batch(base: str) -> None:
    rng = np.random.default_rng(11)
    all_acked: dict[int, dict] = {}
    first = 0
    for cycle in range(2):
        sp = ServiceProc(base, service_args(base))
        try:
            acked = stream_until_killed(sp, "crash", first, rng, acks_before_kill=150 + 100 * cycle)
        finally:
            sp.kill()
        all_acked.update(acked)
        first += 10_000
    state_dir = sp.state_dir

    # offline replay of the journal as the kill left it (a copy: restarting writes to it)
    ref_dir = tempfile.mkdtemp(prefix="rd-ref-", dir="/tmp")
    try:
        shutil.copytree(state_dir, ref_dir, dirs_exist_ok=True)
        journal.Journal(journal.journal_dir(ref_dir)).close()   # cut a torn tail, as start-up does
        in_journal = {r.body["batch"] for r in journal.iter_records(journal.journal_dir(ref_dir))
                      if r.kind == "batch"}
        ref = journal.restore(ref_dir, DEMO, EngineSettings()).engine
    finally:
        shutil.rmtree(ref_dir, ignore_errors=True)
    missing = set(all_acked) - in_journal
    assert not missing, f"acknowledged but not journaled: {sorted(missing)[:10]}"

    sp = ServiceProc(base, service_args(base))
    try:
        ctl = sp.endpoints["control"]
        updates = client.control(ctl, {"op": "health"})["counts"]["engine_updates"]
        assert updates == ref.statistics().updates
        # every node's estimates equal the offline replay's, float for float
        for x, name in enumerate(DEMO.nodes):
            got = client.control(ctl, {"op": "estimates", "node": name})["estimates"]
            assert got == wire.estimates_by_name(ref, x), name
        # re-sending acknowledged batches: acknowledged again, identically, not re-applied
        d = sp.socket(zmq.DEALER, "ingest")
        some = sorted(all_acked)[:: max(1, len(all_acked) // 40)]
        for b in some:
            # the same batch number with other content: a duplicate is told by (reporter, batch)
            d.send_multipart([b"", wire.encode_ingest_rows("crash", b, [["w1", "w2", "w3", 0.5]])])
            assert msgpack.unpackb(d.recv_multipart()[-1], raw=False) == all_acked[b]
        d.close(0)
        h = client.control(ctl, {"op": "health"})
        assert h["counts"]["engine_updates"] == updates
        assert h["counts"]["batches"]["duplicate"] == len(some)
        sp.signal(signal.SIGTERM)
        assert sp.wait(15) == 0
    finally:
        sp.kill()
    # the final snapshot holds exactly the replayed state
    state, _ = journal.SnapshotStore(journal.snapshot_dir(state_dir)).latest()
    eng = Engine.from_state(DEMO, journal.settings_from_dict(state["settings"]), state["engine"])
    assert eng.same_state(ref)


@pytest.mark.slow
@pytest.mark.parametrize("guide", [False, True])
def test_interval_snapshots_retire_segments_and_kill_9_restores_the_state_before(
        base: str, guide: bool) -> None:
    # guide (the default): every engine.optimum.interval_s a guide record and a decision
    # move the state with no input, so the estimates read before the kill may be older
    # than the state at the kill; the journal has them, and the restart must equal the
    # directory as the kill left it (offline restore).  Without it the service goes still
    # once the last batch is decided.
    cfg = f"{base}/snap.yaml"
    with open(cfg, "w", encoding="utf-8") as fh:
        fh.write(f"engine:\n  optimum: {{guide: {str(guide).lower()}}}\n"
                 "service:\n  snapshot_interval_s: 0.2\n  journal:\n    segment_bytes: 4096\n")
    sp = ServiceProc(base, [*service_args(base), "--config", cfg])
    rng = np.random.default_rng(5)
    try:
        d = sp.socket(zmq.DEALER, "ingest")
        t_end = time.monotonic() + 2.0
        n = 0
        while time.monotonic() < t_end:       # one batch at a time: nothing is in flight after
            link = rng.integers(0, DEMO.n_links, 20)
            dd = rng.integers(0, DEMO.n - 1, 20)
            dd = np.where(dd >= DEMO.src[link], dd + 1, dd)
            d.send_multipart([b"", wire.encode_ingest_cols("snap", n, DEMO.digest, DEMO.src[link],
                                                           DEMO.dst[link], dd, DEMO.delay_s[link] * 2)])
            assert msgpack.unpackb(d.recv_multipart()[-1], raw=False)["accepted"] == 20
            n += 1
        d.close(0)
        ctl = sp.endpoints["control"]
        def estimates() -> dict:
            return {x: client.control(ctl, {"op": "estimates", "node": x})["estimates"] for x in DEMO.nodes}

        before = estimates()
        # split mode's decision after the last batch refreshes entries (greedy's changes no
        # estimate): without the guide, wait until it is done and nothing moves any more
        settle = time.monotonic() + 5.0
        while not guide and time.monotonic() < settle:
            time.sleep(0.3)
            now, before = before, estimates()
            if now == before:
                break
        h = client.control(ctl, {"op": "health"})
        snaps = journal.SnapshotStore(journal.snapshot_dir(sp.state_dir)).list()
        segs = [f for f in os.listdir(journal.journal_dir(sp.state_dir)) if journal.segment_first(f)]
        assert len(snaps) == 3                                  # the last three are kept
        first_seg = min(journal.segment_first(f) or 0 for f in segs)
        assert first_seg > 1, "segments covered by every kept snapshot are retired"
        assert first_seg <= snaps[0][0] + 1                     # ... and none the oldest needs
        assert h["journal"]["bytes"] < n * 20 * 40              # far less than all batches
        sp.proc.send_signal(signal.SIGKILL)
        sp.proc.wait(10)
    finally:
        sp.kill()
    left = journal.restore(sp.state_dir, DEMO, EngineSettings()).engine     # read-only
    held = {x: wire.estimates_by_name(left, DEMO.index[x]) for x in DEMO.nodes}
    if not guide:
        assert held == before
    sp = ServiceProc(base, [*service_args(base), "--config", cfg])
    try:
        assert any("restored snapshot at record" in line for line in sp.stdout_lines)
        ctl = sp.endpoints["control"]
        for x in DEMO.nodes:
            assert client.control(ctl, {"op": "estimates", "node": x})["estimates"] == held[x], x
    finally:
        sp.kill()
