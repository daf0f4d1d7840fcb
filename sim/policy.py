"""The one interface every simulator routing policy implements.

A policy is a thin adapter: the simulator asks it for next hops and tells it what
happened; it never schedules events itself.  Node and destination arguments are node
indices into ``topology.nodes``.  Randomness comes only from the Generator handed to
``attach`` (seeded by the run), so a run is reproducible.

Call order per run::

    attach(topology, rng, settings)  once
    next_hop(x, d, flow, now)        whenever a packet for d is at x (x != d)
    on_hop(x, y, d, latency_s, now)  when a packet handed by x to y reaches y at `now`;
                                     latency_s = queueing + transmission + propagation
    on_link(x, y, up, now)           a link event from a scenario
    tick(now)                        every `tick_interval_s` of virtual time
    stats()                          at the end: a dict of plain numbers for summary.json
"""
from __future__ import annotations

from typing import Any

import numpy as np

from routerd.topology import Topology


class Policy:
    name = "base"
    #: virtual seconds between tick() calls; None = never ticked
    tick_interval_s: float | None = None

    def attach(self, topology: Topology, rng: np.random.Generator, settings: Any) -> None:
        self.topo = topology
        self.rng = rng
        self.settings = settings

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
