"""Agent forwarding benchmark: packets/s per core of ``routerd agent`` against a bare UDP relay.

Three network namespaces in a line, src — relay — dst, joined by two veth pairs without rate
limits (the same building blocks as ``routerd lab``, under the lab's own name prefix so its
leftover cleanup covers them).  In the relay namespace runs, one after the other:

* the **agent** — a real ``routerd agent`` process for the middle node of a three-node
  topology (no service: it forwards by its static fallback, the same per-packet path as with a
  table: decode, TTL, flowlet lookup, re-encode, send);
* the **bare relay** — a Python loop that receives on the same address and sends each
  datagram unchanged to the next hop (``recv`` / ``send`` on connected UDP sockets), the
  ceiling of any user-space relay written in Python.

This process sends overlay data packets from src as fast as it can and counts arrivals at
dst.  The figure is packets forwarded per CPU-second of the relaying process (its utime +
stime from /proc), so it does not depend on how fast the sender is, and the ratio of the
two is measured in one run on the same sockets.

Figures: ``agent_forward_per_core_pps`` (ratio to the bare relay),
``bare_relay_per_core_pps`` (ratio 1, the reference).  Without root or ``ip netns`` the
module returns no figures and says why on stderr.
"""
from __future__ import annotations

import os
import shutil
import socket
import subprocess
import sys
import tempfile
import time
from typing import Any

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, ROOT)

from routerd.agent import overlay as ov
from routerd.io import topofiles as TF
from routerd.tools import lab as L

PORT = 7400
BARE = r"""
import socket, sys
a = socket.socket(socket.AF_INET, socket.SOCK_DGRAM); a.bind((sys.argv[1], int(sys.argv[3])))
a.connect((sys.argv[2], int(sys.argv[3])))
b = socket.socket(socket.AF_INET, socket.SOCK_DGRAM); b.bind((sys.argv[4], int(sys.argv[3])))
b.connect((sys.argv[5], int(sys.argv[3])))
print("ready", flush=True)
recv, send = a.recv, b.send
while True:
    try:
        send(recv(65535))
    except OSError:
        pass
"""


def _cpu_s(pid: int) -> float:
    with open(f"/proc/{pid}/stat") as fh:
        f = fh.read().rsplit(")", 1)[1].split()
    return (int(f[11]) + int(f[12])) / os.sysconf("SC_CLK_TCK")


def _unavailable() -> str | None:
    return L.unavailable("rdbenchprobe")


def _measure(proc: subprocess.Popen[Any], tx: socket.socket, rx: socket.socket, pkt: bytes,
             seconds: float) -> float:
    """Blast packets for ``seconds``; packets delivered per CPU-second of ``proc``."""
    # warm up: until packets come through
    end = time.monotonic() + 10
    got = 0
    while time.monotonic() < end and got == 0:
        tx.send(pkt)
        time.sleep(0.01)
        try:
            while rx.recv(65535):
                got += 1
        except BlockingIOError:
            pass
    if got == 0:
        raise RuntimeError("nothing came through the relay")
    c0 = _cpu_s(proc.pid)
    n = 0
    t_end = time.monotonic() + seconds
    while time.monotonic() < t_end:
        for _ in range(32):
            try:
                tx.send(pkt)
            except OSError:
                pass
        try:
            while True:
                rx.recv(65535)
                n += 1
        except BlockingIOError:
            pass
    time.sleep(0.1)
    try:
        while True:
            rx.recv(65535)
            n += 1
    except BlockingIOError:
        pass
    cpu = _cpu_s(proc.pid) - c0
    return n / cpu if cpu > 0 else float("nan")


def run(quick: bool = False) -> dict[str, dict[str, Any]]:
    why = _unavailable()
    if why:
        print(f"bench_agent: skipped: {why}", file=sys.stderr)
        return {}
    seconds = 2.0 if quick else 5.0
    base = tempfile.mkdtemp(prefix=f"{L.PREFIX}-", dir="/tmp")
    pid = os.getpid()
    ns = [f"{L.PREFIX}{pid}-{i}" for i in range(3)]
    addr = {"s": "10.254.0.1", "r1": "10.254.0.2", "r2": "10.254.0.5", "d": "10.254.0.6"}
    procs: list[subprocess.Popen[Any]] = []
    socks: list[socket.socket] = []
    try:
        for n in ns:
            L.sh("ip", "netns", "add", n)
            L.sh("ip", "-n", n, "link", "set", "lo", "up")
        for dev, a, b, aa, ab in (("v0", ns[0], ns[1], addr["s"], addr["r1"]),
                                  ("v1", ns[1], ns[2], addr["r2"], addr["d"])):
            L.sh("ip", "-n", a, "link", "add", dev, "type", "veth", "peer", "name", dev, "netns", b)
            L.sh("ip", "-n", a, "addr", "add", f"{aa}/30", "dev", dev)
            L.sh("ip", "-n", b, "addr", "add", f"{ab}/30", "dev", dev)
            L.sh("ip", "-n", a, "link", "set", dev, "up")
            L.sh("ip", "-n", b, "link", "set", dev, "up")
        import yaml

        topo_doc = {"topology": {"name": "bench-line", "defaults": {"capacity_bps": 1e9, "buffer_pkts": 100},
                                 "nodes": ["s", "r", "d"],
                                 "links": [{"between": ["s", "r"], "delay_s": 0.0},
                                           {"between": ["r", "d"], "delay_s": 0.0}]}}
        tp = os.path.join(base, "topo.yaml")
        with open(tp, "w") as fh:
            yaml.safe_dump(topo_doc, fh)
        with open(os.path.join(base, "underlay.yaml"), "w") as fh:
            yaml.safe_dump({"underlay": {"links": [
                {"between": ["s", "r"], "addresses": [f"{addr['s']}:{PORT}", f"{addr['r1']}:{PORT}"]},
                {"between": ["r", "d"], "addresses": [f"{addr['r2']}:{PORT}", f"{addr['d']}:{PORT}"]}]}}, fh)
        cfg = os.path.join(base, "cfg.yaml")
        with open(cfg, "w") as fh:
            yaml.safe_dump({"topology": {"file": tp},
                            "service": {"ingest": f"ipc://{base}/none-i", "publish": f"ipc://{base}/none-p"},
                            "agent": {"underlay": "underlay.yaml", "metrics": "127.0.0.1:0",
                                      "probe_interval_s": 60.0, "detect_multiplier": 255,
                                      "flowlet_gap_s": 1.0, "report_interval_s": 60.0}}, fh)
        topo = TF.load(tp)
        pkt = ov.data_packet(ov.topology_tag(topo.digest), 0, 2, 1, 1, time.time_ns(), 64, 200)
        with L.in_netns(ns[0]):
            tx = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
            tx.bind((addr["s"], PORT))
            tx.connect((addr["r1"], PORT))
            tx.setblocking(False)
        with L.in_netns(ns[2]):
            rx = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
            rx.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 8 << 20)
            rx.bind((addr["d"], PORT))
            rx.setblocking(False)
        socks += [tx, rx]
        results: dict[str, float] = {}
        for which in ("bare", "agent"):
            if which == "bare":
                cmd = [sys.executable, "-c", BARE, addr["r1"], addr["s"], str(PORT), addr["r2"], addr["d"]]
            else:
                cmd = [sys.executable, "-m", "routerd", "agent", "--node", "r", "--config", cfg]
            p = subprocess.Popen(["ip", "netns", "exec", ns[1], *cmd], stdout=subprocess.PIPE,
                                 stderr=subprocess.DEVNULL, text=True, cwd=ROOT)
            procs.append(p)
            assert p.stdout is not None
            for line in p.stdout:
                if "ready" in line:
                    break
            results[which] = _measure(p, tx, rx, pkt, seconds)
            p.terminate()
            p.wait(10)
        bare, agent = results["bare"], results["agent"]
        return {
            "agent_forward_per_core_pps": {"value": agent, "unit": "packets/s per core", "ratio": agent / bare,
                                           "against": "bare Python UDP relay loop, same namespaces and sockets"},
            "bare_relay_per_core_pps": {"value": bare, "unit": "packets/s per core", "ratio": 1.0,
                                        "against": "itself (the reference)"},
        }
    finally:
        for s in socks:
            s.close()
        for p in procs:
            if p.poll() is None:
                p.kill()
                p.wait(10)
        L.remove_leftovers(only_pid=pid)
        shutil.rmtree(base, ignore_errors=True)


if __name__ == "__main__":
    import json

    print(json.dumps(run(quick="--quick" in sys.argv), indent=2))
