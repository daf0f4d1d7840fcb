"""Scenario files: the load factor over time, link events bound to a topology, and
error messages that name file, key path, value and rule."""
from __future__ import annotations

import numpy as np
import pytest

from routerd.core.errors import InputError
from routerd.io import scenario, topofiles
from routerd.sim.run import DEMO_TOPOLOGY
from routerd.tools.validate import check_file


def sc(**body: object) -> scenario.Scenario:
    return scenario.from_mapping({"scenario": body}, source="s.yaml")


def test_steps_ramps_and_bursts() -> None:
    s = sc(load=[{"step": 2.0, "at_s": 10}, {"ramp": [2.0, 0.5], "from_s": 20, "to_s": 30},
                 {"burst": 3.0, "from_s": 40, "to_s": 60, "on_s": 1, "off_s": 4}])
    f = s.factor(np.array([0.0, 9.99, 10.0, 19.0, 20.0, 25.0, 30.0, 35.0, 40.5, 41.5, 45.2, 60.5]))
    assert f.tolist() == pytest.approx([1, 1, 2, 2, 2, 1.25, 0.5, 0.5, 1.5, 0.5, 1.5, 0.5])
    assert s.max_factor() >= f.max()
    # a burst of 1 s on every 5 s at x3 over a base of 0.5: mean over the window 0.5 * 1.4
    assert s.mean_factor(60.0, 40.0) == pytest.approx(0.7, rel=1e-3)
    assert "1 step, 1 ramp, 1 burst" in s.summary()


def test_link_events_bind_to_the_topology() -> None:
    topo = topofiles.load(DEMO_TOPOLOGY)
    s = sc(links=[{"at_s": 5, "between": ["w3", "e3"], "down": True},
                  {"at_s": 6, "from": "w3", "to": "e3", "up": True},
                  {"at_s": 7, "between": ["w3", "e3"], "capacity_bps": 1e6}])
    ev = s.link_events(topo)
    k, back = topo.link("w3", "e3"), topo.link("e3", "w3")
    assert [(e.t, e.links, e.action) for e in ev] == [
        (5.0, (k, back), "down"), (6.0, (k,), "up"), (7.0, (k, back), "capacity")]
    bad = sc(links=[{"at_s": 5, "between": ["w3", "nowhere"], "down": True}])
    with pytest.raises(InputError, match=r"s.yaml: scenario.links\[0\]: 'w3 -> nowhere' is not a link"):
        bad.link_events(topo)


def test_every_problem_is_listed_with_its_key_path() -> None:
    doc = {"scenario": {
        "nmae": "typo",
        "load": [{"step": -1, "at_s": 3}, {"ramp": [1, 2], "from_s": 5, "to_s": 4},
                 {"burst": 2, "from_s": 0, "to_s": 9, "on_s": 0, "off_s": 1},
                 {"step": 1}, {"pulse": 3}],
        "links": [{"at_s": 1, "between": ["a"], "down": True},
                  {"at_s": "soon", "from": "a", "to": "b", "up": True},
                  {"at_s": 2, "from": "a", "to": "b", "down": True, "up": True},
                  {"at_s": 2, "from": "a", "to": "b", "down": "yes"}]}}
    with pytest.raises(InputError) as ei:
        scenario.from_mapping(doc, source="bad.yaml")
    msgs = [str(p) for p in ei.value.problems]
    expected = [
        "bad.yaml: scenario.nmae: 'nmae' is not a known key",
        "bad.yaml: scenario.load[0].step: -1 must be >= 0",
        "bad.yaml: scenario.load[1].to_s: 4 must be after from_s (5)",
        "bad.yaml: scenario.load[2].on_s: 0 must be > 0",
        "bad.yaml: scenario.load[3].at_s: is missing",
        "bad.yaml: scenario.load[4]: {'pulse': 3} must have exactly one of step, ramp, burst",
        "bad.yaml: scenario.links[0].between: ['a'] must be a list of two node names",
        "bad.yaml: scenario.links[1].at_s: 'soon' must be a number",
        "bad.yaml: scenario.links[2]:",
        "bad.yaml: scenario.links[3].down: 'yes' must be true",
    ]
    for e in expected:
        assert any(m.startswith(e) for m in msgs), (e, msgs)
    assert len(msgs) == len(expected)


def test_not_a_scenario() -> None:
    with pytest.raises(InputError, match="must be a mapping with a 'scenario' mapping"):
        scenario.from_mapping([1, 2], source="x.yaml")


def test_routerd_validate_checks_scenario_files(tmp_path) -> None:
    good = tmp_path / "cut.yaml"
    good.write_text("scenario:\n  name: trunk-cut\n  links:\n"
                    "    - {at_s: 5, between: [w3, e3], down: true}\n")
    assert "scenario 'trunk-cut'" in check_file(str(good)).summary
    bad = tmp_path / "bad.yaml"
    bad.write_text("scenario:\n  load:\n    - {step: x, at_s: 1}\n")
    with pytest.raises(InputError, match=r"bad.yaml: scenario.load\[0\].step: 'x' must be a number"):
        check_file(str(bad))
