"""routerd.sim.trace: captures (pcap, pcapng) and flow logs as traffic, the address map, cut files.

Reference writers: dpkt's pcap and pcapng writers; libpcap's writer through Debian's
tcpdump (``tcpdump -r IN -w OUT``) and Wireshark's text2pcap (pcapng from a hex dump)
where installed — those tests are skipped with the reason otherwise.  tcpdump is also a
reference *reader*: the times and endpoints it prints must be the ones we read.
Packet bytes are built by hand (struct) from RFC 791 / RFC 8200 header layouts.
"""
from __future__ import annotations

import ipaddress
import json
import os
import shutil
import socket
import struct
import subprocess
from typing import Any

import numpy as np
import pytest
import yaml
from hypothesis import given, settings
from hypothesis import strategies as st

from routerd.io import config
from routerd.io.inputs import load_topology
from routerd.sim import trace as TR
from routerd.sim.run import run as run_sim

dpkt = pytest.importorskip("dpkt")
DEMO = load_topology(config.load(None))

MAP = """\
# an address map of our own lab: two halls, one address block each
w1: [10.0.1.0/24]
w2:
  - 10.0.2.0/24
  - fd00:0:0:2::/64
e3: [10.1.3.0/24, 10.1.33.7]
r1: 10.2.1.1
"""

# (time offset in microseconds, source, destination, UDP payload bytes)
PACKETS = [
    (0, "10.0.1.5", "10.1.3.9", 100),
    (125, "10.1.3.9", "10.0.1.5", 1200),
    (250_000, "10.0.2.7", "10.1.33.7", 40),
    (250_001, "10.0.1.5", "10.0.1.6", 60),       # same node at both ends
    (1_000_000, "10.0.1.5", "192.0.2.1", 60),    # unmapped destination (TEST-NET-1)
    (1_500_000, "198.51.100.1", "10.0.1.5", 60), # unmapped source
    (2_000_003, "10.2.1.1", "10.0.2.9", 500),
]
T0_US = 1_796_119_200_000_000          # 2026-12-01 10:00:00 UTC, in microseconds


def ip4(src: str, dst: str, payload: int, sport: int = 4000, dport: int = 5000) -> bytes:
    """An IPv4/UDP datagram (RFC 791, RFC 768 layouts; checksums left zero)."""
    udp = struct.pack("!HHHH", sport, dport, 8 + payload, 0) + b"\x00" * payload
    return struct.pack("!BBHHHBBH4s4s", 0x45, 0, 20 + len(udp), 1, 0, 64, 17, 0,
                       socket.inet_aton(src), socket.inet_aton(dst)) + udp


def ip6(src: str, dst: str, payload: int) -> bytes:
    """An IPv6/UDP datagram (RFC 8200 layout)."""
    udp = struct.pack("!HHHH", 4000, 5000, 8 + payload, 0) + b"\x00" * payload
    return (struct.pack("!IHBB", 6 << 28, len(udp), 17, 64) + ipaddress.ip_address(src).packed
            + ipaddress.ip_address(dst).packed + udp)


def eth(payload: bytes, ethertype: int = 0x0800, vlan: int | None = None) -> bytes:
    tag = b"" if vlan is None else struct.pack("!HH", 0x8100, vlan)
    return b"\x02\x00\x00\x00\x00\x01" + b"\x02\x00\x00\x00\x00\x02" + tag + \
        struct.pack("!H", ethertype) + payload


def frames() -> list[tuple[int, bytes]]:
    return [(T0_US + us, eth(ip4(s, d, n))) for us, s, d, n in PACKETS]


def expected(speed: float = 1.0) -> dict[str, Any]:
    mp = {"10.0.1.": "w1", "10.0.2.": "w2", "10.1.3.": "e3", "10.1.33.7": "e3", "10.2.1.1": "r1"}

    def node(a: str) -> str | None:
        for p, n in mp.items():
            if a.startswith(p) or a == p:
                return n
        return None

    kept = [(us, node(s), node(d), n) for us, s, d, n in PACKETS
            if node(s) and node(d) and node(s) != node(d)]
    us0 = kept[0][0]
    return {"t": np.array([(us - us0) * 1000 for us, *_ in kept], dtype=np.int64) / 1e9 / speed,
            "src": [DEMO.index[s] for _, s, _, _ in kept],
            "dst": [DEMO.index[d] for _, _, d, _ in kept],
            "bits": [(20 + 8 + n) * 8.0 for *_, n in kept]}


def _put(path: str, data: bytes) -> None:
    with open(path, "wb") as fh:
        fh.write(data)


def _get(path: str) -> bytes:
    with open(path, "rb") as fh:
        return fh.read()


def write_pcap(path: str, recs: list[tuple[int, bytes]], nano: bool = False) -> None:
    with open(path, "wb") as fh:
        w = dpkt.pcap.Writer(fh, nano=nano)
        for us, b in recs:
            # the writer takes float seconds: a small base keeps nanoseconds exact in a float
            w.writepkt(b, ts=(us - T0_US) / 1e6 + 1000.0 if nano else us / 1e6)


def write_pcapng(path: str, recs: list[tuple[int, bytes]]) -> None:
    with open(path, "wb") as fh:
        w = dpkt.pcapng.Writer(fh)
        for us, b in recs:
            w.writepkt(b, ts=us / 1e6)


@pytest.fixture
def amap(tmp_path: Any) -> str:
    p = tmp_path / "map.yaml"
    p.write_text(MAP)
    return str(p)


def check(src: TR.TraceTraffic, speed: float = 1.0) -> None:
    ex = expected(speed)
    assert len(src) == len(ex["src"])
    np.testing.assert_array_equal(src.t, ex["t"])
    assert src.src.tolist() == ex["src"] and src.dst.tolist() == ex["dst"]
    assert src.bits.tolist() == ex["bits"]
    rep = src.report
    assert rep.records == len(PACKETS)
    assert rep.skipped["same_node"] == 1
    assert rep.skipped["unmapped_destination"] == 1 and rep.skipped["unmapped_source"] == 1
    assert rep.injected + sum(rep.skipped.values()) == rep.records   # every record accounted
    assert dict(rep.unmapped_addresses) == {"192.0.2.1": 1, "198.51.100.1": 1}
    # packets of one 5-tuple keep one flow id, within their pair's block of ids
    fpp = 8
    assert ((src.flow // fpp) == src.src * DEMO.n + src.dst).all()


# ---- captures from reference writers ---------------------------------------------------
def test_dpkt_pcap_micro_and_nano(tmp_path: Any, amap: str) -> None:
    for nano in (False, True):
        p = str(tmp_path / f"c{nano}.pcap")
        write_pcap(p, frames(), nano=nano)
        check(TR.load_traffic(p, DEMO, amap))
        check(TR.load_traffic(p, DEMO, amap, speed=4.0), speed=4.0)


def test_dpkt_pcapng(tmp_path: Any, amap: str) -> None:
    p = str(tmp_path / "c.pcapng")
    write_pcapng(p, frames())
    src = TR.load_traffic(p, DEMO, amap, speed=0.5)
    check(src, speed=0.5)
    assert src.report.format == "pcapng"


@pytest.mark.skipif(shutil.which("tcpdump") is None, reason="tcpdump is not installed "
                    "(Debian: apt-get install tcpdump)")
def test_libpcap_writer_and_reader_agree(tmp_path: Any, amap: str) -> None:
    # libpcap's writer: tcpdump copies the capture record by record
    a, b = str(tmp_path / "a.pcap"), str(tmp_path / "b.pcap")
    write_pcap(a, frames())
    subprocess.run(["tcpdump", "-q", "-r", a, "-w", b], check=True, capture_output=True)
    check(TR.load_traffic(b, DEMO, amap))
    # libpcap's reader: the times and addresses tcpdump prints are the ones we read
    out = subprocess.run(["tcpdump", "-tt", "-n", "-r", b], check=True, capture_output=True,
                         text=True, env={**os.environ, "TZ": "UTC"}).stdout.splitlines()
    seen = [(line.split()[0], line.split()[2].rsplit(".", 1)[0], line.split()[4].rsplit(".", 1)[0])
            for line in out]
    want = [(f"{(T0_US + us) // 10**6}.{(T0_US + us) % 10**6:06d}", s, d) for us, s, d, _ in PACKETS]
    assert seen == want


@pytest.mark.skipif(shutil.which("text2pcap") is None, reason="text2pcap is not installed "
                    "(Debian: apt-get install wireshark-common)")
def test_text2pcap_pcapng_raw_ip(tmp_path: Any, amap: str) -> None:
    # Wireshark's pcapng writer, raw IP link type (101), times from a text dump
    lines = []
    for us, s, d, n in PACKETS:
        sec, frac = divmod(T0_US + us, 10**6)
        stamp = np.datetime64(sec, "s").astype("datetime64[s]").item().strftime("%Y-%m-%d %H:%M:%S")
        lines.append(f"{stamp}.{frac:06d} 000000 " + " ".join(f"{x:02x}" for x in ip4(s, d, n)))
    dump = tmp_path / "dump.txt"
    dump.write_text("\n".join(lines) + "\n")
    out = str(tmp_path / "t.pcapng")
    subprocess.run(["text2pcap", "-q", "-l", "101", "-t", "%Y-%m-%d %H:%M:%S.%f", str(dump), out],
                   check=True, capture_output=True, env={**os.environ, "TZ": "UTC"})
    src = TR.load_traffic(out, DEMO, amap)
    check(src)
    assert src.report.format == "pcapng"
    assert src.report.first_time_s == pytest.approx(T0_US / 1e6)


def test_ipv6_vlan_and_non_ip(tmp_path: Any, amap: str) -> None:
    recs = [(T0_US, eth(ip6("fd00:0:0:2::5", "fd00::9", 10), 0x86DD)),              # unmapped
            (T0_US + 10, eth(ip4("10.0.2.5", "10.1.3.9", 10), 0x0800, vlan=7)),   # 802.1Q
            (T0_US + 20, eth(b"\x00\x01\x08\x00\x06\x04\x00\x01" + b"\x00" * 20, 0x0806)),  # ARP
            (T0_US + 30, eth(ip6("fd00:0:0:2::5", "fd00:0:0:2::6", 10), 0x86DD)),  # same node
            (T0_US + 40, eth(b"\x45\x00", 0x0800))]                              # cut header
    p = str(tmp_path / "v.pcap")
    write_pcap(p, recs)
    src = TR.load_traffic(p, DEMO, amap)
    assert src.src.tolist() == [DEMO.index["w2"]] and src.dst.tolist() == [DEMO.index["e3"]]
    sk = src.report.skipped
    assert (sk["unmapped_destination"], sk["not_ip"], sk["same_node"], sk["undecodable"]) == (1, 1, 1, 1)
    assert src.report.unmapped_addresses == {"fd00::9": 1}


# ---- cut and corrupt captures ---------------------------------------------------------------
def pcap_offsets(recs: list[tuple[int, bytes]]) -> list[int]:
    # libpcap savefile layout: a 24-byte file header, then 16-byte record headers
    out, off = [], 24
    for _, b in recs:
        out.append(off)
        off += 16 + len(b)
    return out


def test_truncated_pcap_names_the_offset(tmp_path: Any, amap: str) -> None:
    recs = frames()
    p = str(tmp_path / "c.pcap")
    write_pcap(p, recs)
    data = _get(p)
    offs = pcap_offsets(recs)
    assert offs[-1] + 16 + len(recs[-1][1]) == len(data)
    for k in (1, 4, 6):
        for cut in (offs[k] + 3, offs[k] + 16, offs[k] + 16 + 9):
            q = str(tmp_path / f"cut{k}-{cut}.pcap")
            _put(q, data[:cut])
            with pytest.raises(TR.TraceError, match=rf"cut short or corrupt at byte {offs[k]}:"):
                TR.load_traffic(q, DEMO, amap)
            src = TR.load_traffic(q, DEMO, amap, allow_truncated=True)
            assert src.report.records == k and src.report.truncated_at == offs[k]
            assert any(f"byte {offs[k]}" in ln for ln in src.report.lines())
    # a file cut inside its own header
    q = str(tmp_path / "hdr.pcap")
    _put(q, data[:10])
    with pytest.raises(TR.TraceError, match="at byte 0"):
        TR.load_traffic(q, DEMO, amap)


def test_corrupt_pcap_record_length(tmp_path: Any, amap: str) -> None:
    recs = frames()
    p = str(tmp_path / "c.pcap")
    write_pcap(p, recs)
    data = bytearray(_get(p))
    off = pcap_offsets(recs)[3]
    data[off + 8:off + 12] = struct.pack("<I" if data[:4] == b"\xd4\xc3\xb2\xa1" else ">I", 0x7FFFFFF0)
    _put(p, bytes(data))
    with pytest.raises(TR.TraceError, match=rf"byte {off}: record length 2147483632 is above"):
        TR.load_traffic(p, DEMO, amap)
    assert TR.load_traffic(p, DEMO, amap, allow_truncated=True).report.records == 3


def test_truncated_pcapng_names_the_block(tmp_path: Any, amap: str) -> None:
    p = str(tmp_path / "c.pcapng")
    write_pcapng(p, frames())
    data = _get(p)
    # pcapng block walk (draft-ietf-opsawg-pcapng §3.1): type u32, total length u32
    offs, off = [], 0
    while off < len(data):
        offs.append(off)
        off += struct.unpack_from("<I", data, off + 4)[0]
    assert off == len(data)
    pkt_blocks = offs[2:]                    # after the section header and the interface block
    assert len(pkt_blocks) == len(PACKETS)
    for k in (0, 5):
        cut = pkt_blocks[k] + 30
        q = str(tmp_path / f"cut{k}.pcapng")
        _put(q, data[:cut])
        with pytest.raises(TR.TraceError, match=rf"at byte {pkt_blocks[k]}:"):
            TR.load_traffic(q, DEMO, amap)
        assert TR.load_traffic(q, DEMO, amap, allow_truncated=True).report.records == k


def test_not_a_capture_and_no_map(tmp_path: Any, amap: str) -> None:
    p = str(tmp_path / "c.pcap")
    write_pcap(p, frames())
    with pytest.raises(TR.TraceError, match="give --address-map"):
        TR.load_traffic(p, DEMO, None)
    with pytest.raises(TR.TraceError, match="--speed"):
        TR.load_traffic(p, DEMO, amap, speed=0)


# ---- the address map --------------------------------------------------------------------------
def test_address_map_errors_name_file_and_line(tmp_path: Any) -> None:
    p = tmp_path / "bad.yaml"
    p.write_text(
        "w1:\n"
        "  - 10.0.1.0/24\n"                # line 2
        "e3:\n"
        "  - 10.0.0.0/16\n"                # line 4: contains w1's 10.0.1.0/24
        "nosuch: [10.9.0.0/16]\n"          # line 5: not a node
        "w2: [10.0.2.1/24]\n"              # line 6: host bits
        "w4: [not-an-ip]\n"                # line 7
        "w1: [10.3.0.0/16]\n"              # line 8: listed twice
        "w5: [fd00::/48]\n"                # line 9
        "w6: ['fd00:0:0:1::/64']\n"        # line 10: inside w5's prefix
        "W3: [10.7.0.0/16]\n")             # line 11: case
    with pytest.raises(TR.TraceError) as ei:
        TR.load_address_map(str(p), DEMO)
    msg = str(ei.value)
    path = str(p)
    assert f"{path}:4: '10.0.0.0/16' of e3 overlaps 10.0.1.0/24 of w1 (line 2)" in msg
    assert f"{path}:5: 'nosuch' is not a node of topology 'demo-lab'" in msg
    assert f"{path}:6: '10.0.2.1/24' has host bits set (did you mean 10.0.2.0/24?)" in msg
    assert f"{path}:7: 'not-an-ip' is not an IP address" in msg
    assert f"{path}:8: 'w1' is listed twice (first at line 1)" in msg
    assert f"{path}:10:" in msg and "overlaps fd00::/48 of w5 (line 9)" in msg
    assert f"{path}:11: 'W3'" in msg and "did you mean w3?" in msg
    assert len(ei.value.problems) == 7


def test_address_map_lookup(tmp_path: Any, amap: str) -> None:
    m = TR.load_address_map(amap, DEMO)
    # same-node prefixes may nest: merged, not an error
    q = tmp_path / "nest.yaml"
    q.write_text("w1: [10.0.0.0/8, 10.1.0.0/16, 10.1.2.3]\ne1: [11.0.0.0/8]\n")
    n = TR.load_address_map(str(q), DEMO)
    assert n.lookup_text("10.200.0.1") == DEMO.index["w1"] and n.lookup_text("11.0.0.0") == DEMO.index["e1"]
    assert n.lookup_text("12.0.0.0") == -1 and n.lookup_text("9.255.255.255") == -1
    assert m.lookup_text("fd00:0:0:2:ffff::1") == DEMO.index["w2"]
    assert m.lookup_text("10.1.33.8") == -1 and m.lookup_text("10.2.1.1") == DEMO.index["r1"]
    assert m.lookup_text("w1") is None


# ---- flow logs -----------------------------------------------------------------------------------
def test_csv_and_jsonl_flow_logs(tmp_path: Any, amap: str) -> None:
    c = tmp_path / "flows.csv"
    c.write_text("time,source,destination,bytes,packets,duration_s\n"
                 "100.5,w1,e3,4000,4,1.0\n"
                 "100.0,10.0.2.9,10.1.3.1,1500,,\n"
                 "101,w1,w1,100,1,0\n"
                 "102,w1,203.0.113.5,100,2,0\n")
    src = TR.load_traffic(str(c), DEMO, amap)
    assert src.t.tolist() == [0.0, 0.5, 0.75, 1.0, 1.25]
    assert src.src.tolist() == [DEMO.index["w2"]] + [DEMO.index["w1"]] * 4
    assert src.bits.tolist() == [12000.0] + [8000.0] * 4
    assert src.report.skipped["same_node"] == 1 and src.report.skipped["unmapped_destination"] == 2
    j = tmp_path / "flows.jsonl"
    j.write_text('{"time": "2026-12-01T10:00:00.5Z", "source": "e3", "destination": "w2", "bytes": 64}\n'
                 '\n'
                 '{"time": "2026-12-01T10:00:00Z", "source": "w2", "destination": "e3", "bytes": 64}\n')
    src = TR.load_traffic(str(j), DEMO, None, speed=2)
    assert src.t.tolist() == [0.0, 0.25] and src.report.reordered == 1
    assert src.report.first_time_s == 1796119200.0


def test_flow_log_errors_name_the_line(tmp_path: Any) -> None:
    c = tmp_path / "bad.csv"
    c.write_text("time,source,destination,bytes\n"
                 "1,w1,e3,100\n"
                 "x,w1,e3,100\n"         # line 3
                 "2,w1,nowhere,100\n"    # line 4
                 "3,w1,e3,-5\n"          # line 5
                 "4,w1,e3\n")            # line 6
    with pytest.raises(TR.TraceError) as ei:
        TR.load_traffic(str(c), DEMO, None)
    msg = str(ei.value)
    for line in (3, 4, 5, 6):
        assert f"{c}:{line}:" in msg
    assert "nowhere" in msg and "neither a node" in msg
    h = tmp_path / "nohdr.csv"
    h.write_text("t,src,dst,size\n")
    with pytest.raises(TR.TraceError, match=r"lacks the column\(s\) time, source, destination, bytes"):
        TR.load_traffic(str(h), DEMO, None)
    j = tmp_path / "bad.jsonl"
    j.write_text('{"time": 1, "source": "w1", "destination": "e3", "bytes": 10}\n{"time": \n')
    with pytest.raises(TR.TraceError, match=rf"{j}:2:.*is not JSON"):
        TR.load_traffic(str(j), DEMO, None)


# ---- through the simulator --------------------------------------------------------------------------
def test_simulated_run_injects_exactly_the_trace(tmp_path: Any, amap: str) -> None:
    p = str(tmp_path / "c.pcap")
    write_pcap(p, frames())
    res = run_sim({"policy": "shortest", "traffic": p, "address_map": amap, "warmup_s": 0.0,
                   "seed": 1, "duration_s": None})
    s = res["summary"]
    ex = expected()
    assert s["offered"] == len(ex["src"]) == s["delivered"] == s["trace_injected"]
    assert s["trace_records"] == len(PACKETS) and s["trace_not_injected"] == 3
    assert s["duration_s"] == pytest.approx(ex["t"][-1] + TR.DRAIN_S)
    assert res["trace"]["skipped"]["same_node"] == 1
    # --duration shorter than the trace: the rest is counted, not lost silently
    res = run_sim({"policy": "shortest", "traffic": p, "address_map": amap, "warmup_s": 0.0,
                   "seed": 1, "duration_s": 0.5})
    assert res["summary"]["offered"] == 3 and res["summary"]["trace_skipped_after_duration"] == 1


def test_simulate_command_with_a_trace(tmp_path: Any, amap: str, capsys: pytest.CaptureFixture[str]) -> None:
    from routerd.tools.cli import main

    p = str(tmp_path / "c.pcapng")
    write_pcapng(p, frames())
    out = str(tmp_path / "o")
    assert main(["simulate", "--policy", "qrouting", "--traffic", p, "--address-map", amap,
                 "--seed", "1", "--speed", "2", "--warmup", "0", "--out", out, "--quiet"]) == 0
    text = capsys.readouterr().out
    assert "4 packets injected over 1 s (speed x2)" in text and "unmapped source: 1" in text
    with open(os.path.join(out, "summary.json")) as fh:
        assert json.load(fh)["offered"] == 4
    assert main(["simulate", "--policy", "shortest", "--seed", "1", "--out", out]) == 2
    assert "--rate" in capsys.readouterr().err


@pytest.mark.skipif(shutil.which("mergecap") is None, reason="mergecap is not installed "
                    "(Debian: apt-get install wireshark-common)")
def test_pcapng_with_two_interfaces_of_different_resolution(tmp_path: Any, amap: str) -> None:
    # Wireshark's mergecap keeps one interface description per input: microseconds for the
    # first capture, nanoseconds (if_tsresol 9) for the second; times interleave
    a, b, m = (str(tmp_path / n) for n in ("a.pcap", "b.pcap", "m.pcapng"))
    with open(a, "wb") as fh:
        w = dpkt.pcap.Writer(fh)
        for i in range(3):
            w.writepkt(eth(ip4("10.0.1.5", "10.1.3.9", 10)), ts=1000.0 + i * 0.5)
    with open(b, "wb") as fh:
        w = dpkt.pcap.Writer(fh, nano=True)
        for i in range(3):
            w.writepkt(eth(ip4("10.1.3.9", "10.0.2.5", 10)), ts=1000.25 + i * 0.5 + 7e-9)
    subprocess.run(["mergecap", "-I", "none", "-w", m, a, b], check=True, capture_output=True)
    src = TR.load_traffic(m, DEMO, amap)
    ns = [0, 250_000_007, 500_000_000, 750_000_007, 1_000_000_000, 1_250_000_007]
    np.testing.assert_array_equal(src.t, np.array(ns, dtype=np.int64) / 1e9)
    w1, e3, w2 = (DEMO.index[x] for x in ("w1", "e3", "w2"))
    assert src.src.tolist() == [w1, e3] * 3 and src.dst.tolist() == [e3, w2] * 3


# ---- properties ------------------------------------------------------------------------------
@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(st.integers(0, 2**32 - 1), st.integers(8, 32), st.integers(0, 5)),
                min_size=1, max_size=12),
       st.lists(st.integers(0, 2**32 - 1), min_size=1, max_size=40))
def test_lookup_equals_a_linear_scan(prefixes: list[tuple[int, int, int]], probes: list[int]) -> None:
    # reference: ipaddress's own containment test over every entry, one by one
    nodes = DEMO.nodes[:6]
    entries: dict[str, list[str]] = {}
    nets: list[tuple[ipaddress.IPv4Network, str]] = []
    for addr, plen, who in prefixes:
        net = ipaddress.ip_network((addr, plen), strict=False)
        if any(net.overlaps(o) and n != nodes[who] for o, n in nets):
            continue                                   # the map refuses those (tested above)
        nets.append((net, nodes[who]))
        entries.setdefault(nodes[who], []).append(str(net))
    m = TR.address_map_from_node(yaml.compose(yaml.safe_dump(entries)), DEMO, "<prop>")
    for a in probes + [int(n.network_address) for n, _ in nets] + [int(n.broadcast_address) for n, _ in nets]:
        ip = ipaddress.ip_address(a)
        want = next((DEMO.index[n] for net, n in nets if ip in net), -1)
        assert m.lookup(ip.packed) == want


@settings(max_examples=80, deadline=None)
@given(st.data())
def test_damaged_captures_never_crash(tmp_path_factory: Any, data: Any) -> None:
    d = tmp_path_factory.mktemp("fuzz")
    amap = d / "map.yaml"
    amap.write_text(MAP)
    p = str(d / "c.pcapng") if data.draw(st.booleans()) else str(d / "c.pcap")
    (write_pcapng if p.endswith("ng") else write_pcap)(p, frames())
    buf = bytearray(_get(p))
    for _ in range(data.draw(st.integers(1, 6))):
        i = data.draw(st.integers(0, len(buf) - 1))
        buf[i] = data.draw(st.integers(0, 255))
    cut = data.draw(st.integers(0, len(buf)))
    _put(p, bytes(buf[:cut]))
    try:
        src = TR.load_traffic(p, DEMO, str(amap), allow_truncated=True)
    except TR.TraceError:
        return                                          # a clear refusal (e.g. a bad magic)
    rep = src.report
    assert rep.injected + sum(rep.skipped.values()) == rep.records
    assert (np.diff(src.t) >= 0).all()


def test_a_timestamp_past_a_64_bit_nanosecond_count_is_skipped(tmp_path: Any, amap: str) -> None:
    """pcapng keeps 64-bit tick counts (pcapng spec, Enhanced Packet Block: Timestamp
    Upper/Lower); at microsecond resolution the top values are far past 2^63 ns (the
    hypothesis test above once found one that crashed the load).  Such a record is counted
    as bad_time; the others load as usual."""
    import struct

    p = str(tmp_path / "c.pcapng")
    write_pcapng(p, frames())
    buf = bytearray(_get(p))
    off = 0
    while True:                                   # walk the blocks to the first EPB (type 6)
        btype, blen = struct.unpack_from("<II", buf, off)
        if btype == 6:
            break
        off += blen
    struct.pack_into("<I", buf, off + 12, 0xFFFFFFFF)   # its timestamp's upper 32 bits
    _put(p, bytes(buf))
    src = TR.load_traffic(p, DEMO, amap)
    rep = src.report
    assert rep.skipped["bad_time"] == 1
    assert rep.injected == len(frames()) - 1 - sum(v for k, v in rep.skipped.items() if k != "bad_time")
    assert (np.diff(src.t) >= 0).all()


def test_a_flow_log_time_or_duration_past_a_64_bit_nanosecond_count_is_refused(
        tmp_path: Any) -> None:
    j = tmp_path / "far.jsonl"
    j.write_text('{"time": 1, "source": "w1", "destination": "e3", "bytes": 10}\n'
                 '{"time": 1e30, "source": "w1", "destination": "e3", "bytes": 10}\n'
                 '{"time": 2, "source": "w1", "destination": "e3", "bytes": 10, '
                 '"duration_s": 1e300}\n')
    with pytest.raises(TR.TraceError) as ei:
        TR.load_traffic(str(j), DEMO, None)
    msg = str(ei.value)
    assert f"{j}:2:" in msg and f"{j}:3:" in msg and f"{j}:1:" not in msg, msg
    assert msg.count("more than 2^62 ns (146 years) from 0") == 2, msg
