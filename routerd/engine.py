"""The learning engine: per-destination Q-routing with bounded exploration and loop-free tables.

Pure: imports numpy and the project's own pure modules only — no sockets, files, clocks,
YAML or metrics.  Time comes in as ``now`` arguments; nothing here reads a clock.  The
daemon, the simulator and replay all drive this one class, so for the same observations
they get the same tables.

Theory of operation
-------------------
State.  ``Q[x, d, j]`` is node x's estimate of the time (s) for a packet bound for d to
arrive when handed to x's j-th neighbour (``topology.slots[x, j]``); absent slots are
never read.  ``N[x, d, j]`` counts updates of each entry (for per-entry step sizes);
``td[x, d]`` is a moving average of |TD error| per (node, destination).

Update (Q-routing; Boyan & Littman, NIPS 6, 1994).  A hop observation says x handed a
packet for d to neighbour y and the hop took l seconds (queueing + transmission +
propagation), optionally with y's own remaining estimate e::

    target = l + (0                        if y == d
                  e                        if e is given
                  min_z live Q[y, d, z]    otherwise)
    Q[x, d, y] += alpha * (target - Q[x, d, y])        then clipped to [0, ceiling]

Step sizes: constant alpha, or per entry alpha_n = max(floor, c / n^kappa) with kappa in
(1/2, 1], n the entry's update count (Robbins–Monro: sum alpha = inf, sum alpha^2 < inf,
which hold when floor = 0).

Batches.  :meth:`Engine.observe` applies any number of rows with *exactly* the result of
applying them one by one, in order.  It works in rounds: a round applies, all at once,
every remaining row that no earlier remaining row can influence — no earlier row writes
the (node, destination) key it reads or writes, and no earlier *deferred* row reads the
key it writes.  Rows applied in one round commute with every row deferred past them, so
the order-dependent result is preserved.  Typical batches need a handful of rounds;
small batches (and the tail of pathological ones) take a scalar path instead.

Decisions (:meth:`Engine.decide`) are recomputed for destinations touched since the last
call:

1. greedy: the live slot with the lowest estimate;
2. hysteresis: the incumbent stays unless the challenger beats it by the relative margin
   (``Q_new < Q_inc * (1 - margin)``), or the incumbent's link went down;
3. loop freedom: the greedy graph per destination is checked for cycles (see
   :mod:`routerd.loops`); every node on a cycle falls back, first to its previous
   choice, then to the delay-shortest path over live links, until no cycle remains.  The
   fallback ladder ends in a shortest-path tree, which cannot loop, so this terminates.
   Each node moved off a looping choice counts as one loop prevented;
4. exploration: each (x, d) gets a share eps in [min_rate, max_rate] (never above the
   global cap) from how settled its estimates are — recent relative TD error, or visit
   counts.  The share is split evenly over *alternate* next hops y whose potential
   (hops to d in the greedy tree, then node index) is strictly lower than x's.  Greedy
   edges lower the potential too, so every edge with a positive weight descends a strict
   order: the weighted forwarding graph is acyclic, exploration included.  The greedy hop
   keeps 1 - eps >= 1 - max_rate; with no alternate it keeps 1.

Link state.  A link marked down leaves every decision at once (its slot is not live), and
its estimates are set to the ceiling, so no count-to-infinity can build on them.  Marked
up, it is re-admitted with a fresh estimate: the link's delay plus the neighbour's current
best, with its update counts reset so it learns fast.
"""
from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, fields, replace
from typing import Any

import numpy as np

from . import loops as _loops
from .topology import Topology

# Reasons an observation row is rejected.  A fixed set: metrics label on it.
REJECT_REASONS = (
    "unknown_node",    # an index outside the node list
    "not_neighbour",   # via is not a neighbour of from
    "at_destination",  # from == dst: a node does not forward packets for itself
    "bad_latency",     # NaN, infinite or negative latency
    "bad_estimate",    # infinite or negative estimate
    "link_down",       # the hop used a link that is marked down
)
_R = {r: i for i, r in enumerate(REJECT_REASONS)}
_OK = -1

# Below this many rows the scalar path is faster than the vectorised rounds.
SCALAR_BATCH = 24


@dataclass(frozen=True, slots=True, kw_only=True)
class EngineSettings:
    """Every engine tunable.  Checked here (API misuse raises ValueError); user-facing
    checking with file and key path lives in :mod:`routerd.config`."""

    step_mode: str = "decaying"
    alpha: float = 0.5
    c: float = 1.0
    kappa: float = 0.6
    floor: float = 0.05
    initial_mode: str = "shortest"
    initial_value_s: float = 0.1
    ceiling_s: float = 10.0
    margin: float = 0.05
    explore_basis: str = "td"
    explore_min: float = 0.0
    explore_max: float = 0.1
    explore_cap: float = 0.2
    td_ref: float = 0.2
    td_smoothing: float = 0.1
    visits_half: float = 50.0

    def __post_init__(self) -> None:
        bad: list[str] = []
        if self.step_mode not in ("constant", "decaying"):
            bad.append(f"step_mode {self.step_mode!r} is not constant or decaying")
        if not 0 < self.alpha <= 1:
            bad.append(f"alpha {self.alpha} is not in (0, 1]")
        if not 0 < self.c <= 1:
            bad.append(f"c {self.c} is not in (0, 1]")
        if not 0.5 < self.kappa <= 1:
            bad.append(f"kappa {self.kappa} is not in (1/2, 1]")
        if not 0 <= self.floor <= 1:
            bad.append(f"floor {self.floor} is not in [0, 1]")
        if self.initial_mode not in ("shortest", "constant"):
            bad.append(f"initial_mode {self.initial_mode!r} is not shortest or constant")
        if not (self.ceiling_s > 0 and math.isfinite(self.ceiling_s)):
            bad.append(f"ceiling_s {self.ceiling_s} is not a positive finite number")
        if not 0 <= self.margin < 1:
            bad.append(f"margin {self.margin} is not in [0, 1)")
        if self.explore_basis not in ("td", "visits"):
            bad.append(f"explore_basis {self.explore_basis!r} is not td or visits")
        if not 0 <= self.explore_min <= self.explore_max <= self.explore_cap <= 1:
            bad.append("exploration needs 0 <= explore_min <= explore_max <= explore_cap <= 1, "
                       f"got {self.explore_min}, {self.explore_max}, {self.explore_cap}")
        if not self.td_ref > 0 or not 0 < self.td_smoothing <= 1 or not self.visits_half > 0:
            bad.append("td_ref and visits_half must be > 0, td_smoothing in (0, 1]")
        if bad:
            raise ValueError("; ".join(bad))

    @property
    def eps_max(self) -> float:
        """The largest share any entry may ever explore."""
        return min(self.explore_max, self.explore_cap)

    @classmethod
    def from_config(cls, cfg: Any) -> EngineSettings:
        """From a :class:`routerd.config.Config` (or anything indexable by key path)."""
        return cls(
            step_mode=cfg["engine.step.mode"], alpha=cfg["engine.step.alpha"],
            c=cfg["engine.step.c"], kappa=cfg["engine.step.kappa"],
            floor=cfg["engine.step.floor"], initial_mode=cfg["engine.initial.mode"],
            initial_value_s=cfg["engine.initial.value_s"], ceiling_s=cfg["engine.ceiling_s"],
            margin=cfg["engine.hysteresis.margin"], explore_basis=cfg["engine.explore.basis"],
            explore_min=cfg["engine.explore.min_rate"],
            explore_max=cfg["engine.explore.max_rate"], explore_cap=cfg["engine.explore.cap"],
            td_ref=cfg["engine.explore.td_ref"], td_smoothing=cfg["engine.explore.td_smoothing"],
            visits_half=cfg["engine.explore.visits_half"],
        )


@dataclass(frozen=True, slots=True)
class HopBatch:
    """Hop observations as columns: node indices and seconds.  ``estimate`` NaN = absent."""

    src: np.ndarray
    via: np.ndarray
    dst: np.ndarray
    latency: np.ndarray
    estimate: np.ndarray

    def __post_init__(self) -> None:
        m = len(self.src)
        if not (len(self.via) == len(self.dst) == len(self.latency) == len(self.estimate) == m):
            raise ValueError("HopBatch columns must all have the same length")

    def __len__(self) -> int:
        return len(self.src)

    @classmethod
    def from_rows(cls, rows: Sequence[Sequence[float]]) -> HopBatch:
        """From ``[from, via, dst, latency]`` or ``[from, via, dst, latency, estimate]`` index rows."""
        m = len(rows)
        s = np.empty(m, np.int64); v = np.empty(m, np.int64); d = np.empty(m, np.int64)
        lat = np.empty(m); est = np.full(m, np.nan)
        for i, r in enumerate(rows):
            s[i], v[i], d[i], lat[i] = r[0], r[1], r[2], r[3]
            if len(r) > 4 and r[4] is not None:
                est[i] = r[4]
        return cls(s, v, d, lat, est)

    @classmethod
    def of(cls, src: Any, via: Any, dst: Any, latency: Any, estimate: Any = None) -> HopBatch:
        s = np.asarray(src, dtype=np.int64)
        est = (np.full(s.shape, np.nan) if estimate is None
               else np.asarray(estimate, dtype=np.float64))
        return cls(s, np.asarray(via, dtype=np.int64), np.asarray(dst, dtype=np.int64),
                   np.asarray(latency, dtype=np.float64), est)

    def take(self, idx: np.ndarray) -> HopBatch:
        return HopBatch(self.src[idx], self.via[idx], self.dst[idx], self.latency[idx],
                        self.estimate[idx])


@dataclass(frozen=True, slots=True)
class ObserveResult:
    """What happened to a batch: how many rows were applied and why the others were not."""

    accepted: int
    rejected: tuple[tuple[int, str], ...]
    td_errors: np.ndarray = field(repr=False)  # signed TD error of each accepted row, in order

    @property
    def rejected_by_reason(self) -> dict[str, int]:
        out: dict[str, int] = {}
        for _, r in self.rejected:
            out[r] = out.get(r, 0) + 1
        return out


@dataclass(frozen=True, slots=True)
class Decision:
    """What :meth:`Engine.decide` changed."""

    changed_nodes: frozenset[int]   # nodes whose published table (next hops or weights) changed
    route_changes: int              # (node, destination) pairs whose greedy hop changed
    loops_prevented: int            # nodes moved off a looping choice in this call


@dataclass(frozen=True, slots=True)
class EngineStats:
    """Immutable snapshot for the shells to export (metrics, logs, summaries)."""

    updates: int
    rejected: Mapping[str, int]
    td_error_mean_s: float      # moving mean of |TD error| over rows (weight 1/1000)
    td_error_max_s: float       # largest |TD error| in the most recent batch
    exploration_share: float    # mean off-greedy weight over routed (node, destination) pairs
    route_changes: int
    loops_prevented: int
    decisions: int
    links_down: int
    pending_destinations: int


class Engine:
    """Q-routing over one topology.  See the module docstring for the rules."""

    def __init__(self, topology: Topology, settings: EngineSettings | None = None):
        self.topo = topology
        self.settings = settings or EngineSettings()
        n, k = topology.n, topology.slots.shape[1]
        self.n, self.k = n, k
        self._slots = topology.slots.astype(np.int64)
        self._present = self._slots >= 0
        self._slot_of = topology.slot_of
        self._link_delay = np.where(self._present, topology.delay_s[np.maximum(topology.slot_link, 0)], 0.0)
        self.live = self._present.copy()
        self._static_dist = topology.shortest_delays()
        self.Q = self._initial_q()
        self.N = np.zeros((n, n, k), dtype=np.int64)
        self.td = np.zeros((n, n), dtype=np.float64)
        self.greedy = np.full((n, n), -1, dtype=np.int64)   # slot, -1 = none
        self.eps = np.zeros((n, n), dtype=np.float64)
        self.alt = np.zeros((n, n, k), dtype=bool)          # exploration candidates
        self._dirty = np.ones(n, dtype=bool)
        self._alphas: np.ndarray | None = None
        self._alphas_list: list[float] = []
        self._live_spt: np.ndarray | None = None
        self._scratch = np.full(n * n, np.iinfo(np.int64).max, dtype=np.int64)
        self.now = 0.0
        self._updates = 0
        self._rejected = dict.fromkeys(REJECT_REASONS, 0)
        self._td_mean = 0.0
        self._td_max = 0.0
        self._route_changes = 0
        self._loops_prevented = 0
        self._decisions = 0
        self.decide(0.0)
        # the first tables are the starting point, not changes or prevented loops
        self._route_changes = 0
        self._loops_prevented = 0

    # ---- set-up ---------------------------------------------------------------------
    def _initial_q(self) -> np.ndarray:
        n, k = self.n, self.k
        s = self.settings
        if s.initial_mode == "shortest":
            ys = np.maximum(self._slots, 0)
            # Q[x, d, j] = delay(x, y_j) + D(y_j, d)
            q = self._link_delay[:, None, :] + self._static_dist[ys].transpose(0, 2, 1)
        else:
            q = np.full((n, n, k), s.initial_value_s)
        q = np.where(self._present[:, None, :], q, np.inf)
        return np.minimum(q, s.ceiling_s)

    def reconfigure(self, settings: EngineSettings) -> None:
        """Adopt new tunables (a reload), keeping all learned state."""
        self.settings = settings
        self._alphas = None
        self.Q = np.where(self._present[:, None, :], np.minimum(self.Q, settings.ceiling_s), np.inf)
        self._dirty[:] = True

    # ---- observations ---------------------------------------------------------------
    def check(self, b: HopBatch) -> np.ndarray:
        """Per-row reason code (index into REJECT_REASONS) or -1 when the row is acceptable."""
        n = self.n
        code = np.full(len(b), _OK, dtype=np.int64)
        s, v, d = b.src, b.via, b.dst
        inr = (s >= 0) & (s < n) & (v >= 0) & (v < n) & (d >= 0) & (d < n)
        code[~inr] = _R["unknown_node"]
        ss, vv = np.where(inr, s, 0), np.where(inr, v, 0)
        slot = self._slot_of[ss, vv].astype(np.int64)
        code[(code == _OK) & (slot < 0)] = _R["not_neighbour"]
        code[(code == _OK) & (s == d)] = _R["at_destination"]
        lat_ok = np.isfinite(b.latency) & (b.latency >= 0)
        code[(code == _OK) & ~lat_ok] = _R["bad_latency"]
        est = b.estimate
        est_ok = np.isnan(est) | (np.isfinite(est) & (est >= 0))
        code[(code == _OK) & ~est_ok] = _R["bad_estimate"]
        ok = code == _OK
        down = np.zeros(len(b), dtype=bool)
        down[ok] = ~self.live[ss[ok], slot[ok]]
        code[down] = _R["link_down"]
        return code

    def observe(self, batch: HopBatch, now: float | None = None) -> ObserveResult:
        """Apply a batch of hop observations, in order.  Bad rows are rejected, not fatal."""
        if now is not None:
            self.now = float(now)
        code = self.check(batch)
        ok = code == _OK
        bad = np.flatnonzero(~ok)
        rejected = tuple((int(i), REJECT_REASONS[int(code[i])]) for i in bad)
        for _, r in rejected:
            self._rejected[r] += 1
        good = batch if bad.size == 0 else batch.take(np.flatnonzero(ok))
        m = len(good)
        if m == 0:
            return ObserveResult(0, rejected, np.empty(0))
        f, v, d = good.src, good.via, good.dst
        slot = self._slot_of[f, v].astype(np.int64)
        lat = good.latency
        est = good.estimate
        tde = np.empty(m)
        if m < SCALAR_BATCH:
            self._apply_scalar(np.arange(m), f, v, d, slot, lat, est, tde)
        else:
            self._apply_rounds(f, v, d, slot, lat, est, tde)
        self._updates += m
        a = np.abs(tde)
        w = 1.0 - 0.999 ** m
        self._td_mean = (1 - w) * self._td_mean + w * float(a.mean())
        self._td_max = float(a.max())
        self._dirty[np.unique(d)] = True
        return ObserveResult(m, rejected, tde)

    def observe_one(self, src: int, via: int, dst: int, latency: float,
                    estimate: float | None = None, now: float | None = None) -> ObserveResult:
        e = math.nan if estimate is None else estimate
        return self.observe(HopBatch.of([src], [via], [dst], [latency], [e]), now)

    def _alpha_table(self, upto: int) -> np.ndarray:
        """Step size by update count, tabulated so the scalar and vector paths agree to the bit."""
        tab = self._alphas
        if tab is None or tab.shape[0] <= upto:
            size = max(1024, 1 << int(upto + 1).bit_length())
            s = self.settings
            nn = np.arange(size, dtype=np.float64)
            nn[0] = 1.0
            if s.step_mode == "constant":
                tab = np.full(size, s.alpha)
            else:
                tab = np.maximum(s.floor, s.c / np.power(nn, s.kappa))
            self._alphas = tab
            self._alphas_list = tab.tolist()
        return tab

    def _apply_scalar(self, rows: np.ndarray, f: np.ndarray, v: np.ndarray, d: np.ndarray,
                      slot: np.ndarray, lat: np.ndarray, est: np.ndarray, tde: np.ndarray) -> None:
        Q, N, live, td = self.Q, self.N, self.live, self.td
        ceil = self.settings.ceiling_s
        sm = self.settings.td_smoothing
        self._alpha_table(0)
        tab = self._alphas_list
        for i in rows.tolist():
            x, y, dd, j = int(f[i]), int(v[i]), int(d[i]), int(slot[i])
            if y == dd:
                tail = 0.0
            elif est[i] == est[i]:  # not NaN
                tail = float(est[i])
            else:
                qy = Q[y, dd][live[y]]
                tail = float(qy.min()) if qy.size else ceil
            target = float(lat[i]) + tail
            old = float(Q[x, dd, j])
            nn = int(N[x, dd, j]) + 1
            N[x, dd, j] = nn
            if nn >= len(tab):
                self._alpha_table(nn)
                tab = self._alphas_list
            a = tab[nn]
            delta = target - old
            new = old + a * delta
            Q[x, dd, j] = ceil if new > ceil else (0.0 if new < 0.0 else new)
            td[x, dd] = (1 - sm) * td[x, dd] + sm * abs(delta)
            tde[i] = delta

    def _first_pos(self, keys: np.ndarray, pos: np.ndarray) -> np.ndarray:
        """Scratch array holding, for each key, the lowest position it occurs at (caller resets)."""
        np.minimum.at(self._scratch, keys, pos)
        return self._scratch

    def _apply_rounds(self, f: np.ndarray, v: np.ndarray, d: np.ndarray, slot: np.ndarray,
                      lat: np.ndarray, est: np.ndarray, tde: np.ndarray) -> None:
        n = self.n
        big = np.iinfo(np.int64).max
        scratch = self._scratch
        wkey = f * n + d
        needs_read = (v != d) & np.isnan(est)
        rkey = np.where(needs_read, v * n + d, -1)
        rem = np.arange(len(f))
        while rem.size:
            if rem.size < SCALAR_BATCH:
                self._apply_scalar(rem, f, v, d, slot, lat, est, tde)
                return
            W, R = wkey[rem], rkey[rem]
            pos = np.arange(rem.size)
            hasr = R >= 0
            Rr = np.where(hasr, R, 0)
            # earliest writer of each key
            np.minimum.at(scratch, W, pos)
            blocked = scratch[W] < pos                        # an earlier row writes my key
            blocked |= hasr & (scratch[Rr] < pos)             # an earlier row writes what I read
            scratch[W] = big
            # an earlier *deferred* row reads the key I write (fixpoint: deferral spreads)
            while True:
                rb = blocked & hasr
                if not rb.any():
                    break
                np.minimum.at(scratch, R[rb], pos[rb])
                nb = blocked | (scratch[W] < pos)
                scratch[R[rb]] = big
                if nb.sum() == blocked.sum():
                    break
                blocked = nb
            go = rem[~blocked]
            if go.size < max(4, rem.size // 16):
                # mostly a chain: the scalar path is cheaper than more rounds
                self._apply_scalar(rem, f, v, d, slot, lat, est, tde)
                return
            self._apply_vector(go, f, v, d, slot, lat, est, tde)
            rem = rem[blocked]

    def _apply_vector(self, rows: np.ndarray, f: np.ndarray, v: np.ndarray, d: np.ndarray,
                      slot: np.ndarray, lat: np.ndarray, est: np.ndarray, tde: np.ndarray) -> None:
        """Rows with pairwise-distinct write keys and no read of another's write key."""
        Q, N = self.Q, self.N
        s = self.settings
        x, y, dd, j = f[rows], v[rows], d[rows], slot[rows]
        e = est[rows]
        tail = np.where(np.isnan(e), 0.0, e)
        need = np.isnan(e) & (y != dd)
        if need.any():
            yy, dn = y[need], dd[need]
            qy = np.where(self.live[yy], Q[yy, dn], np.inf)
            mins = qy.min(axis=1)
            tail[need] = np.where(np.isfinite(mins), mins, s.ceiling_s)
        target = lat[rows] + tail
        old = Q[x, dd, j]
        nn = N[x, dd, j] + 1
        N[x, dd, j] = nn
        delta = target - old
        alpha = self._alpha_table(int(nn.max()))[nn]
        Q[x, dd, j] = np.clip(old + alpha * delta, 0.0, s.ceiling_s)
        sm = s.td_smoothing
        self.td[x, dd] = (1 - sm) * self.td[x, dd] + sm * np.abs(delta)
        tde[rows] = delta

    # ---- link state -----------------------------------------------------------------
    def set_link(self, src: int, dst: int, up: bool, now: float | None = None) -> bool:
        """Mark the link src → dst up or down.  Returns False if it already was."""
        if now is not None:
            self.now = float(now)
        j = int(self._slot_of[src, dst])
        if j < 0:
            raise KeyError(f"no link {self.topo.nodes[src]} -> {self.topo.nodes[dst]}")
        if bool(self.live[src, j]) == up:
            return False
        self.live[src, j] = up
        ceil = self.settings.ceiling_s
        if up:
            vy = self.values()[dst]                    # y's current best per destination
            fresh = self._link_delay[src, j] + np.where(np.arange(self.n) == dst, 0.0, vy)
            self.Q[src, :, j] = np.minimum(fresh, ceil)
            self.N[src, :, j] = 0
        else:
            self.Q[src, :, j] = ceil
        self._live_spt = None
        self._dirty[:] = True
        return True

    def link_is_up(self, src: int, dst: int) -> bool:
        return bool(self.live[src, int(self._slot_of[src, dst])])

    # ---- reading ----------------------------------------------------------------------
    def values(self) -> np.ndarray:
        """(n, n) V[x, d] = min over x's live slots of Q[x, d, :] (0 on the diagonal)."""
        q = np.where(self.live[:, None, :], self.Q, np.inf).min(axis=2)
        q = np.where(np.isfinite(q), q, self.settings.ceiling_s)
        np.fill_diagonal(q, 0.0)
        return q

    def estimate(self, x: int, d: int) -> float:
        """x's current remaining-time estimate for d (what x reports as its own estimate)."""
        if x == d:
            return 0.0
        qy = self.Q[x, d][self.live[x]]
        return float(qy.min()) if qy.size else self.settings.ceiling_s

    def next_hops(self) -> np.ndarray:
        """(n, n) greedy next-hop node per (node, destination), -1 for none."""
        g = self.greedy
        return np.where(g >= 0, np.take_along_axis(self._slots, np.maximum(g, 0), axis=1), -1)

    def weights(self, x: int, d: int) -> list[tuple[int, float]]:
        """Published weights of x for d: ``[(next_hop, weight), ...]``, greedy first; sum 1."""
        g = int(self.greedy[x, d])
        if g < 0:
            return []
        alts = np.flatnonzero(self.alt[x, d]).tolist()
        y = int(self._slots[x, g])
        if not alts:
            return [(y, 1.0)]
        e = float(self.eps[x, d])
        share = e / len(alts)
        return [(y, 1.0 - e)] + [(int(self._slots[x, a]), share) for a in alts]

    def routes(self, x: int) -> dict[int, list[tuple[int, float]]]:
        """x's whole table: destination → weights."""
        return {d: w for d in range(self.n) if d != x and (w := self.weights(x, d))}

    # ---- decisions ------------------------------------------------------------------
    def _spt_live(self) -> np.ndarray:
        if self._live_spt is None:
            t = self.topo
            up = np.zeros(t.n_links, dtype=bool)
            up[t.slot_link[self.live]] = True
            w = np.where(up, t.delay_s, np.inf)
            dist = t.shortest_delays(w)
            nh = t.spt_next_hops(dist) if up.all() else _spt_masked(t, dist, up)
            self._live_spt = np.where(np.isfinite(dist), nh, -1)
        return self._live_spt

    def decide(self, now: float | None = None) -> Decision:
        """Recompute tables for every destination touched since the last call."""
        if now is not None:
            self.now = float(now)
        ds = np.flatnonzero(self._dirty)
        self._dirty[:] = False
        self._decisions += 1
        if ds.size == 0:
            return Decision(frozenset(), 0, 0)
        s = self.settings
        n = self.n
        xs = np.arange(n)
        live = self.live[:, None, :]                                # (n, 1, K)
        q = np.where(live, self.Q[:, ds, :], np.inf)                # (n, m, K)
        best = np.argmin(q, axis=2)                                 # (n, m)
        bestv = np.take_along_axis(q, best[..., None], axis=2)[..., 0]
        inc = self.greedy[:, ds]
        incv = np.take_along_axis(q, np.maximum(inc, 0)[..., None], axis=2)[..., 0]
        incv = np.where(inc >= 0, incv, np.inf)
        keep = np.isfinite(incv) & ~(bestv < incv * (1.0 - s.margin))
        choice = np.where(keep, inc, best)
        choice = np.where(np.isfinite(bestv), choice, -1)
        choice[ds, np.arange(ds.size)] = -1                         # x == d
        # loop freedom, per destination table (rows = destinations)
        nh = np.where(choice >= 0, np.take_along_axis(self._slots, np.maximum(choice, 0), axis=1), -1).T
        prev_nh = np.where(inc >= 0, np.take_along_axis(self._slots, np.maximum(inc, 0), axis=1), -1).T
        level = np.zeros_like(nh)
        prevented = 0
        while True:
            cyc = _loops.cycle_mask(nh)
            if not cyc.any():
                break
            prevented += int(cyc.sum())
            up1 = cyc & (level == 0)
            up2 = cyc & (level >= 1)
            if up1.any():
                # fall back to the previous choice where it is still live
                pv = prev_nh[up1]
                xi = np.nonzero(up1)[1]
                ok = (pv >= 0)
                okl = np.zeros_like(ok)
                okl[ok] = self.live[xi[ok], self._slot_of[xi[ok], pv[ok]]]
                spt = self._spt_live()[:, ds].T[up1]
                nh[up1] = np.where(okl, pv, spt)
                level[up1] = np.where(okl, 1, 2)
            if up2.any():
                nh[up2] = self._spt_live()[:, ds].T[up2]
                level[up2] = 2
        choice = np.where(nh.T >= 0, self._slot_of[xs[:, None], np.maximum(nh.T, 0)], -1).astype(np.int64)
        # exploration candidates: strictly lower (depth, index) potential, live, not greedy
        dep = _loops.depths(nh, ds).T                                # (n, m): depth of x for ds[i]
        ys = np.maximum(self._slots, 0)                              # (n, K)
        dy = dep[ys]                                                 # (n, K, m)
        dy = dy.transpose(0, 2, 1)                                   # (n, m, K)
        dx = dep[:, :, None]
        lower = (dy < dx) | ((dy == dx) & (ys[:, None, :] < xs[:, None, None]))
        reach = dy <= n
        alt = live & lower & reach & (np.arange(self.k)[None, None, :] != choice[..., None])
        alt &= (choice >= 0)[..., None]
        # exploration share per (x, d)
        if s.explore_basis == "td":
            vx = np.take_along_axis(q, np.maximum(choice, 0)[..., None], axis=2)[..., 0]
            rel = self.td[:, ds] / np.maximum(np.where(np.isfinite(vx), vx, s.ceiling_s), 1e-12)
            frac = np.minimum(1.0, rel / s.td_ref)
        else:
            visits = self.N[:, ds, :].sum(axis=2)
            frac = s.visits_half / (s.visits_half + visits)
        eps = np.minimum(s.explore_min + (s.explore_max - s.explore_min) * frac, s.eps_max)
        eps = np.where(alt.any(axis=2), eps, 0.0)
        # what changed
        old_g = self.greedy[:, ds]
        changed_g = (old_g != choice)
        changed_w = changed_g | (self.alt[:, ds, :] != alt).any(axis=2) | (np.abs(self.eps[:, ds] - eps) > 1e-9)
        self._route_changes += int(changed_g.sum())
        self._loops_prevented += prevented
        self.greedy[:, ds] = choice
        self.alt[:, ds, :] = alt
        self.eps[:, ds] = eps
        nodes = frozenset(np.flatnonzero(changed_w.any(axis=1)).tolist())
        return Decision(nodes, int(changed_g.sum()), prevented)

    # ---- statistics and state ---------------------------------------------------------
    def exploration_share(self) -> float:
        routed = self.greedy >= 0
        if not routed.any():
            return 0.0
        return float(self.eps[routed].mean())

    def statistics(self) -> EngineStats:
        return EngineStats(
            updates=self._updates,
            rejected=dict(self._rejected),
            td_error_mean_s=self._td_mean,
            td_error_max_s=self._td_max,
            exploration_share=self.exploration_share(),
            route_changes=self._route_changes,
            loops_prevented=self._loops_prevented,
            decisions=self._decisions,
            links_down=int((self._present & ~self.live).sum()),
            pending_destinations=int(self._dirty.sum()),
        )

    _ARRAYS = ("Q", "N", "td", "greedy", "eps", "alt", "live", "_dirty")
    _SCALARS = ("now", "_updates", "_td_mean", "_td_max", "_route_changes",
                "_loops_prevented", "_decisions")

    def export_state(self) -> dict[str, Any]:
        """Everything needed to restore this engine exactly: arrays (copies) and scalars."""
        out: dict[str, Any] = {k: getattr(self, k).copy() for k in self._ARRAYS}
        out.update({k: getattr(self, k) for k in self._SCALARS})
        out["rejected"] = dict(self._rejected)
        out["topology"] = self.topo.digest
        return out

    @classmethod
    def from_state(cls, topology: Topology, settings: EngineSettings,
                   state: Mapping[str, Any]) -> Engine:
        if state.get("topology") != topology.digest:
            raise ValueError("state was saved for another topology "
                             f"({state.get('topology')} != {topology.digest})")
        eng = cls(topology, settings)
        for k in cls._ARRAYS:
            a = np.asarray(state[k])
            cur = getattr(eng, k)
            if a.shape != cur.shape:
                raise ValueError(f"state array {k} has shape {a.shape}, expected {cur.shape}")
            setattr(eng, k, a.astype(cur.dtype, copy=True))
        for k in cls._SCALARS:
            setattr(eng, k, type(getattr(eng, k))(state[k]))
        eng._rejected = {r: int(state["rejected"].get(r, 0)) for r in REJECT_REASONS}
        eng._live_spt = None
        return eng

    def same_state(self, other: Engine) -> bool:
        """Bit-for-bit equality of learned state (for restart and replay checks)."""
        return all(np.array_equal(getattr(self, k), getattr(other, k), equal_nan=True)
                   for k in ("Q", "N", "td", "greedy", "eps", "alt", "live"))


def _spt_masked(t: Topology, dist: np.ndarray, up: np.ndarray) -> np.ndarray:
    """Shortest-path next hops using only links marked up."""
    n = t.n
    nh = np.full((n, n), -1, dtype=np.int32)
    for x, nb in enumerate(t.neighbours):
        cand = [(t.link_index[(x, y)], y) for y in nb if up[t.link_index[(x, y)]]]
        if not cand:
            continue
        ys = np.array([y for _, y in cand])
        w = np.array([t.delay_s[k] for k, _ in cand])
        cost = w[:, None] + dist[ys, :]
        nh[x] = ys[np.argmin(cost, axis=0)]
        nh[x, x] = -1
    return nh


def settings_with(settings: EngineSettings, **changes: Any) -> EngineSettings:
    """A copy with some fields changed (checked again)."""
    known = {f.name for f in fields(EngineSettings)}
    unknown = set(changes) - known
    if unknown:
        raise ValueError(f"unknown engine settings: {sorted(unknown)}")
    return replace(settings, **changes)
