"""Trace-driven traffic: packet captures and flow logs as the simulator's traffic source.

Owns: reading pcap and pcapng captures (record and block structures decoded by dpkt),
CSV and JSON-lines flow logs, the address map (YAML: node name → addresses or CIDR
prefixes, checked with :mod:`ipaddress`), the import report (every packet that could not
be used, counted by reason), and :class:`TraceTraffic`, a :class:`routerd.sim.traffic.TrafficSource`.
Must not import: the engine, zmq, prometheus, matplotlib.

Theory of operation
-------------------
Reading.  A capture is read into memory and walked record by record (pcap) or block by
block (pcapng); dpkt decodes each file header, record header, block and packet.  We walk
the records ourselves rather than iterate dpkt's readers because those readers return
a short packet at a truncated tail without a word and read only the first interface's
timestamp resolution; walking them ourselves gives every record's byte offset, so a truncated or
corrupt capture is refused with the offset where its last good record ends (or, with
``allow_truncated``, used up to there — and the cut is still reported).

Time.  Timestamps are kept as integer nanoseconds from the file (pcap micro- or
nanosecond records; pcapng ``if_tsresol``/``if_tsoffset`` per interface), so shifting
them to start at zero is exact; then they are divided by ``speed`` (2 = twice as fast).
Records out of time order (several interfaces) are sorted, stably, and counted.

Endpoints.  IPv4 and IPv6 source and destination addresses (Ethernet with VLAN tags,
Linux cooked v1/v2, BSD loopback, raw IP) are turned into nodes by the address map.
The map's prefixes of different nodes must not overlap (each address belongs to at
most one node), so the lookup needs no longest-prefix rule.  A packet whose source or
destination maps to no node, or whose two ends map to the same node, is not injected:
it is counted under its reason, and the most frequent unmapped addresses are listed.

Flow logs.  CSV with a header row, or JSON lines; fields ``time`` (seconds, or an ISO
8601 date-time with a zone), ``source``, ``destination`` (node names, or IP addresses
looked up in the address map) and ``bytes``; optional ``packets`` (default 1: the row's
bytes are split evenly into that many packets) and ``duration_s`` (default 0: the
packets are spread evenly over it).  Packet sizes are the IP datagram's total length
(the IP header's length field, which survives a short snap length) for captures.
"""
from __future__ import annotations

import csv
import io
import ipaddress
import json
import math
import os
import struct
import zlib
from bisect import bisect_right
from collections import Counter
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from datetime import datetime
from decimal import Decimal, InvalidOperation
from fractions import Fraction
from typing import Any, Literal

import numpy as np

from routerd.core.errors import InputError, Problem
from routerd.core.topology import Topology

from .core import PacketTuple

#: reasons a record of a trace is not injected (a fixed set: the report lists each)
SKIP_REASONS: tuple[str, ...] = (
    "not_ip",             # ARP, LLDP, ... : no IP header
    "undecodable",        # the link or IP header does not decode (a short snap length)
    "unsupported_link",   # a link type we cannot decode
    "unmapped_source",    # the source address maps to no node
    "unmapped_destination",
    "unmapped_both",
    "same_node",          # both ends map to one node: nothing crosses the network
    "bad_time",           # a time past what a signed 64-bit nanosecond count holds (2262)
    "after_duration",     # the run ended before its time (set by the simulator run)
)

# libpcap's own bound on a record (MAXIMUM_SNAPLEN in pcap-int.h, from memory)
_MAX_RECORD = 262144
_PCAP_MAGICS = {b"\xa1\xb2\xc3\xd4", b"\xd4\xc3\xb2\xa1", b"\xa1\xb2\x3c\x4d", b"\x4d\x3c\xb2\xa1"}
_PCAPNG_MAGIC = b"\x0a\x0d\x0d\x0a"
_NS = 1_000_000_000
#: record times are nanoseconds since 1970 in a signed 64-bit count (numpy int64)
_TS_LIMIT = 1 << 63

# link-layer header types (the tcpdump.org LINKTYPE_ registry values as they appear in files)
LINKTYPE_NULL, LINKTYPE_ETHERNET, LINKTYPE_RAW, LINKTYPE_LOOP = 0, 1, 101, 108
LINKTYPE_LINUX_SLL, LINKTYPE_IPV4, LINKTYPE_IPV6, LINKTYPE_LINUX_SLL2 = 113, 228, 229, 276
_RAW_DLTS = (LINKTYPE_RAW, 12, 14)   # 12 and 14: the BSD/OpenBSD DLT_RAW some files carry


class TraceError(InputError):
    """A trace, flow log or address map cannot be used as given."""


# ---- address map --------------------------------------------------------------------------
@dataclass(frozen=True, slots=True)
class _Entry:
    net: ipaddress.IPv4Network | ipaddress.IPv6Network
    node: int
    line: int


class AddressMap:
    """Node name → addresses and CIDR prefixes, checked; :meth:`lookup` gives a node index."""

    def __init__(self, entries: Sequence[_Entry], topo: Topology, source: str = "<map>"):
        self.source = source
        self.topo = topo
        self.entries = tuple(entries)
        # per IP version: sorted disjoint [lo, hi] ranges (same-node overlaps merged)
        self._lo: dict[int, list[int]] = {4: [], 6: []}
        self._hi: dict[int, list[int]] = {4: [], 6: []}
        self._node: dict[int, list[int]] = {4: [], 6: []}
        for v in (4, 6):
            rs = sorted((int(e.net.network_address), int(e.net.broadcast_address), e.node)
                        for e in self.entries if e.net.version == v)
            for lo, hi, nd in rs:
                if self._lo[v] and lo <= self._hi[v][-1]:   # contained (checked: same node)
                    self._hi[v][-1] = max(self._hi[v][-1], hi)
                    continue
                self._lo[v].append(lo)
                self._hi[v].append(hi)
                self._node[v].append(nd)
        self._cache: dict[bytes, int] = {}

    def lookup_int(self, version: int, addr: int) -> int:
        i = bisect_right(self._lo[version], addr) - 1
        if i >= 0 and addr <= self._hi[version][i]:
            return self._node[version][i]
        return -1

    def lookup(self, packed: bytes) -> int:
        """Node index of a packed IPv4 (4 bytes) or IPv6 (16 bytes) address, -1 if none."""
        c = self._cache.get(packed)
        if c is None:
            c = self.lookup_int(4 if len(packed) == 4 else 6, int.from_bytes(packed, "big"))
            self._cache[packed] = c
        return c

    def lookup_text(self, text: str) -> int | None:
        """Node index of an address in text, -1 if unmapped, None if it is no address."""
        try:
            a = ipaddress.ip_address(text.strip())
        except ValueError:
            return None
        return self.lookup(a.packed)


def load_address_map(path: str, topo: Topology) -> AddressMap:
    """Read and check an address map; TraceError listing every problem with file and line."""
    import yaml

    try:
        with open(path, encoding="utf-8") as fh:
            text = fh.read()
    except OSError as e:
        raise TraceError(f"{path}: cannot be read: {e.strerror}") from None
    try:
        root = yaml.compose(text, Loader=yaml.SafeLoader)
    except yaml.YAMLError as e:
        raise TraceError(Problem(path, "", f"is not valid YAML: {e}")) from None
    return address_map_from_node(root, topo, path)


def address_map_from_node(root: Any, topo: Topology, path: str) -> AddressMap:
    import yaml

    problems: list[Problem] = []
    entries: list[_Entry] = []
    if root is None:
        raise TraceError(Problem(path, "", "is empty; expected a mapping of node name to addresses"))
    if not isinstance(root, yaml.MappingNode):
        raise TraceError(Problem(f"{path}:{root.start_mark.line + 1}", root.tag.rsplit(":", 1)[-1],
                                 "must be a mapping of node name to a list of addresses or prefixes"))
    seen: dict[str, int] = {}
    for knode, vnode in root.value:
        line = knode.start_mark.line + 1
        name = knode.value if isinstance(knode, yaml.ScalarNode) else None
        if not isinstance(name, str):
            problems.append(Problem(f"{path}:{line}", "?", "a node name must be a plain string"))
            continue
        if name in seen:
            problems.append(Problem(f"{path}:{line}", name, f"is listed twice (first at line {seen[name]})"))
            continue
        seen[name] = line
        if name not in topo.index:
            near = [n for n in topo.nodes if n.lower() == name.lower()]
            hint = f" (did you mean {near[0]}?)" if near else ""
            problems.append(Problem(f"{path}:{line}", name,
                                    f"is not a node of topology {topo.name!r}{hint}"))
            continue
        node = topo.index[name]
        items = vnode.value if isinstance(vnode, yaml.SequenceNode) else [vnode]
        if isinstance(vnode, yaml.MappingNode):
            problems.append(Problem(f"{path}:{vnode.start_mark.line + 1}", name,
                                    "must map to an address, a prefix or a list of them"))
            continue
        for it in items:
            iline = it.start_mark.line + 1
            if not isinstance(it, yaml.ScalarNode) or not it.value.strip():
                problems.append(Problem(f"{path}:{iline}", name, "has an entry that is not an address or prefix"))
                continue
            raw = it.value.strip()
            try:
                net = ipaddress.ip_network(raw, strict=True)
            except ValueError as e:
                try:
                    loose = ipaddress.ip_network(raw, strict=False)
                    problems.append(Problem(f"{path}:{iline}", raw,
                                            f"has host bits set (did you mean {loose}?)"))
                except ValueError:
                    problems.append(Problem(f"{path}:{iline}", raw, f"is not an IP address or CIDR prefix ({e})"))
                continue
            entries.append(_Entry(net, node, iline))
    problems += _overlaps(entries, topo, path)
    if problems:
        raise TraceError(problems)
    return AddressMap(entries, topo, path)


def _overlaps(entries: Sequence[_Entry], topo: Topology, path: str) -> list[Problem]:
    """Prefixes of different nodes that overlap.  Two CIDR prefixes overlap only if one
    contains the other, so a sweep in address order with a stack of open prefixes finds
    every such pair."""
    out: list[Problem] = []
    for v in (4, 6):
        es = sorted((e for e in entries if e.net.version == v),
                    key=lambda e: (int(e.net.network_address), e.net.prefixlen))
        stack: list[_Entry] = []
        for e in es:
            lo = int(e.net.network_address)
            while stack and int(stack[-1].net.broadcast_address) < lo:
                stack.pop()
            for outer in stack:
                if outer.node != e.node:
                    # reported at the entry further down the file, naming the other's line
                    a, b = (e, outer) if e.line >= outer.line else (outer, e)
                    out.append(Problem(f"{path}:{a.line}", str(a.net),
                                       f"of {topo.nodes[a.node]} overlaps {b.net} of "
                                       f"{topo.nodes[b.node]} (line {b.line}): an address "
                                       "must belong to one node"))
            stack.append(e)
    return out


# ---- the import report ----------------------------------------------------------------------
@dataclass
class TraceReport:
    """What an import read and what it could not use (every record is in one count)."""

    source: str
    format: str
    records: int = 0
    injected: int = 0
    skipped: dict[str, int] = field(default_factory=lambda: dict.fromkeys(SKIP_REASONS, 0))
    unsupported_links: dict[int, int] = field(default_factory=dict)
    unmapped_addresses: Counter[str] = field(default_factory=Counter)
    reordered: int = 0
    truncated_at: int | None = None
    truncation: str | None = None
    speed: float = 1.0
    span_s: float = 0.0
    first_time_s: float | None = None

    def skip(self, reason: str, k: int = 1) -> None:
        self.skipped[reason] += k

    def to_dict(self) -> dict[str, Any]:
        return {
            "source": self.source, "format": self.format, "records": self.records,
            "injected": self.injected, "skipped": dict(self.skipped),
            "unsupported_link_types": {str(k): v for k, v in self.unsupported_links.items()},
            "top_unmapped_addresses": dict(self.unmapped_addresses.most_common(10)),
            "reordered": self.reordered, "truncated_at_byte": self.truncated_at,
            "truncation": self.truncation, "speed": self.speed, "span_s": self.span_s,
            "first_time_s": self.first_time_s,
        }

    def lines(self) -> list[str]:
        out = [(f"trace {self.source} ({self.format}): {self.records} records, {self.injected} "
               f"packets injected over {self.span_s:.6g} s (speed x{self.speed:g})")]
        for r, c in self.skipped.items():
            if c:
                out.append(f"  not injected, {r.replace('_', ' ')}: {c}")
        for lt, c in self.unsupported_links.items():
            out.append(f"  link type {lt} is not decoded: {c} records")
        if self.unmapped_addresses:
            top = ", ".join(f"{a} ({c})" for a, c in self.unmapped_addresses.most_common(5))
            out.append(f"  most frequent unmapped addresses: {top}")
        if self.reordered:
            out.append(f"  {self.reordered} packets were out of time order in the file "
                       "(sorted by time)")
        if self.truncation:
            out.append(f"  capture cut short at byte {self.truncated_at}: {self.truncation}; "
                       "the records before it were used (--allow-truncated)")
        return out


# ---- capture walking ---------------------------------------------------------------------
@dataclass(frozen=True, slots=True)
class _Rec:
    ts_ns: int
    linktype: int
    data: bytes


class _Cut(Exception):
    def __init__(self, offset: int, detail: str):
        super().__init__(detail)
        self.offset = offset
        self.detail = detail


def capture_format(head: bytes) -> str | None:
    """'pcap', 'pcapng' or None from a file's first four bytes."""
    if head[:4] in _PCAP_MAGICS:
        return "pcap"
    if head[:4] == _PCAPNG_MAGIC:
        return "pcapng"
    return None


def _walk_pcap(buf: bytes, out: list[_Rec]) -> None:
    import dpkt

    if len(buf) < 24:
        raise _Cut(0, f"the file header is {len(buf)} of 24 bytes")
    fh = dpkt.pcap.FileHdr(buf[:24])
    magic = fh.magic
    if magic in (dpkt.pcap.PMUDPCT_MAGIC, dpkt.pcap.PMUDPCT_MAGIC_NANO, dpkt.pcap.PACPDOM_MAGIC):
        fh = dpkt.pcap.LEFileHdr(buf[:24])
    ph = dpkt.pcap.MAGIC_TO_PKT_HDR.get(magic)
    if ph is None or ph not in (dpkt.pcap.PktHdr, dpkt.pcap.LEPktHdr):
        raise _Cut(0, f"pcap magic {magic:#010x} is not a standard micro- or nanosecond capture")
    nano = magic in (dpkt.pcap.TCPDUMP_MAGIC_NANO, dpkt.pcap.PMUDPCT_MAGIC_NANO)
    mult = 1 if nano else 1000
    frac_max = _NS if nano else 1_000_000
    lt = int(fh.linktype) & 0x0FFFFFFF       # upper bits: FCS length flags
    limit = max(int(fh.snaplen), _MAX_RECORD)
    off = 24
    n = len(buf)
    hl = 16
    while off < n:
        if n - off < hl:
            raise _Cut(off, f"record header is {n - off} of {hl} bytes")
        h = ph(buf[off:off + hl])
        cap = h.caplen
        if cap > limit:
            raise _Cut(off, f"record length {cap} is above the limit {limit}")
        if h.tv_usec >= frac_max:
            raise _Cut(off, f"record time fraction {h.tv_usec} is not below {frac_max}")
        if n - off - hl < cap:
            raise _Cut(off, f"record announces {cap} bytes, {n - off - hl} remain")
        out.append(_Rec(h.tv_sec * _NS + h.tv_usec * mult, lt, buf[off + hl:off + hl + cap]))
        off += hl + cap


def _walk_pcapng(buf: bytes, out: list[_Rec]) -> None:
    import dpkt
    from dpkt import pcapng as P

    n = len(buf)
    off = 0
    le = True
    ifaces: list[tuple[int, Fraction | int, int]] = []   # (linktype, ns per unit, offset ns)
    first = True
    while off < n:
        if n - off < 12:
            raise _Cut(off, f"block header is {n - off} of 12 bytes")
        btype = int.from_bytes(buf[off:off + 4], "little")
        if btype == P.PCAPNG_BT_SHB:
            bom = buf[off + 8:off + 12]
            if bom == b"\x4d\x3c\x2b\x1a":
                le = True
            elif bom == b"\x1a\x2b\x3c\x4d":
                le = False
            else:
                raise _Cut(off, f"section header byte-order magic {bom.hex()} is neither order")
            ifaces = []
        elif first:
            raise _Cut(0, "a pcapng file must start with a section header block")
        first = False
        order: Literal["little", "big"] = "little" if le else "big"
        btype = int.from_bytes(buf[off:off + 4], order)
        blen = int.from_bytes(buf[off + 4:off + 8], order)
        if blen < 12 or blen % 4:
            raise _Cut(off, f"block length {blen} is not a multiple of 4 of at least 12")
        if blen > n - off:
            raise _Cut(off, f"block announces {blen} bytes, {n - off} remain")
        if int.from_bytes(buf[off + blen - 4:off + blen], order) != blen:
            raise _Cut(off, "block's trailing length differs from its leading length")
        blk = buf[off:off + blen]
        try:
            if btype == P.PCAPNG_BT_SHB:
                (P.SectionHeaderBlockLE if le else P.SectionHeaderBlock)(blk)
            elif btype == P.PCAPNG_BT_IDB:
                idb = (P.InterfaceDescriptionBlockLE if le else P.InterfaceDescriptionBlock)(blk)
                unit: Fraction | int = 1000      # default resolution: microseconds
                tsoff = 0
                for opt in idb.opts:
                    if opt.code == P.PCAPNG_OPT_IF_TSRESOL and opt.data:
                        v = opt.data[0]
                        base, e = (2, v & 0x7F) if v & 0x80 else (10, v)
                        unit = Fraction(_NS, base ** e)
                        if unit.denominator == 1:
                            unit = int(unit)
                    elif opt.code == P.PCAPNG_OPT_IF_TSOFFSET and len(opt.data) >= 8:
                        tsoff = int.from_bytes(opt.data[:8], order, signed=True) * _NS
                ifaces.append((int(idb.linktype), unit, tsoff))
            elif btype in (P.PCAPNG_BT_EPB, P.PCAPNG_BT_PB):
                if btype == P.PCAPNG_BT_EPB:
                    pb = (P.EnhancedPacketBlockLE if le else P.EnhancedPacketBlock)(blk)
                else:
                    pb = (P.PacketBlockLE if le else P.PacketBlock)(blk)
                if pb.caplen > blen - 32:       # 28-byte header, 4-byte trailing length
                    raise _Cut(off, f"packet block's captured length {pb.caplen} does not fit "
                                    f"its {blen}-byte block")
                if pb.iface_id >= len(ifaces):
                    raise _Cut(off, f"packet block names interface {pb.iface_id}, "
                                    f"{len(ifaces)} are described")
                lt, unit, tsoff = ifaces[pb.iface_id]
                units = (pb.ts_high << 32) | pb.ts_low
                ns = units * unit
                ns_i = ns if isinstance(ns, int) else round(ns)
                out.append(_Rec(int(ns_i) + tsoff, lt, bytes(pb.pkt_data)))
            elif btype == 3:   # simple packet block: no timestamp, interface 0
                if not ifaces:
                    raise _Cut(off, "simple packet block before any interface description")
                raise _Cut(off, "simple packet blocks carry no timestamp; a trace needs times")
            # other blocks (name resolution, statistics, custom) carry no packets
        except (dpkt.UnpackError, struct.error) as e:
            raise _Cut(off, f"block of type {btype:#x} does not decode: {e}") from None
        off += blen


def _endpoints(lt: int, data: bytes) -> tuple[bytes, bytes, int, int, int, int] | str:
    """(src, dst, proto, sport, dport, ip_length) of a packet, or a skip reason."""
    import dpkt

    try:
        if lt == LINKTYPE_ETHERNET:
            pkt: Any = dpkt.ethernet.Ethernet(data).data
        elif lt == LINKTYPE_LINUX_SLL:
            pkt = dpkt.sll.SLL(data).data
        elif lt == LINKTYPE_LINUX_SLL2:
            pkt = dpkt.sll2.SLL2(data).data
        elif lt in (LINKTYPE_NULL, LINKTYPE_LOOP):
            pkt = dpkt.loopback.Loopback(data).data
        elif lt in _RAW_DLTS or lt in (LINKTYPE_IPV4, LINKTYPE_IPV6):
            if not data:
                return "undecodable"
            v = data[0] >> 4
            pkt = dpkt.ip.IP(data) if v == 4 else dpkt.ip6.IP6(data) if v == 6 else None
            if pkt is None:
                return "not_ip"
        else:
            return "unsupported_link"
    except (dpkt.UnpackError, struct.error, ValueError, IndexError):
        return "undecodable"
    if isinstance(pkt, dpkt.ip.IP):
        ln = int(pkt.len)
    elif isinstance(pkt, dpkt.ip6.IP6):
        ln = int(pkt.plen) + 40
    elif isinstance(pkt, (bytes, bytearray)):
        # an IP ethertype whose header did not fit: dpkt leaves the raw bytes
        return "undecodable" if _looks_ip(lt, data) else "not_ip"
    else:
        return "not_ip"
    sp = dp = 0
    t = pkt.data
    if hasattr(t, "sport") and hasattr(t, "dport"):
        sp, dp = int(t.sport), int(t.dport)
    proto = int(pkt.p) if isinstance(pkt, dpkt.ip.IP) else int(pkt.nxt)
    return bytes(pkt.src), bytes(pkt.dst), proto, sp, dp, ln


def _looks_ip(lt: int, data: bytes) -> bool:
    if lt == LINKTYPE_ETHERNET and len(data) >= 14:
        return data[12:14] in (b"\x08\x00", b"\x86\xdd")
    return False


def _ip_text(packed: bytes) -> str:
    return str(ipaddress.ip_address(packed))


# ---- building the source -----------------------------------------------------------------
class TraceTraffic:
    """Packets of a trace as a :class:`routerd.sim.traffic.TrafficSource` (arrays, time order)."""

    def __init__(self, n: int, t_s: np.ndarray, src: np.ndarray, dst: np.ndarray,
                 bits: np.ndarray, flow: np.ndarray, report: TraceReport):
        self.n = n
        self.t = t_s
        self.src = src
        self.dst = dst
        self.bits = bits
        self.flow = flow
        self.report = report
        self.limit_s = math.inf

    def __len__(self) -> int:
        return len(self.t)

    @property
    def span_s(self) -> float:
        return float(self.t[-1]) if len(self.t) else 0.0

    def until(self, duration_s: float) -> TraceTraffic:
        """Only the packets at or before ``duration_s``; the rest counted ``after_duration``."""
        k = int(np.searchsorted(self.t, duration_s, side="right"))
        rep = self.report
        rep.skipped["after_duration"] = len(self.t) - k
        rep.injected = k
        out = TraceTraffic(self.n, self.t[:k], self.src[:k], self.dst[:k], self.bits[:k],
                           self.flow[:k], rep)
        out.limit_s = float(duration_s)
        return out

    def packets(self) -> Iterator[PacketTuple]:
        return zip(self.t.tolist(), self.src.tolist(), self.dst.tolist(),  # type: ignore[return-value]
                   self.bits.tolist(), self.flow.tolist())

    def demand_pps(self) -> np.ndarray:
        m = np.zeros((self.n, self.n))
        if len(self.t):
            np.add.at(m, (self.src, self.dst), 1.0)
            span = self.limit_s if math.isfinite(self.limit_s) else self.span_s
            m /= max(span, 1e-9)
        return m

    def mean_bits(self) -> float:
        return float(self.bits.mean()) if len(self.bits) else 8000.0


def _finish(n: int, ts_ns: list[int], src: list[int], dst: list[int], nbytes: list[float],
            fkey: list[int], report: TraceReport, speed: float, flows_per_pair: int) -> TraceTraffic:
    m = len(ts_ns)
    if m:
        t0 = min(ts_ns)
        rel = np.array([t - t0 for t in ts_ns], dtype=np.int64)
        order = np.argsort(rel, kind="stable")
        report.reordered = int(np.count_nonzero(np.diff(rel) < 0))
        report.first_time_s = t0 / _NS
        t = rel[order].astype(np.float64) / _NS / speed
        s = np.asarray(src, dtype=np.int64)[order]
        d = np.asarray(dst, dtype=np.int64)[order]
        b = np.asarray(nbytes, dtype=np.float64)[order] * 8.0
        fk = np.asarray(fkey, dtype=np.int64)[order]
    else:
        t = np.empty(0); s = np.empty(0, np.int64); d = np.empty(0, np.int64)
        b = np.empty(0); fk = np.empty(0, np.int64)
    flow = (s * n + d) * flows_per_pair + fk % flows_per_pair
    report.injected = m
    report.speed = speed
    report.span_s = float(t[-1]) if m else 0.0
    return TraceTraffic(n, t, s, d, b, flow, report)


def _check_speed(speed: float) -> float:
    if not (isinstance(speed, (int, float)) and math.isfinite(speed) and speed > 0):
        raise TraceError(Problem("--speed", speed, "must be a finite number above 0"))
    return float(speed)


def load_capture(path: str, topo: Topology, amap: AddressMap | None, *, speed: float = 1.0,
                 allow_truncated: bool = False, flows_per_pair: int = 8) -> TraceTraffic:
    """A pcap or pcapng file → packets between nodes.  TraceError for a truncated or
    corrupt file (naming the byte offset) unless ``allow_truncated``; the address map is
    required (captures carry addresses, not node names)."""
    speed = _check_speed(speed)
    try:
        with open(path, "rb") as fh:
            buf = fh.read()
    except OSError as e:
        raise TraceError(f"{path}: cannot be read: {e.strerror}") from None
    fmt = capture_format(buf)
    if fmt is None:
        raise TraceError(Problem(path, buf[:4].hex(), "is not the magic number of a pcap or pcapng file"))
    if amap is None:
        raise TraceError(f"{path}: a {fmt} capture holds IP addresses, not node names: give "
                         "--address-map FILE (YAML: node name -> addresses or CIDR prefixes)")
    rep = TraceReport(path, fmt)
    recs: list[_Rec] = []
    try:
        (_walk_pcap if fmt == "pcap" else _walk_pcapng)(buf, recs)
    except _Cut as c:
        if not allow_truncated:
            raise TraceError(f"{path}: {fmt} capture cut short or corrupt at byte {c.offset}: "
                             f"{c.detail} ({len(recs)} records before it are intact; "
                             "--allow-truncated uses them)") from None
        rep.truncated_at, rep.truncation = c.offset, c.detail
    rep.records = len(recs)
    ts: list[int] = []; src: list[int] = []; dst: list[int] = []
    nb: list[float] = []; fk: list[int] = []
    lookup = amap.lookup
    for r in recs:
        ep = _endpoints(r.linktype, r.data)
        if isinstance(ep, str):
            rep.skip(ep)
            if ep == "unsupported_link":
                rep.unsupported_links[r.linktype] = rep.unsupported_links.get(r.linktype, 0) + 1
            continue
        sa, da, proto, sp, dp, ln = ep
        s, d = lookup(sa), lookup(da)
        if s < 0 or d < 0:
            rep.skip("unmapped_both" if s < 0 and d < 0 else
                     "unmapped_source" if s < 0 else "unmapped_destination")
            if s < 0:
                rep.unmapped_addresses[_ip_text(sa)] += 1
            if d < 0:
                rep.unmapped_addresses[_ip_text(da)] += 1
            continue
        if s == d:
            rep.skip("same_node")
            continue
        if not 0 <= r.ts_ns < _TS_LIMIT:     # a damaged or absurd timestamp (pcapng's
            rep.skip("bad_time")             # resolution times 2^64 ticks goes far past it)
            continue
        ts.append(r.ts_ns); src.append(s); dst.append(d); nb.append(float(ln))
        fk.append(zlib.crc32(sa + da + bytes((proto,)) + sp.to_bytes(2, "big") + dp.to_bytes(2, "big")))
    return _finish(topo.n, ts, src, dst, nb, fk, rep, speed, flows_per_pair)


# ---- flow logs ---------------------------------------------------------------------------------
_FIELDS = ("time", "source", "destination", "bytes")
_OPTIONAL = ("packets", "duration_s")


def _time_ns(v: Any) -> int:
    if isinstance(v, bool):
        raise TypeError("true/false is not a time")
    if isinstance(v, (int, float)):
        if not math.isfinite(v):
            raise ValueError("not a finite number")
        return int(Decimal(repr(v)) * _NS) if isinstance(v, float) else int(v) * _NS
    s = str(v).strip()
    try:
        return int(Decimal(s) * _NS)
    except InvalidOperation:
        pass
    dt = datetime.fromisoformat(s.replace("Z", "+00:00"))
    if dt.tzinfo is None:
        raise ValueError("an ISO 8601 time needs a zone (Z or +hh:mm)")
    return int(Decimal(repr(dt.timestamp())) * _NS)


def _num(v: Any, what: str, lo_open: bool = False) -> float:
    if isinstance(v, bool):
        raise TypeError(f"{what} must be a number")
    x = float(v)
    if not math.isfinite(x) or x < 0 or (lo_open and x == 0):
        raise ValueError(f"{what} must be a finite number {'above' if lo_open else 'at least'} 0")
    return x


def load_flow_log(path: str, topo: Topology, amap: AddressMap | None, *, speed: float = 1.0,
                  flows_per_pair: int = 8) -> TraceTraffic:
    """A CSV or JSON-lines flow log → packets.  TraceError listing every bad row (file:line)."""
    speed = _check_speed(speed)
    try:
        with open(path, encoding="utf-8", newline="") as fh:
            text = fh.read()
    except UnicodeDecodeError as e:
        raise TraceError(f"{path}: neither a pcap or pcapng capture nor a UTF-8 text flow log "
                         f"({e.reason} at byte {e.start})") from None
    except OSError as e:
        raise TraceError(f"{path}: cannot be read: {e.strerror}") from None
    jsonl = path.lower().endswith((".jsonl", ".ndjson", ".json")) or text.lstrip()[:1] == "{"
    rep = TraceReport(path, "jsonl" if jsonl else "csv")
    problems: list[Problem] = []
    rows: list[tuple[int, Mapping[str, Any]]] = []
    if jsonl:
        for i, text_line in enumerate(text.splitlines(), 1):
            if not text_line.strip():
                continue
            try:
                obj = json.loads(text_line)
            except json.JSONDecodeError as e:
                problems.append(Problem(f"{path}:{i}", text_line[:40], f"is not JSON ({e.msg})"))
                continue
            if not isinstance(obj, dict):
                problems.append(Problem(f"{path}:{i}", text_line[:40], "is not a JSON object"))
                continue
            rows.append((i, obj))
    else:
        rd = csv.reader(io.StringIO(text))
        header = next(rd, None)
        if header is None:
            raise TraceError(Problem(path, "", "is empty; expected a header row "
                                               "time,source,destination,bytes"))
        cols = [h.strip() for h in header]
        missing = [f for f in _FIELDS if f not in cols]
        if missing:
            raise TraceError(Problem(f"{path}:1", ",".join(cols),
                                     f"lacks the column(s) {', '.join(missing)} "
                                     "(needs time,source,destination,bytes)"))
        for row in rd:
            if not row or all(not c.strip() for c in row):
                continue
            if len(row) != len(cols):
                problems.append(Problem(f"{path}:{rd.line_num}", ",".join(row)[:60],
                                        f"has {len(row)} fields, the header {len(cols)}"))
                continue
            rows.append((rd.line_num, dict(zip(cols, row))))
    rep.records = len(rows)
    ts: list[int] = []; src: list[int] = []; dst: list[int] = []
    nb: list[float] = []; fk: list[int] = []
    idx = topo.index
    for line, r in rows:
        where = f"{path}:{line}"
        miss = [f for f in _FIELDS if f not in r or r[f] in (None, "")]
        if miss:
            problems.append(Problem(where, "", f"lacks {', '.join(miss)}"))
            continue
        try:
            t = _time_ns(r["time"])
            size = _num(r["bytes"], "bytes", lo_open=True)
            k = int(_num(r.get("packets") or 1, "packets", lo_open=True))
            dur_ns = int(Decimal(str(_num(r.get("duration_s") or 0, "duration_s"))) * _NS)
            if not -_TS_LIMIT // 2 <= t < _TS_LIMIT // 2 or dur_ns >= _TS_LIMIT // 2:
                raise ValueError("time or duration_s more than 2^62 ns (146 years) from 0")
        except (ValueError, TypeError, InvalidOperation) as e:
            problems.append(Problem(where, str(r.get("time")), f"a bad value: {e}"))
            continue
        ends = []
        for f in ("source", "destination"):
            v = str(r[f]).strip()
            if v in idx:
                ends.append(idx[v])
                continue
            m = amap.lookup_text(v) if amap is not None else (
                -1 if _is_address(v) else None)
            if m is None:
                problems.append(Problem(where, v, f"{f} is neither a node of topology "
                                                  f"{topo.name!r} nor an IP address"))
                ends.append(-2)
            else:
                if m < 0:
                    rep.unmapped_addresses[v] += k
                ends.append(m)
        if -2 in ends:
            continue
        s, d = ends
        if s < 0 or d < 0:
            rep.skip("unmapped_both" if s < 0 and d < 0 else
                     "unmapped_source" if s < 0 else "unmapped_destination", k)
            continue
        if s == d:
            rep.skip("same_node", k)
            continue
        key = zlib.crc32(f"{r['source']}>{r['destination']}#{line}".encode())
        for j in range(k):
            ts.append(t + (dur_ns * j) // k)
            src.append(s); dst.append(d); nb.append(size / k); fk.append(key)
    if problems:
        shown = problems[:20]
        if len(problems) > 20:
            shown.append(Problem(path, len(problems) - 20, "more rows have problems"))
        raise TraceError(shown)
    return _finish(topo.n, ts, src, dst, nb, fk, rep, speed, flows_per_pair)


def _is_address(v: str) -> bool:
    try:
        ipaddress.ip_address(v)
        return True
    except ValueError:
        return False


def load_traffic(path: str, topo: Topology, address_map: str | None = None, *,
                 speed: float = 1.0, allow_truncated: bool = False,
                 flows_per_pair: int = 8) -> TraceTraffic:
    """Any trace (capture by its magic number, else a flow log) → a traffic source."""
    amap = load_address_map(address_map, topo) if address_map else None
    if not os.path.exists(path):
        raise TraceError(f"{path}: does not exist")
    try:
        with open(path, "rb") as fh:
            head = fh.read(4)
    except OSError as e:       # a directory, no permission: named, never a traceback
        raise TraceError(f"{path}: cannot be read: {e.strerror or e}") from None
    if capture_format(head) is not None:
        return load_capture(path, topo, amap, speed=speed, allow_truncated=allow_truncated,
                            flows_per_pair=flows_per_pair)
    return load_flow_log(path, topo, amap, speed=speed, flows_per_pair=flows_per_pair)


# ---- the simulator's hooks (routerd.sim.run calls these) -----------------------------------------
#: seconds simulated after a trace's last packet when no duration is given (for the
#: packets still in flight to arrive)
DRAIN_S = 1.0


def prepare(spec: Any, cfg: Any, topo: Topology) -> tuple[Any, TraceTraffic | None]:
    """(spec with duration and rate filled from the trace, the trace source) for a run
    with ``spec.traffic``; ``(spec, None)`` without one.  TraceError for bad inputs."""
    from dataclasses import replace

    path = getattr(spec, "traffic", None)
    if path is None:
        return spec, None
    src = load_traffic(path, topo, getattr(spec, "address_map", None),
                       speed=getattr(spec, "trace_speed", 1.0),
                       allow_truncated=getattr(spec, "allow_truncated", False),
                       flows_per_pair=cfg["sim.flows_per_pair"])
    dur = spec.duration_s if spec.duration_s is not None else src.span_s + DRAIN_S
    src = src.until(dur)
    return replace(spec, duration_s=float(dur), rate_pps=len(src) / dur), src


def annotate(result: dict[str, Any], src: TraceTraffic | None, link_trace: Any = None) -> dict[str, Any]:
    """Put the trace's import report (and the link trace's size) into a run's result."""
    s = result["summary"]
    if src is not None:
        rep = src.report
        result["trace"] = rep.to_dict()
        result["trace_lines"] = rep.lines()
        s["trace_records"] = rep.records
        s["trace_injected"] = rep.injected
        s["trace_not_injected"] = sum(rep.skipped.values())
        for r, c in rep.skipped.items():
            s[f"trace_skipped_{r}"] = c
        s["trace_truncated_at_byte"] = rep.truncated_at
    if link_trace is not None:
        result["link_trace"] = link_trace.to_dict()
        s["link_trace_changes"] = len(link_trace.changes)
    return result
