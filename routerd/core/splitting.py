"""The ``split`` learning mode of the engine: load splitting by marginal delivery cost.

Owns: the settings of ``engine.mode = split`` (:data:`FIELDS`), the per-link rate and
latency estimates, the marginal-cost arithmetic (:func:`link_marginals`), the share step
(:func:`share_step`), the weighted-graph loop check (:func:`cyclic`), seeding shares from
outside (:func:`seed`) and the split state (:class:`SplitState`: export, restore, comparison).
Pure: numpy and the standard library only — no sockets, files, clocks, YAML or metrics;
time comes in as the engine's ``now``.  Must not import routerd.core.engine (the engine imports
this module and hands itself in; only its arrays are used).

Theory of operation
-------------------
Start: one share on each next hop of the live delay-shortest tree (what ``reroute``
routes), whatever the initial estimates.

Still Q-routing at the core: ``Q[x, d, j]`` is learned from hop rows by the engine's own
TD update with Robbins–Monro steps (Boyan & Littman 1994), unchanged.  Split mode adds
three things around it.

1. *Link estimates from every hop.*  Each accepted row ``(x, y, d, l)`` also feeds the
   link x → y (slot j): an exponentially weighted count ``cnt`` and latency sum ``sum``,
   both decayed with ``exp(-(now - t) / window)`` (``split_window_s``) when a row arrives
   at a later ``now``.  So ``F = cnt / window`` is the link's measured rate (packets/s)
   and ``L = (sum + k L0) / (cnt + k)`` its measured mean hop latency, pulled towards the
   idle latency ``L0 = p + tau`` by ``k = split_prior`` samples' worth of prior (p the
   propagation delay, tau the link's service time, see below).  A link that stops
   carrying traffic drifts back to ``L0`` within a few windows instead of keeping a stale
   value.  The same rows also count per (node, destination) key: ``t[x, d]`` is the rate
   of d's traffic at x.  Within one ``now`` the decay factor is exactly 1, so these
   updates are plain ordered sums (``np.add.at`` adds in index order): batched ==
   sequential holds bit for bit.

2. *Every entry fresh.*  At each decision, every live slot is refreshed for *every*
   destination from its link's latency estimate, whichever destination's traffic
   measured it::

       Q[x, d, j] += refresh * (L[x, j] + V[y, d] - Q[x, d, j])        (V[d, d] = 0)

   with ``V[y, d] = sum_z w[y, d, z] Q[y, d, z]`` y's published estimate (its shares
   ``w``).  No entry keeps its initial value: a used link's entries follow its measured
   latency, an idle link's its idle latency L0 plus the neighbour's estimate (not the
   optimistic propagation-only start value that made greedy's argmin a stale entry).

3. *Shares moved by marginal cost* (Gallager, "A minimum delay routing algorithm using
   distributed computation", IEEE Trans. Comm. 25, 1977; Bertsekas & Gallager, Data
   Networks, 2nd ed., §5.7).  Per link, from the measured rate F and queueing-plus-
   transmission time ``s = L - p`` (M/M/1: ``s = 1/(C - F)``, so ``C = F + 1/s``)::

       marginal   m = d/dF [F L(F)] = L + F s^2         (= C/(C-F)^2 + p, Kleinrock)
       externality e = m - L = F s^2                     (what one more packet costs the others)
       curvature  h = d2/dF2 [F L] = 2 s^2 + 2 F s^3    (= 2C/(C-F)^3)

   The service time tau of an idle link is its capacity over the mean packet size,
   estimated as the median over links with traffic of ``s / (1 + F s)`` (= 1/C) times
   their capacity: so an idle link's marginal is ``p + tau``, not an optimistic ``p``.
   *The rate as a leading signal* (``split_rate_model``, 0.97).  Near capacity the
   measured latency lags: the queue takes seconds to build (an M/M/1 queue's relaxation
   time grows like ``(1 - sqrt(rho))^-2``), so shares kept moving onto a link until its
   queue showed, then left it, and link loads swung between 0.7 and 1.0 over ~5 s on the
   geometric graph at 1.2x.  The measured rate answers a share change within the rate
   window.  So the latency the marginal, externality and curvature are computed from is
   ``max(L, p + tau / (1 - min(F tau, rho_max)))``: the measured one, or the stationary
   M/M/1 sojourn (Kleinrock: ``1/(C - F)``) of the measured rate on the link's known
   capacity (``tau`` as above, from its capacity in b/s), with the utilisation capped at
   ``rho_max`` (past it the carried rate says nothing more; the queue, i.e. the measured
   latency, does).  The refresh of the entries (2) keeps the measured latency.  Measured
   (``bench/split_points.py``, 3 seeds): geometric 1.2x 1.28 -> 1.22 of mindelay, geant
   1.2x 1.11 -> 1.06, abilene 1.2x's per-second CV 2.0 -> 1.1 of mindelay's.  Tried and
   dropped: taking the curvature from the model alone (or the smaller of the two) makes
   flow leave an overloaded link fast, but every key leaves at once and the network
   collapsed into sustained overload (geometric, geant 1.2x: 2.1-2.4x, 3-7% drops).
   Nor only on links whose queue holds over half the buffer, with ``max_step`` 0.1-0.3
   against the herd: abilene's cold start at 1.2x came to 9-11 s, but the geometric graph
   at 1.2x went to 1.24-1.39x with up to +0.9 points of drops; ``max_step`` 0.2 alone:
   geometric 1.16x, abilene 1.11x and its cold start 20-29 s.  The settings trade one
   network against another there.
   Along the current share graph (acyclic, see 4) the engine sums, per (x, d)::

       M[x, d] = sum_j w_j (m[x, j] + M[y_j, d])         link marginal distance
       E[x, d] = sum_j w_j (e[x, j] + E[y_j, d])         downstream externality
       H[x, d] = sum_j w_j (h[x, j] F[x, j] + H[y_j, d]) downstream flow-weighted curvature

   The marginal delivery cost of next hop j is the learned estimate plus the
   externality, ``delta_j = Q[x, d, j] + e[x, j] + E[y_j, d]`` (with accurate estimates
   ``Q = L + V_y``, this is Gallager's ``m + M_y``).  Candidates are the live next hops of
   strictly lower potential ``M[y, d] < M[x, d]``; j* is the candidate of least delta;
   every other candidate gives up::

       dw_j = min(w_j, max_step', eta * (delta_j - delta_j*) / (H_j + H_j*))

   to j*, where ``H_j = g[x, j] + H[y_j, d]`` sums the *flow-weighted* curvature
   ``g = h F`` along the path: the second-derivative-scaled projection step of Bertsekas &
   Gallager §5.7 (moving ``dF`` from path j to j* changes the cost by
   ``-(delta_j - delta_j*) dF + (H_j + H_j*) dF^2 / 2``), written per unit *share* of every
   key crossing the path at once: if all of them take the same step, the total flow moved
   is one Newton step, so many nodes acting on the same congested link do not herd.  Near
   capacity h grows like ``(C - F)^-3`` and the step onto a loaded path shrinks: the shares
   do not oscillate across a saturating link.  The price: on an *overloaded* link the
   measured rate is the carried one and the sojourn is capped by the buffer, so its M/M/1
   curvature is enormous and flow leaves it slowly (tried and measured: capping the
   leaving path's curvature at 3-10x the receiving one's fixed a two-bridge network at
   1.2x load but made geant and a random geometric graph collapse there).
   ``eta = step * b * dt / window`` and ``max_step' = min(max_step * b * dt /
   window, 1)`` (dt: the observed time since the previous decision, i.e. from the newest
   observation it had seen to the newest one now), so a full step takes about one rate
   window however often decisions come.  ``b`` (:func:`event_boost`) is 1 but after a
   link goes down or up: ``1 + (boost - 1) exp(-(now - t_event) / boost_s)``
   (``split_boost`` 3, ``split_boost_s`` 2 s), a large step while the shares are far from
   the new optimum, decaying to the tracking step (Darken & Moody's "search then
   converge" schedule, 1992, with a floor: Benveniste, Métivier & Priouret 1990).
   Measured on abilene's busiest link cut at 0.5x: back within 10% of the level before
   4.0-4.3 s after the repair, against 5.3 s without.  Not at the start: a boost there
   did not shorten the cold start (abilene 1.2x, 3 seeds: 10-40 s, against 10-25 s),
   whose first seconds are one overloaded link draining at the curvature-limited pace.  Next hops already used may keep a share even
   when uphill (forcing them to zero at once made the noisy potential flip whole
   shares); only a *new* share must go downhill.  But an uphill share blocks: a
   neighbour's new downhill edge back towards it closes a cycle and is cut (4), so while
   it lingers the neighbour cannot move its traffic (measured: 20,000 such cuts in 30 s
   on two clusters at 1.2x, the short bridge stuck overloaded at 6x the optimum's delay,
   its curvature making the gradient alone drain the blocking shares at under 1% a
   second).  So an uphill share x -> y that blocks (y's cheapest candidate is the slot
   back to x, which y does not use yet) gives up at least ``uphill_drain * max_step'``
   per step (``split_uphill_drain``, 0.1: a tenth of a share per rate window), more
   when its gradient says so.  Only blocking ones: draining every uphill share (noisy
   near capacity) cost geometric 1.2x 1.42 against 1.24 of mindelay.

4. *Loop freedom at every instant.*  ``M[x, d] = sum_j w_j (m_j + M[y_j, d])`` with
   ``m > 0`` exceeds ``M`` of at least one next hop x uses, so every routed node has a
   downhill next hop to give share to.  Before the step, shares on dead links are
   dropped (the rest renormalised: a subgraph of an acyclic graph), keys left with
   nothing, or newly reachable, take the live shortest-path next hop, and :func:`cyclic`
   (peeling sinks off the weighted graph) finds any cycle that makes; its nodes fall back
   to the live shortest-path tree until none is left (the tree cannot loop, so this
   ends).  After the step, a cycle can only run through an edge the step added (the old
   graph was acyclic); such new edges on a cycle are cut and their share given back to
   the key's other next hops, until no cycle is left (:func:`_revert_cycles`).  Both
   repairs count as loops prevented.

5. *Bounded churn.*  The internal shares move every decision; a key's published shares
   are replaced by them only when one share differs by more than
   ``split_threshold`` (or the published key uses a dead link, or gained or lost its
   route).  Mixing keys published at different moments could close a cycle, so the
   published graph is checked after every decision and a destination whose published
   graph would loop is published whole from the internal (acyclic) shares — counted.
   The published graph is therefore acyclic after every decision; a cycle found after
   that repair is a bug and raises AssertionError.

6. *Seeding* (:func:`seed`, the service's ``engine.optimum.guide``).  Shares from outside
   (the flow-deviation optimum for the measured demand) replace the internal shares of
   whole destinations: dead slots dropped, keys renormalised, and a destination is taken
   only if every key the live tree routes keeps a share and its graph is acyclic
   (:func:`cyclic`); otherwise it keeps its own.  So 4's invariant holds after a seed, and
   the published shares change only at the next decision, by 5.

7. *Two paths, one result.*  Everything above but the shared link estimates, the live
   tree and the step size is per destination.  The compiled pass
   (``routerd.core._kernels.split_decide``) takes destinations one at a time: it peels
   sinks off the share graph once (Kahn's order, O(n K)) and uses that order both as the
   loop check and for the marginal sums; skips the reversion check when the step added no
   edge and the publication check when no key was replaced (a subgraph of an acyclic
   graph is acyclic).  The numpy reference (:func:`_decide_reference`) takes every
   destination at once and iterates to the fixed point.  Sums over slots are added in
   slot order on both (:func:`ksum`), so the two give the same bits.

8. *Bounded decisions* (``split_per_decision``, ``engine.split.destinations_per_decision``;
   0, the default, takes every destination).  A decision costs O(n K) per destination, so
   O(n^2 K) in all (about 6 ms at 100 nodes, 0.65 s at 1,000 on the development machine).
   With ``per`` > 0 a decision takes the next ``per`` destinations in turn (cyclically, the
   state keeps the rotation), so its time is bounded by about ``per`` n K.  Each destination
   has its own step clock (``dclock``): its share step covers the observed time since its
   *own* last step, so it moves about as far per second as before, in fewer and larger
   steps.  What cannot wait for its turn is taken at the next decision whatever the turn
   (:meth:`SplitState.link_event`): after a link goes down, every destination with a share,
   internal or published, on it (no traffic is sent into a dead link for longer than one
   decision); after a link comes up, every destination with a key that has no route (a
   healed partition is routed at once).  The price, measured against mindelay in the same
   runs (3 seeds, ``--size-dist exp``, 1.2x shortest's saturation unless said):
   - *unguided* (``bench/split_points.py``, a quarter of the destinations a decision):
     two-clusters 1.012 -> 1.040 of mindelay, abilene 1.023 -> 1.036 and its per-second
     CV 1.10 -> 1.27 of mindelay's, geant 1.060 -> 1.081 and CV 1.19 -> 1.56, geometric
     1.216 -> 1.198.  Raising ``refresh`` to what four decisions would apply made it
     worse (geant 1.114);
   - *guided* (the default learner; ``bench/split_blocks.py``, topohub's geant, germany50
     and ta2 with their demands, 0.9x and 1.2x, a quarter and an eighth): every point
     within 1.011 of mindelay (1.007 with every destination), CV ratios 0.90-1.06, no
     drops, the busiest-link cut losing 0-2 packets either way; the cold start the same
     but on geant with an eighth (one seed 17 s against 7 s);
     the simulation's CPU per simulated second 0.115 -> 0.063-0.075 on ta2 (65 nodes).
   Hence off by default (it trades quality where the learner is alone, and a decision
   with every destination costs little below ~50 nodes): a knob for networks where a whole
   decision costs more CPU than the lab can give.

No exploration draws: the shares are the load splitting, and the refresh keeps entries
of used links fresh without sampling (the engine's ``eps`` holds the off-greedy share
for the statistics, at most ``1 - 1/K`` by construction, not an exploration rate).
"""
from __future__ import annotations

import math
from typing import Any

import numpy as np

MODES = ("greedy", "split")


#: EngineSettings field -> (config key, default)
FIELDS: dict[str, tuple[str, Any]] = {
    "mode": ("engine.mode", "greedy"),
    "split_step": ("engine.split.step", 1.0),
    "split_max_step": ("engine.split.max_step", 1.0),
    "split_threshold": ("engine.split.publish_threshold", 0.02),
    "split_window_s": ("engine.split.rate_window_s", 1.0),
    "split_refresh": ("engine.split.refresh", 0.5),
    "split_prior": ("engine.split.prior_samples", 2.0),
    "split_uphill_drain": ("engine.split.uphill_drain", 0.1),
    "split_boost": ("engine.split.event_boost", 3.0),
    "split_boost_s": ("engine.split.event_boost_s", 2.0),
    "split_rate_model": ("engine.split.rate_model", 0.97),
    "split_per_decision": ("engine.split.destinations_per_decision", 0),
}


def takes_variant(mode: str, variant: str) -> bool:
    """Whether an engine of ``mode`` runs update rule ``variant``: split mode runs the plain
    rule only (its refresh replaces the variants' own targets).  The one rule that
    :func:`problems` and the config's load-time check (routerd.io.config) both apply."""
    return mode != "split" or variant == "plain"


def problems(s: Any) -> list[str]:
    """What is wrong with the split fields of an EngineSettings (empty: fine)."""
    bad: list[str] = []
    if s.mode not in MODES:
        bad.append(f"mode {s.mode!r} is not one of {', '.join(MODES)}")
    if not takes_variant(s.mode, s.variant):
        bad.append(f"mode split needs variant plain, not {s.variant!r}")
    if not 0 < s.split_step <= 1:
        bad.append(f"split_step {s.split_step} is not in (0, 1]")
    if not 0 < s.split_max_step <= 1:
        bad.append(f"split_max_step {s.split_max_step} is not in (0, 1]")
    if not 0 <= s.split_threshold < 1:
        bad.append(f"split_threshold {s.split_threshold} is not in [0, 1)")
    if not (s.split_window_s > 0 and math.isfinite(s.split_window_s)):
        bad.append(f"split_window_s {s.split_window_s} is not a positive finite number")
    if not 0 < s.split_refresh <= 1:
        bad.append(f"split_refresh {s.split_refresh} is not in (0, 1]")
    if not (s.split_prior > 0 and math.isfinite(s.split_prior)):
        bad.append(f"split_prior {s.split_prior} is not a positive finite number")
    if not 0 <= s.split_uphill_drain <= 1:
        bad.append(f"split_uphill_drain {s.split_uphill_drain} is not in [0, 1]")
    if not (1 <= s.split_boost <= 100):
        bad.append(f"split_boost {s.split_boost} is not in [1, 100]")
    if not 0 <= s.split_rate_model < 1:
        bad.append(f"split_rate_model {s.split_rate_model} is not in [0, 1)")
    if not (s.split_boost_s > 0 and math.isfinite(s.split_boost_s)):
        bad.append(f"split_boost_s {s.split_boost_s} is not a positive finite number")
    if isinstance(s.split_per_decision, bool) or not isinstance(s.split_per_decision, int) \
            or s.split_per_decision < 0:
        bad.append(f"split_per_decision {s.split_per_decision!r} is not a whole number >= 0")
    return bad


def from_config(cfg: Any) -> dict[str, Any]:
    """The split fields from a Config (keys absent from an older mapping get defaults)."""
    get = getattr(cfg, "get", None)
    out: dict[str, Any] = {}
    for f, (key, default) in FIELDS.items():
        try:
            out[f] = cfg[key]
        except KeyError:
            out[f] = get(key, default) if get is not None else default
    return out


# ---- the arithmetic (hand-checked in tests/test_splitting.py) ---------------------------------

def link_marginals(L: np.ndarray, F: np.ndarray, prop: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(marginal m, externality e, curvature h) of links with mean hop latency L (s),
    rate F (packets/s) and propagation delay prop (s), under the M/M/1 link model:
    s = L - p = 1/(C - F) gives m = L + F s^2, e = F s^2, h = 2 s^2 + 2 F s^3
    (Kleinrock; Bertsekas & Gallager §5.4-5.7: d/dF [F/(C-F)] = C/(C-F)^2)."""
    s = np.maximum(L - prop, 0.0)
    s2 = s * s
    e = F * s2
    return L + e, e, 2.0 * s2 + 2.0 * F * s2 * s


def event_boost(now: float, since: float, boost: float, tau: float) -> float:
    """Step multiplier ``1 + (boost - 1) exp(-(now - since) / tau)``: ``boost`` right after
    a link changed state (``since``), decaying to 1 with time constant ``tau``.  A large step while the shares are far from their goal, the constant tracking
    step after: the "search then converge" schedule (Darken & Moody, "Towards faster
    stochastic gradient search", NIPS 4, 1992) with a floor instead of a decay to zero, as a
    tracking stochastic approximation needs (Benveniste, Métivier & Priouret, Adaptive
    Algorithms and Stochastic Approximations, 1990, Part I ch. 1)."""
    if boost == 1.0 or not now >= since:
        return 1.0
    return 1.0 + (boost - 1.0) * math.exp(-(now - since) / tau)


def rate_model_latency(F: np.ndarray, prop: np.ndarray, tau: np.ndarray, rho_max: float
                       ) -> np.ndarray:
    """The stationary M/M/1 latency ``p + tau / (1 - rho)`` of a link with service time
    ``tau`` (1/C) carrying ``F`` packets/s, ``rho = F tau`` capped at ``rho_max``
    (Kleinrock's M/M/1 sojourn 1/(C - F)); ``p`` where tau is 0 (no capacity known).  It
    answers a change of the link's rate at once, where the measured mean latency follows the
    queue, which near capacity takes seconds to build (its relaxation time grows like
    (1 - sqrt(rho))^-2: Cohen, The Single Server Queue; common practice to take it as a
    lagging signal)."""
    rho = np.minimum(F * tau, rho_max)
    return prop + np.where(tau > 0, tau / (1.0 - rho), 0.0)


def service_time(L: np.ndarray, F: np.ndarray, prop: np.ndarray) -> np.ndarray:
    """1/C of an M/M/1 link from its measured latency and rate: s / (1 + F s), s = L - p."""
    s = np.maximum(L - prop, 0.0)
    return s / (1.0 + F * s)


def share_step(w: np.ndarray, delta: np.ndarray, H: np.ndarray, cand: np.ndarray,
               t: np.ndarray, step: float, max_step: float,
               uphill: np.ndarray | None = None, drain: float = 0.0) -> np.ndarray:
    """One projection step of the shares ``w`` (..., K) towards the least marginal cost.

    ``delta``: marginal delivery cost per slot, ``H``: downstream curvature per slot,
    ``cand``: slots allowed to hold a share, ``t``: traffic of the key (packets/s).
    Non-candidates give up everything; every candidate but the cheapest gives up
    ``min(w, max_step, step (delta - delta*) / (t (H + H*)))``; the cheapest takes it all.
    ``uphill``: candidates that already hold a share but are not downhill and block a
    neighbour's new downhill edge (see the module docstring); each gives up at least
    ``min(w, drain)``.  Keys without a candidate are returned unchanged (the caller repairs
    them first)."""
    has = np.asarray(cand.any(axis=-1))
    dm = np.where(cand, delta, np.inf)
    js = np.argmin(dm, axis=-1)[..., None]
    dstar = np.take_along_axis(dm, js, axis=-1)
    hstar = np.take_along_axis(np.where(cand, H, 0.0), js, axis=-1)
    with np.errstate(divide="ignore", invalid="ignore"):
        raw = step * (delta - dstar) / (t[..., None] * (H + hstar))
    raw = np.where(np.isnan(raw), np.inf, raw)   # 0/0: no traffic and no curvature
    raw = np.maximum(raw, 0.0)
    give = np.where(cand, np.minimum(np.minimum(w, max_step), raw), w)
    if uphill is not None:
        give = np.where(uphill, np.maximum(give, np.minimum(w, drain)), give)
    slot = np.arange(w.shape[-1])
    give = np.where(slot == js, 0.0, give)
    new = w - give
    np.put_along_axis(new, js, np.take_along_axis(new, js, axis=-1) + ksum(give)[..., None],
                      axis=-1)
    return np.where(has[..., None], new, w)


def ksum(a: np.ndarray) -> np.ndarray:
    """Sum over the last (slot) axis in slot order, one addition at a time from 0.0: the
    order the compiled pass (routerd.core._kernels.split_decide) adds in, so both paths
    round alike (numpy's own reduction order depends on the length and the layout)."""
    out = np.zeros(a.shape[:-1])
    for j in range(a.shape[-1]):
        out = out + a[..., j]
    return out


def cyclic(w: np.ndarray, slots: np.ndarray) -> np.ndarray:
    """(n, n) bool: nodes x of destination d's weighted graph (edge x -> slots[x, j] where
    ``w[x, d, j] > 0``) that lie on a cycle or only lead into one.  Peels sinks: a node
    all of whose successors are gone is gone (the destination first).  Exact for any graph."""
    n = w.shape[0]
    edge = w > 0                                             # (n, n, K)
    ys = np.maximum(slots, 0)                                # (n, K)
    alive = np.asarray(edge.any(axis=2))
    alive[np.arange(n), np.arange(n)] = False
    while True:
        succ = alive[ys].transpose(0, 2, 1)                  # (n, n, K): alive[y_j, d]
        keep = np.asarray(alive & (edge & succ).any(axis=2))
        if np.array_equal(keep, alive):
            return keep
        alive = keep


def dag_sums(w: np.ndarray, slots: np.ndarray, m: np.ndarray, e: np.ndarray, h: np.ndarray
             ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(M, E, H) of the module docstring over an acyclic share graph (n, n, K): exact
    after (longest path + 1) sweeps; unrouted keys get M = inf."""
    n = w.shape[0]
    ys = np.maximum(slots, 0)
    on = w > 0
    routed = on.any(axis=2)
    diag = np.arange(n)
    M = np.zeros((n, n))
    E = np.zeros((n, n))
    H = np.zeros((n, n))
    mm, ee, hh = m[:, None, :], e[:, None, :], h[:, None, :]
    for _ in range(n + 2):
        My = M[ys].transpose(0, 2, 1)
        Ey = E[ys].transpose(0, 2, 1)
        Hy = H[ys].transpose(0, 2, 1)
        with np.errstate(invalid="ignore"):
            M2 = ksum(np.where(on, w * (mm + My), 0.0))
            E2 = ksum(np.where(on, w * (ee + Ey), 0.0))
            H2 = ksum(np.where(on, w * (hh + Hy), 0.0))
        M2 = np.where(routed, M2, np.inf)
        M2[diag, diag] = 0.0
        E2[diag, diag] = 0.0
        H2[diag, diag] = 0.0
        if np.array_equal(M2, M) and np.array_equal(E2, E) and np.array_equal(H2, H):
            return M, E, H
        M, E, H = M2, E2, H2
    raise AssertionError("split: the share graph is not acyclic (marginal sums did not settle)")


#: a link whose measured service time is over SLOW_FACTOR x the one its configured capacity
#: gives is slower than the topology says: its idle prior keeps the measured figure ...
SLOW_FACTOR = 8.0
#: ... measured on at least this many rows in the rate window ...
SLOW_ROWS = 4.0
#: ... fading back to the configured one with this time constant (s), in service time
SLOW_MEMORY_S = 10.0


def median(a: np.ndarray) -> float:
    """``float(np.median(a))`` of a non-empty 1-D float array, the same float, without
    np.median's general machinery (most of a decision's link estimates at 16 nodes): the
    same partition (numpy's kth, its NaN check included), the middle value or the two
    middle values added and halved (numpy's mean of them), NaN where any value is NaN."""
    n = a.size
    h = n // 2
    part = np.partition(a, [h - 1, h, -1] if n % 2 == 0 else [h, -1])
    if np.isnan(part[-1]):
        return math.nan
    if n % 2:
        return float(part[h])
    return float((part[h - 1] + part[h]) / 2.0)


def slow_links(rows: np.ndarray, tau: np.ndarray, tau0: np.ndarray) -> np.ndarray:
    """Where a link measured on ``rows`` rows at service time ``tau`` runs slower than its
    configured service time ``tau0`` by over :data:`SLOW_FACTOR` (the rule of
    :meth:`SplitState.note_slow`, which gives the reasons; the service's optimiser applies
    it too, :func:`routerd.core.demand.model_capacity`)."""
    return (rows >= SLOW_ROWS) & (tau0 > 0) & (tau > SLOW_FACTOR * tau0)


def remembered_service_time(tau0: np.ndarray, slow_tau: np.ndarray, slow_t: np.ndarray,
                            now: float) -> np.ndarray:
    """Each link's service time: ``tau0``, or where a slow figure is remembered
    (``slow_tau > 0``, measured at ``slow_t``) that figure fading back to ``tau0`` with
    time constant :data:`SLOW_MEMORY_S`, linearly in service time (halfway in capacity
    would make a 64 kb/s link on a 4 Mb/s line look fast within one time constant)."""
    slow = slow_tau > 0
    if not slow.any():
        return tau0
    fade = np.exp(-np.maximum(now - slow_t[slow], 0.0) / SLOW_MEMORY_S)
    out = tau0.copy()
    out[slow] = np.maximum(tau0[slow], fade * slow_tau[slow] + (1.0 - fade) * tau0[slow])
    return out


class SplitState:
    """The split mode's arrays for one engine (see the module docstring)."""

    ARRAYS = ("lk_cnt", "lk_sum", "lk_t", "key_cnt", "key_t", "w", "pub", "slow_tau", "slow_t",
              "dclock", "due")
    #: arrays a state saved before they existed may lack (restored as "none"; dclock as
    #: last_now: every destination stepped at every decision then)
    OPTIONAL = ("slow_tau", "slow_t", "dclock", "due")
    SCALARS = ("publications", "share_moves", "forced", "fallbacks", "whole_publications",
               "started", "rot")
    #: scalars a state saved before they existed may lack (restored as 0)
    OPTIONAL_SCALARS = ("rot",)
    FLOATS = ("last_now", "last_obs", "last_event")

    def __init__(self, eng: Any):
        n, K = eng.n, eng.k
        self.lk_cnt = np.zeros((n, K))
        self.lk_sum = np.zeros((n, K))
        self.lk_t = np.zeros((n, K))
        self.key_cnt = np.zeros((n, n))
        self.key_t = np.zeros((n, n))
        self.w = np.zeros((n, n, K))
        # per slot: the service time a link slower than configured was last measured at (0:
        # none) and when (note_slow)
        self.slow_tau = np.zeros((n, K))
        self.slow_t = np.zeros((n, K))
        spt = eng._spt_live()    # start on the live delay-shortest tree (what reroute routes)
        g = np.where(spt >= 0, eng._slot_of[np.arange(n)[:, None], np.maximum(spt, 0)], -1)
        xs, ds = np.nonzero(g >= 0)
        self.w[xs, ds, g[xs, ds]] = 1.0
        self.pub = self.w.copy()
        self.publications = 0       # keys whose published shares were replaced
        self.share_moves = 0        # keys whose internal shares moved
        self.forced = 0             # keys published for a dead link or a route gained/lost
        self.fallbacks = 0          # keys put on the live shortest-path tree
        self.whole_publications = 0  # destinations published whole to keep the graph acyclic
        self.last_now = eng.now      # the step clock: the newest observation time a decision has seen
        # each destination's own step clock: the newest observation time its last step had
        # seen (== last_now for all while every decision takes every destination)
        self.dclock = np.full(n, float(eng.now))
        self.rot = 0                 # the first destination of the next partial decision
        # destinations the next decision must take, whatever the turn (link_event)
        self.due = np.zeros(n, dtype=np.uint8)
        self.last_obs = -math.inf    # the newest observation's time
        self.started = 0             # 1 once a row has been observed
        self.last_event = -math.inf  # the last link state change (the step's boost decays from it)
        topo = eng.topo
        sl = np.maximum(topo.slot_link, 0)
        self.prop = np.where(eng._present, topo.delay_s[sl], 0.0)
        self.slots = eng._slots
        self._last_uncycled = 0
        self._obs_scratch: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None
        self.cap_bps = np.where(eng._present, topo.capacity_bps[sl], np.inf)
        # the slot back: rev[x, j] = y's slot towards x (y = slots[x, j]), -1 without one
        present = self.slots >= 0
        self.rev = np.where(present, eng._slot_of[np.maximum(self.slots, 0), np.arange(n)[:, None]], -1
                            ).astype(np.int64)
        # who reaches each node through which slot (CSR by node): the compiled pass peels
        # sinks off a destination's graph in O(n K) with it
        xs_, js_ = np.nonzero(self.slots >= 0)
        order = np.argsort(self.slots[xs_, js_], kind="stable")
        self.in_slots = (
            np.concatenate(([0], np.cumsum(np.bincount(self.slots[xs_, js_], minlength=n)))).astype(np.int64),
            np.ascontiguousarray(xs_[order], dtype=np.int64),
            np.ascontiguousarray(js_[order], dtype=np.int64))

    # -- observations ---------------------------------------------------------------
    def observe(self, x: np.ndarray, j: np.ndarray, d: np.ndarray, lat: np.ndarray,
                now: float, window: float) -> None:
        """Accepted rows, in order: decay what they touch to ``now``, then add them."""
        self._clock(now)
        n, K = self.key_cnt.shape[0], self.lk_cnt.shape[1]
        lk = x * K + j
        ky = x * n + d
        for cnt, tt, sm, idx in ((self.lk_cnt, self.lk_t, self.lk_sum, lk),
                                 (self.key_cnt, self.key_t, None, ky)):
            cf, tf = cnt.reshape(-1), tt.reshape(-1)
            # every row's cell decayed once: a cell named by several rows gets the same
            # value from each (all read before any write), so no np.unique is needed (it
            # took ~75 us of a 1,024-row batch, twice)
            t0 = tf[idx]
            f = np.exp(-(now - t0) / window)
            f = np.where(t0 == now, 1.0, f)        # exactly 1 within one now
            cf[idx] = cf[idx] * f
            if sm is not None:
                sf = sm.reshape(-1)
                sf[idx] = sf[idx] * f
                np.add.at(sf, idx, lat)
            tf[idx] = now
            np.add.at(cf, idx, 1.0)

    def _clock(self, now: float) -> None:
        if not self.started:          # the first rows: the step clock starts here
            self.started = 1
            self.last_now = now
            self.dclock[:] = now
        self.last_obs = max(self.last_obs, now)

    def observe_compiled(self, kern: Any, x: np.ndarray, via: np.ndarray, d: np.ndarray,
                         lat: np.ndarray, slot_of: np.ndarray, now: float,
                         window: float) -> None:
        """:meth:`observe` on the compiled path (``routerd.core._kernels``), to the bit:
        rows by neighbour node ``via`` (the kernel looks up the slot in ``slot_of``).  The
        decay factors are numpy's exp of the same exponents as in :meth:`observe`, one per
        distinct old time (the exps were half of the reference's time)."""
        self._clock(now)
        m = x.shape[0]
        c = np.ascontiguousarray
        sc = self._obs_scratch          # flat, reused: the first 2 m entries as (2, m)
        if sc is None or sc[2].shape[0] < 2 * m:
            sc = self._obs_scratch = (np.empty(2 * m, dtype=np.int64),
                                      np.empty(2 * m, dtype=np.int64), np.empty(2 * m))
        cell, fi, f = sc[0][:2 * m].reshape(2, m), sc[1][:2 * m].reshape(2, m), sc[2]
        nu = kern.split_observe_prep(c(x, dtype=np.int64), c(via, dtype=np.int64),
                                     c(d, dtype=np.int64), slot_of, _flat_view(self.lk_t),
                                     _flat_view(self.key_t), now, window, cell, fi, f)
        fu = f[:nu]
        np.exp(fu, out=fu)
        kern.split_observe_apply(_flat_view(self.lk_cnt), _flat_view(self.lk_sum),
                                 _flat_view(self.key_cnt), cell, fi, c(lat, dtype=np.float64), f)

    def link_estimates(self, now: float, window: float, prior: float
                       ) -> tuple[np.ndarray, np.ndarray]:
        """(L, F) per slot at ``now``: measured mean latency (with the idle prior) and rate."""
        L, F, _ = self.link_estimates_tau(now, window, prior)
        return L, F

    def _measured(self, now: float, window: float
                  ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """(rows, latency sum, rate F, measured service time, configured service time
        tau0) per slot at ``now``.  tau0 is the link's capacity over the estimated mean
        packet size (the median over busy links); 0 before any link carried enough traffic
        to estimate it, or where the capacity is not known."""
        f = np.exp(-np.maximum(now - self.lk_t, 0.0) / window)
        cnt = self.lk_cnt * f
        sm = self.lk_sum * f
        F = cnt / window
        with np.errstate(invalid="ignore", divide="ignore"):
            Lm = np.where(cnt > 0, sm / np.where(cnt > 0, cnt, 1.0), self.prop)
        tau = service_time(Lm, F, self.prop)
        busy = (cnt >= 4.0) & np.isfinite(self.cap_bps)
        bits = median(tau[busy] * self.cap_bps[busy]) if busy.any() else 0.0
        tau0 = np.where(np.isfinite(self.cap_bps), bits / self.cap_bps, 0.0)
        return cnt, sm, F, tau, tau0

    def note_slow(self, now: float, window: float) -> None:
        """Remember the links measured slower than configured (a decision's first step).

        A link whose M/M/1 service time (:func:`service_time`), on at least
        :data:`SLOW_ROWS` rows, is over :data:`SLOW_FACTOR` x the one its configured
        capacity gives runs slower than the topology file says (a degraded tunnel, a rate
        limit the file does not know).  Its idle prior (:meth:`link_estimates_tau`) keeps
        the measured figure after its traffic has left, fading back with time constant
        :data:`SLOW_MEMORY_S`; without it the prior went back to the configured capacity
        within a few rate windows and the shares returned to the slow link (``routerd lab``,
        a 4 Mb/s link cut to 64 kb/s: 600 ms deliveries again 6-7 s after the traffic had
        left it).  A slow link carries few rows (64 kb/s: 8 packets/s of 1,000 bytes), and
        once its traffic moves away fewer still, so the evidence asked for is few rows and a
        wide factor: only a lightly loaded link can trigger (the measured figure is at most
        1/F), and the mean of 4 exponential samples over 8x its mean has probability about
        1e-10 (a Gamma tail, common practice).  Measured in ``routerd lab``: with 8 rows
        and a factor of 4 a quick recovery left too few rows on the cut link to trigger, and
        the shares went back.  A link measured at or below the factor forgets at once."""
        self._note_slow(now, self._measured(now, window))

    def _note_slow(self, now: float, meas: tuple[np.ndarray, ...]) -> None:
        """:meth:`note_slow` on :meth:`_measured`'s figures at ``now`` (which it does not
        change: :meth:`decide` hands the same figures on to :meth:`link_estimates_tau`)."""
        cnt, _, _, tau, tau0 = meas
        slow = slow_links(cnt, tau, tau0)
        self.slow_tau[(cnt >= SLOW_ROWS) & ~slow] = 0.0
        self.slow_tau[slow] = tau[slow]
        self.slow_t[slow] = now

    def link_estimates_tau(self, now: float, window: float, prior: float,
                           measured: tuple[np.ndarray, ...] | None = None
                           ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(L, F, tau) per slot at ``now``: :meth:`link_estimates` and each link's service
        time: the configured one (see :meth:`_measured`), or for a link :meth:`note_slow`
        found slower, its measured one fading back to it (linearly in service time).
        ``measured``: :meth:`_measured` at this ``now`` and ``window``, if already made
        (it depends on the observations only, not on what :meth:`note_slow` remembers)."""
        cnt, sm, F, _, tau0 = self._measured(now, window) if measured is None else measured
        tau0 = remembered_service_time(tau0, self.slow_tau, self.slow_t, now)
        L0 = self.prop + tau0
        L = (sm + prior * L0) / (cnt + prior)
        return L, F, tau0

    def key_rate(self, now: float, window: float) -> np.ndarray:
        return self.key_cnt * np.exp(-np.maximum(now - self.key_t, 0.0) / window) / window

    # -- measured demand (for the live optimality gap: routerd.sim.mindelay fed measured demand) --
    def measured_demand(self, now: float, window: float) -> np.ndarray:
        """(n, n) packets/s entering the network at x for d, estimated from the key rates:
        the rate of d's traffic leaving x minus what x's neighbours send it for d (their
        rate times their published share towards x), floored at 0.  The shape
        ``routerd.sim.mindelay.flow_deviation`` / ``for_topology`` take as ``demand_pps``."""
        t = self.key_rate(now, window)                       # (n, n): x, d
        n, K = t.shape[0], self.pub.shape[2]
        inflow = np.zeros((n, n))
        ys = np.maximum(self.slots, 0)
        for j in range(K):                                   # y -> slots[y, j] carries t[y] pub[y, :, j]
            ok = self.slots[:, j] >= 0
            np.add.at(inflow, ys[ok, j], t[ok] * self.pub[ok, :, j])
        dem = np.maximum(t - inflow, 0.0)
        dem[np.arange(n), np.arange(n)] = 0.0
        return dem

    def mean_packet_bytes(self, now: float, window: float, prior: float) -> float:
        """The mean packet size the link estimates imply (median over busy links of
        capacity x service time / 8), 0 before any link has carried traffic."""
        L, F = self.link_estimates(now, window, prior)
        tau = service_time(L, F, self.prop)
        busy = (F * window >= 4.0) & np.isfinite(self.cap_bps)
        return median(tau[busy] * self.cap_bps[busy]) / 8.0 if busy.any() else 0.0

    # -- state ------------------------------------------------------------------------
    def export(self) -> dict[str, Any]:
        out: dict[str, Any] = {k: getattr(self, k).copy() for k in self.ARRAYS}
        out.update({k: getattr(self, k) for k in self.SCALARS + self.FLOATS})
        return out

    def restore(self, st: dict[str, Any]) -> None:
        for k in self.ARRAYS:
            if k in self.OPTIONAL and k not in st:
                setattr(self, k, np.zeros_like(getattr(self, k)))   # saved before it existed
                continue
            a = np.asarray(st[k])
            cur = getattr(self, k)
            if a.shape != cur.shape:
                raise ValueError(f"split state array {k} has shape {a.shape}, expected {cur.shape}")
            setattr(self, k, np.array(a, dtype=cur.dtype, order="C", copy=True))
        if "dclock" not in st:
            self.dclock = np.full(self.dclock.shape, float(st["last_now"]))
        for k in self.SCALARS:
            setattr(self, k, int(st.get(k, 0)) if k in self.OPTIONAL_SCALARS else int(st[k]))
        for k in self.FLOATS:   # a state saved before last_event existed: no boost
            setattr(self, k, float(st.get(k, -math.inf)) if k == "last_event" else float(st[k]))

    def same(self, other: SplitState | None) -> bool:
        return other is not None and all(
            np.array_equal(getattr(self, k), getattr(other, k)) for k in self.ARRAYS) and (
            self.last_now == other.last_now and self.last_obs == other.last_obs
            and self.last_event == other.last_event and self.started == other.started
            and self.rot == other.rot)

    def link_event(self, x: int, j: int, up: bool) -> None:
        """Slot j of node x went down or up: mark the destinations that cannot wait for
        their turn (:func:`decision_dests`).  Down: those with a share, internal or
        published, on the slot (their keys are repaired at once: no traffic is sent into a
        dead link for longer than one decision).  Up: those with a key that has no share
        (it may have a route again: a healed partition is routed at once)."""
        if up:
            lone = ~(self.w.sum(axis=2) > 0)
            n = lone.shape[0]
            lone[np.arange(n), np.arange(n)] = False
            self.due |= lone.any(axis=0)
        else:
            self.due |= (self.w[x, :, j] > 0) | (self.pub[x, :, j] > 0)


def _flat_view(a: np.ndarray) -> np.ndarray:
    """``a`` as one flat view (writes through): an error, not a silent copy, when ``a`` is
    not one run of memory (the state's arrays always are: restore makes them C-ordered)."""
    v = a.view()
    v.shape = (-1,)
    return v


def onehot_slots(slot: np.ndarray, K: int) -> np.ndarray:
    """(..., K) shares with 1 on ``slot`` (none where slot < 0)."""
    out = np.zeros(slot.shape + (K,))
    ok = slot >= 0
    idx = np.nonzero(ok)
    out[idx + (slot[ok],)] = 1.0
    return out


def decision_dests(st: SplitState, n: int, per: int) -> np.ndarray:
    """The destinations one decision takes, ascending: all of them when ``per`` is 0 or
    at least n; else the next ``per`` in turn, cyclically from ``st.rot`` (the rotation
    moves on), and those a link event made due (:meth:`SplitState.link_event`)."""
    if per <= 0 or per >= n:
        st.due[:] = 0
        return np.arange(n, dtype=np.int64)
    take = st.due.astype(bool)
    take[(st.rot + np.arange(per)) % n] = True
    st.rot = int((st.rot + per) % n)
    st.due[:] = 0
    return np.flatnonzero(take).astype(np.int64)


def decide(st: SplitState, eng: Any, now: float) -> tuple[set[int], int, int]:
    """One split-mode decision over every destination, or over the next
    ``split_per_decision`` of them (:func:`decision_dests`; see the module docstring).
    Returns (nodes whose published table changed, greedy hops changed, loops prevented).

    What is shared by all destinations (link estimates and marginals, the live
    shortest-path tree, the step) is computed here; the per-destination part runs on the
    compiled pass (:func:`routerd.core._kernels.split_decide`, one destination at a
    time, O(n K) each) when the engine's kernels are compiled, else on the numpy
    reference (:func:`_decide_reference`, all destinations at once).  Both give the same
    state to the bit (tests/test_splitting.py)."""
    s = eng.settings
    n = eng.n
    meas = st._measured(now, s.split_window_s)       # once: both steps read the same figures
    st._note_slow(now, meas)
    L, F, tau0 = st.link_estimates_tau(now, s.split_window_s, s.split_prior, meas)
    spt = eng._spt_live()                                      # (n, n) node, -1
    spt_slot = np.where(spt >= 0, eng._slot_of[np.arange(n)[:, None], np.maximum(spt, 0)], -1)
    Lm = L
    if s.split_rate_model > 0:
        Lr = rate_model_latency(F, st.prop, tau0, s.split_rate_model)
        Lm = np.maximum(L, Lr)
    m, e, h = link_marginals(Lm, F, st.prop)
    m = np.maximum(m, 1e-12)
    g = h * F                                       # flow-weighted curvature (s)
    # the step scales with the observed time since the last decision: from the newest
    # observation that decision had seen to the newest one now (a shell that decides long
    # after its last rows, or for the first time after starting, moves nothing on no news).
    # Not from the last decision's own time: a shell whose decisions come a while after
    # the rows (the service: debounced, on its own clock) would lose that while at every
    # decision (measured: half the step in the closed loop, issue 14)
    # Each destination has its own step clock (st.dclock): a decision that takes some of
    # them steps each by the time since its own last step, so the shares move about as
    # far per second whether a decision takes all destinations or a block in turn
    seen = min(now, st.last_obs)
    ds = decision_dests(st, n, int(s.split_per_decision))
    dt = np.minimum(np.maximum(seen - st.dclock, 0.0), s.split_window_s)
    if st.started:                # else no rows yet: the first ones start the step clock
        st.last_now = seen
        st.dclock[ds] = seen
    b = event_boost(now, st.last_event, s.split_boost, s.split_boost_s)
    eta = s.split_step * b * dt / s.split_window_s
    mx = np.minimum(s.split_max_step * b * dt / s.split_window_s, 1.0)
    drain = s.split_uphill_drain * mx
    kern = getattr(eng, "_kern", None)
    if kern is not None and hasattr(kern, "split_decide"):
        return _decide_compiled(kern, st, eng, L, m, e, g, spt_slot, eta, mx, drain, ds)
    return _decide_reference(st, eng, L, m, e, g, spt_slot, eta, mx, drain, ds)


_SPLIT_ERRORS = {-1: "loop repair did not converge", -2: "a cycle made of old edges only",
                 -3: "cycle reversion did not converge",
                 -5: "the published share graph has a cycle"}


def _decide_compiled(kern: Any, st: SplitState, eng: Any, L: np.ndarray, m: np.ndarray,
                     e: np.ndarray, g: np.ndarray, spt_slot: np.ndarray, eta: np.ndarray,
                     mx: np.ndarray, drain: np.ndarray, ds: np.ndarray
                     ) -> tuple[set[int], int, int]:
    s = eng.settings
    n = eng.n
    c64 = np.ascontiguousarray
    counts = np.zeros(8, dtype=np.int64)
    changed = np.zeros(n, dtype=np.uint8)
    in_ptr, in_x, in_j = st.in_slots
    err = kern.split_decide(eng.Q, st.w, st.pub, eng.live.view(np.uint8),
                            eng._present.view(np.uint8), st.slots, st.rev, in_ptr, in_x, in_j,
                            c64(L, dtype=np.float64), c64(m, dtype=np.float64),
                            c64(e, dtype=np.float64), c64(g, dtype=np.float64),
                            c64(spt_slot, dtype=np.int64), float(s.split_refresh),
                            float(s.ceiling_s), c64(eta, dtype=np.float64),
                            c64(mx, dtype=np.float64), c64(drain, dtype=np.float64),
                            float(s.split_threshold),
                            eng.greedy, eng.eps, eng.alt.view(np.uint8), changed, counts,
                            c64(ds, dtype=np.int64))
    if err < 0:
        raise AssertionError(f"split: {_SPLIT_ERRORS.get(int(err), err)}")
    fallbacks, uncycled, reverted, moves, forced, whole, pubs, changes = counts.tolist()
    st.fallbacks += fallbacks
    st._last_uncycled = uncycled
    st.share_moves += moves
    st.forced += forced
    st.whole_publications += whole
    st.publications += pubs
    return set(np.flatnonzero(changed).tolist()), changes, uncycled + reverted


def _decide_reference(st: SplitState, eng: Any, L: np.ndarray, m: np.ndarray, e: np.ndarray,
                      g: np.ndarray, spt_slot: np.ndarray, eta: np.ndarray, mx: np.ndarray,
                      drain: np.ndarray, ds: np.ndarray) -> tuple[set[int], int, int]:
    """:func:`decide`'s per-destination part in numpy, every destination at once: each
    destination's columns depend only on the shared figures and its own, so this computes
    all of them and keeps (and counts) the columns of ``ds`` alone."""
    s = eng.settings
    n, K = eng.n, eng.k
    slots = eng._slots
    ys = np.maximum(slots, 0)
    live = eng.live
    live3 = live[:, None, :]
    diag = np.arange(n)
    ceil = s.ceiling_s
    sel = np.zeros(n, dtype=bool)                  # the destinations this decision takes
    sel[ds] = True
    col = sel[None, :]
    # per destination (column): the step, its bound, the uphill drain
    eta3, mx3, drain3 = eta[None, :, None], mx[None, :, None], drain[None, :, None]
    # 1. refresh the entries of every live slot whose link carried rows, all destinations
    Q = eng.Q.copy()
    fresh = live.copy()
    if fresh.any():
        V = published_values(st.pub, eng.Q, ceil)
        xr, jr = np.nonzero(fresh)
        yr = slots[xr, jr]
        tgt = L[xr, jr][:, None] + V[yr]                      # (r, n); V[y, y] = 0
        q = Q[xr, :, jr]
        new = q + s.split_refresh * (tgt - q)
        Q[xr, :, jr] = np.minimum(np.maximum(new, 0.0), ceil)
    # 2. repair: no share on a dead link, every reachable key routed, no cycle
    reach = spt_slot >= 0
    w = st.w
    lost = (w * (~live3)).sum(axis=2) > 0
    w = np.where(live3, w, 0.0)
    tot = ksum(w)
    ren = lost & (tot > 0)
    if ren.any():
        w[ren] /= tot[ren][:, None]
    w[~reach] = 0.0
    need = reach & ~(tot > 0)
    prevented = 0
    if need.any():
        w[need] = onehot_slots(spt_slot[need], K)
        st.fallbacks += int((need & col).sum())
    w = _uncycle(st, w, spt_slot, n, sel)
    prevented += st._last_uncycled
    # 3. marginals along the (acyclic) share graph, then one projection step
    M, E, H = dag_sums(w, slots, m, e, g)
    My = M[ys].transpose(0, 2, 1)
    Ey = E[ys].transpose(0, 2, 1)
    Hy = H[ys].transpose(0, 2, 1)
    # a share may be gained only by a strictly downhill next hop (a new edge cannot close
    # a cycle through the order of M); next hops already used keep moving by the gradient
    cand = live3 & eng._present[:, None, :] & ((My < M[:, :, None]) | (w > 0))
    cand[diag, diag] = False
    with np.errstate(invalid="ignore"):
        delta = np.where(cand, Q + e[:, None, :] + Ey, np.inf)
        Hj = np.where(cand, g[:, None, :] + Hy, 0.0)
    # uphill shares that block: y_j's cheapest next hop is the new edge back to x
    rev = st.rev
    hasc = cand.any(axis=2)
    js_all = np.where(hasc, np.argmin(np.where(cand, delta, np.inf), axis=2), -1)
    yy, dd, rr = ys[:, None, :], np.arange(n)[None, :, None], np.maximum(rev, 0)[:, None, :]
    block = (rev[:, None, :] >= 0) & (js_all[yy, dd] == rev[:, None, :]) & (w[yy, dd, rr] == 0)
    uphill = cand & (w > 0) & ~(My < M[:, :, None]) & block
    new = share_step(w, delta, Hj, cand, np.ones((n, n)), eta3, mx3, uphill, drain3)
    new, reverted = _revert_cycles(new, w, slots, n, sel)
    prevented += reverted
    moved = np.abs(new - st.w).max(axis=2) > 0
    st.share_moves += int((moved & col).sum())
    # 4. publish keys that moved enough, keep the published graph acyclic
    pub = st.pub.copy()
    on_new = new.sum(axis=2) > 0
    upd = (np.abs(new - pub).max(axis=2) > s.split_threshold)
    forced = ((pub * (~live3)).sum(axis=2) > 0) | ((pub.sum(axis=2) > 0) != on_new)
    upd |= forced
    st.forced += int((forced & ~(np.abs(new - pub).max(axis=2) > s.split_threshold) & col).sum())
    old_pub = st.pub
    pub[upd] = new[upd]
    cyc = cyclic(pub, slots)
    if cyc.any():
        bad_d = np.flatnonzero(cyc.any(axis=0))
        pub[:, bad_d, :] = new[:, bad_d, :]
        st.whole_publications += int(sel[bad_d].sum())
        if cyclic(pub, slots).any():  # cannot happen: new is acyclic
            raise AssertionError("split: the published share graph has a cycle")
    changed = (np.abs(pub - old_pub).max(axis=2) > 0) & col
    st.publications += int(changed.sum())
    # readers: greedy = the largest published share, eps = the rest, alt = the others
    routed = pub.sum(axis=2) > 0
    gs = np.where(routed, np.argmax(pub, axis=2), -1)
    route_changes = int(((gs != eng.greedy) & col).sum())
    # keep the columns of this decision's destinations only
    eng.Q[:, ds, :] = Q[:, ds, :]
    st.w[:, ds, :] = new[:, ds, :]
    st.pub[:, ds, :] = pub[:, ds, :]
    eng.greedy[:, ds] = gs[:, ds]
    eng.eps[:, ds] = np.where(routed, 1.0 - pub.max(axis=2), 0.0)[:, ds]
    eng.alt[:, ds, :] = ((pub > 0) & (np.arange(K)[None, None, :] != gs[:, :, None]))[:, ds, :]
    nodes = set(np.flatnonzero(changed.any(axis=1)).tolist())
    return nodes, route_changes, prevented


def seed(st: SplitState, eng: Any, W: np.ndarray) -> tuple[int, int]:
    """Replace the internal shares of whole destinations with ``W`` (n, n, K), e.g. the
    flow-deviation optimum's splits (the service's ``engine.optimum.guide``).

    Safe by construction, destination by destination: shares on dead or absent slots are
    dropped and each key renormalised; a destination is taken only if every key the live
    shortest-path tree routes still has a share, no key keeps a share where there is no
    route, and its weighted graph is acyclic (:func:`cyclic`); otherwise it keeps its
    shares.  So the graph stays acyclic, shares sum to 1 over live next hops, and
    the next :func:`decide` moves and publishes them by its own rules (published shares are
    not touched here).  Returns (destinations seeded, destinations left alone)."""
    n = eng.n
    W = np.asarray(W, dtype=float)
    if W.shape != st.w.shape:
        raise ValueError(f"seed shares have shape {W.shape}, expected {st.w.shape}")
    ok_slot = (eng.live & eng._present)[:, None, :]
    Wl = np.where(ok_slot & np.isfinite(W) & (W > 0), W, 0.0)
    tot = Wl.sum(axis=2)
    diag = np.arange(n)
    spt = eng._spt_live()
    reach = spt >= 0
    reach[diag, diag] = False
    routed = tot > 0
    routed[diag, diag] = False
    bad = (reach != routed).any(axis=0)              # (d,): a key would gain or lose a route
    with np.errstate(invalid="ignore", divide="ignore"):
        Wn = np.where(routed[:, :, None], Wl / np.where(routed, tot, 1.0)[:, :, None], 0.0)
    Wn[diag, diag] = 0.0
    bad |= cyclic(Wn, st.slots).any(axis=0)
    good = ~bad
    st.w[:, good, :] = Wn[:, good, :]
    return int(good.sum()), int(bad.sum())


def _uncycle(st: SplitState, w: np.ndarray, spt_slot: np.ndarray, n: int,
             sel: np.ndarray) -> np.ndarray:
    """Put nodes on (or only leading into) a cycle on the live shortest-path tree until
    none is left; the count (of the destinations ``sel``) goes to ``st._last_uncycled``."""
    st._last_uncycled = 0
    K = w.shape[2]
    for _ in range(n + 2):
        cyc = cyclic(w, st_slots(st))
        if not cyc.any():
            return w
        k = int((cyc & sel[None, :]).sum())
        st._last_uncycled += k
        w[cyc] = onehot_slots(spt_slot[cyc], K)
        st.fallbacks += k
    raise AssertionError("split: loop repair did not converge")


def _revert_cycles(new: np.ndarray, old: np.ndarray, slots: np.ndarray, n: int,
                   sel: np.ndarray) -> tuple[np.ndarray, int]:
    """Keys on a cycle of ``new`` go back to their shares in ``old`` (acyclic), until no
    cycle is left: a key reverted has only old edges, so at worst this ends at ``old``.
    Returns the new shares and the keys reverted of the destinations ``sel``."""
    reverted = 0
    fresh = (new > 0) & ~(old > 0)                  # edges this step added
    for _ in range(n * n + 1):
        cyc = cyclic(new, slots)
        if not cyc.any():
            return new, reverted
        cut = cyc[:, :, None] & fresh               # new edges out of nodes on a cycle
        keys = np.asarray(cut.any(axis=2))
        if not keys.any():
            raise AssertionError("split: a cycle made of old edges only")
        # the cut edges' shares go back to the key's other next hops, pro rata
        kept = np.where(cut, 0.0, new)
        tot = ksum(kept)
        alone = keys & ~(tot > 0)
        kept[alone] = old[alone]
        scale = np.where(keys & (tot > 0), 1.0 / np.where(tot > 0, tot, 1.0), 1.0)
        new = np.where(keys[:, :, None], kept * scale[:, :, None], new)
        fresh &= ~cut
        reverted += int((keys & sel[None, :]).sum())
    raise AssertionError("split: cycle reversion did not converge")


def st_slots(st: SplitState) -> np.ndarray:
    return st.slots


def published_values(pub: np.ndarray, Q: np.ndarray, ceiling: float, kern: Any = None
                     ) -> np.ndarray:
    """(n, n) V[x, d] = sum_j pub[x, d, j] Q[x, d, j]: the expected remaining time on the
    published split (0 at the destination, the ceiling without a route).  ``kern``: the
    engine's compiled kernels, if any (:func:`routerd.core._kernels.split_values`, the same
    result to the bit without the (n, n, K) temporaries); this numpy code is the reference."""
    n = pub.shape[0]
    if (kern is not None and hasattr(kern, "split_values") and pub.dtype == np.float64
            and Q.dtype == np.float64 and pub.shape == Q.shape
            and pub.flags.c_contiguous and Q.flags.c_contiguous):
        out = np.empty(pub.shape[:2])
        kern.split_values(pub, Q, float(ceiling), out)
        return out
    with np.errstate(invalid="ignore"):
        v = ksum(np.where(pub > 0, pub * Q, 0.0))
    v = np.where(pub.sum(axis=2) > 0, np.minimum(v, ceiling), ceiling)
    v[np.arange(n), np.arange(n)] = 0.0
    return v
