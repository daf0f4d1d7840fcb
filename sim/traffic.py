"""Traffic sources: what packets enter the network, where and when.

Owns: the :class:`TrafficSource` interface the event loop pulls from, and the Poisson
source (network-wide rate, pairs uniform over distinct (source, destination) pairs or in
proportion to a demand matrix, fixed or exponential sizes, load factor over time from a
scenario).  A trace-driven source (the replay shell) implements the same interface.
Must not import: the engine, zmq, prometheus, matplotlib.

Time-varying rates use thinning (Lewis & Shedler, Naval Research Logistics Quarterly 26,
1979): candidates arrive at the peak rate and each is kept with probability
factor(t) / peak, which gives a Poisson process of intensity rate * factor(t).
"""
from __future__ import annotations

from collections.abc import Iterator
from typing import Protocol

import numpy as np

from routerd.io.scenario import Scenario

from .core import PacketTuple

#: packets drawn per numpy block
_BLOCK = 8192


class TrafficSource(Protocol):
    """Anything that yields packets, in non-decreasing time, and says what it offers."""

    def packets(self) -> Iterator[PacketTuple]:
        """Yield (time s, source, destination, bits, flow id) tuples."""
        ...

    def demand_pps(self) -> np.ndarray:
        """(n, n) expected packets/s per pair, averaged over the measured window."""
        ...

    def mean_bits(self) -> float:
        ...


class PoissonTraffic:
    """Poisson injection at ``rate_pps`` (times the scenario's load factor).

    ``pair_weights``: None for uniform over distinct pairs, else an (n, n) matrix of
    non-negative weights (a demand matrix; its diagonal is ignored).  Flow ids are
    ``(src * n + dst) * flows_per_pair + r`` with r uniform in [0, flows_per_pair): a
    flow stays within one pair, and ECMP hashes it.
    """

    def __init__(self, n: int, rate_pps: float, rng: np.random.Generator, *,
                 packet_bytes: float = 1000.0, size_dist: str = "fixed",
                 pair_weights: np.ndarray | None = None, scenario: Scenario | None = None,
                 duration_s: float = float("inf"), warmup_s: float = 0.0,
                 flows_per_pair: int = 8):
        if n < 2:
            raise ValueError("traffic needs at least two nodes")
        if not rate_pps >= 0:
            raise ValueError(f"rate {rate_pps} must be >= 0")
        if size_dist not in ("fixed", "exp"):
            raise ValueError(f"size_dist {size_dist!r} is not fixed or exp")
        if not packet_bytes > 0:
            raise ValueError(f"packet_bytes {packet_bytes} must be > 0")
        self.n = n
        self.rate = float(rate_pps)
        self.rng = rng
        self.bytes = float(packet_bytes)
        self.size_dist = size_dist
        self.scenario = scenario
        self.duration = float(duration_s)
        self.warmup = float(warmup_s)
        self.fpp = int(flows_per_pair)
        if pair_weights is None:
            w = np.ones((n, n))
        else:
            w = np.array(pair_weights, dtype=float)
            if w.shape != (n, n) or not np.all(np.isfinite(w)) or (w < 0).any():
                raise ValueError("pair weights must be an (n, n) matrix of finite values >= 0")
        np.fill_diagonal(w, 0.0)
        tot = w.sum()
        if not tot > 0:
            raise ValueError("the demand matrix has no traffic between distinct nodes")
        self.p = (w / tot).ravel()
        self._cum = np.cumsum(self.p)
        self._cum[-1] = 1.0
        self.uniform = pair_weights is None
        self.peak = scenario.max_factor() if scenario is not None else 1.0

    def mean_bits(self) -> float:
        return self.bytes * 8.0

    def demand_pps(self) -> np.ndarray:
        f = 1.0
        if self.scenario is not None and np.isfinite(self.duration):
            f = self.scenario.mean_factor(self.duration, self.warmup)
        return (self.p * self.rate * f).reshape(self.n, self.n)

    def packets(self) -> Iterator[PacketTuple]:
        rng = self.rng
        n = self.n
        lam = self.rate * self.peak
        if lam <= 0:
            return
        t = 0.0
        fpp = self.fpp
        while t <= self.duration:
            gaps = rng.exponential(1.0 / lam, _BLOCK)
            ts = t + np.cumsum(gaps)
            t = float(ts[-1])
            if self.uniform:
                s = rng.integers(0, n, _BLOCK)
                d = rng.integers(0, n - 1, _BLOCK)
                d = d + (d >= s)
            else:
                pair = np.searchsorted(self._cum, rng.random(_BLOCK), side="right")
                pair = np.minimum(pair, n * n - 1)
                s, d = np.divmod(pair, n)
            if self.size_dist == "fixed":
                bits = np.full(_BLOCK, self.bytes * 8.0)
            else:
                bits = rng.exponential(self.bytes * 8.0, _BLOCK)
            flow = (s * n + d) * fpp + rng.integers(0, fpp, _BLOCK)
            keep = None
            if self.scenario is not None and self.scenario.load:
                keep = rng.random(_BLOCK) * self.peak < self.scenario.factor(ts)
            if keep is not None:
                ts, s, d, bits, flow = ts[keep], s[keep], d[keep], bits[keep], flow[keep]
            yield from zip(ts.tolist(), s.tolist(), d.tolist(), bits.tolist(), flow.tolist())
