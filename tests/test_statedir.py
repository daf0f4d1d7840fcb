"""The state directory's recorded documents (routerd/io/statedir.py), and the commands that
rely on them: a state dir alone is enough to replay and to restart (issue 18).

Units: the canonical topology document reads back as the same Topology bit for bit (our
YAML, GraphML, topohub's node-link JSON with its demand matrix) and the same id; config
documents; content ids, atomic writes and modes; the records' references; the one rule for
what a command runs with (never the demo lab for a directory written for another network).
Scenarios (slow): a real ``routerd serve`` whose topology file is deleted, killed with
SIGKILL, then replayed and restarted from the directory alone; a reload recorded as a new
config document; the sharded layout.
"""
from __future__ import annotations

import argparse
import json
import os
import signal
import stat
import subprocess
import sys
import time
from typing import Any

import numpy as np
import pytest

from conftest import ring_with_chords
from routerd.agent import client
from routerd.core import engine as E
from routerd.core import topology as T
from routerd.io import config, statedir, wire
from routerd.io import journal as J
from routerd.io import topofiles as TF
from routerd.io.inputs import load_config, load_topology
from routerd.service import shard
from routerd.tools.cli import main
from service_harness import ServiceProc, service_args
from test_replay import SERVICE_CFG, Writer, rows

DEMO = load_topology(config.load(None))


# ---- helpers ------------------------------------------------------------------------------
def same_topology(a: T.Topology, b: T.Topology) -> None:
    """Equal as the engine, the guards and the simulator see a topology: every array bit
    for bit (float64 compared as their bytes), names, order, demands and the id."""
    assert (a.name, a.nodes, a.digest) == (b.name, b.nodes, b.digest)
    for f in ("src", "dst", "delay_s", "capacity_bps", "buffer_pkts"):
        x, y = getattr(a, f), getattr(b, f)
        assert x.dtype == y.dtype and x.tobytes() == y.tobytes(), f
    assert (a.demands is None) == (b.demands is None)
    if a.demands is not None:
        assert a.demands.tobytes() == b.demands.tobytes()


def write_graphml(path: str, topo: T.Topology) -> None:
    """An undirected GraphML file of our own (http://graphml.graphdrawing.org/) for the
    symmetric links of ``topo``."""
    lines = ['<?xml version="1.0" encoding="UTF-8"?>',
             '<graphml xmlns="http://graphml.graphdrawing.org/xmlns">',
             '<key id="d" for="edge" attr.name="delay_s" attr.type="double"/>',
             '<key id="c" for="edge" attr.name="capacity_bps" attr.type="double"/>',
             '<key id="b" for="edge" attr.name="buffer_pkts" attr.type="int"/>',
             f'<graph id="{topo.name}" edgedefault="undirected">']
    lines += [f'<node id="{n}"/>' for n in topo.nodes]
    for a, b, d, c, bf in zip(topo.src.tolist(), topo.dst.tolist(), topo.delay_s.tolist(),
                              topo.capacity_bps.tolist(), topo.buffer_pkts.tolist()):
        if a < b:
            lines.append(f'<edge source="{topo.nodes[a]}" target="{topo.nodes[b]}"><data key="d">'
                         f'{d!r}</data><data key="c">{c!r}</data><data key="b">{bf}</data></edge>')
    lines += ["</graph>", "</graphml>"]
    with open(path, "w") as fh:
        fh.write("\n".join(lines))


def ns(**kw: Any) -> argparse.Namespace:
    return argparse.Namespace(**{"config": None, "topology": None, **kw})


# ---- the documents --------------------------------------------------------------------------
def test_topology_document_reads_back_bit_for_bit(tmp_path: Any) -> None:
    rng = np.random.default_rng(4)
    ring = ring_with_chords(40, 30, seed=9)
    # awkward floats: subnormal, tiny, huge, many digits
    odd = T._replace(ring, delay_s=np.concatenate([[5e-324, 1e-300, 1.0000000000000002, 1e16],
                                                   rng.uniform(0, 1e-2, ring.n_links - 4)]),
                     demands=np.where(rng.random((ring.n, ring.n)) < 0.2,
                                      rng.exponential(1.0, (ring.n, ring.n)), 0.0)
                     * (1 - np.eye(ring.n)))
    gml = str(tmp_path / "ring.graphml")
    write_graphml(gml, ring)
    # topohub's abilene (package topohub): node-link JSON with km distances and demands
    abilene = TF.load("topohub:sndlib/abilene", T.LinkDefaults(1e9, 100))
    assert abilene.demands is not None and abilene.demands.any()
    for i, topo in enumerate([ring, odd, TF.load(gml), abilene, DEMO]):
        d = str(tmp_path / f"s{i}")
        refs = statedir.store(d, topo, None)
        back = statedir.load_topology(d, refs.topology)
        same_topology(back, topo)
        assert refs.topology_id == topo.digest
        # the canonical form is a fixed point: storing what was read gives the same file
        assert statedir.store(d, back, None).topology == refs.topology
        assert os.listdir(statedir.documents_dir(d)) == [f"topology-{refs.topology}.yaml"]


def test_config_document_reads_back_and_ids_follow_content(tmp_path: Any) -> None:
    d = str(tmp_path / "s")
    cfg = config.load(None).with_overrides({"engine.hysteresis.margin": 0.125,
                                            "service.pull": "ipc:///tmp/x",
                                            "guards.jump.factor": 3.0})
    a = statedir.store(d, None, cfg).config
    assert statedir.load_config(d, a) == cfg
    assert statedir.store(d, None, cfg).config == a            # same content, same id
    b = statedir.store(d, None, cfg.with_overrides({"engine.hysteresis.margin": 0.25})).config
    assert b != a and statedir.load_config(d, b)["engine.hysteresis.margin"] == 0.25


def test_documents_are_written_atomically_with_private_modes(tmp_path: Any) -> None:
    d = str(tmp_path / "s")
    refs = statedir.store(d, DEMO, config.load(None))
    statedir.set_current(d, refs)
    dd = statedir.documents_dir(d)
    assert stat.S_IMODE(os.stat(dd).st_mode) == 0o700
    for name in os.listdir(dd):
        assert stat.S_IMODE(os.stat(os.path.join(dd, name)).st_mode) == 0o600, name
    assert not [n for n in os.listdir(dd) if ".tmp" in n]
    assert statedir.current(d) == refs
    # a damaged document is named, not read
    path = os.path.join(dd, f"topology-{refs.topology}.yaml")
    with open(path, "ab") as fh:
        fh.write(b"# edited\n")
    with pytest.raises(statedir.DocumentError, match="damaged"):
        statedir.load_topology(d, refs.topology)
    os.unlink(path)
    with pytest.raises(statedir.DocumentError, match="missing"):
        statedir.load_topology(d, refs.topology)
    # storing again repairs it
    statedir.store(d, DEMO, None)
    same_topology(statedir.load_topology(d, refs.topology), DEMO)
    with open(os.path.join(dd, statedir.CURRENT), "w") as fh:
        fh.write("topology: ../../etc\n")
    with pytest.raises(statedir.DocumentError, match="not a pointer"):
        statedir.current(d)


def test_refs_come_from_the_newest_start_and_config_records() -> None:
    R = J.Record
    recs = [R(1, "start", {"topology": "t1", "documents": {"topology": "a" * 16, "config": "b" * 16}}),
            R(2, "tick", {"t": 1.0}),
            R(3, "config", {"settings": {}, "documents": {"config": "c" * 16}}),
            R(4, "batch", {})]
    assert statedir.refs_in(recs) == statedir.DocRefs("a" * 16, "c" * 16, "t1")
    # a later start record from a version that kept no documents: nothing is known
    assert statedir.refs_in([*recs, R(5, "start", {"topology": "t1"})]) == statedir.DocRefs(None, None, "t1")
    assert statedir.refs_in([]) == statedir.DocRefs()


# ---- what a command runs with ----------------------------------------------------------------
def choose(d: str, args: argparse.Namespace, written_for: str | None) -> statedir.Chosen:
    return statedir.choose(args, d, statedir.current(d), state_root=d,
                           written_for=lambda: written_for, load_config_fn=load_config,
                           load_topology_fn=load_topology)


def test_choice_recorded_explicit_and_never_a_silent_demo_lab(tmp_path: Any) -> None:
    ring = ring_with_chords(12, 6, seed=2)
    d = str(tmp_path / "s")
    # a directory written for the ring before documents were kept: no demo lab
    with pytest.raises(statedir.DocumentError) as e:
        choose(d, ns(), ring.digest)
    msg = str(e.value)
    assert ring.digest in msg and DEMO.digest in msg and "--topology" in msg and "--config" in msg
    # one written for the demo lab itself, or a fresh one: the demo lab, said so
    assert "the journal was written for it" in choose(d, ns(), DEMO.digest).said[-1]
    assert choose(d, ns(), None).topo.digest == DEMO.digest
    # recorded documents win over the demo lab; the flags still go on top of the config
    cfg = config.load(None).with_overrides({"engine.hysteresis.margin": 0.3,
                                            "service.state_dir": "/somewhere/else"})
    statedir.set_current(d, statedir.store(d, ring, cfg))
    ch = choose(d, ns(ingest="ipc:///tmp/z"), ring.digest)
    same_topology(ch.topo, ring)
    assert ch.recorded_topology and ch.cfg["engine.hysteresis.margin"] == 0.3
    assert ch.cfg["service.ingest"] == "ipc:///tmp/z" and ch.cfg["service.state_dir"] == d
    assert any("recorded in" in s for s in ch.said)
    # an explicit topology of another network: refused naming both ids, even with no
    # journal record left to say so
    other = str(tmp_path / "other.yaml")
    with open(other, "w") as fh:
        fh.write("topology:\n  nodes: [a, b]\n  links:\n    - {between: [a, b], delay_s: 0.001, "
                 "capacity_bps: 1.0e6, buffer_pkts: 10}\n")
    with pytest.raises(statedir.DocumentError) as e:
        choose(d, ns(topology=other), None)
    assert ring.digest in str(e.value) and TF.load(other).digest in str(e.value)
    assert "another topology" in str(e.value)
    # the same nodes with another delay: taken, and the difference said
    import yaml

    slower = str(tmp_path / "slower.yaml")
    with open(slower, "w") as fh:
        yaml.safe_dump(T.to_mapping(T._replace(ring, delay_s=ring.delay_s * 2)), fh)
    ch = choose(d, ns(topology=slower), ring.digest)
    assert ch.topo.digest == ring.digest and any("differs from the recorded" in s for s in ch.said)
    assert not any("differs" in s for s in choose(d, ns(), ring.digest).said)


def test_replay_uses_the_recorded_topology_and_refuses_another(tmp_path: Any,
                                                               capsys: pytest.CaptureFixture[str]) -> None:
    ring = ring_with_chords(12, 6, seed=2)
    d = str(tmp_path / "state")
    w = Writer(ring, d, E.EngineSettings(step_mode="constant", alpha=0.4))
    for i in range(30):
        w.batch(40)
        if i % 3 == 2:
            w.tick()
    w.j.close()
    out = str(tmp_path / "o")
    # no documents (an old directory): exit 2 asking for the topology, no demo lab
    assert main(["replay", d, "--out", out, "--no-plot"]) == 2
    err = capsys.readouterr().err
    assert ring.digest in err and "--topology" in err and not os.path.exists(out)
    # documents recorded: the directory alone is enough, and gives the engine's tables
    statedir.set_current(d, statedir.store(d, ring, config.load(None)))
    assert main(["replay", d, "--out", out, "--no-plot"]) == 0
    assert "recorded in" in capsys.readouterr().out
    with open(os.path.join(out, "tables.json")) as fh:
        assert json.load(fh) == {"v": wire.VERSION, "tables": wire.tables_by_name(w.eng)}
    # an explicit topology of another network: exit 2 naming both ids
    other = str(tmp_path / "other.yaml")
    with open(other, "w") as fh:
        fh.write("topology:\n  nodes: [a, b]\n  links:\n    - {between: [a, b], delay_s: 0.001, "
                 "capacity_bps: 1.0e6, buffer_pkts: 10}\n")
    assert main(["replay", d, "--out", str(tmp_path / "o2"), "--topology", other]) == 2
    err = capsys.readouterr().err
    other_id = TF.load(other).digest
    assert ring.digest in err and other_id in err


# ---- real processes ---------------------------------------------------------------------------
def _feed(sp: ServiceProc, topo: T.Topology, rng: np.random.Generator, batches: int) -> None:
    rep = client.Reporter(sp.endpoints["ingest"], f"f-{rng.integers(1 << 30)}",
                          topology_nodes=topo, batch_rows=60)
    try:
        for _ in range(batches):
            rep.add_hops(*rows(topo, rng, 60))
            rep.flush()
    finally:
        rep.close()


def _settled_tables(sp: ServiceProc) -> tuple[dict[str, Any], dict[str, Any]]:
    """(control tables, every node's latest publication) once both say the same."""
    sub = client.TableSubscriber(sp.endpoints["publish"])
    try:
        time.sleep(0.1)                                   # > debounce: the last batch decided
        live = sp.control({"op": "tables"})
        assert sub.wait_for(lambda s: s.tables == live["tables"], 10), "publications differ"
        return live, dict(sub.tables)
    finally:
        sub.close()


def _serve(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "routerd", "serve", *args], capture_output=True,
                          text=True, timeout=60, check=False)


@pytest.mark.slow
def test_state_dir_alone_after_the_topology_is_deleted_and_a_kill_9(base: str, tmp_path: Any) -> None:
    ring = ring_with_chords(14, 8, seed=6)
    net = os.path.join(base, "net.graphml")
    write_graphml(net, ring)
    conf = os.path.join(base, "c.yaml")
    with open(conf, "w") as fh:
        fh.write(SERVICE_CFG.format(margin=0.05))
    rng = np.random.default_rng(8)
    sp = ServiceProc(base, service_args(base, "--topology", net, "--config", conf))
    try:
        _feed(sp, ring, rng, 15)
        # a reload (SIGHUP) records the new effective config before its config record
        with open(conf, "w") as fh:
            fh.write(SERVICE_CFG.format(margin=0.15))
        sp.signal(signal.SIGHUP)
        deadline = time.monotonic() + 10
        while not any("reloaded" in ln for ln in sp.stderr_lines) and time.monotonic() < deadline:
            time.sleep(0.05)
        _feed(sp, ring, rng, 10)
        live, published = _settled_tables(sp)
        os.unlink(net)
        os.unlink(conf)
        sp.proc.kill()                                    # SIGKILL: no final snapshot
        sp.wait(10)
    finally:
        sp.kill()
    sd = sp.state_dir
    recs = list(J.iter_records(J.journal_dir(sd)))
    cfg_recs = [r for r in recs if r.kind == "config"]
    assert cfg_recs and all(r.body["documents"]["config"] for r in cfg_recs)
    reloaded = statedir.load_config(sd, cfg_recs[-1].body["documents"]["config"])
    assert reloaded["engine.hysteresis.margin"] == 0.15
    starts = [r for r in recs if r.kind == "start"]
    assert statedir.load_config(sd, starts[-1].body["documents"]["config"])["engine.hysteresis.margin"] == 0.05
    assert statedir.current(sd).config == cfg_recs[-1].body["documents"]["config"]
    # replay from the directory alone: the published tables, bit for bit
    out = str(tmp_path / "r")
    r = subprocess.run([sys.executable, "-m", "routerd", "replay", sd, "--out", out, "--no-plot"],
                       capture_output=True, text=True, timeout=120, check=False)
    assert r.returncode == 0, r.stderr
    with open(os.path.join(out, "tables.json")) as fh:
        got = json.load(fh)
    assert got == live and got["tables"] == published
    # restart from the directory alone: the recorded network and the reloaded config
    sp = ServiceProc(base, service_args(base))
    try:
        assert any("topology recorded in" in ln for ln in sp.stdout_lines), sp.log()
        assert any("config   recorded in" in ln for ln in sp.stdout_lines), sp.log()
        assert sp.control({"op": "tables"}) == live
        h = sp.control({"op": "health"})
        assert h["topology"]["id"] == ring.digest
        last = [r for r in J.iter_records(J.journal_dir(sd)) if r.kind == "start"][-1]
        running = statedir.load_config(sd, last.body["documents"]["config"])
        assert running["engine.hysteresis.margin"] == 0.15
        assert running["service.snapshot_interval_s"] == 3600     # from the deleted file
        sp.signal(signal.SIGTERM)
        assert sp.wait(20) == 0
    finally:
        sp.kill()
    # another network on this directory is refused, naming both ids
    other = os.path.join(base, "other.yaml")
    with open(other, "w") as fh:
        fh.write("topology:\n  nodes: [a, b]\n  links:\n    - {between: [a, b], delay_s: 0.001, "
                 "capacity_bps: 1.0e6, buffer_pkts: 10}\n")
    r = _serve(*service_args(base, "--topology", other))
    assert r.returncode == 2 and ring.digest in r.stderr and TF.load(other).digest in r.stderr, r.stderr


@pytest.mark.slow
def test_an_old_state_dir_is_never_served_on_the_demo_lab(base: str) -> None:
    ring = ring_with_chords(10, 4, seed=1)
    sd = os.path.join(base, "state")
    w = Writer(ring, sd, E.EngineSettings())
    w.batch(30)
    w.j.close()
    r = _serve(*service_args(base))
    assert r.returncode == 2, r.stdout
    assert ring.digest in r.stderr and "--topology" in r.stderr and "demo" in r.stderr


@pytest.mark.slow
def test_sharded_state_dir_replays_and_restarts_alone(base: str, tmp_path: Any) -> None:
    ring = ring_with_chords(14, 8, seed=6)
    net = os.path.join(base, "net.yaml")
    import yaml

    with open(net, "w") as fh:
        yaml.safe_dump(T.to_mapping(ring), fh)
    conf = os.path.join(base, "c.yaml")
    smap = os.path.join(base, "map.yaml")
    with open(smap, "w") as fh:
        fh.write("h0: 1\nh1: 1\nh2: 1\nh3: 0\n")
    head = f"guards:\n  rate: {{batches_per_s: 1000.0}}\nshard:\n  map: {smap}\n"
    with open(conf, "w") as fh:
        fh.write(head + SERVICE_CFG.format(margin=0.05))
    rng = np.random.default_rng(3)
    extra = ("--shards", "2")
    sp = ServiceProc(base, service_args(base, "--topology", net, "--config", conf, *extra))
    try:
        _feed(sp, ring, rng, 8)
        # a reload through the front: every worker records its new config, as it runs it
        # (rate limits stay the front's); a reload that changes nothing records nothing
        with open(conf, "w") as fh:
            fh.write(head + SERVICE_CFG.format(margin=0.2))
        assert sp.control({"op": "reload"})["reload"]
        assert sp.control({"op": "reload"})["reload"]
        for k in range(2):
            wd = shard.shard_dir(sp.state_dir, k, 2)
            c = statedir.load_config(wd, statedir.current(wd).config)
            assert c["engine.hysteresis.margin"] == 0.2 and c["guards.rate.batches_per_s"] == 0.0
            assert sum(r.kind == "config" for r in J.iter_records(J.journal_dir(wd))) == 1
        _feed(sp, ring, rng, 4)
        time.sleep(0.3)
        live = sp.control({"op": "tables"})
        os.unlink(net)
        os.unlink(conf)
        os.unlink(smap)                       # the recorded copy takes its place
        sp.signal(signal.SIGTERM)
        assert sp.wait(30) == 0
    finally:
        sp.kill()
    sd = sp.state_dir
    for k in range(2):
        assert statedir.current(shard.shard_dir(sd, k, 2)).topology_id == ring.digest
    assert statedir.current(sd).topology_id == ring.digest          # the front's own
    assert statedir.current(sd).shard_map is not None
    out = str(tmp_path / "r")
    assert main(["replay", sd, "--out", out]) == 0
    with open(os.path.join(out, "tables.json")) as fh:
        assert json.load(fh)["tables"] == live["tables"]
    sp = ServiceProc(base, service_args(base, *extra))
    try:
        assert any("topology recorded in" in ln for ln in sp.stdout_lines), sp.log()
        assert sp.control({"op": "tables"})["tables"] == live["tables"]
        sp.signal(signal.SIGTERM)
        assert sp.wait(30) == 0
    finally:
        sp.kill()


def test_serve_reads_the_records_when_the_pointer_is_gone(tmp_path: Any) -> None:
    from routerd.service.daemon import choose_inputs

    ring = ring_with_chords(12, 6, seed=2)
    d = str(tmp_path / "state")
    refs = statedir.store(d, ring, config.load(None).with_overrides({"engine.ceiling_s": 7.0}))
    j = J.Journal(J.journal_dir(d))
    j.append("start", {"topology": ring.digest, "nodes": list(ring.nodes), "epoch": 1,
                       "documents": refs.body()})
    j.close()
    assert statedir.current(d) is None
    ch = choose_inputs(ns(state_dir=d))
    same_topology(ch.topo, ring)
    assert ch.cfg["engine.ceiling_s"] == 7.0 and ch.cfg["service.state_dir"] == d


def test_a_file_where_the_state_dir_should_be_is_refused_before_anything(tmp_path: Any) -> None:
    # a newcomer's slip: --state-dir naming a file, or a folder under a file (was a
    # NotADirectoryError traceback from the journal listing)
    import subprocess
    import sys

    f = tmp_path / "afile"
    f.write_text("x")
    assert statedir.unusable(str(f)) == "is a file, not a folder"
    assert statedir.unusable(str(f / "x")) == f"cannot be made: {f} is a file, not a folder"
    assert statedir.unusable(str(tmp_path / "new" / "deeper")) is None
    assert statedir.unusable(str(tmp_path)) is None
    for bad in (f, f / "x"):
        r = subprocess.run([sys.executable, "-m", "routerd", "serve", "--state-dir", str(bad)],
                           capture_output=True, text=True, timeout=60)
        assert r.returncode == 2 and "Traceback" not in r.stderr, r.stderr
        assert f"service.state_dir (--state-dir): '{bad}'" in r.stderr
    assert f.read_text() == "x" and not (tmp_path / "new").exists()
