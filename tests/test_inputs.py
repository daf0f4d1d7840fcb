"""The one input rule (routerd/io/inputs.py, issue 19): a config's paths resolve against
the config file's folder and its link defaults apply, the same way in every command.

The bug this pins: ``sub/cfg.yaml`` with ``topology: {file: topo.yaml}`` passed
``validate`` and worked in ``serve`` but ``simulate --config sub/cfg.yaml`` exited 2
("'topo.yaml' does not exist"); ``lab`` and ``demo`` ignored the config's link defaults.
"""
from __future__ import annotations

import argparse
import os
from pathlib import Path
from typing import Any

import pytest
import yaml

from routerd.io import inputs
from routerd.tools import cli

ROOT = Path(__file__).resolve().parent.parent
DEMO_LAB = ROOT / "routerd" / "data" / "demo-lab.yaml"


def _bare_demo_lab(path: Path) -> None:
    """The demo lab without its file defaults: every link needs the config's."""
    doc = yaml.safe_load(DEMO_LAB.read_text())
    del doc["topology"]["defaults"]
    path.write_text(yaml.safe_dump(doc))


@pytest.fixture
def sub_config(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    """``tmp/run`` as the working directory, ``tmp/sub/cfg.yaml`` naming ``topo.yaml``
    (beside it, not in the working directory) and the link defaults."""
    sub = tmp_path / "sub"
    sub.mkdir()
    _bare_demo_lab(sub / "topo.yaml")
    (sub / "cfg.yaml").write_text(yaml.safe_dump({
        "topology": {"file": "topo.yaml", "default_capacity_bps": "3.0e6",
                     "default_buffer_pkts": 17},
        "service": {"state_dir": "state"},
        "engine": {"explore": {"max_rate": 0.05}}}))
    run = tmp_path / "run"
    run.mkdir()
    monkeypatch.chdir(run)
    return Path("..") / "sub" / "cfg.yaml"


def _parse(*argv: str) -> argparse.Namespace:
    return cli.build_parser().parse_args(list(argv))


def _check_demo_shape(topo: Any, want_capacity: float = 3e6, want_buffer: int = 17) -> None:
    assert topo.n == 16 and topo.name == "demo-lab"
    # every link but the trunk (2 Mbit/s in the file) takes the config's default
    assert set(topo.capacity_bps.tolist()) == {want_capacity, 2e6}
    assert set(topo.buffer_pkts.tolist()) == {want_buffer}


def test_the_rule_itself(sub_config: Path) -> None:
    cfg = inputs.load_config(argparse.Namespace(config=str(sub_config)))
    sub = os.path.abspath(os.path.join("..", "sub"))
    assert cfg["topology.file"] == os.path.join(sub, "topo.yaml")
    assert cfg["service.state_dir"] == os.path.join(sub, "state")       # written in the file
    assert cfg["topology.default_capacity_bps"] == 3e6                  # "3.0e6" is a number
    # a flag or --set is relative to the working directory; a default stays as it is
    cfg2 = inputs.load_config(argparse.Namespace(config=str(sub_config), state_dir="here",
                                                 overrides=["agent.underlay=u.yaml"]))
    assert cfg2["service.state_dir"] == os.path.abspath("here")
    assert cfg2["agent.underlay"] == os.path.abspath("u.yaml")
    assert inputs.load_config(argparse.Namespace())["service.state_dir"] == "./routerd-state"
    # topohub references are not paths; --capacity-bps beats the config's default
    cfg3 = inputs.load_config(argparse.Namespace(config=str(sub_config), capacity_bps=5e6,
                                                 topology="topohub:sndlib/abilene"))
    assert cfg3["topology.file"] == "topohub:sndlib/abilene"
    assert inputs.link_defaults(cfg3).capacity_bps == 5e6
    _check_demo_shape(inputs.load_topology(cfg))


def test_simulate_with_a_config_in_a_subfolder(sub_config: Path, tmp_path: Path,
                                              capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "out"
    rc = cli.main(["simulate", "--config", str(sub_config), "--policy", "shortest", "--rate",
                   "50", "--duration", "0.5", "--seed", "1", "--out", str(out), "--quiet"])
    assert rc == 0, capsys.readouterr().err
    links = (out / "links.csv").read_text().splitlines()[1:]
    assert {ln.split(",")[2] for ln in links} == {"3e+06", "2e+06"}    # the config's default


def test_serve_and_validate_with_a_config_in_a_subfolder(
        sub_config: Path, capsys: pytest.CaptureFixture[str]) -> None:
    from routerd.service.daemon import choose_inputs

    chosen = choose_inputs(_parse("serve", "--config", str(sub_config)))
    _check_demo_shape(chosen.topo)
    assert cli.main(["validate", str(sub_config)]) == 0
    out = capsys.readouterr().out
    assert "topology 'demo-lab': 16 nodes" in out


def test_lab_with_a_config_in_a_subfolder_and_its_link_defaults(sub_config: Path,
                                                                tmp_path: Path) -> None:
    from routerd.tools import lab

    args = _parse("lab", "--config", str(sub_config), "--duration", "1", "--rate", "10",
                  "--out", str(tmp_path / "o"), "--set", "engine.explore.max_rate=0.02")
    cfg, topo_path, topo = lab.lab_inputs(args)
    _check_demo_shape(topo)
    doc = lab.lab_config(args.config, topo_path, str(tmp_path / "rd"), args.overrides)
    # what the lab's service and agents read: the same network, the same defaults
    assert doc["topology"]["file"] == os.path.abspath(os.path.join("..", "sub", "topo.yaml"))
    assert doc["topology"]["default_capacity_bps"] == 3e6
    assert doc["topology"]["default_buffer_pkts"] == 17
    assert doc["engine"]["explore"]["max_rate"] == 0.02                  # --set on top
    with pytest.raises(lab.InputError, match="--topology: is needed"):
        lab.lab_inputs(_parse("lab", "--duration", "1", "--rate", "1", "--out", "o"))


def test_demo_with_a_config_in_a_subfolder_and_its_link_defaults(sub_config: Path,
                                                                 tmp_path: Path) -> None:
    from routerd.tools import demo

    d = demo.Demo(str(tmp_path / "d"), 30.0, 1, 1.0, config=str(sub_config),
                  overrides=("engine.mode=greedy", "engine.variant=dual"))
    d.load_inputs()
    _check_demo_shape(d.topo)
    assert d.cfg["engine.variant"] == "dual" and d.cfg["sim.service.speed"] == 1.0
    spec = d.spec("qrouting")
    assert spec["topology"] is d.topo and spec["config"] == str(sub_config)
    # another network: refused before anything starts, naming what the demo needs
    other = tmp_path / "sub" / "other.yaml"
    other.write_text(yaml.safe_dump({"topology": {"nodes": ["a", "b"], "links": [
        {"between": ["a", "b"], "delay_s": 0.001, "capacity_bps": 1e6, "buffer_pkts": 5}]}}))
    d2 = demo.Demo(str(tmp_path / "d2"), 30.0, 1, 1.0, config=str(sub_config),
                   overrides=(f"topology.file={other}",))
    with pytest.raises(demo.InputError, match="is not a link of topology"):
        d2.load_inputs()


def test_every_command_resolves_a_config_identically(sub_config: Path, tmp_path: Path) -> None:
    """serve, shard front, replay, agent, simulate, sweep, lab, demo and validate: the same
    topology (by content id) and the same paths from the same config."""
    from routerd.agent import forwarder
    from routerd.service.daemon import choose_inputs
    from routerd.sim import commands_sweep
    from routerd.sim.commands_simulate import spec_from_args
    from routerd.sim.run import SimSpec, load_inputs
    from routerd.tools import demo, lab, validate

    c = str(sub_config)
    got: dict[str, tuple[str, str]] = {}
    ch = choose_inputs(_parse("serve", "--config", c))
    got["serve"] = (ch.topo.digest, ch.cfg["topology.file"])
    cfg = inputs.load_config(_parse("serve", "--config", c, "--shards", "2"))
    got["serve --shards"] = (inputs.load_topology(cfg).digest, cfg["topology.file"])
    cfg, topo = forwarder.load(_parse("agent", "--node", "w1", "--config", c))
    got["agent"] = (topo.digest, cfg["topology.file"])
    sim = _parse("simulate", "--config", c, "--policy", "shortest", "--rate", "1",
                 "--duration", "1", "--seed", "1", "--out", "o")
    cfg, topo, _ = load_inputs(spec_from_args(sim))
    got["simulate"] = (topo.digest, cfg["topology.file"])
    sw = _parse("sweep", "--config", c, "--rates", "1", "--policies", "shortest", "--out", "o")
    cfg, topo, _ = load_inputs(SimSpec.of(commands_sweep.build_specs(sw)[0]))
    got["sweep"] = (topo.digest, cfg["topology.file"])
    cfg, _, topo = lab.lab_inputs(_parse("lab", "--config", c, "--duration", "1", "--rate", "1",
                                         "--out", "o"))
    got["lab"] = (topo.digest, cfg["topology.file"])
    d = demo.Demo(str(tmp_path / "d"), 30.0, 1, 1.0, config=c)
    d.load_inputs()
    got["demo"] = (d.topo.digest, d.cfg["topology.file"])
    from routerd.tools.replay import Source, _load_config_and_topology

    os.makedirs(os.path.join(str(tmp_path), "j"), exist_ok=True)
    r = _parse("replay", str(tmp_path / "j"), "--config", c, "--out", "o")
    rcfg, rtopo, _ = _load_config_and_topology(r, Source(str(tmp_path / "j"), None))
    got["replay"] = (rtopo.digest, rcfg["topology.file"])
    vt = validate.check_file(c).topo
    got["validate"] = (vt.digest, got["serve"][1])
    assert len(set(got.values())) == 1, got
    assert got["serve"][1] == os.path.abspath(os.path.join("..", "sub", "topo.yaml"))


def test_set_on_every_command_that_takes_a_config(sub_config: Path, tmp_path: Path) -> None:
    """issue 16: serve, agent and lab refused --set."""
    from routerd.agent import forwarder
    from routerd.tools import lab

    c = str(sub_config)
    s = ["--set", "engine.hysteresis.margin=0.2", "--set", "agent.probe_interval_s=5e-2"]
    cfg = inputs.load_config(_parse("serve", "--config", c, *s))
    assert cfg["engine.hysteresis.margin"] == 0.2 and cfg["agent.probe_interval_s"] == 0.05
    cfg, _ = forwarder.load(_parse("agent", "--node", "w1", "--config", c, *s))
    assert cfg["engine.hysteresis.margin"] == 0.2 and cfg["agent.probe_interval_s"] == 0.05
    args = _parse("lab", "--config", c, "--duration", "1", "--rate", "1", "--out", "o", *s)
    doc = lab.lab_config(args.config, "x.yaml", str(tmp_path), args.overrides)
    assert doc["engine"]["hysteresis"]["margin"] == 0.2
    for cmd in ("simulate", "sweep", "replay", "demo", "validate"):
        assert "--set" in cli.build_parser()._subparsers._group_actions[0].choices[cmd].format_help()
