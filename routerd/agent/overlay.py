"""The overlay encapsulation: the header every agent puts before a packet, and probes/echoes.

Owns the byte layout of overlay packets (our own design, version 1), the fixed set of
reasons a packet is refused as malformed, and the two delay computations on probe
timestamps.  Decoding never raises on peer bytes: it returns a value or a
:class:`Malformed` that names the field, the value and the rule.

Must not import: sockets, zmq, prometheus, the engine, files or clocks (timestamps come in
as arguments).

Layout (network byte order, 30 bytes, then ``length`` bytes of payload)::

    off size field
     0   1   version        1
     1   1   kind           0 data, 1 probe, 2 echo
     2   1   ttl            hops left; a node that would send it on with 0 drops it
     3   1   flags          0 (reserved: a packet with any bit set is refused)
     4   4   topology tag   first 32 bits of the topology id (Topology.digest): node
                            numbers mean the same nodes at both ends, or the packet is refused
     8   2   source node    index into the topology's node list
    10   2   destination    index into the topology's node list
    12   4   flow id        flowlet pinning key (with the destination)
    16   4   sequence       per flow (data), per link (probes; the echo repeats it)
    20   8   origin time    ns since the Unix epoch, stamped where the packet entered
                            (data) or where the probe left (probe; the echo repeats it)
    28   2   length         payload bytes that follow; must equal what is there

A probe has no payload.  An echo's payload is ``t2`` (ns, probe received) and ``t3`` (ns,
echo sent), then a count and that many (destination u16, estimate float64 seconds) pairs:
the echoing node's own remaining-time estimates when it has any (none: count 0).
"""
from __future__ import annotations

import struct
from collections.abc import Sequence
from dataclasses import dataclass

VERSION = 1
KIND_DATA = 0
KIND_PROBE = 1
KIND_ECHO = 2
KINDS = (KIND_DATA, KIND_PROBE, KIND_ECHO)

HEADER = struct.Struct("!BBBBIHHIIQH")
HEADER_BYTES = HEADER.size            # 30
_ECHO = struct.Struct("!QQH")
_EST = struct.Struct("!Hd")
MAX_NODES = 1 << 16
MAX_PAYLOAD = 65535 - HEADER_BYTES
#: Largest number of estimates one echo carries (keeps an echo inside one UDP datagram).
MAX_ESTIMATES = (MAX_PAYLOAD - _ECHO.size) // _EST.size

#: Why a packet is refused (a fixed set: a metrics label uses it).
MALFORMED_REASONS: tuple[str, ...] = (
    "short",           # fewer bytes than a header
    "bad_version",     # version is not 1
    "bad_kind",        # kind is not data, probe or echo
    "bad_flags",       # a reserved flag bit is set
    "wrong_topology",  # the topology tag is not ours: node numbers would mean other nodes
    "unknown_node",    # source or destination beyond the node list
    "bad_length",      # the length field does not match the bytes that follow
    "bad_echo",        # an echo whose payload does not hold t2, t3 and its estimates
)


@dataclass(frozen=True, slots=True)
class Header:
    """One decoded header.  ``payload_len`` is the ``length`` field."""

    kind: int
    ttl: int
    topo: int
    src: int
    dst: int
    flow: int
    seq: int
    origin_ns: int
    payload_len: int = 0

    def __post_init__(self) -> None:
        if self.kind not in KINDS:
            raise ValueError(f"kind {self.kind} is not one of {KINDS}")
        for name, v, hi in (("ttl", self.ttl, 255), ("topo", self.topo, 2**32 - 1),
                            ("src", self.src, MAX_NODES - 1), ("dst", self.dst, MAX_NODES - 1),
                            ("flow", self.flow, 2**32 - 1), ("seq", self.seq, 2**32 - 1),
                            ("origin_ns", self.origin_ns, 2**64 - 1),
                            ("payload_len", self.payload_len, MAX_PAYLOAD)):
            if not (isinstance(v, int) and 0 <= v <= hi):
                raise ValueError(f"header field {name} is {v!r}, expected a whole number in [0, {hi}]")


@dataclass(frozen=True, slots=True)
class Malformed:
    """A packet that cannot be used.  A value, not an exception: ``reason`` is from
    :data:`MALFORMED_REASONS`, ``detail`` names the field and the value."""

    reason: str
    detail: str


@dataclass(frozen=True, slots=True)
class Echo:
    t2_ns: int
    t3_ns: int
    estimates: tuple[tuple[int, float], ...] = ()


def topology_tag(digest: str) -> int:
    """The header's 32-bit tag of a topology id (its first 8 hex digits)."""
    return int(digest[:8], 16)


def encode(h: Header, payload: bytes = b"") -> bytes:
    """Header + payload.  ``h.payload_len`` is ignored: the length is the payload's."""
    if len(payload) > MAX_PAYLOAD:
        raise ValueError(f"payload of {len(payload)} bytes is above {MAX_PAYLOAD}")
    return HEADER.pack(VERSION, h.kind, h.ttl, 0, h.topo, h.src, h.dst, h.flow, h.seq,
                       h.origin_ns, len(payload)) + payload


def decode(data: bytes, *, nodes: int, topo: int) -> tuple[Header, bytes] | Malformed:
    """Bytes off the wire → (header, payload), or :class:`Malformed`.  Never raises."""
    n = len(data)
    if n < HEADER_BYTES:
        return Malformed("short", f"{n} bytes, a header is {HEADER_BYTES}")
    v, kind, ttl, flags, tag, src, dst, flow, seq, origin, length = HEADER.unpack_from(data)
    if v != VERSION:
        return Malformed("bad_version", f"version is {v}, expected {VERSION}")
    if kind not in KINDS:
        return Malformed("bad_kind", f"kind is {kind}, expected 0 (data), 1 (probe) or 2 (echo)")
    if flags:
        return Malformed("bad_flags", f"flags are {flags:#04x}, expected 0")
    if tag != topo:
        return Malformed("wrong_topology", f"topology tag is {tag:08x}, ours is {topo:08x}")
    if src >= nodes or dst >= nodes:
        bad, val = ("source", src) if src >= nodes else ("destination", dst)
        return Malformed("unknown_node", f"{bad} node {val} is beyond the {nodes} nodes")
    if length != n - HEADER_BYTES:
        return Malformed("bad_length", f"length field is {length}, {n - HEADER_BYTES} "
                                       "payload bytes follow")
    return Header(kind, ttl, tag, src, dst, flow, seq, origin, length), data[HEADER_BYTES:]


def with_ttl(data: bytes, ttl: int) -> bytes:
    """The same packet with another TTL (what each hop does before sending it on)."""
    return data[:2] + bytes((ttl,)) + data[3:]


def data_packet(topo: int, src: int, dst: int, flow: int, seq: int, origin_ns: int,
                ttl: int, size: int = HEADER_BYTES) -> bytes:
    """A data packet of ``size`` bytes in total (zero padding after the header)."""
    pad = max(0, size - HEADER_BYTES)
    return encode(Header(KIND_DATA, ttl, topo, src, dst, flow, seq, origin_ns), bytes(pad))


def probe(topo: int, src: int, dst: int, seq: int, t1_ns: int) -> bytes:
    """A probe from ``src`` to its neighbour ``dst`` (TTL 1: never forwarded)."""
    return encode(Header(KIND_PROBE, 1, topo, src, dst, 0, seq, t1_ns))


def echo(p: Header, me: int, t2_ns: int, t3_ns: int,
         estimates: Sequence[tuple[int, float]] = ()) -> bytes:
    """The echo of probe ``p``, sent back by ``me`` (its origin time and sequence kept)."""
    est = list(estimates)[:MAX_ESTIMATES]
    body = _ECHO.pack(t2_ns, t3_ns, len(est)) + b"".join(_EST.pack(d, float(e)) for d, e in est)
    return encode(Header(KIND_ECHO, 1, p.topo, me, p.src, 0, p.seq, p.origin_ns), body)


def decode_echo(payload: bytes, nodes: int) -> Echo | Malformed:
    if len(payload) < _ECHO.size:
        return Malformed("bad_echo", f"echo payload is {len(payload)} bytes, at least "
                                     f"{_ECHO.size} expected")
    t2, t3, k = _ECHO.unpack_from(payload)
    want = _ECHO.size + k * _EST.size
    if len(payload) != want:
        return Malformed("bad_echo", f"echo says {k} estimates ({want} bytes), payload is "
                                     f"{len(payload)} bytes")
    if t3 < t2:
        return Malformed("bad_echo", f"echo sent (t3 {t3}) before the probe arrived (t2 {t2})")
    est = []
    for i in range(k):
        d, e = _EST.unpack_from(payload, _ECHO.size + i * _EST.size)
        if d >= nodes or not (e >= 0.0 and e < float("inf")):
            return Malformed("bad_echo", f"estimate {i}: destination {d}, value {e!r}")
        est.append((d, e))
    return Echo(t2, t3, tuple(est))


def two_way_delay_s(t1: int, t2: int, t3: int, t4: int) -> float:
    """One-way delay from the four timestamps of a probe and its echo (ns): the round trip
    less the time the peer held the probe, halved — the NTP on-wire delay (RFC 5905,
    section 8: delta = (T4 - T1) - (T3 - T2)), halved for one direction.  Needs no clock
    synchronisation; assumes both directions take equally long."""
    return max(0.0, ((t4 - t1) - (t3 - t2)) / 2e9)


def one_way_delay_s(t1: int, t2: int) -> float:
    """Forward delay t2 - t1 (ns → s): exact when both ends read the same clock (the lab's
    namespaces share the host's) or synchronised ones (PTP)."""
    return max(0.0, (t2 - t1) / 1e9)
