"""Summary statistics of delivery times: the one implementation every shell reports with.

Owns: the quantile rule, the batch-means confidence interval and the set of delivery
figures a summary carries (``mean_delivery_s``, ``mean_delivery_ci95_s``, ``p50/p95/p99``,
``max_delivery_s``), so the simulator (:func:`routerd.sim.run.reduce`), the lab
(:func:`routerd.tools.lab.summarise`) and the demo (its live line and partial results) cannot
drift apart.

Must not import: anything but the standard library (pure; no numpy needed for this).
"""
from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

__all__ = ["BATCHES", "T975_19", "DeliveryStats", "batch_means_ci95", "delivery_stats",
           "percentile"]

#: Student's t 0.975 quantile for 19 degrees of freedom (standard t tables), used for the
#: 95% confidence interval from 20 batch means.
T975_19 = 2.093
#: Number of batch means (and the CI needs at least ten values per batch).
BATCHES = 20


def percentile(sorted_vals: Sequence[float], q: float) -> float:
    """The q-quantile (0..1) of sorted values by linear interpolation (NaN when empty)."""
    m = len(sorted_vals)
    if m == 0:
        return math.nan
    pos = q * (m - 1)
    lo = int(math.floor(pos))
    hi = min(lo + 1, m - 1)
    w = pos - lo
    return float(sorted_vals[lo] * (1 - w) + sorted_vals[hi] * w)


def batch_means_ci95(values: Sequence[float]) -> float:
    """Half-width of a 95% confidence interval for the mean of a correlated series by batch
    means (Law & Kelton, Simulation Modeling and Analysis, ch. 9): 20 batches of
    consecutive values, a t-based interval.  NaN below 200 values."""
    m = len(values)
    if m < BATCHES * 10:
        return math.nan
    bs = m // BATCHES
    means = [sum(values[i * bs:(i + 1) * bs]) / bs for i in range(BATCHES)]
    mu = sum(means) / BATCHES
    var = sum((x - mu) ** 2 for x in means) / (BATCHES - 1)
    return T975_19 * math.sqrt(var / BATCHES)


@dataclass(frozen=True, slots=True)
class DeliveryStats:
    """Delivery-time figures of one set of packets (seconds; NaN where none)."""

    count: int
    mean: float
    ci95: float
    p50: float
    p95: float
    p99: float
    max: float

    def summary_keys(self) -> dict[str, float]:
        """The figures under the summary's key names, in the summary's order."""
        return {"mean_delivery_s": self.mean, "mean_delivery_ci95_s": self.ci95,
                "p50_delivery_s": self.p50, "p95_delivery_s": self.p95,
                "p99_delivery_s": self.p99, "max_delivery_s": self.max}


def delivery_stats(values: Sequence[float], *, ci: bool = True) -> DeliveryStats:
    """Figures of delivery times ``values`` in delivery order (the order matters for the
    batch-means interval only; ``ci=False`` skips it, e.g. for a one-second window)."""
    m = len(values)
    srt = sorted(values)
    return DeliveryStats(
        count=m,
        mean=float(sum(values) / m) if m else math.nan,
        ci95=batch_means_ci95(values) if ci else math.nan,
        p50=percentile(srt, 0.50), p95=percentile(srt, 0.95), p99=percentile(srt, 0.99),
        max=float(srt[-1]) if srt else math.nan)
