"""routerd.service.pipeline: the ingest stages as a pure object (frames and times in; answers,
journal records and counts out), alone and as the service drives it on a fake clock."""
from __future__ import annotations

import dataclasses
import os
from typing import Any

import numpy as np
import pytest

from routerd.core.engine import Engine, EngineSettings
from routerd.io import config, journal, security, wire
from routerd.io import topofiles as TF
from routerd.io.clock import FakeClock
from routerd.service import pipeline as P
from routerd.service.daemon import Service
from routerd.service.metrics import Counters

DEMO = os.path.join(os.path.dirname(__file__), "..", "routerd", "data", "demo-lab.yaml")
TOPO = TF.load(DEMO)
GOOD = ["w1", "w2", "w3", 0.002]


def _cfg(**kw: Any) -> config.Config:
    return config.load(None).with_overrides(kw) if kw else config.load(None)


def _pipe(**kw: Any) -> P.Pipeline:
    cfg = _cfg(**kw)
    return P.Pipeline(TOPO, cfg, engine=Engine(TOPO, EngineSettings.from_config(cfg)))


def _peer(name: str, nodes: list[str]) -> security.Reporter:
    m = np.zeros(TOPO.n, dtype=bool)
    m[[TOPO.index[x] for x in nodes]] = True
    return security.Reporter(name, name.encode().ljust(40, b"."), tuple(nodes), m)


def _code(fed: P.Fed) -> str:
    return str(wire.decode_reply(fed.answer)["error"]).split(":", 1)[0]


def test_an_applied_batch_gives_its_ack_its_record_and_its_counts() -> None:
    p = _pipe()
    frame = wire.encode_ingest_rows("r", 7, [GOOD, ["w1", "w2", "w3", float("nan")]],
                                    links=[["w3", "e3", "down"]])
    fed = p.feed(frame, None, 1000.5, 3.0)
    assert wire.decode_reply(fed.answer) == {"v": 1, "batch": 7, "accepted": 2,
                                             "rejected": [[1, "bad_latency"]]}
    assert fed.batch == 7 and fed.touched and not fed.refused
    [(kind, body)] = fed.records
    # the record is what replay applies: the accepted hop, the link, the wall time given
    assert kind == "batch" and body["t"] == 1000.5 and body["links"] == [[TOPO.index["w3"], TOPO.index["e3"], False]]
    assert len(journal.batch_hops(body)) == 1 and body["ack"]["accepted"] == 2
    c = fed.counts
    assert (c.result, c.refused, c.rejected, c.observations, c.link_reports) == \
        ("accepted", None, (("bad_latency", 1),), 1, 1)
    assert c.update_s is None          # no timer given: the pipeline reads no clock
    with pytest.raises(dataclasses.FrozenInstanceError):
        fed.answer = b""               # type: ignore[misc]


def test_a_resent_batch_is_answered_from_the_window_and_makes_no_record() -> None:
    p = _pipe()
    frame = wire.encode_ingest_rows("r", 1, [GOOD])
    first = p.feed(frame, None, 1.0, 1.0)
    again = p.feed(frame, None, 2.0, 2.0)
    assert again.answer == first.answer and again.records == () and not again.touched
    assert again.counts.result == "duplicate" and again.counts.rejected == (("duplicate", 1),)


def test_rate_limits_run_on_the_time_passed_in() -> None:
    # one batch per second, a burst of one: no sleeping, the test moves the time
    p = _pipe(**{"guards.rate.batches_per_s": 1.0, "guards.rate.burst_batches": 1.0})
    assert not p.feed(wire.encode_ingest_rows("r", 1, [GOOD]), None, 0.0, 10.0).refused
    late = p.feed(wire.encode_ingest_rows("r", 2, [GOOD]), None, 0.0, 10.5)
    assert _code(late) == "rate_limited" and late.records == () and late.counts.refused == "rate_limited"
    assert not p.feed(wire.encode_ingest_rows("r", 2, [GOOD]), None, 0.0, 11.6).refused


def test_storage_down_answers_unavailable_after_decode_and_who() -> None:
    p = _pipe()
    p.down = "ENOSPC: No space left on device"
    assert _code(p.feed(b"\xc1", None, 0.0, 0.0)) == "not_msgpack"      # decode still answers
    fed = p.feed(wire.encode_ingest_rows("r", 1, [GOOD]), None, 0.0, 0.0)
    assert _code(fed) == "unavailable" and "ENOSPC" in wire.decode_reply(fed.answer)["error"]
    assert fed.records == () and p.dedup.check("r", 1).kind == "fresh"  # nothing remembered
    p.down = None
    assert not p.feed(wire.encode_ingest_rows("r", 1, [GOOD]), None, 0.0, 0.0).refused


def test_curve_binds_the_key_to_its_reporter_and_its_nodes() -> None:
    p = _pipe()
    w1 = _peer("w1", ["w1"])
    p.allow = security.Allow("<test>", [w1])
    frame = wire.encode_ingest_rows("w1", 1, [GOOD, ["w4", "w5", "w6", 0.001]],
                                    links=[["w3", "e3", "down"]])
    assert _code(p.feed(frame, None, 0.0, 0.0)) == "not_authorised"     # no allowed key
    other = wire.encode_ingest_rows("w2", 1, [GOOD])
    assert _code(p.feed(other, w1, 0.0, 0.0)) == "not_authorised"     # the key of another name
    fed = p.feed(frame, w1, 0.0, 0.0)
    assert wire.decode_reply(fed.answer)["rejected"] == [[1, "not_authorised"], [2, "not_authorised"]]
    assert fed.counts.observations == 1 and fed.counts.link_reports == 0


def test_without_an_engine_admit_stops_at_the_split_and_settle_remembers() -> None:
    front = P.Pipeline(TOPO, _cfg())
    frame = wire.encode_ingest_rows("r", 3, [GOOD, ["w1", "zz", "w3", 0.001]])
    ing = front.admit(frame, None, 0.0)
    assert isinstance(ing, wire.Ingest) and ing.rejected == ((1, "unknown_node"),)
    with pytest.raises(RuntimeError, match="needs an engine"):
        front.feed(frame, None, 0.0, 0.0)
    done = front.settle("r", 3, 1, [[1, "unknown_node"]])
    dup = front.admit(frame, None, 0.0)
    assert isinstance(dup, P.Fed) and dup.answer == done.answer and dup.counts.result == "duplicate"


def test_counts_are_checked_and_add_up_in_the_counters() -> None:
    with pytest.raises(ValueError):
        P.Counts(result="refused")                      # a refusal names its code
    with pytest.raises(ValueError):
        P.Counts(result="maybe")
    c = Counters(row_reasons=wire.REASONS + P.SERVICE_REASONS,
                 frame_reasons=wire.FRAME_ERRORS + P.SERVICE_FRAME_ERRORS)
    p = _pipe()
    c.add(p.feed(wire.encode_ingest_rows("r", 1, [GOOD, ["w1", "w2", "w3", -1.0]]), None, 0, 0).counts)
    c.add(P.extra_frames(2).counts)
    assert c.batches == {"accepted": 1, "duplicate": 0, "refused": 1}
    assert c.refused["extra_frames"] == 1 and c.observations_rejected["bad_latency"] == 1
    assert c.observations_accepted == 1 and c.td_error.count == 1


def test_the_service_drives_the_pipeline_on_its_clock(tmp_path: Any) -> None:
    clock = FakeClock(start=50.0)
    cfg = _cfg(**{"service.state_dir": str(tmp_path / "st"), "service.journal.fsync": "never",
                  "guards.rate.batches_per_s": 1.0, "guards.rate.burst_batches": 1.0})
    svc = Service(cfg, TOPO, clock=clock, out=open(os.devnull, "w"))  # noqa: SIM115
    try:
        assert svc.epoch == clock.wall_ns()
        svc.restore()
        out, b = svc.ingest(wire.encode_ingest_rows("r", 1, [GOOD]))
        assert b == 1 and "accepted" in wire.decode_reply(out)
        out, _ = svc.ingest(wire.encode_ingest_rows("r", 2, [GOOD]))
        assert wire.decode_reply(out)["error"].startswith("rate_limited")
        clock.advance(1.0)
        out, _ = svc.ingest(wire.encode_ingest_rows("r", 2, [GOOD]))
        assert "accepted" in wire.decode_reply(out)
        svc.commit()
        batches = [r for r in journal.iter_records(journal.journal_dir(cfg["service.state_dir"]))
                   if r.kind == "batch"]
        # the journal's times are the clock's wall time
        assert [r.body["t"] for r in batches] == [clock.wall() - 1.0, clock.wall()]
        assert svc.uptime_s() == 1.0
        assert svc.counters.refused["rate_limited"] == 1 and svc.counters.batches["accepted"] == 2
        assert svc.counters.update_duration.count == 2     # the service measures the engine
        assert svc.engine is svc.pipeline.engine and svc.dedup is svc.pipeline.dedup
    finally:
        svc.close()
        svc.out.close()


def test_the_readme_states_the_size_rule_the_sockets_use() -> None:
    # the promise and the behaviour are one: answered `oversized` up to the slack, beyond it
    # the connection is cut (tests/test_service.py drives both against a real service)
    from routerd.service.daemon import OVERSIZE_ANSWER_SLACK

    with open(os.path.join(os.path.dirname(__file__), "..", "README.md"), encoding="utf-8") as fh:
        readme = " ".join(fh.read().split())
    assert OVERSIZE_ANSWER_SLACK == 1 << 20
    assert "answered `oversized` when it is at most 1 MiB over the limit" in readme
    assert "A frame more than 1 MiB over it gets no answer" in readme


def test_envelope_splits_routing_id_and_delimiter_from_the_payload() -> None:
    assert P.envelope([b"id", b"", b"x"], routed=True) == ([b"id", b""], [b"x"])
    assert P.envelope([b"id", b"x"], routed=True) == ([b"id"], [b"x"])
    assert P.envelope([b"", b"x"], routed=False) == ([b""], [b"x"])
    assert P.envelope([b""], routed=False) == ([], [b""])          # an empty payload is a payload
    env, body = P.envelope([b"id", b"", b"x", b"y"], routed=True)
    assert env == [b"id", b""] and _code(P.extra_frames(len(body))) == "extra_frames"
