"""The run API: plain specs in, plain results out; input errors before anything runs."""
from __future__ import annotations

import math
import pickle
from concurrent.futures import ProcessPoolExecutor

import pytest

from routerd.core.errors import InputError
from routerd.sim.run import SimSpec, run
from sim_helpers import assert_little

REQUIRED = ("policy", "offered", "delivered", "dropped", "ttl_expired", "mean_delivery_s",
            "p50_delivery_s", "p95_delivery_s", "p99_delivery_s", "mean_hops", "events", "wall_s")


def test_summary_keys_counts_and_series() -> None:
    r = run({"policy": "shortest", "rate_pps": 400.0, "duration_s": 5.0, "seed": 1})
    s = r["summary"]
    for k in REQUIRED:
        assert k in s
    assert s["offered"] == s["delivered"] + s["dropped"] + s["ttl_expired"] + s["in_flight_at_end"]
    assert s["p50_delivery_s"] <= s["p95_delivery_s"] <= s["p99_delivery_s"] <= s["max_delivery_s"]
    assert s["warmup_s"] == 0.5  # a tenth of the duration by default
    assert len(r["series"]["t_s"]) == 5 and len(r["series"]["link_util"][0]) == s["links"]
    assert len(r["links"]) == s["links"]
    assert_little(s)
    pickle.dumps(r)  # plain values only: a process pool can return it


def test_spec_dataclass_and_dict_agree_and_pool_runs() -> None:
    spec = SimSpec(policy="ecmp", rate_pps=300.0, duration_s=3.0, seed=4)
    a = run(spec)["summary"]
    with ProcessPoolExecutor(max_workers=2) as ex:
        b, c = list(ex.map(run, [spec.to_dict(), {**spec.to_dict(), "seed": 5}]))
    a.pop("wall_s"); b["summary"].pop("wall_s"); c["summary"].pop("wall_s")
    assert a == b["summary"] != c["summary"]


def test_demands_from_a_topohub_topology() -> None:
    s = run({"policy": "shortest", "rate_pps": 500.0, "duration_s": 3.0, "seed": 1,
             "topology": "topohub:sndlib/abilene", "demands": True, "capacity_bps": 1e8,
             "buffer_pkts": 100})["summary"]
    assert s["nodes"] == 12 and s["delivered"] > 1000
    assert_little(s)


def test_input_errors_are_reported_together() -> None:
    with pytest.raises(InputError) as ei:
        run({"policy": "nope", "rate_pps": -1.0, "duration_s": 0.0, "seed": 1, "size_dist": "uniform"})
    text = str(ei.value)
    for frag in ("--policy: 'nope' is not a policy", "--rate: -1.0 must be",
                 "--duration: 0.0 must be", "--size-dist: 'uniform' is not fixed or exp"):
        assert frag in text
    with pytest.raises(InputError, match="carries no demand matrix"):
        run({"policy": "shortest", "rate_pps": 1.0, "duration_s": 1.0, "seed": 1, "demands": True})
    with pytest.raises(InputError, match="are not simulation spec keys"):
        run({"policy": "shortest", "rate": 1.0})
    with pytest.raises(InputError, match="sim.ttl"):
        run({"policy": "shortest", "overrides": ["sim.ttl=0"]})
    with pytest.raises(InputError, match="needs 'between"):
        run({"policy": "shortest", "scenario": {"scenario": {"links": [{"at_s": 1, "down": True}]}}})


def test_no_deliveries_gives_nan_statistics() -> None:
    s = run({"policy": "shortest", "rate_pps": 0.0, "duration_s": 2.0, "seed": 1})["summary"]
    assert s["offered"] == 0 and math.isnan(s["mean_delivery_s"]) and math.isnan(s["p99_delivery_s"])


def test_link_down_under_qrouting_routes_around() -> None:
    sc = {"scenario": {"links": [{"at_s": 3, "between": ["w3", "e3"], "down": True}]}}
    rq = run({"policy": "qrouting", "rate_pps": 600.0, "duration_s": 10.0, "seed": 2, "scenario": sc})
    assert rq["link_events"] == [{"t_s": 3.0, "action": "down", "links": ["w3->e3", "e3->w3"]}]
    q = rq["summary"]
    s = run({"policy": "shortest", "rate_pps": 600.0, "duration_s": 10.0, "seed": 2, "scenario": sc})["summary"]
    # shortest keeps sending into the dead trunk; qrouting loses only what was queued on it
    assert s["dropped_link_down"] > 1000
    assert q["dropped_link_down"] < s["dropped_link_down"] / 20
    assert q["delivery_ratio"] > 0.99
    assert_little(q)


@pytest.mark.parametrize("overrides", [["sim.estimate=min"], ["sim.feedback=instant"],
                                       ["sim.decision_interval_s=0.2", "sim.ttl=8"]])
def test_qrouting_settings_run(overrides: list[str]) -> None:
    s = run({"policy": "qrouting", "rate_pps": 400.0, "duration_s": 4.0, "seed": 1,
             "overrides": overrides, "series": False})["summary"]
    assert s["delivery_ratio"] > 0.99 and s["policy_engine_updates"] > 1000
    assert_little(s)
