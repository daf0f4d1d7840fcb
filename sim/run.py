"""Run one simulation from a plain spec and return plain results.

Owns: turning a :class:`SimSpec` (or a dict of its fields) into a topology, config,
scenario, traffic source and policy; running :func:`routerd.sim.core.run_core`; and reducing the
raw counts to the summary (the keys of ``summary.json``) and the time series.
:func:`run` is a pure function of its spec (the wall-clock time is the one exception,
reported as ``wall_s``), takes and returns only picklable plain values, and so can be
mapped over a process pool as it is.
Must not import: zmq, prometheus, matplotlib (plots live in :mod:`routerd.sim.plots`).
"""
from __future__ import annotations

import argparse
import math
import os
import sys
import time
from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass, field, fields
from typing import Any

import numpy as np

from routerd.core import topology as _topology
from routerd.core.errors import InputError, Problem
from routerd.io import config as _config
from routerd.io import inputs as _inputs
from routerd.io import scenario as _scenario

from . import policies as _policies
from .core import CoreResult, StopRequest, run_core
from .stats import delivery_stats
from .traffic import PoissonTraffic

DEMO_TOPOLOGY = os.path.join(os.path.dirname(os.path.dirname(_topology.__file__)), "data", _inputs.DEMO_LAB)


@dataclass
class SimSpec:
    """Everything that determines a run.  Same spec → same summary (apart from wall_s).

    ``topology``: a file path, ``topohub:GROUP/NAME``, a mapping in our YAML format, or
    None (the config's ``topology.file``, else the built-in demo lab).  ``scenario``: a
    file path, a parsed mapping, or None.  ``warmup_s`` None means a tenth of the
    duration.  ``config``/``overrides``: a config file or its nested mapping (a spec that
    travels to another host carries the document, not the path), and ``KEY=VALUE``
    strings.
    """

    policy: str = "shortest"
    rate_pps: float = 100.0
    duration_s: float = 10.0
    seed: int = 1
    topology: Any = None
    packet_bytes: float = 1000.0
    size_dist: str = "fixed"
    warmup_s: float | None = None
    scenario: Any = None
    demands: bool = False
    config: str | Mapping[str, Any] | None = None
    overrides: Sequence[str] = field(default_factory=tuple)
    capacity_bps: float | None = None
    buffer_pkts: int | None = None
    series: bool = True
    progress: bool = False
    # trace-driven runs (routerd.sim.trace, routerd.sim.linktrace): a capture or flow log replaces the
    # Poisson source (duration None: the trace's span plus routerd.sim.trace.DRAIN_S)
    traffic: str | None = None
    address_map: str | None = None
    trace_speed: float = 1.0
    allow_truncated: bool = False
    link_trace: str | None = None

    @classmethod
    def of(cls, spec: SimSpec | Mapping[str, Any]) -> SimSpec:
        if isinstance(spec, SimSpec):
            return spec
        known = {f.name for f in fields(cls)}
        bad = sorted(set(spec) - known)
        if bad:
            raise InputError(Problem("spec", bad, f"are not simulation spec keys ({', '.join(sorted(known))})"))
        return cls(**dict(spec))

    def to_dict(self) -> dict[str, Any]:
        d = asdict(self)
        d["overrides"] = list(self.overrides)
        return d


def _check(spec: SimSpec) -> list[Problem]:
    p: list[Problem] = []
    if spec.traffic is None and spec.rate_pps is None:
        p.append(Problem("--rate", None, "is needed (or --traffic FILE)"))
    elif spec.traffic is None and not (isinstance(spec.rate_pps, (int, float))
                                       and math.isfinite(spec.rate_pps) and spec.rate_pps >= 0):
        p.append(Problem("--rate", spec.rate_pps, "must be a finite number >= 0 (packets/s)"))
    if spec.duration_s is None and spec.traffic is not None:
        pass  # the trace's span
    elif not (isinstance(spec.duration_s, (int, float)) and math.isfinite(spec.duration_s) and spec.duration_s > 0):
        p.append(Problem("--duration", spec.duration_s, "must be a finite number > 0 (seconds)"))
    if spec.warmup_s is not None and spec.duration_s is not None \
            and not (0 <= spec.warmup_s < spec.duration_s):
        p.append(Problem("--warmup", spec.warmup_s, f"must be >= 0 and below the duration ({spec.duration_s:g} s)"))
    if not (spec.packet_bytes > 0 and math.isfinite(spec.packet_bytes)):
        p.append(Problem("--packet-bytes", spec.packet_bytes, "must be > 0"))
    if spec.size_dist not in ("fixed", "exp"):
        p.append(Problem("--size-dist", spec.size_dist, "is not fixed or exp"))
    if not (isinstance(spec.seed, (int, np.integer)) and spec.seed >= 0):
        # numpy's SeedSequence takes whole numbers >= 0 only; refused here, not mid-run
        p.append(Problem("--seed", spec.seed, "must be a whole number >= 0"))
    if spec.policy.partition(":")[0] not in _policies.NAMES:  # NAME[:ARG]
        p.append(Problem("--policy", spec.policy, f"is not a policy ({', '.join(_policies.NAMES)})"))
    return p


def load_inputs(spec: SimSpec) -> tuple[_config.Config, _topology.Topology, _scenario.Scenario]:
    """Config, topology and scenario for a spec; InputError listing every problem."""
    problems = _check(spec)
    if problems:
        raise InputError(problems)
    # the one input rule (routerd.io.inputs): the config's paths relative to its folder,
    # --capacity-bps / --buffer-pkts as overrides of its topology.default_* keys
    cfg = _inputs.load_config(argparse.Namespace(
        config=spec.config, overrides=list(spec.overrides), capacity_bps=spec.capacity_bps,
        buffer_pkts=spec.buffer_pkts))
    topo = _inputs.load_topology(cfg, spec.topology)
    sc = spec.scenario
    if sc is None:
        scen = _scenario.empty()
    elif isinstance(sc, _scenario.Scenario):
        scen = sc
    elif isinstance(sc, Mapping):
        scen = _scenario.from_mapping(sc, source="<spec>")
    else:
        scen = _scenario.load(str(sc))
    if spec.demands and topo.demands is None:
        raise InputError(Problem("--demands", topo.source or topo.name,
                                 "this topology carries no demand matrix"))
    return cfg, topo, scen


def run(spec: SimSpec | Mapping[str, Any], *, policy: Any = None,
        observer: Any = None, progress: Any = None,
        stop: StopRequest | None = None) -> dict[str, Any]:
    """Run one simulation.  Returns ``{"summary": {...}, "series": {...}, "links": [...],
    "link_events": [...]}`` (the scenario's link events: ``t_s``, ``action``, ``links``).

    Raises :class:`routerd.core.errors.InputError` for bad inputs (before anything runs).
    ``policy``: an unattached :class:`routerd.sim.policy.Policy` instance to use instead of
    ``spec.policy`` (the caller keeps a reference, e.g. to read its final tables).
    ``observer``: passed to :func:`routerd.sim.core.run_core` (live views at every sample).
    ``progress``: ``progress(t, events)`` at every sample, instead of the stderr line that
    ``spec.progress`` asks for (a sweep worker reports to its caller this way).
    A policy with a ``close()`` method (one that holds processes or sockets) is closed
    at the end, also when the run is interrupted.
    ``stop``: a :class:`routerd.sim.core.StopRequest` that may end the run early (``routerd
    simulate``'s Ctrl-C); the result then covers the run up to the cut, and its summary
    says so: ``interrupted: true`` and ``reached_s`` (absent from a complete run's summary).
    """
    sp = SimSpec.of(spec)
    cfg, topo, scen = load_inputs(sp)
    from . import linktrace as _linktrace
    from . import trace as _trace

    sp, trace_src = _trace.prepare(sp, cfg, topo)   # --traffic: a capture or a flow log
    ltrace = _linktrace.for_spec(sp, topo)          # --link-trace: link delays over time
    warm = sp.duration_s / 10.0 if sp.warmup_s is None else float(sp.warmup_s)
    ss = np.random.SeedSequence(int(sp.seed))
    r_traffic, r_policy = (np.random.default_rng(s) for s in ss.spawn(2))
    traffic: Any = trace_src if trace_src is not None else PoissonTraffic(
        topo.n, sp.rate_pps, r_traffic, packet_bytes=sp.packet_bytes, size_dist=sp.size_dist,
        pair_weights=topo.demands if sp.demands else None, scenario=scen,
        duration_s=sp.duration_s, warmup_s=warm, flows_per_pair=cfg["sim.flows_per_pair"],
    )
    scen_events = scen.link_events(topo)
    link_events = scen_events + (ltrace.events(sp.trace_speed) if ltrace else [])
    if policy is None:
        policy = _policies.make(sp.policy)
    try:
        policy.attach(topo, r_policy, cfg)
        policy.offered(traffic.demand_pps(), traffic.mean_bits())
        printer = _progress_printer(sp.duration_s) if sp.progress and progress is None else None
        raw = run_core(topo, policy, traffic.packets(), duration_s=sp.duration_s, warmup_s=warm,
                       ttl=cfg["sim.ttl"], series_interval_s=cfg["sim.series_interval_s"],
                       link_events=link_events, progress=printer or progress,
                       observer=observer, stop=stop, kernels=cfg["engine.kernels"])
        if printer is not None:
            printer(raw.end_s, raw.events, final=True, stopped=raw.stopped)
        result = reduce(raw, sp, topo, policy.name, warm, policy.stats())
        why = getattr(policy, "mode_why", None)
        if why:      # the learner ran another mode than the config's (config.split_fits)
            result["notes"] = [why]
        # the scenario's link events, for plots and readers of the result
        result["link_events"] = [
            {"t_s": ev.t, "action": ev.action,
             "links": [f"{topo.nodes[topo.src[k]]}->{topo.nodes[topo.dst[k]]}" for k in ev.links]}
            for ev in scen_events if not raw.stopped or ev.t <= raw.end_s]
        return _trace.annotate(result, trace_src, ltrace)
    finally:
        close = getattr(policy, "close", None)
        if close is not None:
            close()


def reduce(raw: CoreResult, sp: SimSpec, topo: _topology.Topology, policy: str,
           warm: float, pstats: Mapping[str, float]) -> dict[str, Any]:
    """Raw counts from :func:`run_core` → the summary, the series and per-link figures."""
    ds = delivery_stats(raw.deliveries)      # batch-means interval: routerd.sim.stats
    m = ds.count
    win = raw.window_s
    util = [b / win if win > 0 else math.nan for b in raw.busy_window_s]
    L = raw.little_area / win if win > 0 else math.nan
    lam = raw.left / win if win > 0 else math.nan
    W = raw.sys_sum / raw.left if raw.left else math.nan
    summary: dict[str, Any] = {
        "policy": policy,
        "topology": topo.name,
        "nodes": topo.n,
        "links": topo.n_links,
        "seed": int(sp.seed),
        "rate_pps": float(sp.rate_pps),
        "duration_s": float(sp.duration_s),
        "warmup_s": warm,
        "packet_bytes": float(sp.packet_bytes),
        "size_dist": sp.size_dist,
        "demands": bool(sp.demands),
        "offered": raw.offered,
        "delivered": raw.delivered,
        "dropped": raw.dropped,
        "dropped_buffer": raw.dropped_buffer,
        "dropped_link_down": raw.dropped_link_down,
        "dropped_no_route": raw.dropped_no_route,
        "ttl_expired": raw.ttl_expired,
        "in_flight_at_end": raw.offered - raw.delivered - raw.dropped - raw.ttl_expired,
        "delivery_ratio": raw.delivered / raw.offered if raw.offered else math.nan,
        **ds.summary_keys(),
        "mean_hops": raw.hops_sum / m if m else math.nan,
        "throughput_pps": m / win if win > 0 else math.nan,
        "link_util_max": max(util) if util else math.nan,
        "link_util_mean": sum(util) / len(util) if util else math.nan,
        "little_L": L,
        "little_lambda_W": lam * W if raw.left else math.nan,
        "events": raw.events,
        "wall_s": raw.wall_s,
    }
    if raw.stopped:   # only then: a complete run's keys stay what sweep and the lab expect
        summary["interrupted"] = True
        summary["reached_s"] = raw.end_s
    for k, v in pstats.items():
        summary[f"policy_{k}"] = v
    links = [
        {"link": k, "from": topo.nodes[a], "to": topo.nodes[b], "capacity_bps": float(c),
         "delay_s": float(dly), "utilisation": util[k], "packets": raw.carried[k]}
        for k, (a, b, c, dly) in enumerate(zip(topo.src.tolist(), topo.dst.tolist(),
                                               topo.capacity_bps.tolist(), topo.delay_s.tolist()))
    ]
    series: dict[str, Any] = {}
    if sp.series:
        s = raw.series
        series = {
            "t_s": s.t_s,
            "delivered": s.delivered,
            "mean_delivery_s": [ds / c if c else math.nan for ds, c in zip(s.delivery_sum_s, s.delivered)],
            "dropped": s.dropped,
            "ttl_expired": s.ttl_expired,
            "in_network": s.in_network,
            "link_util": s.link_util,
            "interval_s": raw.series_interval_s,
        }
    return {"summary": summary, "series": series, "links": links}


def _progress_printer(duration: float, stream: Any = None) -> Any:
    """Progress of a long run on stderr, from its third second on: redrawn twice a second
    on a terminal, a plain line every 10 s elsewhere (:class:`routerd.io.progress.StatusLine`)."""
    from routerd.io.progress import StatusLine

    t0 = time.perf_counter()
    line = StatusLine(stream if stream is not None else sys.stderr, every_s=0.5, plain_every_s=10.0)

    def show(t: float, events: int, final: bool = False, stopped: bool = False) -> None:
        now = time.perf_counter()
        if final:
            if stopped:   # always said (on a terminal, ending the live line first)
                line.show(f"interrupted at t={t:.2f} of {duration:g} s: {events} events in "
                          f"{now - t0:.1f} s", force=True)
                line.done()
            elif line.shown:
                line.show(f"simulated {duration:g} s: {events} events in {now - t0:.1f} s", force=True)
                line.done()
            return
        if now - t0 < 2.0 or not line.due():
            return
        frac = min(t / duration, 1.0)
        eta = (now - t0) * (1 - frac) / frac if frac > 0 else math.nan
        bar = "#" * int(frac * 30)
        line.show(f"[{bar:<30}] {frac * 100:5.1f}%  t={t:.2f}/{duration:g} s  {events} events  "
                  f"eta {eta:.0f} s")

    return show
