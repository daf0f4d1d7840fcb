"""The Poisson source: rate, pair choice (uniform or by demand), sizes, thinning."""
from __future__ import annotations

import math

import numpy as np
import pytest

from routerd.io import scenario
from routerd.sim.traffic import PoissonTraffic


def draw(tr: PoissonTraffic, until: float) -> list[tuple]:
    out = []
    for p in tr.packets():
        if p[0] > until:
            break
        out.append(p)
    return out


def test_poisson_count_pairs_and_fixed_sizes() -> None:
    tr = PoissonTraffic(5, 2000.0, np.random.default_rng(1), packet_bytes=500.0, duration_s=50.0)
    pk = draw(tr, 50.0)
    # Poisson count: mean = variance = rate * T; a 4-sd band
    assert abs(len(pk) - 100000) <= 4 * math.sqrt(100000)
    ts = [p[0] for p in pk]
    assert ts == sorted(ts)
    gaps = np.diff(ts)
    # exponential gaps: coefficient of variation 1 (common practice for a Poisson check)
    assert gaps.std() / gaps.mean() == pytest.approx(1.0, abs=0.02)
    s = np.array([p[1] for p in pk]); d = np.array([p[2] for p in pk])
    assert (s != d).all()
    counts = np.zeros((5, 5))
    np.add.at(counts, (s, d), 1)
    exp = len(pk) / 20
    off = ~np.eye(5, dtype=bool)
    # chi-square with 19 d.o.f.: the 0.999 quantile is 43.8 (standard tables)
    assert ((counts[off] - exp) ** 2 / exp).sum() < 43.8
    assert {p[3] for p in pk} == {4000.0}
    assert all(p[4] // 8 == p[1] * 5 + p[2] for p in pk)  # flows stay within their pair


def test_demand_matrix_and_exponential_sizes() -> None:
    w = np.zeros((3, 3)); w[0, 1] = 3.0; w[2, 0] = 1.0; w[1, 1] = 99.0  # diagonal ignored
    tr = PoissonTraffic(3, 1000.0, np.random.default_rng(2), pair_weights=w, size_dist="exp",
                        packet_bytes=1000.0, duration_s=40.0)
    pk = draw(tr, 40.0)
    pairs = [(p[1], p[2]) for p in pk]
    assert set(pairs) == {(0, 1), (2, 0)}
    share = pairs.count((0, 1)) / len(pairs)
    assert abs(share - 0.75) <= 4 * math.sqrt(0.75 * 0.25 / len(pairs))
    bits = np.array([p[3] for p in pk])
    assert abs(bits.mean() - 8000.0) <= 4 * 8000.0 / math.sqrt(len(bits))
    assert tr.demand_pps()[0, 1] == pytest.approx(750.0)


def test_scenario_thinning_follows_the_load_factor() -> None:
    sc = scenario.from_mapping({"scenario": {"load": [{"step": 3.0, "at_s": 10}]}})
    tr = PoissonTraffic(4, 500.0, np.random.default_rng(3), scenario=sc, duration_s=20.0)
    pk = draw(tr, 20.0)
    before = sum(1 for p in pk if p[0] < 10)
    after = len(pk) - before
    assert abs(before - 5000) <= 4 * math.sqrt(5000)
    assert abs(after - 15000) <= 4 * math.sqrt(15000)
    assert tr.demand_pps().sum() == pytest.approx(500.0 * 2.0)


def test_bad_arguments() -> None:
    with pytest.raises(ValueError):
        PoissonTraffic(1, 10.0, np.random.default_rng(0))
    with pytest.raises(ValueError, match="no traffic"):
        PoissonTraffic(3, 10.0, np.random.default_rng(0), pair_weights=np.eye(3))
