"""The discrete-event loop: packets, output queues, links, virtual time.

Owns: the event heap, per-packet state, per-link FIFO drop-tail queues, TTL, link
events, delivery/drop accounting, the time series and the Little's-law bookkeeping.
Must not import: zmq, prometheus, matplotlib, YAML, the command line.  It knows nothing
of how a policy routes (it asks the policy) or where traffic comes from (it pulls from a
traffic source).

Theory of operation
-------------------
Model.  Each directed link k is a FIFO output queue at its tail node with room for
``buffer_pkts[k]`` packets, *the one being transmitted included* (so a lone link is an
M/M/1/K queue with K = buffer_pkts), a transmitter of ``capacity_bps[k]`` and a
propagation delay ``delay_s[k]``.  A packet arriving at a full queue is dropped (drop
tail).  Transmission takes ``bits / capacity``; the packet then propagates and arrives at
the head node, which forwards it by asking the policy.

One event per hop.  Because a queue is FIFO with known service times, a packet's
departure time is fixed when it enters the queue: ``dep = max(now, free_at[k]) + tx``.
So entering the queue schedules the arrival at the far end (``dep + delay``) at once and
no "transmission done" event is needed.  The queue's occupancy at time t is the number of
packets with ``dep > t`` (a deque of departure times, trimmed from the left whenever it
holds 32 entries or the buffer size, so the count is exact wherever it is compared).  A capacity
change applies to packets that enter the queue after it.  A link going down drops every
packet still in its queue (``dep > t``, the one in transmission included) and refuses new
ones; packets already on the wire arrive.

Events are plain ``(time, code)`` tuples: ``code >= 0`` is the arrival of packet ``code``
at ``p_node[code]``; negative codes are the few control events (next injection, policy
tick, series sample, warm-up mark, link event i, and an end marker just after
``duration_s`` that sorts first among ties).  A packet has at most one pending
event, and a dropped packet's id is only reused after its stale event pops, so codes are
unique in the heap and ties break deterministically.

TTL.  A packet starts with ``ttl`` hops; each forwarding uses one; a packet at a node
other than its destination with none left is counted in ``ttl_expired`` (a loop).

Busy time.  A transmission is booked when its packet enters the queue, but it happens
over ``[start, dep]``, and a link's utilisation in a series interval is the part of its
transmissions that falls inside the interval (a transmission spanning a boundary is split
across it), so it never exceeds 1.  ``busy[k]`` sums every transmission booked so far;
the part still ahead of time t is exactly ``free_at[k] - t`` when positive, because a
transmission starts later than ``now`` only when it queues behind the previous one:
what is booked beyond t is one unbroken stretch ending at ``free_at[k]``.  So busy time
up to t is ``busy[k] - max(free_at[k] - t, 0)``, read at every sample, at the warm-up
mark and at the end.

Two paths.  The loop below is the reference.  ``routerd.sim._hops`` (Cython, optional,
built by setup.py) is the same loop compiled: same heap algorithm and layout, same IEEE
operations in the same order, same calls into the policy at the same virtual times, so
a run gives the same result to the bit (``tests/test_sim_hops.py``).  ``kernels``
(``engine.kernels``: ``auto`` | ``compiled`` | ``reference``) chooses; :func:`hops_status`
says which path runs and why.  On the compiled path a policy that provides
``on_hops`` gets its hop observations in batches, and one that provides ``hop_rows``
has the loop write them into its compiled row store (see :mod:`routerd.sim.policy`).

Accounting.  ``offered``, ``delivered``, ``dropped`` and ``ttl_expired`` and every delivery
statistic count packets *injected* at or after the warm-up; the time series counts every
packet, by the interval it left the network in.  The number of packets in the
network is integrated over time after the warm-up so Little's law L = lambda W can be
checked on every run (Little, Operations Research 9, 1961).

Stopping early.  A :class:`StopRequest` handed to :func:`run_core` ends the run between
two events: ``request()`` (safe from a signal handler: it only pushes one entry onto the
heap, and heap operations run no Python code in between) queues a stop marker that sorts
before everything else, and the loop ends when it pops it.  Every event before it was
handled whole, so the counts are those of a run that ended at the cut: the time of the
next pending event (nothing happens between the last handled event and it), clamped to
``duration_s``.  The result then has ``stopped = True`` and ``end_s`` = the cut; the
series holds the intervals completed before it.
"""
from __future__ import annotations

import math
import time
from collections import deque
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from heapq import heappop, heappush
from typing import Any

from routerd.core import kernels as _kernels
from routerd.core.topology import Topology
from routerd.io.scenario import LinkEvent  # defined with the scenario format; re-exported here

from .policy import Policy

try:  # optional: an install without a C compiler runs the reference loop
    from . import _hops as _compiled_hops  # type: ignore[attr-defined]  # built by setup.py
    _HOPS_WHY = "routerd.sim._hops is built"
except ImportError as e:  # pragma: no cover - depends on the install
    _compiled_hops = None
    _HOPS_WHY = (f"routerd.sim._hops could not be imported ({e}); the package was installed "
                 "without a working C compiler (reinstall with one for the compiled path)")


def hops_status(mode: str = "auto") -> dict[str, str]:
    """Which path the simulator's event loop takes for ``engine.kernels = mode``, and why:
    ``{"path", "mode", "reason"}`` (the engine's rule, :func:`routerd.core.kernels.status_of`)."""
    return _kernels.status_of(mode, _compiled_hops is not None, _HOPS_WHY)


def hops_module(mode: str) -> Any:
    """The compiled module for ``engine.kernels = mode``, or None for the reference;
    ``compiled`` without it raises ``RuntimeError`` saying why."""
    st = hops_status(mode)
    if st["path"] == "unavailable":
        raise RuntimeError(f"engine.kernels is compiled, but {_HOPS_WHY}")
    return _compiled_hops if st["path"] == "compiled" else None

# control event codes (packet ids are >= 0)
_INJECT = -1
_TICK = -2
_SAMPLE = -3
_WARMUP = -4
_LINK0 = -5  # link event i has code _LINK0 - i

#: A packet from a traffic source: (inject time s, source node, destination node, bits, flow id).
PacketTuple = tuple[float, int, int, float, int]


class StopRequest:
    """Ask a running :func:`run_core` to end early (see "Stopping early").  Before the run
    is under way and after it, there is nothing to stop: :meth:`request` then raises
    :class:`KeyboardInterrupt`, as Ctrl-C would without it; so does a second request
    (someone who presses Ctrl-C twice wants out now)."""

    def __init__(self) -> None:
        self.requested = False
        self._push: Callable[[], None] | None = None

    def request(self) -> None:
        if self._push is None or self.requested:
            raise KeyboardInterrupt
        self.requested = True
        self._push()


@dataclass(frozen=True, slots=True, kw_only=True)
class CoreSeries:
    """Per series interval (all packets, by the interval they left the network in)."""

    t_s: list[float]                 # end of each interval
    delivered: list[int]
    delivery_sum_s: list[float]      # sum of the delivery times of those delivered
    dropped: list[int]
    ttl_expired: list[int]
    in_network: list[int]            # packets in the network at the sample
    link_util: list[list[float]]     # per interval, per link: busy fraction


@dataclass(frozen=True, slots=True, kw_only=True)
class CoreResult:
    """What :func:`run_core` measured: plain values, picklable.  Counts without ``_all``
    cover packets injected at or after the warm-up; ``_all`` counts cover every packet.
    ``dataclasses.asdict`` gives it as a plain dict of the same names."""

    offered: int
    delivered: int
    dropped: int                     # dropped_buffer + dropped_link_down + dropped_no_route
    dropped_buffer: int
    dropped_link_down: int
    dropped_no_route: int
    ttl_expired: int
    in_flight_end: int               # every packet still in the network at the end
    offered_all: int
    delivered_all: int
    dropped_all: int
    ttl_expired_all: int
    deliveries: list[float]          # delivery times of measured packets, in delivery order
    hops_sum: int                    # hops of the measured delivered packets
    events: int                      # events handled
    wall_s: float                    # wall-clock time of the loop (the one impure figure)
    window_s: float                  # measured window: end - warm-up
    little_area: float               # packets in the network integrated over the window
    left: int                        # measured packets that left the network (any way)
    sys_sum: float                   # their total time in the network
    busy_s: list[float]              # per link: seconds transmitting, all time
    carried: list[int]               # per link: packets entered, all time
    series: CoreSeries
    series_interval_s: float
    end_s: float                     # duration_s, or the cut when stopped early
    busy_window_s: list[float]       # per link: seconds transmitting within the window
    stopped: bool = False            # ended early by a StopRequest (at end_s)


def _hook_applies(policy: Policy, hook: str, replaces: str) -> bool:
    """Whether the compiled loop may use ``policy``'s optional ``hook`` in place of
    ``replaces``: only where the class that defines the hook also defines what it stands
    for (a subclass that overrides ``next_hop`` or ``on_hop`` alone, or an instance
    patched with its own, keeps its method)."""
    if not callable(getattr(policy, hook, None)) or replaces in vars(policy):
        return False
    mro = type(policy).__mro__
    owner = next((c for c in mro if hook in c.__dict__), None)
    return owner is not None and owner is next((c for c in mro if replaces in c.__dict__), None)


def run_core(
    topo: Topology,
    policy: Policy,
    packets: Iterator[PacketTuple],
    *,
    duration_s: float,
    warmup_s: float = 0.0,
    ttl: int = 64,
    series_interval_s: float = 1.0,
    link_events: Sequence[LinkEvent] = (),
    progress: Callable[[float, int], None] | None = None,
    observer: Callable[[dict[str, Any]], None] | None = None,
    stop: StopRequest | None = None,
    kernels: str = "auto",
) -> CoreResult:
    """Simulate until ``duration_s`` of virtual time; return raw counts, samples and series.

    ``policy`` must already be attached.  ``packets`` yields :data:`PacketTuple` in
    non-decreasing time order.  ``progress(t, events)`` is called at every
    series sample.  The result is a :class:`CoreResult` of plain Python values.
    ``observer(view)`` (live displays, partial results after an interrupt) is called at
    every series sample with ``t_s``, all-packet totals (``delivered``, ``dropped``,
    ``ttl_expired``, ``in_network``) and live references to the measured ``deliveries``
    list and the ``series`` lists so far; it must not modify them.  ``stop``: see
    "Stopping early" in the module docstring (the compiled loop looks at it at every tick
    and sample, and every 65,536 events, when it also lets Python run its signal handlers;
    its cut comes at the first of those after the request).  ``kernels``:
    which loop runs (:func:`hops_status`); both give the same result.
    """
    compiled = hops_module(kernels)
    n = topo.n
    nl = topo.n_links
    src_l = topo.src.tolist()
    dst_l = topo.dst.tolist()
    delay = topo.delay_s.tolist()
    inv_cap = [1.0 / c for c in topo.capacity_bps.tolist()]
    buf = topo.buffer_pkts.tolist()
    trim = [min(b, 32) for b in buf]
    link_of: list[dict[int, int]] = [{} for _ in range(n)]
    for k in range(nl):
        link_of[src_l[k]][dst_l[k]] = k
    up = [True] * nl
    free_at = [0.0] * nl
    queues: list[deque[float]] = [deque() for _ in range(nl)]
    busy = [0.0] * nl          # seconds transmitting, all time
    carried = [0] * nl         # packets entered, all time

    # policy hooks: a table entry >= 0 is the next hop, -1 no route, -2 "ask next_hop"
    table = policy.table
    if table is None:
        table = [[-2] * n for _ in range(n)]
    next_hop = policy.next_hop
    on_hop = policy.on_hop if type(policy).on_hop is not Policy.on_hop else None
    hop_flow = bool(getattr(policy, "hop_flow", False))  # on_hop(..., flow) as well
    tick_iv = policy.tick_interval_s

    # packet state, parallel lists indexed by packet id
    p_node: list[int] = []     # node the pending event happens at
    p_dst: list[int] = []      # destination; -1 = free id, -2 = dropped, arrival still pending
    p_t0: list[float] = []     # injection time
    p_ttl: list[int] = []
    p_flow: list[int] = []
    p_bits: list[float] = []
    p_prev: list[int] = []     # node that sent it on its current hop, -1 at injection
    p_enq: list[float] = []    # time it entered p_prev's output queue
    free_ids: list[int] = []

    heap: list[tuple[float, int]] = []
    end = float(duration_s)
    warm = float(warmup_s)
    nxt = packets.__next__
    try:
        pending = nxt()
    except StopIteration:
        pending = None
    if pending is not None:
        heappush(heap, (pending[0], _INJECT))
    if tick_iv is not None:
        heappush(heap, (float(tick_iv), _TICK))
    ivl = float(series_interval_s)
    heappush(heap, (ivl, _SAMPLE))
    if warm > 0:
        heappush(heap, (warm, _WARMUP))
    events_sorted = sorted(link_events, key=lambda e: e.t)
    for i, ev in enumerate(events_sorted):
        heappush(heap, (float(ev.t), _LINK0 - i))
    # the end: after every event at t <= end (the most negative code pops first on a tie)
    end_code = _LINK0 - len(events_sorted)
    heappush(heap, (math.nextafter(end, math.inf), end_code))
    ctrl_pushed = len(heap) - (1 if pending is not None else 0)
    stop_code = end_code - 1

    # counters for packets injected at/after warm-up (the "measured" packets)
    offered = delivered = ttl_expired = 0
    drop_buf = drop_down = drop_noroute = 0
    offered_all = delivered_all = dropped_all = ttl_all = 0
    deliveries: list[float] = []
    hops_sum = 0
    sys_sum = 0.0       # time in system of measured packets that left (any way)
    left = 0
    # Little's law: number in network integrated over [warm, end]
    in_net = 0
    area = 0.0
    last_t = 0.0
    measuring = warm <= 0.0
    # series: per bin
    s_t: list[float] = []
    s_deliv: list[int] = []
    s_dsum: list[float] = []
    s_drop: list[int] = []
    s_ttl: list[int] = []
    s_busy: list[list[float]] = []
    s_in_net: list[int] = []
    b_deliv = 0
    b_dsum = 0.0
    b_drop = 0
    b_ttl = 0
    last_busy = [0.0] * nl
    busy_warm = [0.0] * nl
    inj_pushed = 1 if pending is not None else 0
    t = 0.0
    wall0 = time.perf_counter()
    stopped = False
    if stop is not None:   # disarmed after the loop; an exception out of it leaves a harmless push
        stop._push = lambda: heappush(heap, (-math.inf, stop_code))

    if compiled is not None:
        rows = policy.hop_rows() if _hook_applies(policy, "hop_rows", "on_hop") else None
        on_hops = (policy.on_hops if rows is None and _hook_applies(policy, "on_hops", "on_hop")
                   else None)
        try:
            r = compiled.loop(
                (src_l, dst_l, delay, inv_cap, buf), policy, table, pending, nxt,
                {"n": n, "next_hop": next_hop, "on_hop": on_hop, "on_hops": on_hops, "rows": rows,
                 "hop_flow": hop_flow, "tick_interval_s": tick_iv,
                 "splits": (_hook_applies(policy, "split_arrays", "next_hop")
                        and getattr(policy, "compiled_splits", True))},
                end, warm, int(ttl), ivl, events_sorted, progress, observer, stop)
        finally:
            if stop is not None:
                stop._push = None
        end = r["end"]
        return CoreResult(
            offered=r["offered"], delivered=r["delivered"],
            dropped=r["drop_buf"] + r["drop_down"] + r["drop_noroute"],
            dropped_buffer=r["drop_buf"], dropped_link_down=r["drop_down"],
            dropped_no_route=r["drop_noroute"], ttl_expired=r["ttl_expired"],
            in_flight_end=r["in_net"], offered_all=r["offered_all"],
            delivered_all=r["delivered_all"], dropped_all=r["dropped_all"],
            ttl_expired_all=r["ttl_all"], deliveries=r["deliveries"], hops_sum=r["hops_sum"],
            events=r["events"], wall_s=time.perf_counter() - wall0,
            window_s=max(end - warm, 0.0), little_area=r["area"], left=r["left"],
            sys_sum=r["sys_sum"], busy_s=r["busy"], carried=r["carried"],
            series=CoreSeries(t_s=r["s_t"], delivered=r["s_deliv"],
                              delivery_sum_s=r["s_dsum"], dropped=r["s_drop"],
                              ttl_expired=r["s_ttl"], in_network=r["s_in_net"],
                              link_util=r["s_busy"]),
            series_interval_s=ivl, end_s=end, stopped=r["stopped"],
            busy_window_s=[b - w for b, w in zip(r["busy"], r["busy_warm"])],
        )

    while True:
        t, c = heappop(heap)
        if c >= 0:
            d = p_dst[c]
            if d < 0:  # dropped at a link cut while on its way: now the id is free
                p_dst[c] = -1
                free_ids.append(c)
                continue
            y = p_node[c]
            if on_hop is not None:
                if hop_flow:
                    on_hop(p_prev[c], y, d, t - p_enq[c], t, p_flow[c])  # type: ignore[call-arg]
                else:
                    on_hop(p_prev[c], y, d, t - p_enq[c], t)
            if y == d:
                t0 = p_t0[c]
                if t0 >= warm:
                    delivered += 1
                    dt = t - t0
                    deliveries.append(dt)
                    hops_sum += ttl - p_ttl[c]
                    sys_sum += dt
                    left += 1
                b_deliv += 1
                b_dsum += t - t0
                delivered_all += 1
                if measuring:
                    area += in_net * (t - last_t)
                    last_t = t
                in_net -= 1
                p_dst[c] = -1
                free_ids.append(c)
                continue
            x = y
        elif c == _INJECT:
            t0, x, d, bits, flow = pending  # type: ignore[misc]
            try:
                pending = nxt()
                heappush(heap, (pending[0], _INJECT))
                inj_pushed += 1
            except StopIteration:
                pending = None
            if free_ids:
                c = free_ids.pop()
                p_node[c] = x; p_dst[c] = d; p_t0[c] = t; p_ttl[c] = ttl
                p_flow[c] = flow; p_bits[c] = bits; p_prev[c] = -1; p_enq[c] = t
            else:
                c = len(p_dst)
                p_node.append(x); p_dst.append(d); p_t0.append(t); p_ttl.append(ttl)
                p_flow.append(flow); p_bits.append(bits); p_prev.append(-1)
                p_enq.append(t)
            if t >= warm:
                offered += 1
            offered_all += 1
            if measuring:
                area += in_net * (t - last_t)
                last_t = t
            in_net += 1
            if x == d:  # a source never sends to itself; count it delivered in 0 s
                raise ValueError(f"traffic source produced a packet from node {x} to itself")
        elif c == _TICK:
            policy.tick(t)
            heappush(heap, (t + tick_iv, _TICK))  # type: ignore[operator]
            ctrl_pushed += 1
            continue
        elif c == _SAMPLE:
            s_t.append(t); s_deliv.append(b_deliv); s_dsum.append(b_dsum)
            s_drop.append(b_drop); s_ttl.append(b_ttl); s_in_net.append(in_net)
            # busy time counts where the transmission happens: what is booked beyond t
            # (one contiguous stretch up to free_at, see "Busy time") belongs to later bins
            done = [busy[k] - (free_at[k] - t if free_at[k] > t else 0.0) for k in range(nl)]
            s_busy.append([(done[k] - last_busy[k]) / ivl for k in range(nl)])
            last_busy = done
            b_deliv = 0; b_dsum = 0.0; b_drop = 0; b_ttl = 0
            heappush(heap, (t + ivl, _SAMPLE))
            ctrl_pushed += 1
            if progress is not None:
                progress(t, sum(carried) + inj_pushed + ctrl_pushed - len(heap))
            if observer is not None:
                observer({"t_s": t, "delivered": delivered_all, "dropped": dropped_all,
                          "ttl_expired": ttl_all, "in_network": in_net,
                          "deliveries": deliveries,
                          "series": {"t_s": s_t, "delivered": s_deliv, "delivery_sum_s": s_dsum,
                                     "dropped": s_drop, "ttl_expired": s_ttl,
                                     "in_network": s_in_net, "link_util": s_busy}})
            continue
        elif c == _WARMUP:
            measuring = True
            last_t = t
            area = 0.0
            busy_warm = [busy[k] - (free_at[k] - t if free_at[k] > t else 0.0) for k in range(nl)]
            continue
        elif c == end_code:
            t = end
            break
        elif c == stop_code:
            stopped = True
            # handled: every event before the next pending one; nothing happens until it
            t = min(heap[0][0], end) if heap else end
            end = t
            break
        else:
            ev = events_sorted[_LINK0 - c]
            for k in ev.links:
                if ev.action == "capacity":
                    inv_cap[k] = 1.0 / float(ev.capacity_bps)  # type: ignore[arg-type]
                    continue
                if ev.action == "delay":  # a link trace (routerd.sim.linktrace)
                    delay[k] = float(ev.delay_s)  # type: ignore[arg-type]
                    continue
                going_up = ev.action == "up"
                if up[k] == going_up:
                    continue
                up[k] = going_up
                if not going_up:
                    # drop what is still queued on k: packets whose departure is after t,
                    # i.e. whose arrival is after t + delay; packets on the wire arrive
                    a_k, b_k = src_l[k], dst_l[k]
                    t_wire = t + delay[k]
                    for te, pid in heap:
                        if (pid >= 0 and te > t_wire and p_dst[pid] >= 0 and p_prev[pid] == a_k
                                and p_node[pid] == b_k):
                            p_dst[pid] = -2
                            if p_t0[pid] >= warm:
                                drop_down += 1
                                sys_sum += t - p_t0[pid]
                                left += 1
                            b_drop += 1
                            dropped_all += 1
                            if measuring:
                                area += in_net * (t - last_t)
                                last_t = t
                            in_net -= 1
                    # the unsent part of the transmission time was never used
                    if free_at[k] > t:
                        busy[k] -= free_at[k] - t
                        free_at[k] = t
                    queues[k].clear()
                policy.on_link(src_l[k], dst_l[k], going_up, t)
            continue

        # ---- forward packet c from node x (fresh injection or arrival in transit) ----
        ttl_c = p_ttl[c]
        if ttl_c <= 0:
            reason = 3
        else:
            h = table[x][d]
            if h < -1:
                h = next_hop(x, d, p_flow[c], t)
            if h < 0:
                reason = 2
            else:
                k = link_of[x][h]
                if up[k]:
                    q = queues[k]
                    # departures before t are trimmed only when the deque is long enough
                    # to matter: the occupancy is exact whenever it is compared
                    if len(q) >= trim[k]:
                        while q and q[0] <= t:
                            q.popleft()
                    if len(q) < buf[k]:
                        f = free_at[k]
                        start = f if f > t else t  # noqa: PLR1730 (no call in the hot loop)
                        dep = start + p_bits[c] * inv_cap[k]
                        free_at[k] = dep
                        q.append(dep)
                        busy[k] += dep - start
                        carried[k] += 1
                        p_node[c] = h
                        p_prev[c] = x
                        p_enq[c] = t
                        p_ttl[c] = ttl_c - 1
                        heappush(heap, (dep + delay[k], c))
                        continue
                    reason = 0
                else:
                    reason = 1
        # the packet leaves the network here: dropped (reason 0 buffer, 1 link down,
        # 2 no route) or TTL expired (3)
        t0 = p_t0[c]
        if reason == 3:
            b_ttl += 1
        else:
            b_drop += 1
        if t0 >= warm:
            if reason == 3:
                ttl_expired += 1
            else:
                if reason == 0:
                    drop_buf += 1
                elif reason == 1:
                    drop_down += 1
                else:
                    drop_noroute += 1
            sys_sum += t - t0
            left += 1
        if reason == 3:
            ttl_all += 1
        else:
            dropped_all += 1
        if measuring:
            area += in_net * (t - last_t)
            last_t = t
        in_net -= 1
        p_dst[c] = -1
        free_ids.append(c)

    if stop is not None:
        stop._push = None
    t_end = end
    # transmissions booked beyond the end happen after it: not part of the run's busy time
    for k in range(nl):
        if free_at[k] > end:
            busy[k] -= free_at[k] - end
    # every pop was an event; the end marker (or the stop marker, the end marker then
    # still queued) and what is still queued were not
    events = sum(carried) + inj_pushed + ctrl_pushed - len(heap) - (0 if stopped else 1)
    if measuring:
        area += in_net * (t_end - last_t)
    window = max(t_end - warm, 0.0)
    wall = time.perf_counter() - wall0
    return CoreResult(
        offered=offered,
        delivered=delivered,
        dropped=drop_buf + drop_down + drop_noroute,
        dropped_buffer=drop_buf,
        dropped_link_down=drop_down,
        dropped_no_route=drop_noroute,
        ttl_expired=ttl_expired,
        in_flight_end=in_net,
        offered_all=offered_all,
        delivered_all=delivered_all,
        dropped_all=dropped_all,
        ttl_expired_all=ttl_all,
        deliveries=deliveries,
        hops_sum=hops_sum,
        events=events,
        wall_s=wall,
        window_s=window,
        little_area=area,
        left=left,
        sys_sum=sys_sum,
        busy_s=busy,
        carried=carried,
        series=CoreSeries(t_s=s_t, delivered=s_deliv, delivery_sum_s=s_dsum, dropped=s_drop,
                          ttl_expired=s_ttl, in_network=s_in_net, link_util=s_busy),
        series_interval_s=ivl,
        end_s=t_end,
        busy_window_s=[busy[k] - busy_warm[k] for k in range(nl)],
        stopped=stopped,
    )
