"""routerd lab: real namespaces, veth pairs, tbf, a real service and one agent per node.

The slow tests need root and working ``ip netns``; elsewhere they are skipped with the
reason.  Each runs ``routerd lab`` as a child process on configs/lab-small.yaml and reads
what it wrote; every test ends by checking that no namespace and no process of the lab is
left behind.
"""
from __future__ import annotations

import argparse
import csv
import json
import os
import re
import signal
import subprocess
import sys
import time
from collections.abc import Iterator
from typing import Any

import networkx as nx
import pytest

from routerd.io import topofiles as TF
from routerd.tools import lab as L

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
TOPO = os.path.join(ROOT, "configs", "lab-small.yaml")


def _lab_unavailable() -> str | None:
    return L.unavailable("rdtest")


REASON = _lab_unavailable()
needs_lab = pytest.mark.skipif(REASON is not None, reason=f"lab tests skipped: {REASON}")


def lab_processes(run_dir: str) -> list[str]:
    """Command lines of live processes of the lab run with this run directory."""
    out = []
    for pid in os.listdir("/proc"):
        if not pid.isdigit():
            continue
        try:
            with open(f"/proc/{pid}/cmdline", "rb") as fh:
                cmd = fh.read().replace(b"\0", b" ").decode(errors="replace")
        except OSError:
            continue
        if run_dir in cmd and "routerd" in cmd:
            out.append(f"{pid}: {cmd}")
    return out


def run_dir_of(stderr: str) -> str:
    m = re.search(r"run directory (/tmp/\S+?)\)", stderr)
    assert m, stderr
    return m.group(1)


def assert_nothing_left(pid: int, stderr: str) -> None:
    """No namespace of this lab (named by its pid) and no process of this lab (its run dir
    is on their command lines) is left; other labs running meanwhile are not looked at."""
    ns = [n for n in L.list_namespaces() if n.startswith(f"{L.PREFIX}{pid}-")]
    assert ns == [], f"namespaces left behind: {ns}"
    rd = run_dir_of(stderr)
    assert lab_processes(rd) == []
    assert not os.path.exists(rd)


def run_lab(out: str, *extra: str, duration: float = 4.0, rate: float = 150.0,
            timeout: float = 90.0) -> tuple[subprocess.CompletedProcess[str], int]:
    p = subprocess.Popen([sys.executable, "-m", "routerd", "lab", "--topology", TOPO,
                          "--duration", str(duration), "--rate", str(rate), "--out", out,
                          "--quiet", *extra], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                         text=True)
    try:
        so, se = p.communicate(timeout=timeout)
    except subprocess.TimeoutExpired:
        p.kill()
        so, se = p.communicate()
        raise
    return subprocess.CompletedProcess(p.args, p.returncode, so, se), p.pid


def read_out(out: str) -> tuple[dict[str, Any], dict[str, Any], list[dict[str, str]], list[dict[str, str]]]:
    with open(os.path.join(out, "summary.json")) as fh:
        s = json.load(fh)
    with open(os.path.join(out, "lab.json")) as fh:
        x = json.load(fh)
    with open(os.path.join(out, "deliveries.csv")) as fh:
        d = list(csv.DictReader(fh))
    with open(os.path.join(out, "series.csv")) as fh:
        ser = list(csv.DictReader(fh))
    return s, x, d, ser


def diagnostics(x: dict[str, Any]) -> dict[str, Any]:
    """What an agent saw, for assertion messages: drops, TTL expiries, link detections."""
    return {n: {"dropped": {k: v for k, v in a["dropped"].items() if v},
                "ttl_expired": a["counts"]["ttl_expired"],
                "detections": [(d["neighbour"], round(d["after_s"], 3)) for d in a["detections"]]}
            for n, a in x["agents"].items()} | {"tbf_drops": sum(t["drops"] for t in x["tc"])}


def mean_delivery(rows: list[dict[str, str]], lo: float, hi: float) -> float:
    v = [float(r["delivery_s"]) for r in rows if r["delivered"] == "1" and lo <= float(r["inject_s"]) < hi]
    assert v, f"no deliveries injected in [{lo}, {hi})"
    return sum(v) / len(v)


@pytest.fixture
def outdir(tmp_path: Any) -> Iterator[str]:
    yield str(tmp_path / "lab")


def test_refuses_without_root(monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]) -> None:
    monkeypatch.setattr(os, "geteuid", lambda: 1000)
    args = argparse.Namespace(topology=TOPO, duration=1.0, rate=10.0, out="/nonexistent")
    assert L.run(args) == 2
    err = capsys.readouterr().err
    assert "needs root" in err and "network namespaces" in err


def test_bad_numbers_are_refused_before_the_lab_is_built(
        monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str], tmp_path: Any) -> None:
    # --seed -1 ended in numpy's SeedSequence traceback once the namespaces and agents were up
    from routerd.tools import cli

    def no_lab(*_a: Any, **_k: Any) -> int:
        raise AssertionError("the lab was started")

    monkeypatch.setattr(L, "check_host", lambda: None)
    monkeypatch.setattr(L, "_run", no_lab)
    base = ["lab", "--topology", TOPO, "--duration", "2", "--rate", "10", "--out", str(tmp_path / "o")]
    for extra, expect in ((["--seed", "-1"], "--seed: -1 must be >= 0"),
                          (["--warmup", "5"], "--warmup: 5.0 must be >= 0 and below the duration"),
                          (["--drain", "-1"], "--drain: -1.0 must be a number >= 0")):
        assert L.run(cli.build_parser().parse_args(base + extra)) == 2
        assert expect in capsys.readouterr().err


def test_plan_addresses_are_private_slash30s() -> None:
    topo = TF.load(TOPO)
    pairs = L.plan_pairs(topo)
    assert len(pairs) == 8                      # 8 two-way links in lab-small
    import ipaddress

    seen = set()
    for p in pairs:
        a, b = ipaddress.ip_address(p.addr_a), ipaddress.ip_address(p.addr_b)
        net = ipaddress.ip_network(f"{p.addr_a}/30", strict=False)
        assert b in net and a != b and net.subnet_of(ipaddress.ip_network("10.254.0.0/16"))
        assert a.is_private and net not in seen
        seen.add(net)
    assert L.tbf_args(2e6, 40, 400)[:3] == ["tbf", "rate", "2000000bit"]


def test_bad_event_options_are_refused() -> None:
    topo = TF.load(TOPO)
    with pytest.raises(L.InputError, match="is not a link"):
        L.parse_capacity_change("3:a1:b2:1e5", topo)
    with pytest.raises(L.InputError, match="T:FROM:TO:BPS"):
        L.parse_capacity_change("3:a1", topo)
    with pytest.raises(L.InputError, match="T\\[:DOWN_S\\]"):
        L.parse_kill("soon")
    ev = L.parse_kill("4:3")
    assert [(e.kind, e.at_s) for e in ev] == [("kill_service", 4.0), ("restart_service", 7.0)]


@pytest.mark.slow
@needs_lab
def test_lab_delivers_end_to_end_with_the_simulators_keys(outdir: str) -> None:
    r, pid = run_lab(outdir, duration=4.0, rate=150.0)
    assert r.returncode == 0, r.stderr
    s, x, rows, _ = read_out(outdir)
    # the simulator's summary keys, all of them (routerd.sim.run.reduce is the reference)
    from routerd.sim.run import run as sim_run

    ref = sim_run({"policy": "shortest", "rate_pps": 50.0, "duration_s": 0.5, "topology": TOPO,
                   "series": False})["summary"]
    assert set(ref) <= set(s), set(ref) - set(s)
    assert s["mode"] == "lab" and s["nodes"] == 7 and s["links"] == 16
    assert s["offered"] > 400 and s["delivery_ratio"] > 0.95, diagnostics(x)
    # every delivered packet took at least its pair's shortest propagation delay (emulated
    # in user space), computed independently with networkx's Dijkstra
    g = nx.DiGraph()
    topo = TF.load(TOPO)
    for a, b, dly in zip(topo.src.tolist(), topo.dst.tolist(), topo.delay_s.tolist()):
        g.add_edge(topo.nodes[a], topo.nodes[b], w=dly)
    sp = dict(nx.all_pairs_dijkstra_path_length(g, weight="w"))
    hops = dict(nx.all_pairs_shortest_path_length(g))
    done = [rw for rw in rows if rw["delivered"] == "1"]
    assert len(done) > 400
    for rw in done:
        assert float(rw["delivery_s"]) >= sp[rw["src"]][rw["dst"]] - 1e-6, rw
        assert int(rw["hops"]) >= hops[rw["src"]][rw["dst"]], rw
    # real sockets across namespaces: every agent forwarded or delivered, over veth
    assert all(a["counts"]["delivered"] > 0 for a in x["agents"].values())
    assert sum(t["packets"] for t in x["tc"]) >= s["lab_forwarded"]
    assert_nothing_left(pid, r.stderr)


@pytest.mark.slow
@needs_lab
def test_capacity_cut_moves_routes_and_delivery_recovers(outdir: str) -> None:
    # cut m -> b1 (on the short west-east way) from 4 Mbit/s to 64 kbit/s at t = 4 s
    r, pid = run_lab(outdir, "--capacity-change", "4:m:b1:64e3", duration=14.0, rate=200.0)
    assert r.returncode == 0, r.stderr
    s, x, rows, _ = read_out(outdir)
    before = mean_delivery(rows, 1.0, 4.0)
    hurt = max(mean_delivery(rows, t, t + 0.5) for t in (4.0, 4.5, 5.0, 5.5, 6.0))
    after = mean_delivery(rows, 11.0, 14.0)
    # the cut is felt: three times the delivery time before it and 80 ms more (a
    # 64 kbit/s link's queue; a busy machine's scheduling inflates "before" too, so a
    # ratio alone judged the load, not the cut)
    assert hurt > max(3 * before, before + 0.08), (before, hurt)
    assert after < 2 * before + 0.005, (before, after)  # ... and delivery time recovers
    # the service moved a1's traffic for b1 off m at some point after the cut
    samples = [(t, tb) for t, tb in x["table_samples"] if tb is not None]
    pre = [tb["a1"]["b1"] for t, tb in samples if t < 4.0]
    assert pre and all(dict(map(tuple, e)).get("m", 0) > 0.5 for e in pre)
    post = [dict(map(tuple, tb["a1"]["b1"])).get("m", 0.0) for t, tb in samples if t > 4.0]
    assert min(post) < 0.5, post
    assert s["dropped_buffer"] >= 0 and x["tc"]
    assert_nothing_left(pid, r.stderr)


@pytest.mark.slow
@needs_lab
def test_agents_forward_through_a_service_kill_and_resynchronise(outdir: str) -> None:
    r, pid = run_lab(outdir, "--kill-service", "3:3", duration=10.0, rate=150.0)
    assert r.returncode == 0, r.stderr
    _, x, rows, _ = read_out(outdir)
    out_rows = [rw for rw in rows if 3.3 <= float(rw["inject_s"]) < 5.8]
    before = [rw for rw in rows if 0.5 <= float(rw["inject_s"]) < 3.0]
    assert len(out_rows) > 200
    ratio = sum(rw["delivered"] == "1" for rw in out_rows) / len(out_rows)
    ratio0 = sum(rw["delivered"] == "1" for rw in before) / len(before)
    # the agents hold their last tables: delivery goes on as before the kill (a
    # stopped data plane would deliver nothing); the margin allows for a busy shared host
    assert ratio > 0.9 and ratio > ratio0 - 0.05, (ratio, ratio0, diagnostics(x))
    samples = x["table_samples"]
    assert any(tb is None for t, tb in samples if 3.3 < t < 5.8)   # the service was gone
    assert any(tb is not None for t, tb in samples if t > 7.5)    # ... and came back
    e1, e2 = x["service_epochs"]
    assert e2 > e1
    for name, a in x["agents"].items():
        assert a["counts"]["table_holds"] >= 1, name   # said so in its metrics
        assert a["counts"]["resyncs"] >= 1, name
        assert a["table"]["epoch"] == e2, name           # on the new service's tables
        assert not a["table_hold"], name
    assert_nothing_left(pid, r.stderr)


def _start_long_lab(outdir: str) -> subprocess.Popen[str]:
    """A 60 s lab run on the test topology, its stderr piped for :func:`_until_agents_up`."""
    return subprocess.Popen([sys.executable, "-m", "routerd", "lab", "--topology", TOPO,
                             "--duration", "60", "--rate", "50", "--out", outdir, "--quiet"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def _until_agents_up(p: subprocess.Popen[str]) -> list[str]:
    """The lab's stderr lines up to its "agents up" line (asserted, within 60 s)."""
    assert p.stderr is not None
    deadline = time.monotonic() + 60
    seen = []
    while time.monotonic() < deadline:
        line = p.stderr.readline()
        if not line:
            break
        seen.append(line)
        if "agents up" in line:
            break
    assert any("agents up" in ln for ln in seen), "".join(seen)
    return seen


@pytest.mark.slow
@needs_lab
def test_ctrl_c_tears_everything_down(outdir: str) -> None:
    p = _start_long_lab(outdir)
    try:
        seen = _until_agents_up(p)
        assert [n for n in L.list_namespaces() if n.startswith(f"{L.PREFIX}{p.pid}-")]
        time.sleep(1.0)
        p.send_signal(signal.SIGINT)
        _, err = p.communicate(timeout=30)
    finally:
        if p.poll() is None:
            p.kill()
            p.wait()
    assert p.returncode == 130, err
    assert "interrupted" in err
    assert not os.path.exists(os.path.join(outdir, "summary.json"))
    assert_nothing_left(p.pid, "".join(seen) + err)


def _dead_pid() -> int:
    p = subprocess.Popen(["true"])
    p.wait()
    return p.pid


def _orphan_dir(base: str, *, lab_pid: int, keep: bool = False,
                service: subprocess.Popen[Any] | None = None, d: str | None = None) -> str:
    """A run directory as a lab leaves it (``d`` or a new one under ``base``), its marker
    naming ``lab_pid`` as the lab."""
    import tempfile

    d = d or tempfile.mkdtemp(prefix=f"{L.PREFIX}-", dir=base)
    L.write_marker(d, keep=keep, service=service)
    mp = os.path.join(d, L.MARKER)
    with open(mp) as fh:
        doc = json.load(fh)
    doc["lab_pid"] = lab_pid
    if lab_pid != os.getpid():
        doc["lab_start"] = 1                     # whatever ran under that pid, it is gone
    with open(mp, "w") as fh:
        json.dump(doc, fh)
    return d


@pytest.mark.slow
def test_orphan_removal_acts_only_on_a_dead_labs_own_service(tmp_path: Any) -> None:
    """No root needed: the rules that keep remove_orphans from touching anything else."""
    import shutil
    import tempfile

    import yaml

    from routerd.io.childproc import READY_RE as READY

    base = tempfile.mkdtemp(prefix="rdo-", dir="/tmp")     # ipc paths must stay short
    procs: list[subprocess.Popen[Any]] = []
    try:
        # 1. a live lab's directory (this process, its real start time): untouched
        live = _orphan_dir(base, lab_pid=os.getpid())
        # 2. a dead lab whose marker names an unrelated process as its service: that
        #    process is left alone (its command line is not the lab's serve); the dir goes
        other = subprocess.Popen(["sleep", "60"])
        procs.append(other)
        unrelated = _orphan_dir(base, lab_pid=_dead_pid(), service=other)
        #    ... even when the marker claims it is that lab's serve (a reused pid, an edit)
        lying = _orphan_dir(base, lab_pid=_dead_pid(), service=other)
        with open(os.path.join(lying, L.MARKER)) as fh:
            doc = json.load(fh)
        doc["service_cmdline"] = L.service_command(os.path.join(lying, "lab-config.yaml"))
        with open(os.path.join(lying, L.MARKER), "w") as fh:
            json.dump(doc, fh)
        # 3. a dead lab's directory made by someone else's rules (group-writable): ignored
        foreign = _orphan_dir(base, lab_pid=_dead_pid())
        os.chmod(foreign, 0o777)
        # 4. a dead lab with its real service still running, and 5. the same with --keep
        served = []
        for keep in (False, True):
            d = tempfile.mkdtemp(prefix=f"{L.PREFIX}-", dir=base)
            doc = L.lab_config(None, TOPO, d)
            with open(os.path.join(d, "lab-config.yaml"), "w") as fh:
                yaml.safe_dump(doc, fh)
            sp = subprocess.Popen(L.service_command(os.path.join(d, "lab-config.yaml")),
                                  stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True,
                                  start_new_session=True)
            procs.append(sp)
            assert sp.stdout is not None
            for line in sp.stdout:
                if READY.match(line):
                    break
            assert sp.poll() is None
            _orphan_dir(base, lab_pid=_dead_pid(), keep=keep, service=sp, d=d)
            served.append((d, sp, keep))
        lines = L.remove_orphans(base)
        assert os.path.isdir(live) and os.path.isdir(foreign)
        assert other.poll() is None and not os.path.exists(unrelated) and not os.path.exists(lying)
        for d, sp, keep in served:
            assert sp.wait(15) == 0          # SIGTERM first: the service stopped in order
            assert any(f"stopped the service (pid {sp.pid})" in ln and d in ln for ln in lines), lines
            assert os.path.isdir(d) == keep
        assert len(lines) == 2 + 3, lines    # 2 services stopped, 3 directories removed
        assert L.remove_orphans(base) == []  # nothing left to do (the kept dir: no service)
    finally:
        for p in procs:
            if p.poll() is None:
                p.kill()
                p.wait()
            if p.stdout is not None:
                p.stdout.close()
        shutil.rmtree(base, ignore_errors=True)


def _cmdline(pid: int) -> str | None:
    try:
        with open(f"/proc/{pid}/cmdline", "rb") as fh:
            return fh.read().replace(b"\0", b" ").decode(errors="replace")
    except OSError:
        return None


@pytest.mark.slow
@needs_lab
def test_the_next_run_removes_what_a_kill_9_of_the_lab_left(outdir: str) -> None:
    """kill -9 of `routerd lab` runs no teardown: its agents (in its namespaces) and its
    service (in the host's, its own session) stay.  The next lab stops that service,
    deletes those namespaces and the dead lab's run directory, and nothing else."""
    p = _start_long_lab(outdir)
    serve: list[int] = []
    run_dir = ""
    try:
        seen = _until_agents_up(p)
        run_dir = run_dir_of("".join(seen))
        serve = [int(x.split(":")[0]) for x in lab_processes(run_dir) if " serve " in x]
        assert len(serve) == 1, lab_processes(run_dir)
        p.kill()                                   # SIGKILL: no handler, no teardown
        p.wait(10)
        if p.stderr is not None:
            p.stderr.close()
        if p.stdout is not None:
            p.stdout.close()
        time.sleep(0.5)
        # what the dead lab left: this is what the next run must clear
        assert " serve " in (_cmdline(serve[0]) or ""), "the service died with the lab"
        assert [n for n in L.list_namespaces() if n.startswith(f"{L.PREFIX}{p.pid}-")]
        assert os.path.isdir(run_dir)
        r, pid2 = run_lab(outdir + "-2", duration=2.0, rate=50.0)
        assert r.returncode == 0, r.stderr
        assert f"stopped the service (pid {serve[0]})" in r.stderr, r.stderr
        assert lab_processes(run_dir) == [], lab_processes(run_dir)
        assert [n for n in L.list_namespaces() if n.startswith(f"{L.PREFIX}{p.pid}-")] == []
        assert not os.path.exists(run_dir)
        assert_nothing_left(pid2, r.stderr)
    finally:
        if p.poll() is None:
            p.kill()
            p.wait()
        # never leave the orphan behind, even when the lab did not remove it (checked by
        # its command line, which names the dead lab's run directory)
        for pid in serve:
            if run_dir and run_dir in (_cmdline(pid) or ""):
                os.kill(pid, signal.SIGKILL)
        L.remove_leftovers(only_pid=p.pid)
        if run_dir:
            import shutil

            shutil.rmtree(run_dir, ignore_errors=True)


@pytest.mark.slow
@needs_lab
def test_scenario_link_failure_and_side_by_side_with_the_simulator(outdir: str) -> None:
    # configs/lab-small-cut.yaml: m - b1 down at 4 s, up at 8 s, load x1.5 from 10 s
    scen = os.path.join(ROOT, "configs", "lab-small-cut.yaml")
    r, pid = run_lab(outdir, "--scenario", scen, "--compare-sim", "qrouting", duration=12.0,
                     rate=150.0)
    assert r.returncode == 0, r.stderr
    s, x, rows, _ = read_out(outdir)
    with open(os.path.join(outdir, "sim", "summary.json")) as fh:
        sim = json.load(fh)
    # the same traffic source and seed on both sides: the very same packets are offered
    assert s["offered"] == sim["offered"]
    # and the lab's delivery time is in the simulator's range (propagation dominates here)
    assert 0.5 < s["mean_delivery_s"] / sim["mean_delivery_s"] < 2.0, (s["mean_delivery_s"], sim["mean_delivery_s"])
    assert "lab (service)" in r.stdout and os.path.exists(os.path.join(outdir, "compare.txt"))
    # the cut is detected by missed probes on both ends (BFD detection time 3 x 100 ms) ...
    for node, nb in (("m", "b1"), ("b1", "m")):
        det = [d for d in x["agents"][node]["detections"] if d["neighbour"] == nb]
        assert det and det[0]["after_s"] >= 0.3, (node, det)
    # ... after which traffic goes around it, and comes back when it is up again
    during = [rw for rw in rows if 4.6 <= float(rw["inject_s"]) < 8.0]
    ratio = sum(rw["delivered"] == "1" for rw in during) / len(during)
    assert ratio > 0.9, (ratio, diagnostics(x))
    kinds = [(e["kind"], e["from"], e["to"]) for e in x["events"]]
    assert ("down", "m", "b1") in kinds and ("up", "b1", "m") in kinds
    assert all(a["links"][nb]["state"] == "up" for n, a in x["agents"].items()
               for nb in a["links"])
    # the load step is in the offered series (x1.5 from 10 s)
    early = sum(1 for rw in rows if 8.5 <= float(rw["inject_s"]) < 10.0)
    late = sum(1 for rw in rows if 10.0 <= float(rw["inject_s"]) < 11.5)
    assert late > 1.2 * early
    assert_nothing_left(pid, r.stderr)
