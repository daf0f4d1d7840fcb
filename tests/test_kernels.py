"""routerd/core/kernels.py and routerd/core/_kernels.pyx: the compiled hot paths equal the numpy
reference bit for bit, the choice of path is a setting, and without the extension the
package runs on the reference path and says so.

The engine's own property tests (batched == sequential, caps, loop freedom, the key lane)
run on both paths through the ``kernel_path`` fixture (tests/conftest.py); here the two
paths are compared directly, on random batches and decisions.
"""
from __future__ import annotations

import dataclasses
import math
import os
import subprocess
import sys

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from routerd.core import engine as E
from routerd.core import kernels
from routerd.core import topology as T
from routerd.core.engine import Engine, EngineSettings, HopBatch
from routerd.io import config

#: the greedy engine's kernels: greedy unless a test asks for split (split mode's pass is
#: checked in tests/test_splitting.py); the default mode is split
GREEDY = {"mode": "greedy"}

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
needs_compiled = pytest.mark.skipif(not kernels.available(),
                                    reason=kernels.status("compiled")["reason"])


def _same(a: Engine, b: Engine) -> None:
    """Everything either path writes, compared exactly."""
    assert a.same_state(b)
    for k in ("_hyst", "_forced", "_stable", "_kdirty", "_kcols", "_dirty"):
        assert np.array_equal(getattr(a, k), getattr(b, k)), k
    assert a.statistics() == b.statistics()


def _rows(t: T.Topology, rng: np.random.Generator, m: int, bad: float) -> HopBatch:
    """Random rows: repeats and chains on small graphs, some of every kind of bad row."""
    link = rng.integers(0, t.n_links, m)
    x, y = t.src[link].astype(np.int64), t.dst[link].astype(np.int64)
    d = rng.integers(0, t.n, m)
    d = np.where(rng.random(m) < 0.1, y, d)                       # next hop is the destination
    lat = rng.uniform(0, 0.02, m) * rng.choice([1.0, 1.0, 30.0], m)
    est = np.where(rng.random(m) < 0.3, rng.uniform(0, 0.1, m), np.nan)
    if bad:
        pick = rng.random(m) < bad
        kind = rng.integers(0, 7, m)
        x = np.where(pick & (kind == 0), t.n + 3, x)                # unknown_node
        y = np.where(pick & (kind == 1), x, y)                      # not_neighbour (self)
        d = np.where(pick & (kind == 2), x, d)                      # at_destination
        lat = np.where(pick & (kind == 3), np.nan, lat)             # bad_latency
        lat = np.where(pick & (kind == 4), -1.0, lat)
        est = np.where(pick & (kind == 5), np.inf, est)             # bad_estimate
        est = np.where(pick & (kind == 6), -0.5, est)
    return HopBatch.of(x, y, d, lat, est)


def _pair(t: T.Topology, **kw: object) -> tuple[Engine, Engine]:
    return (Engine(t, EngineSettings(**{"kernels": "reference", **GREEDY, **kw})),  # type: ignore[arg-type]
            Engine(t, EngineSettings(**{"kernels": "compiled", **GREEDY, **kw})))   # type: ignore[arg-type]


@needs_compiled
@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 2 ** 32 - 1), n=st.integers(3, 30),
       basis=st.sampled_from(["td", "visits"]), margin=st.sampled_from([0.0, 0.05, 0.3]),
       mode=st.sampled_from(["constant", "decaying"]), ceiling=st.sampled_from([0.02, 10.0]))
def test_compiled_equals_reference_on_random_batches(make_ring, seed: int, n: int, basis: str,  # type: ignore[no-untyped-def]
                                                     margin: float, mode: str,
                                                     ceiling: float) -> None:
    rng = np.random.default_rng(seed)
    t = make_ring(n, int(rng.integers(0, n + 1)), seed=seed % 997)
    a, b = _pair(t, explore_basis=basis, margin=margin, step_mode=mode, ceiling_s=ceiling,
                 explore_min=0.01)
    _same(a, b)
    for it in range(8):
        if rng.random() < 0.2:
            k = int(rng.integers(0, t.n_links))
            up = bool(rng.random() < 0.4)
            assert a.set_link(int(t.src[k]), int(t.dst[k]), up, now=it) == \
                b.set_link(int(t.src[k]), int(t.dst[k]), up, now=it)
        m = int(rng.choice([1, 5, 23, 24, 100, 700]))
        hb = _rows(t, rng, m, bad=float(rng.choice([0.0, 0.1])))
        ra, rb = a.observe(hb, now=it), b.observe(hb, now=it)
        assert ra.accepted == rb.accepted and ra.rejected == rb.rejected
        assert ra.td_errors.tobytes() == rb.td_errors.tobytes()
        _same(a, b)
        if rng.random() < 0.3:                 # sometimes every destination, full pass
            a._dirty[:] = True
            b._dirty[:] = True
        assert a.decide(it) == b.decide(it)
        _same(a, b)
    ta, tb = a.routes_many(), b.routes_many()       # the published tables, bit for bit
    assert ta == tb
    assert [[(y, w.hex()) for ws in tab.values() for y, w in ws] for tab in ta] == \
        [[(y, w.hex()) for ws in tab.values() for y, w in ws] for tab in tb]
    assert b.routes_many([n - 1, 0]) == [tb[n - 1], tb[0]]


def _columns(whole: Engine, part: Engine) -> None:
    """A partial engine's state is the whole engine's owned columns, bit for bit."""
    own = part.owned
    for k in ("Q", "N", "td", "greedy", "eps", "alt", "_hyst", "_forced"):
        assert np.array_equal(getattr(whole, k)[:, own], getattr(part, k), equal_nan=True), k
    assert np.array_equal(whole.live, part.live)


@needs_compiled
@settings(max_examples=20, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 2 ** 32 - 1), n=st.integers(3, 30),
       basis=st.sampled_from(["td", "visits"]), share=st.sampled_from([0.0, 0.3, 0.5, 1.0]))
def test_owned_destinations_compiled_equals_reference_equals_whole_columns(
        make_ring, seed: int, n: int, basis: str, share: float) -> None:  # type: ignore[no-untyped-def]
    """An engine owning some destinations (a shard worker's): compiled == reference, and
    both hold exactly the whole engine's columns of those destinations, fed the same rows
    (the whole engine gets only the owned destinations' rows, as a shard does)."""
    rng = np.random.default_rng(seed)
    t = make_ring(n, int(rng.integers(0, n + 1)), seed=seed % 997)
    own = np.flatnonzero(rng.random(t.n) < share)
    if own.size == 0:
        own = np.array([int(rng.integers(0, t.n))])
    kw = dict(explore_basis=basis, explore_min=0.01)
    a = Engine(t, EngineSettings(**{"kernels": "reference", **GREEDY, **kw}), owned=own)   # type: ignore[arg-type]
    b = Engine(t, EngineSettings(**{"kernels": "compiled", **GREEDY, **kw}), owned=own)    # type: ignore[arg-type]
    whole = Engine(t, EngineSettings(**{"kernels": "reference", **GREEDY, **kw}))           # type: ignore[arg-type]
    _same(a, b)
    _columns(whole, a)
    is_own = np.zeros(t.n, dtype=bool)
    is_own[own] = True
    for it in range(8):
        if rng.random() < 0.2:
            k = int(rng.integers(0, t.n_links))
            up = bool(rng.random() < 0.4)
            for e in (a, b, whole):
                e.set_link(int(t.src[k]), int(t.dst[k]), up, now=it)
        m = int(rng.choice([1, 5, 23, 24, 100, 700]))
        hb = _rows(t, rng, m, bad=float(rng.choice([0.0, 0.1])))
        ra, rb = a.observe(hb, now=it), b.observe(hb, now=it)
        assert ra.accepted == rb.accepted and ra.rejected == rb.rejected
        assert ra.td_errors.tobytes() == rb.td_errors.tobytes()
        mine = (hb.dst >= 0) & (hb.dst < t.n) & is_own[np.clip(hb.dst, 0, t.n - 1)]
        rw = whole.observe(hb.take(np.flatnonzero(mine)), now=it)
        assert rw.td_errors.tobytes() == ra.td_errors.tobytes()
        # the rows of other destinations are refused as not_owned, unless an earlier rule
        # refuses them (REJECT_REASONS order)
        codes = whole.check(hb)
        other = ~mine & (codes == -1)
        assert {i for i, r in ra.rejected if r == "not_owned"} == set(np.flatnonzero(other).tolist())
        _same(a, b)
        if rng.random() < 0.3:
            for e in (a, b, whole):
                e._dirty[:] = True
        da, db = a.decide(it), b.decide(it)
        assert da == db
        whole.decide(it)
        _same(a, b)
        _columns(whole, a)
    ta, tb, tw = a.routes_many(), b.routes_many(), whole.routes_many()
    assert ta == tb
    assert ta == [{d: w for d, w in tab.items() if is_own[d]} for tab in tw]
    assert [a.routes(x) for x in range(t.n)] == ta
    assert np.array_equal(a.values(), whole.values()[:, own])
    assert np.array_equal(a.next_hops(), whole.next_hops()[:, own])
    assert np.array_equal(a.published_estimates(), whole.published_estimates()[:, own])


@needs_compiled
@pytest.mark.parametrize("basis", ["td", "visits"])
@pytest.mark.parametrize("share", [1.0, 0.4])
def test_compiled_key_lane_equals_reference(make_ring, monkeypatch, basis: str,  # type: ignore[no-untyped-def]
                                            share: float) -> None:
    """decide's key lane (Engine._decide_keys) compiled (kernels.decide_keys, or inside
    kernels.decide_due on the engine's bound arrays): small
    batches after a first full pass, so most decisions go through the lane; every
    decision, the columns it sends to the full pass, the shares it writes and the nodes
    it returns equal the reference's, bit for bit, on whole and owned-destination engines
    and with link events between."""
    calls = [0]
    real = kernels.decide_keys

    def counted(eng):  # type: ignore[no-untyped-def]
        calls[0] += 1
        return real(eng)

    real_due = kernels.decide_due

    def counted_due(eng):  # type: ignore[no-untyped-def]  # the lane inside the bound decide
        calls[0] += bool(eng._kcols.any())
        return real_due(eng)

    monkeypatch.setattr(kernels, "decide_keys", counted)
    monkeypatch.setattr(kernels, "decide_due", counted_due)
    t = make_ring(14, 9, seed=3)
    rng = np.random.default_rng(5)
    own = None if share == 1.0 else np.flatnonzero(rng.random(t.n) < share)
    kw = dict(explore_basis=basis, explore_min=0.01, margin=0.05)
    a = Engine(t, EngineSettings(**{"kernels": "reference", **GREEDY, **kw}), owned=own)   # type: ignore[arg-type]
    b = Engine(t, EngineSettings(**{"kernels": "compiled", **GREEDY, **kw}), owned=own)    # type: ignore[arg-type]
    lane = 0
    for it in range(60):
        if it % 17 == 16:
            k = int(rng.integers(0, t.n_links))
            up = bool(it % 34 == 33)
            assert a.set_link(int(t.src[k]), int(t.dst[k]), up, now=it) == \
                b.set_link(int(t.src[k]), int(t.dst[k]), up, now=it)
        hb = _rows(t, rng, int(rng.choice([1, 3, 8, 30])), bad=0.0)
        a.observe(hb, now=float(it))
        b.observe(hb, now=float(it))
        before = b.full_pass_destinations
        touched = int(np.count_nonzero(b._kcols & ~b._dirty))   # columns the lane looks at
        da, db = a.decide(float(it)), b.decide(float(it))
        assert da == db, it
        _same(a, b)
        lane += touched > 0 and b.full_pass_destinations - before < touched
    assert calls[0] > 20          # the compiled lane ran
    assert lane > 10              # and spared the full pass to some destinations
    assert a.routes_many() == b.routes_many()


@needs_compiled
@pytest.mark.parametrize("seed", range(3))
def test_compiled_table_arrays_equal_reference(make_ring, seed: int) -> None:  # type: ignore[no-untyped-def]
    """Engine.table_arrays_many compiled (kernels.table_arrays) gives the reference's
    arrays — owners, destinations, counts, next hops and weights (1 - eps, eps / count),
    dtypes too — bit for bit, for node lists in any order with repeats and negative
    indices, after decisions with exploration and a link down; and the engine's whole
    tables (routes_many) agree with them entry for entry."""
    t = make_ring(16, 10, seed=seed)
    rng = np.random.default_rng(70 + seed)
    kw = dict(explore_min=0.02, explore_max=0.2, margin=0.05)
    a, b = _pair(t, **kw)
    for it in range(12):
        if it == 6:
            k = int(rng.integers(0, t.n_links))
            for e in (a, b):
                e.set_link(int(t.src[k]), int(t.dst[k]), False, now=it)
        hb = _rows(t, rng, 300, bad=0.0)
        a.observe(hb, now=float(it))
        b.observe(hb, now=float(it))
        a.decide(float(it))
        b.decide(float(it))
        _same(a, b)
    assert bool(b.alt.any())             # alternates exist: shares are compared too
    for xs in (np.arange(t.n), rng.permutation(t.n)[:5], np.array([3, 3, -1, 0]),
               np.zeros(0, dtype=np.int64)):
        ref, got = a.table_arrays_many(xs), b.table_arrays_many(xs)
        for r_, g_ in zip(ref, got):
            assert r_.dtype == g_.dtype and np.array_equal(r_, g_)
            assert r_.tobytes() == g_.tobytes()
    # the arrays hold the same tables as routes_many (weights as the same floats)
    owner, dsts, counts, hops, w = b.table_arrays_many(np.arange(t.n))
    at = np.concatenate(([0], np.cumsum(counts)))
    tables = b.routes_many()
    for i in range(len(owner)):
        got_entry = list(zip(hops[at[i]:at[i + 1]].tolist(), w[at[i]:at[i + 1]].tolist()))
        assert tables[int(owner[i])][int(dsts[i])] == got_entry


@needs_compiled
@pytest.mark.parametrize("variant", ["predictive", "confidence"])
def test_compiled_decide_equals_reference_under_a_variant(make_ring, variant: str) -> None:  # type: ignore[no-untyped-def]
    # variants observe on their own (reference) rule; decide's full pass is compiled
    t = make_ring(15, 8, seed=4)
    a, b = _pair(t, variant=variant)
    rng = np.random.default_rng(9)
    for it in range(6):
        hb = _rows(t, rng, 200, bad=0.0)
        a.observe(hb, now=float(it))
        b.observe(hb, now=float(it))
        assert a.decide(float(it)) == b.decide(float(it))
        assert a.same_state(b) and a.statistics() == b.statistics()


@needs_compiled
@pytest.mark.parametrize("kw", [{"floor": 0.0, "kappa": 1.0}, {"floor": 0.05},
                                {"step_mode": "constant", "alpha": 0.3}])
def test_compiled_steps_past_the_table_are_the_reference_steps(kw: dict) -> None:
    """Counts past the step table (h4's bound: it stops at the floor, or at
    STEP_TABLE_MAX counts) take the reference's own _step_beyond: the same bits."""
    t = T.build("three", ["a", "b", "c"], [
        T.LinkSpec("a", "b", 0.001, 1e9, 100, "ab"), T.LinkSpec("b", "a", 0.001, 1e9, 100, "ba"),
        T.LinkSpec("b", "c", 0.001, 1e9, 100, "bc"), T.LinkSpec("c", "b", 0.001, 1e9, 100, "cb")])
    a, b = _pair(t, **kw)
    j = int(t.slot_of[0, 1])
    for start in (1, 140, 150, E.STEP_TABLE_MAX - 3, 10 ** 7):
        for e in (a, b):
            e.N[0, 2, j] = min(start, e._count_cap)     # counts saturate at the cap
        hb = HopBatch.of([0] * 30, [1] * 30, [2] * 30, np.linspace(0.001, 0.02, 30))
        a.observe(hb)
        b.observe(hb)
        _same(a, b)
    assert a.N[0, 2, j] == min(10 ** 7 + 30, a._count_cap)


@needs_compiled
def test_reason_codes_follow_reject_reasons() -> None:
    # the kernel numbers reasons by their index in REJECT_REASONS
    assert E.REJECT_REASONS == ("unknown_node", "not_neighbour", "at_destination",
                                "bad_latency", "bad_estimate", "link_down", "not_owned")


@needs_compiled
def test_non_integer_columns_take_the_reference_path(make_ring) -> None:  # type: ignore[no-untyped-def]
    t = make_ring(6, 2, seed=1)
    a, b = _pair(t)
    hb = HopBatch(np.array([0.0] * 30), np.array([1.0] * 30), np.array([3.0] * 30),
                  np.full(30, 0.01), np.full(30, np.nan))
    with pytest.raises(IndexError):     # what the reference does with float indices
        a.observe(hb)
    with pytest.raises(IndexError):
        b.observe(hb)


def test_setting_selects_the_path() -> None:
    cfg = config.load(None)
    assert cfg["engine.kernels"] == "auto"
    assert EngineSettings.from_config(cfg.with_overrides({"engine.kernels": "reference"})
                                      ).kernels == "reference"
    with pytest.raises(ValueError, match="kernels 'fast' is not auto, compiled or reference"):
        EngineSettings(kernels="fast")
    t = T.build("two", ["a", "b"], [T.LinkSpec("a", "b", 0.001, 1e9, 100, "ab"),
                                    T.LinkSpec("b", "a", 0.001, 1e9, 100, "ba")])
    assert Engine(t, EngineSettings(kernels="reference"))._kern is None
    auto = Engine(t, EngineSettings(kernels="auto"))
    assert (auto._kern is not None) == kernels.available()
    st_ = kernels.status("auto")
    assert st_["path"] == ("compiled" if kernels.available() else "reference")
    assert kernels.status("reference")["path"] == "reference"
    assert "engine.kernels = reference" in kernels.describe("reference")


_NO_EXTENSION = """
import sys
sys.modules["routerd.core._kernels"] = None        # as if the build had no C compiler
from routerd.core import kernels
from routerd.core.engine import Engine, EngineSettings, HopBatch
from routerd.core.topology import from_mapping
import json
t = from_mapping({"topology": {"name": "three", "nodes": ["a", "b", "c"],
    "defaults": {"capacity_bps": 1e7, "buffer_pkts": 50},
    "links": [{"between": ["a", "b"], "delay_s": 0.001},
              {"between": ["b", "c"], "delay_s": 0.001}]}})
e = Engine(t)
r = e.observe(HopBatch.of([0] * 30, [1] * 30, [2] * 30, [0.01] * 30))
e.decide(1.0)
try:
    Engine(t, EngineSettings(kernels="compiled"))
    err = None
except RuntimeError as x:
    err = str(x)
# a journal written where the kernels were built replays here on the reference path
from routerd.io import journal
s = journal.settings_from_dict(journal.settings_to_dict(EngineSettings(kernels="compiled")))
replay_ok = Engine(t, s)._kern is None and s.kernels == "auto"
print(json.dumps({"available": kernels.available(), "status": kernels.status("auto"),
                  "line": kernels.describe("auto"), "accepted": r.accepted,
                  "kern": e._kern is not None, "err": err, "replay_ok": replay_ok}))
"""


def test_without_the_extension_the_reference_path_runs_and_says_so() -> None:
    r = subprocess.run([sys.executable, "-c", _NO_EXTENSION], cwd=ROOT, capture_output=True,
                       text=True, timeout=120, check=False)
    assert r.returncode == 0, r.stderr
    import json
    out = json.loads(r.stdout.strip().splitlines()[-1])
    assert out["available"] is False and out["kern"] is False and out["accepted"] == 30
    assert out["status"]["path"] == "reference"
    assert "routerd.core._kernels could not be imported" in out["status"]["reason"]
    assert "without a working C compiler" in out["line"]
    assert out["err"] is not None and "engine.kernels is compiled" in out["err"]
    assert out["replay_ok"] is True


def test_step_table_clamp_is_what_the_kernel_reads() -> None:
    # the compiled observe indexes eng._alphas directly: it must be the list's array twin
    e = Engine(T.build("two", ["a", "b"], [T.LinkSpec("a", "b", 0.001, 1e9, 100, "ab"),
                                           T.LinkSpec("b", "a", 0.001, 1e9, 100, "ba")]))
    tab = e._steps()
    assert e._alphas is not None and e._alphas.tolist() == tab
    assert e._alphas.dtype == np.float64 and e._alphas.flags.c_contiguous
    assert math.isclose(tab[-1], e.settings.floor)


@needs_compiled
def test_bound_arrays_follow_the_engine_when_it_replaces_them(make_ring) -> None:  # type: ignore[no-untyped-def]
    """The compiled path binds the engine's arrays once (kernels.bound: observe, the key
    lane and the full pass, which a reload makes take every destination); a reload that
    replaces Q, N (a narrower count type) and the step table, a restore-style
    replacement of one array, and columns of other kinds all keep it equal to the
    reference, and a stale binding writes nothing."""
    rng = np.random.default_rng(7)
    t = make_ring(12, 5, seed=3)
    a, b = _pair(t, step_mode="decaying", floor=0.0, kappa=1.0)  # 32-bit counts
    assert b.N.dtype == np.uint32

    def step(hb: HopBatch, it: int) -> None:
        ra, rb = a.observe(hb, now=it), b.observe(hb, now=it)
        assert ra.accepted == rb.accepted and ra.rejected == rb.rejected
        assert ra.td_errors.tobytes() == rb.td_errors.tobytes()
        assert a.decide(it) == b.decide(it)
        _same(a, b)

    for it in range(3):
        step(_rows(t, rng, 40, bad=0.1), it)
    first = b._bound
    assert first is not None and first.fresh(b)
    for e in (a, b):    # a narrower count type, a new ceiling: N, Q, settings, steps replaced
        e.reconfigure(dataclasses.replace(e.settings, step_mode="constant", ceiling_s=0.5))
    assert b.N.dtype == np.uint8 and not first.fresh(b)
    # a stale binding refuses and writes nothing
    q0 = b.Q.copy()
    hb = _rows(t, rng, 30, bad=0.0)
    assert first.observe(b, hb.src, hb.via, hb.dst, hb.latency, hb.estimate) is None
    assert first.decide_keys(b) is None and first.decide_due(b) is None
    assert first.decide_full(b, np.arange(b.nd, dtype=np.int64), b._spt_live()) is None
    assert np.array_equal(b.Q, q0)
    for it in range(3, 6):
        step(_rows(t, rng, 40, bad=0.1), it)
    assert b._bound is not first and b._bound.fresh(b)
    for e in (a, b):    # one array replaced by an equal copy, as a restore does
        e.td = e.td.copy()
    step(_rows(t, rng, 40, bad=0.1), 6)
    assert b._bound.fresh(b)
    # int32 and float32 columns are converted (the bound view takes int64 and float64 only)
    hb = _rows(t, rng, 40, bad=0.1)
    hb32 = HopBatch(hb.src.astype(np.int32), hb.via.astype(np.int32), hb.dst.astype(np.int32),
                    hb.latency, hb.estimate)
    ra, rb = a.observe(hb32, now=7), b.observe(hb32, now=7)
    assert ra.accepted == rb.accepted and ra.rejected == rb.rejected
    assert ra.td_errors.tobytes() == rb.td_errors.tobytes()
    _same(a, b)
