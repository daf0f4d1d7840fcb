"""Fuzzing the decoder and the whole ingest path (hypothesis; .ci/fuzz_ingest.py runs atheris).

Every input gets an answer — an acknowledgement whose accepted and rejected rows add up
to the batch's rows, or an error with a code from the fixed set — and nothing escapes.
After all of it the engine equals an offline replay of the journal.
"""
from __future__ import annotations

import os
from collections.abc import Iterator
from typing import Any

import msgpack
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from routerd.core.engine import EngineSettings
from routerd.io import config, journal, security, wire
from routerd.io import topofiles as TF
from routerd.service.daemon import SERVICE_FRAME_ERRORS, Service

DEMO = os.path.join(os.path.dirname(__file__), "..", "routerd", "data", "demo-lab.yaml")
TOPO = TF.load(DEMO)
NAMES = list(TOPO.nodes)

# ---- strategies -------------------------------------------------------------------------------
scalars = st.one_of(st.none(), st.booleans(), st.integers(-2**63, 2**64 - 1),
                    st.floats(allow_nan=True, allow_infinity=True), st.text(max_size=8),
                    st.binary(max_size=16))
node_like = st.one_of(st.sampled_from(NAMES), st.text(max_size=4), st.integers(-3, 40), st.none())
num_like = st.one_of(st.floats(-1.0, 2.0), st.floats(allow_nan=True, allow_infinity=True),
                     st.integers(-5, 5), st.just(1e-9), st.just(0.0), st.text(max_size=2), st.none())
hop_row = st.one_of(
    st.tuples(node_like, node_like, node_like, num_like).map(list),
    st.tuples(node_like, node_like, node_like, num_like, num_like).map(list),
    st.lists(scalars, max_size=6),
    scalars,
)
link_row = st.one_of(st.tuples(node_like, node_like, st.sampled_from(["up", "down", "sideways", 1])
                               ).map(list), st.lists(scalars, max_size=4), scalars)
LINKS = [(NAMES[int(a)], NAMES[int(b)], float(d)) for a, b, d in zip(TOPO.src, TOPO.dst, TOPO.delay_s)]
# a hop over a real link, latency from below its propagation delay to well above it
good_hop = st.tuples(st.sampled_from(LINKS), st.sampled_from(NAMES), st.floats(0.0, 20.0)).map(
    lambda t: [t[0][0], t[0][1], t[1], t[0][2] * t[2]])


def _cols_blob(draw: Any) -> dict[str, Any]:
    m = draw(st.integers(0, 6))
    def col(dt: str, elems: Any) -> bytes:
        return np.array(draw(st.lists(elems, min_size=m, max_size=m)), dtype=dt).tobytes()
    cols: dict[str, Any] = {"from": col("<i4", st.integers(-2, 20)),
                            "via": col("<i4", st.integers(-2, 20)),
                            "dst": col("<i4", st.integers(-2, 20)),
                            "latency_s": col("<f8", st.floats(allow_nan=True, allow_infinity=True))}
    if draw(st.booleans()):
        cols["estimate_s"] = col("<f8", st.floats(allow_nan=True, allow_infinity=True))
    if draw(st.booleans()):
        k = draw(st.sampled_from(list(cols)))
        cols[k] = draw(st.one_of(st.binary(max_size=9), scalars))   # damaged column
    return cols


@st.composite
def batches(draw: Any) -> dict[Any, Any]:
    """Mostly well-formed headers (so the rows get exercised), sometimes one damaged field."""
    obj: dict[Any, Any] = {"v": 1, "reporter": draw(st.sampled_from(["w1", "e3", "x"])),
                           "batch": draw(st.one_of(st.integers(0, 2**40), st.integers(0, 3)))}
    if draw(st.booleans()):
        obj["cols"] = _cols_blob(draw)
        obj["topology"] = TOPO.digest
    else:
        obj["hops"] = draw(st.lists(st.one_of(*[good_hop] * 8, hop_row), max_size=12))
    if draw(st.booleans()):
        obj["links"] = draw(st.lists(link_row, max_size=4))
    damage = draw(st.sampled_from(["none"] * 9 + ["field", "pop", "extra"]))
    if damage == "field":
        obj[draw(st.sampled_from(["v", "reporter", "batch", "topology", "hops", "cols",
                                  "links"]))] = draw(scalars)
    elif damage == "pop":
        obj.pop(draw(st.sampled_from(["v", "reporter", "batch", "topology"])), None)
    elif damage == "extra":
        obj[draw(st.one_of(st.text(max_size=5), st.integers(-100, 100)))] = draw(scalars)
    return obj


@st.composite
def plausible(draw: Any) -> dict[str, Any]:
    """Well-formed batches of hops over real links (named or columnar), now and then one
    odd row: what a reporter under test, or an attacker within the format, sends."""
    hops = draw(st.lists(good_hop, min_size=1, max_size=16))
    if draw(st.sampled_from([False, False, True])):
        hops.insert(draw(st.integers(0, len(hops))), draw(hop_row))
    obj: dict[str, Any] = {"v": 1, "reporter": draw(st.sampled_from(["w1", "e3", "x"])),
                           "batch": draw(st.integers(0, 2**40))}
    if draw(st.booleans()) and all(isinstance(h, list) and len(h) == 4 and isinstance(h[3], float)
                                   and all(isinstance(v, str) and v in TOPO.index for v in h[:3])
                                   for h in hops):
        ix = TOPO.index
        obj["topology"] = TOPO.digest
        obj["cols"] = {"from": np.array([ix[h[0]] for h in hops], "<i4").tobytes(),
                       "via": np.array([ix[h[1]] for h in hops], "<i4").tobytes(),
                       "dst": np.array([ix[h[2]] for h in hops], "<i4").tobytes(),
                       "latency_s": np.array([h[3] for h in hops], "<f8").tobytes()}
    else:
        obj["hops"] = hops
    if draw(st.booleans()):
        obj["links"] = [[a, b, draw(st.sampled_from(["up", "down"]))]
                        for a, b, _ in draw(st.lists(st.sampled_from(LINKS), max_size=2))]
    return obj


def _pack(obj: Any) -> bytes:
    return msgpack.packb(obj, use_bin_type=True)


frames = st.one_of(batches().map(_pack), batches().map(_pack), batches().map(_pack),
                   st.binary(max_size=200), st.lists(scalars, max_size=4).map(_pack))


def _accounted(ing: wire.Ingest) -> None:
    rows = set(ing.hop_rows.tolist()) | set(ing.link_rows)
    rej = {r for r, _ in ing.rejected}
    assert not rows & rej
    assert rows | rej == set(range(ing.rows_total))


# ---- the decoder ---------------------------------------------------------------------------------
@settings(max_examples=800, deadline=None)
@given(frames)
def test_decoder_never_raises_and_accounts_for_every_row(frame: bytes) -> None:
    out = wire.decode_ingest(frame, TOPO, max_rows=64, max_bytes=4096)
    if isinstance(out, wire.WireError):
        assert out.code in wire.FRAME_ERRORS
        assert "internal decoder error" not in out.reason
    else:
        _accounted(out)


@settings(max_examples=200, deadline=None)
@given(st.binary(max_size=300))
def test_control_decoder_never_raises(frame: bytes) -> None:
    out = wire.decode_control(frame, TOPO)
    assert isinstance(out, (dict, wire.WireError))


# ---- the whole ingest path, in process ----------------------------------------------------------
@pytest.fixture(scope="module")
def svc(tmp_path_factory: Any) -> Iterator[Service]:
    d = tmp_path_factory.mktemp("fuzzstate")
    cfg = config.load(None).with_overrides({
        "service.state_dir": str(d), "service.journal.fsync": "never", "service.max_rows": 64,
        "service.max_message_bytes": 4096, "guards.jump.factor": 8.0,
        "guards.rate.batches_per_s": 200.0, "guards.rate.burst_batches": 20.0})
    s = Service(cfg, TOPO)
    s.restore(str(d))
    yield s
    s.close()


def _peer(name: str, nodes: list[str]) -> security.Reporter:
    m = np.zeros(TOPO.n, dtype=bool)
    m[[TOPO.index[x] for x in nodes]] = True
    return security.Reporter(name, name.encode().ljust(40, b"."), tuple(nodes), m)


PEERS = [None, _peer("w1", ["w1", "w2"]), _peer("e3", ["e3"])]


_fresh = iter(range(10**6, 10**9))
wire_objects = st.one_of(plausible(), plausible(), plausible(), batches(), st.binary(max_size=200),
                         st.lists(scalars, max_size=4))


@settings(max_examples=600, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(obj=wire_objects, fresh=st.sampled_from([True, True, True, False]),
       who=st.sampled_from(["own", "own", "other", "none"]), curve=st.booleans())
def test_whole_ingest_path_answers_everything(svc: Service, obj: Any, fresh: bool, who: str,
                                              curve: bool) -> None:
    if isinstance(obj, dict) and isinstance(obj.get("batch"), int) and fresh:
        obj["batch"] = next(_fresh)          # mostly new batch numbers: the rows get applied
    frame = obj if isinstance(obj, bytes) else _pack(obj)
    by_name = {p.name: p for p in PEERS if p is not None}
    rep_name = obj.get("reporter") if isinstance(obj, dict) else None
    peer = (by_name.get(rep_name) if who == "own" and isinstance(rep_name, str) else
            by_name["e3"] if who == "other" else None)
    svc.allow = security.Allow("<fuzz>", list(by_name.values())) if curve else None
    dups = svc.counters.batches["duplicate"]
    try:
        answer, _ = svc.ingest(frame, peer if curve else None)
    finally:
        svc.allow = None
    rep = wire.decode_reply(answer)
    if "error" in rep:
        code = rep["error"].split(":", 1)[0]
        assert code in wire.FRAME_ERRORS + SERVICE_FRAME_ERRORS, rep
        assert "internal" not in rep["error"]
    else:
        ing = wire.decode_ingest(frame, TOPO, max_rows=64, max_bytes=4096)
        assert isinstance(ing, wire.Ingest)
        rows = [r for r, _ in rep["rejected"]]
        assert len(rows) == len(set(rows))
        if svc.counters.batches["duplicate"] == dups:   # a re-ack repeats the first answer
            assert rep["accepted"] + len(rows) == ing.rows_total
        reasons = {x for _, x in rep["rejected"]}
        assert reasons <= set(svc.counters.observations_rejected)
    svc.commit()


def test_after_the_fuzzing_the_engine_equals_a_replay_of_the_journal(svc: Service) -> None:
    # runs after the property test above (file order): everything applied was journaled
    r = journal.restore(svc.cfg["service.state_dir"], TOPO, EngineSettings.from_config(svc.cfg))
    assert svc.engine is not None
    assert r.engine.same_state(svc.engine)
    c = svc.counters
    # the strategies reach the rows: most batches are read, many rows applied, many refused
    assert c.batches["accepted"] >= 100 and c.observations_accepted >= 200, c.batches
    assert sum(c.observations_rejected.values()) >= 100
    # no fuzzed value got into a live estimate as NaN, infinity or beyond the ceiling
    eng = svc.engine
    q = eng.Q[np.broadcast_to(eng.live[:, None, :], eng.Q.shape)]
    assert np.all(np.isfinite(q)) and float(q.max()) <= eng.settings.ceiling_s
