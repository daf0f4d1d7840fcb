"""The simulator's routing policies (thin adapters over :class:`routerd.sim.policy.Policy`) and
the registry that names them.

Owns: ``shortest`` (static delay-shortest paths), ``reroute`` (delay-shortest paths
recomputed over the live links after a detection delay: the honest baseline for link
failures), ``ecmp`` (equal-cost multipath by a hash of the flow id), ``qrouting`` (drives :class:`routerd.core.engine.Engine` with the hop
observations a real network would give) and :func:`get` / :data:`NAMES`.  ``mindelay``
lives in :mod:`routerd.sim.mindelay` and is imported only when asked for.
Must not import: zmq, prometheus, matplotlib.

qrouting, theory of operation.  When x hands a packet for d to y and it reaches y, y's
remaining estimate is taken at that moment and the row
``(x, y, d, hop latency, estimate)`` becomes due at x after the link's propagation delay
(``sim.feedback = delayed``) or at once (``instant``, as in Boyan & Littman 1994).  Rows
are buffered; every ``sim.decision_interval_s`` the due rows are applied with one
``Engine.observe`` batch (in the order they became due) and ``Engine.decide(now)``
recomputes the tables.  Between ticks the engine's Q-values do not change, so the
estimates are read from a cached copy of ``Engine.values()`` refreshed after each batch.
Which estimate y reports is ``sim.estimate``: ``published`` (default) is the Q-value of
the next hop y actually publishes (its greedy slot, ``Engine.published_estimate``), updated
after each tick only where a row was applied or a greedy hop moved; ``min`` is ``engine.estimate(y, d)``,
the minimum over y's live slots.  They differ because hysteresis and loop prevention
keep y off its argmin: with ``min``, never-corrected optimistic entries for next hops
that loop prevention forbids (e.g. back towards the sender) are reported as y's
estimate, the detour never looks worse than the congested bottleneck, and the learner
stays on the shortest path.  Measured on the demo lab at 1800 packets/s: ``min`` 64 ms
mean delivery and 10% drops, ``published`` 6.7 ms and none.
Forwarding samples the published weights (``Engine.weights``) with the run's generator;
entries with a single next hop go straight into the fast-path ``table``.
On the simulator's compiled loop (``routerd.sim._hops``, ``engine.kernels``) the same work
takes shortcuts with the same results: split entries are sampled in C from
``split_arrays()`` with this module's draws and arithmetic, the table refresh after each
decide is compiled (``_hops.refresh``; the numpy ``_refresh`` is the reference), and the
rows go into a compiled row store (:meth:`QRouting.hop_rows`, ``_hops.QRows``) that
orders and cuts them at a tick and, after ``Engine.decide``, refreshes the tables and the
published estimates (the numpy reference: :meth:`on_hops`, :meth:`tick`,
:meth:`_decide`); where it does not apply (split mode, dual) hops arrive in batches
(:meth:`on_hops`).
"""
from __future__ import annotations

import importlib
from itertools import chain
from typing import Any

import numpy as np

from routerd.core.demand import (Meter, Rates, estimate, guide_shares, inputs_for, learner_slow,
                                 model_capacity, published_view, solve)
from routerd.core.engine import Engine, EngineSettings, HopBatch
from routerd.core.errors import InputError, Problem
from routerd.core.topology import Topology
from routerd.io.config import split_fits

from .core import hops_module
from .policy import Policy


class Shortest(Policy):
    """Static delay-shortest paths, computed once (what an operator has today).

    Routes do not follow link events: packets sent onto a dead link are dropped.
    """

    name = "shortest"

    def attach(self, topology: Topology, rng: np.random.Generator, settings: Any) -> None:
        super().attach(topology, rng, settings)
        self.table = topology.spt_next_hops().tolist()

    def next_hop(self, x: int, d: int, flow: int, now: float) -> int:
        assert self.table is not None
        return self.table[x][d]


class Reroute(Policy):
    """Delay-shortest paths recomputed over the live links, ``sim.reroute.detect_s``
    after each link event (what a link-state routing protocol gives an operator: the
    failure is detected — e.g. 3 missed probes at 100 ms, ``agent.detect_multiplier`` x
    ``agent.probe_interval_s`` — then every node runs shortest paths on the new map).

    Theory of operation.  ``on_link`` only notes ``(now + detect_s, link, up)``; ticks
    every ``sim.reroute.tick_s`` apply the notes that are due, in order, and when the set
    of live links changed recompute every route (Dijkstra per destination on link delays,
    dead links at infinite weight: :meth:`Topology.shortest_paths`, the same tree
    ``shortest`` uses when nothing is down) and rewrite the fast-path table in place.  So
    a recomputation happens at the first tick at or after the detection time.  Until then
    packets sent onto the dead link are dropped, as they would be in the network.  A
    destination cut off from a node gets no route (-1: dropped as no route).  Every node
    switches at the same instant (no per-node flooding delay), which flatters the
    baseline slightly; no transient micro-loops either.
    """

    name = "reroute"

    def attach(self, topology: Topology, rng: np.random.Generator, settings: Any) -> None:
        super().attach(topology, rng, settings)
        self.detect_s = float(settings["sim.reroute.detect_s"]) if settings is not None else 0.3
        self.tick_interval_s = float(settings["sim.reroute.tick_s"]) if settings is not None else 0.01
        self.table = topology.spt_next_hops().tolist()
        self._up = np.ones(topology.n_links, dtype=bool)       # as the routing knows it
        self._pending: list[tuple[float, int, bool]] = []
        self.recomputations = 0
        self.events_seen = 0

    def on_link(self, x: int, y: int, up: bool, now: float) -> None:
        self._pending.append((now + self.detect_s, self.topo.link_index[(x, y)], up))
        self.events_seen += 1

    def tick(self, now: float) -> None:
        if not self._pending or self._pending[0][0] > now:
            return
        due = [p for p in self._pending if p[0] <= now]
        self._pending = [p for p in self._pending if p[0] > now]
        before = self._up.copy()
        for _, k, up in due:   # in event order: a down then an up within one tick cancel
            self._up[k] = up
        if np.array_equal(before, self._up):
            return
        self.recompute()

    def recompute(self) -> None:
        """Shortest paths over the links currently known to be up, into ``table``."""
        t = self.topo
        if self._up.all():
            nh = t.spt_next_hops()
        else:
            nh = t.shortest_paths(np.where(self._up, t.delay_s, np.inf))[1]
        assert self.table is not None
        for x, row in enumerate(nh.tolist()):
            self.table[x][:] = row
        self.recomputations += 1

    def next_hop(self, x: int, d: int, flow: int, now: float) -> int:
        assert self.table is not None
        return self.table[x][d]

    def stats(self) -> dict[str, float]:
        return {"reroute_recomputations": float(self.recomputations),
                "reroute_detect_s": self.detect_s}


def _mix(flow: int, x: int) -> int:
    """A 32-bit integer hash of (flow, node) (Knuth's multiplicative hashing, TAOCP 6.4,
    then a xorshift); node-dependent so each node splits independently."""
    h = (flow * 2654435761 + x * 40503 + 0x9E3779B9) & 0xFFFFFFFF
    h ^= h >> 15
    h = (h * 2246822519) & 0xFFFFFFFF
    h ^= h >> 13
    return h


class Ecmp(Policy):
    """Equal-cost multipath over delay-shortest paths: every neighbour y with
    delay(x, y) + D(y, d) equal to D(x, d) (relative tolerance 1e-9) is a next hop; a
    packet picks one by a hash of its flow id, so a flow keeps one path."""

    name = "ecmp"
    rel_tol = 1e-9

    def attach(self, topology: Topology, rng: np.random.Generator, settings: Any) -> None:
        super().attach(topology, rng, settings)
        n = topology.n
        D = topology.shortest_delays()
        self.choices: list[list[tuple[int, ...]]] = [[() for _ in range(n)] for _ in range(n)]
        table = [[-1] * n for _ in range(n)]
        for x, nb in enumerate(topology.neighbours):
            if not nb:
                continue
            ys = np.array(nb)
            w = np.array([topology.delay_s[topology.link_index[(x, y)]] for y in nb])
            cost = w[:, None] + D[ys, :]                     # (deg, n)
            best = cost.min(axis=0)
            eq = cost <= best * (1 + self.rel_tol) + 1e-15
            live = np.isfinite(best)
            live[x] = False
            if len(ys) > 62:   # one bit per neighbour would not fit an int64: per destination
                for d in np.flatnonzero(live).tolist():
                    hops = tuple(int(y) for y in ys[eq[:, d]])
                    self.choices[x][d] = hops
                    table[x][d] = hops[0] if len(hops) == 1 else -2
                continue
            # each destination's set of next hops as a bit mask over the neighbours (in
            # their order), each distinct set built once: n tuples per node were most of a
            # 500-node attach
            masks = np.where(live, (eq.astype(np.int64) << np.arange(len(ys))[:, None]).sum(axis=0), 0)
            sets: dict[int, tuple[int, ...]] = {0: ()}
            firsts: dict[int, int] = {0: -1}
            for m in set(masks.tolist()) - {0}:
                hops = tuple(int(ys[k]) for k in range(len(ys)) if m >> k & 1)
                sets[m] = hops
                firsts[m] = hops[0] if len(hops) == 1 else -2
            ml = masks.tolist()
            self.choices[x] = list(map(sets.__getitem__, ml))
            table[x] = list(map(firsts.__getitem__, ml))
        self.table = table

    def next_hop(self, x: int, d: int, flow: int, now: float) -> int:
        hops = self.choices[x][d]
        if not hops:
            return -1
        return hops[_mix(flow, x) % len(hops)]


def _any_last(a: np.ndarray) -> np.ndarray:
    """``a.any(axis=-1)`` for a bool array, several times faster for short last axes
    (numpy's reduction over a short inner axis is slow; a byte sum is not)."""
    if a.shape[-1] >= 256:  # a byte sum could wrap
        return a.any(axis=-1)
    return np.einsum("...k->...", a.view(np.uint8)) > 0


#: up to this many (node, destination) keys, the keys a tick refreshes are collected in a
#: mask (a fixed cost per tick) rather than by np.unique (a cost per key and per call)
_KEY_MASK_MAX = 1 << 16


class _Guide:
    """Split mode with ``engine.optimum.guide`` on simulated time: the service's background
    optimiser (:mod:`routerd.service.optimum`) as the simulator can run it.

    The rows the engine accepted are counted (:class:`routerd.core.demand.Meter`); every
    ``engine.optimum.interval_s`` of simulated time (the first time after
    ``engine.optimum.first_s``) the counts become smoothed rates
    (``engine.optimum.window_s``), flow deviation runs on the measured demand over the
    live links (:func:`routerd.core.demand.solve`, to its gap or 500 iterations: no wall
    clock, so a run is reproducible), and a feasible result seeds the engine's shares
    ``engine.optimum.budget_s`` later (the most a service run may take before its result
    waits for the loop) through :meth:`Engine.seed_shares`, as the service's guide record
    does.  Not modelled: the service's rest after a long run (at most a fifth of a core)
    and a run stopped by its budget with a worse routing; so this is the guide at its best.
    """

    def __init__(self, topo: Topology, settings: Any, kernels: Any):
        self.topo = topo
        self.meter = Meter(topo, kernels)
        self.rates = Rates.empty(topo.n, topo.n_links)
        self.interval = float(settings["engine.optimum.interval_s"])
        self.window = float(settings["engine.optimum.window_s"])
        self.lag = float(settings["engine.optimum.budget_s"])
        self.packet_bytes = float(settings["engine.optimum.packet_bytes"])
        # the first run after engine.optimum.first_s, as the service's runner does
        self.next_at = min(float(settings["engine.optimum.first_s"]), self.interval)
        self.taken_at = 0.0
        self.pending: tuple[float, np.ndarray] | None = None
        self.runs = self.infeasible = self.guides = self.seeded = self.left = 0

    @classmethod
    def for_policy(cls, topo: Topology, settings: Any, es: EngineSettings) -> _Guide | None:
        """The guide where the service would run one (split mode, the optimiser on, the
        network within ``engine.optimum.max_nodes``), else None."""
        if (settings is None or es.mode != "split" or not settings["engine.optimum.guide"]
                or float(settings["engine.optimum.interval_s"]) <= 0
                or topo.n > int(settings["engine.optimum.max_nodes"])):
            return None
        return cls(topo, settings, es.kernels)

    def count(self, ids: np.ndarray, latency: np.ndarray, rejected: Any) -> None:
        """The rows of one observe (``ids``: from, via, destination), less those rejected."""
        if len(rejected):
            keep = np.ones(ids.shape[1], dtype=bool)
            keep[[i for i, _ in rejected]] = False
            ids, latency = ids[:, keep], latency[keep]
        self.meter.add(ids[0], ids[1], ids[2], latency)

    def step(self, engine: Engine, now: float) -> None:
        """Apply a result that is due, then run the optimiser when its interval is up."""
        if self.pending is not None and now >= self.pending[0]:
            got = engine.seed_shares(self.pending[1])
            self.pending = None
            self.guides += 1
            self.seeded += got[0]
            self.left += got[1]
        # one run at a time, as the service's runner waits for its child: a result still
        # in flight is applied before the next run starts (with interval_s < budget_s each
        # run used to replace the one before it unapplied, and nothing was ever seeded)
        if now < self.next_at or self.pending is not None:
            return
        self.next_at = now + self.interval
        self.rates.update(self.meter.take(), now - self.taken_at, now, self.window)
        self.taken_at = now
        demand = self.rates.demand()
        size = estimate(self.topo, self.rates, self.window, self.packet_bytes)
        if demand.sum() <= 0 or size <= 0:
            return
        shares, live, owned = published_view(engine)
        cap = model_capacity(self.topo, self.rates, self.window, size, learner_slow(engine))
        job = inputs_for(self.topo, shares, live, demand, size, owned, cap)
        res = solve(job)
        self.runs += 1
        if not res.feasible:
            self.infeasible += 1
            return
        self.pending = (now + self.lag, guide_shares(self.topo, job["keep"], res.fractions))


class QRouting(Policy):
    """The learning engine in the loop.  See the module docstring."""

    name = "qrouting"

    def attach(self, topology: Topology, rng: np.random.Generator, settings: Any) -> None:
        #: why the engine runs another mode than the config's (None: it does not)
        self.mode_why: str | None = None
        if settings is not None:   # split mode above engine.split.max_nodes runs greedy
            settings, self.mode_why = split_fits(settings, topology.n)
        super().attach(topology, rng, settings)
        es = EngineSettings.from_config(settings) if settings is not None else EngineSettings()
        self.engine = Engine(topology, es)
        self.tick_interval_s = float(settings["sim.decision_interval_s"]) if settings is not None else 0.05
        self.instant = settings is not None and settings["sim.feedback"] == "instant"
        n = topology.n
        self._prop: list[dict[int, float]] = [{} for _ in range(n)]
        for k, (a, b) in enumerate(zip(topology.src.tolist(), topology.dst.tolist())):
            self._prop[a][b] = 0.0 if self.instant else float(topology.delay_s[k])
        # rows not yet due: carried over from earlier ticks (an array), then the rows
        # reported since the last tick, per hop (on_hop: tuples) or batched (on_hops:
        # arrays); a run uses one of the two.  The arrays are column-major, (6, m): due
        # time, x, y, d, hop latency, estimate
        self._rows: list[tuple[float, int, int, int, float, float]] = []
        self._carry = np.empty((6, 0))
        self._chunks: list[np.ndarray] = []
        self._propn = np.zeros((n, n))                   # _prop as a matrix, for on_hops
        if not self.instant:
            self._propn[topology.src, topology.dst] = topology.delay_s
        self.table = [[-1] * n for _ in range(n)]
        self._split: list[dict[int, tuple[tuple[int, ...], tuple[float, ...]]]] = [
            {} for _ in range(n)]
        self._slots = topology.slots.astype(np.int64)
        # the compiled refresh where engine.kernels allows it and the arrays suit it
        self._hops = hops_module(es.kernels)
        eng_arrays = (self.engine.greedy, self.engine.eps, self.engine.alt)
        if not all(a.flags.c_contiguous for a in eng_arrays) or self.engine.greedy.dtype != np.int64:
            self._hops = None
        self._slots_ext = np.concatenate(
            [self._slots, np.full((n, 1), -1, dtype=np.int64)], axis=1)
        self._slot_rows: list[list[int]] = self._slots.tolist()
        self._greedy_hop: list[list[int]] = [[-1] * n for _ in range(n)]
        self._eps_row: list[list[float]] = [[0.0] * n for _ in range(n)]
        self._u: list[float] = []
        self._ui = 0
        self.rows_applied = 0
        self.rows_rejected = 0
        self.ticks = 0
        self.estimate_mode = settings["sim.estimate"] if settings is not None else "published"
        self._gh = np.full((n, n), -1, dtype=np.int64)   # greedy next hop per entry, as refreshed
        self._eps_np = np.full((n, n), np.nan)           # its share and candidates, as refreshed
        self._alt_np = np.zeros((n, n, topology.slots.shape[1]), dtype=bool)
        self._vals_np = np.full((n, n), -1, dtype=np.int64)  # split mode: table as refreshed
        self._moved: list[np.ndarray] = []               # keys x * n + d whose greedy hop moved
        # dual (routerd.core.variants): a packet also carries its sender's estimate back towards
        # its source; the source is the flow id's pair, (src * n + dst) * flows_per_pair + r
        self.hop_flow = es.variant == "dual"
        self._flows_per_src = n * (int(settings["sim.flows_per_pair"]) if settings is not None else 8)
        self._nbrs = [set(nb) for nb in topology.neighbours]
        self.backward_rows = 0
        self._refresh(range(n))
        #: split mode with engine.optimum.guide: the optimiser on simulated time
        self.guide = _Guide.for_policy(topology, settings, es)
        self._alt_u8: np.ndarray | None = None   # split_arrays' view of engine.alt
        self._qrows: Any = None      # the compiled row store (hop_rows), made on first use
        self._q_bound: Any = None    # the Q array it reads
        self._set_estimates()

    # -- forwarding ----------------------------------------------------------------
    def _refresh(self, nodes: Any) -> None:
        """Bring the fast-path rows of ``nodes`` up to the engine's published tables
        (only entries whose greedy hop, share or candidates changed are rewritten).

        Entries that split traffic become -2; their weights are read from
        ``Engine.weights`` on first use after each change (a tick touches far fewer
        (node, destination) pairs than a table holds)."""
        xs = np.fromiter(nodes, dtype=np.int64)
        if xs.size == 0:
            return
        eng = self.engine
        if eng.settings.mode == "split":
            self._refresh_split(xs)
            return
        if self._hops is not None:  # the same loop, compiled (routerd.sim._hops.refresh)
            moved_keys = np.empty(xs.size * eng.n, dtype=np.int64)
            nm = self._hops.refresh(
                eng.greedy, eng.eps, eng.alt.view(np.uint8), self._slots, self._gh,
                self._eps_np, self._alt_np.view(np.uint8), xs, self.table, self._greedy_hop,
                self._eps_row, self._split, moved_keys)
            self._moved.append(moved_keys[:nm])
            return
        # every node (the usual case on a busy network): views instead of gathered copies
        sel: Any = slice(None) if xs.size == eng.n else xs
        g = eng.greedy[sel]                                            # (m, n) slot
        # slot -1 (no next hop) reads the appended -1 column
        nh = self._slots_ext[xs[:, None], g]
        e = eng.eps[sel]
        alt = eng.alt[sel]
        explore = (g >= 0) & _any_last(alt) & (e > 0)                 # zero share: greedy only
        vals = np.where(explore, -2, nh)
        gh_old = self._gh[sel]
        moved_now = gh_old != nh
        moved = np.nonzero(moved_now)                                  # greedy hops that moved
        self._moved.append(xs[moved[0]] * self.engine.n + moved[1])
        # only entries whose inputs (greedy hop, share, candidates) changed are rewritten;
        # the others, and their cached splits, are what a rebuild would give again
        changed = moved_now | (self._eps_np[sel] != e) | _any_last(self._alt_np[sel] != alt)
        self._gh[sel] = nh
        self._eps_np[sel] = e
        self._alt_np[sel] = alt
        table = self.table
        assert table is not None
        gh, er, sp = self._greedy_hop, self._eps_row, self._split
        per_row = changed.sum(axis=1)
        # a row with many changes is rewritten whole (in place: the simulator holds the
        # row lists), which is cheaper than entry by entry and gives the same lists
        whole = per_row > max(8, self.engine.n // 16)
        for i in np.flatnonzero(whole).tolist():
            x = int(xs[i])
            table[x][:] = vals[i].tolist()
            gh[x][:] = nh[i].tolist()
            er[x][:] = e[i].tolist()
            spx = sp[x]
            if spx:
                for d in np.flatnonzero(changed[i]).tolist():
                    spx.pop(d, None)
        changed[whole] = False
        ii, dd = np.nonzero(changed)
        for x, d, v, h, ev in zip(xs[ii].tolist(), dd.tolist(), vals[ii, dd].tolist(),
                                  nh[ii, dd].tolist(), e[ii, dd].tolist()):
            table[x][d] = v
            gh[x][d] = h
            er[x][d] = ev
            sp[x].pop(d, None)

    def _refresh_split(self, xs: np.ndarray) -> None:
        """Split mode: every entry of ``xs`` from the published shares (greedy = largest)."""
        eng = self.engine
        table = self.table
        assert table is not None
        sel: Any = slice(None) if xs.size == eng.n else xs   # every node: views, not copies
        g = eng.greedy[sel]
        nh = self._slots_ext[xs[:, None], g]       # slot -1 (no next hop) reads the -1 column
        multi = _any_last(eng.alt[sel]) & (g >= 0)
        vals = np.where(multi, -2, nh)
        hop_moved = self._gh[sel] != nh
        moved = np.nonzero(hop_moved)
        self._moved.append(xs[moved[0]] * eng.n + moved[1])
        # only the rows that differ from what they hold are rewritten (in place: the
        # simulator holds the row lists); the others already hold these values
        row_v = (vals != self._vals_np[sel]).any(axis=1)
        row_h = hop_moved.any(axis=1)
        self._gh[sel] = nh
        self._vals_np[sel] = vals
        gh, sp = self._greedy_hop, self._split
        for i in np.flatnonzero(row_v | row_h).tolist():
            x = int(xs[i])
            if row_v[i]:
                table[x][:] = vals[i].tolist()
            if row_h[i]:
                gh[x][:] = nh[i].tolist()
        for x in xs.tolist():   # every refreshed node's published shares changed
            sp[x].clear()

    def split(self, x: int, d: int) -> tuple[tuple[int, ...], tuple[float, ...]]:
        """(next hops, cumulative weights) of x for d, cached until x's table changes.

        Exactly ``Engine.weights(x, d)`` (greedy hop first with 1 - eps, then each
        alternate in slot order with an equal share of eps; a test holds them equal),
        built from the rows cached at the last refresh instead of a numpy call per entry.
        """
        sp = self._split[x].get(d)
        if sp is None and self.engine.settings.mode == "split":
            ws = self.engine.weights(x, d)
            acc = 0.0
            cum = []
            for _, wv in ws:
                acc += wv
                cum.append(acc)
            cum[-1] = 1.0
            sp = (tuple(h for h, _ in ws), tuple(cum))
            self._split[x][d] = sp
        if sp is None:
            sl = self._slot_rows[x]
            alts = [sl[j] for j, on in enumerate(self.engine.alt[x, d].tolist()) if on]
            e = self._eps_row[x][d]
            hops = (self._greedy_hop[x][d], *alts)
            if not alts:
                sp = (hops, (1.0,))
            else:
                share = e / len(alts)
                acc = 1.0 - e
                cum = [acc]
                for _ in alts:
                    acc += share
                    cum.append(acc)
                cum[-1] = 1.0
                sp = (hops, tuple(cum))
            self._split[x][d] = sp
        return sp

    @property
    def compiled_splits(self) -> bool:
        """Whether the compiled loop may sample this policy's split entries (-2) from
        :meth:`split_arrays`: greedy mode's exploration shares; split mode's shares come
        from the engine's weights, which only :meth:`next_hop` reads."""
        return self.engine.settings.mode != "split"

    def split_arrays(self) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """What the compiled loop (``routerd.sim._hops``) samples a split entry from, with
        :meth:`next_hop`'s arithmetic: greedy hops and shares as refreshed, the engine's
        candidate slots (bytes), the slot table.  None of them is copied."""
        alt = self.engine.alt
        if self._alt_u8 is None or self._alt_u8.base is not alt:   # one view while alt stays
            self._alt_u8 = alt.view(np.uint8)
        return self._gh, self._eps_np, self._alt_u8, self._slots

    def draws(self) -> tuple[list[float], int]:
        """The forwarding draws: the current block and the index of the next unused one."""
        return self._u, self._ui

    def set_draws(self, block: Any, index: int) -> None:
        """Hand the draws back after the compiled loop used them (same rng, same order)."""
        self._u = block.tolist() if isinstance(block, np.ndarray) else list(block)
        self._ui = index

    def next_hop(self, x: int, d: int, flow: int, now: float) -> int:
        if self.table[x][d] != -2:  # type: ignore[index]
            return self.table[x][d]  # type: ignore[index]
        sp = self._split[x].get(d) or self.split(x, d)
        if self._ui >= len(self._u):
            self._u = self.rng.random(4096).tolist()
            self._ui = 0
        u = self._u[self._ui]
        self._ui += 1
        hops, cum = sp
        for h, c in zip(hops, cum):
            if u < c:
                return h
        return hops[-1]

    # -- learning ------------------------------------------------------------------
    def on_hop(self, x: int, y: int, d: int, latency_s: float, now: float, flow: int = -1) -> None:
        if self._V_lag:
            self._sync_V()
        if x >= 0:
            self._rows.append((now + self._prop[x][y], x, y, d, latency_s, self._V[y][d]))
            if flow >= 0:  # dual: the backward row, at y about x towards the packet's source
                s = flow // self._flows_per_src
                if s != y and x in self._nbrs[y]:
                    self._rows.append((now, y, x, s, latency_s, self._V[x][s]))
                    self.backward_rows += 1

    def on_hops(self, x: np.ndarray, y: np.ndarray, d: np.ndarray, latency_s: np.ndarray,
                now: np.ndarray, flow: np.ndarray) -> None:
        """:meth:`on_hop` for a batch of hops in order (the compiled loop's): the same rows."""
        if self.hop_flow:  # dual's backward rows interleave: row by row
            for row in zip(x.tolist(), y.tolist(), d.tolist(), latency_s.tolist(),
                           now.tolist(), flow.tolist()):
                self.on_hop(*row)
            return
        if not (x >= 0).all():
            keep = x >= 0
            x, y, d, latency_s, now = x[keep], y[keep], d[keep], latency_s[keep], now[keep]
        a = np.empty((6, x.size))
        np.add(now, self._propn[x, y], out=a[0])
        a[1] = x
        a[2] = y
        a[3] = d
        a[4] = latency_s
        a[5] = self._Vn[y, d]
        self._chunks.append(a)

    def hop_rows(self) -> Any:
        """The compiled loop's row store (``routerd.sim._hops.QRows``: :meth:`on_hops`, the
        ordering and cut of :meth:`tick` and the refresh and estimates of :meth:`_decide`
        compiled, with the same results), or None where it does not apply: the numpy
        path (``engine.kernels``), split mode, dual's backward rows, an engine that does
        not own every destination, rows already buffered the numpy way."""
        eng = self.engine
        if (self._hops is None or eng.settings.mode == "split" or self.hop_flow
                or eng.partial or self._rows or self._chunks or self._carry.shape[1]
                or eng.Q.dtype != np.float64 or not eng.Q.flags.c_contiguous):
            return None
        if self._qrows is None:
            self._qrows = self._hops.QRows(
                self._propn, self._Vn, eng.Q, float(eng.settings.ceiling_s), eng.greedy,
                eng.eps, eng.alt.view(np.uint8), self._slots, self._gh, self._eps_np,
                self._alt_np.view(np.uint8), self.table, self._greedy_hop, self._eps_row,
                self._split)
            self._q_bound = eng.Q
        return self._qrows

    def _tick_rows(self, now: float) -> None:
        """:meth:`tick` on the compiled row store: the same batches, the same decide,
        the same tables and estimates (``_hops.QRows``)."""
        qr = self._qrows
        eng = self.engine
        cols = qr.take(now, self.instant)
        if cols is not None:
            res = eng.observe(HopBatch(*cols), now)
            self.rows_applied += res.accepted
            self.rows_rejected += len(res.rejected)
        dec = eng.decide(now)
        self.ticks += 1
        self._moved = []
        if eng.Q is not self._q_bound:   # the engine replaced its array
            qr.bind_q(eng.Q)
            self._q_bound = eng.Q
        # with the plain engine only the applied keys' Q-values changed (see _decide)
        inc = self.estimate_mode == "published" and eng.settings.variant == "plain"
        nk = qr.step(sorted(dec.changed_nodes) if dec.changed_nodes else (), inc)
        if not inc:
            self._set_estimates()
        elif nk:  # the list twin (on_hop's) is rebuilt on its first use
            self._V = None
            self._V_lag = [(np.empty(0, np.int64),) * 2 + (np.empty(0),)]

    def _pending(self) -> np.ndarray:
        """Every row not yet applied, as a (6, m) array: the rows carried over (in the
        order of their due times, ties in the order reported), then the new ones in the
        order they were reported."""
        parts = [self._carry] if self._carry.shape[1] else []
        if self._rows:
            # one flat pass over the tuples: much cheaper than np.array(list of tuples)
            parts.append(np.fromiter(chain.from_iterable(self._rows), dtype=np.float64,
                                     count=6 * len(self._rows)).reshape(-1, 6).T)
            self._rows = []
        parts += self._chunks
        self._chunks = []
        if len(parts) == 1:
            return parts[0]
        return np.concatenate(parts, axis=1) if parts else self._carry

    def tick(self, now: float) -> None:
        if self._qrows is not None:
            if self._rows or self._chunks or self._carry.shape[1]:
                raise RuntimeError("qrouting: hops reported both to the compiled row store "
                                   "and to on_hop/on_hops in one run")
            self._tick_rows(now)
            return
        rows = self._pending()
        self._carry = rows[:, :0]
        if rows.shape[1]:
            # every row in due-time order, stable (ties keep the order reported; the rows
            # carried over are already in that order and come first): the due rows, in
            # the order they are applied, are a prefix, the rest is carried over (a
            # stable sort of the due rows alone gives the same order)
            a = rows.take(np.argsort(rows[0], kind="stable"), axis=1)
            k = a.shape[1] if self.instant else int(np.searchsorted(a[0], now, side="right"))
            self._carry = a[:, k:]
            if k:
                a = a[:, :k]
                ids = a[1:4].astype(np.int64)
                res = self.engine.observe(HopBatch(ids[0], ids[1], ids[2], a[4], a[5]), now)
                self.rows_applied += res.accepted
                self.rows_rejected += len(res.rejected)
                if self.guide is not None:
                    self.guide.count(ids, a[4], res.rejected)
                    self.guide.step(self.engine, now)
                self._decide(now, ids[0] * self.engine.n + ids[2])
                return
        if self.guide is not None:
            self.guide.step(self.engine, now)
        self._decide(now, np.empty(0, dtype=np.int64))

    def _decide(self, now: float, written: np.ndarray | None = None) -> None:
        """Decide, refresh the changed table rows and the estimates.  ``written``: the
        keys x * n + d of the rows just observed (None: refresh every estimate).  With
        the plain engine only those keys' Q-values changed, so a published estimate
        moves only there or where a greedy hop moved; anything else refreshes all."""
        dec = self.engine.decide(now)
        self.ticks += 1
        self._moved = []
        if dec.changed_nodes:
            self._refresh(sorted(dec.changed_nodes))
        if (written is None or self.estimate_mode != "published"
                or self.engine.settings.variant != "plain"
                or self.engine.settings.mode == "split"):
            self._set_estimates()
            return
        n = self.engine.n
        if n * n <= _KEY_MASK_MAX:  # sorted unique keys by a mask: np.unique's result, cheaper
            mask = np.zeros(n * n, dtype=bool)
            mask[written] = True
            for mv in self._moved:
                mask[mv] = True
            keys = np.flatnonzero(mask)
        else:
            keys = np.unique(np.concatenate([written, *self._moved]))
        if keys.size == 0:
            return
        xk, dk = np.divmod(keys, n)
        vals = self.engine.published_estimates(xk, dk)
        self._Vn.reshape(-1)[keys] = vals
        # the list twin (on_hop's) catches up on its first use: on_hops never needs it;
        # a lag as large as the table is dropped (the twin is then rebuilt whole)
        self._V_lag.append((xk, dk, vals))
        self._V_lag_rows += keys.size
        if self._V_lag_rows > n * n:
            self._V_lag = [(np.empty(0, np.int64),) * 2 + (np.empty(0),)]
            self._V = None

    def _sync_V(self) -> None:
        """Bring ``_V`` (lists, per-hop reads) up to ``_Vn`` (the array)."""
        V = self._V
        if V is None:
            self._V = self._Vn.tolist()
        else:
            for xk, dk, vals in self._V_lag:
                for x, d, v in zip(xk.tolist(), dk.tolist(), vals.tolist()):
                    V[x][d] = v
        self._V_lag = []
        self._V_lag_rows = 0

    def _set_estimates(self) -> None:
        """Each node's remaining estimate per destination, as it would report it: ``_Vn``
        (an array, read by on_hops) and ``_V`` (the same as lists, read by on_hop, made
        from ``_Vn`` on on_hop's first read: the batched paths never read it, and a
        split-mode run sets the estimates at every decision)."""
        eng = self.engine
        vn = eng.values() if self.estimate_mode == "min" else eng.published_estimates()
        self._Vn = np.array(vn, dtype=np.float64, order="C")   # C: _decide writes it flat
        self._V: list[list[float]] | None = None
        # a lag entry makes on_hop call _sync_V, which rebuilds _V whole from _Vn
        self._V_lag: list[tuple[np.ndarray, np.ndarray, np.ndarray]] = [
            (np.empty(0, np.int64),) * 2 + (np.empty(0),)]
        self._V_lag_rows = 0
        if self._qrows is not None:
            self._qrows.bind_values(self._Vn)

    def on_link(self, x: int, y: int, up: bool, now: float) -> None:
        self.engine.set_link(x, y, up, now)
        self._decide(now)

    def stats(self) -> dict[str, float]:
        s = self.engine.statistics()
        return {
            "engine_updates": float(s.updates),
            "engine_rows_rejected": float(self.rows_rejected),
            "engine_route_changes": float(s.route_changes),
            "engine_loops_prevented": float(s.loops_prevented),
            "engine_decisions": float(s.decisions),
            "engine_exploration_share": float(s.exploration_share),
            "engine_td_error_mean_s": float(s.td_error_mean_s),
            "engine_split_publications": float(s.split_publications),
            "engine_split_whole_publications": float(s.split_whole_publications),
            "engine_split_fallbacks": float(s.split_fallbacks),
            **({} if self.guide is None else {
                "optimum_runs": float(self.guide.runs),
                "optimum_infeasible": float(self.guide.infeasible),
                "optimum_guides": float(self.guide.guides),
                "optimum_seeded_destinations": float(self.guide.seeded),
                "optimum_left_destinations": float(self.guide.left)}),
        }


#: name -> "module:Class"; imported on first use, so a policy module that does not exist
#: yet (or needs an optional dependency) breaks only its own name.
REGISTRY: dict[str, str] = {
    "shortest": "routerd.sim.policies:Shortest",
    "reroute": "routerd.sim.policies:Reroute",
    "ecmp": "routerd.sim.policies:Ecmp",
    "qrouting": "routerd.sim.policies:QRouting",
    "mindelay": "routerd.sim.mindelay:MinDelay",
    # the closed loop: a live `routerd serve` routes; `service:ENDPOINTS` names a running one
    "service": "routerd.sim.closedloop:ServicePolicy",
}
NAMES: tuple[str, ...] = tuple(REGISTRY)


def get(name: str) -> type[Policy]:
    """The policy class registered under ``name`` (an argument after ``:`` is ignored
    here); InputError if unknown or unavailable."""
    ref = REGISTRY.get(name.partition(":")[0])
    if ref is None:
        raise InputError(Problem("--policy", name, f"is not a policy ({', '.join(NAMES)})"))
    mod, cls = ref.split(":")
    try:
        m = importlib.import_module(mod)
    except ModuleNotFoundError as e:
        if e.name == mod:
            raise InputError(Problem("--policy", name,
                                     f"is not available in this build ({mod} is missing)")) from None
        raise
    found = getattr(m, cls, None)
    if found is None:
        raise InputError(Problem("--policy", name, f"is not available in this build ({ref} is missing)"))
    return found  # type: ignore[no-any-return]


def make(name: str) -> Policy:
    """A fresh policy; ``NAME:ARG`` hands ARG to a policy that takes one (``takes_argument``)."""
    base, sep, arg = name.partition(":")
    cls = get(base)
    if not sep:
        return cls()
    if not getattr(cls, "takes_argument", False):
        raise InputError(Problem("--policy", name, f"policy {base!r} takes no argument after ':'"))
    return cls(arg)  # type: ignore[call-arg]
