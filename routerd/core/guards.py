"""Plausibility guards: which decoded hop rows may reach the engine, and how fast a reporter may send.

Owns the physical and statistical checks applied to a decoded batch *before*
:meth:`routerd.core.engine.Engine.observe` (the service applies them; the simulator and replay
can apply the same object to the same rows), the per-reporter token buckets, and the
fixed set of reasons they count under.

Pure: numpy, the project's topology model and the compiled kernels' selector
(:mod:`routerd.core.kernels`: the screen in one pass) only — no sockets, files, clocks, metrics.
Time comes in as ``now`` (seconds, any monotonic origin).  Must not import the engine's
state, zmq, prometheus, the service or the simulator.

Theory of operation
-------------------
A hop row ``(x, y, d, l, e)`` says x handed a packet for d to neighbour y, the hop took
``l`` seconds, and y's own remaining estimate was ``e`` (NaN: absent).  Checks, in this
order; the first one a row breaks is its reason (:data:`REASONS`):

(NaN, infinite or negative values are left to the engine, which refuses them as
``bad_latency`` / ``bad_estimate`` — one reason per fault, counted once.)

``below_floor``
    ``l < floor_fraction * delay_s(x → y)``: faster than light in the link, as the topology
    gives its propagation delay; or ``e < floor_fraction * D(y, d)`` with ``D`` the
    delay-shortest distance — no path from y to d is that fast.  A reporter that claims a
    near-zero latency to attract traffic is stopped here.
``above_ceiling``
    ``l`` or ``e`` above ``ceiling_s``.
``jump_held``
    (``jump_action = "hold"``) ``l`` lies outside ``[ref / f, ref * f]`` for the link's
    reference latency ``ref`` and ``f = jump_factor``.  The row is held back until
    ``jump_confirm`` out-of-band samples on the same side have been seen since the link's
    last in-band sample (counted in row order, across batches); from the confirming
    sample on, that side's samples of the batch are let through and the reference jumps
    to their mean — a genuine level shift (a link that became
    congested) gets through after ``jump_confirm`` samples, one wild sample never does.
    With ``jump_action = "clip"`` such a row is let through with ``l`` clipped to the band
    edge instead (counted as ``clipped``, not a rejection).

The reference of a link starts at its propagation delay (when positive) and follows the
accepted samples as an exponentially weighted mean with weight ``jump_smoothing`` per
sample; within one batch the band is the one at the start of the batch, and the ``k``
accepted samples of a link move the reference as ``ref ← (1-w)^k ref + (1-(1-w)^k) mean``.

Rate limits: a token bucket per reporter for batches and one for rows (rate per second,
burst capacity).  A batch that finds either bucket short is refused as a whole
(``rate_limited``) and consumes nothing, so a reporter that slows down is served again at
once.  The bucket table holds at most ``max_reporters`` entries (least recently seen
forgotten first): memory stays bounded whatever names arrive.

Guard state (references, pending counts, buckets) is advisory and not journaled: the
journal records what the engine applied, after the guards, so a replay needs no guards.
"""
from __future__ import annotations

import math
from collections import OrderedDict
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from . import kernels as _kern
from .topology import Topology

#: ``Guards(kernels=...)`` left out: the compiled kernels when built, else the reference.
_AUTO: Any = object()

#: Row rejection reasons added by the guards (a fixed tuple: metrics labels use it).
REASONS: tuple[str, ...] = ("below_floor", "above_ceiling", "jump_held")
#: Whole-batch refusal code of the rate limiter.
RATE_LIMITED = "rate_limited"
JUMP_ACTIONS: tuple[str, ...] = ("clip", "hold")
#: Relative slack of the propagation floor: rounding, not physics.
FLOOR_SLACK = 1e-9


@dataclass(frozen=True, slots=True, kw_only=True)
class GuardSettings:
    """Every guard tunable; 0 switches a limit off where the field says so.  Misuse raises
    ValueError (user-facing checks are :mod:`routerd.io.config`'s)."""

    floor_fraction: float = 1.0          # 0: no propagation floor
    ceiling_s: float = 60.0              # inf: no ceiling
    jump_factor: float = 0.0             # 0: no jump guard; else > 1
    jump_action: str = "hold"
    jump_confirm: int = 3
    jump_smoothing: float = 0.2
    rate_batches_per_s: float = 0.0      # 0: unlimited
    rate_burst_batches: float = 50.0
    rate_rows_per_s: float = 0.0         # 0: unlimited
    rate_burst_rows: float = 1_000_000.0
    max_reporters: int = 4096

    def __post_init__(self) -> None:
        if not (0.0 <= self.floor_fraction <= 1.0):
            raise ValueError(f"floor_fraction {self.floor_fraction} is outside [0, 1]")
        if not self.ceiling_s > 0:
            raise ValueError(f"ceiling_s {self.ceiling_s} must be positive")
        if self.jump_factor != 0 and not self.jump_factor > 1:
            raise ValueError(f"jump_factor {self.jump_factor} must be 0 (off) or above 1")
        if self.jump_action not in JUMP_ACTIONS:
            raise ValueError(f"jump_action {self.jump_action!r} is not one of {JUMP_ACTIONS}")
        if self.jump_confirm < 1:
            raise ValueError(f"jump_confirm {self.jump_confirm} is below 1")
        if not (0.0 < self.jump_smoothing <= 1.0):
            raise ValueError(f"jump_smoothing {self.jump_smoothing} is outside (0, 1]")
        for k in ("rate_batches_per_s", "rate_rows_per_s"):
            if getattr(self, k) < 0:
                raise ValueError(f"{k} {getattr(self, k)} is negative")
        for k in ("rate_burst_batches", "rate_burst_rows"):
            if not getattr(self, k) >= 1:
                raise ValueError(f"{k} {getattr(self, k)} is below 1")
        if self.max_reporters < 1:
            raise ValueError(f"max_reporters {self.max_reporters} is below 1")

    @classmethod
    def from_config(cls, cfg: Any) -> GuardSettings:
        """From a :class:`routerd.io.config.Config` (the ``guards.*`` keys)."""
        ceil = cfg["guards.ceiling_s"]
        return cls(floor_fraction=cfg["guards.floor_fraction"],
                   ceiling_s=math.inf if ceil == 0 else ceil,
                   jump_factor=cfg["guards.jump.factor"], jump_action=cfg["guards.jump.action"],
                   jump_confirm=cfg["guards.jump.confirm"],
                   jump_smoothing=cfg["guards.jump.smoothing"],
                   rate_batches_per_s=cfg["guards.rate.batches_per_s"],
                   rate_burst_batches=cfg["guards.rate.burst_batches"],
                   rate_rows_per_s=cfg["guards.rate.rows_per_s"],
                   rate_burst_rows=cfg["guards.rate.burst_rows"],
                   max_reporters=cfg["guards.rate.max_reporters"])


@dataclass(frozen=True, slots=True)
class Checked:
    """What the guards made of a batch's hop rows.

    ``keep`` — indices (into the batch) of the rows that may go to the engine, in order;
    ``latency`` — their latencies (clipped where ``jump_action`` is ``clip``);
    ``rejected`` — ``(index, reason)`` of the others, in index order;
    ``clipped`` — how many kept rows had their latency clipped."""

    keep: np.ndarray
    latency: np.ndarray
    rejected: tuple[tuple[int, str], ...]
    clipped: int = 0


_ARANGE = np.arange(0, dtype=np.int64)


def row_numbers(m: int) -> np.ndarray:
    """``np.arange(m)`` (int64) as a read-only view of one cached array: a clean batch's
    ``keep`` here, a decoded batch's row numbers in :mod:`routerd.io.wire`.  A cache of a
    constant, not state: every caller gets the same values whatever came before."""
    global _ARANGE
    if _ARANGE.shape[0] < m:
        grown = np.arange(max(m, 4096), dtype=np.int64)
        grown.flags.writeable = False
        _ARANGE = grown
    return _ARANGE[:m]


@dataclass
class _Bucket:
    batches: float
    rows: float
    at: float


@dataclass
class GuardStats:
    """Counts since start, by reason (rejections), plus clipped rows and refused batches."""

    rejected: dict[str, int] = field(default_factory=lambda: dict.fromkeys(REASONS, 0))
    clipped: int = 0
    rate_limited_batches: int = 0
    rate_limited_rows: int = 0


class Guards:
    """The guards of one topology.  :meth:`check` filters hop rows, :meth:`admit` applies
    the rate limits; both take ``now`` from the caller."""

    def __init__(self, topo: Topology, settings: GuardSettings | None = None, *,
                 kernels: Any = _AUTO):
        self.topo = topo
        #: the compiled module whose ``guards_clean`` runs the screen (:meth:`_clean`) in
        #: one pass, or None for the numpy reference (:func:`routerd.core.kernels.select`)
        self.kernels = _kern.select("auto") if kernels is _AUTO else kernels
        self.settings = settings or GuardSettings()
        n = topo.n
        self._n = n
        # link index per (x, y), -1 where y is not a neighbour of x
        lk = np.full((n, n), -1, dtype=np.int64)
        if topo.n_links:
            lk[np.asarray(topo.src, dtype=np.int64), np.asarray(topo.dst, dtype=np.int64)] = \
                np.arange(topo.n_links)
        self._link = lk
        self._delay = np.asarray(topo.delay_s, dtype=np.float64)
        self._dist = np.asarray(topo.shortest_delays(), dtype=np.float64)
        self._ref = np.where(self._delay > 0, self._delay, np.nan)
        self._pending = np.zeros((max(topo.n_links, 1), 2), dtype=np.int64)   # side 0 low, 1 high
        self._buckets: OrderedDict[str, _Bucket] = OrderedDict()
        self.stats = GuardStats()
        self._lk_flat = lk.ravel()
        self._floors()

    def _floors(self) -> None:
        """The screen :meth:`check` runs first: per link (plus -inf at index -1, where a
        row's via is no neighbour) the latency floor, per (via, destination) the estimate
        floor, both flat.  A batch none of whose rows reaches a floor or the ceiling needs
        nothing more (the common case: a few array passes instead of the full check)."""
        s = self.settings
        f_eff = s.floor_fraction * (1.0 - FLOOR_SLACK) if s.floor_fraction > 0 else 0.0
        with np.errstate(invalid="ignore"):
            fl = np.append(f_eff * self._delay, -np.inf) if f_eff else \
                np.full(self._delay.shape[0] + 1, -np.inf)
            fd = (f_eff * self._dist).ravel() if f_eff else np.full(self._n * self._n, -np.inf)
        self._floor_link = fl
        self._floor_dist = np.where(np.isnan(fd), -np.inf, fd)

    def reconfigure(self, settings: GuardSettings) -> None:
        self.settings = settings
        self._floors()
        while len(self._buckets) > settings.max_reporters:
            self._buckets.popitem(last=False)

    # ---- rate limits ------------------------------------------------------------------
    def admit(self, reporter: str, rows: int, now: float) -> bool:
        """True when ``reporter`` may send a batch of ``rows`` rows at ``now`` (the tokens are
        taken); False: refuse the batch as :data:`RATE_LIMITED` (nothing is taken)."""
        s = self.settings
        if s.rate_batches_per_s <= 0 and s.rate_rows_per_s <= 0:
            return True
        b = self._buckets.get(reporter)
        if b is None:
            b = self._buckets[reporter] = _Bucket(s.rate_burst_batches, s.rate_burst_rows, now)
            while len(self._buckets) > s.max_reporters:
                self._buckets.popitem(last=False)
        else:
            self._buckets.move_to_end(reporter)
            dt = max(0.0, now - b.at)
            b.batches = min(s.rate_burst_batches, b.batches + dt * s.rate_batches_per_s)
            b.rows = min(s.rate_burst_rows, b.rows + dt * s.rate_rows_per_s)
            b.at = max(b.at, now)
        ok_b = s.rate_batches_per_s <= 0 or b.batches >= 1.0
        # a batch larger than the whole row burst could never pass: it passes on a full bucket
        need = min(float(rows), s.rate_burst_rows)
        ok_r = s.rate_rows_per_s <= 0 or b.rows >= need
        if not (ok_b and ok_r):
            self.stats.rate_limited_batches += 1
            self.stats.rate_limited_rows += int(rows)
            return False
        if s.rate_batches_per_s > 0:
            b.batches -= 1.0
        if s.rate_rows_per_s > 0:
            b.rows -= need
        return True

    @property
    def reporters_tracked(self) -> int:
        return len(self._buckets)

    # ---- hop rows -----------------------------------------------------------------------
    def check(self, src: np.ndarray, via: np.ndarray, dst: np.ndarray, latency: np.ndarray,
              estimate: np.ndarray) -> Checked:
        """Apply the plausibility guards to hop rows given as columns (indices, seconds;
        ``estimate`` NaN = absent).  Rows with indices out of range or a ``via`` that is not
        a neighbour are passed through untouched: the engine names those."""
        s = self.settings
        src = np.asarray(src, dtype=np.int64)
        via = np.asarray(via, dtype=np.int64)
        dst = np.asarray(dst, dtype=np.int64)
        lat = np.asarray(latency, dtype=np.float64)
        est = np.asarray(estimate, dtype=np.float64)
        m = src.shape[0]
        if m and s.jump_factor <= 0 and self._clean(src, via, dst, lat, est):
            return Checked(row_numbers(m), lat, ())
        code = np.full(m, -1, dtype=np.int64)
        if m == 0:
            return Checked(np.empty(0, np.int64), np.empty(0), ())
        n = self._n
        ok_ix = (src >= 0) & (src < n) & (via >= 0) & (via < n) & (dst >= 0) & (dst < n)
        link = np.full(m, -1, dtype=np.int64)
        link[ok_ix] = self._link[src[ok_ix], via[ok_ix]]
        known = link >= 0

        def mark(mask: np.ndarray, reason: int) -> None:
            code[mask & (code == -1)] = reason

        # values the engine refuses itself (NaN, inf, negative) are its to name
        engine_bad = ~np.isfinite(lat) | (lat < 0) | np.isinf(est) | (est < 0)
        code[engine_bad] = -2
        with np.errstate(invalid="ignore"):
            if s.floor_fraction > 0:
                # FLOOR_SLACK: an estimate the engine built from values at the floor may
                # round a few ulps below it (a convex combination in floating point)
                f_eff = s.floor_fraction * (1.0 - FLOOR_SLACK)
                floor_l = np.zeros(m)
                floor_l[known] = f_eff * self._delay[link[known]]
                low = known & (lat < floor_l)
                has_e = known & ~np.isnan(est) & (via != dst)
                floor_e = np.zeros(m)
                floor_e[has_e] = f_eff * self._dist[via[has_e], dst[has_e]]
                low |= has_e & (est < floor_e)
                mark(low, 0)
            mark((lat > s.ceiling_s) | (est > s.ceiling_s), 1)
        out_lat = lat.copy()
        clipped = 0
        if s.jump_factor > 0:
            clipped = self._jumps(code, link, known, out_lat)
        keep = np.flatnonzero(code < 0)
        bad = np.flatnonzero(code >= 0)
        code[code == -2] = -1
        rejected = tuple((int(i), REASONS[int(code[i])]) for i in bad)
        for _, r in rejected:
            self.stats.rejected[r] += 1
        self.stats.clipped += clipped
        return Checked(keep, out_lat[keep], rejected, clipped)

    def _clean(self, src: np.ndarray, via: np.ndarray, dst: np.ndarray, lat: np.ndarray,
               est: np.ndarray) -> bool:
        """True when no row can be marked by the floor or the ceiling (indices in range; a
        NaN compares false everywhere, and a row the engine refuses is never the guards'):
        then the full check would keep every row as it is.  False: run the full check."""
        n = self._n
        k = self.kernels
        if k is not None and src.flags.c_contiguous and via.flags.c_contiguous \
                and dst.flags.c_contiguous and lat.flags.c_contiguous and est.flags.c_contiguous:
            return bool(k.guards_clean(src, via, dst, lat, est, n, self._lk_flat,
                                       self._floor_link, self._floor_dist,
                                       float(self.settings.ceiling_s)))
        if max(src.view(np.uint64).max(), via.view(np.uint64).max(),
               dst.view(np.uint64).max()) >= n:     # read as unsigned, a negative is huge
            return False
        link = self._lk_flat[src * n + via]
        ceil = self.settings.ceiling_s
        flag = lat < self._floor_link[link]
        flag |= lat > ceil
        flag |= est > ceil
        # an estimate's floor holds only where via is x's neighbour (link >= 0)
        flag |= (est < self._floor_dist[via * n + dst]) & (link >= 0)
        return not flag.any()

    def _jumps(self, code: np.ndarray, link: np.ndarray, known: np.ndarray,
               out_lat: np.ndarray) -> int:
        """The jump guard (module docstring): marks held rows in ``code`` (reason 2), clips
        ``out_lat`` in clip mode, updates references and pending counts.  Rows marked -2 (the
        engine's to refuse) are not looked at.  Returns rows clipped."""
        s = self.settings
        f = s.jump_factor
        cand = np.flatnonzero(known & (code == -1))
        if cand.size == 0:
            return 0
        lk = link[cand]
        ref = self._ref[lk]
        lat = out_lat[cand]
        has_ref = ~np.isnan(ref)
        with np.errstate(invalid="ignore"):
            lo_b = np.where(has_ref, ref / f, -np.inf)
            hi_b = np.where(has_ref, ref * f, np.inf)
        side = np.where(lat < lo_b, 0, np.where(lat > hi_b, 1, -1))
        clipped = 0
        confirmed = np.zeros(cand.size, dtype=bool)
        if s.jump_action == "clip":
            out = side >= 0
            clipped = int(out.sum())
            lat = np.clip(lat, lo_b, hi_b)
            out_lat[cand] = lat
        else:
            # links with in-band samples only: their pending counts start over
            odd = np.unique(lk[side >= 0])
            self._pending[np.setdiff1d(np.unique(lk[side < 0]), odd)] = 0
            # in row order per link (out-of-band rows are rare: a loop over their links only)
            for L in odd.tolist():
                p = self._pending[L].copy()
                shifted = [False, False]
                for i in np.flatnonzero(lk == L).tolist():
                    sd = int(side[i])
                    if sd < 0:
                        p[:] = 0
                        continue
                    p[sd] += 1
                    if shifted[sd] or p[sd] >= s.jump_confirm:
                        confirmed[i] = True
                        shifted[sd] = True
                    else:
                        code[cand[i]] = 2
                self._pending[L] = 0 if any(shifted) else p
        # references and pending counts, per link
        w = s.jump_smoothing
        inband = side < 0
        if s.jump_action == "clip":
            inband = np.ones(cand.size, dtype=bool)     # every clipped row is let through
        for L in np.unique(lk).tolist():
            on = lk == L
            c = on & confirmed
            if c.any():
                self._ref[L] = float(lat[c].mean())
                continue
            ib = on & inband
            k = int(ib.sum())
            if k:
                mean = float(lat[ib].mean())
                r = self._ref[L]
                a = (1.0 - w) ** k
                self._ref[L] = mean if math.isnan(r) else a * r + (1.0 - a) * mean
        return clipped

    def reference_s(self, link: int) -> float:
        """The jump guard's current reference latency of ``link`` (NaN: none yet)."""
        return float(self._ref[link])
