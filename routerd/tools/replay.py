"""``routerd replay``: the replay shell — journal records through the engine, offline.

Owns: the command's options and outputs (``tables.json``, ``replay.json``, the what-if
comparison's CSV/JSON/PNG and printed table, ``--export-link-trace``), choosing where a
replay starts (the journal's first record, or the oldest snapshot it continues from),
setting variants (recorded settings with overrides), and the merged replay of a sharded
service's state dir (:func:`replay_sharded_command`, on
:func:`routerd.io.shards.replay_shards`).  Records are applied with
:func:`routerd.io.journal.replay_into` only — the function the service's start-up
recovery uses — so the same records give the same tables.
Must not import: zmq, prometheus, the simulator; matplotlib only inside the plot step.

Theory of operation
-------------------
Baseline.  The *recorded* run applies every record as written: the first ``start``
record's settings (or the snapshot's) and every ``config`` record (a reload).  With no
``--config`` and no ``--set`` its final tables are ``DIR/tables.json``: the tables the
service published last, bit for bit, because the service journals every call it makes
to the engine (batches, link overrides, reloads and every ``decide`` as a ``tick``).

Variants (what-if).  A variant is the recorded settings with some ``engine.*`` keys
changed: ``--set KEY=VALUE`` (and the ``engine.*`` keys in which ``--config FILE``
differs from the settings the service ended with) define the primary variant, whose
tables go to ``tables.json``; each ``--compare KEY=VALUE[,KEY=VALUE...]`` adds one more.
The overrides apply from the start and again on top of every recorded reload.  All
variants see the same records in one pass over the journal; at every ``tick`` each one
decides and is compared with the recorded run: route changes, exploration share, and
which (node, destination) pairs have another greedy next hop.  A pair that differs at
tick i is counted as differing until tick i + 1 (the last tick: until the journal's
last record), which gives the pair-seconds.

What a replay cannot say.  The observations are the ones the lab produced while it
routed with the recorded tables: a variant is judged on the recorded traffic, not on the
traffic its own tables would have drawn (for that, the simulator with ``--traffic`` and
``--link-trace``).

Topology.  The one the state dir recorded (:mod:`routerd.io.statedir`: the newest ``start``
record's document, else the directory's pointer), so the directory alone is enough;
``--topology`` / ``--config`` may name the same network (same id) and are refused
otherwise; the built-in demo lab only for a journal written for it.


Start and end.  The records are the ones the service's own start-up recovery keeps
(:func:`routerd.io.journal.recover_state`, run read-only: the same report, shown in
``replay.json`` ``recovery`` and printed as ``recovery ...`` lines word for word as the
service's banner and ``health`` give them); the replay ends where they end.  It starts as
early as they allow: record 1 when the journal holds it undamaged up to the recovery's
snapshot, else the oldest intact snapshot from which it does, else that snapshot; every
variant starts from the same learned state, and the recorded run reaches the service's.
"""
from __future__ import annotations

import argparse
import csv
import json
import math
import os
import shutil
import sys
import tempfile
import time
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass, field, fields, replace
from typing import Any

import numpy as np

from routerd.core import splitting as _splitting
from routerd.core import topology as _topology
from routerd.core import variants as _variants
from routerd.core.engine import Decision, Engine, EngineSettings
from routerd.core.errors import InputError, Problem
from routerd.io import config as _config
from routerd.io import journal as J
from routerd.io import shards as _shards
from routerd.io import statedir as _statedir
from routerd.io import wire

#: config key → EngineSettings field (the inverse of EngineSettings.from_config; a test
#: checks the two agree)
ENGINE_KEYS: dict[str, str] = {
    "engine.step.mode": "step_mode", "engine.step.alpha": "alpha", "engine.step.c": "c",
    "engine.step.kappa": "kappa", "engine.step.floor": "floor",
    "engine.initial.mode": "initial_mode", "engine.initial.value_s": "initial_value_s",
    "engine.ceiling_s": "ceiling_s", "engine.hysteresis.margin": "margin",
    "engine.explore.basis": "explore_basis", "engine.explore.min_rate": "explore_min",
    "engine.explore.max_rate": "explore_max", "engine.explore.cap": "explore_cap",
    "engine.explore.td_ref": "td_ref", "engine.explore.td_smoothing": "td_smoothing",
    "engine.explore.visits_half": "visits_half", "engine.kernels": "kernels",
    **{key: f for f, (key, _) in _variants.FIELDS.items()},
    **{key: f for f, (key, _) in _splitting.FIELDS.items()},
}
_KEY_OF = {f: k for k, f in ENGINE_KEYS.items()}
RECORDED = "recorded"


class ReplayError(InputError):
    """The journal, the topology or the settings cannot be replayed as asked."""


# ---- command line ------------------------------------------------------------------------
def configure(p: argparse.ArgumentParser) -> None:
    p.description = ("Re-run a service's journal through the engine offline: reproduce its "
                     "tables exactly, or compare what other settings would have done.")
    p.add_argument("source", metavar="STATE_DIR_OR_JOURNAL",
                   help="the service's state dir (journal/ and snapshots/), a journal dir, or one segment file")
    p.add_argument("--config", metavar="FILE", help="routerd config: its topology, and its engine.* "
                   "settings where they differ from the recorded ones (a what-if)")
    p.add_argument("--topology", metavar="FILE", help="topology file or topohub:GROUP/NAME; must "
                   "have the recorded network's id (default: the one the state dir recorded)")
    p.add_argument("--set", metavar="KEY=VALUE", action="append", default=[], dest="overrides",
                   help="change one engine.* setting for the what-if, e.g. --set "
                        "engine.hysteresis.margin=0.2 (repeatable)")
    p.add_argument("--compare", metavar="KEY=VALUE[,KEY=VALUE]", action="append", default=[],
                   help="one more variant to replay side by side, e.g. --compare "
                        "engine.explore.max_rate=0.05 (repeatable; one report for all)")
    p.add_argument("--out", metavar="DIR", required=True, help="output directory (created)")
    p.add_argument("--export-link-trace", metavar="FILE",
                   help="also write each link's measured hop latency over time as CSV "
                        "(t_s,from,to,delay_s,mean_s,samples) for routerd simulate --link-trace")
    p.add_argument("--link-trace-interval", metavar="S", type=float, default=1.0,
                   help="time bin of --export-link-trace, seconds (default 1)")
    p.add_argument("--no-plot", action="store_true", help="skip the PNG")
    p.add_argument("--quiet", action="store_true", help="print only the summary table")


def run(args: argparse.Namespace) -> int:
    lock: _statedir.StateLock | None = None
    try:
        from routerd.io.files import output_dir, output_file

        output_dir(args.out)                 # before the replay: a bad --out costs nothing
        if args.export_link_trace:
            output_file(args.export_link_trace, "--export-link-trace")
        into = _statedir.enclosing_state_dir(args.out)
        if into is not None:
            # writing into a state dir: only while no service (or other replay) uses it
            try:
                lock = _statedir.StateLock(into, "routerd replay --out").acquire()
            except (_statedir.StateDirBusy, OSError) as e:
                raise ReplayError(Problem("--out", args.out, f"is inside a state dir that cannot be "
                                          f"locked: {e}")) from None
        if _shards.sharded_state(args.source):   # a sharded service's state dir: merge
            res = replay_sharded_command(args)
        else:
            res = replay_command(args)
    except InputError as e:
        print(f"routerd replay: {len(e.problems)} problem(s)", file=sys.stderr)
        for pr in e.problems:
            print(f"  {pr}", file=sys.stderr)
        return 2
    except OSError as e:
        # an unreadable state dir, journal dir or segment (another user's service), or an
        # output that cannot be written: name the file and the reason, not a traceback
        print(f"routerd replay: {e.filename or args.source}: {e.strerror or e}", file=sys.stderr)
        return 2
    finally:
        if lock is not None:
            lock.release()
    for line in res["printed"]:
        print(line)
    return 0


# ---- variants --------------------------------------------------------------------------
@dataclass(frozen=True)
class Variant:
    """A label and the settings fields it changes (empty: the recorded run)."""

    label: str
    changes: Mapping[str, Any] = field(default_factory=dict)

    def settings(self, recorded: EngineSettings) -> EngineSettings:
        if not self.changes:
            return recorded
        try:
            return replace(recorded, **dict(self.changes))
        except ValueError as e:
            raise ReplayError(f"{self.label}: the engine refuses these settings on top of the "
                              f"recorded ones: {e}") from None

    def record(self, r: J.Record) -> J.Record:
        """The record as this variant applies it: reloads keep the overrides on top."""
        if r.kind == "config" and self.changes:
            s = self.settings(J.settings_from_dict(r.body["settings"]))
            return J.Record(r.no, r.kind, {**r.body, "settings": J.settings_to_dict(s)})
        return r


def parse_changes(items: Sequence[str], where: str) -> dict[str, Any]:
    """``KEY=VALUE`` strings (engine.* config keys) → EngineSettings field changes."""
    out: dict[str, Any] = {}
    problems: list[Problem] = []
    for it in items:
        for part in (p for p in it.split(",") if p.strip()):
            if "=" not in part:
                problems.append(Problem(where, part, "must look like KEY=VALUE"))
                continue
            k, raw = (s.strip() for s in part.split("=", 1))
            if k not in ENGINE_KEYS:
                if k.startswith("engine.optimum.") and k in _config.SCHEMA:
                    problems.append(Problem(f"{where}: {k}", raw, "is the service's live optimality "
                                            "gap, not an engine setting (a replay applies the "
                                            "journal's guide records as they are)"))
                elif k == "engine.split.max_nodes":
                    problems.append(Problem(f"{where}: {k}", raw, "picks the mode a service or "
                                            "simulator starts in on a network of its size, not an "
                                            "engine setting (a replay runs the recorded engine; "
                                            "give engine.mode=split or greedy to compare modes)"))
                elif k in _config.SCHEMA:
                    problems.append(Problem(f"{where}: {k}", raw, "is not an engine setting (only "
                                            "engine.* settings change what a replay computes)"))
                else:
                    problems.append(_config.check_value(k, raw, where)[1]
                                    or Problem(f"{where}: {k}", raw, "is not a known setting"))
                continue
            v, prob = _config.check_value(k, _config.parse_scalar(raw), where)
            if prob:
                problems.append(prob)
                continue
            out[ENGINE_KEYS[k]] = v
    if problems:
        raise ReplayError(problems)
    return out


def diff_settings(base: EngineSettings, other: EngineSettings) -> dict[str, Any]:
    return {f.name: getattr(other, f.name) for f in fields(EngineSettings)
            if getattr(other, f.name) != getattr(base, f.name)}


def _label(changes: Mapping[str, Any]) -> str:
    return ",".join(f"{_KEY_OF[k]}={v}" for k, v in changes.items()) or RECORDED


# ---- where the journal is and where to start ---------------------------------------------
@dataclass
class Source:
    journal_dir: str
    snapshot_dir: str | None
    cleanup: str | None = None
    state_dir: str | None = None     # a service's state dir (journal/, snapshots/, documents/)


def locate(path: str) -> Source:
    """A state dir, a journal dir or one segment file → where to read."""
    if not os.path.exists(path):
        raise ReplayError(f"{path}: does not exist")
    if os.path.isfile(path):
        base = os.path.basename(path)
        if J.segment_first(base) is None:
            raise ReplayError(Problem(path, base, "is not a journal segment (named like "
                                                  f"{J.segment_name(1)})"))
        tmp = tempfile.mkdtemp(prefix="routerd-replay-")
        os.symlink(os.path.abspath(path), os.path.join(tmp, base))
        return Source(tmp, None, cleanup=tmp, state_dir=_around(os.path.dirname(os.path.abspath(path))))
    jd = J.journal_dir(path)
    if os.path.isdir(jd):
        sd = J.snapshot_dir(path)
        return Source(jd, sd if os.path.isdir(sd) else None, state_dir=path)
    if J._segments(path):
        return Source(path, None, state_dir=_around(os.path.abspath(path)))
    raise ReplayError(f"{path}: holds neither journal/ nor journal segments (from-*.rdj): give the "
                      "service's state dir (service.state_dir) or its journal/ dir")


def _around(journal_dir: str) -> str | None:
    """The state dir a journal dir sits in (``S/journal``), if it is one."""
    parent = os.path.dirname(journal_dir.rstrip(os.sep))
    ok = (os.path.basename(journal_dir.rstrip(os.sep)) == "journal"
          and os.path.isdir(_statedir.documents_dir(parent)))
    return parent if ok else None


def recorded_refs(journal_dir: str, state_dir: str | None) -> _statedir.DocRefs | None:
    """The documents the journal's newest records name; where no record names one (old
    segments retired behind snapshots), the state dir's ``current.yaml`` pointer."""
    rec = _statedir.refs_in(J.iter_records(journal_dir, 0))
    cur = _statedir.current(state_dir) if state_dir is not None else None
    if cur is None:
        return rec
    return _statedir.DocRefs(rec.topology or cur.topology, rec.config or cur.config,
                             rec.topology_id or cur.topology_id, rec.shard_map or cur.shard_map)


def recovery_of(src: Source) -> J.Recovery:
    """The service's own recovery procedure, read-only: the same report its start-up gives
    (``health`` ``recovery``, the banner) for the same directory."""
    if src.state_dir is not None:
        return J.recover_state(src.state_dir, apply=False)
    rep = J.recover(src.journal_dir, apply=False)      # a bare journal: no snapshot covers it
    return J.Recovery(rep, None, os.path.abspath(src.journal_dir))


@dataclass
class Start:
    after: int                       # records numbered above this are replayed
    settings: EngineSettings         # the recorded settings in force at the start
    state: dict[str, Any] | None     # snapshot engine state, None from scratch
    what: str
    problems: list[str] = field(default_factory=list)
    until: int = 0                   # the last record recovery keeps


def find_start(src: Source, fallback: EngineSettings, recovery: J.Recovery | None = None) -> Start:
    """Where the replay starts.  The records are the ones the service's recovery keeps
    (:func:`recovery_of`); it ends where they end.  It starts as early as those records
    allow — record 1, else the oldest intact snapshot from which the journal runs
    undamaged to the recovery's snapshot — so a what-if covers as much history as there
    is, and the recorded run still reaches the service's state exactly."""
    rec = recovery if recovery is not None else recovery_of(src)
    rep = rec.report
    problems = list(rep.snapshots_skipped)
    if rep.base == 0:
        if not rep.records:
            stop = rep.stopped
            # no record is left at all: there is no "first record left" to name
            why = "holds no journal records" if stop is None else (
                "holds no journal record that can be replayed, and no intact snapshot covers "
                f"the records lost ({stop.line(0)})")
            raise ReplayError(Problem(src.journal_dir, None, why
                                      + (f" ({'; '.join(problems)})" if problems else "")))
        if rep.first_record != 1:
            raise ReplayError(Problem(src.journal_dir, rep.first_record,
                                      "is the first journal record left and no intact snapshot covers "
                                      "the records before it" + (f" ({'; '.join(problems)})" if problems else "")))
        first = next(J.iter_records(src.journal_dir, 0, until=rep.last_record), None)
        s = fallback
        if first is not None and first.kind == "start" and "settings" in first.body:
            s = J.settings_from_dict(first.body["settings"])
        return Start(0, s, None, "the first journal record (from scratch)", problems, rep.last_record)
    assert rec.state is not None
    c = rep.contiguous_from
    if c is not None and rep.last_record >= rep.base:
        if c == 1:
            first = next(J.iter_records(src.journal_dir, 0, until=rep.last_record), None)
            s = fallback
            if first is not None and first.kind == "start" and "settings" in first.body:
                s = J.settings_from_dict(first.body["settings"])
            return Start(0, s, None, "the first journal record (from scratch)", problems, rep.last_record)
        # read-only: a SnapshotStore would tidy the directory of a service that may be running
        for no, path in J._snapshot_files(src.snapshot_dir or ""):
            if not c - 1 <= no < rep.base:
                continue
            try:
                state, got = J.SnapshotStore.read(path)
            except (OSError, ValueError):
                continue            # recovery did not need it; an older start is only a bonus
            return Start(got, J.settings_from_dict(state["settings"]), state["engine"],
                         f"snapshot {os.path.basename(path)} (records up to {got})", problems,
                         rep.last_record)
    state = rec.state
    return Start(rep.base, J.settings_from_dict(state["settings"]), state["engine"],
                 f"snapshot {rep.snapshot_file} (records up to {rep.base})", problems, rep.last_record)


def last_settings(src: Source, start: Start) -> EngineSettings:
    """The recorded settings in force after the journal's last record."""
    s = start.settings
    for r in J.iter_records(src.journal_dir, start.after, until=start.until):
        if r.kind in ("start", "config") and "settings" in r.body:
            s = J.settings_from_dict(r.body["settings"])
    return s


# ---- running -----------------------------------------------------------------------------
@dataclass
class Run:
    """One variant's engine and what it did at each tick."""

    variant: Variant
    engine: Engine
    route_changes: list[int] = field(default_factory=list)
    exploration: list[float] = field(default_factory=list)
    differing: list[int] = field(default_factory=list)
    pair_seconds: np.ndarray = field(init=False)   # (n, n) seconds routed differently
    ever: np.ndarray = field(init=False)           # (n, n) routed differently at some tick
    first_t: np.ndarray = field(init=False)        # (n, n) the first such tick's time
    prev_diff: np.ndarray | None = None
    last_decision: Decision | None = None

    def __post_init__(self) -> None:
        n = self.engine.n
        self.pair_seconds = np.zeros((n, n))
        self.ever = np.zeros((n, n), dtype=bool)
        self.first_t = np.full((n, n), np.nan)

    def on_tick(self, _r: J.Record, d: Decision) -> None:
        self.last_decision = d


def make_engine(topo: _topology.Topology, start: Start, v: Variant) -> Engine:
    s = v.settings(start.settings)
    if start.state is None:
        return Engine(topo, s)
    eng = Engine.from_state(topo, start.settings, start.state)
    if s != start.settings:
        eng.reconfigure(s)
    return eng


class LinkTrace:
    """Per link and time bin: the least, the mean and the count of journaled hop latencies."""

    def __init__(self, topo: _topology.Topology, interval_s: float):
        self.topo = topo
        self.iv = float(interval_s)
        self.bins: dict[int, tuple[np.ndarray, np.ndarray, np.ndarray]] = {}
        self._link = np.full((topo.n, topo.n), -1, dtype=np.int64)
        self._link[topo.src, topo.dst] = np.arange(topo.n_links)

    def add(self, t_rel: float, src: np.ndarray, via: np.ndarray, lat: np.ndarray) -> None:
        if not len(src):
            return
        b = math.floor(t_rel / self.iv)
        e = self.bins.get(b)
        if e is None:
            L = self.topo.n_links
            e = self.bins[b] = (np.full(L, np.inf), np.zeros(L), np.zeros(L, dtype=np.int64))
        k = self._link[src, via]
        ok = k >= 0
        k, lt = k[ok], lat[ok]
        np.minimum.at(e[0], k, lt)
        np.add.at(e[1], k, lt)
        np.add.at(e[2], k, 1)

    def write(self, path: str) -> int:
        t = self.topo
        rows = 0
        os.makedirs(os.path.dirname(os.path.abspath(path)), exist_ok=True)
        with open(path, "w", newline="", encoding="utf-8") as fh:
            w = csv.writer(fh)
            w.writerow(["t_s", "from", "to", "delay_s", "mean_s", "samples"])
            for b in sorted(self.bins):
                mn, sm, ct = self.bins[b]
                for k in np.flatnonzero(ct).tolist():
                    w.writerow([repr(b * self.iv), t.nodes[t.src[k]], t.nodes[t.dst[k]],
                                repr(float(mn[k])), repr(float(sm[k] / ct[k])), int(ct[k])])
                    rows += 1
        return rows


def replay(src: Source, topo: _topology.Topology, variants: Sequence[Variant], *,
           fallback: EngineSettings | None = None, link_trace: LinkTrace | None = None,
           recovery: J.Recovery | None = None) -> dict[str, Any]:
    """Replay the journal once for the recorded run and every variant (in lockstep)."""
    recovery = recovery if recovery is not None else recovery_of(src)
    # no recorded settings at all: what a record without any field means (greedy mode)
    start = find_start(src, fallback or J.settings_from_dict({}), recovery)
    base = Run(Variant(RECORDED), make_engine(topo, start, Variant(RECORDED)))
    others = [Run(v, make_engine(topo, start, v)) for v in variants]
    rejected0 = sum(base.engine.statistics().rejected.values())
    tick_t: list[float] = []
    t_first: list[float] = []
    t_last = [math.nan]
    read = J.ReadReport()
    marks = LinkMarks()
    counts = {"batches": 0, "hops": 0, "links": 0, "ticks": 0, "configs": 0, "starts": 0}

    def on_record(rec: J.Record) -> None:
        raw_t = rec.body.get("t")
        t = math.nan if raw_t is None else float(raw_t)
        if raw_t is not None:
            if not t_first:
                t_first.append(t)
            t_last[0] = t
        for o in others:
            J.replay_into(o.engine, [o.variant.record(rec)], on_tick=o.on_tick)
        marks.add(rec)
        if rec.kind == "batch" and link_trace is not None and raw_t is not None:
            h = J.batch_hops(rec.body)
            link_trace.add(t - t_first[0], h.src, h.via, h.latency)
        if rec.kind != "tick":
            return
        tick_t.append(t)
        if not others:   # nothing to compare: only the recorded run's own figures
            d = base.last_decision
            base.route_changes.append(d.route_changes if d is not None else 0)
            base.exploration.append(base.engine.exploration_share())
            base.differing.append(0)
            return
        g0 = base.engine.next_hops()
        for run_ in [base, *others]:
            eng = run_.engine
            d = run_.last_decision
            run_.route_changes.append(d.route_changes if d is not None else 0)
            run_.exploration.append(eng.exploration_share())
            diff = eng.next_hops() != g0
            run_.differing.append(int(diff.sum()))
            if run_.prev_diff is not None and len(tick_t) > 1:
                run_.pair_seconds += run_.prev_diff * (tick_t[-1] - tick_t[-2])
            new = diff & ~run_.ever
            run_.first_t[new] = t
            run_.ever |= diff
            run_.prev_diff = diff

    t0 = time.perf_counter()
    rep = J.replay_into(base.engine, J.iter_records(src.journal_dir, start.after, read,
                                                    until=start.until),
                        on_tick=base.on_tick, on_record=on_record)
    wall = time.perf_counter() - t0
    end_t = t_last[0]
    for run_ in [base, *others]:
        if run_.prev_diff is not None and tick_t and math.isfinite(end_t):
            run_.pair_seconds += run_.prev_diff * max(0.0, end_t - tick_t[-1])
    counts.update(batches=rep.batches, hops=rep.hops, links=rep.links, ticks=rep.ticks,
                  configs=rep.configs, starts=rep.starts)
    refused = sum(base.engine.statistics().rejected.values()) - rejected0
    return {"start": start, "base": base, "others": others, "report": rep, "read": read,
            "recovery": recovery.report,
            "counts": counts, "wall_s": wall, "tick_t": tick_t,
            "t0": t_first[0] if t_first else math.nan, "t_end": end_t, "refused": refused,
            "link_events": marks.events}


# ---- the command ---------------------------------------------------------------------------
def _load_config_and_topology(args: argparse.Namespace, src: Source, *, recorded_config: bool = False
                              ) -> tuple[_config.Config | None, _topology.Topology, _statedir.Chosen]:
    """The topology to replay with: ``--topology`` or ``--config``'s, else the one the
    state dir recorded (:func:`statedir.choose`); the config only when ``--config`` was
    given (a what-if), and the whole choice (with ``recorded_config``, the recorded config
    is read too: a sharded dir's ``shard.map``; replay itself takes the engine settings
    from the records)."""
    from routerd.io.inputs import (  # the one input rule (routerd.io.inputs)
        load_config,
        load_topology,
    )

    ns = argparse.Namespace(config=args.config, topology=args.topology)
    where = src.state_dir or src.journal_dir
    refs = recorded_refs(src.journal_dir, src.state_dir)
    if refs is not None and not recorded_config:
        refs = replace(refs, config=None)
    ch = _statedir.choose(ns, where, refs,
                          state_root=where, written_for=lambda: J.written_for(src.journal_dir),
                          load_config_fn=load_config, load_topology_fn=load_topology)
    if not (args.config or recorded_config):
        # replay takes its settings from the records: a config line would only mislead
        ch.said = [x for x in ch.said if not x.startswith("config")]
    return (ch.cfg if args.config else None), ch.topo, ch


def _check_topology(src: Source, topo: _topology.Topology) -> None:
    for r in J.iter_records(src.journal_dir, 0):
        if r.kind == "start":
            want = r.body.get("topology")
            if want not in (None, topo.digest):
                nodes = r.body.get("nodes") or []
                shown = ", ".join(map(str, nodes[:8])) + (" ..." if len(nodes) > 8 else "")
                raise ReplayError(Problem(src.journal_dir, want,
                                          f"is the topology id the journal was written for "
                                          f"(nodes {shown}); {topo.name!r} from "
                                          f"{topo.source or 'the built-in demo lab'} has id "
                                          f"{topo.digest}: give the service's --topology or --config"
                                          + (" (or neither: the state dir keeps the topology it "
                                             "was written for)" if src.state_dir else "")))
            return


def replay_command(args: argparse.Namespace) -> dict[str, Any]:
    if not (args.link_trace_interval > 0 and math.isfinite(args.link_trace_interval)):
        raise ReplayError(Problem("--link-trace-interval", args.link_trace_interval, "must be above 0"))
    src = locate(args.source)
    try:
        cfg, topo, chosen = _load_config_and_topology(args, src)
        _check_topology(src, topo)
        recovery = recovery_of(src)
        start = find_start(src, J.settings_from_dict({}), recovery)
        start_settings = start.settings
        primary_changes: dict[str, Any] = {}
        if cfg is not None:
            # against the settings the service ended with: its config file as it is now
            last = last_settings(src, start)
            # as the service would run it on this network (engine.split.max_nodes)
            primary_changes.update(diff_settings(last, EngineSettings.from_config(
                _config.split_fits(cfg, topo.n)[0])))
        primary_changes.update(parse_changes(args.overrides, "--set"))
        variants: list[Variant] = []
        primary: Variant | None = None
        if primary_changes:
            primary = Variant(_label(primary_changes), primary_changes)
            variants.append(primary)
        for spec in args.compare:
            ch = parse_changes([spec], f"--compare {spec}")
            if not ch:
                raise ReplayError(Problem("--compare", spec, "changes nothing"))
            variants.append(Variant(_label(ch), ch))
        labels = [v.label for v in variants]
        dup = sorted({x for x in labels if labels.count(x) > 1})
        if dup:
            raise ReplayError(Problem("--compare", dup[0], "is given twice"))
        for v in variants:
            v.settings(start_settings)     # refuse bad combinations before the long part
        lt = LinkTrace(topo, args.link_trace_interval) if args.export_link_trace else None
        res = replay(src, topo, variants, fallback=start_settings, link_trace=lt, recovery=recovery)
        res["inputs"] = chosen.said
    except (J.JournalError, ValueError) as e:
        # a later start record for another topology, a snapshot or settings that do not fit
        raise ReplayError(f"{args.source}: cannot be replayed: {e}") from None
    finally:
        if src.cleanup:
            shutil.rmtree(src.cleanup, ignore_errors=True)
    return write_outputs(args, topo, res, primary, lt)


def replay_sharded_command(args: argparse.Namespace) -> dict[str, Any]:
    """``routerd replay STATE --out DIR`` on a sharded state dir: every shard replayed from
    its own snapshot and journal (the service's restore path, :func:`shards.replay_shards`),
    the tables merged into ``DIR/tables.json`` — the tables the front served.  What-if
    variants work per shard (``routerd replay STATE/shard-K-of-N``; its tables are valid
    for its destinations)."""
    n = _shards.sharded_state(args.source)
    assert n is not None
    if args.overrides or args.compare or args.export_link_trace:
        raise InputError(Problem(args.source, f"{n} shards", "--set, --compare and "
                                 "--export-link-trace work on one shard's dir "
                                 f"({args.source}/shard-K-of-{n})"))
    missing = [k for k in range(n) if not os.path.isdir(_shards.shard_dir(args.source, k, n))]
    if missing:
        raise InputError(Problem(args.source, f"shard-{missing[0]}-of-{n}", "is missing: a "
                                 "merged replay needs every shard's state dir"))
    # every shard keeps its own copy of the documents; shard 0's say what the front ran with
    # (a worker's recorded config is the front's config with the worker's endpoints)
    src0 = locate(_shards.shard_dir(args.source, 0, n))
    cfg, topo, chosen = _load_config_and_topology(args, src0, recorded_config=True)
    for k in range(n):
        _check_topology(locate(_shards.shard_dir(args.source, k, n)), topo)
    t0 = time.perf_counter()
    try:
        tables = _shards.replay_shards(args.source, topo, n, map_file=chosen.cfg["shard.map"])
    except Exception as e:   # noqa: BLE001 - a journal or snapshot of another topology, unreadable
        raise InputError(Problem(args.source, "journal", f"cannot be replayed: {e}")) from None
    os.makedirs(args.out, exist_ok=True)
    path = _dump(os.path.join(args.out, "tables.json"), {"v": wire.VERSION, "tables": tables})
    dt = time.perf_counter() - t0
    line = f"replayed {n} shards of {args.source} in {dt:.2f} s; merged tables of {topo.n} nodes -> {path}"
    return {"printed": [*chosen.said, line], "tables": path}


def _tables(eng: Engine) -> dict[str, Any]:
    return {"v": wire.VERSION, "tables": wire.tables_by_name(eng)}


def _dump(path: str, obj: Any) -> str:
    with open(path, "w", encoding="utf-8") as fh:
        json.dump(obj, fh, indent=1, sort_keys=True, allow_nan=False)
        fh.write("\n")
    return path


def _safe(label: str) -> str:
    return "".join(c if c.isalnum() or c in "._=-" else "_" for c in label)[:120]


def summarise(run_: Run, topo: _topology.Topology, total_s: float) -> dict[str, Any]:
    ps = run_.pair_seconds
    ever = int(run_.ever.sum())
    routed = int(topo.n * (topo.n - 1))
    top = np.argsort(-ps, axis=None)[:10]
    return {
        "variant": run_.variant.label,
        "settings": J.settings_to_dict(run_.engine.settings),
        "route_changes": int(sum(run_.route_changes)),
        "exploration_share_mean": float(np.mean(run_.exploration)) if run_.exploration else 0.0,
        "exploration_share_final": run_.engine.exploration_share(),
        "pairs_differing_ever": ever,
        "pairs_differing_final": run_.differing[-1] if run_.differing else 0,
        "pairs_total": routed,
        "pair_seconds_differing": float(ps.sum()),
        "share_of_pair_time_differing": float(ps.sum() / (routed * total_s)) if total_s > 0 else 0.0,
        "longest_pair_differing_s": float(ps.max()) if ps.size else 0.0,
        "top_pairs": [{"node": topo.nodes[i // topo.n], "destination": topo.nodes[i % topo.n],
                       "seconds": float(ps.flat[i])} for i in top.tolist() if ps.flat[i] > 0],
    }


def write_outputs(args: argparse.Namespace, topo: _topology.Topology, res: dict[str, Any],
                  primary: Variant | None, lt: LinkTrace | None) -> dict[str, Any]:
    out = args.out
    os.makedirs(out, exist_ok=True)
    earlier = _earlier_outputs(out)
    base: Run = res["base"]
    others: list[Run] = res["others"]
    runs = [base, *others]
    written: list[str] = []
    prim = next((r for r in others if primary is not None and r.variant is primary), base)
    written.append(_dump(os.path.join(out, "tables.json"), _tables(prim.engine)))
    if others:
        written.append(_dump(os.path.join(out, f"tables-{RECORDED}.json"), _tables(base.engine)))
        for r in others:
            if r is not prim:
                written.append(_dump(os.path.join(out, f"tables-{_safe(r.variant.label)}.json"),
                                     _tables(r.engine)))
    tick_t = res["tick_t"]
    t0 = res["t0"]
    total = (res["t_end"] - tick_t[0]) if tick_t else 0.0
    summaries = [summarise(r, topo, total) for r in runs]
    start: Start = res["start"]
    read: J.ReadReport = res["read"]
    recovery: J.RecoveryReport = res["recovery"]
    stopped = recovery.stopped or read.stopped    # the recovery's stop is where reading ended
    counts = res["counts"]
    obs_s = counts["hops"] / res["wall_s"] if res["wall_s"] > 0 else math.inf
    info: dict[str, Any] = {
        "source": os.path.abspath(args.source), "topology": topo.name, "topology_id": topo.digest,
        "inputs": list(res.get("inputs", ())),
        "started_from": start.what, "snapshot_problems": start.problems,
        "records": res["report"].records, "last_record": res["report"].last_record,
        **counts, "rows_refused_on_replay": res["refused"],
        "journal_stopped": None if stopped is None else {
            "segment": stopped.segment, "offset": stopped.offset, "detail": stopped.detail},
        "recovery": recovery.as_dict(),
        "span_s": total, "wall_s": res["wall_s"],
        "observations_per_s": obs_s if math.isfinite(obs_s) else None,
        "tables": "tables.json" + (f" ({prim.variant.label})" if prim is not base else " (recorded)"),
        "variants": summaries,
    }
    written.append(_dump(os.path.join(out, "replay.json"), info))
    if others:
        path = os.path.join(out, "comparison.csv")
        with open(path, "w", newline="", encoding="utf-8") as fh:
            w = csv.writer(fh)
            w.writerow(["variant", "route_changes", "exploration_share_mean", "pairs_differing_ever",
                        "pair_seconds_differing", "longest_pair_differing_s", "pairs_differing_final"])
            for s in summaries:
                w.writerow([s["variant"], s["route_changes"], f"{s['exploration_share_mean']:.6g}",
                            s["pairs_differing_ever"], f"{s['pair_seconds_differing']:.6g}",
                            f"{s['longest_pair_differing_s']:.6g}", s["pairs_differing_final"]])
        written.append(path)
    path = os.path.join(out, "ticks.csv")
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(["t_s", "variant", "route_changes", "exploration_share", "pairs_differing"])
        for r in runs:
            for i, t in enumerate(tick_t):
                w.writerow([f"{t - t0:.6f}", r.variant.label, r.route_changes[i],
                            f"{r.exploration[i]:.6g}", r.differing[i]])
    written.append(path)
    if others:
        path = os.path.join(out, "pairs.csv")
        with open(path, "w", newline="", encoding="utf-8") as fh:
            w = csv.writer(fh)
            w.writerow(["variant", "node", "destination", "seconds_differing", "first_differing_t_s"])
            for r in others:
                ps, ft = r.pair_seconds, r.first_t
                for i in np.flatnonzero(r.ever).tolist():
                    x, d = divmod(i, topo.n)
                    w.writerow([r.variant.label, topo.nodes[x], topo.nodes[d],
                                f"{ps.flat[i]:.6g}", f"{ft.flat[i] - t0:.6f}"])
        written.append(path)
    if lt is not None:
        lt.write(args.export_link_trace)
        written.append(args.export_link_trace)
    notes: list[str] = []
    if not args.no_plot and tick_t:
        try:
            written.append(plot(runs, tick_t, t0, os.path.join(out, "replay.png"), topo,
                                res.get("link_events", ()), res["t_end"]))
        except ImportError as e:
            notes.append(f"no PNG: matplotlib is not installed ({e}); pip install 'routerd[plot]'")
    stale = sorted(earlier - {os.path.abspath(w) for w in written})
    for path in stale:
        try:
            os.unlink(path)
        except OSError as e:
            notes.append(f"an earlier replay's {os.path.basename(path)} is left in {out}: "
                         f"{e.strerror or e}")
    if stale:
        notes.append(f"removed the earlier replay's {', '.join(os.path.basename(p) for p in stale)} "
                     f"from {out} (this run does not write them)")
    printed = _printed(info, summaries, bool(others), args.quiet, written, notes, stopped,
                       recovery.lines()[1:])
    return {"info": info, "written": written, "printed": printed}


def _earlier_outputs(out: str) -> set[str]:
    """The files an earlier replay wrote into ``out`` that a run may not write again (the
    comparison files, the PNG, the variants' tables), found by its ``replay.json``: left
    behind, a ``comparison.csv`` or ``replay.png`` of other variants sat beside this run's
    ``replay.json``.  Nothing without an earlier ``replay.json``: only replay's own files go."""
    try:
        with open(os.path.join(out, "replay.json"), encoding="utf-8") as fh:
            doc = json.load(fh)
        labels = [v["variant"] for v in doc["variants"] if isinstance(v, dict)]
    except (OSError, ValueError, KeyError, TypeError):
        return set()
    names = ["comparison.csv", "pairs.csv", "replay.png", f"tables-{RECORDED}.json"]
    names += [f"tables-{_safe(str(lb))}.json" for lb in labels if lb != RECORDED]
    return {os.path.abspath(os.path.join(out, n)) for n in names
            if os.path.isfile(os.path.join(out, n))}


def _printed(info: Mapping[str, Any], summaries: Sequence[Mapping[str, Any]], compare: bool,
             quiet: bool, written: Sequence[str], notes: Sequence[str],
             stopped: J.Finding | J.Cut | None, recovery_lines: Sequence[str]) -> list[str]:
    out: list[str] = []
    if not quiet:
        out.extend(f"{line}" for line in info.get("inputs", ()))
        out.append(f"replayed {info['records']} records from {info['started_from']}: "
                   f"{info['batches']} batches, {info['hops']} observations, {info['ticks']} "
                   f"decisions, {info['configs']} reloads over {info['span_s']:.3f} s of service "
                   f"time in {info['wall_s']:.3f} s"
                   + (f" ({info['observations_per_s']:.0f} observations/s)"
                      if info["observations_per_s"] else ""))
    # the recovery's lines, word for word as the service's banner and health give them
    out.extend(f"recovery {ln}" for ln in recovery_lines)
    if stopped is not None:
        c = stopped
        out.append(f"warning: the journal ends early in {c.segment} at byte {c.offset}: {c.detail}; "
                   "later records were not replayed")
    if info["rows_refused_on_replay"]:
        out.append(f"warning: {info['rows_refused_on_replay']} journaled observations were refused "
                   "on replay: the topology is not the one the service ran")
    hdr = ("variant", "route changes", "exploration", "pairs differing", "pair-seconds", "longest (s)")
    rows = [hdr]
    for s in summaries:
        base = s["variant"] == RECORDED
        rows.append((s["variant"], str(s["route_changes"]), f"{s['exploration_share_mean']:.4f}",
                     "-" if base else f"{s['pairs_differing_ever']} of {s['pairs_total']}",
                     "-" if base else f"{s['pair_seconds_differing']:.3f}",
                     "-" if base else f"{s['longest_pair_differing_s']:.3f}"))
    if compare or not quiet:
        wd = [max(len(r[i]) for r in rows) for i in range(len(hdr))]
        for i, r in enumerate(rows):
            out.append("  ".join(c.ljust(wd[j]) if j == 0 else c.rjust(wd[j]) for j, c in enumerate(r)))
            if i == 0:
                out.append("  ".join("-" * w for w in wd))
    out.extend(notes)
    if not quiet:
        out.extend(f"wrote {p}" for p in written)
    return out


class LinkMarks:
    """The link changes a journal records (control overrides and the link rows of
    batches), for the plot: ``events`` holds ``(t, a, b, up)`` whenever a directed link's
    state differs from the last one recorded for it (every link starts up)."""

    def __init__(self) -> None:
        self.state: dict[tuple[int, int], bool] = {}
        self.events: list[tuple[float, int, int, bool]] = []

    def _one(self, t: float, a: int, b: int, up: bool) -> None:
        if self.state.get((a, b), True) != up:
            self.events.append((t, a, b, up))
        self.state[(a, b)] = up

    def add(self, rec: J.Record) -> None:
        b = rec.body
        if rec.kind == "link":
            self._one(float(b["t"]), int(b["from"]), int(b["to"]), bool(b["up"]))
        elif rec.kind == "batch":
            for a, z, up in b.get("links", ()):
                self._one(float(b["t"]), int(a), int(z), bool(up))


#: the variants' line styles in replay.png (the recorded run: wide, grey, underneath)
VARIANT_STYLES = (("#1f5fa8", "-"), ("#d9730d", (0, (5, 2))), ("#2f8f4e", (0, (3, 1, 1, 1))),
                  ("#8a3fa0", (0, (1, 1))))


def plot(runs: Sequence[Run], tick_t: Sequence[float], t0: float, path: str,
         topo: _topology.Topology, link_events: Sequence[tuple[float, int, int, bool]] = (),
         t_end: float = math.nan) -> str:
    """Draw ``replay.png`` (see :func:`figure`)."""
    from routerd.sim import plotstyle as ps

    fig = figure(runs, tick_t, t0, topo, link_events, t_end)
    fig.savefig(path)
    ps.pyplot().close(fig)
    return path


def figure(runs: Sequence[Run], tick_t: Sequence[float], t0: float,
           topo: _topology.Topology, link_events: Sequence[tuple[float, int, int, bool]] = (),
           t_end: float = math.nan) -> Any:
    """Route changes, exploration share (%) and pairs routed differently over service
    time, link failures shaded, the legend beside the axes (routerd.sim.plotstyle's look)."""
    from routerd.sim import plotstyle as ps

    plt = ps.pyplot()
    t = np.asarray(tick_t) - t0
    end = (t_end - t0) if math.isfinite(t_end) else (float(t[-1]) if t.size else 1.0)
    fig, axes = ps.time_figure(plt, 3, 8.0)
    tops = [1.0, 0.1, 1.0]
    for i, r in enumerate(runs):
        rec = r.variant.label == RECORDED
        # the recorded run: wide, grey, underneath, so a variant that matches it shows
        if rec:
            st: dict[str, Any] = {"lw": 4.0, "color": "#9a9a9a", "zorder": 1}
        else:
            colour, ls = VARIANT_STYLES[(i - 1) % len(VARIANT_STYLES)]
            st = {"lw": 1.5, "color": colour, "ls": ls, "zorder": 2}
        rc = np.cumsum(r.route_changes)
        ex = np.asarray(r.exploration, dtype=float) * 100
        axes[0].step(t, rc, where="post", label=r.variant.label, **st)
        axes[1].plot(t, ex, **st)
        tops[0] = max(tops[0], float(rc[-1]) if rc.size else 0.0)
        tops[1] = max(tops[1], float(ex.max()) if ex.size else 0.0)
        if not rec:
            axes[2].step(t, r.differing, where="post", **st)
            tops[2] = max(tops[2], float(max(r.differing, default=0)))
    for ax, top in zip(axes, tops):
        ps.zero_visible(ax, top * 1.15)
        ax.grid(alpha=0.3)
    axes[0].set_ylabel("route changes\n(cumulative)")
    axes[1].set_ylabel("exploration share\n(%, mean over pairs)")
    axes[2].set_ylabel("pairs routed differently\nfrom the recorded run")
    axes[2].set_xlabel("service time since the first replayed record (s)")
    axes[2].set_xlim(0, max(end, 1e-9))
    if len(runs) == 1:
        axes[2].text(0.5, 0.5, "no variant: pass --set or --compare", ha="center", va="center",
                     transform=axes[2].transAxes, color="grey")
    # link changes per undirected link: down while either direction is down
    named: list[tuple[float, str, str]] = []
    down: dict[str, set[tuple[int, int]]] = {}
    for te, a, b, up in link_events:
        x, y = sorted((topo.nodes[a], topo.nodes[b]))
        name = f"{x}-{y}"
        d = down.setdefault(name, set())
        was = bool(d)
        if up:
            d.discard((a, b))
        else:
            d.add((a, b))
        if bool(d) != was:
            named.append((te - t0, "down" if d else "up", name))
    spans, other = ps.link_spans(named, end)
    ps.mark_link_spans(axes, spans, label_ax=axes[0])
    ps.mark_other_events(axes, other, label_ax=axes[0])
    ps.legend_outside(axes[0])
    axes[0].set_title(f"replay on {topo.name}: {len(tick_t)} decisions, "
                      f"{topo.n * (topo.n - 1)} (node, destination) pairs", fontsize=10)
    return fig


def iter_journal(path: str) -> Iterator[J.Record]:
    """Every record of a state dir, journal dir or segment file (for tools and tests)."""
    src = locate(path)
    try:
        yield from J.iter_records(src.journal_dir, 0)
    finally:
        if src.cleanup:
            shutil.rmtree(src.cleanup, ignore_errors=True)
