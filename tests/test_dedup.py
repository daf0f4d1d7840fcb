"""routerd.service.dedup: the byte-bounded duplicate window and the per-reporter high-water marks,
alone and inside the service's ingest path (in process, no sockets)."""
from __future__ import annotations

import os
import tracemalloc
from collections.abc import Iterator
from typing import Any

import pytest

from routerd.io import config, journal, wire
from routerd.io import topofiles as TF
from routerd.service import dedup as D
from routerd.service.daemon import SERVICE_REASONS, Service

REASONS = wire.REASONS + SERVICE_REASONS
DEMO = os.path.join(os.path.dirname(__file__), "..", "routerd", "data", "demo-lab.yaml")
TOPO = TF.load(DEMO)


def test_window_bounds_and_repeat_answers() -> None:
    d = D.Dedup(REASONS, per_reporter=3, reporters=2)
    for b in range(5):
        d.put("a", b, 1, [])
    assert [d.get("a", b) is not None for b in range(5)] == [False, False, True, True, True]
    assert d.check("a", 4) == D.Seen(D.REPEAT, 1, (), 1)
    d.put("b", 0, 2, [(0, "bad_row")] * 1000)
    assert len(d.get("b", 0)[1]) == D.REJECTIONS_KEPT      # rejections kept per batch are capped
    assert d.get("b", 0)[1][0] == (0, "bad_row")
    d.get("a", 4)
    d.put("a", 5, 1, [])                                    # "a" seen last: "b" is the oldest
    d.put("c", 0, 1, [])
    assert d.get("b", 0) is None and d.get("a", 5) is not None and d.get("c", 0) is not None
    assert d.evictions == {"window": 3, "budget": 1} and len(d) == 4
    # the marks: "a" saw 0..2 leave its window, "b" left whole with batch 0
    assert d.marks == {"a": 2, "b": 0, "c": -1}
    assert d.check("a", 2).kind == D.STALE and d.check("a", 6).kind == D.FRESH
    assert d.check("b", 0) == D.Seen(D.STALE, mark=0) and d.check("b", 1).kind == D.FRESH
    e = D.Dedup(REASONS, per_reporter=3, reporters=2)
    e.restore(d.export())
    assert e.marks == d.marks and len(e) == len(d) == 4
    assert e.get("a", 5) == d.get("a", 5) and e.evictions == {"window": 0, "budget": 0}
    with pytest.raises(KeyError):
        d.put("a", 9, 0, [(0, "no_such_reason")])      # our bug: loud


def test_restore_reads_the_older_snapshot_form() -> None:
    old = [["probe", [[17, 3, [[1, "bad_latency"], [2, "duplicate"]]], [18, 4, []]]]]
    d = D.Dedup(REASONS)
    d.restore(old)
    assert d.get("probe", 17) == (3, ((1, "bad_latency"), (2, "duplicate")))
    assert d.get("probe", 18) == (4, ())


def test_memory_under_a_flood_of_names_and_rejections_stays_within_the_budget() -> None:
    # issue 13: 4,096 names x 1,024 batches x 256 rejections took RSS to 1.87 GB
    budget = 1 << 20
    rej = [(i, REASONS[i % len(REASONS)]) for i in range(400)]
    tracemalloc.start()
    try:
        d = D.Dedup(REASONS, budget_bytes=budget, marks_budget_bytes=1 << 20)
        base = tracemalloc.get_traced_memory()[0]
        for k in range(600):
            for b in range(20):
                d.put(f"flood-{k:05d}", b, 0, rej)
            assert d.bytes <= budget
        used = tracemalloc.get_traced_memory()[0] - base
    finally:
        tracemalloc.stop()
    # the estimate is honest to within a factor of two (window plus marks)
    assert used <= 2 * (budget + d.marks_bytes), used
    assert d.evictions["budget"] > 0 and len(d.marks) == 600
    assert d.marks_bytes <= d.marks_budget_bytes


def test_new_names_are_refused_when_the_marks_are_full() -> None:
    d = D.Dedup(REASONS, marks_budget_bytes=4096)
    k = 0
    while d.check(f"r{k}", 1).kind == D.FRESH:
        d.put(f"r{k}", 1, 1, [])
        k += 1
    assert 10 < k < 4096 // D.MARK_BYTES + 1 and d.refused_full == 1
    assert d.check("r0", 2).kind == D.FRESH          # known names keep working
    assert d.check("r0", 1).kind == D.REPEAT


# ---- in the service's ingest path ------------------------------------------------------
def _cfg(state_dir: str, **kw: Any) -> config.Config:
    return config.load(None).with_overrides({
        "service.state_dir": state_dir, "service.journal.fsync": "never", **kw})


def _start(cfg: config.Config) -> Service:
    s = Service(cfg, TOPO)
    s.restore(cfg["service.state_dir"])
    return s


def _frame(reporter: str, batch: int) -> bytes:
    return wire.encode_ingest_rows(reporter, batch, [["w1", "w2", "w4", 0.002]])


def _send(s: Service, reporter: str, batch: int) -> dict[str, Any]:
    out, _ = s.ingest(_frame(reporter, batch))
    s.commit()
    return wire.decode_reply(out)


@pytest.fixture()
def small(tmp_path: Any) -> Iterator[config.Config]:
    yield _cfg(str(tmp_path / "state"), **{"service.dedup_reporters": 8})


def _victim_evicted(s: Service) -> None:
    assert _send(s, "victim", 1000)["accepted"] == 1
    assert _send(s, "victim", 1000)["accepted"] == 1          # a repeat: answered, not applied
    for k in range(8):                                         # enough other names
        assert _send(s, f"other-{k}", 1)["accepted"] == 1
    assert s.dedup.get("victim", 1000) is None


def _applied(s: Service, reporter: str, batch: int) -> int:
    return sum(1 for r in journal.iter_records(journal.journal_dir(s.cfg["service.state_dir"]))
               if r.kind == "batch" and r.body["reporter"] == reporter and r.body["batch"] == batch)


def test_an_evicted_reporters_resent_batch_is_not_applied_twice(small: config.Config) -> None:
    s = _start(small)
    try:
        _victim_evicted(s)
        before = s.counters.observations_accepted
        rep = _send(s, "victim", 1000)
        assert rep["error"].startswith("stale_batch: batch 1000 of reporter 'victim'"), rep
        assert s.counters.observations_accepted == before
        assert s.counters.refused["stale_batch"] == 1
        assert _applied(s, "victim", 1000) == 1
        assert _send(s, "victim", 1001)["accepted"] == 1          # newer numbers go through
        h = s.health()
        assert h["dedup"]["evicted_budget"] >= 1 and h["dedup"]["marks"] == 9
        assert h["counts"]["frames_refused"]["stale_batch"] == 1
    finally:
        s.close()


@pytest.mark.parametrize("with_snapshot", [True, False])
def test_marks_survive_a_restart(small: config.Config, with_snapshot: bool) -> None:
    s = _start(small)
    try:
        _victim_evicted(s)
        if with_snapshot:
            s._snapshot("request")
            _send(s, "other-0", 2)       # a journal tail after the snapshot too
    finally:
        s.close()
    s2 = _start(small)                   # from the snapshot + tail, or the journal alone
    try:
        assert s2.dedup.marks["victim"] == 1000
        assert _send(s2, "victim", 1000)["error"].startswith("stale_batch")
        assert _applied(s2, "victim", 1000) == 1
    finally:
        s2.close()


def test_new_reporter_names_refused_when_marks_are_full(tmp_path: Any) -> None:
    s = _start(_cfg(str(tmp_path / "s"), **{"service.dedup_marks_budget_bytes": 4096}))
    try:
        k = 0
        while "accepted" in (rep := _send(s, f"name-{k}", 1)):
            k += 1
        assert rep["error"].startswith(f"reporters_full: reporter 'name-{k}' is new"), rep
        assert s.counters.refused["reporters_full"] == 1
        assert _send(s, "name-0", 2)["accepted"] == 1      # known reporters keep working
    finally:
        s.close()
