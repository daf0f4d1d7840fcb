"""``routerd validate FILE...`` (routerd/tools/validate.py): exit codes and what it prints.

Contract (issue 2): ``OK`` and a one-line summary per good file, or every error found,
each naming the file, the element or key path, the bad value and the rule; exit 1.
"""
from __future__ import annotations

import os
import subprocess
import sys

import networkx as nx
import pytest
import yaml

from routerd.io import config
from routerd.tools import cli

GOOD_TOPO = {"topology": {
    "name": "bench-lab", "defaults": {"capacity_bps": 1.0e7, "buffer_pkts": 20},
    "nodes": ["a", "b", "c"],
    "links": [{"between": ["a", "b"], "delay_s": 0.001}, {"between": ["b", "c"], "delay_s": 0.002},
              {"between": ["c", "a"], "delay_s": 0.004}]}}


def _w(tmp_path, name: str, doc) -> str:  # type: ignore[no-untyped-def]
    p = tmp_path / name
    p.write_text(doc if isinstance(doc, str) else yaml.safe_dump(doc))
    return str(p)


def _run(capsys, *argv: str) -> tuple[int, list[str]]:  # type: ignore[no-untyped-def]
    rc = cli.main(["validate", *argv])
    out = capsys.readouterr().out
    return rc, out.splitlines()


def test_good_topology_and_config(tmp_path, capsys) -> None:  # type: ignore[no-untyped-def]
    topo = _w(tmp_path, "lab.yaml", GOOD_TOPO)
    cfg = _w(tmp_path, "routerd.yaml", {"topology": {"file": "lab.yaml"},
                                        "engine": {"step": {"alpha": 0.25, "mode": "constant"}}})
    rc, lines = _run(capsys, topo, cfg)
    assert rc == 0
    assert lines[0] == (f"OK {topo}: topology 'bench-lab': 3 nodes, 6 directed links, "
                        "diameter 1 hops / 3.000 ms")  # c -> a via b: 2 + 1 ms
    # a config that names a topology (relative to the config file) gets it checked too
    assert lines[1].startswith(f"OK {cfg}: config: 3 setting(s) differ from the defaults; "
                               "topology 'bench-lab'")
    assert len(lines) == 2


def test_bad_files_list_every_problem_and_exit_1(tmp_path, capsys) -> None:  # type: ignore[no-untyped-def]
    bad_topo = dict(GOOD_TOPO["topology"])
    bad_topo["nodes"] = ["a", "b", "c", "d"]
    bad_topo["links"] = GOOD_TOPO["topology"]["links"] + [
        {"between": ["a", "zz"], "delay_s": 0.001}, {"from": "b", "to": "b", "delay_s": 0.001},
        {"between": ["a", "d"], "delay_s": -1}, {"from": "b", "to": "a", "delay_s": 0.001}]
    topo = _w(tmp_path, "bad-topo.yaml", {"topology": bad_topo})
    cfg = _w(tmp_path, "bad.yaml", {"engine": {"explore": {"max_rate": 1.4}, "step": {"kappa": 2}}})
    good = _w(tmp_path, "good.yaml", GOOD_TOPO)
    rc, lines = _run(capsys, topo, cfg, good)
    assert rc == 1
    text = "\n".join(lines)
    # each problem once, though an undirected link is checked as two directed ones
    assert f"{topo}: 4 problem(s)" in lines
    assert f"  {topo}: topology.links[3]: 'zz' is not a declared node" in lines
    assert f"  {topo}: topology.links[4]: 'b -> b' is a self-loop" in lines
    assert f"  {topo}: topology.links[5].delay_s: -1 must be >= 0" in lines
    assert (f"  {topo}: topology.links[6]: 'b -> a' duplicates the link at {topo}: "
            "topology.links[0]") in lines
    assert f"{cfg}: 2 problem(s)" in lines
    assert f"  {cfg}: engine.explore.max_rate: 1.4 is above 1" in lines
    assert f"  {cfg}: engine.step.kappa: 2 is above 1" in lines
    assert f"OK {good}: topology 'bench-lab'" in text  # good files still reported


def test_missing_and_unreadable_files(tmp_path, capsys) -> None:  # type: ignore[no-untyped-def]
    missing = str(tmp_path / "nope.yaml")
    junk = _w(tmp_path, "junk.yaml", "engine: [1, 2\n")
    rc, lines = _run(capsys, missing, junk)
    assert rc == 1
    assert f"  {missing}: '{missing}' does not exist" in lines
    assert any(ln.startswith(f"  {junk}: is not valid YAML") for ln in lines)


def test_topology_without_its_top_level_key_is_named_as_such(tmp_path, capsys) -> None:  # type: ignore[no-untyped-def]
    flat = _w(tmp_path, "flat.yaml", GOOD_TOPO["topology"])
    rc, lines = _run(capsys, flat)
    assert rc == 1
    assert any(ln.startswith(f"  {flat}: ['links', 'nodes'] are topology keys at the top level")
               and "under 'topology:'" in ln for ln in lines), lines


def test_config_naming_a_bad_topology_fails(tmp_path, capsys) -> None:  # type: ignore[no-untyped-def]
    cfg = _w(tmp_path, "c.yaml", {"topology": {"file": "absent.yaml"}})
    rc, lines = _run(capsys, cfg)
    assert rc == 1 and any("absent.yaml" in ln and "does not exist" in ln for ln in lines)


def test_topohub_reference_needs_capacities(capsys) -> None:  # type: ignore[no-untyped-def]
    rc, lines = _run(capsys, "topohub:sndlib/abilene")
    assert rc == 1
    assert any("capacity_bps: is missing and no default was given" in ln for ln in lines)
    rc, lines = _run(capsys, "topohub:sndlib/abilene", "--capacity-bps", "1e9", "--buffer-pkts", "64")
    assert rc == 0
    assert lines == ["OK topohub:sndlib/abilene: topology 'abilene': 12 nodes, 30 directed links, "
                     "diameter 5 hops / 23.534 ms, demand matrix"]


def test_graphml_file(tmp_path, capsys) -> None:  # type: ignore[no-untyped-def]
    G = nx.Graph()
    G.add_edge("p", "q", delay_s=0.001, capacity_bps=1e6, buffer_pkts=5)
    G.add_edge("q", "r", delay_s=0.001, capacity_bps=1e6, buffer_pkts=5)
    path = str(tmp_path / "g.graphml")
    nx.write_graphml(G, path)  # networkx as the reference GraphML writer
    rc, lines = _run(capsys, path)
    assert rc == 0 and lines[0].startswith(f"OK {path}: topology ")


def test_node_link_json_from_networkx_and_every_malformed_shape(tmp_path, capsys) -> None:  # type: ignore[no-untyped-def]
    import json

    G = nx.Graph()
    G.add_edge("p", "q", delay_s=0.001, capacity_bps=1e6, buffer_pkts=5)
    G.add_edge("q", "r", delay_s=0.001, capacity_bps=1e6, buffer_pkts=5)
    good = nx.node_link_data(G)   # networkx as the reference node-link writer
    path = _w(tmp_path, "g.json", json.dumps(good))
    rc, lines = _run(capsys, path)
    assert rc == 0 and lines[0].startswith(f"OK {path}: topology "), lines
    ekey = "edges" if "edges" in good else "links"
    nodes = good["nodes"]
    # each a shape the reader once crashed on (TypeError / AttributeError): now a named
    # problem and exit 1
    bad = {
        "null-edges": ({**good, ekey: None}, f"{ekey}: is null, must be an array of edge objects"),
        "int-nodes": ({**good, "nodes": [1, 2]}, "nodes[0]: is a number, must be an object"),
        "object-nodes": ({**good, "nodes": {"p": {}}}, "nodes: is an object, must be an array"),
        "array-edge": ({**good, ekey: [["p", "q"]]}, f"{ekey}[0]: is an array, must be an object"),
        "list-id": ({**good, "nodes": [{"id": ["p"]}] + nodes[1:]},
                    "nodes[0].id: ['p'] must be a number or a string"),
        "no-id": ({**good, "nodes": [{}] + nodes[1:]}, "nodes[0].id: is missing"),
        "same-id": ({**good, "nodes": nodes + nodes[:1]}, "'p' is an id given to more than one node"),
        "list-end": ({**good, ekey: [{**good[ekey][0], "source": ["p"]}] + good[ekey][1:]},
                     "names an unknown node id"),
        "graph-str": ({**good, "graph": "lab"}, "graph: is a string, must be an object"),
        "demand-row": ({**good, "graph": {"demands": {"p": [1]}}},
                       "graph.demands[p]: is an array, must be an object of destination"),
    }
    for name, (doc, want) in bad.items():
        path = _w(tmp_path, f"{name}.json", json.dumps(doc))
        rc, lines = _run(capsys, path)
        assert rc == 1 and any(want in x for x in lines), (name, lines)


def test_schema_and_usage(capsys) -> None:  # type: ignore[no-untyped-def]
    rc, lines = _run(capsys, "--schema")
    assert rc == 0
    assert sum(1 for ln in lines if " = " in ln and not ln.startswith(" ")) == len(config.SCHEMA)
    assert cli.main(["validate"]) == 2
    assert "name at least one FILE" in capsys.readouterr().err


def test_as_a_subprocess(tmp_path) -> None:  # type: ignore[no-untyped-def]
    good = _w(tmp_path, "t.yaml", GOOD_TOPO)
    bad = _w(tmp_path, "c.yaml", {"engine": {"ceiling_s": -1}})
    env = dict(os.environ, PYTHONPATH=os.getcwd())
    ok = subprocess.run([sys.executable, "-m", "routerd", "validate", good],
                        capture_output=True, check=False, text=True, timeout=60, env=env)
    assert ok.returncode == 0 and ok.stdout.startswith(f"OK {good}: ")
    no = subprocess.run([sys.executable, "-m", "routerd", "validate", bad],
                        capture_output=True, check=False, text=True, timeout=60, env=env)
    assert no.returncode == 1
    assert f"  {bad}: engine.ceiling_s: -1 is at or below 0" not in no.stdout  # -1 is below, not at
    assert f"  {bad}: engine.ceiling_s: -1 is below 0 (must be above it)" in no.stdout


@pytest.mark.parametrize("path", ["routerd/data/demo-lab.yaml"])
def test_shipped_files_validate(path: str, capsys) -> None:  # type: ignore[no-untyped-def]
    rc, lines = _run(capsys, path)
    assert rc == 0 and lines[0].startswith(f"OK {path}: topology 'demo-lab': 16 nodes")


CONFIGS = os.path.join(os.path.dirname(os.path.dirname(os.path.abspath(__file__))), "configs")


def test_every_file_in_configs_validates(capsys) -> None:  # type: ignore[no-untyped-def]
    files = sorted(os.path.join(CONFIGS, n) for n in os.listdir(CONFIGS)
                   if os.path.isfile(os.path.join(CONFIGS, n)))
    assert {"lab.yaml", "agent.yaml", "underlay.yaml"} <= {os.path.basename(f) for f in files}
    rc, lines = _run(capsys, *files)
    assert rc == 0, lines
    assert [ln.split(":")[0] for ln in lines] == [f"OK {f}" for f in files]
    (agent_line,) = [ln for ln in lines if ln.startswith(f"OK {os.path.join(CONFIGS, 'agent.yaml')}")]
    assert "topology 'lab-small'" in agent_line and "underlay map underlay.yaml: 8 link(s)" in agent_line


def test_the_example_agent_config_starts_every_node(tmp_path) -> None:  # type: ignore[no-untyped-def]
    """What `routerd agent --node X --config configs/agent.yaml` reads before it binds
    anything: config, topology and underlay map, and the link ends of every node."""
    import argparse

    from routerd.agent import forwarder as A

    cfg, topo = A.load(argparse.Namespace(config=os.path.join(CONFIGS, "agent.yaml"), metrics=None))
    assert topo.name == "lab-small" and cfg["agent.underlay"] == os.path.join(CONFIGS, "underlay.yaml")
    ul = A.load_underlay(cfg["agent.underlay"], topo)
    for x in range(topo.n):
        ends = A.link_ends(x, topo, ul, cfg["agent.underlay"])
        assert len({e.local for e in ends}) == len(ends)      # one socket per link end


def test_underlay_maps_checked_alone_and_through_a_config(tmp_path, capsys) -> None:  # type: ignore[no-untyped-def]
    _w(tmp_path, "t.yaml", GOOD_TOPO)
    partial = _w(tmp_path, "u.yaml", {"underlay": {"links": [
        {"between": ["a", "b"], "addresses": ["10.0.0.1:7410", "10.0.0.2:7410"]}]}})
    rc, lines = _run(capsys, partial)
    assert rc == 0 and lines[0].startswith(f"OK {partial}: underlay map: 1 link(s), 2 host")
    cfg = _w(tmp_path, "c.yaml", {"topology": {"file": "t.yaml"}, "agent": {"underlay": "u.yaml"}})
    rc, lines = _run(capsys, cfg)
    assert rc == 1 and "gives no addresses for these links of topology 'bench-lab'" in lines[1]
    assert "['a', 'c'], ['b', 'c']" in lines[1]
    bad = _w(tmp_path, "bad.yaml", {"underlay": {"links": [
        {"between": ["a", "b"], "addresses": ["10.0.0.1", "10.0.0.2:7410"]}]}})
    rc, lines = _run(capsys, bad)
    assert rc == 1 and f"{bad}: underlay.links[0].addresses[0]: '10.0.0.1' is not HOST:PORT" in lines[1]


def test_validate_checks_what_the_commands_check(tmp_path, capsys) -> None:  # type: ignore[no-untyped-def]
    # issue 16: endpoints serve would refuse, a scenario that does not fit the topology
    # given with it, CURVE files one without the other
    cfg = _w(tmp_path, "c.yaml", {"service": {"ingest": "not-an-endpoint",
                                              "control": "tcp://127.0.0.1:99999"}})
    rc, lines = _run(capsys, cfg)
    assert rc == 1
    assert f"  {cfg}: service.ingest: 'not-an-endpoint' is not an endpoint (tcp://HOST:PORT, " \
           "ipc://PATH or inproc://NAME)" in lines
    assert f"  {cfg}: service.control: 'tcp://127.0.0.1:99999' has no valid port (0-65535, " \
           "or * for any free one)" in lines
    # one endpoint named twice: serve refuses it ("also given as the ingest endpoint"),
    # validate called the file OK
    cfg = _w(tmp_path, "twice.yaml", {"service": {"ingest": "tcp://127.0.0.1:7401",
                                                  "publish": "tcp://127.0.0.1:7401"}})
    rc, lines = _run(capsys, cfg)
    assert rc == 1
    assert f"  {cfg}: service.publish: 'tcp://127.0.0.1:7401' is also the ingest endpoint " \
           "(routerd serve binds each once)" in lines
    topo = _w(tmp_path, "lab.yaml", GOOD_TOPO)
    scen = _w(tmp_path, "s.yaml", {"scenario": {"links": [
        {"at_s": 1, "between": ["a", "zz"], "down": True},
        {"at_s": 2, "from": "a", "to": "b", "capacity_bps": "1.0e6"}]}})
    rc, lines = _run(capsys, scen)
    assert rc == 0                                   # alone: nothing to check it against
    rc, lines = _run(capsys, topo, scen)
    assert rc == 1
    assert lines[0].startswith(f"OK {topo}")
    assert (f"  {scen}: scenario.links[0]: 'a -> zz' is not a link of topology 'bench-lab' "
            f"(with {topo})") in lines
    # a config's topology counts as given with it
    cfg2 = _w(tmp_path, "c2.yaml", {"topology": {"file": "lab.yaml"}})
    rc, lines = _run(capsys, cfg2, scen)
    assert rc == 1 and any("is not a link of topology 'bench-lab'" in ln for ln in lines)
    # several topologies (validate *.yaml): the scenario must fit one of them
    big = dict(GOOD_TOPO["topology"], name="big", nodes=["a", "b", "c", "zz"])
    big["links"] = GOOD_TOPO["topology"]["links"] + [{"between": ["a", "zz"], "delay_s": 0.001}]
    topo2 = _w(tmp_path, "big.yaml", {"topology": big})
    rc, lines = _run(capsys, topo, topo2, scen)
    assert rc == 0, lines
    half = _w(tmp_path, "c3.yaml", {"security": {"allow": "allow.yaml"}})
    rc, lines = _run(capsys, half)
    assert rc == 1 and any("CURVE needs both --server-key and --allow" in ln for ln in lines)
    # the file and its key are named: it said "--allow was given" of a config file's key
    assert any(f"{half}: CURVE needs both" in ln and "security.allow (--allow) was given without "
               "security.server_key (--server-key)" in ln for ln in lines), lines
    under = _w(tmp_path, "c4.yaml", {"topology": {"file": "lab.yaml"},
                                     "agent": {"underlay": "u.yaml"}})
    _w(tmp_path, "u.yaml", {"underlay": {"links": [
        {"between": ["a", "b"], "addresses": ["10.0.0.1:7400", "10.0.0.2:99999"]}]}})
    rc, lines = _run(capsys, under)
    assert rc == 1 and any("addresses[1]: '10.0.0.2:99999' is not HOST:PORT" in ln for ln in lines)
    # --set and --capacity-bps follow the one rule: the command line beats the config
    rc, lines = _run(capsys, cfg2, "--set", "engine.step.alpha=7")
    assert rc == 1 and any("engine.step.alpha: 7 is above 1" in ln for ln in lines)


SHAPES = [None, 0, -1, 1.5, "x", "", [], [1], ["a", "b", "c"], {}, {"a": 1}, True, [[1, 2]],
          [{"a": 1}]]


def _key_paths(doc, pre=()):  # type: ignore[no-untyped-def]
    yield pre
    if isinstance(doc, dict):
        for k, v in doc.items():
            yield from _key_paths(v, pre + (k,))
    elif isinstance(doc, list):
        for i, v in enumerate(doc[:3]):
            yield from _key_paths(v, pre + (i,))


def test_any_value_of_the_wrong_kind_anywhere_in_a_shipped_file_is_a_problem_not_a_crash(
        tmp_path, capsys) -> None:  # type: ignore[no-untyped-def]
    """Every key path of every shipped YAML input (the demo lab and scenario, configs/) set in
    turn to a value of each JSON/YAML kind: ``validate`` answers 0 or 1 with its report, never
    an exception (it once crashed on a list as a topology default and a null underlay)."""
    import copy
    import shutil

    root = os.path.dirname(CONFIGS)
    work = tmp_path / "configs"
    shutil.copytree(CONFIGS, work)         # the configs refer to each other by relative path
    shutil.copy(os.path.join(root, "routerd", "data", "demo-scenario.yaml"), work)
    shutil.copy(os.path.join(root, "routerd", "data", "demo-lab.yaml"), work)
    names = ["demo-lab.yaml", "demo-scenario.yaml"] + sorted(os.listdir(CONFIGS))
    cases = 0
    for name in names:
        path = work / name
        base = yaml.safe_load(path.read_text())
        for kp in list(_key_paths(base)):
            for v in SHAPES:
                doc = copy.deepcopy(base)
                if kp:
                    cur = doc
                    for k in kp[:-1]:
                        cur = cur[k]
                    cur[kp[-1]] = v
                else:
                    doc = v
                path.write_text(yaml.safe_dump(doc))
                rc = cli.main(["validate", str(path)])
                capsys.readouterr()
                assert rc in (0, 1), (name, kp, v)
                cases += 1
        path.write_text(yaml.safe_dump(base))
    assert cases > 1500


def test_a_config_says_when_its_topology_is_above_split_max_nodes(tmp_path, capsys) -> None:  # type: ignore[no-untyped-def]
    # what routerd serve would run: greedy on the 3-node lab when split is bounded at 2 nodes
    _w(tmp_path, "lab.yaml", GOOD_TOPO)
    small = _w(tmp_path, "small.yaml", {"topology": {"file": "lab.yaml"},
                                        "engine": {"split": {"max_nodes": 2}}})
    rc, lines = _run(capsys, small)
    assert rc == 0 and lines[0].endswith(
        "on topology 'bench-lab': engine.mode split runs on networks of up to "
        "engine.split.max_nodes (2) nodes; this one has 3: running greedy (split decides every "
        "destination at every decision, in time growing as the square of the node count; set "
        "engine.split.max_nodes: 0 to run it anyway, and engine.split.destinations_per_decision "
        "to bound each decision)"), lines
    fits = _w(tmp_path, "fits.yaml", {"topology": {"file": "lab.yaml"}})
    rc, lines = _run(capsys, fits)
    assert rc == 0 and "running greedy" not in lines[0]
