"""The simulator's compiled event loop (routerd.sim._hops) against the reference loop in
routerd.sim.core: the same seed must give the same results to the bit, and the engine must
see the same observations in the same order at the same virtual times.  Plus the
``engine.kernels`` choice and the fallback where the extension is not built.
"""
from __future__ import annotations

import dataclasses
import json
from typing import Any

import numpy as np
import pytest

from routerd.core import topology
from routerd.sim import core
from routerd.sim.core import LinkEvent, hops_status, run_core
from routerd.sim.policies import QRouting
from routerd.sim.policy import Policy
from routerd.sim.run import run
from routerd.sim.traffic import PoissonTraffic
from sim_helpers import assert_little, assert_little_raw

needs_hops = pytest.mark.skipif(hops_status("auto")["path"] != "compiled",
                                reason=hops_status("auto")["reason"])

# Our own small network: two routes between the halves, one of them a slow trunk with a
# short buffer, so runs see queueing, buffer drops and (with the scenario) a cut link.
LAB = {"topology": {"name": "hops-lab", "nodes": ["a", "b", "c", "d", "e", "f"], "links": [
    {"between": ["a", "b"], "delay_s": 0.001, "capacity_bps": 20e6, "buffer_pkts": 40},
    {"between": ["b", "c"], "delay_s": 0.002, "capacity_bps": 4e6, "buffer_pkts": 8},
    {"between": ["a", "d"], "delay_s": 0.003, "capacity_bps": 10e6, "buffer_pkts": 20},
    {"between": ["d", "e"], "delay_s": 0.001, "capacity_bps": 10e6, "buffer_pkts": 20},
    {"between": ["e", "c"], "delay_s": 0.002, "capacity_bps": 10e6, "buffer_pkts": 20},
    {"between": ["c", "f"], "delay_s": 0.001, "capacity_bps": 20e6, "buffer_pkts": 40},
    {"between": ["b", "e"], "delay_s": 0.004, "capacity_bps": 6e6, "buffer_pkts": 10},
]}}
SCENARIO = {"scenario": {
    "load": [{"step": 1.6, "at_s": 1.0}],
    "links": [{"at_s": 1.2, "between": ["b", "c"], "down": True},
              {"at_s": 2.0, "between": ["b", "c"], "up": True},
              {"at_s": 2.5, "between": ["a", "d"], "capacity_bps": 3e6}]}}


def _both(spec: dict[str, Any], policy_of: Any = None) -> tuple[dict, dict]:
    out = []
    for path in ("reference", "compiled"):
        s = dict(spec, overrides=[*spec.get("overrides", ()), f"engine.kernels={path}"])
        r = run(s, policy=policy_of() if policy_of else None)
        r["summary"].pop("wall_s")  # the one impure figure
        out.append(r)
    return out[0], out[1]


def _same(a: Any, b: Any) -> bool:
    # JSON text: exact floats (shortest repr), NaN written alike on both sides
    return json.dumps(a, sort_keys=True) == json.dumps(b, sort_keys=True)


def _assert_identical(ref: dict, comp: dict) -> None:
    for part in ("summary", "series", "links", "link_events"):
        if not _same(ref[part], comp[part]):
            diff = {k: (ref[part][k], comp[part][k]) for k in ref[part]
                    if isinstance(ref[part], dict) and not _same(ref[part][k], comp[part][k])}
            raise AssertionError(f"{part} differs between the loops: {diff or part}")


@needs_hops
@pytest.mark.parametrize("policy", ["shortest", "ecmp", "qrouting"])
def test_same_seed_same_results_on_our_network(policy: str) -> None:
    spec = {"policy": policy, "rate_pps": 1400.0, "duration_s": 3.0, "seed": 7,
            "topology": LAB, "scenario": SCENARIO, "warmup_s": 0.3, "size_dist": "exp"}
    ref, comp = _both(spec)
    _assert_identical(ref, comp)
    s = comp["summary"]
    # the run exercised what the loops must agree on: deliveries, queue drops, the cut
    assert s["delivered"] > 1000 and s["dropped_buffer"] > 0, s
    assert s["dropped_link_down"] > 0 or s["dropped_no_route"] > 0 or policy == "qrouting", s
    assert_little(s, rel=0.05)


@needs_hops
@pytest.mark.parametrize("policy", ["shortest", "ecmp", "qrouting"])
def test_same_seed_same_results_on_a_topohub_topology(policy: str) -> None:
    # topohub (package topohub, test extra): SNDlib's Abilene backbone, 12 nodes
    spec = {"policy": policy, "rate_pps": 2500.0, "duration_s": 2.0, "seed": 3,
            "topology": "topohub:sndlib/abilene", "capacity_bps": 20e6, "buffer_pkts": 30}
    ref, comp = _both(spec)
    _assert_identical(ref, comp)
    assert comp["summary"]["delivered"] > 3000


@needs_hops
@pytest.mark.parametrize("overrides", [["sim.feedback=instant"], ["sim.estimate=min"],
                                       ["engine.mode=greedy", "sim.feedback=instant"],
                                       ["engine.mode=greedy", "sim.estimate=min"],
                                       ["engine.mode=greedy", "engine.variant=dual"]])
def test_qrouting_variants_same_on_both_loops(overrides: list[str]) -> None:
    spec = {"policy": "qrouting", "rate_pps": 1400.0, "duration_s": 2.0, "seed": 11,
            "topology": LAB, "scenario": SCENARIO, "overrides": overrides}
    ref, comp = _both(spec)
    _assert_identical(ref, comp)


class _Recording(QRouting):
    """QRouting whose engine records every observe batch with its virtual time."""

    def attach(self, topology: Any, rng: Any, settings: Any) -> None:
        super().attach(topology, rng, settings)
        self.seen: list[tuple[float, list[list[float]]]] = []
        inner = self.engine.observe

        def observe(batch: Any, now: float) -> Any:
            cols = [np.asarray(c, dtype=np.float64).tolist()
                    for c in (batch.src, batch.via, batch.dst, batch.latency, batch.estimate)]
            self.seen.append((now, cols))
            return inner(batch, now)

        self.engine.observe = observe  # type: ignore[method-assign]


@needs_hops
def test_engine_sees_the_same_observations_in_the_same_order() -> None:
    pols: list[_Recording] = []

    def make() -> _Recording:
        pols.append(_Recording())
        return pols[-1]

    spec = {"policy": "qrouting", "rate_pps": 1400.0, "duration_s": 2.0, "seed": 5,
            "topology": LAB, "scenario": SCENARIO}
    _both(spec, make)
    ref, comp = pols
    assert len(ref.seen) > 20 and sum(len(c[0]) for _, c in ref.seen) > 2000
    assert ref.seen == comp.seen   # same batches, rows, order and virtual times


class _PerHop(Policy):
    """No table (asked every hop) and on_hop without on_hops: the loop's slow hooks."""

    name = "perhop"

    def attach(self, topology: Any, rng: Any, settings: Any) -> None:
        super().attach(topology, rng, settings)
        self.nh = topology.spt_next_hops().tolist()
        self.hops: list[tuple] = []
        self.links: list[tuple] = []

    def next_hop(self, x: int, d: int, flow: int, now: float) -> int:
        return self.nh[x][d] if flow % 7 else -1   # some flows have no route

    def on_hop(self, x: int, y: int, d: int, latency_s: float, now: float) -> None:
        self.hops.append((x, y, d, latency_s, now))

    def on_link(self, x: int, y: int, up: bool, now: float) -> None:
        self.links.append((x, y, up, now))


@needs_hops
def test_policy_hooks_without_table_or_batches() -> None:
    topo = topology.from_mapping(LAB)
    out = []
    for path in ("reference", "compiled"):
        pol = _PerHop()
        pol.attach(topo, np.random.default_rng(0), None)
        tr = PoissonTraffic(topo.n, 1200.0, np.random.default_rng(4), size_dist="exp")
        ev = [LinkEvent(0.5, (0, 1), "down"), LinkEvent(0.9, (0, 1), "up"),
              LinkEvent(1.1, (2,), "capacity", capacity_bps=2e6)]
        raw = run_core(topo, pol, tr.packets(), duration_s=1.5, warmup_s=0.2, ttl=2,
                       series_interval_s=0.25, link_events=ev, kernels=path)
        assert_little_raw(raw, rel=0.05)
        out.append((pol, raw))
    (p0, r0), (p1, r1) = out
    assert p0.hops == p1.hops and len(p0.hops) > 500
    assert p0.links == p1.links and len(p0.links) == 4
    d0, d1 = (dataclasses.asdict(r) for r in (r0, r1))
    d0.pop("wall_s"), d1.pop("wall_s")
    assert d0 == d1
    assert r0.dropped_no_route > 0 and r0.ttl_expired_all > 0 and r0.dropped_link_down > 0


def test_setting_selects_the_loop(monkeypatch: pytest.MonkeyPatch) -> None:
    assert hops_status("reference") == {"path": "reference", "mode": "reference",
                                        "reason": "engine.kernels is reference"}
    with pytest.raises(ValueError, match="engine.kernels"):
        hops_status("fast")
    # as if the extension had not been built
    monkeypatch.setattr(core, "_compiled_hops", None)
    monkeypatch.setattr(core, "_HOPS_WHY", "routerd.sim._hops could not be imported (test)")
    st = hops_status("auto")
    assert st["path"] == "reference" and "could not be imported" in st["reason"]
    assert hops_status("compiled")["path"] == "unavailable"
    spec = {"policy": "shortest", "rate_pps": 300.0, "duration_s": 1.0, "seed": 1, "topology": LAB}
    assert run(spec)["summary"]["delivered"] > 0           # auto: the reference loop runs
    with pytest.raises(RuntimeError, match="engine.kernels is compiled, but routerd.sim._hops"):
        run(dict(spec, overrides=["engine.kernels=compiled"]))


@needs_hops
def test_bad_node_from_a_traffic_source_is_a_clear_error() -> None:
    topo = topology.from_mapping(LAB)
    pol = _PerHop()
    pol.attach(topo, np.random.default_rng(0), None)
    with pytest.raises(ValueError, match="node 9; nodes are 0..5"):
        run_core(topo, pol, iter([(0.1, 0, 9, 8000.0, 1)]), duration_s=1.0, kernels="compiled")


class _OwnSplit(QRouting):
    """A subclass with its own next_hop: the compiled loop must call it, not sample."""

    made: list[_OwnSplit] = []

    def __init__(self) -> None:
        self.calls = 0
        _OwnSplit.made.append(self)

    def next_hop(self, x: int, d: int, flow: int, now: float) -> int:
        self.calls += 1
        return super().next_hop(x, d, flow, now)


@needs_hops
def test_a_subclass_next_hop_is_not_bypassed() -> None:
    # greedy: its exploration makes split entries (-2) from the start; split mode's shares
    # sit on one next hop per entry at this load, so next_hop would have nothing to pick
    spec = {"policy": "qrouting", "rate_pps": 1400.0, "duration_s": 1.5, "seed": 5,
            "topology": LAB, "overrides": ["engine.mode=greedy"]}
    _OwnSplit.made.clear()
    ref, comp = _both(spec, _OwnSplit)
    _assert_identical(ref, comp)
    on_ref, on_comp = _OwnSplit.made[:2]
    # every split still went through the subclass's next_hop on the compiled loop
    assert on_comp.calls == on_ref.calls > 0
    # and QRouting itself takes the compiled sampling and batching
    assert core._hook_applies(QRouting(), "split_arrays", "next_hop")
    assert core._hook_applies(QRouting(), "on_hops", "on_hop")
    assert not core._hook_applies(_OwnSplit(), "split_arrays", "next_hop")


class _ArrayTable(Policy):
    """A table that is not a list of lists (a numpy array): read by plain indexing."""

    name = "arraytable"

    def attach(self, topology: Any, rng: Any, settings: Any) -> None:
        super().attach(topology, rng, settings)
        self.table = topology.spt_next_hops()  # type: ignore[assignment]

    def next_hop(self, x: int, d: int, flow: int, now: float) -> int:
        return int(self.table[x][d])  # type: ignore[index]


@needs_hops
def test_progress_observer_and_other_tables_alike() -> None:
    topo = topology.from_mapping(LAB)
    seen: dict[str, list] = {}
    for path in ("reference", "compiled"):
        pol = _ArrayTable()
        pol.attach(topo, np.random.default_rng(0), None)
        calls: list = []
        tr = PoissonTraffic(topo.n, 900.0, np.random.default_rng(8))
        raw = run_core(topo, pol, tr.packets(), duration_s=1.0, series_interval_s=0.2,
                       progress=lambda t, ev: calls.append(("p", t, ev)),
                       observer=lambda v: calls.append(
                           ("o", v["t_s"], v["delivered"], v["dropped"], v["in_network"],
                            len(v["deliveries"]), json.dumps(v["series"]))),
                       kernels=path)
        seen[path] = [calls, raw.events, raw.deliveries]
    assert seen["reference"] == seen["compiled"]
    assert len(seen["compiled"][0]) == 10 and seen["compiled"][1] > 1000


def _qrouting(topo: Any, overrides: list[str]) -> QRouting:
    from routerd.io import config
    # greedy unless asked: the compiled row store is greedy mode's (split mode and dual
    # take their hops in batches, QRouting.hop_rows)
    cfg = config.load(None, overrides=["engine.mode=greedy", *overrides, "engine.kernels=compiled"])
    pol = QRouting()
    pol.attach(topo, np.random.default_rng(0), cfg)
    return pol


@needs_hops
@pytest.mark.parametrize("overrides", [[], ["sim.feedback=instant"], ["sim.estimate=min"]])
def test_the_row_store_ticks_like_the_numpy_path(overrides: list[str]) -> None:
    # the same hops, in batches whose due times are out of order with many ties
    # (whole-millisecond hop times, link delays of 1, 2 and 30 ms), to a policy on the
    # numpy path (on_hops, tick) and to one on the compiled row store (QRows.extend,
    # tick): the engines see the same batches and end in the same state, with the same
    # tables and estimates after every tick
    doc = {"topology": {"name": "ties", "nodes": list("abcdefg"), "links": [
        {"between": [a, b], "delay_s": dl, "capacity_bps": 10e6, "buffer_pkts": 20}
        for (a, b), dl in zip(["ab", "bc", "cd", "de", "ef", "fg", "ga", "ad", "be", "cf"],
                              [0.001, 0.002, 0.03] * 4)]}}
    topo = topology.from_mapping(doc)
    ref, comp = _qrouting(topo, overrides), _qrouting(topo, overrides)
    store = comp.hop_rows()
    assert store is not None and ref._qrows is None
    seen: list[list] = [[], []]
    for pol, log in zip((ref, comp), seen):
        inner = pol.engine.observe

        def observe(batch: Any, now: float, inner: Any = inner, log: list = log) -> Any:
            log.append((now, [np.asarray(c, dtype=np.float64).tolist() for c in
                              (batch.src, batch.via, batch.dst, batch.latency, batch.estimate)]))
            return inner(batch, now)

        pol.engine.observe = observe  # type: ignore[method-assign]
    rng = np.random.default_rng(3)
    t = 0.0
    for _ in range(40):
        m = int(rng.integers(0, 120))
        k = rng.integers(0, topo.n_links, m)
        x, y = topo.src[k].astype(np.int64), topo.dst[k].astype(np.int64)
        d = rng.integers(0, topo.n, m).astype(np.int64)
        keep = d != y
        x, y, d = x[keep], y[keep], d[keep]
        now = np.sort(t + rng.integers(0, 50, x.size) / 1000.0)
        lat = rng.integers(1, 40, x.size) / 1000.0
        ref.on_hops(x, y, d, lat, now, np.zeros(x.size, dtype=np.int64))
        store.extend(x, y, d, lat, now)
        t += 0.05
        ref.tick(t)
        comp.tick(t)
        assert ref.table == comp.table
        assert np.array_equal(ref._Vn, comp._Vn)
        assert ref.engine.same_state(comp.engine)
    assert seen[0] == seen[1] and sum(len(c[0]) for _, c in seen[0]) > 1000
    # a row naming a node the network does not have is refused, not written
    with pytest.raises(ValueError, match=r"row 1 \(0, 1, 9\) names a node outside 0..6"):
        store.extend(*(np.array(v, dtype=np.int64) for v in ([0, 0], [1, 1], [2, 9])),
                     np.zeros(2), np.zeros(2))
    # the rows not yet due are carried over alike (instant feedback: none)
    assert store.pending == ref._carry.shape[1]
    assert (store.pending > 0) == (overrides != ["sim.feedback=instant"])


@needs_hops
def test_qrouting_takes_the_row_store_on_the_compiled_loop() -> None:
    topo = topology.from_mapping(LAB)
    for overrides, used in [([], True), (["sim.estimate=min"], True),
                            (["engine.variant=dual"], False), (["engine.mode=split"], False)]:
        pol = _qrouting(topo, overrides)
        tr = PoissonTraffic(topo.n, 1400.0, np.random.default_rng(4))
        run_core(topo, pol, tr.packets(), duration_s=1.0, kernels="compiled")
        assert (pol._qrows is not None) == used, overrides
        # the estimates kept key by key are the engine's published ones, to the bit
        want = (pol.engine.values() if overrides == ["sim.estimate=min"]
                else pol.engine.published_estimates())
        assert np.array_equal(pol._Vn, want)
    # the numpy path never makes one
    pol = QRouting()
    pol.attach(topo, np.random.default_rng(0), None)
    tr = PoissonTraffic(topo.n, 1400.0, np.random.default_rng(4))
    run_core(topo, pol, tr.packets(), duration_s=0.5, kernels="reference")
    assert pol._qrows is None
