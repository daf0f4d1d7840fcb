"""routerd.agent.overlay: the encapsulation header, probes/echoes, delay arithmetic, malformed packets."""
from __future__ import annotations

import struct

import pytest
from hypothesis import given
from hypothesis import strategies as st

from routerd.agent import overlay as ov

TAG = 0x1234ABCD
N = 7


def _hdr(**kw: int) -> ov.Header:
    base = {"kind": ov.KIND_DATA, "ttl": 64, "topo": TAG, "src": 1, "dst": 5, "flow": 77,
            "seq": 9, "origin_ns": 123}
    base.update(kw)
    return ov.Header(**base)


@given(kind=st.sampled_from(ov.KINDS), ttl=st.integers(0, 255), src=st.integers(0, N - 1),
       dst=st.integers(0, N - 1), flow=st.integers(0, 2**32 - 1), seq=st.integers(0, 2**32 - 1),
       origin=st.integers(0, 2**64 - 1), payload=st.binary(max_size=200))
def test_header_round_trips(kind: int, ttl: int, src: int, dst: int, flow: int, seq: int,
                            origin: int, payload: bytes) -> None:
    h = ov.Header(kind, ttl, TAG, src, dst, flow, seq, origin)
    out = ov.decode(ov.encode(h, payload), nodes=N, topo=TAG)
    assert not isinstance(out, ov.Malformed)
    got, pl = out
    assert (got.kind, got.ttl, got.src, got.dst, got.flow, got.seq, got.origin_ns) == \
        (kind, ttl, src, dst, flow, seq, origin)
    assert got.payload_len == len(payload) and pl == payload


def test_layout_matches_the_documented_offsets() -> None:
    # read back with plain int.from_bytes at the offsets the module docstring gives
    b = ov.encode(_hdr(ttl=17, src=3, dst=6, flow=0xA1B2C3D4, seq=0x01020304,
                       origin_ns=0x1122334455667788), b"xyz")
    assert ov.HEADER_BYTES == 30 and len(b) == 33
    assert b[0] == 1 and b[1] == ov.KIND_DATA and b[2] == 17 and b[3] == 0
    be = lambda o, n: int.from_bytes(b[o:o + n], "big")
    assert be(4, 4) == TAG and be(8, 2) == 3 and be(10, 2) == 6
    assert be(12, 4) == 0xA1B2C3D4 and be(16, 4) == 0x01020304
    assert be(20, 8) == 0x1122334455667788 and be(28, 2) == 3 and b[30:] == b"xyz"


def test_with_ttl_changes_only_the_ttl_byte() -> None:
    b = ov.data_packet(TAG, 0, 4, 5, 6, 7, ttl=9, size=100)
    c = ov.with_ttl(b, 8)
    assert len(b) == len(c) == 100
    assert [i for i in range(100) if b[i] != c[i]] == [2] and c[2] == 8


def _mutate(b: bytes, off: int, val: bytes) -> bytes:
    return b[:off] + val + b[off + len(val):]


GOOD = ov.data_packet(TAG, 1, 2, 3, 4, 5, ttl=8, size=60)


@pytest.mark.parametrize("data,reason", [
    (b"", "short"),
    (GOOD[:29], "short"),
    (_mutate(GOOD, 0, b"\x02"), "bad_version"),
    (_mutate(GOOD, 1, b"\x07"), "bad_kind"),
    (_mutate(GOOD, 3, b"\x80"), "bad_flags"),
    (_mutate(GOOD, 4, b"\x00\x00\x00\x01"), "wrong_topology"),
    (_mutate(GOOD, 8, struct.pack("!H", N)), "unknown_node"),
    (_mutate(GOOD, 10, struct.pack("!H", 65535)), "unknown_node"),
    (GOOD + b"extra", "bad_length"),
    (GOOD[:-1], "bad_length"),
])
def test_malformed_packets_name_their_reason(data: bytes, reason: str) -> None:
    out = ov.decode(data, nodes=N, topo=TAG)
    assert isinstance(out, ov.Malformed)
    assert out.reason == reason and out.reason in ov.MALFORMED_REASONS and out.detail


@given(st.binary(max_size=64))
def test_decode_never_raises(data: bytes) -> None:
    out = ov.decode(data, nodes=N, topo=TAG)
    assert isinstance(out, (ov.Malformed, tuple))


def test_probe_and_echo() -> None:
    p = ov.decode(ov.probe(TAG, 2, 3, seq=41, t1_ns=1000), nodes=N, topo=TAG)
    assert not isinstance(p, ov.Malformed)
    ph, pl = p
    assert ph.kind == ov.KIND_PROBE and ph.ttl == 1 and pl == b""
    e = ov.decode(ov.echo(ph, 3, 1500, 1600, [(0, 0.25), (6, 1.5)]), nodes=N, topo=TAG)
    assert not isinstance(e, ov.Malformed)
    eh, body = e
    assert (eh.kind, eh.src, eh.dst, eh.seq, eh.origin_ns) == (ov.KIND_ECHO, 3, 2, 41, 1000)
    got = ov.decode_echo(body, N)
    assert got == ov.Echo(1500, 1600, ((0, 0.25), (6, 1.5)))


@pytest.mark.parametrize("body", [
    b"\x00" * 5,                                           # too short for t2, t3, count
    struct.pack("!QQH", 1, 2, 1),                          # says one estimate, has none
    struct.pack("!QQH", 5, 4, 0),                          # echo sent before the probe came
    struct.pack("!QQH", 1, 2, 1) + struct.pack("!Hd", N, 0.1),   # unknown destination
    struct.pack("!QQH", 1, 2, 1) + struct.pack("!Hd", 0, -1.0),  # negative estimate
    struct.pack("!QQH", 1, 2, 1) + struct.pack("!Hd", 0, float("nan")),
])
def test_bad_echoes(body: bytes) -> None:
    out = ov.decode_echo(body, N)
    assert isinstance(out, ov.Malformed) and out.reason == "bad_echo"


def test_two_way_delay_cancels_clock_offset() -> None:
    # NTP on-wire delay (RFC 5905 section 8): delta = (T4 - T1) - (T3 - T2).  Worked example
    # of our own: one-way delay 30 ms each way, the peer's clock 20 ms ahead, the peer holds
    # the probe 10 ms.  T1 = 1000, T2 = 1000 + 30 + 20, T3 = T2 + 10, T4 = T3 - 20 + 30 (ms).
    ms = 1_000_000
    t1, t2, t3, t4 = 1000 * ms, 1050 * ms, 1060 * ms, 1070 * ms
    assert ov.two_way_delay_s(t1, t2, t3, t4) == pytest.approx(0.030)
    # the one-way formula would be wrong by exactly the offset here
    assert ov.one_way_delay_s(t1, t2) == pytest.approx(0.050)


def test_header_checks_its_fields() -> None:
    with pytest.raises(ValueError, match="ttl"):
        _hdr(ttl=256)
    with pytest.raises(ValueError, match="kind"):
        _hdr(kind=9)
    with pytest.raises(ValueError, match="payload"):
        ov.encode(_hdr(), bytes(ov.MAX_PAYLOAD + 1))
    assert ov.topology_tag("1234abcd99") == TAG
