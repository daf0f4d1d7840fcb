"""The split learning mode (routerd/core/splitting.py): hand-worked marginal costs and share
steps, the loop check, hypothesis properties (batched == sequential, acyclic published
graph after every decision, shares summing to 1 over live next hops), state round trips,
and simulated targets on a network of our own (slow)."""
from __future__ import annotations

import math

import networkx as nx
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from routerd.core import kernels
from routerd.core import splitting as S
from routerd.core import topology as T
from routerd.core.engine import Engine, EngineSettings, HopBatch

HYP = settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow,
                                                                     HealthCheck.function_scoped_fixture])
SPLIT = EngineSettings(mode="split")


# ---- hand-worked arithmetic ---------------------------------------------------------------
def test_marginal_of_an_mm1_link_by_hand() -> None:
    # M/M/1 link (Kleinrock; Bertsekas & Gallager, Data Networks §5.4): C = 1000 packets/s,
    # F = 500 packets/s, p = 1 ms.  Sojourn s = 1/(C - F) = 2 ms, so L = 3 ms.
    # d/dF [F/(C-F)] = C/(C-F)^2 = 1000/500^2 = 4 ms, plus p: 5 ms.
    # d2/dF2 [F/(C-F)] = 2C/(C-F)^3 = 2000/1.25e8 = 1.6e-5 s^2.
    L, F, p = np.array([0.003]), np.array([500.0]), np.array([0.001])
    m, e, h = S.link_marginals(L, F, p)
    assert m[0] == pytest.approx(0.005, rel=1e-12)
    assert e[0] == pytest.approx(0.002, rel=1e-12)        # m - L: the others' extra delay
    assert h[0] == pytest.approx(1.6e-5, rel=1e-12)
    # and the service time it implies is 1/C
    assert S.service_time(L, F, p)[0] == pytest.approx(0.001, rel=1e-12)
    # an idle link: marginal = its latency, no externality, no curvature
    m0, e0, h0 = S.link_marginals(np.array([0.001]), np.array([0.0]), p)
    assert (m0[0], e0[0], h0[0]) == (0.001, 0.0, 0.0)


def test_share_step_by_hand() -> None:
    # two next hops, delta 10 ms and 20 ms, curvatures 0.02 and 0.03 (shares of one key,
    # t = 1): the scaled projection step (Bertsekas & Gallager §5.7) moves
    # (0.020 - 0.010) / (0.03 + 0.02) = 0.2 from the dearer to the cheaper hop
    w = np.array([0.6, 0.4])
    d = np.array([0.010, 0.020])
    cand = np.array([True, True])
    t = np.array(1.0)
    out = S.share_step(w, d, np.array([0.02, 0.03]), cand, t, 1.0, 1.0)
    assert out == pytest.approx([0.8, 0.2], abs=1e-15)
    # half the step with step = 0.5; capped at max_step = 0.1
    assert S.share_step(w, d, np.array([0.02, 0.03]), cand, t, 0.5, 1.0) == pytest.approx([0.7, 0.3])
    assert S.share_step(w, d, np.array([0.02, 0.03]), cand, t, 1.0, 0.1) == pytest.approx([0.7, 0.3])
    # a step larger than the share held empties it (projection onto w >= 0)
    assert S.share_step(w, d, np.array([0.005, 0.005]), cand, t, 1.0, 1.0) == pytest.approx([1.0, 0.0])
    # a steep leaving path slows the step: 0.01 / (0.5 + 0.01) of a share
    assert S.share_step(w, d, np.array([0.01, 0.5]), cand, t, 1.0, 1.0) == pytest.approx(
        [0.6 + 0.01 / 0.51, 0.4 - 0.01 / 0.51])
    # a non-candidate gives up everything at once; the third hop is not allowed
    w3 = np.array([0.5, 0.3, 0.2])
    out3 = S.share_step(w3, np.array([0.01, 0.02, np.inf]), np.array([0.05, 0.05, 0.0]),
                        np.array([True, True, False]), t, 1.0, 1.0)
    assert out3 == pytest.approx([0.8, 0.2, 0.0])
    # no candidate: unchanged (the engine repairs such keys before stepping)
    assert S.share_step(w, d, np.array([0.0, 0.0]), np.array([False, False]), t, 1.0, 1.0).tolist() == w.tolist()


def test_share_step_drains_an_uphill_share_by_hand() -> None:
    # slot 0 is the cheapest (delta 10 ms); slot 1 holds 0.5 but is uphill; its gradient
    # step alone is (0.011 - 0.010) / (1.0 + 1.0) = 0.0005 (a steep path, as across an
    # overloaded link); with drain 0.1 it gives up at least min(0.5, 0.1) = 0.1
    w = np.array([0.5, 0.5])
    d = np.array([0.010, 0.011])
    H = np.array([1.0, 1.0])
    cand = np.array([True, True])
    up = np.array([False, True])
    t = np.array(1.0)
    assert S.share_step(w, d, H, cand, t, 1.0, 1.0) == pytest.approx([0.5005, 0.4995])
    assert S.share_step(w, d, H, cand, t, 1.0, 1.0, up, 0.1) == pytest.approx([0.6, 0.4])
    # the gradient's step wins when larger; a share below the drain goes whole
    assert S.share_step(w, np.array([0.010, 0.5]), H, cand, t, 1.0, 1.0, up, 0.1) == pytest.approx(
        [0.5 + 0.49 / 2.0, 0.5 - 0.49 / 2.0])
    assert S.share_step(np.array([0.95, 0.05]), d, H, cand, t, 1.0, 1.0, up, 0.1) == pytest.approx([1.0, 0.0])
    # the cheapest slot is never drained, even when uphill
    assert S.share_step(w, d, H, cand, t, 1.0, 1.0, np.array([True, True]), 0.1) == pytest.approx([0.6, 0.4])


def _tri() -> T.Topology:
    doc = {"topology": {"name": "tri", "nodes": ["a", "b", "c"],
                        "defaults": {"capacity_bps": 1e6, "buffer_pkts": 64},
                        "links": [{"between": ["a", "b"], "delay_s": 0.001},
                                  {"between": ["b", "c"], "delay_s": 0.001},
                                  {"between": ["a", "c"], "delay_s": 0.003}]}}
    return T.from_mapping(doc)


def test_rate_model_latency_by_hand() -> None:
    # M/M/1 (Kleinrock): service time tau = 4 ms (C = 250 packets/s), p = 1 ms.
    # F = 125/s: rho = 0.5, sojourn tau / (1 - rho) = 8 ms, latency 9 ms.  F = 300/s is
    # past capacity: rho capped at 0.97, sojourn 4 ms / 0.03.  No capacity known (tau 0): p.
    tau, p = np.array([0.004, 0.004, 0.0]), np.array([0.001, 0.001, 0.001])
    L = S.rate_model_latency(np.array([125.0, 300.0, 50.0]), p, tau, 0.97)
    assert L == pytest.approx([0.009, 0.001 + 0.004 / 0.03, 0.001], rel=1e-12)
    # the decision takes the larger of the measured and the model latency: a link whose
    # queue has not built up yet (measured 5 ms at 240/s on C = 250) is costed at the
    # model's 4 ms / (1 - 0.96) + p = 101 ms
    Lm = np.maximum(np.array([0.005]), S.rate_model_latency(np.array([240.0]), p[:1], tau[:1], 0.97))
    assert Lm[0] == pytest.approx(0.101, rel=1e-12)


def test_event_boost_by_hand() -> None:
    # 1 + (B - 1) exp(-(now - since) / tau): B at the event, 1 + (B - 1)/e one tau later
    # (the "search then converge" idea, Darken & Moody 1992, with a floor of 1), 1 before
    # any event and with B = 1
    assert S.event_boost(5.0, 5.0, 3.0, 2.0) == 3.0
    assert S.event_boost(7.0, 5.0, 3.0, 2.0) == pytest.approx(1.0 + 2.0 / math.e, rel=1e-12)
    assert S.event_boost(45.0, 5.0, 3.0, 2.0) == pytest.approx(1.0, abs=1e-8)
    assert S.event_boost(5.0, -math.inf, 3.0, 2.0) == 1.0
    assert S.event_boost(4.0, 5.0, 3.0, 2.0) == 1.0        # a clock behind the event
    assert S.event_boost(5.0, 5.0, 1.0, 2.0) == 1.0


def test_a_link_event_boosts_the_next_share_step(small_ring: T.Topology) -> None:
    # the same rows and the same link cut in two engines, one without the boost: right
    # after the cut the boosted one moves its shares further (engine.split.event_boost);
    # with no link event the two are the same to the bit
    t = small_ring
    rng = np.random.default_rng(3)
    k = rng.integers(0, t.n_links, 600)
    x, y = t.src[k].astype(int), t.dst[k].astype(int)
    d = rng.integers(0, t.n, 600)
    d = np.where(d == x, y, d)
    lat = rng.uniform(0.001, 0.05, 600)
    engs = [Engine(t, EngineSettings(mode="split", split_boost=b, split_threshold=0.0))
            for b in (1.0, 4.0)]
    for i in range(3):
        for e in engs:
            e.observe(HopBatch.of(x[200 * i:200 * (i + 1)], y[200 * i:200 * (i + 1)],
                                  d[200 * i:200 * (i + 1)], lat[200 * i:200 * (i + 1)]), 0.1 * (i + 1))
            e.decide(0.1 * (i + 1))
    assert np.array_equal(engs[0]._split.w, engs[1]._split.w)      # no event yet: equal
    assert np.array_equal(engs[0].Q, engs[1].Q)
    before = [e._split.w.copy() for e in engs]
    for e in engs:
        e.set_link(int(t.src[0]), int(t.dst[0]), False, 0.3)
        assert e._split.last_event == 0.3
        e.observe(HopBatch.of(x[:200], y[:200], d[:200], lat[:200]), 0.4)
        e.decide(0.4)
    moved = [float(np.abs(e._split.w - b).sum()) for e, b in zip(engs, before)]
    assert moved[1] > moved[0] > 0
    # a state saved before the boost existed restores with no boost pending
    st = engs[1].export_state()
    del st["split"]["last_event"]
    back = Engine.from_state(t, engs[1].settings, st)
    assert back._split.last_event == -math.inf


def _steps(monkeypatch: pytest.MonkeyPatch) -> list[tuple[float, float]]:
    """(eta, max_step') of every split decision from now on (both decide paths)."""
    got: list[tuple[float, float]] = []
    for name in ("_decide_compiled", "_decide_reference"):
        f = getattr(S, name)

        def spy(*a: object, _f: object = f) -> object:
            eta, mx, ds = a[-4], a[-3], a[-1]              # ..., eta, mx, drain, dests
            got.append((float(eta[ds[0]]), float(mx[ds[0]])))   # type: ignore[index]
            return _f(*a)                                   # type: ignore[operator]
        monkeypatch.setattr(S, name, spy)
    return got


def test_the_step_follows_observed_time_not_when_decisions_run(small_ring: T.Topology,
                                                               monkeypatch: pytest.MonkeyPatch) -> None:
    # The same rows every 50 ms, observed at the same times; one shell decides at once
    # (the simulator), the other 0-45 ms later (the service: debounced, on its own
    # clock), sometimes twice between two batches and sometimes once for two.  The share
    # step is eta = step * dt / window with dt the observed time since the previous
    # decision (the module docstring), so both take the same steps in all: the sum of dt
    # is the time the rows span, however the decisions fall.  (Measured in the closed
    # loop before: dt from the previous decision's own time lost the decision's lag at
    # every decision, half the step.)
    t = small_ring
    rng = np.random.default_rng(11)
    batches = []
    for i in range(40):
        k = rng.integers(0, t.n_links, 60)
        x, y = t.src[k].astype(int), t.dst[k].astype(int)
        d = rng.integers(0, t.n, 60)
        d = np.where(d == x, y, d)
        batches.append((HopBatch.of(x, y, d, rng.uniform(0.001, 0.05, 60)), 0.05 * (i + 1)))
    steps = _steps(monkeypatch)
    prompt = Engine(t, SPLIT)
    for b, now in batches:
        prompt.observe(b, now)
        prompt.decide(now)
    at_once = list(steps)
    steps.clear()
    late = Engine(t, SPLIT)
    lags = rng.uniform(0.0, 0.045, len(batches))
    for i, (b, now) in enumerate(batches):
        late.observe(b, now)
        if i % 7 == 3:
            continue                                       # one decision for two batches
        late.decide(now + lags[i])
        if i % 5 == 1:
            late.decide(now + lags[i] + 0.003)             # a second one, no new rows: no step
    window = SPLIT.split_window_s
    assert len(at_once) == 40
    assert at_once[0] == (0.0, 0.0)                        # the first rows start the step clock
    assert all(e == pytest.approx(0.05 / window, rel=1e-9) for e, _ in at_once[1:])
    assert sum(e for e, _ in steps) == pytest.approx(sum(e for e, _ in at_once), rel=1e-9)
    assert sum(e for e, _ in at_once) == pytest.approx(39 * 0.05 / window, rel=1e-9)
    assert sum(1 for e, _ in steps if e == 0.0) == 1 + sum(1 for i in range(40) if i % 5 == 1 and i % 7 != 3)
    # decisions long after the last rows move nothing (no news), nor does the first one
    steps.clear()
    late.decide(batches[-1][1] + 5.0)
    assert steps == [(0.0, 0.0)]


def test_cyclic_finds_a_two_node_cycle_and_nothing_else() -> None:
    t = _tri()
    n, K = t.n, t.slots.shape[1]
    a, b, c = (t.index[x] for x in "abc")
    w = np.zeros((n, n, K))
    w[a, c, t.slot_of[a, b]] = 1.0              # a -> b for c
    w[b, c, t.slot_of[b, c]] = 1.0              # b -> c
    assert not S.cyclic(w, t.slots).any()
    w[b, c, t.slot_of[b, c]] = 0.5
    w[b, c, t.slot_of[b, a]] = 0.5              # b also back to a: a <-> b
    cyc = S.cyclic(w, t.slots)
    assert cyc[a, c] and cyc[b, c] and cyc.sum() == 2


# ---- the engine in split mode ---------------------------------------------------------------
def _rows(draw: st.DrawFn, t: T.Topology, lo: int, hi: int) -> list[tuple]:
    m = draw(st.integers(lo, hi))
    out = []
    for _ in range(m):
        k = draw(st.integers(0, t.n_links - 1))
        x, y = int(t.src[k]), int(t.dst[k])
        d = draw(st.integers(0, t.n - 1))
        if d == x:
            d = y
        lat = draw(st.floats(0.0, 0.05))
        est = draw(st.one_of(st.just(math.nan), st.floats(0.0, 0.2)))
        out.append((x, y, d, lat, est))
    return out


rows_of = st.composite(_rows)


@HYP
@given(data=st.data())
def test_split_batched_equals_sequential(small_ring: T.Topology, data: st.DataObject) -> None:
    t = small_ring
    a, b = Engine(t, SPLIT), Engine(t, SPLIT)
    now = 0.0
    for _ in range(data.draw(st.integers(1, 4))):
        rows = data.draw(rows_of(t, 1, 60))
        now += data.draw(st.floats(0.0, 0.5))
        a.observe(HopBatch.from_rows(rows), now)
        for r in rows:
            b.observe_one(*r[:4], estimate=None if r[4] != r[4] else r[4], now=now)
        da, db = a.decide(now), b.decide(now)
        assert da == db
        assert a.same_state(b)


def _slow_links(t: T.Topology, bps: float) -> T.Topology:
    """``t`` with every link at ``bps``: the rows' latencies then load the links (idle
    prior, marginals and curvatures of their own size)."""
    specs = [T.LinkSpec(t.nodes[int(t.src[k])], t.nodes[int(t.dst[k])], float(t.delay_s[k]), bps, 64,
                        f"l{k}") for k in range(t.n_links)]
    return T.build(f"{t.name}-slow", list(t.nodes), specs)


@pytest.mark.skipif(not kernels.available(), reason="routerd.core._kernels is not built")
@HYP
@given(data=st.data())
def test_split_compiled_equals_reference(small_ring: T.Topology, data: st.DataObject) -> None:
    # the compiled pass (routerd.core._kernels.split_decide, one destination at a time)
    # against the numpy reference (every destination at once): the same decisions, Q,
    # shares, published shares, readers and counters, to the bit, through link failures
    t = small_ring if data.draw(st.booleans()) else _slow_links(small_ring, 2e5)
    kw = {"mode": "split", "split_threshold": data.draw(st.sampled_from([0.0, 0.02, 0.3])),
          "initial_mode": data.draw(st.sampled_from(["shortest", "constant"])),
          "split_step": data.draw(st.sampled_from([1.0, 0.3])),
          "split_max_step": data.draw(st.sampled_from([1.0, 0.2])),
          "split_uphill_drain": data.draw(st.sampled_from([0.0, 0.1, 1.0])),
          "split_boost": data.draw(st.sampled_from([1.0, 3.0])),
          "split_rate_model": data.draw(st.sampled_from([0.0, 0.5, 0.97])),
          "split_per_decision": data.draw(st.sampled_from([0, 1, 3]))}
    a = Engine(t, EngineSettings(kernels="compiled", **kw))
    b = Engine(t, EngineSettings(kernels="reference", **kw))
    now = 0.0
    for _ in range(data.draw(st.integers(1, 8))):
        rows = data.draw(rows_of(t, 0, 80))
        now += data.draw(st.floats(0.01, 0.6))
        if rows:
            hb = HopBatch.from_rows(rows)
            a.observe(hb, now)
            b.observe(hb, now)
        if data.draw(st.booleans()):
            k = data.draw(st.integers(0, t.n_links - 1))
            up = data.draw(st.booleans())
            a.set_link(int(t.src[k]), int(t.dst[k]), up, now)
            b.set_link(int(t.src[k]), int(t.dst[k]), up, now)
        assert a.decide(now) == b.decide(now)
        assert a.same_state(b)
        assert a.statistics() == b.statistics()
        # the published estimates: split_values against published_values' numpy, bytewise
        assert a.published_estimates().tobytes() == b.published_estimates().tobytes()


def _random_hops(t: T.Topology, rng: np.random.Generator, m: int) -> HopBatch:
    """m hop rows on random links towards random destinations (not the hop's source)."""
    k = rng.integers(0, t.n_links, m)
    x, y = t.src[k].astype(int), t.dst[k].astype(int)
    d = rng.integers(0, t.n, m)
    d = np.where(d == x, y, d)
    return HopBatch.of(x, y, d, rng.uniform(0.001, 0.03, m))


def test_split_compiled_equals_reference_at_a_hundred_nodes() -> None:
    # a larger graph than hypothesis draws (deeper share graphs, more reversions), seeded
    if not kernels.available():
        pytest.skip("routerd.core._kernels is not built")
    from conftest import ring_with_chords
    t = _slow_links(ring_with_chords(100, 100, seed=3), 2e6)
    rng = np.random.default_rng(11)
    a = Engine(t, EngineSettings(mode="split", kernels="compiled"))
    b = Engine(t, EngineSettings(mode="split", kernels="reference"))
    moved = 0
    for i in range(12):
        now = 0.1 * (i + 1)
        hb = _random_hops(t, rng, 800)
        a.observe(hb, now)
        b.observe(hb, now)
        if i in (4, 8):
            a.set_link(int(t.src[i]), int(t.dst[i]), i == 8, now)
            b.set_link(int(t.src[i]), int(t.dst[i]), i == 8, now)
        assert a.decide(now) == b.decide(now)
        assert a.same_state(b)
        assert a.published_estimates().tobytes() == b.published_estimates().tobytes()
    moved = a.statistics().split_share_moves
    assert moved > 1000 and a.statistics().loops_prevented > 0   # the test exercised the step and repairs


def test_split_values_compiled_equals_reference() -> None:
    # routerd.core._kernels.split_values against splitting.published_values' numpy, to the
    # byte: shares of several slots (the slot-order sum), keys with no share (the
    # ceiling), sums above the ceiling (capped), the diagonal (0), Q of every magnitude
    if not kernels.available():
        pytest.skip("routerd.core._kernels is not built")
    kern = kernels.select("compiled")
    rng = np.random.default_rng(7)
    for n, K in ((1, 1), (5, 3), (40, 7), (64, 12)):
        pub = rng.dirichlet(np.ones(K), size=(n, n)) * (rng.random((n, n, K)) < 0.6)
        pub[rng.random((n, n)) < 0.2] = 0.0                     # keys without a route
        pub[0, -1, :] = 0.0
        Q = rng.lognormal(-4.0, 3.0, (n, n, K))                  # some above the ceiling
        ceil = 2.0
        want = S.published_values(pub, Q, ceil)
        got = S.published_values(pub, Q, ceil, kern)
        assert got.tobytes() == want.tobytes()
        assert (np.diag(want) == 0.0).all() and (n == 1 or (want == ceil).any())
    # by hand: shares 0.25 / 0.75 of Q 0.1 / 0.3 give 0.025 + 0.225 = 0.25
    pub = np.zeros((2, 2, 2))
    pub[0, 1] = [0.25, 0.75]
    Q = np.zeros((2, 2, 2))
    Q[0, 1] = [0.1, 0.3]
    got = S.published_values(pub, Q, 9.0, kern)
    assert got[0, 1] == pytest.approx(0.25, rel=1e-15) and got[1, 0] == 9.0 and got[0, 0] == 0.0


def test_median_is_numpys_median() -> None:
    # splitting.median (the link estimates' packet size) against numpy.median, the
    # reference it stands in for: the same float, bytewise, for odd and even lengths,
    # ties, zeros, inf and NaN
    rng = np.random.default_rng(12)
    for i in range(3000):
        n = int(rng.integers(1, 30))
        a = rng.lognormal(0.0, 2.0, n)
        if i % 3 == 0:
            a = np.round(a)
        if i % 7 == 0:
            a[int(rng.integers(0, n))] = np.inf
        if i % 11 == 0:
            a[int(rng.integers(0, n))] = np.nan
        assert np.float64(S.median(a)).tobytes() == np.float64(np.median(a)).tobytes()


def _check_published(eng: Engine) -> None:
    st_ = eng._split
    assert st_ is not None
    pub = st_.pub
    n = eng.n
    live = eng.live
    for d in range(n):
        g = nx.DiGraph()
        for x in range(n):
            ws = eng.weights(x, d)
            if x == d:
                assert not ws
                continue
            if ws:
                # shares sum to 1 over live next hops, every one live and positive
                assert sum(w for _, w in ws) == pytest.approx(1.0, abs=1e-9)
                for y, w in ws:
                    assert w > 0 and bool(live[x, eng._slot_of[x, y]])
                    g.add_edge(x, y)
        # reference: networkx.is_directed_acyclic_graph on the weighted forwarding graph
        assert nx.is_directed_acyclic_graph(g), d
    assert not S.cyclic(pub, eng._slots).any()


@HYP
@given(data=st.data())
def test_split_published_graph_acyclic_after_every_decide(small_ring: T.Topology,
                                                          data: st.DataObject) -> None:
    t = small_ring
    eng = Engine(t, EngineSettings(mode="split", split_threshold=data.draw(st.sampled_from([0.0, 0.02, 0.3])),
                                   initial_mode=data.draw(st.sampled_from(["shortest", "constant"])),
                                   split_per_decision=data.draw(st.sampled_from([0, 1, 2]))))
    now = 0.0
    for _ in range(data.draw(st.integers(1, 6))):
        rows = data.draw(rows_of(t, 0, 80))
        now += data.draw(st.floats(0.01, 0.3))
        if rows:
            eng.observe(HopBatch.from_rows(rows), now)
        if data.draw(st.booleans()):
            k = data.draw(st.integers(0, t.n_links - 1))
            eng.set_link(int(t.src[k]), int(t.dst[k]), data.draw(st.booleans()), now)
        eng.decide(now)
        _check_published(eng)


@pytest.mark.parametrize("per", [0, 2])
def test_split_state_round_trip_and_same_future(small_ring: T.Topology, per: int) -> None:
    # per > 0: the rotation, the destinations' step clocks and the due marks travel too
    t = small_ring
    rng = np.random.default_rng(5)
    SPLIT = EngineSettings(mode="split", split_per_decision=per)
    eng = Engine(t, SPLIT)

    def batch(m: int) -> HopBatch:
        k = rng.integers(0, t.n_links, m)
        x, y = t.src[k].astype(int), t.dst[k].astype(int)
        d = rng.integers(0, t.n, m)
        d = np.where(d == x, y, d)
        return HopBatch.of(x, y, d, rng.uniform(0.001, 0.02, m))

    for i in range(5):
        eng.observe(batch(200), 0.1 * (i + 1))
        eng.decide(0.1 * (i + 1))
    eng.set_link(int(t.src[0]), int(t.dst[0]), False, 0.55)     # due marks pending
    st = eng.export_state()
    assert "split" in st
    if per:
        assert st["split"]["rot"] == (5 * per) % t.n and st["split"]["due"].any()
    back = Engine.from_state(t, SPLIT, st)
    assert back.same_state(eng)
    b1 = batch(300)
    eng.observe(b1, 0.7)
    back.observe(b1, 0.7)
    assert eng.decide(0.7) == back.decide(0.7)
    assert back.same_state(eng)


def test_every_entry_of_a_used_link_is_refreshed(small_ring: T.Topology) -> None:
    # rows for one destination only: the link's entries for *every* destination move
    # from their initial values (the stale-entry cause)
    t = small_ring
    eng = Engine(t, SPLIT)
    q0 = eng.Q.copy()
    x, y = int(t.src[0]), int(t.dst[0])
    d = next(v for v in range(t.n) if v not in (x, y))
    j = t.slot_of[x, y]
    for i in range(10):
        eng.observe(HopBatch.of([x] * 30, [y] * 30, [d] * 30, [0.02] * 30), 0.05 * (i + 1))
        eng.decide(0.05 * (i + 1))
    others = [v for v in range(t.n) if v not in (x, d)]
    assert all(eng.Q[x, v, j] != q0[x, v, j] for v in others)
    # and the link's latency estimate is the measured one (prior weight 2 of 302 samples)
    L, _ = eng._split.link_estimates(0.5, 1.0, 2.0)
    assert L[x, j] == pytest.approx(0.02, rel=0.02)


def test_greedy_mode_has_no_split_state(small_ring: T.Topology) -> None:
    eng = Engine(small_ring, EngineSettings(mode="greedy"))
    assert eng._split is None and "split" not in eng.export_state()
    assert Engine(small_ring, EngineSettings())._split is not None     # split is the default
    with pytest.raises(ValueError, match="mode split needs variant plain"):
        EngineSettings(mode="split", variant="predictive")
    with pytest.raises(ValueError, match="mode 'fast'"):
        EngineSettings(mode="fast")


def test_measured_demand_recovers_what_enters_the_network() -> None:
    # a -> b -> c for destination c at 100 rows/s on each hop: only a injects (100/s);
    # b's rows are a's traffic passing through (hand-worked: 100 - 1.0 x 100 = 0)
    t = _tri()
    a, b, c = (t.index[x] for x in "abc")
    eng = Engine(t, EngineSettings(mode="split"))
    st_ = eng._split
    K = t.slots.shape[1]
    st_.pub[a, c] = 0.0
    st_.pub[a, c, t.slot_of[a, b]] = 1.0
    for i in range(1, 41):                       # 40 batches of 5 rows per 0.05 s, each hop
        now = 0.05 * i
        eng.observe(HopBatch.of([a] * 5 + [b] * 5, [b] * 5 + [c] * 5, [c] * 10, [0.002] * 10), now)
    dem = st_.measured_demand(2.0, eng.settings.split_window_s)
    rate = st_.key_rate(2.0, eng.settings.split_window_s)
    assert rate[a, c] == pytest.approx(rate[b, c])
    assert dem[a, c] == pytest.approx(rate[a, c]) and dem[b, c] == pytest.approx(0.0, abs=1e-9)
    # an exponentially weighted count over 1 s windows of a steady 100/s: 100 (1 - e^-2)
    # after 2 s, plus the discretisation of 5-row batches every 0.05 s
    assert 80.0 < rate[a, c] < 100.0
    assert K == st_.pub.shape[2]


def test_a_link_measured_far_slower_than_configured_keeps_a_slow_idle_latency() -> None:
    # the triangle's 1 Mb/s links: 1,000-byte packets take tau0 = 8 ms (the median over busy
    # links of the M/M/1 service time s / (1 + F s), Kleinrock).  a -> b really runs at
    # 16 kb/s (0.5 s a packet): its rows say so; then its traffic leaves
    t = _tri()
    eng = Engine(t, EngineSettings(mode="split"))
    st = eng._split
    ix = t.index
    ab, bc, ac = t.link("a", "b"), t.link("b", "c"), t.link("a", "c")
    j_ab = int(t.slot_of[ix["a"], ix["b"]])

    def rows(link: int, m: int, s: float) -> HopBatch:   # m rows of sojourn s beyond propagation
        x, y = int(t.src[link]), int(t.dst[link])
        d = next(v for v in range(3) if v not in (x, y))
        return HopBatch.of([x] * m, [y] * m, [d] * m, [float(t.delay_s[link]) + s] * m)

    now = 0.0
    for _ in range(60):           # 6 s: the rates' exponential means (1 s) are at 99.8%
        now += 0.1
        # 1 row/decision on the slow link is 10 rows/s: F = 10, s = 0.5 -> 0.5 / 6 = 83 ms
        for link, m, s in ((bc, 10, 0.008 / (1 - 100 * 0.008)), (ac, 10, 0.008 / (1 - 100 * 0.008)),
                           (ab, 1, 0.5)):
            eng.observe(rows(link, m, s), now)
        eng.decide(now)
    tau0 = 0.008
    _, _, _, tau, got0 = st._measured(now, 1.0)
    # (rows come in steps of 0.1 s, so the decayed count just after a step is 10 / (1 - e^-0.1)
    # = 10.5 per 0.1 s, not 10: hence 5%)
    assert got0[ix["b"], int(t.slot_of[ix["b"], ix["c"]])] == pytest.approx(tau0, rel=0.05)
    assert st.slow_tau[ix["a"], j_ab] == pytest.approx(0.5 / (1 + 10 * 0.5), rel=0.05)   # 83 ms > 8 x 8 ms
    busy_figure = float(st.slow_tau[ix["a"], j_ab])
    # a -> b's traffic leaves; 3 s later its idle latency is the remembered figure fading
    # (time constant SLOW_MEMORY_S, linear in service time), not propagation + 8 ms
    for _ in range(30):
        now += 0.1
        for link in (bc, ac):
            eng.observe(rows(link, 10, 0.008 / (1 - 100 * 0.008)), now)
        eng.decide(now)
    # while its decayed row count was still >= SLOW_ROWS the figure kept being measured,
    # growing as the rate decayed under the same mean latency (at most 1/F: 0.25 s at 4
    # rows a second); since then it is remembered
    slow, when = float(st.slow_tau[ix["a"], j_ab]), float(st.slow_t[ix["a"], j_ab])
    assert busy_figure * 0.999 <= slow <= 0.25 and when < now - 1.5
    L, _, taus = st.link_estimates_tau(now, 1.0, 2.0)
    tau0 = float(st._measured(now, 1.0)[4][ix["a"], j_ab])                # 8 ms (+-5%)
    fade = math.exp(-(now - when) / S.SLOW_MEMORY_S)
    want_tau = fade * slow + (1 - fade) * tau0
    assert taus[ix["a"], j_ab] == pytest.approx(want_tau, rel=1e-6)
    assert L[ix["a"], j_ab] > float(t.delay_s[ab]) + 0.04                  # without: 1 ms + 8 ms
    # a state saved before the memory existed restores with none
    saved = st.export()
    del saved["slow_tau"], saved["slow_t"]
    st.restore(saved)
    assert not st.slow_tau.any()
    assert st.link_estimates_tau(now, 1.0, 2.0)[2][ix["a"], j_ab] == tau0


def test_split_rates_compiled_equal_reference_rows_at_one_time() -> None:
    # the link and key rate cells fed on the compiled path (split_observe_prep/apply) and
    # the numpy reference: equal to the bit, with cells named many times in a batch and
    # batches sharing one time (a cell stamped now must not be decayed again)
    if not kernels.available():
        pytest.skip("routerd.core._kernels is not built")
    from conftest import ring_with_chords
    t = ring_with_chords(40, 30, seed=5)
    rng = np.random.default_rng(4)
    a = Engine(t, EngineSettings(mode="split", kernels="compiled"))
    b = Engine(t, EngineSettings(mode="split", kernels="reference"))
    for now in (0.5, 0.5, 0.9, 2.0, 2.0, 2.0, 7.5):
        hb = _random_hops(t, rng, 300)
        a.observe(hb, now)
        b.observe(hb, now)
        sa, sb = a._split, b._split
        assert sa is not None and sb is not None
        for name in ("lk_cnt", "lk_sum", "lk_t", "key_cnt", "key_t"):
            assert np.array_equal(getattr(sa, name), getattr(sb, name)), name
        assert (sa.last_obs, sa.last_now, sa.started) == (sb.last_obs, sb.last_now, sb.started)


# ---- bounded decisions (engine.split.destinations_per_decision) ------------------------------
def _split_engine(t: T.Topology, per: int, **kw: object) -> Engine:
    return Engine(t, EngineSettings(mode="split", split_per_decision=per, **kw))  # type: ignore[arg-type]


def test_blocks_take_every_destination_in_turn_each_stepped_by_its_own_time(
        small_ring: T.Topology, monkeypatch: pytest.MonkeyPatch) -> None:
    # n destinations, 3 a decision: each decision takes the next 3 cyclically; a
    # destination's step covers the observed time since its own last step (the step
    # scales with dt, so a destination taken every k decisions moves k times as far at a
    # time): eta of a destination = step * dt_d / window
    t = small_ring
    n = t.n
    per = 3
    seen: list[tuple[list[int], list[float]]] = []
    for name in ("_decide_compiled", "_decide_reference"):
        f = getattr(S, name)

        def spy(*a: object, _f: object = f) -> object:
            eta, ds = a[-4], a[-1]
            seen.append(([int(d) for d in ds], [float(eta[d]) for d in ds]))   # type: ignore[index]
            return _f(*a)                                                       # type: ignore[operator]
        monkeypatch.setattr(S, name, spy)
    eng = _split_engine(t, per, split_boost=1.0)
    rng = np.random.default_rng(4)
    times = [0.05 * (i + 1) for i in range(2 * n)]
    eng.observe(_random_hops(t, rng, 50), 0.0)                   # the step clock starts at 0
    last = {d: 0.0 for d in range(n)}
    for i, now in enumerate(times):
        eng.observe(_random_hops(t, rng, 50), now)
        eng.decide(now)
        ds, etas = seen[-1]
        want = sorted({(per * i + k) % n for k in range(per)})
        assert ds == want
        for d, eta in zip(ds, etas):
            # step 1, window 1 s, no boost: eta is the time since d's last step
            assert eta == pytest.approx(min(now - last[d], 1.0), abs=1e-12)
            last[d] = now
    # every destination was taken, and each one's clock is its last step's time
    assert np.allclose(eng._split.dclock, [last[d] for d in range(n)])


def test_blocks_are_the_whole_decision_when_per_covers_every_destination(small_ring: T.Topology) -> None:
    # per >= n is per = 0: the same state to the bit
    t = small_ring
    rng = np.random.default_rng(8)
    a, b = _split_engine(t, 0), _split_engine(t, t.n)
    for i in range(6):
        hb = _random_hops(t, rng, 120)
        now = 0.07 * (i + 1)
        a.observe(hb, now)
        b.observe(hb, now)
        assert a.decide(now) == b.decide(now)
        assert a.same_state(b)


def test_a_dead_link_is_left_at_the_next_decision_whatever_the_turn(small_ring: T.Topology) -> None:
    # one destination a decision: a link goes down; at the very next decision no key of
    # any destination keeps a published share on it (the due marks), though the turn
    # would reach most of them only later
    t = small_ring
    rng = np.random.default_rng(9)
    eng = _split_engine(t, 1)
    for i in range(3 * t.n):
        now = 0.05 * (i + 1)
        eng.observe(_random_hops(t, rng, 80), now)
        eng.decide(now)
    st_ = eng._split
    # the link carrying the most published shares
    x, j = np.unravel_index(np.argmax((st_.pub > 0).sum(axis=1)), st_.lk_cnt.shape)
    using = np.flatnonzero(st_.pub[x, :, j] > 0)
    assert using.size >= 2
    eng.set_link(int(x), int(eng._slots[x, j]), False, now + 0.01)
    eng.decide(now + 0.02)
    assert not (st_.pub[x, :, j] > 0).any()
    assert not (st_.w[x, :, j] > 0).any()
    _check_published(eng)


def test_a_healed_partition_is_routed_at_the_next_decision() -> None:
    # a line a - b - c with one destination a decision: cut b - c both ways, let the
    # turn go round, heal it: at the very next decision every key has a route again
    specs = [T.LinkSpec(a, b, 0.001, 1e7, 64, f"{a}{b}") for a, b in
             (("a", "b"), ("b", "a"), ("b", "c"), ("c", "b"))]
    t = T.build("line3", ["a", "b", "c"], specs)
    eng = _split_engine(t, 1)
    rng = np.random.default_rng(2)
    now = 0.0
    for i in range(4):
        now += 0.05
        eng.observe(_random_hops(t, rng, 20), now)
        eng.decide(now)
    eng.set_link(1, 2, False, now)
    eng.set_link(2, 1, False, now)
    for i in range(6):
        now += 0.05
        eng.decide(now)
    assert not eng.weights(0, 2) and not eng.weights(2, 0)           # cut off
    eng.set_link(1, 2, True, now)
    eng.set_link(2, 1, True, now)
    eng.decide(now + 0.05)
    for x in range(3):
        for d in range(3):
            if x != d:
                assert eng.weights(x, d), (x, d)
    _check_published(eng)


def test_a_state_saved_before_blocks_restores_with_every_clock_at_last_now(small_ring: T.Topology) -> None:
    t = small_ring
    rng = np.random.default_rng(6)
    eng = _split_engine(t, 0)
    for i in range(3):
        eng.observe(_random_hops(t, rng, 100), 0.1 * (i + 1))
        eng.decide(0.1 * (i + 1))
    st_ = eng.export_state()
    for k in ("dclock", "due", "rot"):
        del st_["split"][k]
    back = Engine.from_state(t, eng.settings, st_)
    assert back.same_state(eng)
    assert (back._split.dclock == eng._split.last_now).all() and back._split.rot == 0
