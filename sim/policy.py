"""The one interface every simulator routing policy implements.

A policy is a thin adapter: the simulator asks it for next hops and tells it what
happened; it never schedules events itself.  Node and destination arguments are node
indices into ``topology.nodes``.  Randomness comes only from the Generator handed to
``attach`` (seeded by the run), so a run is reproducible.

Call order per run::

    attach(topology, rng, settings)  once; settings is the run's routerd.io.config.Config
    offered(demand_pps, mean_bits)   once, before the first packet: the expected offered
                                     load, packets/s per (source, destination), time-averaged
    next_hop(x, d, flow, now)        whenever a packet for d is at x (x != d)
    on_hop(x, y, d, latency_s, now)  when a packet handed by x to y reaches y at `now`;
                                     latency_s = queueing + transmission + propagation
    on_link(x, y, up, now)           a link event from a scenario
    tick(now)                        every `tick_interval_s` of virtual time
    stats()                          at the end: a dict of plain numbers for summary.json

The fast path.  ``table`` (optional) is a list of n lists of n ints the simulator reads
before calling ``next_hop``: ``table[x][d] >= 0`` is the next hop, ``-1`` means no route
(the packet is dropped), ``-2`` means "call next_hop" (e.g. a random split).  A policy
that changes its routes mutates the rows in place; the simulator keeps a reference.  A
policy that leaves ``table`` as None is asked on every hop.  ``on_hop`` is only called
when a subclass overrides it.

Optional hooks the compiled loop (``routerd.sim._hops``, ``engine.kernels``) uses when a
policy has them; the reference loop never does, and the results must be the same:

``on_hops(x, y, d, latency_s, now, flow)``  numpy arrays: every hop since the last call, in
    order, instead of one ``on_hop`` each; called before every ``tick`` and ``on_link`` and
    at the end.  ``next_hop`` may be called while hops are still buffered, so provide it
    only when ``next_hop`` does not depend on what ``on_hop`` learned.
``split_arrays()``, ``draws()``, ``set_draws(block, index)``  the loop samples ``table``
    entries -2 itself (see ``routerd.sim.policies.QRouting``); refreshed after every
    ``tick`` and ``on_link``.
``hop_rows()``  a ``routerd.sim._hops.QRows`` (or None): the loop writes every hop's row
    into it instead of calling ``on_hop`` / ``on_hops``; the policy's ``tick`` takes them
    from it (``QRouting``).
"""
from __future__ import annotations

from typing import Any

import numpy as np

from routerd.core.topology import Topology


class Policy:
    name = "base"
    #: virtual seconds between tick() calls; None = never ticked
    tick_interval_s: float | None = None
    #: optional fast-path next-hop table, see the module docstring
    table: list[list[int]] | None = None

    def attach(self, topology: Topology, rng: np.random.Generator, settings: Any) -> None:
        self.topo = topology
        self.rng = rng
        self.settings = settings

    def offered(self, demand_pps: np.ndarray, mean_bits: float) -> None:
        """The expected offered load: (n, n) packets/s, and the mean packet size in bits."""

    def next_hop(self, x: int, d: int, flow: int, now: float) -> int:
        """The neighbour x hands this packet to, or -1 to drop it (no route)."""
        raise NotImplementedError

    def on_hop(self, x: int, y: int, d: int, latency_s: float, now: float) -> None:
        pass

    def on_link(self, x: int, y: int, up: bool, now: float) -> None:
        pass

    def tick(self, now: float) -> None:
        pass

    def stats(self) -> dict[str, float]:
        return {}
