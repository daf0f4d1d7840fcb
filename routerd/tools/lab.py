"""``routerd lab``: an emulated overlay on one Linux host — namespaces, veth, tbf, real sockets.

Owns building and tearing down the lab (one network namespace per node, one veth pair per
two-way link with a /30 of 10.254.0.0/16 inside its two namespaces only, a tbf rate limit
on each end from the link's capacity), starting the service and one agent per node,
offering overlay traffic, the scripted events (a capacity change, a kill -9 of the
service), and writing ``DIR/summary.json`` with the simulator's keys.

Must not import: the engine (the service process runs it), the simulator's core (only its
traffic source and summary writer are reused).

Safety: every namespace is named ``rdlab<pid>-<node index>`` (pid: this lab process), so
a lab only ever touches its own; leftovers of labs whose process is gone are removed at
start.  Teardown runs on success, on failure and on SIGINT/SIGTERM/SIGHUP (a handler
turns them into an exception, a ``finally`` tears down): children are stopped (SIGTERM,
then SIGKILL by pid), every namespace of the prefix is deleted (which deletes its veths).
A ``kill -9`` of the lab runs no teardown: its agents stay in its namespaces (removed as
above) and its service, in the host's namespace and its own session, stays too.  So each
run directory holds a marker (:data:`MARKER`: the lab's pid and start time, the service's
pid, start time and command line, ``--keep``); the next lab stops a dead lab's service only
after ``/proc/PID`` shows the same start time and exactly that command line (which names
the dead lab's own config file), then removes the run directory unless it was kept.
The service listens on ipc:// endpoints in the lab's run directory and on loopback for
metrics: nothing is bound to a veth address except the agents' overlay sockets.

Delivery time is measured with the origin timestamp in each packet's header, read where it
is delivered: exact here because all namespaces share the host's clock.
"""
from __future__ import annotations

import argparse
import contextlib
import csv
import ctypes
import glob
import json
import math
import os
import re
import selectors
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import threading
import time
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from typing import Any

from routerd.agent import overlay as ov
from routerd.core.errors import InputError, Problem
from routerd.io.childproc import parse_ready
from routerd.io.clock import SYSTEM, Clock
from routerd.io.progress import StatusLine

PREFIX = "rdlab"
_NS_RE = re.compile(rf"^{PREFIX}(\d+)-(\d+)$")
CLONE_NEWNET = 0x40000000
AGENT_PORT = 7400          # overlay sockets, on each veth address
LOCAL = "127.0.0.1:7400"   # inside each namespace: applications → agent
DELIVER_PORT = 7401        # inside each namespace: agent → application
UNDERLAY_NET = (10, 254)   # 10.254.0.0/16, /30 per link, only inside the lab's namespaces
#: bytes a packet carries on the veth beyond its UDP payload (UDP 8 + IPv4 20 + Ethernet 14)
WIRE_OVERHEAD = 42
READY_TIMEOUT_S = 30.0
#: In each run directory: who owns it and which service it started (see the docstring).
MARKER = "lab-run.json"
RUN_BASE = "/tmp"


class LabError(Exception):
    """The lab cannot run here, or a step of building it failed (the message says which)."""


class Interrupted(Exception):
    """A signal asked the lab to stop; teardown follows."""


# ---- host checks and commands -------------------------------------------------------------
def check_host() -> None:
    """Refuse clearly where the lab cannot run."""
    if not sys.platform.startswith("linux"):
        raise LabError(f"the lab needs Linux network namespaces; this is {sys.platform}")
    if os.geteuid() != 0:
        raise LabError("the lab needs root (it creates network namespaces, veth pairs and tc "
                       "qdiscs); run it as root, e.g. `sudo routerd lab ...`")
    for tool in ("ip", "tc"):
        if shutil.which(tool) is None:
            raise LabError(f"the lab needs the {tool!r} command (iproute2); it is not on PATH")


def unavailable(tag: str = "rdprobe") -> str | None:
    """Why a lab cannot run on this host, or None: `check_host`, then one namespace named
    `tag` + this pid created and removed (a container may forbid it even to root)."""
    try:
        check_host()
    except LabError as e:
        return str(e)
    name = f"{tag}{os.getpid()}"
    r = subprocess.run(["ip", "netns", "add", name], capture_output=True, text=True, check=False)
    if r.returncode != 0:
        return f"ip netns add failed here: {r.stderr.strip()}"
    subprocess.run(["ip", "netns", "del", name], capture_output=True, check=False)
    return None


def sh(*cmd: str, check: bool = True) -> subprocess.CompletedProcess[str]:
    r = subprocess.run(list(cmd), capture_output=True, text=True, timeout=30, check=False)
    if check and r.returncode != 0:
        raise LabError(f"`{' '.join(cmd)}` failed (exit {r.returncode}): {r.stderr.strip() or r.stdout.strip()}")
    return r


def list_namespaces() -> list[str]:
    r = sh("ip", "netns", "list", check=False)
    return [ln.split()[0] for ln in r.stdout.splitlines() if ln.strip()]


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def _kill_ns_pids(ns: str) -> None:
    r = sh("ip", "netns", "pids", ns, check=False)
    for tok in r.stdout.split():
        if tok.isdigit():
            with contextlib.suppress(ProcessLookupError):
                os.kill(int(tok), signal.SIGKILL)


def remove_leftovers(only_pid: int | None = None) -> list[str]:
    """Delete namespaces of the prefix whose lab process is gone (or, with ``only_pid``,
    those of that lab), killing what still runs in them.  Returns the names removed."""
    gone = []
    for ns in list_namespaces():
        m = _NS_RE.match(ns)
        if not m:
            continue
        owner = int(m.group(1))
        if (only_pid is not None and owner != only_pid) or (only_pid is None and _alive(owner)):
            continue
        _kill_ns_pids(ns)
        sh("ip", "netns", "del", ns, check=False)
        gone.append(ns)
    return gone


def start_time(pid: int) -> int | None:
    """The process's start time (clock ticks since boot, /proc/PID/stat field 22), or None
    if there is no such process or it has exited (a zombie not yet reaped).  With the pid
    it names one process: pids are reused."""
    try:
        with open(f"/proc/{pid}/stat", "rb") as fh:
            stat = fh.read()
    except OSError:
        return None
    try:
        # the command name (field 2) is in parentheses and may hold spaces or ')'
        fields = stat[stat.rindex(b")") + 2:].split()
        if fields[0] in (b"Z", b"X"):
            return None
        return int(fields[19])
    except (ValueError, IndexError):
        return None


def cmdline(pid: int) -> list[str] | None:
    try:
        with open(f"/proc/{pid}/cmdline", "rb") as fh:
            raw = fh.read()
    except OSError:
        return None
    return [a.decode(errors="surrogateescape") for a in raw.split(b"\0")[:-1]]


def service_command(config_path: str) -> list[str]:
    """How a lab starts its service (and how a later lab recognises it)."""
    return [sys.executable, "-m", "routerd", "serve", "--config", config_path]


def write_marker(run_dir: str, *, keep: bool, service: subprocess.Popen[Any] | None = None) -> None:
    """Record this lab and (once started) its service in the run directory, atomically."""
    doc: dict[str, Any] = {"lab_pid": os.getpid(), "lab_start": start_time(os.getpid()),
                           "keep": bool(keep), "service_pid": None, "service_start": None,
                           "service_cmdline": None}
    if service is not None:
        doc.update(service_pid=service.pid, service_start=start_time(service.pid),
                   service_cmdline=[str(a) for a in service.args])
    tmp = os.path.join(run_dir, f".{MARKER}.tmp")
    with open(tmp, "w", encoding="utf-8") as fh:
        json.dump(doc, fh)
    os.replace(tmp, os.path.join(run_dir, MARKER))


def _read_marker(run_dir: str) -> dict[str, Any] | None:
    """The marker of a run directory this user made (0700, owned by us), else None: a
    directory or file planted by someone else in /tmp is never acted on."""
    try:
        st = os.lstat(run_dir)
        if not (os.path.isdir(run_dir) and not os.path.islink(run_dir)
                and st.st_uid == os.geteuid() and st.st_mode & 0o022 == 0):
            return None
        mp = os.path.join(run_dir, MARKER)
        mst = os.lstat(mp)
        if not (os.path.isfile(mp) and not os.path.islink(mp) and mst.st_uid == os.geteuid()):
            return None
        with open(mp, encoding="utf-8") as fh:
            doc = json.load(fh)
    except (OSError, ValueError):
        return None
    return doc if isinstance(doc, dict) else None


def _wait_gone(pid: int, start: int, timeout_s: float) -> bool:
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if start_time(pid) != start:
            return True
        time.sleep(0.05)
    return start_time(pid) != start


def remove_orphans(base: str = RUN_BASE, log: Any = None) -> list[str]:
    """Stop the services of dead labs and remove their run directories (unless kept).

    A run directory is looked at only when its marker is ours (see :func:`_read_marker`)
    and its lab is gone (no process with that pid *and* start time).  Its service is sent
    SIGTERM (so it writes its final snapshot), SIGKILL after 5 s, and only while
    ``/proc/PID`` shows the recorded start time and exactly the command a lab uses for that
    run directory's config.  Returns one line per thing done."""
    say = log or (lambda msg: None)
    done: list[str] = []
    for run_dir in sorted(glob.glob(os.path.join(base, f"{PREFIX}-*"))):
        doc = _read_marker(run_dir)
        if doc is None:
            continue
        lab_pid, lab_start = doc.get("lab_pid"), doc.get("lab_start")
        if isinstance(lab_pid, int) and lab_start is not None and start_time(lab_pid) == lab_start:
            continue                                     # that lab is still running
        pid, start = doc.get("service_pid"), doc.get("service_start")
        want = doc.get("service_cmdline")
        mine = os.path.join(run_dir, "lab-config.yaml")
        if (isinstance(pid, int) and isinstance(start, int) and pid > 1
                and isinstance(want, list) and want[-2:] == ["--config", mine]
                and want[1:5] == ["-m", "routerd", "serve", "--config"]
                and start_time(pid) == start and cmdline(pid) == want):
            with contextlib.suppress(ProcessLookupError):
                os.kill(pid, signal.SIGTERM)
            if not _wait_gone(pid, start, 5.0) and cmdline(pid) == want:
                with contextlib.suppress(ProcessLookupError):
                    os.kill(pid, signal.SIGKILL)
                _wait_gone(pid, start, 5.0)
            msg = f"stopped the service (pid {pid}) left by lab {lab_pid} ({run_dir})"
            say(msg)
            done.append(msg)
        if not doc.get("keep"):
            for _ in range(20):   # a process still writing there can refill a folder once
                shutil.rmtree(run_dir, ignore_errors=True)
                if not os.path.lexists(run_dir):
                    break
                time.sleep(0.05)
            msg = (f"could not remove the run directory {run_dir} of lab {lab_pid}"
                   if os.path.lexists(run_dir) else
                   f"removed the run directory {run_dir} of lab {lab_pid}")
            say(msg)
            done.append(msg)
    return done


_libc: Any = None


@contextlib.contextmanager
def in_netns(name: str) -> Iterator[None]:
    """Run the block with this thread in namespace ``name`` (sockets made there stay there)."""
    global _libc
    if _libc is None:
        _libc = ctypes.CDLL(None, use_errno=True)
    orig = os.open("/proc/thread-self/ns/net", os.O_RDONLY)
    fd = os.open(f"/run/netns/{name}", os.O_RDONLY)
    try:
        if _libc.setns(fd, CLONE_NEWNET) != 0:
            raise LabError(f"setns into {name}: {os.strerror(ctypes.get_errno())}")
        try:
            yield
        finally:
            if _libc.setns(orig, CLONE_NEWNET) != 0:  # pragma: no cover - cannot fail back
                raise LabError(f"setns back from {name}: {os.strerror(ctypes.get_errno())}")
    finally:
        os.close(fd)
        os.close(orig)


# ---- the plan ----------------------------------------------------------------------------
@dataclass(frozen=True)
class Pair:
    """One two-way link of the lab: veth ``dev`` in both namespaces, a /30 each."""

    no: int
    a: int
    b: int
    addr_a: str
    addr_b: str
    dev: str


def plan_pairs(topo: Any) -> list[Pair]:
    """One veth pair per unordered node pair that has a link (either direction)."""
    seen: dict[tuple[int, int], None] = {}
    for a, b in zip(topo.src.tolist(), topo.dst.tolist()):
        seen.setdefault((min(a, b), max(a, b)), None)
    if len(seen) > 16383:
        raise LabError(f"{len(seen)} links do not fit 10.254.0.0/16 in /30s")
    out = []
    for no, (a, b) in enumerate(seen):
        base = no * 4                     # the /30's network address; .1 and .2 are used
        pa = f"{UNDERLAY_NET[0]}.{UNDERLAY_NET[1]}.{(base + 1) // 256}.{(base + 1) % 256}"
        pb = f"{UNDERLAY_NET[0]}.{UNDERLAY_NET[1]}.{(base + 2) // 256}.{(base + 2) % 256}"
        out.append(Pair(no, a, b, pa, pb, f"v{no}"))
    return out


def tbf_args(capacity_bps: float, buffer_pkts: int, packet_bytes: float) -> list[str]:
    rate = max(8000, int(capacity_bps))
    burst = max(2 * 1514, int(rate / 8 * 0.002))      # 2 ms of rate, at least two frames
    limit = max(burst, int(buffer_pkts * (packet_bytes + WIRE_OVERHEAD)))
    return ["tbf", "rate", f"{rate}bit", "burst", str(burst), "limit", str(limit)]


@dataclass
class Event:
    at_s: float
    kind: str                 # "capacity" | "down" | "up" | "kill_service" | "restart_service"
    src: int = -1
    dst: int = -1
    bps: float = 0.0
    done: bool = False
    info: dict[str, Any] = field(default_factory=dict)


def parse_capacity_change(text: str, topo: Any) -> Event:
    parts = text.split(":")
    if len(parts) != 4:
        raise InputError(Problem("--capacity-change", text, "must be T:FROM:TO:BPS, e.g. 5:m:b1:64e3"))
    t, a, b, bps = parts
    try:
        tf, bf = float(t), float(bps)
    except ValueError:
        raise InputError(Problem("--capacity-change", text, "T and BPS must be numbers")) from None
    if a not in topo.index or b not in topo.index or (topo.index[a], topo.index[b]) not in topo.link_index:
        raise InputError(Problem("--capacity-change", text, f"{a} -> {b} is not a link of {topo.name!r}"))
    if not (tf >= 0 and bf >= 8000):
        raise InputError(Problem("--capacity-change", text, "T must be >= 0 and BPS >= 8000"))
    return Event(tf, "capacity", topo.index[a], topo.index[b], bf)


def scenario_events(scen: Any, topo: Any) -> list[Event]:
    """A simulator scenario's link events (routerd.io.scenario) as lab events, one per directed link."""
    out = []
    for ev in scen.link_events(topo):
        for k in ev.links:
            a, b = int(topo.src[k]), int(topo.dst[k])
            out.append(Event(float(ev.t), ev.action, a, b,
                             float(ev.capacity_bps) if ev.capacity_bps is not None else 0.0))
    return out


def parse_kill(text: str) -> list[Event]:
    t, sep, down = text.partition(":")
    try:
        tf = float(t)
        df = float(down) if sep else 2.0
    except ValueError:
        raise InputError(Problem("--kill-service", text, "must be T[:DOWN_S], e.g. 4:3")) from None
    if not (tf >= 0 and df > 0):
        raise InputError(Problem("--kill-service", text, "T must be >= 0 and DOWN_S > 0"))
    return [Event(tf, "kill_service"), Event(tf + df, "restart_service")]


# ---- the lab -----------------------------------------------------------------------------
class Lab:
    """One lab run: ``build``, ``start_service``, ``start_agents``, ... and always ``teardown``."""

    def __init__(self, topo: Any, cfg_doc: dict[str, Any], *, run_dir: str,
                 packet_bytes: float = 400.0, log: Any = None, keep: bool = False):
        self.topo = topo
        self.keep = keep
        self.cfg_doc = cfg_doc
        self.run_dir = run_dir
        self.packet_bytes = packet_bytes
        self.pid = os.getpid()
        self.ns = [f"{PREFIX}{self.pid}-{i}" for i in range(topo.n)]
        self.pairs = plan_pairs(topo)
        self.service: subprocess.Popen[str] | None = None
        self.service_lines: list[str] = []
        self.service_epochs: list[int] = []
        self.agents: dict[int, subprocess.Popen[bytes]] = {}
        self.children: list[subprocess.Popen[Any]] = []
        self.log = log or (lambda msg: print(f"lab: {msg}", file=sys.stderr, flush=True))
        self.config_path = os.path.join(run_dir, "lab-config.yaml")
        self.endpoints = {"ingest": f"ipc://{run_dir}/ingest", "publish": f"ipc://{run_dir}/pub",
                          "control": f"ipc://{run_dir}/ctl"}
        self.capacity = {k: float(c) for k, c in enumerate(topo.capacity_bps.tolist())}
        self._built: list[str] = []

    # -- build -------------------------------------------------------------------------
    def build(self) -> None:
        t = self.topo
        write_marker(self.run_dir, keep=self.keep)
        for ns in self.ns:
            r = sh("ip", "netns", "add", ns, check=False)
            if r.returncode != 0:
                raise LabError(f"network namespaces are not available here: `ip netns add {ns}` "
                               f"failed: {r.stderr.strip()}")
            self._built.append(ns)
            sh("ip", "-n", ns, "link", "set", "lo", "up")
        for p in self.pairs:
            na, nb = self.ns[p.a], self.ns[p.b]
            sh("ip", "-n", na, "link", "add", p.dev, "type", "veth", "peer", "name", p.dev, "netns", nb)
            sh("ip", "-n", na, "addr", "add", f"{p.addr_a}/30", "dev", p.dev)
            sh("ip", "-n", nb, "addr", "add", f"{p.addr_b}/30", "dev", p.dev)
            for ns, x, y in ((na, p.a, p.b), (nb, p.b, p.a)):
                sh("ip", "-n", ns, "link", "set", p.dev, "up")
                k = t.link_index.get((x, y))
                if k is not None:
                    sh("tc", "-n", ns, "qdisc", "add", "dev", p.dev, "root",
                       *tbf_args(float(t.capacity_bps[k]), int(t.buffer_pkts[k]), self.packet_bytes))
        self._write_files()

    def pair_of(self, a: int, b: int) -> Pair:
        for p in self.pairs:
            if (p.a, p.b) in ((a, b), (b, a)):
                return p
        raise KeyError((a, b))

    def set_capacity(self, a: int, b: int, bps: float) -> None:
        p = self.pair_of(a, b)
        k = self.topo.link_index[(a, b)]
        sh("tc", "-n", self.ns[a], "qdisc", "change", "dev", p.dev, "root",
           *tbf_args(bps, int(self.topo.buffer_pkts[k]), self.packet_bytes))
        self.capacity[k] = bps

    def set_link(self, a: int, b: int, up: bool) -> None:
        """Cut (or restore) the direction a -> b: a blackhole route in a's namespace for b's
        veth address, so a's packets to b are dropped before they leave (b -> a still
        flows; the agents' probes see the cut in both, as BFD does for a one-way fault)."""
        p = self.pair_of(a, b)
        peer = p.addr_b if p.a == a else p.addr_a
        sh("ip", "-n", self.ns[a], "route", "add" if not up else "del", "blackhole", f"{peer}/32",
           check=not up)

    def _write_files(self) -> None:
        # files.dump_yaml: a node name the readers would take for a number stays a string
        from routerd.io.files import dump_yaml

        links = [{"between": [self.topo.nodes[p.a], self.topo.nodes[p.b]],
                  "addresses": [f"{p.addr_a}:{AGENT_PORT}", f"{p.addr_b}:{AGENT_PORT}"]}
                 for p in self.pairs]
        ul = os.path.join(self.run_dir, "underlay.yaml")
        with open(ul, "w", encoding="utf-8") as fh:
            fh.write("# written by routerd lab: veth addresses inside the lab's namespaces only\n")
            fh.write(dump_yaml({"underlay": {"links": links}}, sort_keys=False))
        with open(self.config_path, "w", encoding="utf-8") as fh:
            fh.write("# written by routerd lab for its service and agents\n")
            fh.write(dump_yaml(self.cfg_doc, sort_keys=False))
        os.makedirs(os.path.join(self.run_dir, "agents"), exist_ok=True)

    # -- processes ------------------------------------------------------------------------
    def start_service(self) -> None:
        cmd = service_command(self.config_path)
        p = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True,
                             start_new_session=True)
        self.service = p
        self.children.append(p)
        write_marker(self.run_dir, keep=self.keep, service=p)   # before anything can fail
        deadline = time.monotonic() + READY_TIMEOUT_S
        assert p.stdout is not None
        while time.monotonic() < deadline:
            line = p.stdout.readline()
            if not line:
                p.wait(5)
                raise LabError("the service exited before it was ready:\n"
                               + "\n".join(self.service_lines[-20:]))
            self.service_lines.append(line.rstrip("\n"))
            ready = parse_ready(line)
            if ready:
                self.service_epochs.append(ready[1])
                threading.Thread(target=self._drain_service, args=(p,), daemon=True).start()
                return
        raise LabError("the service was not ready in time")

    def _drain_service(self, p: subprocess.Popen[str]) -> None:
        assert p.stdout is not None
        for line in p.stdout:
            if len(self.service_lines) < 10000:
                self.service_lines.append(line.rstrip("\n"))

    def kill_service(self) -> None:
        if self.service is not None and self.service.poll() is None:
            os.kill(self.service.pid, signal.SIGKILL)
            self.service.wait(10)

    def start_agents(self) -> None:
        for i, name in enumerate(self.topo.nodes):
            cmd = ["ip", "netns", "exec", self.ns[i], sys.executable, "-m", "routerd", "agent",
                   "--node", name, "--config", self.config_path,
                   "--status-file", self.status_path(i)]
            with open(os.path.join(self.run_dir, "agents", f"{i}.log"), "wb") as log:
                p = subprocess.Popen(cmd, stdout=log, stderr=subprocess.STDOUT, start_new_session=True)
            self.agents[i] = p
            self.children.append(p)

    def status_path(self, i: int) -> str:
        return os.path.join(self.run_dir, "agents", f"{i}.json")

    def agent_status(self, i: int) -> dict[str, Any] | None:
        try:
            with open(self.status_path(i), encoding="utf-8") as fh:
                return json.load(fh)
        except (OSError, ValueError):
            return None

    def wait_agents_ready(self, timeout_s: float = READY_TIMEOUT_S) -> None:
        """Every agent running, every link up, a table for every node."""
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            for i, p in self.agents.items():
                if p.poll() is not None:
                    with open(os.path.join(self.run_dir, "agents", f"{i}.log"), errors="replace") as fh:
                        tail = fh.read()[-2000:]
                    raise LabError(f"agent {self.topo.nodes[i]} exited ({p.returncode}):\n{tail}")
            st = [self.agent_status(i) for i in range(self.topo.n)]
            if all(s is not None and s["links"] and all(v["state"] == "up" for v in s["links"].values())
                   and s["table"]["seq"] is not None for s in st):
                return
            time.sleep(0.2)
        raise LabError(f"agents not ready within {timeout_s:g} s (links up and a table each)")

    def stop_children(self) -> None:
        for p in self.children:
            if p.poll() is None:
                with contextlib.suppress(ProcessLookupError):
                    p.send_signal(signal.SIGTERM)
        deadline = time.monotonic() + 5.0
        for p in self.children:
            left = max(0.1, deadline - time.monotonic())
            try:
                p.wait(left)
            except subprocess.TimeoutExpired:
                with contextlib.suppress(ProcessLookupError):
                    os.kill(p.pid, signal.SIGKILL)
                p.wait(5)
            if p.stdout is not None and not p.stdout.closed:
                with contextlib.suppress(Exception):
                    p.stdout.close()

    def teardown(self) -> None:
        try:
            self.stop_children()
        finally:
            for ns in self.ns:
                _kill_ns_pids(ns)
            remove_leftovers(only_pid=self.pid)

    # -- measurements ------------------------------------------------------------------
    def tc_stats(self) -> list[dict[str, Any]]:
        """Per directed link: bytes, packets and drops at its sender's tbf."""
        out = []
        t = self.topo
        for k, (a, b) in enumerate(zip(t.src.tolist(), t.dst.tolist())):
            p = self.pair_of(a, b)
            r = sh("tc", "-n", self.ns[a], "-s", "-j", "qdisc", "show", "dev", p.dev, check=False)
            st: dict[str, Any] = {"bytes": 0, "packets": 0, "drops": 0}
            with contextlib.suppress(ValueError, StopIteration, KeyError):
                q = next(x for x in json.loads(r.stdout) if x.get("kind") == "tbf")
                st = {"bytes": int(q["bytes"]), "packets": int(q["packets"]), "drops": int(q["drops"])}
            out.append({"link": k, "from": t.nodes[a], "to": t.nodes[b], **st})
        return out

    def tables(self, timeout_s: float = 3.0) -> dict[str, Any] | None:
        from routerd.agent.client import control

        try:
            rep = control(self.endpoints["control"], {"op": "tables"}, timeout_s)
        except (TimeoutError, Exception):  # noqa: BLE001 - a dead service is an answer too
            return None
        return rep.get("tables")


# ---- traffic -------------------------------------------------------------------------------
class Traffic:
    """Sockets in every namespace: one sends packets to the agent, one takes deliveries."""

    def __init__(self, lab: Lab):
        self.lab = lab
        self.send: list[socket.socket] = []
        self.sink: list[socket.socket] = []
        self.sel = selectors.DefaultSelector()
        for i, ns in enumerate(lab.ns):
            with in_netns(ns):
                s = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
                s.setblocking(False)
                r = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
                r.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 4 << 20)
                r.bind(("127.0.0.1", DELIVER_PORT))
                r.setblocking(False)
            self.send.append(s)
            self.sink.append(r)
            self.sel.register(r, selectors.EVENT_READ, i)

    def close(self) -> None:
        self.sel.close()
        for s in self.send + self.sink:
            s.close()


class TableSampler:
    """Fetches every table from the service every ``interval_s`` in a thread of its own (so a
    dead service never holds the traffic loop up): ``samples`` = [(t_s, tables or None)]."""

    def __init__(self, lab: Lab, t0: float, interval_s: float = 0.5, clock: Clock = SYSTEM):
        self.lab = lab
        self.t0 = t0
        self.clock = clock
        self.interval_s = interval_s
        self.samples: list[tuple[float, Any]] = []
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._loop, daemon=True)
        self._thread.start()

    def _loop(self) -> None:
        while not self._stop.wait(self.interval_s):
            self.samples.append((self.clock.monotonic() - self.t0, self.lab.tables(timeout_s=0.4)))

    def stop(self) -> None:
        self._stop.set()
        self._thread.join(5)


def offer(lab: Lab, traffic: Traffic, packets: Iterator[tuple[float, int, int, float, int]],
          duration_s: float, drain_s: float, events: Sequence[Event], ttl: int,
          progress: bool = False, clock: Clock = SYSTEM) -> dict[str, Any]:
    """Send the packets at their times (``clock``: the real one by default), take
    deliveries, run the events."""
    t0 = clock.monotonic()
    sampler = TableSampler(lab, t0, clock=clock)
    try:
        out = _offer_loop(lab, traffic, packets, duration_s, drain_s, events, ttl, progress, t0,
                          clock)
    finally:
        sampler.stop()
    out["table_samples"] = sampler.samples
    return out


def _offer_loop(lab: Lab, traffic: Traffic, packets: Iterator[tuple[float, int, int, float, int]],
                duration_s: float, drain_s: float, events: Sequence[Event], ttl: int,
                progress: bool, t0: float, clock: Clock) -> dict[str, Any]:
    topo = lab.topo
    tag = ov.topology_tag(topo.digest)
    size = int(lab.packet_bytes)
    local = ("127.0.0.1", AGENT_PORT)
    inj_t: list[float] = []
    inj_s: list[int] = []
    inj_d: list[int] = []
    dlv: dict[int, tuple[float, float, int]] = {}    # seq → (delivered at s, delivery s, hops)
    send_err = 0
    dup = 0
    pending = sorted(events, key=lambda e: e.at_s)
    it = iter(packets)
    nxt = next(it, None)
    end = duration_s + drain_s
    status = StatusLine(every_s=1.0, plain_every_s=5.0, clock=clock) if progress else None
    seq = 0
    while True:
        now = clock.monotonic() - t0
        while nxt is not None and nxt[0] <= now:
            t, s, d, _bits, flow = nxt
            if t > duration_s:
                nxt = None
                break
            pkt = ov.data_packet(tag, s, d, flow & 0xFFFFFFFF, seq & 0xFFFFFFFF,
                                 clock.wall_ns(), ttl, size)
            try:
                traffic.send[s].sendto(pkt, local)
            except OSError:
                send_err += 1
            inj_t.append(t)
            inj_s.append(s)
            inj_d.append(d)
            seq += 1
            nxt = next(it, None)
        for ev in pending:
            if not ev.done and ev.at_s <= now:
                ev.done = True
                ev.info["t_s"] = now
                if ev.kind == "capacity":
                    ev.info["tables_before"] = lab.tables()
                    lab.set_capacity(ev.src, ev.dst, ev.bps)
                    lab.log(f"t={now:.1f} s: capacity {topo.nodes[ev.src]} -> {topo.nodes[ev.dst]} "
                            f"set to {ev.bps:g} bit/s")
                elif ev.kind in ("down", "up"):
                    ev.info["tables_before"] = lab.tables()
                    lab.set_link(ev.src, ev.dst, ev.kind == "up")
                    lab.log(f"t={now:.1f} s: link {topo.nodes[ev.src]} -> {topo.nodes[ev.dst]} {ev.kind}")
                elif ev.kind == "kill_service":
                    lab.kill_service()
                    lab.log(f"t={now:.1f} s: service killed (SIGKILL)")
                elif ev.kind == "restart_service":
                    lab.start_service()
                    lab.log(f"t={now:.1f} s: service restarted (epoch {lab.service_epochs[-1]})")
                ev.info["t_done_s"] = clock.monotonic() - t0
        if now >= end:
            break
        wait = 0.01
        if nxt is not None:
            wait = min(wait, max(0.0, nxt[0] - now))
        for key, _m in traffic.sel.select(wait):
            r = key.fileobj
            for _ in range(512):
                try:
                    data = r.recv(65535)  # type: ignore[union-attr]
                except (BlockingIOError, InterruptedError):
                    break
                tr = clock.wall_ns()
                h = ov.decode(data, nodes=topo.n, topo=tag)
                if isinstance(h, ov.Malformed):
                    continue
                hd = h[0]
                if hd.seq in dlv or hd.seq >= seq:
                    dup += 1
                    continue
                dlv[hd.seq] = (clock.monotonic() - t0, (tr - hd.origin_ns) / 1e9, ttl - hd.ttl)
        if status is not None and now >= 1.0 and status.due():
            status.show(f"lab: t={now:5.1f}/{duration_s:g} s  sent {seq}  delivered {len(dlv)}")
    if status is not None:
        status.done()
    return {"inj_t": inj_t, "inj_s": inj_s, "inj_d": inj_d, "dlv": dlv,
            "send_errors": send_err, "duplicates": dup, "elapsed_s": clock.monotonic() - t0}


# ---- summary ------------------------------------------------------------------------------
def summarise(lab: Lab, res: dict[str, Any], *, rate: float, duration: float, warm: float,
              seed: int, demands: bool, tc: list[dict[str, Any]], statuses: list[dict[str, Any] | None],
              wall_s: float) -> dict[str, Any]:
    """The simulator's summary keys (routerd.sim.run.reduce), from lab measurements."""
    from routerd.sim.stats import delivery_stats

    topo = lab.topo
    inj_t = res["inj_t"]
    dlv = res["dlv"]
    measured = [i for i, t in enumerate(inj_t) if t >= warm]
    offered = len(measured)
    dl = [dlv[i][1] for i in measured if i in dlv]
    hops = [dlv[i][2] for i in measured if i in dlv]
    ds = delivery_stats(dl)                  # the simulator's figures (routerd.sim.stats)
    m, mean = ds.count, ds.mean
    win = max(duration - warm, 1e-9)

    def total(key: str, sub: str = "counts") -> int:
        return sum(int((s or {}).get(sub, {}).get(key, 0)) for s in statuses)

    # time in the network of measured delivered packets, clipped to [warm, duration]
    area = 0.0
    for i in measured:
        if i in dlv:
            a, b = inj_t[i], inj_t[i] + dlv[i][1]
            area += max(0.0, min(b, duration) - max(a, warm))
    util = []
    for st in tc:
        k = st["link"]
        cap = float(topo.capacity_bps[k])
        util.append(st["bytes"] * 8.0 / (cap * res["elapsed_s"]) if cap > 0 else math.nan)
    tbf_drops = sum(st["drops"] for st in tc)
    s: dict[str, Any] = {
        "policy": "service", "topology": topo.name, "nodes": topo.n, "links": topo.n_links,
        "seed": int(seed), "rate_pps": float(rate), "duration_s": float(duration), "warmup_s": warm,
        "packet_bytes": float(lab.packet_bytes), "size_dist": "fixed", "demands": bool(demands),
        "offered": offered, "delivered": m, "dropped": offered - m,
        "dropped_buffer": tbf_drops,
        "dropped_link_down": 0,
        "dropped_no_route": total("no_route", "dropped"),
        "ttl_expired": total("ttl_expired"),
        "in_flight_at_end": 0,
        "delivery_ratio": m / offered if offered else math.nan,
        **ds.summary_keys(),
        "mean_hops": sum(hops) / m if m else math.nan,
        "throughput_pps": m / win,
        "link_util_max": max(util) if util else math.nan,
        "link_util_mean": sum(util) / len(util) if util else math.nan,
        "little_L": area / win,
        "little_lambda_W": (m / win) * mean if m else math.nan,
        "events": total("forwarded"),
        "wall_s": wall_s,
        # lab-only keys
        "mode": "lab",
        "lab_forwarded": total("forwarded"),
        "lab_send_errors": res["send_errors"] + total("send_error", "dropped"),
        "lab_duplicates": res["duplicates"],
        "lab_probes_sent": total("probes_sent"),
        "lab_malformed": total("malformed"),
        "lab_table_holds": total("table_holds"),
        "lab_resyncs": total("resyncs"),
        "lab_notes": ("dropped = measured packets never delivered (after the drain); "
                      "dropped_buffer = tbf drops of all packets incl. probes and warm-up; "
                      "dropped_link_down is not told apart in the lab (0); ttl_expired and "
                      "dropped_no_route count every packet; events = hops forwarded; link "
                      "utilisation against each link's nominal capacity over the run; "
                      "Little's L over delivered packets"),
    }
    return s


def write_outputs(out: str, summary: dict[str, Any], lab: Lab, res: dict[str, Any],
                  extra: dict[str, Any], series_dt: float = 0.5) -> list[str]:
    from routerd.sim.commands_simulate import _clean

    os.makedirs(out, exist_ok=True)
    paths = []
    p = os.path.join(out, "summary.json")
    with open(p, "w", encoding="utf-8") as fh:
        json.dump({k: _clean(v) for k, v in summary.items()}, fh, indent=2, sort_keys=True)
        fh.write("\n")
    paths.append(p)
    names = lab.topo.nodes
    p = os.path.join(out, "deliveries.csv")
    with open(p, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(["seq", "inject_s", "src", "dst", "delivered", "delivery_s", "hops"])
        for i, (t, s, d) in enumerate(zip(res["inj_t"], res["inj_s"], res["inj_d"])):
            r = res["dlv"].get(i)
            w.writerow([i, f"{t:.6f}", names[s], names[d], int(r is not None),
                        "" if r is None else f"{r[1]:.6f}", "" if r is None else r[2]])
    paths.append(p)
    # series by injection time: what a packet sent then experienced
    p = os.path.join(out, "series.csv")
    nb = math.ceil(summary["duration_s"] / series_dt)
    sums = [0.0] * nb
    cnt = [0] * nb
    sent = [0] * nb
    for i, t in enumerate(res["inj_t"]):
        b = min(int(t / series_dt), nb - 1)
        sent[b] += 1
        r = res["dlv"].get(i)
        if r is not None:
            sums[b] += r[1]
            cnt[b] += 1
    with open(p, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(["t_s", "offered", "delivered", "mean_delivery_s"])
        for b in range(nb):
            w.writerow([f"{b * series_dt:.3f}", sent[b], cnt[b],
                        f"{sums[b] / cnt[b]:.6f}" if cnt[b] else ""])
    paths.append(p)
    p = os.path.join(out, "lab.json")
    with open(p, "w", encoding="utf-8") as fh:
        json.dump(extra, fh, indent=1, default=str)
    paths.append(p)
    return paths


# ---- command line --------------------------------------------------------------------------
def configure(p: argparse.ArgumentParser) -> None:
    p.add_argument("--topology", metavar="FILE",
                   help="topology file (e.g. configs/lab-small.yaml): one namespace per node, one "
                        "veth pair per link (default: the config's topology.file)")
    p.add_argument("--duration", required=True, type=float, metavar="S", help="seconds of offered traffic")
    p.add_argument("--rate", required=True, type=float, metavar="PPS", help="network-wide packets/s (Poisson)")
    p.add_argument("--out", required=True, metavar="DIR", help="output directory: summary.json (the "
                   "simulator's keys), series.csv, deliveries.csv, lab.json")
    p.add_argument("--seed", type=int, default=1, metavar="N", help="traffic seed (default 1)")
    p.add_argument("--packet-bytes", type=float, default=400.0, metavar="B",
                   help="UDP payload bytes per packet, overlay header included (default 400)")
    p.add_argument("--demands", action="store_true", help="pairs in proportion to the topology's demands")
    p.add_argument("--warmup", type=float, default=None, metavar="S",
                   help="statistics cover packets sent after this (default: a tenth of --duration)")
    p.add_argument("--config", metavar="FILE", help="routerd config whose engine/service/agent "
                   "settings the lab starts from (endpoints and lab-specific agent keys are set by the lab)")
    p.add_argument("--set", metavar="KEY=VALUE", action="append", default=[], dest="overrides",
                   help="override one config setting, e.g. --set engine.explore.max_rate=0.05 "
                        "(repeatable; endpoints and lab-specific agent keys are the lab's)")
    p.add_argument("--scenario", metavar="FILE", default=None,
                   help="the simulator's scenario YAML: its load steps, ramps and bursts shape the "
                        "traffic; its link events cut links (down/up) and change tbf rates (capacity_bps)")
    p.add_argument("--capacity-change", action="append", default=[], metavar="T:FROM:TO:BPS",
                   help="at T seconds set the tbf rate of link FROM -> TO to BPS (repeatable)")
    p.add_argument("--kill-service", metavar="T[:DOWN_S]",
                   help="at T seconds kill -9 the service; restart it DOWN_S later (default 2)")
    p.add_argument("--compare-sim", metavar="POLICY", default=None,
                   help="also simulate the same topology, rate, duration, seed and scenario with "
                        "POLICY (e.g. qrouting, shortest) into DIR/sim/ and print both side by side")
    p.add_argument("--drain", type=float, default=1.0, metavar="S",
                   help="seconds to wait for packets still in flight after the last one is sent "
                        "(default 1)")
    p.add_argument("--keep", action="store_true", help="keep the run directory (configs, agent logs)")
    p.add_argument("--quiet", action="store_true", help="no progress line")


#: summary keys shown side by side by --compare-sim
COMPARE_KEYS = ("offered", "delivered", "delivery_ratio", "mean_delivery_s", "p50_delivery_s",
                "p95_delivery_s", "p99_delivery_s", "mean_hops", "throughput_pps", "link_util_max",
                "ttl_expired")


def compare_with_sim(args: argparse.Namespace, lab_summary: dict[str, Any], topo_path: str,
                     events: Sequence[Event]) -> dict[str, Any]:
    """Simulate the same run (packets carry the veth's per-packet overhead there too) and
    print the two summaries side by side; writes DIR/sim/ and DIR/compare.txt."""
    from routerd.sim.commands_simulate import write_outputs as sim_write
    from routerd.sim.run import run as sim_run

    spec = {"policy": args.compare_sim, "rate_pps": args.rate, "duration_s": args.duration,
            "seed": args.seed, "topology": topo_path, "packet_bytes": args.packet_bytes + WIRE_OVERHEAD,
            "scenario": getattr(args, "scenario", None), "demands": args.demands,
            "warmup_s": lab_summary["warmup_s"], "config": args.config,
            "overrides": tuple(getattr(args, "overrides", None) or ())}
    res = sim_run(spec)
    sim_write(res, os.path.join(args.out, "sim"))
    ss = res["summary"]
    lines = [f"{'':<18}{'lab (service)':>16}{'sim (' + args.compare_sim + ')':>18}"]
    for k in COMPARE_KEYS:
        a, b = lab_summary.get(k), ss.get(k)

        def fmt(v: Any, key: str = k) -> str:
            if not isinstance(v, (int, float)) or (isinstance(v, float) and not math.isfinite(v)):
                return "n/a"
            if key.endswith("_s"):
                return f"{v * 1e3:.3f} ms"
            return f"{v:.4g}" if isinstance(v, float) else str(v)

        lines.append(f"{k:<18}{fmt(a):>16}{fmt(b):>18}")
    skipped = [e.kind for e in events if e.kind in ("kill_service", "restart_service")]
    skipped += ["capacity"] * sum(1 for e in events if e.kind == "capacity" and not getattr(args, "scenario", None))
    if skipped:
        lines.append(f"note: not simulated: {', '.join(sorted(set(skipped)))} events given on the "
                     "command line (put link events in --scenario to simulate them)")
    text = "\n".join(lines)
    print(text)
    with open(os.path.join(args.out, "compare.txt"), "w", encoding="utf-8") as fh:
        fh.write(text + "\n")
    return ss


def lab_config(base: str | None, topo_path: str, run_dir: str,
               overrides: Sequence[str] = ()) -> dict[str, Any]:
    """The config the lab's service and agents read: the user's (by the one input rule,
    :mod:`routerd.io.inputs`: its paths made absolute, so they hold in the run directory;
    its link defaults kept), ``--set`` on top, plus the lab's own keys."""
    from routerd.io import config as _config
    from routerd.io import inputs as _inputs

    cfg = _inputs.config_file(base, overrides)
    flat = cfg.flat()
    flat.update({
        "topology.file": topo_path,
        "service.ingest": f"ipc://{run_dir}/ingest", "service.publish": f"ipc://{run_dir}/pub",
        "service.control": f"ipc://{run_dir}/ctl", "service.pull": None,
        "service.metrics": "127.0.0.1:0", "service.state_dir": os.path.join(run_dir, "state"),
        "service.journal.fsync": "never",
        "agent.underlay": "underlay.yaml", "agent.local": LOCAL,
        "agent.deliver": f"127.0.0.1:{DELIVER_PORT}", "agent.metrics": "127.0.0.1:9308",
        "agent.latency": "one_way", "agent.propagation": "emulate",
    })
    if base is None and not overrides:
        flat["service.publish_interval_s"] = 1.0
        flat["agent.table_stale_s"] = 2.5
    checked = _config.from_mapping_flat(flat, "lab config", base=None)
    return checked.nested()


def lab_inputs(args: argparse.Namespace) -> tuple[Any, str, Any]:
    """(config, topology path or topohub reference, topology) by the one input rule: a
    relative ``topology.file`` against the config's folder, the config's link defaults."""
    from routerd.io import inputs as _inputs

    cfg = _inputs.load_config(args)
    spec = cfg["topology.file"]
    if not spec:
        raise InputError(Problem("--topology", None, "is needed (or a --config whose "
                                 "topology.file names the lab's network)"))
    return cfg, spec, _inputs.load_topology(cfg)


def run(args: argparse.Namespace) -> int:
    try:
        check_host()
    except LabError as e:
        print(f"routerd lab: cannot run here: {e}", file=sys.stderr)
        return 2
    try:
        from routerd.io.files import output_dir

        _cfg, topo_path, topo = lab_inputs(args)
        output_dir(args.out)
        if topo.n > 250:
            raise InputError(Problem("--topology", topo.n, "nodes are too many for a one-host lab (250 at most)"))
        from routerd.io import scenario as _scenario

        scen = _scenario.load(args.scenario) if getattr(args, "scenario", None) else None
        events: list[Event] = [parse_capacity_change(c, topo) for c in args.capacity_change]
        if scen is not None:
            events += scenario_events(scen, topo)
        if args.kill_service:
            events += parse_kill(args.kill_service)
        for name, v, lo in (("--duration", args.duration, 0.0), ("--rate", args.rate, 0.0)):
            if not (math.isfinite(v) and v > lo):
                raise InputError(Problem(name, v, "must be a number above 0"))
        # checked before any namespace is built: each of these failed only once the lab was up
        # (a negative seed in numpy's SeedSequence)
        if args.seed < 0:
            raise InputError(Problem("--seed", args.seed, "must be >= 0"))
        if args.warmup is not None and not (math.isfinite(args.warmup) and 0 <= args.warmup < args.duration):
            raise InputError(Problem("--warmup", args.warmup,
                                     f"must be >= 0 and below the duration ({args.duration:g} s)"))
        if not (math.isfinite(args.drain) and args.drain >= 0):
            raise InputError(Problem("--drain", args.drain, "must be a number >= 0 (seconds)"))
        if getattr(args, "compare_sim", None):
            from routerd.sim import policies as _policies

            if args.compare_sim.partition(":")[0] not in _policies.NAMES:
                raise InputError(Problem("--compare-sim", args.compare_sim,
                                         f"is not a policy ({', '.join(_policies.NAMES)})"))
        if not ov.HEADER_BYTES <= args.packet_bytes <= 1400:
            raise InputError(Problem("--packet-bytes", args.packet_bytes,
                                     f"must be in [{ov.HEADER_BYTES}, 1400] (one veth frame)"))
    except InputError as e:
        print(f"routerd lab: {e}", file=sys.stderr)
        return 2
    return _run(args, topo, topo_path, events, scen)


def _run(args: argparse.Namespace, topo: Any, topo_path: str, events: list[Event],
         scen: Any = None) -> int:
    import numpy as np

    from routerd.io import config as _config
    from routerd.sim.traffic import PoissonTraffic

    # namespaces first: a dead lab's agents run in them and keep writing their status files
    # into its run directory, which remove_orphans is about to delete
    removed = remove_leftovers()
    if removed:
        print(f"routerd lab: removed {len(removed)} namespaces left by earlier labs", file=sys.stderr)
    remove_orphans(log=lambda msg: print(f"routerd lab: {msg}", file=sys.stderr))
    run_dir = tempfile.mkdtemp(prefix=f"{PREFIX}-", dir=RUN_BASE)
    warm = args.duration / 10.0 if args.warmup is None else float(args.warmup)

    def on_signal(signum: int, _f: Any) -> None:
        raise Interrupted(signal.Signals(signum).name)

    old = {s: signal.signal(s, on_signal) for s in (signal.SIGINT, signal.SIGTERM, signal.SIGHUP)}
    lab: Lab | None = None
    traffic: Traffic | None = None
    t_start = time.perf_counter()
    try:
        try:
            doc = lab_config(args.config, topo_path, run_dir, getattr(args, "overrides", ()))
        except InputError as e:
            print(f"routerd lab: {e}", file=sys.stderr)
            return 2
        cfg = _config.from_mapping(doc, "lab config")
        lab = Lab(topo, doc, run_dir=run_dir, packet_bytes=args.packet_bytes,
                  keep=bool(getattr(args, "keep", False)))
        lab.log(f"building {topo.n} namespaces and {len(lab.pairs)} veth pairs (prefix "
                f"{PREFIX}{lab.pid}-, run directory {run_dir})")
        lab.build()
        lab.start_service()
        lab.start_agents()
        lab.wait_agents_ready()
        lab.log(f"{topo.n} agents up; offering {args.rate:g} packets/s for {args.duration:g} s")
        rng = np.random.default_rng(np.random.SeedSequence(int(args.seed)).spawn(2)[0])
        src = PoissonTraffic(topo.n, args.rate, rng, packet_bytes=args.packet_bytes,
                             pair_weights=topo.demands if args.demands else None,
                             duration_s=args.duration, warmup_s=warm, scenario=scen,
                             flows_per_pair=cfg["sim.flows_per_pair"])
        traffic = Traffic(lab)
        tables_start = lab.tables()
        res = offer(lab, traffic, src.packets(), args.duration, args.drain, events,
                    cfg["sim.ttl"], progress=not args.quiet)
        tables_end = lab.tables()
        tc = lab.tc_stats()
        lab.stop_children()
        statuses = [lab.agent_status(i) for i in range(topo.n)]
        summary = summarise(lab, res, rate=args.rate, duration=args.duration, warm=warm,
                            seed=args.seed, demands=args.demands, tc=tc, statuses=statuses,
                            wall_s=time.perf_counter() - t_start)
        extra = {"namespaces": lab.ns, "pairs": [p.__dict__ for p in lab.pairs],
                 "events": [{"kind": e.kind, "at_s": e.at_s,
                             **({"from": topo.nodes[e.src], "to": topo.nodes[e.dst], "bps": e.bps}
                                if e.kind in ("capacity", "down", "up") else {}), **e.info}
                            for e in events],
                 "service_epochs": lab.service_epochs, "tables_start": tables_start,
                 "tables_end": tables_end, "tc": tc,
                 "table_samples": res["table_samples"],
                 "agents": {topo.nodes[i]: s for i, s in enumerate(statuses)}}
        written = write_outputs(args.out, summary, lab, res, extra)
        s = summary
        print(f"lab on {topo.name}: offered {s['offered']}, delivered {s['delivered']} "
              f"({s['delivery_ratio'] * 100 if s['offered'] else 0:.1f}%), mean delivery "
              f"{s['mean_delivery_s'] * 1e3:.2f} ms (p99 {s['p99_delivery_s'] * 1e3:.2f} ms), "
              f"{s['lab_forwarded']} hops forwarded")
        for p in written:
            print(f"wrote {p}")
        if args.compare_sim:
            compare_with_sim(args, summary, topo_path, events)
        return 0
    except Interrupted as e:
        print(f"routerd lab: interrupted ({e}); tearing down", file=sys.stderr)
        return 130
    except LabError as e:
        print(f"routerd lab: {e}", file=sys.stderr)
        return 1
    finally:
        # no signal may interrupt the teardown itself
        for sig in old:
            signal.signal(sig, signal.SIG_IGN)
        try:
            if traffic is not None:
                traffic.close()
            if lab is not None:
                lab.teardown()
            else:
                remove_leftovers(only_pid=os.getpid())
        finally:
            if not args.keep:
                shutil.rmtree(run_dir, ignore_errors=True)
            else:
                print(f"routerd lab: run directory kept: {run_dir}", file=sys.stderr)
            for sig, h in old.items():
                signal.signal(sig, h)
