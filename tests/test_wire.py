"""Wire protocol v1 (routerd/io/wire.py): decoding never crashes, reasons are exact, shapes
follow the documented contract, and the byte layouts match independent references."""
from __future__ import annotations

import math
import struct
import sys

import msgpack
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from routerd.core import engine as E
from routerd.core import topology
from routerd.io import topofiles, wire

DEMO = "routerd/data/demo-lab.yaml"


@pytest.fixture(scope="module")
def topo() -> topology.Topology:
    return topofiles.load(DEMO)


def _topo() -> topology.Topology:
    return topofiles.load(DEMO)


TOPO = _topo()
NAMES = list(TOPO.nodes)


def frame(**kw: object) -> bytes:
    obj = {"v": 1, "reporter": "probe-1", "batch": 7}
    obj.update(kw)
    return msgpack.packb({k: v for k, v in obj.items() if v is not ...}, use_bin_type=True)


# ---- reasons --------------------------------------------------------------------------------
def test_reasons_are_the_union_without_duplicates() -> None:
    assert len(set(wire.REASONS)) == len(wire.REASONS)
    assert set(wire.REASONS) == set(wire.DECODE_REASONS) | set(E.REJECT_REASONS)
    assert len(set(wire.FRAME_ERRORS)) == len(wire.FRAME_ERRORS)


# ---- named rows -------------------------------------------------------------------------------
def test_rows_decode_to_indices(topo: topology.Topology) -> None:
    f = wire.encode_ingest_rows("r", 3, [["w1", "w2", "w3", 0.001], ["w2", "w3", "w3", 2, 0.5],
                                         ["w2", "w3", "w3", 0.25, None]])
    ing = wire.decode_ingest(f, topo)
    assert isinstance(ing, wire.Ingest)
    ix = topo.index
    assert ing.reporter == "r" and ing.batch == 3 and not ing.columnar
    assert ing.hops.src.tolist() == [ix["w1"], ix["w2"], ix["w2"]]
    assert ing.hops.via.tolist() == [ix["w2"], ix["w3"], ix["w3"]]
    assert ing.hops.dst.tolist() == [ix["w3"]] * 3
    assert ing.hops.latency.tolist() == [0.001, 2.0, 0.25]
    assert math.isnan(ing.hops.estimate[0]) and ing.hops.estimate[1] == 0.5
    assert math.isnan(ing.hops.estimate[2])     # None = absent
    assert ing.hop_rows.tolist() == [0, 1, 2] and ing.rejected == () and ing.rows_total == 3


def test_every_decode_reason_and_row_numbering(topo: topology.Topology) -> None:
    hops = [
        ["w1", "w2", "w3", 0.001],        # 0 ok
        ["w1", "nowhere", "w3", 0.001],   # 1 unknown_node
        [1, 2, 3, 0.001],                 # 2 bad_row (indices are for the columnar format)
        ["w1", "w2", "w3"],               # 3 bad_row (3 items)
        "w1 w2 w3 0.1",                   # 4 bad_row (not a list)
        ["w1", "w2", "w3", "fast"],       # 5 bad_latency (not a number)
        ["w1", "w2", "w3", True],         # 6 bad_latency (a boolean is not a number)
        ["w1", "w2", "w3", 0.1, "soon"],  # 7 bad_estimate
        ["w1", "w2", "w3", 0.1, 0.2],     # 8 ok
    ]
    links = [["w1", "w2", "down"],        # row 9 ok
             ["w1", "e1", "up"],          # row 10 not_neighbour (no such link)
             ["w1", "w2", "sideways"],    # row 11 bad_link_state
             ["w1", "mars", "up"],        # row 12 unknown_node
             ["w1", "w2"]]                # row 13 bad_row
    ing = wire.decode_ingest(wire.encode_ingest_rows("r", 1, hops, links), topo)
    assert isinstance(ing, wire.Ingest)
    assert dict(ing.rejected) == {1: "unknown_node", 2: "bad_row", 3: "bad_row", 4: "bad_row",
                                  5: "bad_latency", 6: "bad_latency", 7: "bad_estimate",
                                  10: "not_neighbour", 11: "bad_link_state",
                                  12: "unknown_node", 13: "bad_row"}
    assert ing.hop_rows.tolist() == [0, 8]
    assert ing.link_rows == (9,)   # link j is row len(hops) + j
    assert ing.links == ((topo.index["w1"], topo.index["w2"], False),)
    assert ing.rows_total == 14
    assert all(r in wire.REASONS for _, r in ing.rejected)


def test_engine_rejections_map_back_to_wire_rows(topo: topology.Topology) -> None:
    hops = [["w1", "w2", "w3", 0.001],
            ["w1", "zz", "w3", 0.001],            # decode: unknown_node
            ["w1", "w2", "w3", float("nan")],     # engine: bad_latency
            ["w1", "e3", "e3", 0.001],            # engine: not_neighbour
            ["w1", "w2", "w3", -1.0],             # engine: bad_latency
            ["w1", "w2", "w3", 0.001, float("inf")]]  # engine: bad_estimate
    ing = wire.decode_ingest(wire.encode_ingest_rows("r", 1, hops), topo)
    assert isinstance(ing, wire.Ingest)
    res = E.Engine(topo).observe(ing.hops, now=1.0)
    assert res.accepted == 1
    assert ing.rejections(res.rejected) == [[1, "unknown_node"], [2, "bad_latency"],
                                            [3, "not_neighbour"], [4, "bad_latency"],
                                            [5, "bad_estimate"]]


row_item = st.one_of(st.sampled_from(NAMES + ["nope", ""]), st.integers(-3, 40),
                     st.floats(allow_nan=True), st.none(), st.booleans(),
                     st.integers(min_value=2**63, max_value=2**64 - 1), st.text(max_size=3))
rows_strategy = st.lists(st.one_of(
    st.tuples(st.sampled_from(NAMES), st.sampled_from(NAMES), st.sampled_from(NAMES),
              st.floats(0, 1)).map(list),
    st.tuples(st.sampled_from(NAMES), st.sampled_from(NAMES), st.sampled_from(NAMES),
              st.floats(0, 1), st.one_of(st.none(), st.floats(0, 1))).map(list),
    st.tuples(st.sampled_from(NAMES + ["nope", ""]), st.sampled_from(NAMES + ["nope"]),
              st.sampled_from(NAMES + ["", "x"]), st.floats(0, 1)).map(list),
    st.lists(row_item, min_size=0, max_size=6),
    row_item,
), max_size=30)


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(rows_strategy)
def test_fast_path_equals_slow_path(rows: list) -> None:
    """The fast path (well-formed rows, some naming unknown nodes) and the row-by-row path
    agree wherever the fast one applies; and the public decoder agrees with the slow path
    always."""
    rows = msgpack.unpackb(msgpack.packb(rows), raw=False)   # exactly what arrives
    slow = wire._rows_slow(rows, TOPO)
    fast = wire._rows_fast(rows, TOPO)
    if fast is not None:
        assert fast[2] == slow[2]
        for k in ("src", "via", "dst", "latency", "estimate"):
            np.testing.assert_array_equal(getattr(fast[0], k), getattr(slow[0], k))
        np.testing.assert_array_equal(fast[1], slow[1])
    ing = wire.decode_ingest(msgpack.packb({"v": 1, "reporter": "r", "batch": 0, "hops": rows}), TOPO)
    assert isinstance(ing, wire.Ingest)
    np.testing.assert_array_equal(ing.hop_rows, slow[1])
    assert list(ing.rejected) == slow[2]
    assert sorted([int(i) for i in ing.hop_rows] + [i for i, _ in ing.rejected]) == list(range(len(rows)))


# ---- columnar ---------------------------------------------------------------------------------
def test_columnar_round_trip_and_layout(topo: topology.Topology) -> None:
    src, via, dst = [0, 1, 2], [1, 2, 3], [3, 3, 3]
    lat, est = [0.001, 0.002, 0.5], [np.nan, 0.25, 1.0]
    f = wire.encode_ingest_cols("r", 9, topo.digest, src, via, dst, lat, est)
    obj = msgpack.unpackb(f, raw=False)
    # little-endian int32 / float64, checked against Python's struct module (the format
    # characters '<i' and '<d' of the standard library's struct documentation)
    assert obj["cols"]["from"] == struct.pack("<3i", *src)
    assert obj["cols"]["latency_s"] == struct.pack("<3d", *lat)
    assert obj["topology"] == topo.digest and obj["v"] == 1
    ing = wire.decode_ingest(f, topo)
    assert isinstance(ing, wire.Ingest) and ing.columnar
    assert ing.hops.src.tolist() == src and ing.hops.dst.tolist() == dst
    np.testing.assert_array_equal(ing.hops.estimate, est)
    assert ing.hop_rows.tolist() == [0, 1, 2]


def test_columnar_unknown_indices_rejected_per_row(topo: topology.Topology) -> None:
    n = topo.n
    f = wire.encode_ingest_cols("r", 1, topo.digest, [0, n, 0, -1], [1, 1, n + 5, 1],
                                [2, 2, 2, 2], [0.1] * 4, links=[["w1", "w2", "up"]])
    ing = wire.decode_ingest(f, topo)
    assert isinstance(ing, wire.Ingest)
    assert ing.rejected == ((1, "unknown_node"), (2, "unknown_node"), (3, "unknown_node"))
    assert ing.hop_rows.tolist() == [0] and ing.link_rows == (4,)


def test_columnar_wrong_topology_rejected_whole(topo: topology.Topology) -> None:
    f = wire.encode_ingest_cols("r", 5, "0123456789abcdef", [0], [1], [2], [0.1])
    e = wire.decode_ingest(f, topo)
    assert isinstance(e, wire.WireError) and e.code == "wrong_topology" and e.batch == 5
    assert "0123456789abcdef" in e.reason and topo.digest in e.reason
    f = msgpack.packb({"v": 1, "reporter": "r", "batch": 5, "cols": {}})
    e = wire.decode_ingest(f, topo)
    assert isinstance(e, wire.WireError) and e.code == "wrong_topology"


@pytest.mark.parametrize("cols, word", [
    ({"from": b"\0" * 4, "via": b"\0" * 4, "dst": b"\0" * 4}, "'latency_s' is missing"),
    ({"from": b"\0" * 4, "via": b"\0" * 4, "dst": b"\0" * 4, "latency_s": b"\0" * 16}, "2 rows"),
    ({"from": b"\0" * 5, "via": b"\0" * 4, "dst": b"\0" * 4, "latency_s": b"\0" * 8}, "multiple of 4"),
    ({"from": [0], "via": b"\0" * 4, "dst": b"\0" * 4, "latency_s": b"\0" * 8}, "expected bytes"),
    ({"from": b"", "via": b"", "dst": b"", "latency_s": b"", "speed": b""}, "'speed'"),
])
def test_bad_columns(topo: topology.Topology, cols: dict, word: str) -> None:
    e = wire.decode_ingest(frame(topology=topo.digest, cols=cols), topo)
    assert isinstance(e, wire.WireError) and e.code == "bad_cols" and word in e.reason, e


def test_columnar_decoding_does_not_loop_over_rows(topo: topology.Topology) -> None:
    """Count Python-level calls (sys.setprofile): the same for 10 and 200,000 rows, so no
    Python code runs per row.  A count, not a timing."""
    def calls(m: int) -> int:
        rng = np.random.default_rng(1)
        f = wire.encode_ingest_cols("r", 1, topo.digest, rng.integers(0, topo.n, m),
                                    rng.integers(0, topo.n, m), rng.integers(0, topo.n, m),
                                    rng.random(m), rng.random(m))
        n = 0

        def prof(frame, event, arg):  # type: ignore[no-untyped-def]
            nonlocal n
            if event == "call":
                n += 1
        sys.setprofile(prof)
        try:
            ing = wire.decode_ingest(f, topo)
        finally:
            sys.setprofile(None)
        assert isinstance(ing, wire.Ingest) and len(ing.hops) == m
        return n
    # the first decode on a topology builds its cached name and link indexes (a few calls,
    # once per topology, not per row): counted before the comparison, not in it
    calls(10)
    assert calls(10) == calls(200_000)


# ---- whole-frame errors --------------------------------------------------------------------------
@pytest.mark.parametrize("data, code, words", [
    (b"", "not_msgpack", "empty"),
    (b"\xc1", "not_msgpack", ""),       # 0xc1 is "never used" in the msgpack spec
    (msgpack.packb(1) + msgpack.packb(2), "not_msgpack", "more than one"),
    (b"\x92\x01", "not_msgpack", ""),   # an array of 2 with only 1 element: truncated
    (msgpack.packb([1, 2]), "not_a_map", "list"),
    (msgpack.packb({"reporter": "r", "batch": 1}), "bad_version", "'<missing>'"),
    (msgpack.packb({"v": 2, "reporter": "r", "batch": 1}), "bad_version", "is 2"),
    (msgpack.packb({"v": True, "reporter": "r", "batch": 1}), "bad_version", "True"),
    (msgpack.packb({"v": 1, "batch": 1}), "bad_reporter", "missing"),
    (msgpack.packb({"v": 1, "reporter": "", "batch": 1}), "bad_reporter", "''"),
    (msgpack.packb({"v": 1, "reporter": 5, "batch": 1}), "bad_reporter", "5"),
    (msgpack.packb({"v": 1, "reporter": "x" * 300, "batch": 1}), "bad_reporter", "256"),
    (msgpack.packb({"v": 1, "reporter": "r"}), "bad_batch", "missing"),
    (msgpack.packb({"v": 1, "reporter": "r", "batch": -1}), "bad_batch", "-1"),
    (msgpack.packb({"v": 1, "reporter": "r", "batch": 1.5}), "bad_batch", "1.5"),
    (msgpack.packb({"v": 1, "reporter": "r", "batch": 1, "hop": []}), "unknown_field", "'hop'"),
    (msgpack.packb({"v": 1, "reporter": "r", "batch": 1, "hops": {}}), "bad_hops", "dict"),
    (msgpack.packb({"v": 1, "reporter": "r", "batch": 1, "links": "x"}), "bad_links", "str"),
    (msgpack.packb({"v": 1, "reporter": "r", "batch": 1, "hops": [], "cols": {}}),
     "conflicting_formats", "not both"),
    (msgpack.packb({"v": 1, "reporter": "r", "batch": 1, "hops": [], "topology": "abc"}),
     "wrong_topology", "'abc'"),
])
def test_frame_errors(topo: topology.Topology, data: bytes, code: str, words: str) -> None:
    e = wire.decode_ingest(data, topo)
    assert isinstance(e, wire.WireError), e
    assert e.code == code and e.reason.startswith(code + ": ") and words in e.reason, e.reason


def test_error_names_the_batch_when_readable(topo: topology.Topology) -> None:
    e = wire.decode_ingest(msgpack.packb({"v": 1, "reporter": "r", "batch": 42, "hops": 3}), topo)
    assert isinstance(e, wire.WireError) and e.batch == 42 and e.reporter == "r"
    reply = wire.decode_reply(wire.encode_error(e))
    assert reply == {"v": 1, "error": e.reason, "batch": 42}


def test_ext_types_refused(topo: topology.Topology) -> None:
    data = msgpack.packb({"v": 1, "reporter": "r", "batch": 1,
                          "hops": [msgpack.ExtType(5, b"xx")]})
    e = wire.decode_ingest(data, topo)
    assert isinstance(e, wire.WireError) and e.code == "not_msgpack"


def test_limits(topo: topology.Topology) -> None:
    f = wire.encode_ingest_rows("r", 1, [["w1", "w2", "w3", 0.1]] * 10, [["w1", "w2", "up"]])
    e = wire.decode_ingest(f, topo, max_rows=10)
    assert isinstance(e, wire.WireError) and e.code == "too_many_rows" and "11 rows" in e.reason
    assert isinstance(wire.decode_ingest(f, topo, max_rows=11), wire.Ingest)
    e = wire.decode_ingest(f, topo, max_bytes=len(f) - 1)
    assert isinstance(e, wire.WireError) and e.code == "oversized"
    c = wire.encode_ingest_cols("r", 1, topo.digest, [0] * 20, [1] * 20, [2] * 20, [0.1] * 20)
    e = wire.decode_ingest(c, topo, max_rows=19)
    assert isinstance(e, wire.WireError) and e.code == "too_many_rows"


# ---- never crash -------------------------------------------------------------------------------
@settings(max_examples=400, deadline=None)
@given(st.binary(max_size=200))
def test_arbitrary_bytes_never_crash(data: bytes) -> None:
    out = wire.decode_ingest(data, TOPO)
    assert isinstance(out, (wire.Ingest, wire.WireError))
    if isinstance(out, wire.WireError):
        assert out.code in wire.FRAME_ERRORS and out.code != "bad_request"
    assert isinstance(wire.decode_control(data, TOPO), (dict, wire.WireError))


msgpack_values = st.recursive(
    st.one_of(st.none(), st.booleans(), st.integers(-2**63, 2**64 - 1), st.floats(),
              st.text(max_size=5), st.binary(max_size=12), st.sampled_from(NAMES)),
    lambda inner: st.one_of(st.lists(inner, max_size=6),
                            st.dictionaries(st.one_of(st.text(max_size=4), st.integers(0, 3)),
                                            inner, max_size=5)),
    max_leaves=30)
keys = st.sampled_from(["v", "reporter", "batch", "hops", "links", "cols", "topology", "x"])


@settings(max_examples=400, deadline=None)
@given(st.dictionaries(keys, msgpack_values, max_size=7),
       st.dictionaries(st.sampled_from(["from", "via", "dst", "latency_s", "estimate_s"]),
                       st.one_of(st.binary(max_size=24), msgpack_values), max_size=5),
       st.booleans())
def test_arbitrary_msgpack_objects_never_crash(obj: dict, cols: dict, use_cols: bool) -> None:
    obj.setdefault("v", 1)
    if use_cols:
        obj["cols"] = cols
        obj.setdefault("topology", TOPO.digest)
    for thing in (obj, [obj], obj.get("hops")):
        out = wire.decode_ingest(msgpack.packb(thing), TOPO, max_rows=50)
        assert isinstance(out, (wire.Ingest, wire.WireError))
        if isinstance(out, wire.WireError):
            assert out.code in wire.FRAME_ERRORS and out.code != "bad_request", out
        else:
            assert all(r in wire.REASONS for _, r in out.rejected)
            assert len(out.hop_rows) == len(out.hops)
    ctl = dict(obj)
    ctl["op"] = obj.get("reporter")
    assert isinstance(wire.decode_control(msgpack.packb(ctl), TOPO), (dict, wire.WireError))


# ---- replies, tables, control -------------------------------------------------------------------
def test_ack_shape() -> None:
    raw = wire.encode_ack(7, 3, [(2, "bad_latency"), (5, "unknown_node")])
    # decoded with msgpack itself: the documented map, nothing more
    assert msgpack.unpackb(raw, raw=False) == {"v": 1, "batch": 7, "accepted": 3,
                                               "rejected": [[2, "bad_latency"], [5, "unknown_node"]]}
    assert wire.decode_reply(raw)["accepted"] == 3


@given(st.integers(0, 2**64 - 1), st.integers(0, 2**64 - 1))
@settings(max_examples=300, deadline=None)
def test_an_ack_without_rejections_is_the_packed_map(batch: int, accepted: int) -> None:
    # the spliced common answer against msgpack's own packing of the documented map (the
    # reference library), at every width of a msgpack unsigned integer (msgpack spec:
    # positive fixint, uint 8/16/32/64)
    want = msgpack.packb({"v": 1, "batch": batch, "accepted": accepted, "rejected": []},
                         use_bin_type=True)
    assert wire.encode_ack(batch, accepted) == want
    assert wire.encode_ack(np.uint64(batch), accepted, []) == want
    assert wire.encode_ack(batch, accepted, ()) == want


@pytest.mark.parametrize("v", [0, 127, 128, 255, 256, 65535, 65536, 2**32 - 1, 2**32, 2**64 - 1])
def test_an_ack_at_each_integer_width_edge(v: int) -> None:
    assert wire.encode_ack(v, v) == msgpack.packb(
        {"v": 1, "batch": v, "accepted": v, "rejected": []}, use_bin_type=True)


@pytest.mark.parametrize("data", [b"\xc1", msgpack.packb([1]), msgpack.packb({"v": 2})])
def test_decode_reply_refuses_garbage(data: bytes) -> None:
    with pytest.raises(wire.BadReply):
        wire.decode_reply(data)


def test_table_message_round_trip(topo: topology.Topology) -> None:
    eng = E.Engine(topo)
    x = topo.index["w1"]
    routes = wire.routes_by_name(eng, x)
    assert set(routes) == set(topo.nodes) - {"w1"}
    for d, ws in routes.items():
        assert math.isclose(sum(w for _, w in ws), 1.0)
        assert all(topo.index[h] in topo.neighbours[x] for h, _ in ws)
    frames = wire.table_message("w1", 12, 3, routes)
    assert frames[0] == b"tables/w1"
    msg = wire.decode_table(frames)
    assert msg == {"v": 1, "node": "w1", "seq": 12, "epoch": 3, "routes": routes}
    # the greedy next hop is the one Engine.next_hops names
    nh = eng.next_hops()
    for d, ws in routes.items():
        assert ws[0][0] == topo.nodes[nh[x, topo.index[d]]]
    with pytest.raises(wire.BadReply):
        wire.decode_table([b"tables/w2", frames[1]])
    with pytest.raises(wire.BadReply):
        wire.decode_table([frames[1]])
    assert wire.tables_by_name(eng)["w1"] == routes


def test_estimates_by_name(topo: topology.Topology) -> None:
    eng = E.Engine(topo)
    x = topo.index["w3"]
    est = wire.estimates_by_name(eng, x)
    assert set(est["e3"]) == {topo.nodes[y] for y in topo.neighbours[x]}
    # initial estimates are the delay-shortest distances (engine initial mode "shortest"):
    # via e3 to e3 is the trunk's delay, 1 ms in the demo file
    assert est["e3"]["e3"] == pytest.approx(0.001)
    eng.set_link(x, topo.index["e3"], False, now=1.0)
    assert "e3" not in wire.estimates_by_name(eng, x)["e1"]


def test_nodes_reply_and_topology_id(topo: topology.Topology) -> None:
    r = wire.nodes_reply(topo)
    assert r["nodes"] == list(topo.nodes) and r["topology"] == topo.digest
    assert wire.topology_id(r["nodes"]) == topo.digest
    assert wire.topology_id(r["nodes"][::-1]) != topo.digest


@pytest.mark.parametrize("req, ok, code", [
    ({"op": "tables"}, True, None),
    ({"op": "nodes", "v": 1}, True, None),
    ({"op": "health"}, True, None),
    ({"op": "snapshot"}, True, None),
    ({"op": "estimates", "node": "w1"}, True, None),
    ({"op": "estimates"}, False, "bad_request"),
    ({"op": "estimates", "node": "pluto"}, False, "bad_request"),
    ({"op": "link", "from": "w1", "to": "w2", "state": "down"}, True, None),
    ({"op": "link", "from": "w1", "to": "e1", "state": "down"}, False, "bad_request"),
    ({"op": "link", "from": "w1", "to": "w2", "state": "gone"}, False, "bad_request"),
    ({"op": "reboot"}, False, "unknown_op"),
    ({}, False, "unknown_op"),
    ({"op": "tables", "v": 9}, False, "bad_version"),
])
def test_decode_control(topo: topology.Topology, req: dict, ok: bool, code: str | None) -> None:
    out = wire.decode_control(wire.encode_request(req), topo)
    if ok:
        assert out == req
    else:
        assert isinstance(out, wire.WireError) and out.code == code, out


def test_encode_reply_plain_values() -> None:
    raw = wire.encode_reply({"count": np.int64(3), "share": np.float32(0.5), "a": np.arange(2)})
    assert msgpack.unpackb(raw) == {"v": 1, "count": 3, "share": 0.5, "a": [0, 1]}
    with pytest.raises(TypeError):
        wire.encode_reply({"x": object()})
