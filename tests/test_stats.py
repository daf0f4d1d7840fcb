"""routerd.sim.stats: the one implementation of the delivery figures (simulator, lab, demo)."""
from __future__ import annotations

import math

import numpy as np
import pytest

from routerd.sim.stats import BATCHES, T975_19, batch_means_ci95, delivery_stats, percentile


def test_percentile_matches_numpy_linear() -> None:
    # reference: numpy.quantile's default ("linear", Hyndman & Fan 1996 definition 7)
    rng = np.random.default_rng(3)
    for m in (1, 2, 3, 10, 101):
        v = np.sort(rng.exponential(0.01, m))
        for q in (0.0, 0.25, 0.5, 0.95, 0.99, 1.0):
            assert percentile(v.tolist(), q) == pytest.approx(float(np.quantile(v, q)), rel=1e-12)
    assert math.isnan(percentile([], 0.5))


def test_batch_means_by_hand() -> None:
    assert math.isnan(batch_means_ci95([1.0] * (BATCHES * 10 - 1)))     # too few values
    # 20 batches of 10: batch i holds the value i, so the batch means are 0..19
    vals = [float(i) for i in range(BATCHES) for _ in range(10)]
    means = np.arange(BATCHES, dtype=float)
    want = T975_19 * math.sqrt(means.var(ddof=1) / BATCHES)
    assert batch_means_ci95(vals) == pytest.approx(want, rel=1e-12)
    # values beyond the last full batch are left out: 205 values use batches of 10
    assert batch_means_ci95(vals + [1e9] * 5) == pytest.approx(want, rel=1e-12)
    assert batch_means_ci95([0.5] * 400) == 0.0


def test_delivery_stats_and_summary_keys() -> None:
    vals = [0.3, 0.1, 0.2, 0.4]
    ds = delivery_stats(vals)
    assert (ds.count, ds.mean, ds.max) == (4, pytest.approx(0.25), 0.4)
    assert ds.p50 == pytest.approx(0.25) and math.isnan(ds.ci95)
    assert list(ds.summary_keys()) == ["mean_delivery_s", "mean_delivery_ci95_s", "p50_delivery_s",
                                       "p95_delivery_s", "p99_delivery_s", "max_delivery_s"]
    empty = delivery_stats([])
    assert empty.count == 0 and all(math.isnan(v) for v in empty.summary_keys().values())
    many = [float(i % 7) for i in range(500)]
    assert not math.isnan(delivery_stats(many).ci95)
    assert math.isnan(delivery_stats(many, ci=False).ci95)
