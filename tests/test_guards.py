"""routerd.core.guards: propagation floor, ceiling, jump hold/clip, per-reporter token buckets."""
from __future__ import annotations

import math

import networkx as nx
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from routerd.core import topology as T
from routerd.core.engine import Engine, EngineSettings, HopBatch
from routerd.core.guards import REASONS, Guards, GuardSettings


def _line() -> T.Topology:
    """a - b - c - d, delays 1, 2, 4 ms each way (a scenario of our own)."""
    specs = []
    for (x, y, dly) in (("a", "b", 0.001), ("b", "c", 0.002), ("c", "d", 0.004)):
        specs.append(T.LinkSpec(x, y, dly, 1e9, 100, f"{x}{y}"))
        specs.append(T.LinkSpec(y, x, dly, 1e9, 100, f"{y}{x}"))
    return T.build("line4", ["a", "b", "c", "d"], specs)


def _cols(topo: T.Topology, rows: list[tuple]) -> tuple[np.ndarray, ...]:
    ix = topo.index
    s = np.array([ix[r[0]] for r in rows], dtype=np.int64)
    v = np.array([ix[r[1]] for r in rows], dtype=np.int64)
    d = np.array([ix[r[2]] for r in rows], dtype=np.int64)
    lat = np.array([r[3] for r in rows], dtype=np.float64)
    est = np.array([r[4] if len(r) > 4 else math.nan for r in rows], dtype=np.float64)
    return s, v, d, lat, est


def test_latency_below_the_links_propagation_delay_is_rejected() -> None:
    t = _line()
    g = Guards(t, GuardSettings(floor_fraction=1.0))
    r = g.check(*_cols(t, [("a", "b", "d", 0.0009), ("a", "b", "d", 0.001), ("b", "c", "d", 0.0019),
                           ("c", "d", "d", 0.0)]))
    assert r.rejected == ((0, "below_floor"), (2, "below_floor"), (3, "below_floor"))
    assert r.keep.tolist() == [1]
    assert g.stats.rejected["below_floor"] == 3
    # a fraction of the floor: tolerance for a topology whose delays are a bit high
    g2 = Guards(t, GuardSettings(floor_fraction=0.5))
    assert g2.check(*_cols(t, [("a", "b", "d", 0.0006)])).rejected == ()
    assert Guards(t, GuardSettings(floor_fraction=0.0)).check(
        *_cols(t, [("a", "b", "d", 0.0)])).rejected == ()


def test_estimate_floor_is_the_shortest_propagation_distance_networkx_reference() -> None:
    # reference: networkx's Dijkstra over the same delays (networkx as the outside check)
    t = _line()
    G = nx.DiGraph()
    for k in range(t.n_links):
        G.add_edge(t.nodes[int(t.src[k])], t.nodes[int(t.dst[k])], w=float(t.delay_s[k]))
    dist_bd = nx.dijkstra_path_length(G, "b", "d", weight="w")     # 6 ms
    assert dist_bd == pytest.approx(0.006)
    g = Guards(t, GuardSettings(floor_fraction=1.0))
    r = g.check(*_cols(t, [("a", "b", "d", 0.001, dist_bd * 0.99), ("a", "b", "d", 0.001, dist_bd),
                           ("a", "b", "b", 0.001, 0.0)]))          # via == dst: no estimate used
    assert r.rejected == ((0, "below_floor"),)


def test_ceiling_and_values_the_engine_names_itself() -> None:
    t = _line()
    g = Guards(t, GuardSettings(ceiling_s=1.0))
    rows = [("a", "b", "d", 1.5), ("a", "b", "d", 0.01, 2.0), ("a", "b", "d", math.nan),
            ("a", "b", "d", math.inf), ("a", "b", "d", -1.0), ("a", "b", "d", 0.01, math.inf)]
    r = g.check(*_cols(t, rows))
    assert r.rejected == ((0, "above_ceiling"), (1, "above_ceiling"))
    # NaN / inf / negative pass through: the engine refuses them as bad_latency / bad_estimate
    eng = Engine(t)
    res = eng.observe(HopBatch(*[c[r.keep] for c in _cols(t, rows)]), now=1.0)
    assert res.accepted == 0
    assert {x for _, x in res.rejected} == {"bad_latency", "bad_estimate"}


def test_rows_the_guards_cannot_judge_pass_to_the_engine() -> None:
    t = _line()
    g = Guards(t)
    # via not a neighbour of from, an index out of range: the engine's reasons, not ours
    s = np.array([0, 0, 9]); v = np.array([2, 1, 1]); d = np.array([3, 3, 3])
    r = g.check(s, v, d, np.array([0.0, 0.0, 0.0]), np.full(3, np.nan))
    assert r.rejected == ((1, "below_floor"),)
    assert r.keep.tolist() == [0, 2]


def test_one_wild_sample_is_held_and_a_level_shift_gets_through_after_confirmation() -> None:
    t = _line()
    g = Guards(t, GuardSettings(jump_factor=4.0, jump_action="hold", jump_confirm=3))
    ab = t.link("a", "b")
    assert g.reference_s(ab) == pytest.approx(0.001)       # starts at the propagation delay
    ok = g.check(*_cols(t, [("a", "b", "d", 0.002)] * 4))
    assert ok.rejected == ()
    ref = g.reference_s(ab)
    assert 0.001 < ref < 0.002
    # one wild sample (25 x) among normal ones: held
    r = g.check(*_cols(t, [("a", "b", "d", 0.05), ("a", "b", "d", 0.002)]))
    assert r.rejected == ((0, "jump_held"),)
    # in-band samples reset the count; two more wild ones are still held (2 < 3) ...
    r = g.check(*_cols(t, [("a", "b", "d", 0.05), ("a", "b", "d", 0.05)]))
    assert [x for _, x in r.rejected] == ["jump_held", "jump_held"]
    # ... the third confirms: a real shift (the link became congested) passes, the reference follows
    r = g.check(*_cols(t, [("a", "b", "d", 0.05)]))
    assert r.rejected == () and r.keep.tolist() == [0]
    assert g.reference_s(ab) == pytest.approx(0.05)
    assert g.stats.rejected["jump_held"] == 3


def test_clip_mode_bounds_every_sample_to_the_band() -> None:
    t = _line()
    g = Guards(t, GuardSettings(jump_factor=2.0, jump_action="clip"))
    r = g.check(*_cols(t, [("a", "b", "d", 0.01), ("b", "c", "d", 0.0021)]))
    assert r.rejected == ()
    assert r.latency.tolist() == pytest.approx([0.002, 0.0021])    # 2 x the 1 ms reference
    assert r.clipped == 1


def test_one_wild_sample_cannot_swing_a_route() -> None:
    """Worst case for the engine: constant step 1, so one sample sets the estimate.  A sample
    that makes the current next hop look 50x slower moves the route without the jump guard
    and leaves it where it is with the guard."""
    specs = []
    for (x, y, dly) in (("s", "p", 0.001), ("p", "t", 0.001), ("s", "q", 0.0015), ("q", "t", 0.0015)):
        specs += [T.LinkSpec(x, y, dly, 1e9, 100, x + y), T.LinkSpec(y, x, dly, 1e9, 100, y + x)]
    t = T.build("square", ["s", "p", "q", "t"], specs)
    # constant step 1 and no hysteresis: the most a single sample can do to the engine
    # (greedy mode: split mode moves shares step by step, so one sample swings nothing)
    base = EngineSettings(mode="greedy", step_mode="constant", alpha=1.0, margin=0.0)

    def route_after(guard: Guards | None) -> int:
        eng = Engine(t, base)
        s, p, tt = (t.index[x] for x in "spt")
        assert int(eng.next_hops()[s, tt]) == p
        cols = (np.array([s]), np.array([p]), np.array([tt]), np.array([0.05]), np.array([np.nan]))
        if guard is not None:
            r = guard.check(*cols)
            cols = tuple(c[r.keep] for c in cols[:3]) + (r.latency, cols[4][r.keep])
        eng.observe(HopBatch(*cols), now=1.0)
        eng.decide(1.0)
        return int(eng.next_hops()[s, tt])

    p, q = t.index["p"], t.index["q"]
    assert route_after(None) == q                                 # unguarded: swung
    assert route_after(Guards(t, GuardSettings(jump_factor=10.0, jump_action="hold"))) == p
    # clip bounds the move to the factor: 10x still swings (10 ms > the 3 ms detour) ...
    assert route_after(Guards(t, GuardSettings(jump_factor=10.0, jump_action="clip"))) == q
    # ... 1.5x does not (1.5 ms + 1 ms < 3 ms)
    assert route_after(Guards(t, GuardSettings(jump_factor=1.5, jump_action="clip"))) == p


@settings(max_examples=60, deadline=None)
@given(st.lists(st.floats(0.0015, 0.0025), min_size=1, max_size=30),
       st.integers(0, 29), st.sampled_from([0.0, 1e-5, 0.5, 3.0]))
def test_property_a_lone_outlier_is_never_accepted_by_hold(normal: list[float], at: int,
                                                           wild: float) -> None:
    # confirm >= 2: a single out-of-band sample between in-band ones never reaches the
    # engine, and the link's reference never leaves the range of the normal samples
    t = _line()
    ab = t.link("a", "b")
    g = Guards(t, GuardSettings(floor_fraction=0.0, jump_factor=5.0, jump_confirm=2))
    pos = min(at, len(normal))
    seq = normal[:pos] + [wild] + normal[pos:]
    for i, x in enumerate(seq):
        ref = g.reference_s(ab)
        r = g.check(*_cols(t, [("a", "b", "d", x)]))
        if i == pos and not (ref / 5 <= wild <= ref * 5):
            assert r.rejected == ((0, "jump_held"),)
    assert min([0.001] + normal) - 1e-12 <= g.reference_s(ab) <= max(normal) + 1e-12


@settings(max_examples=80, deadline=None)
@given(st.floats(0.5, 50.0), st.floats(1.0, 20.0),
       st.lists(st.floats(0.0, 10.0), min_size=1, max_size=200))
def test_property_token_bucket_never_admits_more_than_burst_plus_rate_times_t(
        rate: float, burst: float, gaps: list[float]) -> None:
    # the token-bucket bound (Tanenbaum, Computer Networks, 5th ed., sec. 5.4.2): over any
    # interval of length T a bucket of rate r and depth b passes at most b + r*T units
    g = Guards(_line(), GuardSettings(rate_batches_per_s=rate, rate_burst_batches=burst))
    times = np.cumsum(np.array(gaps) / rate)
    admitted = [tm for tm in times.tolist() if g.admit("rep", 1, tm)]
    for i in range(len(admitted)):
        for j in range(i, len(admitted)):
            assert j - i + 1 <= burst + rate * (admitted[j] - admitted[i]) + 1e-9


def test_rate_limit_refuses_without_taking_and_recovers_and_stays_bounded() -> None:
    g = Guards(_line(), GuardSettings(rate_batches_per_s=10.0, rate_burst_batches=2,
                                      rate_rows_per_s=100.0, rate_burst_rows=100, max_reporters=3))
    assert g.admit("r", 10, 0.0) and g.admit("r", 10, 0.0)
    assert not g.admit("r", 10, 0.0)                 # batch bucket empty
    assert g.admit("r", 10, 0.1)                     # 0.1 s x 10/s = one batch back
    assert g.admit("x", 100, 0.0)
    assert not g.admit("x", 10, 0.05)                # rows: 5 back, 10 needed
    assert g.admit("x", 5, 0.05)                     # a smaller batch passes: nothing was taken
    assert g.admit("x", 10 ** 6, 10.0)               # larger than the burst: passes on a full bucket
    for k in range(10):
        g.admit(f"n{k}", 1, 0.0)
    assert g.reporters_tracked == 3
    assert g.stats.rate_limited_batches == 2


def test_settings_are_checked() -> None:
    for bad in ({"floor_fraction": 1.5}, {"jump_factor": 0.5}, {"jump_action": "drop"},
                {"jump_confirm": 0}, {"rate_burst_batches": 0.5}, {"ceiling_s": 0.0}):
        with pytest.raises(ValueError):
            GuardSettings(**bad)
    assert set(REASONS) == {"below_floor", "above_ceiling", "jump_held"}


def test_config_keys_build_the_settings() -> None:
    from routerd.io import config

    cfg = config.load(None).with_overrides({"guards.jump.factor": 3.0, "guards.ceiling_s": 0.0})
    s = GuardSettings.from_config(cfg)
    assert s.jump_factor == 3.0 and s.ceiling_s == math.inf
    with pytest.raises(config.ConfigError, match="guards.jump.factor"):
        config.load(None).with_overrides({"guards.jump.factor": 0.5})


def test_pending_count_restarts_after_an_in_band_batch() -> None:
    t = _line()
    g = Guards(t, GuardSettings(jump_factor=4.0, jump_confirm=2))
    assert g.check(*_cols(t, [("a", "b", "d", 0.05)])).rejected == ((0, "jump_held"),)
    assert g.check(*_cols(t, [("a", "b", "d", 0.001)])).rejected == ()
    # the in-band batch in between: this one is the first of a new count, held again
    assert g.check(*_cols(t, [("a", "b", "d", 0.05)])).rejected == ((0, "jump_held"),)
    assert g.check(*_cols(t, [("a", "b", "d", 0.05)])).rejected == ()


def test_estimates_the_engine_builds_at_the_floor_pass_it() -> None:
    # an engine fed only floor-level hops: its estimates are convex combinations of values
    # at the floor, which can round a few ulps below it; reported back as estimate_s (the
    # agent echoes them) they must still pass
    from conftest import ring_with_chords

    t = ring_with_chords(10, 8, seed=3)        # random delays: sums that do round
    eng = Engine(t, EngineSettings(step_mode="constant", alpha=0.3))
    g = Guards(t)
    rng = np.random.default_rng(4)
    for _ in range(50):
        k = rng.integers(0, t.n_links, 20)
        d = rng.integers(0, t.n, 20)
        ok = d != t.src[k]
        s_, v, d = t.src[k][ok], t.dst[k][ok], d[ok]
        est = np.array([eng.estimate(int(y), int(z)) for y, z in zip(v, d)])
        r = g.check(s_, v, d, t.delay_s[k][ok], est)
        assert r.rejected == ()
        eng.observe(HopBatch.of(s_, v, d, t.delay_s[k][ok], est), now=1.0)


class _FullCheck(Guards):
    """The guards without the screen: every batch takes the full check."""

    def _clean(self, *a: object) -> bool:
        return False


@settings(max_examples=150, deadline=None)
@given(st.lists(st.tuples(st.integers(-1, 4), st.integers(-1, 4), st.integers(-1, 4),
                          st.sampled_from([0.0, 0.0005, 0.001, 0.0015, 0.004, 0.009, 61.0,
                                           math.inf, math.nan, -0.001]),
                          st.sampled_from([math.nan, 0.0, 0.002, 0.006, 0.0071, 70.0, math.inf,
                                           -1.0])), min_size=1, max_size=40),
       st.sampled_from([0.0, 0.5, 1.0]), st.sampled_from([60.0, math.inf]))
def test_property_the_screen_of_clean_batches_changes_no_outcome(
        rows: list[tuple], floor: float, ceiling: float) -> None:
    """check() with its screen (a batch nothing can mark passes untouched) == the full
    check, on rows of every kind: in and out of range, non-neighbours, at and across the
    floors and the ceiling, NaN, inf, negative."""
    t = _line()
    gs = GuardSettings(floor_fraction=floor, ceiling_s=ceiling)
    cols = [np.array([r[i] for r in rows], dtype=np.int64 if i < 3 else np.float64)
            for i in range(5)]
    a = Guards(t, gs).check(*cols)
    b = _FullCheck(t, gs).check(*cols)
    assert a.keep.tolist() == b.keep.tolist() and a.rejected == b.rejected
    assert a.clipped == b.clipped
    np.testing.assert_array_equal(a.latency, b.latency)
