"""Scenario files: time-varying load and link events for one simulation.

Owns: the scenario format, its checking (every problem with file, key path, value and
rule, as :class:`routerd.core.errors.InputError`), the load factor as a function of time and
the binding of link names to a topology's link indices.
Also owns :class:`LinkEvent`, a link change bound to link indices (the simulator runs them).
Must not import: the engine, zmq, prometheus, matplotlib, ``routerd.sim``.

Format (YAML; our own)::

    scenario:
      name: trunk-cut                 # optional
      description: ...                # optional
      load:                           # multiplies the run's --rate; default factor 1
        - {step: 2.0, at_s: 10}                               # from 10 s on: x2
        - {ramp: [2.0, 0.5], from_s: 20, to_s: 30}            # linear, then holds 0.5
        - {burst: 3.0, from_s: 40, to_s: 60, on_s: 1, off_s: 4}  # x3 for 1 s of every 5 s
      links:
        - {at_s: 12, between: [w3, e3], down: true}           # both directions
        - {at_s: 18, from: w3, to: e3, up: true}              # one direction
        - {at_s: 25, between: [w3, e3], capacity_bps: 1.0e6}

Load rules.  Steps and ramps set the *base* factor: at time t it is the value of the
latest step or ramp that has started by t (a ramp interpolates inside its window and
holds its end value after it).  Bursts multiply the base inside their window during the
first ``on_s`` of every ``on_s + off_s`` period.  Each link entry does exactly one of
``down: true``, ``up: true`` or ``capacity_bps: X``.
"""
from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from routerd.core.errors import InputError, Problem
from routerd.core.topology import Topology

from .files import read_yaml
from .values import as_number


@dataclass(frozen=True, slots=True)
class LinkEvent:
    """A scheduled change to one or more directed links (indices into the topology): what
    a scenario's link entries become once bound to a topology, and what the simulator's
    event loop (:mod:`routerd.sim.core`) and link traces (:mod:`routerd.sim.linktrace`)
    schedule."""

    t: float
    links: tuple[int, ...]
    action: str  # "down" | "up" | "capacity" | "delay"
    capacity_bps: float | None = None
    delay_s: float | None = None  # "delay": the propagation delay of packets sent from t on


@dataclass(frozen=True, slots=True)
class LoadChange:
    kind: str          # "step" | "ramp" | "burst"
    start_s: float
    end_s: float       # step: start_s
    a: float           # step/burst factor, ramp start factor
    b: float           # ramp end factor (step: a)
    on_s: float = 0.0
    off_s: float = 0.0


@dataclass(frozen=True, slots=True)
class LinkChange:
    at_s: float
    ends: tuple[tuple[str, str], ...]   # directed (from, to) name pairs
    action: str                         # down | up | capacity
    capacity_bps: float | None
    where: str


@dataclass(frozen=True)
class Scenario:
    name: str
    load: tuple[LoadChange, ...] = ()
    links: tuple[LinkChange, ...] = ()
    source: str = ""
    description: str = ""

    # ---- load --------------------------------------------------------------------
    def factor(self, t: np.ndarray | float) -> np.ndarray:
        """Load factor at time(s) t (vectorised)."""
        tt = np.asarray(t, dtype=float)
        base = np.ones_like(tt)
        for ch in sorted((c for c in self.load if c.kind != "burst"), key=lambda c: c.start_s):
            on = tt >= ch.start_s
            if ch.kind == "step":
                base = np.where(on, ch.a, base)
            else:
                span = ch.end_s - ch.start_s
                frac = np.clip((tt - ch.start_s) / span, 0.0, 1.0) if span > 0 else 1.0
                base = np.where(on, ch.a + (ch.b - ch.a) * frac, base)
        for ch in self.load:
            if ch.kind == "burst":
                inside = (tt >= ch.start_s) & (tt < ch.end_s)
                phase = np.mod(tt - ch.start_s, ch.on_s + ch.off_s)
                base = np.where(inside & (phase < ch.on_s), base * ch.a, base)
        return base

    def max_factor(self) -> float:
        """An upper bound of the load factor over all time (for thinning)."""
        base = [1.0] + [c.a for c in self.load if c.kind != "burst"] + \
               [c.b for c in self.load if c.kind == "ramp"]
        m = max(base)
        burst = 1.0
        for c in self.load:
            if c.kind == "burst":
                burst *= max(c.a, 1.0)
        return m * burst

    def mean_factor(self, duration_s: float, warmup_s: float = 0.0) -> float:
        """Time-averaged load factor over [warmup, duration] (numerically, 1 ms grid)."""
        if duration_s <= warmup_s:
            return float(self.factor(warmup_s))
        m = int(min(2_000_000, max(1000, (duration_s - warmup_s) * 1000)))
        ts = warmup_s + (np.arange(m) + 0.5) * (duration_s - warmup_s) / m
        return float(self.factor(ts).mean())

    # ---- links -------------------------------------------------------------------
    def link_events(self, topo: Topology) -> list[LinkEvent]:
        """Bind names to ``topo``'s links; InputError listing every unknown link."""
        problems: list[Problem] = []
        out: list[LinkEvent] = []
        for ch in self.links:
            ks = []
            for a, b in ch.ends:
                try:
                    ks.append(topo.link(a, b))
                except KeyError:
                    problems.append(Problem(ch.where, f"{a} -> {b}",
                                            f"is not a link of topology {topo.name!r}"))
            if ks:
                out.append(LinkEvent(ch.at_s, tuple(ks), ch.action, ch.capacity_bps))
        if problems:
            raise InputError(problems)
        return out

    def summary(self) -> str:
        kinds = {k: sum(1 for c in self.load if c.kind == k) for k in ("step", "ramp", "burst")}
        acts = {k: sum(1 for c in self.links if c.action == k) for k in ("down", "up", "capacity")}
        ld = ", ".join(f"{v} {k}{'s' if v != 1 else ''}" for k, v in kinds.items() if v) or "constant"
        lk = ", ".join(f"{v} {k}" for k, v in acts.items() if v) or "none"
        return (f"scenario {self.name!r}: load {ld} (peak factor {self.max_factor():g}); "
                f"link events: {lk}")


def empty() -> Scenario:
    return Scenario(name="constant")


_TOP = {"name", "description", "load", "links"}


def _num(v: Any, where: str, problems: list[Problem], *, lo: float | None = 0.0,
         lo_open: bool = False) -> float | None:
    num = as_number(v)          # the one number rule: 1.0e6 as text is a number too
    if num is None:
        problems.append(Problem(where, v, "must be a number"))
        return None
    fv = float(num)
    if not math.isfinite(fv):
        problems.append(Problem(where, v, "must be a finite number"))
        return None
    if lo is not None and (fv < lo or (lo_open and fv == lo)):
        problems.append(Problem(where, v, f"must be {'>' if lo_open else '>='} {lo:g}"))
        return None
    return fv


def from_mapping(doc: Any, source: str = "<scenario>") -> Scenario:
    """Check a parsed scenario document; InputError lists every problem found."""
    problems: list[Problem] = []
    if not isinstance(doc, Mapping) or not isinstance(doc.get("scenario"), Mapping):
        raise InputError(Problem(source, type(doc).__name__ if not isinstance(doc, Mapping)
                                 else doc.get("scenario"),
                                 "must be a mapping with a 'scenario' mapping at the top"))
    sc = doc["scenario"]
    for k in sc:
        if k not in _TOP:
            problems.append(Problem(f"{source}: scenario.{k}", k,
                                    f"is not a known key ({', '.join(sorted(_TOP))})"))
    name = sc.get("name", "")
    if not isinstance(name, str):
        problems.append(Problem(f"{source}: scenario.name", name, "must be a string"))
        name = ""
    loads: list[LoadChange] = []
    ld = sc.get("load", []) or []
    if not isinstance(ld, list):
        problems.append(Problem(f"{source}: scenario.load", ld, "must be a list"))
        ld = []
    for i, e in enumerate(ld):
        w = f"{source}: scenario.load[{i}]"
        if not isinstance(e, Mapping):
            problems.append(Problem(w, e, "must be a mapping"))
            continue
        kinds = [k for k in ("step", "ramp", "burst") if k in e]
        if len(kinds) != 1:
            problems.append(Problem(w, dict(e), "must have exactly one of step, ramp, burst"))
            continue
        kind = kinds[0]
        allowed = {"step": {"step", "at_s"}, "ramp": {"ramp", "from_s", "to_s"},
                   "burst": {"burst", "from_s", "to_s", "on_s", "off_s"}}[kind]
        for k in e:
            if k not in allowed:
                problems.append(Problem(f"{w}.{k}", e[k],
                                        f"is not a key of a {kind} ({', '.join(sorted(allowed))})"))
        missing = [k for k in sorted(allowed) if k not in e]
        for k in missing:
            problems.append(Problem(f"{w}.{k}", None, f"is missing (a {kind} needs it)"))
        if missing:
            continue
        if kind == "step":
            f = _num(e["step"], f"{w}.step", problems)
            at = _num(e["at_s"], f"{w}.at_s", problems)
            if f is not None and at is not None:
                loads.append(LoadChange("step", at, at, f, f))
            continue
        t0 = _num(e["from_s"], f"{w}.from_s", problems)
        t1 = _num(e["to_s"], f"{w}.to_s", problems)
        if t0 is not None and t1 is not None and t1 <= t0:
            problems.append(Problem(f"{w}.to_s", e["to_s"], f"must be after from_s ({t0:g})"))
            t1 = None
        if kind == "ramp":
            r = e["ramp"]
            if not (isinstance(r, list) and len(r) == 2):
                problems.append(Problem(f"{w}.ramp", r, "must be a list of two factors [start, end]"))
                continue
            a = _num(r[0], f"{w}.ramp[0]", problems)
            b = _num(r[1], f"{w}.ramp[1]", problems)
            if None not in (a, b, t0, t1):
                loads.append(LoadChange("ramp", t0, t1, a, b))  # type: ignore[arg-type]
        else:
            f = _num(e["burst"], f"{w}.burst", problems)
            on = _num(e["on_s"], f"{w}.on_s", problems, lo_open=True)
            off = _num(e["off_s"], f"{w}.off_s", problems)
            if None not in (f, on, off, t0, t1):
                loads.append(LoadChange("burst", t0, t1, f, f, on, off))  # type: ignore[arg-type]
    links: list[LinkChange] = []
    lk = sc.get("links", []) or []
    if not isinstance(lk, list):
        problems.append(Problem(f"{source}: scenario.links", lk, "must be a list"))
        lk = []
    for i, e in enumerate(lk):
        w = f"{source}: scenario.links[{i}]"
        if not isinstance(e, Mapping):
            problems.append(Problem(w, e, "must be a mapping"))
            continue
        allowed = {"at_s", "between", "from", "to", "down", "up", "capacity_bps"}
        for k in e:
            if k not in allowed:
                problems.append(Problem(f"{w}.{k}", e[k],
                                        f"is not a link event key ({', '.join(sorted(allowed))})"))
        at = None
        if "at_s" not in e:
            problems.append(Problem(f"{w}.at_s", None, "is missing"))
        else:
            at = _num(e["at_s"], f"{w}.at_s", problems)
        ends: tuple[tuple[str, str], ...] = ()
        if "between" in e:
            b = e["between"]
            if isinstance(b, list) and len(b) == 2 and all(isinstance(x, str) for x in b):
                ends = ((b[0], b[1]), (b[1], b[0]))
            else:
                problems.append(Problem(f"{w}.between", b, "must be a list of two node names"))
        elif "from" in e and "to" in e:
            ends = ((str(e["from"]), str(e["to"])),)
        else:
            problems.append(Problem(w, dict(e), "needs 'between: [a, b]' or 'from' and 'to'"))
        acts = [k for k in ("down", "up", "capacity_bps") if k in e]
        action = None
        cap = None
        if len(acts) != 1:
            problems.append(Problem(w, dict(e), "must do exactly one of down: true, up: true, capacity_bps: X"))
        elif acts[0] == "capacity_bps":
            cap = _num(e["capacity_bps"], f"{w}.capacity_bps", problems, lo_open=True)
            action = "capacity" if cap is not None else None
        else:
            if e[acts[0]] is not True:
                problems.append(Problem(f"{w}.{acts[0]}", e[acts[0]], "must be true"))
            else:
                action = acts[0]
        if at is not None and ends and action is not None:
            links.append(LinkChange(at, ends, action, cap, w))
    if problems:
        raise InputError(problems)
    return Scenario(name=name or source, load=tuple(loads), links=tuple(links), source=source,
                    description=str(sc.get("description", "")))


def load(path: str) -> Scenario:
    """Read and check a scenario YAML file."""
    return from_mapping(read_yaml(path), source=path)
