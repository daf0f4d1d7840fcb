"""``routerd replay``: the replay shell — journal records through the engine, offline.

Owns: the command's options and outputs (``tables.json``, ``replay.json``, the what-if
comparison's CSV/JSON/PNG and printed table, ``--export-link-trace``), choosing where a
replay starts (the journal's first record, or the oldest snapshot it continues from),
and setting variants (recorded settings with overrides).  Records are applied with
:func:`routerd.journal.replay_into` only — the function the service's start-up
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

Start.  A journal still holding record 1 is replayed from scratch.  One whose early
segments were retired behind snapshots starts from the oldest intact snapshot it
continues from, so every variant starts from the same learned state.
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

from . import config as _config
from . import journal as J
from . import topology as _topology
from . import splitting as _splitting
from . import variants as _variants
from . import wire
from .engine import Decision, Engine, EngineSettings
from .errors import InputError, Problem

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
    "engine.explore.visits_half": "visits_half",
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
    p.add_argument("--topology", metavar="FILE", help="topology file or topohub:GROUP/NAME (default: "
                   "the config's topology.file, else the built-in demo lab)")
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
    from . import shard as _shard

    try:
        if _shard.sharded_state(args.source):   # a sharded service's state dir: merge
            res = _shard.replay_command(args)
        else:
            res = replay_command(args)
    except InputError as e:
        print(f"routerd replay: {len(e.problems)} problem(s)", file=sys.stderr)
        for pr in e.problems:
            print(f"  {pr}", file=sys.stderr)
        return 2
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
                if k in _config.SCHEMA:
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


def locate(path: str) -> Source:
    """A state dir, a journal dir or one segment file → where to read."""
    if not os.path.exists(path):
        raise ReplayError(f"{path}: does not exist")
    if os.path.isfile(path):
        base = os.path.basename(path)
        if not J._SEG_RE.match(base):
            raise ReplayError(Problem(path, base, "is not a journal segment (seg-<20 digits>.rj)"))
        tmp = tempfile.mkdtemp(prefix="routerd-replay-")
        os.symlink(os.path.abspath(path), os.path.join(tmp, base))
        return Source(tmp, None, cleanup=tmp)
    jd = J.journal_dir(path)
    if os.path.isdir(jd):
        sd = J.snapshot_dir(path)
        return Source(jd, sd if os.path.isdir(sd) else None)
    if J._segments(path):
        return Source(path, None)
    raise ReplayError(f"{path}: holds neither journal/ nor journal segments (seg-*.rj): give the "
                      "service's state dir (service.state_dir) or its journal/ dir")


@dataclass
class Start:
    after: int                       # records numbered above this are replayed
    settings: EngineSettings         # the recorded settings in force at the start
    state: dict[str, Any] | None     # snapshot engine state, None from scratch
    what: str
    problems: list[str] = field(default_factory=list)


def find_start(src: Source, fallback: EngineSettings) -> Start:
    first = next(J.iter_records(src.journal_dir, 0), None)
    if first is None:
        raise ReplayError(Problem(src.journal_dir, "", "holds no journal records"))
    if first.no == 1:
        s = fallback
        if first.kind == "start" and "settings" in first.body:
            s = J.settings_from_dict(first.body["settings"])
        return Start(0, s, None, "the first journal record (from scratch)")
    problems: list[str] = []
    if src.snapshot_dir is not None:
        # read-only: a SnapshotStore would tidy the directory of a service that may be running
        snaps = sorted((int(m.group(1)), os.path.join(src.snapshot_dir, nm))
                       for nm in os.listdir(src.snapshot_dir) if (m := J._SNAP_RE.match(nm)))
        for no, path in snaps:
            if no < first.no - 1:
                continue
            try:
                state, rec = J.SnapshotStore.read(path)
            except (OSError, ValueError) as e:
                problems.append(f"snapshot skipped: {e}")
                continue
            return Start(rec, J.settings_from_dict(state["settings"]), state["engine"],
                         f"snapshot {os.path.basename(path)} (records up to {rec})", problems)
    raise ReplayError(Problem(src.journal_dir, first.no,
                              "is the first journal record left and no intact snapshot covers "
                              "the records before it" + (f" ({'; '.join(problems)})" if problems else "")))


def last_settings(src: Source, start: Start) -> EngineSettings:
    """The recorded settings in force after the journal's last record."""
    s = start.settings
    for r in J.iter_records(src.journal_dir, start.after):
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
           fallback: EngineSettings | None = None, link_trace: LinkTrace | None = None
           ) -> dict[str, Any]:
    """Replay the journal once for the recorded run and every variant (in lockstep)."""
    start = find_start(src, fallback or EngineSettings())
    base = Run(Variant(RECORDED), make_engine(topo, start, Variant(RECORDED)))
    others = [Run(v, make_engine(topo, start, v)) for v in variants]
    rejected0 = sum(base.engine.statistics().rejected.values())
    tick_t: list[float] = []
    t_first: list[float] = []
    t_last = [math.nan]
    read = J.ReadReport()
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
    rep = J.replay_into(base.engine, J.iter_records(src.journal_dir, start.after, read),
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
            "counts": counts, "wall_s": wall, "tick_t": tick_t,
            "t0": t_first[0] if t_first else math.nan, "t_end": end_t, "refused": refused}


# ---- the command ---------------------------------------------------------------------------
def _load_config_and_topology(args: argparse.Namespace) -> tuple[_config.Config | None, _topology.Topology]:
    from .service import load_config, load_topology  # the service's own rules for both

    ns = argparse.Namespace(config=args.config, topology=args.topology)
    cfg = load_config(ns)
    return (cfg if args.config else None), load_topology(cfg)


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
                                          f"{topo.digest}: give the service's --topology or --config"))
            return


def replay_command(args: argparse.Namespace) -> dict[str, Any]:
    if not (args.link_trace_interval > 0 and math.isfinite(args.link_trace_interval)):
        raise ReplayError(Problem("--link-trace-interval", args.link_trace_interval, "must be above 0"))
    src = locate(args.source)
    try:
        cfg, topo = _load_config_and_topology(args)
        _check_topology(src, topo)
        start = find_start(src, EngineSettings())
        start_settings = start.settings
        primary_changes: dict[str, Any] = {}
        if cfg is not None:
            # against the settings the service ended with: its config file as it is now
            last = last_settings(src, start)
            primary_changes.update(diff_settings(last, EngineSettings.from_config(cfg)))
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
        res = replay(src, topo, variants, fallback=start_settings, link_trace=lt)
    except (J.JournalError, ValueError) as e:
        # a later start record for another topology, a snapshot or settings that do not fit
        raise ReplayError(f"{args.source}: cannot be replayed: {e}") from None
    finally:
        if src.cleanup:
            shutil.rmtree(src.cleanup, ignore_errors=True)
    return write_outputs(args, topo, res, primary, lt)


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
    counts = res["counts"]
    obs_s = counts["hops"] / res["wall_s"] if res["wall_s"] > 0 else math.inf
    info: dict[str, Any] = {
        "source": os.path.abspath(args.source), "topology": topo.name, "topology_id": topo.digest,
        "started_from": start.what, "snapshot_problems": start.problems,
        "records": res["report"].records, "last_record": res["report"].last_record,
        **counts, "rows_refused_on_replay": res["refused"],
        "journal_stopped": None if read.stopped is None else {
            "segment": read.stopped.segment, "offset": read.stopped.offset,
            "detail": read.stopped.detail},
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
            written.append(plot(runs, tick_t, t0, os.path.join(out, "replay.png"), topo))
        except ImportError as e:
            notes.append(f"no PNG: matplotlib is not installed ({e}); pip install 'routerd[plot]'")
    printed = _printed(info, summaries, bool(others), args.quiet, written, notes, read)
    return {"info": info, "written": written, "printed": printed}


def _printed(info: Mapping[str, Any], summaries: Sequence[Mapping[str, Any]], compare: bool,
             quiet: bool, written: Sequence[str], notes: Sequence[str], read: J.ReadReport) -> list[str]:
    out: list[str] = []
    if not quiet:
        out.append(f"replayed {info['records']} records from {info['started_from']}: "
                   f"{info['batches']} batches, {info['hops']} observations, {info['ticks']} "
                   f"decisions, {info['configs']} reloads over {info['span_s']:.3f} s of service "
                   f"time in {info['wall_s']:.3f} s"
                   + (f" ({info['observations_per_s']:.0f} observations/s)"
                      if info["observations_per_s"] else ""))
    for pr in info["snapshot_problems"]:
        out.append(f"warning: {pr}")
    if read.stopped is not None:
        c = read.stopped
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


def plot(runs: Sequence[Run], tick_t: Sequence[float], t0: float, path: str,
         topo: _topology.Topology) -> str:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    t = np.asarray(tick_t) - t0
    fig, axes = plt.subplots(3, 1, figsize=(9, 8), dpi=100, sharex=True)
    for i, r in enumerate(runs):
        rec = r.variant.label == RECORDED
        # the recorded run: thick, black, underneath, so a variant that matches it shows
        st = {"lw": 3.0, "color": "black", "alpha": 0.45, "zorder": 1} if rec else \
            {"lw": 1.4, "color": f"C{i - 1}", "zorder": 2}
        axes[0].step(t, np.cumsum(r.route_changes), where="post", label=r.variant.label, **st)
        axes[1].plot(t, r.exploration, label=r.variant.label, **st)
        if not rec:
            axes[2].step(t, r.differing, where="post", label=r.variant.label, **st)
    axes[0].set_ylabel("route changes\n(cumulative)")
    axes[1].set_ylabel("exploration share\n(mean over pairs)")
    axes[2].set_ylabel("pairs routed\ndifferently")
    axes[2].set_xlabel("service time since the first replayed record (s)")
    if len(runs) == 1:
        axes[2].text(0.5, 0.5, "no variant: pass --set or --compare", ha="center", va="center",
                     transform=axes[2].transAxes, color="grey")
    for ax in axes:
        ax.grid(alpha=0.3)
        ax.set_ylim(bottom=0)
    axes[0].legend(fontsize=8, loc="upper left")
    axes[0].set_title(f"replay on {topo.name}: {len(tick_t)} decisions, "
                      f"{topo.n * (topo.n - 1)} (node, destination) pairs")
    fig.tight_layout()
    fig.savefig(path)
    plt.close(fig)
    return path


def iter_journal(path: str) -> Iterator[J.Record]:
    """Every record of a state dir, journal dir or segment file (for tools and tests)."""
    src = locate(path)
    try:
        yield from J.iter_records(src.journal_dir, 0)
    finally:
        if src.cleanup:
            shutil.rmtree(src.cleanup, ignore_errors=True)
