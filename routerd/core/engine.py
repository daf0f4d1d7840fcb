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

Counts.  ``N`` is a narrow unsigned type that saturates: a count past ``_count_cap``
stays there.  The decaying step is exactly its floor from some finite count on (the step
table ends there, ``_alpha_top``: 148 with the defaults), so with the plain rule and the
TD exploration basis, where a count is read only for its step, any cap from that count on
gives the same steps as the true count, bit for bit: uint8 with the defaults (1,000 nodes
x 11 slots: 10.5 MB instead of 84 MB as int64), uint16 when the floor lies further out.
Where counts matter past any such point (a step that does not reach its floor within the
table, the visits exploration basis, the variants) they are uint32, saturating after
4.29e9 updates of one entry.  A state saved with wider counts (int64, before this) loads
saturated at the cap; a reconfigure that needs a wider type widens N (counts already
saturated stay at the old cap).

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
   :mod:`routerd.core.loops`); every node on a cycle falls back, first to its previous
   choice, then to the delay-shortest path over live links, until no cycle remains.  The
   fallback ladder ends in a shortest-path tree, which cannot loop, so this terminates.
   A (node, destination) counts as one loop prevented when it is newly held off its
   hysteresis choice (or moved to another fallback), once, not again at every decision
   that keeps it there; a persistent fallback also does not force the full pass (see
   ``_decide_keys``);
4. exploration: each (x, d) gets a share eps in [min_rate, max_rate] (never above the
   global cap) from how settled its estimates are — recent relative TD error, or visit
   counts.  The share is split evenly over *alternate* next hops y whose potential
   (hops to d in the greedy tree, then node index) is strictly lower than x's.  Greedy
   edges lower the potential too, so every edge with a positive weight descends a strict
   order: the weighted forwarding graph is acyclic, exploration included.  The greedy hop
   keeps 1 - eps >= 1 - max_rate; with no alternate it keeps 1.

Two implementations.  The numpy code here is the reference; :mod:`routerd.core.kernels` runs
``observe`` (plain rule), the full pass of ``decide`` and ``routes_many`` compiled when the
extension is built (``EngineSettings.kernels``: auto, compiled, reference), with the same
results to the bit (tests/test_kernels.py).  A change to a rule here needs the same change there.

Estimates.  :meth:`Engine.estimate` is x's min over live slots (the rule the update uses
for a row without a reported estimate); :meth:`Engine.published_estimate` is the Q-value of
x's published greedy next hop (0 at the destination, the ceiling without a route), what a
node reports for the route it actually uses: hysteresis and loop prevention can keep x off
its argmin, and the min would then report optimistic entries x never forwards on.

Modes (``engine.mode``).  Everything above is ``greedy`` (the classic Q-routing baseline,
kept bit for bit: one next hop per (node, destination), exploration the only load
splitting; what :class:`EngineSettings` gave before ``split`` became the default, and what
the shells run above ``engine.split.max_nodes``, :func:`routerd.io.config.split_fits`).  Its known weaknesses against the flow-deviation optimum (issue 14): entries of
next hops not in use keep optimistic propagation-only values, so the argmin is often a
stale entry that loop repair then undoes; a greedy switch moves a key's whole traffic at
once, so routes herd and oscillate.  ``split`` (:mod:`routerd.core.splitting`, whose docstring
is its theory of operation) keeps the same Q-values and TD update and adds: per-link rate
and latency estimates from every accepted row (exponentially weighted over ``now``); a
refresh, at each decision, of every entry of a used link for every destination from that
link's latency plus the neighbour's published estimate; and per (node, destination) *shares*
moved by a curvature-scaled gradient projection step toward the next hop of least marginal
delivery cost (Q plus the measured M/M/1 externality downstream; Gallager, IEEE Trans.
Comm. 25, 1977; Bertsekas & Gallager, Data Networks §5.7).  New shares only go to next hops
of strictly lower link-marginal distance, the share graph is checked for cycles (new edges
on a cycle are cut), and a key is republished only when a share moved by more than
``split_threshold``; the published graph is checked after every decision.  In split mode
``decide`` recomputes every destination on every call, ``greedy`` holds each key's largest
share, ``eps`` the rest and ``alt`` the other next hops in use; :meth:`Engine.weights`
returns the shares, :meth:`Engine.published_estimate` their weighted Q.  Observations feed
the split state after the core update (the same rows in the same order, so batched ==
sequential still holds); its arrays ride in ``export_state()["split"]``.
:meth:`Engine.seed_shares` (split mode) replaces whole destinations' internal shares from
outside — the service's ``engine.optimum.guide`` seeds them with the flow-deviation optimum
for the demand it measured — keeping every route and the graph acyclic
(:func:`routerd.core.splitting.seed`); the service journals each seeding as a ``guide``
record and replay applies it at the same place.  :meth:`Engine.published_shares` reads the
published tables as one (n, n, K) array (the service's live optimality gap).

Owned destinations.  ``Engine(topology, settings, owned=[...])`` keeps state for some
destinations only (a shard worker's, :mod:`routerd.service.shard`): every per-destination
array is indexed by a *column*, ``Q[x, c, j]`` with ``c = column(d)``, and ``owned[c]`` is
the destination of column c (sorted; ``owned = arange(n)`` and ``column(d) = d`` for a
whole engine, the default, so nothing changes there).  This is exact: the update for d
reads and writes column d only (the neighbour's estimate ``Q[y, d, :]`` is the same
destination), and ``decide`` works destination by destination (its loop check, depths
and fallback trees are per destination, on node indices).  Memory is n x len(owned) x K
instead of n x n x K.  A row for a destination not owned is rejected (``not_owned``); the
readers answer per owned destination (``values``, ``next_hops``: (n, len(owned)); ``weights``
of another destination: no route).  The state saved carries the owned set (``owned``,
only when partial) and :meth:`from_state` restores that layout.  Only the plain rule in greedy mode: the
variants and split mode keep state across destinations (a ValueError otherwise); an owning state restored
under a variant becomes a whole engine, its columns in place and the others fresh.

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

from . import kernels as _kernels
from . import loops as _loops
from . import splitting as _splitting
from . import variants as _variants
from .topology import Topology

# Reasons an observation row is rejected.  A fixed set: metrics label on it.
REJECT_REASONS = (
    "unknown_node",    # an index outside the node list
    "not_neighbour",   # via is not a neighbour of from
    "at_destination",  # from == dst: a node does not forward packets for itself
    "bad_latency",     # NaN, infinite or negative latency
    "bad_estimate",    # infinite or negative estimate
    "link_down",       # the hop used a link that is marked down
    "not_owned",       # dst is not one of this engine's owned destinations (a shard's)
)
_R = {r: i for i, r in enumerate(REJECT_REASONS)}
_OK = -1

# Below this many rows the scalar path is faster than the vectorised rounds.
SCALAR_BATCH = 24
# The step-size table never grows past this many counts (64 Ki: 0.5 MB as float64 plus its
# list); a decaying step whose floor lies further out (or floor 0) is computed past it.
STEP_TABLE_MAX = 1 << 16
# The update counts N are stored in the narrowest of these that holds every count whose
# value still matters (``Engine._count_cap``); a count saturates there (see "Counts").
COUNT_TYPES = (np.uint8, np.uint16, np.uint32)
# The reference decide's full pass works through destinations in blocks whose (n, block)
# int64 temporaries take about this many bytes (``_decide_block_size``).
DECIDE_BLOCK_BYTES = 1 << 21


@dataclass(frozen=True, slots=True, kw_only=True)
class EngineSettings:
    """Every engine tunable.  Checked here (API misuse raises ValueError); user-facing
    checking with file and key path lives in :mod:`routerd.io.config`."""

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
    # published refinements (routerd.core.variants): which one, and their parameters
    variant: str = "plain"
    echo_damping: float = 0.5
    echo_smoothing: float = 0.2
    pred_beta: float = 0.7
    pred_gamma: float = 0.9
    conf_decay: float = 0.9
    conf_interval_s: float = 1.0
    conf_initial: float = 0.0
    conf_min_step: float = 0.05
    # which implementation runs the hot paths (routerd.core.kernels): the same results either way
    kernels: str = "auto"
    # the learning mode (routerd.core.splitting): greedy next hop, or shares by marginal cost
    mode: str = "split"
    split_step: float = 1.0
    split_max_step: float = 1.0
    split_threshold: float = 0.02
    split_window_s: float = 1.0
    split_refresh: float = 0.5
    split_prior: float = 2.0
    split_uphill_drain: float = 0.1
    split_boost: float = 3.0
    split_boost_s: float = 2.0
    split_rate_model: float = 0.97
    split_per_decision: int = 0

    def __post_init__(self) -> None:
        bad: list[str] = []
        if self.kernels not in ("auto", "compiled", "reference"):
            bad.append(f"kernels {self.kernels!r} is not auto, compiled or reference")
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
        bad += _variants.problems(self)
        bad += _splitting.problems(self)
        if bad:
            raise ValueError("; ".join(bad))

    @property
    def eps_max(self) -> float:
        """The largest share any entry may ever explore."""
        return min(self.explore_max, self.explore_cap)

    @classmethod
    def from_config(cls, cfg: Any) -> EngineSettings:
        """From a :class:`routerd.io.config.Config` (or anything indexable by key path)."""
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
            kernels=cfg["engine.kernels"],
            **_variants.from_config(cfg),
            **_splitting.from_config(cfg),
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
    loops_prevented: int            # keys (node, destination) newly held off a looping choice


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
    # split mode (routerd.core.splitting); zero in greedy mode
    split_publications: int = 0       # (node, destination) keys whose published shares changed
    split_share_moves: int = 0        # keys whose internal shares moved
    split_whole_publications: int = 0  # destinations published whole to stay loop-free
    split_fallbacks: int = 0          # keys put on the live shortest-path tree


class Engine:
    """Q-routing over one topology.  See the module docstring for the rules."""

    def __init__(self, topology: Topology, settings: EngineSettings | None = None, *,
                 owned: Any = None):
        self.topo = topology
        self.settings = settings or EngineSettings()
        n, k = topology.n, topology.slots.shape[1]
        self.n, self.k = n, k
        # owned destinations (see "Owned destinations" in the module docstring): column c
        # of every per-destination array is destination owned[c]; _col maps back
        self.owned, self._col = _owned_columns(n, owned)
        self.nd = nd = int(self.owned.size)
        self.partial = nd < n
        if self.partial and (self.settings.variant != "plain" or self.settings.mode != "greedy"):
            raise ValueError(f"owned destinations need the plain variant in greedy mode (variant "
                             f"{self.settings.variant!r}, mode {self.settings.mode!r} keeps state "
                             f"across destinations)")
        self._slots = topology.slots.astype(np.int64)
        self._present = self._slots >= 0
        self._slot_of = topology.slot_of
        self._slot_flat = np.ascontiguousarray(topology.slot_of).reshape(-1)
        self._slot_of_wide: np.ndarray | None = None      # _slot_of_i64, made on demand
        # slots the compiled decide scans per node: the present ones when they are a prefix
        # of the row (as topology builds them), else all (absent slots are never live)
        deg = self._present.sum(axis=1).astype(np.int64)
        prefix = bool((self._present == (np.arange(k)[None, :] < deg[:, None])).all())
        self._slot_deg = deg if prefix else np.full(n, k, dtype=np.int64)
        self._link_delay = np.where(self._present, topology.delay_s[np.maximum(topology.slot_link, 0)], 0.0)
        self.live = self._present.copy()
        self._static_dist = topology.shortest_delays()
        self.Q = self._initial_q()
        self._alphas: np.ndarray | None = None     # step sizes by count (_steps)
        self._alphas_list: list[float] = []
        self._alpha_top = 0
        self._alpha_clamped = True
        self._count_dtype, self._count_cap = self._count_layout()
        # np.full, not np.zeros: the pages are written now, so the first batch does not pay
        # for faulting in the whole array (a 1,000-node service's first turn took 0.25 s)
        self.N = np.full((n, nd, k), 0, dtype=self._count_dtype)
        self.td = np.full((n, nd), 0.0, dtype=np.float64)
        self.greedy = np.full((n, nd), -1, dtype=np.int64)   # slot, -1 = none
        self.eps = np.zeros((n, nd), dtype=np.float64)
        self.alt = np.zeros((n, nd, k), dtype=bool)          # exploration candidates
        self._dirty = np.ones(nd, dtype=bool)
        # the key-level fast lane of decide(): (x, d) keys the core observe path wrote,
        # their destinations, and keys whose published choice is a loop fallback
        self._kdirty = np.zeros(n * nd, dtype=bool)
        self._kcols = np.zeros(nd, dtype=bool)
        self._forced = np.ones((n, nd), dtype=bool)
        # the hysteresis choice behind each published one (differs where _forced), and per
        # destination whether its fallbacks are exactly reproduced by the next full pass
        # (slot indices: the topology's slot type, int16 unless a node has 32,000 neighbours)
        self._hyst = np.full((n, nd), -1, dtype=self._slot_of.dtype)
        self._stable = np.zeros(nd, dtype=bool)
        # where a limited decide (decide(limit=...)) starts taking due destinations
        self._cursor = 0
        self._kern = _kernels.select(self.settings.kernels)   # None: the numpy reference
        self._live_spt: np.ndarray | None = None
        # the compiled full pass's scratch (routerd.core.kernels.decide_full; not state)
        self._decide_scratch: tuple[np.ndarray, ...] | None = None
        # the compiled kernels' view of this engine's arrays (routerd.core.kernels.bound; not
        # state: bound afresh whenever an array, the settings or the step table is replaced)
        self._bound: Any = None
        # the reference rounds' scratch: one slot per (node, destination) key plus a
        # sentinel no row writes; made on first use (the compiled path never needs it)
        self._scratch: np.ndarray | None = None
        self.now = 0.0
        self._updates = 0
        self._rejected = dict.fromkeys(REJECT_REASONS, 0)
        self._td_mean = 0.0
        self._td_max = 0.0
        self._route_changes = 0
        self._loops_prevented = 0
        self._decisions = 0
        self._full_pass_destinations = 0   # destinations the full pass took (not state)
        self._variant = _variants.make(self)   # None: the plain core path
        self._qdec = self.Q                     # the values decide() compares
        self._split: _splitting.SplitState | None = None
        self.decide(0.0)
        if self.settings.mode == "split":
            self._start_split()
        # the first tables are the starting point, not changes or prevented loops
        self._route_changes = 0
        self._loops_prevented = 0

    @property
    def _slot_of_i64(self) -> np.ndarray:
        """``slot_of`` as int64 (n x n x 8 bytes), made on first use: the compiled kernels
        take the topology's own int16 array."""
        if self._slot_of_wide is None:
            self._slot_of_wide = np.ascontiguousarray(self._slot_of, dtype=np.int64)
        return self._slot_of_wide

    def _start_split(self) -> None:
        """Split mode: one share on each next hop of the live delay-shortest tree."""
        self._split = _splitting.SplitState(self)
        pub = self._split.pub
        self.greedy[:] = np.where(pub.sum(axis=2) > 0, np.argmax(pub, axis=2), -1)
        self.eps[:] = 0.0
        self.alt[:] = False
        self._dirty[:] = True

    # ---- set-up ---------------------------------------------------------------------
    def _initial_q(self) -> np.ndarray:
        n, k, nd = self.n, self.k, self.nd
        s = self.settings
        ys = np.maximum(self._slots, 0)
        q = np.empty((n, nd, k))  # C order: the update paths index flat views of Q
        # in blocks of nodes (about 4 MB of Q each), built slot-major and written back in
        # Q's order once: no (n, n) temporaries per slot, no strided pass per slot
        step = max(1, (1 << 19) // max(1, nd * k))
        for x0 in range(0, n, step):
            x1 = min(n, x0 + step)
            if s.initial_mode == "shortest":
                # Q[x, d, j] = delay(x, y_j) + D(y_j, d)
                dist = self._static_dist[ys[x0:x1]]                  # (b, k, n)
                if self.partial:
                    dist = dist[:, :, self.owned]
                col = self._link_delay[x0:x1, :, None] + dist
            else:
                col = np.full((x1 - x0, k, nd), s.initial_value_s)
            col = np.where(self._present[x0:x1, :, None], np.minimum(col, s.ceiling_s), np.inf)
            q[x0:x1] = col.transpose(0, 2, 1)
        return q

    def reconfigure(self, settings: EngineSettings) -> None:
        """Adopt new tunables (a reload), keeping all learned state."""
        if self.partial and (settings.variant != "plain" or settings.mode != "greedy"):
            raise ValueError(f"owned destinations need the plain variant in greedy mode (variant "
                             f"{settings.variant!r}, mode {settings.mode!r} keeps state across "
                             f"destinations)")
        self.settings = settings
        self._alphas = None
        self._bound = None   # holds the arrays replaced below: let each go as it is
        self._kern = _kernels.select(settings.kernels)
        dtype, cap = self._count_layout()
        if dtype != self.N.dtype or cap != self._count_cap:
            # counts saturated under the old settings stay at the old cap (what they
            # were past it is not known); a narrower type saturates the rest at the new one
            self.N = _saturated(self.N, cap, dtype)
        self._count_dtype, self._count_cap = dtype, cap
        q = np.where(self._present[:, None, :], np.minimum(self.Q, settings.ceiling_s), np.inf)
        # dead links hold exactly the (new) ceiling: the update reads mins without a live mask
        q[np.broadcast_to((self._present & ~self.live)[:, None, :], q.shape)] = settings.ceiling_s
        self.Q = np.ascontiguousarray(q)
        self._variant = _variants.make(self, self._variant)
        if settings.mode == "split" and self._split is None:
            self._start_split()
        elif settings.mode != "split":
            self._split = None
        self._dirty[:] = True

    # ---- observations ---------------------------------------------------------------
    def check(self, b: HopBatch) -> np.ndarray:
        """Per-row reason code (index into REJECT_REASONS) or -1 when the row is acceptable."""
        code, _ = self._check(b)
        return np.full(len(b), _OK, dtype=np.int64) if code is None else code

    def _check(self, b: HopBatch) -> tuple[np.ndarray | None, np.ndarray]:
        """(codes or None when every row is acceptable, neighbour slot of each row).

        One combined pass answers the common all-good case; only a batch with a bad row
        pays for the per-reason codes, assigned lowest precedence first so the first rule
        a row breaks (in REJECT_REASONS order) is the one reported.
        """
        n = self.n
        s, v, d = b.src, b.via, b.dst
        lat, est = b.latency, b.estimate
        if len(s) and s.dtype == v.dtype == d.dtype == np.int64:
            # the all-good case by reductions alone (no per-row masks): negatives wrap to
            # huge as uint64; NaN fails the latency compares; fmin/fmax skip absent (NaN)
            # estimates; any doubt falls through to the per-row pass below
            u = np.uint64
            if (int(s.view(u).max()) < n and int(v.view(u).max()) < n
                    and int(d.view(u).max()) < n):
                slot = self._slot_flat.take(s * n + v).astype(np.int64)
                if (int(slot.min()) >= 0 and not (s == d).any()
                        and float(lat.min()) >= 0.0 and float(lat.max()) < math.inf
                        and not float(np.fmin.reduce(est)) < 0.0
                        and float(np.fmax.reduce(est)) != math.inf
                        and (self.live.all() or self._live_flat_take(s * self.k + slot))
                        and (not self.partial or int(self._col.take(d).min()) >= 0)):
                    return None, slot
        if s.dtype == v.dtype == d.dtype == np.int64:  # negatives wrap to huge: one compare each
            inr = (s.view(np.uint64) < n) & (v.view(np.uint64) < n) & (d.view(np.uint64) < n)
        else:
            inr = (s >= 0) & (s < n) & (v >= 0) & (v < n) & (d >= 0) & (d < n)
        if inr.all():
            ss, vv = s, v
        else:
            ss, vv = np.where(inr, s, 0), np.where(inr, v, 0)
        slot = self._slot_of[ss, vv].astype(np.int64)
        nb = slot >= 0
        live = self.live[ss, slot]                     # slot -1 reads garbage: masked by nb
        lat_ok = (lat >= 0) & (lat < math.inf)         # False for NaN
        est_ok = ~((est < 0) | (est == math.inf))      # NaN (absent) passes both
        own = self._col[np.where(inr, d, 0)] >= 0 if self.partial else True
        good = inr & nb & (s != d) & lat_ok & est_ok & live & own
        if good.all():
            return None, slot
        code = np.full(len(b), _OK, dtype=np.int64)
        if self.partial:
            code[~own] = _R["not_owned"]
        code[~live] = _R["link_down"]
        code[~est_ok] = _R["bad_estimate"]
        code[~lat_ok] = _R["bad_latency"]
        code[s == d] = _R["at_destination"]
        code[~nb] = _R["not_neighbour"]
        code[~inr] = _R["unknown_node"]
        return code, slot

    def _live_flat_take(self, idx: np.ndarray) -> bool:
        """Whether every flat (node * K + slot) index in idx is a live slot."""
        return bool(_flat(self.live).take(idx).all())

    def observe(self, batch: HopBatch, now: float | None = None,
                confidence: np.ndarray | None = None) -> ObserveResult:
        """Apply a batch of hop observations, in order.  Bad rows are rejected, not fatal.

        Small batches (< SCALAR_BATCH rows) take a per-row path; larger ones the
        vectorised rounds.  Both give bit-for-bit the result of applying the rows one by
        one in order (see the module docstring).  In split mode the accepted rows then
        feed the link and key rate estimates (routerd.core.splitting), also in order.
        """
        if now is not None:
            self.now = float(now)
        res = self._observe_core(batch, confidence)
        if self._split is not None:
            self._split_rows(batch, res)
        return res

    def _split_rows(self, batch: HopBatch, res: ObserveResult) -> None:
        m = len(batch)
        if res.accepted == 0:
            return
        if res.rejected:
            keep = np.ones(m, dtype=bool)
            keep[[i for i, _ in res.rejected]] = False
            batch = batch.take(np.flatnonzero(keep))
        x = np.asarray(batch.src, dtype=np.int64)
        assert self._split is not None
        kern = self._kern
        if kern is not None and hasattr(kern, "split_observe_apply"):
            self._split.observe_compiled(kern, x, batch.via, batch.dst, batch.latency,
                                         _kernels._slots_of(self), self.now,
                                         self.settings.split_window_s)
            return
        j = self._slot_of[x, np.asarray(batch.via, dtype=np.int64)].astype(np.int64)
        self._split.observe(x, j, np.asarray(batch.dst, dtype=np.int64),
                            np.asarray(batch.latency, dtype=np.float64), self.now,
                            self.settings.split_window_s)

    def _observe_core(self, batch: HopBatch, confidence: np.ndarray | None) -> ObserveResult:
        if self._variant is not None:  # rows one by one, the variant's rule (routerd.core.variants)
            return self._variant.observe(self, batch, confidence, ObserveResult, REJECT_REASONS)
        if self._kern is not None:  # the compiled loop: checks and applies in order
            res = _kernels.observe(self, batch, ObserveResult, REJECT_REASONS, SCALAR_BATCH)
            if res is not None:
                return res
        m = len(batch)
        if m < SCALAR_BATCH:
            return self._observe_rows(batch.src.tolist(), batch.via.tolist(), batch.dst.tolist(),
                                      batch.latency.tolist(), batch.estimate.tolist())
        code, slot = self._check(batch)
        rejected: tuple[tuple[int, str], ...] = ()
        good = batch
        if code is not None:
            ok = code == _OK
            bad = np.flatnonzero(~ok)
            rejected = tuple((i, REJECT_REASONS[c]) for i, c in zip(bad.tolist(), code[bad].tolist()))
            for _, r in rejected:
                self._rejected[r] += 1
            keep = np.flatnonzero(ok)
            good = batch.take(keep)
            slot = slot[keep]
        m = len(good)
        if m == 0:
            return ObserveResult(0, rejected, np.empty(0))
        tde = np.empty(m)
        if m < SCALAR_BATCH:
            self._apply_scalar(np.arange(m), good.src, good.via, good.dst, slot,
                               good.latency, good.estimate, tde)
        else:
            self._apply_rounds(good.src, good.via, good.dst, slot, good.latency, good.estimate, tde)
        dc = self._col.take(good.dst)
        self._kdirty[good.src * self.nd + dc] = True
        self._kcols[dc] = True
        a = np.abs(tde)
        self._account(m, float(a.sum()) / m, float(a.max()))   # sum / m: np.mean's own value
        return ObserveResult(m, rejected, tde)

    def observe_one(self, src: int, via: int, dst: int, latency: float,
                    estimate: float | None = None, now: float | None = None) -> ObserveResult:
        """One hop observation (same rules as a one-row :meth:`observe`)."""
        if now is not None:
            self.now = float(now)
        e = math.nan if estimate is None else float(estimate)
        if self._variant is not None or self._split is not None:
            return self.observe(HopBatch.of([src], [via], [dst], [latency], [e]))
        return self._observe_rows([int(src)], [int(via)], [int(dst)], [float(latency)], [e])

    def _account(self, m: int, td_abs_mean: float, td_abs_max: float) -> None:
        self._updates += m
        w = 1.0 - 0.999 ** m
        self._td_mean = (1 - w) * self._td_mean + w * td_abs_mean
        self._td_max = td_abs_max

    def _observe_rows(self, xs: list[int], ys: list[int], ds: list[int], lats: list[float],
                      ests: list[float]) -> ObserveResult:
        """The per-row path: check and apply each row in Python floats, in order.

        Checks in REJECT_REASONS order, exactly like :meth:`_check`; the update is the
        same arithmetic as :meth:`_apply_vector`, one IEEE operation at a time.
        """
        n, K, nd = self.n, self.k, self.nd
        Qf, Nf, tdf = _flat(self.Q), _flat(self.N), _flat(self.td)
        slot_of, live, kdirty, kcols = self._slot_of, self.live, self._kdirty, self._kcols
        dcol = self._col
        s = self.settings
        ceil, sm = s.ceiling_s, s.td_smoothing
        keep = 1.0 - sm
        tab = self._steps()
        lim = len(tab)
        cap = self._count_cap
        inf = math.inf
        rejected: list[tuple[int, str]] = []
        tde: list[float] = []
        for i, (x, y, d, lat, e) in enumerate(zip(xs, ys, ds, lats, ests)):
            if not (0 <= x < n and 0 <= y < n and 0 <= d < n):
                reason = "unknown_node"
            else:
                j = slot_of.item(x, y)
                if j < 0:
                    reason = "not_neighbour"
                elif x == d:
                    reason = "at_destination"
                elif not (0.0 <= lat < inf):
                    reason = "bad_latency"
                elif e == e and not (0.0 <= e < inf):
                    reason = "bad_estimate"
                elif not live.item(x, j):
                    reason = "link_down"
                elif (dc := dcol.item(d)) < 0:
                    reason = "not_owned"
                else:
                    if y == d:
                        tail = 0.0
                    elif e == e:  # not NaN: the neighbour's own estimate
                        tail = e
                    else:  # absent slots hold inf, dead ones exactly the ceiling
                        rb = (y * nd + dc) * K
                        tail = min(Qf[rb:rb + K].tolist())
                    target = lat + tail
                    w = x * nd + dc
                    k = w * K + j
                    old = Qf.item(k)
                    nn = Nf.item(k) + 1
                    # saturates ("Counts"); an expression, not min(): no call per row
                    Nf[k] = nn if nn <= cap else cap  # noqa: FURB136
                    delta = target - old
                    new = old + (tab[nn] if nn < lim else self._step_beyond(nn)) * delta
                    Qf[k] = ceil if new > ceil else max(new, 0.0)
                    tdf[w] = keep * tdf.item(w) + sm * abs(delta)
                    kdirty[w] = True
                    kcols[dc] = True
                    tde.append(delta)
                    continue
            rejected.append((i, reason))
            self._rejected[reason] += 1
        if tde:
            a = [abs(t) for t in tde]
            self._account(len(tde), sum(a) / len(a), max(a))
        return ObserveResult(len(tde), tuple(rejected), np.array(tde, dtype=np.float64))

    def _steps(self) -> list[float]:
        """The step-size table (built on first use and after a reconfigure), as a list.

        ``tab[n]`` is the step for an entry's n-th update while ``n < len(tab)``; beyond
        it :meth:`_step_beyond` answers.  Tabulated once so the scalar and vector paths
        read the same float64 values to the bit.  Bounded: the table stops where the
        decaying step reaches its floor (every later count has exactly the floor, so the
        last entry stands for all of them), at most ``STEP_TABLE_MAX`` entries.
        """
        if self._alphas is None:
            self._build_steps()
        return self._alphas_list

    def _build_steps(self) -> None:
        s = self.settings
        clamped = True
        if s.step_mode == "constant":
            tab = np.full(2, s.alpha)
            top = 1
        else:
            size = STEP_TABLE_MAX
            if s.floor > 0:
                # where c / n^kappa first falls to the floor; a margin past the estimate,
                # then the exact index is found in the table itself (the same np.power)
                guess = (s.c / s.floor) ** (1.0 / s.kappa)
                if guess < STEP_TABLE_MAX - 64:
                    size = max(64, int(guess) + 64)
            nn = np.arange(size, dtype=np.float64)
            nn[0] = 1.0
            tab = np.maximum(s.floor, s.c / np.power(nn, s.kappa))
            at_floor = np.flatnonzero(tab[1:] == s.floor)
            # clamp only where every tabulated count from there on is at the floor (the
            # step is non-increasing in n, so the rest of the counts are too)
            if at_floor.size and bool((tab[at_floor[0] + 1:] == s.floor).all()):
                top = int(at_floor[0]) + 1
                tab = tab[:top + 1].copy()
            else:
                top = size - 1
                clamped = False
        self._alphas = tab
        self._alphas_list = tab.tolist()
        # counts above _alpha_top: the floor (clamped) or the formula (no floor reached)
        self._alpha_top = top
        self._alpha_clamped = clamped

    def _count_layout(self) -> tuple[np.dtype, int]:
        """(dtype, cap) of the update counts N under the current settings (see "Counts" in
        the module docstring): the narrowest of COUNT_TYPES holding every count that still
        changes a result.  With the plain rule and the TD exploration basis a count is
        read only for its step size, which is the floor from ``_alpha_top`` on (a constant
        step: from count 1), so a count saturating at ``cap >= _alpha_top - 1`` gives the
        same step at its next update as the true count would, bit for bit.  A step that
        never reaches its floor within the table, the visits basis (which sums counts) and
        the variants (their own rules read N) keep 32-bit counts."""
        s = self.settings
        need: int | None = None
        if s.variant == "plain" and s.explore_basis == "td":
            if s.step_mode == "constant":
                need = 1
            else:
                self._build_steps()
                if self._alpha_clamped:
                    need = max(1, self._alpha_top - 1)
        for t in COUNT_TYPES:
            top = int(np.iinfo(t).max)
            if need is not None and need <= top:
                return np.dtype(t), top
        return np.dtype(COUNT_TYPES[-1]), int(np.iinfo(COUNT_TYPES[-1]).max)

    def _step_beyond(self, nn: int) -> float:
        """The step for a count past the table (scalar paths)."""
        if self._alpha_clamped:
            return self._alphas_list[self._alpha_top]
        return float(self._step_formula(np.array([nn], dtype=np.int64))[0])

    def _step_formula(self, nn: np.ndarray) -> np.ndarray:
        s = self.settings
        # the same expression, element for element, as the table's construction
        return np.maximum(s.floor, s.c / np.power(nn.astype(np.float64), s.kappa))

    def step_sizes(self, counts: np.ndarray) -> np.ndarray:
        """The step size of each update count (>= 1) under the current settings."""
        self._steps()
        tab = self._alphas
        assert tab is not None
        nn = np.asarray(counts, dtype=np.int64)
        top = self._alpha_top
        if nn.size == 0 or int(nn.max()) <= top:
            return tab.take(nn)
        if self._alpha_clamped:
            return tab.take(np.minimum(nn, top))
        out = tab.take(np.minimum(nn, top))
        big = nn > top
        out[big] = self._step_formula(nn[big])
        return out

    def _apply_scalar(self, rows: np.ndarray, f: np.ndarray, v: np.ndarray, d: np.ndarray,
                      slot: np.ndarray, lat: np.ndarray, est: np.ndarray, tde: np.ndarray) -> None:
        """Checked rows, one at a time, in the order of ``rows``; TD errors into ``tde``."""
        nd, K = self.nd, self.k
        dcol = self._col
        Qf, Nf, tdf = _flat(self.Q), _flat(self.N), _flat(self.td)
        ceil = self.settings.ceiling_s
        sm = self.settings.td_smoothing
        keep = 1.0 - sm
        tab = self._steps()
        lim = len(tab)
        cap = self._count_cap
        r = rows.tolist()
        for i, x, y, dd, j, la, e in zip(r, f[rows].tolist(), v[rows].tolist(), d[rows].tolist(),
                                         slot[rows].tolist(), lat[rows].tolist(),
                                         est[rows].tolist()):
            if y == dd:
                tail = 0.0
            elif e == e:  # not NaN
                tail = e
            else:
                rb = (y * nd + dcol.item(dd)) * K
                tail = min(Qf[rb:rb + K].tolist())
            target = la + tail
            w = x * nd + dcol.item(dd)
            k = w * K + j
            old = Qf.item(k)
            nn = Nf.item(k) + 1
            Nf[k] = nn if nn <= cap else cap  # noqa: FURB136  (saturates; no call per row)
            delta = target - old
            new = old + (tab[nn] if nn < lim else self._step_beyond(nn)) * delta
            Qf[k] = ceil if new > ceil else max(new, 0.0)
            tdf[w] = keep * tdf.item(w) + sm * abs(delta)
            tde[i] = delta

    def _apply_rounds(self, f: np.ndarray, v: np.ndarray, d: np.ndarray, slot: np.ndarray,
                      lat: np.ndarray, est: np.ndarray, tde: np.ndarray) -> None:
        """Checked rows in exact order, vectorised in rounds (see the module docstring).

        Keys are (node, destination column) pairs ``x * nd + col(d)``; a row that reads
        nothing (y == d, or an estimate given) reads the sentinel key ``n * nd``, which no
        row writes.
        """
        nd, K = self.nd, self.k
        big = np.iinfo(np.int64).max
        scratch = self._scratch
        if scratch is None:
            scratch = self._scratch = np.full(self.n * nd + 1, big, dtype=np.int64)
        sentinel = self.n * nd
        dc = d if not self.partial else self._col.take(d)
        wkey = f * nd + dc
        at_d = v == d
        nan = np.isnan(est)
        need = nan & ~at_d
        rrow = v * nd + dc                            # the (y, d) row read (valid even if unused)
        rkey = np.where(need, rrow, sentinel)
        kflat = wkey * K + slot
        tail0 = np.where(nan | at_d, 0.0, est)      # y == d: nothing left to go
        cols = (kflat, wkey, rkey, rrow, need, tail0, lat)
        rem = np.arange(len(f))
        first = True
        while rem.size:
            if rem.size < SCALAR_BATCH:
                self._apply_scalar(rem, f, v, d, slot, lat, est, tde)
                return
            if first:
                W, R = wkey, rkey
            else:
                W, R = wkey[rem], rkey[rem]
            pos = np.arange(rem.size)
            # earliest writer of each key: blocked if an earlier row writes my key or
            # the key I read (the sentinel is never written)
            np.minimum.at(scratch, W, pos)
            blocked = (scratch[W] < pos) | (scratch[R] < pos)
            scratch[W] = big
            # an earlier *deferred* row reads the key I write (fixpoint: deferral spreads)
            nblocked = int(np.count_nonzero(blocked))
            while nblocked:
                Rb = R[blocked]
                np.minimum.at(scratch, Rb, pos[blocked])
                nb = blocked | (scratch[W] < pos)
                scratch[Rb] = big
                cnt = int(np.count_nonzero(nb))
                if cnt == nblocked:
                    break
                blocked, nblocked = nb, cnt
            if nblocked == 0:
                self._apply_vector(None if first else rem, cols, tde)
                return
            go = rem[~blocked]
            if go.size < max(4, rem.size // 16):
                # mostly a chain: the scalar path is cheaper than more rounds
                self._apply_scalar(rem, f, v, d, slot, lat, est, tde)
                return
            self._apply_vector(go, cols, tde)
            rem = rem[blocked]
            first = False

    def _apply_vector(self, rows: np.ndarray | None, cols: tuple[np.ndarray, ...],
                      tde: np.ndarray) -> None:
        """Rows (None: all) with pairwise-distinct write keys and no read of another's write key.

        Reads all happen before writes, so a row reading a key that a *later* row of the
        same round writes sees the old value, as it would in order.
        """
        nK, K = self.n * self.nd, self.k
        Qf, Nf, tdf = _flat(self.Q), _flat(self.N), _flat(self.td)
        s = self.settings
        if rows is None:
            k, w, _, rr, need, tail, la = cols
        else:
            k, w, _, rr, need, tail, la = (c[rows] for c in cols)
        # min over y's slots: absent slots hold inf and dead ones exactly the ceiling,
        # so no live mask is needed (an all-dead node reads the ceiling, as it should).
        # Rows that read nothing get a min too (of a valid row) and drop it: no masking
        if need.all():
            tail = _row_min(self.Q.reshape(nK, K).take(rr, axis=0))
        elif need.any():
            tail = np.where(need, _row_min(self.Q.reshape(nK, K).take(rr, axis=0)), tail)
        target = la + tail
        old = Qf.take(k)
        nn = Nf.take(k).astype(np.int64)
        nn += 1
        Nf[k] = np.minimum(nn, self._count_cap)     # saturates (see "Counts")
        delta = target - old
        alpha = self.step_sizes(nn)
        new = alpha * delta
        new += old
        np.minimum(new, s.ceiling_s, out=new)       # = np.clip(new, 0, ceiling): new is finite
        np.maximum(new, 0.0, out=new)
        Qf[k] = new
        sm = s.td_smoothing
        tdf[w] = (1.0 - sm) * tdf.take(w) + sm * np.abs(delta)
        if rows is None:
            tde[:] = delta
        else:
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
        if self._split is not None:      # the share step's boost restarts (splitting.event_boost)
            self._split.last_event = self.now
            self._split.link_event(src, j, up)   # what cannot wait for its turn
        if up:
            qd = np.where(self.live[dst][None, :], self.Q[dst], np.inf).min(axis=1)
            vy = np.where(np.isfinite(qd), qd, ceil)   # y's current best per destination
            fresh = self._link_delay[src, j] + np.where(self.owned == dst, 0.0, vy)
            self.Q[src, :, j] = np.minimum(fresh, ceil)
            self.N[src, :, j] = 0
            if self._split is not None:   # measured afresh: the old traffic is gone
                self._split.lk_cnt[src, j] = 0.0
                self._split.lk_sum[src, j] = 0.0
                self._split.slow_tau[src, j] = 0.0    # a repaired link: no remembered slowness
        else:
            self.Q[src, :, j] = ceil
        if self._variant is not None:
            self._variant.on_link(self, src, j, up)
        self._live_spt = None
        self._dirty[:] = True
        return True

    def link_is_up(self, src: int, dst: int) -> bool:
        return bool(self.live[src, int(self._slot_of[src, dst])])

    # ---- reading ----------------------------------------------------------------------
    def values(self) -> np.ndarray:
        """(n, nd) V[x, c] = min over x's live slots of Q[x, c, :] (0 where x is the
        destination); (n, n) with every destination owned."""
        # dead slots hold exactly the ceiling and absent ones inf, so the plain min over
        # all slots is the min over live ones (the ceiling when none is live)
        n, K, nd = self.n, self.k, self.nd
        q = np.empty((n, nd))
        step = max(1, (1 << 19) // max(1, nd * K))   # about 4 MB of Q per block
        for x0 in range(0, n, step):
            qb = self.Q[x0:x0 + step]
            out = q[x0:x0 + step]
            np.copyto(out, qb[:, :, 0])
            for c in range(1, K):
                np.minimum(out, qb[:, :, c], out=out)
        np.minimum(q, self.settings.ceiling_s, out=q)
        q[self.owned, np.arange(nd)] = 0.0
        return q

    def column(self, d: int) -> int:
        """The column of destination d in the per-destination arrays; KeyError when this
        engine does not own d."""
        c = int(self._col[d]) if 0 <= d < self.n else -1
        if c < 0:
            raise KeyError(f"destination {self.topo.nodes[d] if 0 <= d < self.n else d} "
                           "is not owned by this engine")
        return c

    def estimate(self, x: int, d: int) -> float:
        """x's current remaining-time estimate for d (what x reports as its own estimate)."""
        if x == d:
            return 0.0
        qy = self.Q[x, self.column(d)][self.live[x]]
        return float(qy.min()) if qy.size else self.settings.ceiling_s

    def published_estimate(self, x: int, d: int) -> float:
        """The Q-value of x's published greedy next hop for d (0 when x == d, the ceiling
        when x has no route): what x reports as its remaining estimate for the route it
        actually uses.  :meth:`estimate` is the min over live slots instead, the rule the
        update applies when a row carries no estimate."""
        if x == d:
            return 0.0
        if self._split is not None:
            p = self._split.pub[x, d]
            if not (p > 0).any():
                return self.settings.ceiling_s
            return float(min(np.where(p > 0, p * self.Q[x, d], 0.0).sum(), self.settings.ceiling_s))
        c = self.column(d)
        g = int(self.greedy[x, c])
        return float(self.Q[x, c, g]) if g >= 0 else self.settings.ceiling_s

    def published_estimates(self, xs: Any = None, ds: Any = None) -> np.ndarray:
        """:meth:`published_estimate` vectorised: for node and destination index arrays of
        one shape, that shape; with ``ds`` None, the (len(xs), nd) rows of nodes ``xs``
        (every node when ``xs`` is None too) over the owned destinations.  A destination
        this engine does not own: KeyError."""
        n, K, nd = self.n, self.k, self.nd
        if self._split is not None and xs is None and ds is None:   # the whole table, as is
            return _splitting.published_values(self._split.pub, self.Q, self.settings.ceiling_s,
                                               self._kern)
        if ds is None:
            rows = np.arange(n) if xs is None else np.asarray(xs, dtype=np.int64)
            x = np.repeat(rows, nd).reshape(len(rows), nd)
            d = np.broadcast_to(self.owned, x.shape)
            c = np.broadcast_to(np.arange(nd), x.shape)
        else:
            x, d = np.asarray(xs, dtype=np.int64), np.asarray(ds, dtype=np.int64)
            c = self._col[d] if self.partial else d
            if self.partial and c.size and int(c.min()) < 0:
                raise KeyError("published_estimates: a destination is not owned by this engine")
        if self._split is not None:   # split mode keeps a whole engine: column d is d
            return _splitting.published_values(self._split.pub, self.Q, self.settings.ceiling_s,
                                               self._kern)[x, d]
        w = x * nd + c
        g = _flat(self.greedy).take(w)
        q = _flat(self.Q).take(w * K + np.maximum(g, 0))
        out = np.where(g >= 0, q, self.settings.ceiling_s)
        out[x == d] = 0.0
        return out

    def next_hops(self) -> np.ndarray:
        """(n, nd) greedy next-hop node per (node, owned destination), -1 for none."""
        g = self.greedy
        return np.where(g >= 0, np.take_along_axis(self._slots, np.maximum(g, 0), axis=1), -1)

    def weights(self, x: int, d: int) -> list[tuple[int, float]]:
        """Published weights of x for d: ``[(next_hop, weight), ...]``, greedy first; sum 1.
        Empty when x has no route to d, or this engine does not own d."""
        c = int(self._col[d]) if 0 <= d < self.n else -1
        g = int(self.greedy[x, c]) if c >= 0 else -1
        if g < 0:
            return []
        if self._split is not None:
            p = self._split.pub[x, d].tolist()
            sl = self._slots[x].tolist()
            return [(sl[g], p[g])] + [(sl[j], v) for j, v in enumerate(p) if v > 0 and j != g]
        alts = np.flatnonzero(self.alt[x, c]).tolist()
        y = int(self._slots[x, g])
        if not alts:
            return [(y, 1.0)]
        e = float(self.eps[x, c])
        share = e / len(alts)
        return [(y, 1.0 - e)] + [(int(self._slots[x, a]), share) for a in alts]

    def seed_shares(self, W: np.ndarray) -> tuple[int, int]:
        """Split mode: replace whole destinations' internal shares with ``W`` (n, n, K)
        where that keeps every route and the graph acyclic (:func:`routerd.core.splitting.seed`);
        the next :meth:`decide` publishes them by its threshold.  Greedy mode: nothing
        (0, 0).  Journaled by the service as a ``guide`` record, replayed in place."""
        if self._split is None:
            return 0, 0
        return _splitting.seed(self._split, self, W)

    def published_shares(self) -> np.ndarray:
        """(n, columns, K) the published tables as slot shares ``W[x, c, j]`` (the layout
        of :meth:`weights`, every key at once: greedy ``1 - eps``, each alternate
        ``eps / count``; split mode its published shares).  A new array; keys without a
        route are all zero.  Read by the service's live optimality gap."""
        if self._split is not None:
            return self._split.pub.copy()
        g = self.greedy
        routed = g >= 0
        cnt = self.alt.sum(axis=2)
        has = cnt > 0
        share = np.where(has, self.eps / np.maximum(cnt, 1), 0.0)
        W = np.where(self.alt, share[:, :, None], 0.0)
        gw = np.where(has, 1.0 - self.eps, 1.0)
        xs, cs = np.nonzero(routed)
        W[xs, cs, g[xs, cs]] = gw[xs, cs]
        W[~routed] = 0.0
        return W

    def routes(self, x: int) -> dict[int, list[tuple[int, float]]]:
        """x's whole table: destination → weights."""
        return {d: w for d in self.owned.tolist() if d != x and (w := self.weights(x, d))}

    def routes_many(self, xs: Any = None) -> list[dict[int, list[tuple[int, float]]]]:
        """:meth:`routes` of each node in ``xs`` (every node by default), from whole-table
        arrays instead of one :meth:`weights` call per destination; the same tables, the
        same floats (greedy 1 - eps, each alternate eps / count, in slot order)."""
        rows = np.arange(self.n) if xs is None else np.asarray(xs, dtype=np.int64).reshape(-1)
        if self._split is not None:
            return [self.routes(int(x)) for x in rows.tolist()]
        if self._kern is not None:
            return _kernels.routes(self, rows)
        g = self.greedy[rows]
        sl = self._slots[rows]
        nh = np.take_along_axis(sl, np.maximum(g, 0), axis=1)
        alt = self.alt[rows]
        cnt = alt.sum(axis=2)
        e = self.eps[rows]
        has = cnt > 0
        gw = np.where(has, 1.0 - e, 1.0)
        share = np.where(has, e / np.maximum(cnt, 1), 0.0)
        out: list[dict[int, list[tuple[int, float]]]] = []
        own = self.owned.tolist()
        for i, x in enumerate(rows.tolist()):
            nhi, gwi, shi, hasi = (a.tolist() for a in (nh[i], gw[i], share[i], has[i]))
            sli = sl[i].tolist()
            alti = alt[i].tolist() if any(hasi) else None
            table: dict[int, list[tuple[int, float]]] = {}
            for c in np.flatnonzero(g[i] >= 0).tolist():
                d = own[c]
                if d == x:
                    continue
                if hasi[c] and alti is not None:
                    s_ = shi[c]
                    table[d] = [(nhi[c], gwi[c])] + [(sli[j], s_) for j, on in enumerate(alti[c])
                                                     if on]
                else:
                    table[d] = [(nhi[c], gwi[c])]
            out.append(table)
        return out

    def table_arrays(self, x: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """x's table (:meth:`routes`) as arrays, for encoding without a dict per entry:
        ``(dsts, counts, hops, weights)`` — the destinations in ascending order, how many
        next hops each has, and the next hops and weights of all of them in a row (per
        destination the greedy one first, then the alternates in slot order).  The same
        floats as :meth:`routes_many`."""
        _, dsts, counts, hops, w = self.table_arrays_many([x])
        return dsts, counts, hops, w

    def table_arrays_many(self, xs: Any) -> tuple[np.ndarray, np.ndarray, np.ndarray,
                                                    np.ndarray, np.ndarray]:
        """:meth:`table_arrays` of several nodes at once: ``(owner, dsts, counts, hops,
        weights)``, ``owner[i]`` the position in ``xs`` of destination entry i (entries
        grouped by node in the order of ``xs``, destinations ascending within each)."""
        rows = np.asarray(xs, dtype=np.int64).reshape(-1)
        if self._kern is not None and self._split is None:   # one compiled pass, the same arrays
            got = _kernels.table_arrays(self, rows)
            if got is not None:
                return got
        g = self.greedy[rows]
        ok = g >= 0
        ok[np.arange(len(rows)), rows] = False
        owner, dsts = np.nonzero(ok)
        xr = rows[owner]
        sl = self._slots[xr]                         # (m, K)
        gd = g[owner, dsts]
        alt = self.alt[xr, dsts]                     # (m, K)
        cnt = alt.sum(axis=1)
        e = self.eps[xr, dsts]
        has = cnt > 0
        gw = np.where(has, 1.0 - e, 1.0)
        share = np.where(has, e / np.maximum(cnt, 1), 0.0)
        m, k = alt.shape
        hops = np.empty((m, k + 1), dtype=np.int64)
        w = np.empty((m, k + 1), dtype=np.float64)
        hops[:, 0] = np.take_along_axis(sl, gd[:, None], axis=1)[:, 0]
        w[:, 0] = gw
        hops[:, 1:] = sl
        w[:, 1:] = share[:, None]
        keep = np.empty((m, k + 1), dtype=bool)
        keep[:, 0] = True
        keep[:, 1:] = alt
        if self._split is not None:   # its published shares themselves (:meth:`weights`)
            P = self._split.pub[xr, dsts]            # split mode keeps a whole engine: column d is d
            w[:, 0] = P[np.arange(m), gd]
            w[:, 1:] = P
            keep[:, 1:] = (P > 0) & (np.arange(k)[None, :] != gd[:, None])
            cnt = keep[:, 1:].sum(axis=1)
        return owner, dsts, cnt + 1, hops[keep], w[keep]

    # ---- decisions ------------------------------------------------------------------
    def _spt_live(self) -> np.ndarray:
        if self._live_spt is None:
            t = self.topo
            up = np.zeros(t.n_links, dtype=bool)
            up[t.slot_link[self.live]] = True
            if up.all():  # the static tree: computed once per topology
                nh = t.spt_next_hops()
            else:
                nh = t.shortest_paths(np.where(up, t.delay_s, np.inf))[1]
            # int32 as the topology keeps it: the static tree is its read-only array, no copy
            self._live_spt = np.ascontiguousarray(nh, dtype=np.int32)
        return self._live_spt

    def decide(self, now: float | None = None, limit: int | None = None) -> Decision:
        """Recompute tables for every destination touched since the last call.

        ``limit``: at most this many destinations take the full pass now; the others stay
        due (:meth:`pending`) and go first at the next calls, in a rotating order from
        the column after the last one taken (``_cursor``, part of the state), so none
        waits behind busier ones.  Every destination is decided on its own, so a limited
        call gives those destinations exactly what an unlimited one would; a shell that
        bounds its time per decision this way journals the limit, and replay passes it
        back.  The key lane (cheap, per key) is never limited; split mode decides every
        destination at every call and ignores it.
        """
        if limit is not None and limit < 1:
            raise ValueError(f"decide limit {limit} is below 1")
        if now is not None:
            self.now = float(now)
        if self._split is not None:
            return self._decide_split()
        # the values compared: Q, or a variant's (predictive marks moving destinations dirty)
        self._qdec = self.Q if self._variant is None else self._variant.decision_values(self)
        if self._kern is not None and limit is None and self._variant is None:
            # the key lane and the full pass in one compiled call on the engine's bound
            # arrays (routerd.core.kernels.decide_due: the same steps as below)
            got = _kernels.decide_due(self)
            if got is not None:
                nodes, changes, prevented, taken = got
                self._decisions += 1
                self._full_pass_destinations += taken
                self._route_changes += changes
                self._loops_prevented += prevented
                return Decision(nodes, changes, prevented)
        extra: frozenset[int] = frozenset()
        if self._kcols.any():
            if self._variant is None:
                if self._kern is not None and _kernels.decide_ok(self):
                    extra = _kernels.decide_keys(self)
                else:
                    extra = self._decide_keys()
            else:
                self._dirty |= self._kcols
            self._kdirty[:] = False
            self._kcols[:] = False
        cs = np.flatnonzero(self._dirty)      # columns due (destinations owned[cs])
        if limit is not None and cs.size > limit:
            k = int(np.searchsorted(cs, self._cursor))
            cs = np.concatenate((cs[k:], cs[:k]))[:limit]
            self._cursor = (int(cs[-1]) + 1) % self.nd
            self._dirty[cs] = False           # the rest stay due
            cs = np.sort(cs)
        else:
            self._dirty[:] = False
        self._decisions += 1
        if cs.size == 0:
            return Decision(extra, 0, 0)
        self._full_pass_destinations += int(cs.size)
        if self._kern is not None and _kernels.decide_ok(self):
            nodes, changes, prevented = _kernels.decide_full(self, cs)
        else:
            nodes, changes, prevented = self._decide_full(cs)
        self._route_changes += changes
        self._loops_prevented += prevented
        return Decision(nodes | extra, changes, prevented)

    @property
    def full_pass_destinations(self) -> int:
        """Destinations the full pass of :meth:`decide` has taken so far (not state: a
        measure for shells sizing ``decide(limit=...)``, and for benchmarks)."""
        return self._full_pass_destinations

    def pending(self) -> int:
        """Destinations due for the next :meth:`decide` (touched, or left by a limited one)."""
        return int(np.count_nonzero(self._dirty | self._kcols))

    def _decide_full(self, cs: np.ndarray) -> tuple[frozenset[int], int, int]:
        """The full pass over destination columns ``cs`` (destinations ``owned[cs]``; the
        numpy reference): writes the tables and returns (changed nodes, route changes,
        loops newly prevented).  In blocks of destinations (``_decide_block_size``), so its
        temporaries are (n, block) and (K, n, block), not (K, n, n): every step of the
        pass is per destination, so the blocks give the same tables and counters."""
        b = _decide_block_size(self.n)
        if cs.size <= b:
            return self._decide_block(cs)
        nodes: set[int] = set()
        changes = prevented = 0
        for i in range(0, cs.size, b):
            nb, cb, pb = self._decide_block(cs[i:i + b])
            nodes |= nb
            changes += cb
            prevented += pb
        return frozenset(nodes), changes, prevented

    def _decide_block(self, cs: np.ndarray) -> tuple[frozenset[int], int, int]:
        """:meth:`_decide_full` for one block of destination columns."""
        s = self.settings
        n, K = self.n, self.k
        m = cs.size
        ds = self.owned[cs]                            # the destinations, as nodes
        sel: Any = slice(None) if m == self.nd else cs  # a view, not a copy, when all are due
        xs = np.arange(n)
        live2 = self.live                                           # (n, K)
        best, bestv = self._best_live(sel, m)                       # (n, m)
        inc = self.greedy[:, sel]
        incv = self._q_at(cs, inc)
        keep = np.isfinite(incv) & ~(bestv < incv * (1.0 - s.margin))
        choice = np.where(keep, inc, best)
        choice = np.where(np.isfinite(bestv), choice, -1)
        choice[ds, np.arange(m)] = -1                               # x == d
        hyst = choice                                               # before loop prevention
        # loop freedom, per destination table (rows = destinations)
        slots_f = self._slots.reshape(-1)
        base = (xs * K)[:, None]
        nh = np.where(choice >= 0, slots_f[base + np.maximum(choice, 0)], -1).T.copy()
        prev_nh = np.where(inc >= 0, slots_f[base + np.maximum(inc, 0)], -1).T
        level = np.zeros(nh.shape, dtype=np.int8)
        c1 = np.zeros(nh.shape, dtype=bool)     # the loops of the hysteresis graph itself
        rows = np.arange(m)                     # tables that may still hold a loop
        for it in range(2 * n + 3):
            cyc_r = _loops.cycle_mask(nh[rows])
            hit = cyc_r.any(axis=1)
            if not hit.any():
                break
            rows, cyc_r = rows[hit], cyc_r[hit]
            cyc = np.zeros(nh.shape, dtype=bool)
            cyc[rows] = cyc_r
            if it == 0:
                c1 = cyc
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
        else:  # unreachable: the live shortest-path tree has no loop (ties break by hops)
            raise AssertionError("loop fallback did not converge")
        choice = np.where(nh.T >= 0, self._slot_of[xs[:, None], np.maximum(nh.T, 0)], -1).astype(np.int64)
        # exploration candidates: strictly lower (depth, index) potential, live, not greedy.
        # potential = depth * n + node (depth n + 1 = cannot reach d), so "lower" is one
        # integer compare; a candidate must also reach d (potential below (n + 1) * n)
        dep = _loops.depths(nh, ds).T                                # (n, m): depth of x for ds[i]
        pot = dep.astype(np.int64) * n + xs[:, None]
        routed = choice >= 0
        bound = np.where(routed, np.minimum(pot, (n + 1) * n), -1)  # unrouted: no candidate
        pot_ext = np.vstack([pot, np.full((1, m), np.iinfo(np.int64).max)])  # row n: never lower
        ys = np.where(live2, self._slots, n)                         # dead or absent -> row n
        altk = np.empty((K, n, m), dtype=bool)
        for c in range(K):
            np.less(pot_ext[ys[:, c]], bound, out=altk[c])
            altk[c] &= choice != c
        any_alt = altk.any(axis=0)
        alt = np.ascontiguousarray(altk.transpose(1, 2, 0))          # (n, m, K)
        # exploration share per (x, d)
        if s.explore_basis == "td":
            vx = self._q_at(cs, choice)
            rel = self.td[:, sel] / np.maximum(np.where(np.isfinite(vx), vx, s.ceiling_s), 1e-12)
            frac = np.minimum(1.0, rel / s.td_ref)
        else:
            Nd = self.N[:, sel, :]
            visits = Nd[:, :, 0].astype(np.int64)      # counts are narrow: sum wide
            for c in range(1, K):
                visits += Nd[:, :, c]
            frac = s.visits_half / (s.visits_half + visits)
        eps = np.minimum(s.explore_min + (s.explore_max - s.explore_min) * frac, s.eps_max)
        eps = np.where(any_alt, eps, 0.0)
        # what changed
        old_g = self.greedy[:, sel]
        changed_g = (old_g != choice)
        old_alt = self.alt[:, sel, :]
        changed_w = changed_g | (np.abs(self.eps[:, sel] - eps) > 1e-9)
        for c in range(K):
            changed_w |= old_alt[:, :, c] != alt[:, :, c]
        # a loop prevented counts once, when a key is first held on a fallback (or moved to
        # another one), not again at every decision that keeps it there
        forced = choice != hyst
        prevented = int((forced & ~(self._forced[:, sel] & ~changed_g)).sum())
        self.greedy[:, sel] = choice
        self.alt[:, sel, :] = alt
        self.eps[:, sel] = eps
        self._forced[:, sel] = forced
        self._hyst[:, sel] = hyst
        # the next full pass, with these choices as incumbents and the same hysteresis
        # graph, lands on these choices again when every key held off its hysteresis
        # choice was on a loop of the hysteresis graph itself (see _decide_keys)
        self._stable[cs] = ~(forced & ~c1.T).any(axis=0)
        nodes = frozenset(np.flatnonzero(changed_w.any(axis=1)).tolist())
        return nodes, int(changed_g.sum()), prevented

    def _decide_split(self) -> Decision:
        """Split mode: every destination, or the next block of them in turn
        (``split_per_decision``), every call (routerd.core.splitting)."""
        assert self._split is not None
        self._kdirty[:] = False
        self._kcols[:] = False
        self._dirty[:] = False
        self._decisions += 1
        nodes, changes, prevented = _splitting.decide(self._split, self, self.now)
        self._route_changes += changes
        self._loops_prevented += prevented
        return Decision(frozenset(nodes), changes, prevented)

    def _decide_keys(self) -> frozenset[int]:
        """The key-level lane of :meth:`decide`, exact: the same tables as the full pass.

        For a destination d the core observe path touched (and nothing else marked
        dirty), only keys (x, d) it wrote, or whose published choice is a loop fallback,
        can get another hysteresis choice: every other key's Q row, liveness, incumbent
        and margin are those its published choice was computed from, and that choice
        is a fixed point of the hysteresis rule.  Where one of those keys changes its
        hysteresis choice (for a fallback key: from the one the last full pass held it
        off, ``_hyst``), d is left to the full pass (loop check, depths, candidates).
        Where none does, d's hysteresis graph is the one the last full pass saw.  If that
        pass moved only nodes on the graph's own loops (``_stable[d]``), a full pass now
        would move the same nodes to their previous choices, which are the published
        ones, and find no loop after: the same tables, no loop newly prevented.  So a
        persistent fallback does not force the full pass (it did on every call before,
        and counted the same loop every time).  Otherwise d goes to the full pass.  With
        the graph kept, the candidates stay; only the written keys' exploration shares
        can move (their TD error, visits and Q-values changed), computed here with the
        full pass's formula.  Returns the nodes whose weights changed.
        """
        n, K, nd = self.n, self.k, self.nd
        s = self.settings
        cols = self._kcols & ~self._dirty
        kd = self._kdirty.reshape(n, nd) & cols[None, :]
        wk = np.flatnonzero(kd | (self._forced & cols[None, :]))
        if wk.size == 0:
            return frozenset()
        xk = wk // nd
        dk = wk - xk * nd                            # columns; destinations owned[dk]
        Q2 = self.Q.reshape(n * nd, K)
        r = np.arange(wk.size)
        q = Q2.take(wk, axis=0)
        lv = self.live.take(xk, axis=0)
        qm = np.where(lv, q, np.inf)
        best = qm.argmin(axis=1)                     # first slot on ties, like _best_live
        bestv = qm[r, best]
        inc = _flat(self.greedy).take(wk)
        si = np.maximum(inc, 0)
        incv = np.where((inc >= 0) & lv[r, si], q[r, si], np.inf)
        keep = np.isfinite(incv) & ~(bestv < incv * (1.0 - s.margin))
        ch = np.where(keep, inc, best)
        ch = np.where(np.isfinite(bestv), ch, -1)
        ch[xk == self.owned.take(dk)] = -1
        fw = _flat(self._forced).take(wk)
        moved = ch != np.where(fw, _flat(self._hyst).take(wk), inc)
        moved |= fw & ~self._stable.take(dk)
        full = np.zeros(nd, dtype=bool)
        full[dk[moved]] = True
        self._dirty |= full
        # written keys of destinations that keep their greedy graph: shares only
        obs = kd.reshape(-1).take(wk) & ~full.take(dk)
        if not obs.any():
            return frozenset()
        wo, xo, ro, g = wk[obs], xk[obs], r[obs], inc[obs]
        any_alt = self.alt.reshape(n * nd, K).take(wo, axis=0).any(axis=1)
        if s.explore_basis == "td":
            vx = np.where(g >= 0, incv[ro], np.inf)   # the incumbent's value (live or inf)
            vxc = np.where(np.isfinite(vx), vx, s.ceiling_s)
            rel = _flat(self.td).take(wo) / np.maximum(vxc, 1e-12)
            frac = np.minimum(1.0, rel / s.td_ref)
        else:
            Nd = self.N.reshape(n * nd, K).take(wo, axis=0)
            visits = Nd[:, 0].astype(np.int64)          # counts are narrow: sum wide
            for c in range(1, K):
                visits += Nd[:, c]
            frac = s.visits_half / (s.visits_half + visits)
        eps = np.minimum(s.explore_min + (s.explore_max - s.explore_min) * frac, s.eps_max)
        eps = np.where(any_alt, eps, 0.0)
        ef = _flat(self.eps)
        changed = np.abs(ef.take(wo) - eps) > 1e-9
        ef[wo] = eps
        return frozenset(xo[changed].tolist())

    def _best_live(self, sel: Any, m: int) -> tuple[np.ndarray, np.ndarray]:
        """(slot, value) of the lowest live estimate per (node, destination in sel).

        Works through Q in blocks of nodes small enough to stay in cache, one slot
        column at a time (first slot on ties, like ``np.argmin``); dead slots count as inf.
        """
        n, K = self.n, self.k
        best = np.zeros((n, m), dtype=np.int64)
        bestv = np.empty((n, m))
        live = self.live
        step = max(1, (1 << 19) // max(1, m * K))   # about 4 MB of Q per block
        for x0 in range(0, n, step):
            x1 = min(n, x0 + step)
            qb = self._qdec[x0:x1, sel, :]
            bb, bv = best[x0:x1], bestv[x0:x1]
            for c in range(K):
                col = qb[:, :, c]
                lc = live[x0:x1, c]
                if not lc.all():
                    col = np.where(lc[:, None], col, np.inf)
                if c == 0:
                    bv[:] = col
                    continue
                bb[col < bv] = c
                np.minimum(bv, col, out=bv)
        return best, bestv

    def _q_at(self, cs: np.ndarray, slot: np.ndarray) -> np.ndarray:
        """Q[x, cs[i], slot[x, i]] (cs: columns) where that slot is live, else inf (slot -1: inf)."""
        n, K = self.n, self.k
        xs = np.arange(n)[:, None]
        sl = np.maximum(slot, 0)
        v = _flat(self._qdec).take((xs * self.nd + cs[None, :]) * K + sl)
        ok = (slot >= 0) & _flat(self.live).take(xs * K + sl)
        return np.where(ok, v, np.inf)

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
            pending_destinations=int((self._dirty | self._kcols).sum()),
            **({} if self._split is None else {
                "split_publications": self._split.publications,
                "split_share_moves": self._split.share_moves,
                "split_whole_publications": self._split.whole_publications,
                "split_fallbacks": self._split.fallbacks}),
        )

    _ARRAYS = ("Q", "N", "td", "greedy", "eps", "alt", "live", "_dirty")
    _SCALARS = ("now", "_updates", "_td_mean", "_td_max", "_route_changes",
                "_loops_prevented", "_decisions")

    def export_state(self, copy: bool = True) -> dict[str, Any]:
        """Everything needed to restore this engine exactly: arrays and scalars.  Arrays
        are copies unless ``copy=False`` (views for a snapshot written before the engine
        changes again, e.g. from a forked child's copy-on-write memory)."""
        out: dict[str, Any] = {k: getattr(self, k).copy() if copy else getattr(self, k)
                               for k in self._ARRAYS}
        out.update({k: getattr(self, k) for k in self._SCALARS})
        out["_dirty"] = self._dirty | self._kcols   # the key lane's destinations are due too
        out["_hyst"] = self._hyst.copy()
        out["_cursor"] = self._cursor
        out["rejected"] = dict(self._rejected)
        out["topology"] = self.topo.digest
        if self.partial:      # a whole engine's state has no key: older states read the same
            out["owned"] = self.owned.copy()
        if self._variant is not None:
            out["variant"] = self._variant.export()
        if self._split is not None:
            out["split"] = self._split.export()
        return out

    @classmethod
    def from_state(cls, topology: Topology, settings: EngineSettings,
                   state: Mapping[str, Any], *, owned: Any = None) -> Engine:
        """The engine :meth:`export_state` saved, with the owned destinations it was saved
        with; ``owned`` (None: whatever the state says) must then be the same set, or the
        state a whole engine's (its owned columns are taken: exact, see the module
        docstring; a shard's state from before engines had owned destinations)."""
        if state.get("topology") != topology.digest:
            raise ValueError("state was saved for another topology "
                             f"({state.get('topology')} != {topology.digest})")
        n = topology.n
        saved = _owned_columns(n, state.get("owned"))[0]
        cut: np.ndarray | None = None
        # an owning engine's state under a variant (a shard worker restarted with one): a
        # whole engine, the saved columns in place, the others fresh (never published)
        spread: np.ndarray | None = None
        if saved.size < n and owned is None and settings.variant != "plain":
            spread, saved = saved, np.arange(n, dtype=np.int64)
        if owned is not None:
            want = _owned_columns(n, owned)[0]
            if saved.size == n and want.size < n:
                cut, saved = want, want
            elif not np.array_equal(saved, want):
                raise ValueError(f"state was saved for {saved.size} owned destinations, not "
                                 f"the {want.size} asked for (another shard's state, or "
                                 "another shard map)")
        eng = cls(topology, settings, owned=saved if saved.size < n else None)

        def columns(k: str, a: np.ndarray) -> np.ndarray:
            if spread is not None and k != "live":
                full = getattr(eng, k).copy()
                if k == "_dirty":
                    full[:] = True            # every destination due once
                else:
                    full[:, spread] = a
                return full
            if cut is None or k == "live":
                return a
            return a[cut] if k == "_dirty" else a[:, cut]

        eng._bound = None   # holds the arrays replaced below: let each go as it is
        for k in cls._ARRAYS:
            a = columns(k, np.asarray(state[k]))
            cur = getattr(eng, k)
            if a.shape != cur.shape:
                raise ValueError(f"state array {k} has shape {a.shape}, expected {cur.shape}")
            if k == "N":
                # counts saved wider (int64 before they were narrowed, or under other
                # settings) saturate at this engine's cap: the same steps from here on
                setattr(eng, k, _saturated(a, eng._count_cap, cur.dtype))
                continue
            setattr(eng, k, np.array(a, dtype=cur.dtype, order="C", copy=True))
        for k in cls._SCALARS:
            setattr(eng, k, type(getattr(eng, k))(state[k]))
        eng._rejected = {r: int(state["rejected"].get(r, 0)) for r in REJECT_REASONS}
        eng._live_spt = None
        # the hysteresis choices behind the published ones (older states lack them: taken
        # as the published ones); which destinations are stable is not saved, so any
        # fallback of a due destination sends it to the full pass once
        if "_hyst" in state:
            h = columns("_hyst", np.asarray(state["_hyst"]))
            if h.shape != eng.greedy.shape:
                raise ValueError(f"state array _hyst has shape {h.shape}, "
                                 f"expected {eng.greedy.shape}")
            eng._hyst = np.array(h, dtype=eng._hyst.dtype, order="C", copy=True)
        else:
            eng._hyst = eng.greedy.astype(eng._hyst.dtype)
        eng._forced = eng.greedy != eng._hyst
        eng._stable[:] = False
        # older states have no cursor: nothing was left by a limited decide then
        cur = int(state.get("_cursor", 0))
        eng._cursor = cur if 0 <= cur < eng.nd and spread is None and cut is None else 0
        if eng._variant is not None and "variant" in state:
            eng._variant.restore(state["variant"])
        if eng._split is not None and "split" in state:
            eng._split.restore(state["split"])
        # saved under another ceiling: restore the invariants the update relies on
        # (present slots within [0, ceiling], dead ones exactly at it, absent ones inf)
        ceil = settings.ceiling_s
        dead = np.broadcast_to((eng._present & ~eng.live)[:, None, :], eng.Q.shape)
        if not (np.all(eng.Q[dead] == ceil) and np.all(eng.Q[eng.Q < math.inf] <= ceil)):
            q = np.where(eng._present[:, None, :], np.minimum(eng.Q, ceil), np.inf)
            q[dead] = ceil
            eng.Q = np.ascontiguousarray(q)
        return eng

    def same_state(self, other: Engine) -> bool:
        """Bit-for-bit equality of learned state (for restart and replay checks)."""
        return all(np.array_equal(getattr(self, k), getattr(other, k), equal_nan=True)
                   for k in ("owned", "Q", "N", "td", "greedy", "eps", "alt", "live")) and (
            self._cursor == other._cursor) and (
            self._variant is None and other._variant is None
            or self._variant is not None and self._variant.same(other._variant)) and (
            self._split is None and other._split is None
            or self._split is not None and self._split.same(other._split))


def _owned_columns(n: int, owned: Any) -> tuple[np.ndarray, np.ndarray]:
    """(owned destinations sorted, column of each node or -1) for ``owned`` node indices
    (None: all n).  ValueError for an index outside the node list or an empty set."""
    if owned is None:
        own = np.arange(n, dtype=np.int64)
    else:
        own = np.unique(np.asarray(owned, dtype=np.int64).reshape(-1))
        if own.size == 0:
            raise ValueError("owned destinations: the set is empty")
        if int(own[0]) < 0 or int(own[-1]) >= n:
            raise ValueError(f"owned destinations: index {int(own[0]) if own[0] < 0 else int(own[-1])} "
                             f"is outside the {n} nodes")
    col = np.full(n, -1, dtype=np.int64)
    col[own] = np.arange(own.size, dtype=np.int64)
    return own, col


def _decide_block_size(n: int) -> int:
    """Destinations per block of the reference full pass: its (n, block) int64
    temporaries stay near 2 MB each (the compiled pass has its own, smaller blocks)."""
    return max(1, DECIDE_BLOCK_BYTES // (8 * max(1, n)))


def _saturated(a: np.ndarray, cap: int, dtype: np.dtype) -> np.ndarray:
    """A C-ordered copy of counts ``a`` in ``dtype``, each at most ``cap`` (and at least
    0), converted a block of rows at a time (no full-size wide temporary)."""
    out = np.empty(a.shape, dtype=dtype)
    if a.ndim == 0 or a.shape[0] == 0:
        out[...] = np.clip(a, 0, cap)
        return out
    step = max(1, (1 << 20) // max(1, a[0].size))
    for i in range(0, a.shape[0], step):
        out[i:i + step] = np.clip(a[i:i + step], 0, cap)
    return out


def _flat(a: np.ndarray) -> np.ndarray:
    """A 1-d view of a state array (never a copy: writes through it must land)."""
    if not a.flags.c_contiguous:
        raise RuntimeError("engine state array is not C-contiguous")
    return a.reshape(-1)


def _row_min(g: np.ndarray) -> np.ndarray:
    """Min of each row of a short-rowed (m, K) array.

    numpy's ``min(axis=1)`` over a short inner axis runs a slow per-row loop; one
    transposing copy makes it a reduction over K long contiguous rows, several times
    faster and the same values (min is exact).
    """
    return np.ascontiguousarray(g.T).min(axis=0)


def settings_with(settings: EngineSettings, **changes: Any) -> EngineSettings:
    """A copy with some fields changed (checked again)."""
    known = {f.name for f in fields(EngineSettings)}
    unknown = set(changes) - known
    if unknown:
        raise ValueError(f"unknown engine settings: {sorted(unknown)}")
    return replace(settings, **changes)
