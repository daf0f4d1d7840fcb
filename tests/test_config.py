"""The config module (routerd/io/config.py): schema, loading, overrides and its messages.

Every error names the file, the key path, the value and the rule (house style, GUIDE §5:
``configs/lab.yaml: explore.max_rate: 1.4 is above 1.0``).
"""
from __future__ import annotations

import dataclasses
from typing import Any

import pytest
import yaml

from routerd.core.engine import EngineSettings
from routerd.core.errors import ConfigError
from routerd.io import config


def _write(tmp_path, doc, name: str = "lab.yaml") -> str:  # type: ignore[no-untyped-def]
    p = tmp_path / name
    p.write_text(doc if isinstance(doc, str) else yaml.safe_dump(doc))
    return str(p)


def _errors(tmp_path, doc) -> list[str]:  # type: ignore[no-untyped-def]
    path = _write(tmp_path, doc)
    with pytest.raises(ConfigError) as ei:
        config.load(path)
    msgs = [str(p) for p in ei.value.problems]
    assert all(m.startswith(path + ": ") for m in msgs), msgs
    return msgs


def test_defaults_and_typed_access() -> None:
    cfg = config.load()
    for k, f in config.SCHEMA.items():
        assert cfg[k] == f.default
    assert cfg.section("engine.step") == {"mode": "decaying", "alpha": 0.5, "c": 1.0,
                                          "kappa": 0.6, "floor": 0.05}
    assert cfg.nested()["engine"]["explore"]["cap"] == 0.2
    assert config.from_mapping(cfg.nested(), "again") == cfg


def test_engine_settings_defaults_agree_with_the_schema() -> None:
    # one source of truth: the dataclass defaults must be the schema's defaults
    from_cfg = EngineSettings.from_config(config.load())
    assert from_cfg == EngineSettings()
    assert {f.name for f in dataclasses.fields(EngineSettings)} == set(dataclasses.asdict(from_cfg))


def test_load_a_file_with_units_in_names_and_coercion(tmp_path) -> None:  # type: ignore[no-untyped-def]
    path = _write(tmp_path, {"engine": {"step": {"mode": "constant", "alpha": 1},
                                        "ceiling_s": 3},
                             "sim": {"ttl": 32.0}, "topology": {"file": "x.yaml"}})
    cfg = config.load(path)
    assert cfg["engine.step.alpha"] == 1.0 and isinstance(cfg["engine.step.alpha"], float)
    assert cfg["sim.ttl"] == 32 and isinstance(cfg["sim.ttl"], int)
    assert cfg["engine.ceiling_s"] == 3.0
    assert cfg.source == path
    # an empty (or comments-only) file is refused: it would run on the defaults unnoticed
    with pytest.raises(ConfigError, match="is empty"):
        config.load(_write(tmp_path, "# nothing yet\n", "empty.yaml"))


@pytest.mark.parametrize("doc,expect", [
    ({"engine": {"explore": {"max_rate": 1.4}}}, "engine.explore.max_rate: 1.4 is above 1"),
    ({"engine": {"step": {"alpha": 0}}}, "engine.step.alpha: 0 is at or below 0 (must be above it)"),
    ({"engine": {"step": {"kappa": 0.5}}}, "engine.step.kappa: 0.5 is at or below 0.5"),
    ({"engine": {"step": {"alpha": "fast"}}}, "engine.step.alpha: 'fast' must be a number"),
    ({"engine": {"step": {"mode": "quick"}}}, "engine.step.mode: 'quick' is not one of constant, decaying"),
    ({"sim": {"ttl": True}}, "sim.ttl: True must be a whole number, not true/false"),
    ({"sim": {"ttl": 2.5}}, "sim.ttl: 2.5 must be a whole number"),
    ({"sim": {"ttl": 300}}, "sim.ttl: 300 is above 255"),
    ({"engine": {"ceiling_s": float("nan")}}, "engine.ceiling_s: nan must be a finite number"),
    ({"engine": {"ceiling_s": None}}, "engine.ceiling_s: must be set"),
    ({"engine": {"stepp": {"alpha": 0.2}}}, "engine.stepp.alpha: 0.2 is not a known setting (did you mean engine.step.alpha?)"),
    ({"alpha": 0.2}, "alpha: 0.2 is not a known setting (did you mean engine.step.alpha?)"),
    ({"engine": {"explore": {"min_rate": 0.15, "max_rate": 0.1}}},
     "engine.explore.min_rate: 0.15 is above engine.explore.max_rate (0.1)"),
    ({"engine": {"explore": {"max_rate": 0.3}}},
     "engine.explore.max_rate: 0.3 is above the global cap engine.explore.cap (0.2)"),
    ({"engine": {"initial": {"mode": "constant", "value_s": 20.0}}},
     "engine.initial.value_s: 20.0 is above engine.ceiling_s (10.0)"),
    ({"engine": {"hysteresis": {"margin": 1.0}}}, "engine.hysteresis.margin: 1.0 is at or above 1 (must be below it)"),
    # a section given a value is named as one (it said "not a known setting (did you mean
    # engine.split.step?)")
    ({"engine": {"step": 5}}, "engine.step: 5 must be a mapping: engine.step is a section (engine.step.mode, "),
    # counts and sizes go to C (ZeroMQ options, deques): routerd serve ended in an
    # OverflowError traceback on these
    ({"service": {"max_message_bytes": 1e30}}, "service.max_message_bytes: 1e+30 is above 4611686018427387904"),
    ({"service": {"hwm_msgs": 3e9}}, "service.hwm_msgs: 3000000000.0 is above 2147483647"),
    ({"agent": {"report_buffer_rows": 10**30}}, "agent.report_buffer_rows: 1000000000000000000000000000000 is above 4611686018427387904"),
    # a pair the engine refuses (routerd.core.splitting.problems) is refused at load time,
    # not by a traceback when serve or simulate builds the engine
    ({"engine": {"mode": "split", "variant": "dual"}},
     "engine.variant: 'dual' is a greedy-mode rule: engine.mode split takes the plain rule only "
     "(set engine.mode: greedy to run this variant)"),
])
def test_bad_values_name_file_key_value_and_rule(tmp_path, doc, expect) -> None:  # type: ignore[no-untyped-def]
    msgs = _errors(tmp_path, doc)
    assert any(m.endswith(expect) or expect in m for m in msgs), msgs


def test_every_problem_is_reported(tmp_path) -> None:  # type: ignore[no-untyped-def]
    msgs = _errors(tmp_path, {"engine": {"step": {"alpha": 2, "c": -1}, "margin": 1}, "sim": {"ttl": 0}})
    assert len(msgs) == 4, msgs


def test_file_level_errors(tmp_path) -> None:  # type: ignore[no-untyped-def]
    with pytest.raises(ConfigError, match="does not exist"):
        config.load(str(tmp_path / "missing.yaml"))
    assert any("is not valid YAML" in m for m in _errors(tmp_path, "engine: [1, 2\n"))
    assert any("'list' must be a mapping of sections" in m for m in _errors(tmp_path, "- 1\n- 2\n"))


def test_overrides(tmp_path) -> None:  # type: ignore[no-untyped-def]
    path = _write(tmp_path, {"engine": {"step": {"alpha": 0.3}}})
    cfg = config.load(path, ["engine.step.alpha=0.7", "engine.step.mode=constant", "topology.file=null"])
    assert cfg["engine.step.alpha"] == 0.7 and cfg["engine.step.mode"] == "constant"
    assert cfg["topology.file"] is None
    with pytest.raises(ConfigError) as ei:
        config.load(path, ["engine.step.alpha"])
    assert str(ei.value.problems[0]) == "--set: 'engine.step.alpha' must look like KEY=VALUE"
    with pytest.raises(ConfigError) as ei:
        config.load(path, ["engine.step.alpha=7"])
    assert str(ei.value.problems[0]) == f"{path} + --set: engine.step.alpha: 7 is above 1"
    assert config.parse_scalar("0.25") == 0.25 and config.parse_scalar("null") is None and config.parse_scalar("yes please") == "yes please"
    # YAML 1.1 reads 1e3 as a string; number fields still take it
    assert config.load(None, ["engine.ceiling_s=1e3"])["engine.ceiling_s"] == 1000.0


def test_reload_diff_separates_tunable_keys() -> None:
    a = config.load()
    b = a.with_overrides({"engine.step.alpha": 0.9, "engine.initial.mode": "constant"})
    tun, restart = a.tunable_diff(b)
    assert tun == {"engine.step.alpha": 0.9}
    assert restart == ["engine.initial.mode"]
    assert a != b and a == config.load()


def test_describe_lists_every_key_with_range() -> None:
    text = config.describe()
    for k in config.SCHEMA:
        assert f"\n{k} = " in "\n" + text
    assert "engine.step.kappa = 0.6 (0.5, 1] (reloadable)" in text
    assert "engine.step.mode = 'decaying' {constant|decaying}" in text


def _ring(n: int):  # a plain ring of our own, n nodes
    from routerd.core import topology as T

    names = [f"r{i}" for i in range(n)]
    specs = [T.LinkSpec(names[a], names[b], 0.001, 1e7, 64, f"ring[{a}-{b}]")
             for i in range(n) for a, b in ((i, (i + 1) % n), ((i + 1) % n, i))]
    return T.build(f"ring-{n}", names, specs)


def test_split_runs_up_to_max_nodes_and_greedy_above_in_every_shell() -> None:
    # the default is split; above engine.split.max_nodes (200) the shells run greedy and say why
    base = config.load(None)
    assert base["engine.mode"] == "split" and base["engine.split.max_nodes"] == 200
    same, why = config.split_fits(base, 200)
    assert same is base and why is None
    big, why = config.split_fits(base, 201)
    assert big["engine.mode"] == "greedy" and big["engine.split.max_nodes"] == 200
    assert why is not None and "(200)" in why and "201" in why and "max_nodes: 0" in why
    assert config.split_fits(base.with_overrides({"engine.split.max_nodes": 0}), 5000)[1] is None
    greedy = base.with_overrides({"engine.mode": "greedy"})
    assert config.split_fits(greedy, 5000) == (greedy, None)
    # the service and the simulator's learner alike
    import tempfile

    import numpy as np

    from routerd.service.daemon import Service
    from sim.policies import QRouting

    t = _ring(201)
    with tempfile.TemporaryDirectory() as d:
        svc = Service(base.with_overrides({"service.state_dir": d}), t)
        assert svc.cfg["engine.mode"] == "greedy" and svc.mode_note == why
        assert svc._mode_line().startswith("greedy: engine.mode split runs on networks of up to")
    p = QRouting()
    p.attach(t, np.random.default_rng(1), base)
    assert p.engine.settings.mode == "greedy"
    p = QRouting()
    p.attach(_ring(20), np.random.default_rng(1), base)
    assert p.engine.settings.mode == "split"


def test_a_reload_on_a_network_above_max_nodes_changes_nothing_and_records_the_config_as_given(
        tmp_path: Any) -> None:
    # the running config says greedy (split_fits), the file split: not a change needing a
    # restart; and the state dir records the file's config, so a later start with
    # engine.split.max_nodes raised runs split as asked
    import argparse

    from routerd.service.daemon import Service

    conf = tmp_path / "c.yaml"
    conf.write_text(f"service:\n  state_dir: {tmp_path / 'st'}\n")
    args = argparse.Namespace(config=str(conf), set=[], topology=None, state_dir=None)
    svc = Service(config.load(str(conf)), _ring(201), reload_args=args)
    try:
        svc.restore(str(tmp_path / "st"))
        assert svc.engine is not None and svc.engine.settings.mode == "greedy"
        r = svc._do_reload()
        assert r["applied"] and r["needs_restart"] == [] and r["changed"] == [], r
        assert svc.cfg["engine.mode"] == "greedy" and svc.cfg_given["engine.mode"] == "split"
        docs = [d for d in (tmp_path / "st").rglob("config*") if d.is_file()]
        assert docs and all("mode: split" in d.read_text() and "greedy" not in d.read_text()
                            for d in docs), [d.read_text()[:300] for d in docs]
    finally:
        svc.close()
