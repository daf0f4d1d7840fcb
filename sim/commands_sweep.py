"""``routerd sweep``: simulate rates × policies × seeds and draw delivery time against load.

Owns: the command's options, the run grid and its specs, running it on an executor
(:mod:`routerd.sim.executors`: a local process pool or Dask), the aggregation over seeds,
its outputs and the progress bar:

* ``DIR/sweep.csv`` — one row per run (rate, policy, seed and every summary figure);
* ``DIR/sweep.json`` — the same rows under ``runs``, the per-(policy, rate) points under
  ``points`` and the sweep's inputs under ``sweep``;
* ``DIR/sweep.png`` — mean delivery time against offered load, one line per policy with
  its 95% confidence band (cut at zero, with a note, where it would reach below), points
  that lost packets ringed, and below it the share of packets lost (dropped or TTL
  expired): a mean over delivered packets falls as losses rise, so the two go together,
  as in the printed table (mean ± half-width, then the lost share, per policy).

Each run is :func:`routerd.sim.run.run` on a plain dict spec, a pure function of its spec, so
the grid maps onto worker processes as it is and the table does not depend on
``--jobs`` or ``--executor``.  A spec carries its inputs inline (:func:`inline_specs`: the
topology, scenario and config as documents, no file paths), so it runs on a host that has
none of the caller's files; a row comes back as plain values (:func:`plain`).  Progress
comes from within runs (each reports its simulated time), a failed run is a row with its
``error``, and Ctrl-C keeps the finished rows: the table, JSON and plot are written from
them, marked ``"partial": true``, and the command exits 130.  The confidence band comes from independent replications (one run per seed;
Law & Kelton, Simulation Modeling and Analysis, ch. 9): mean ± t(0.975, seeds − 1) ·
s/√seeds; a single seed falls back to the run's own batch-means interval.

Must not import at module level: matplotlib (only the plot needs it).
"""
from __future__ import annotations

import argparse
import csv
import json
import math
import os
import sys
import time
from collections.abc import Callable, Iterable, Mapping, Sequence
from concurrent.futures import FIRST_COMPLETED, Future, wait
from typing import IO, Any

import numpy as np

from routerd import __version__
from routerd.core import topology as _topology
from routerd.core.errors import InputError, Problem
from routerd.io.files import output_dir, read_yaml
from routerd.io.progress import StatusLine

from . import executors as _executors
from . import policies as _policies
from .commands_simulate import (
    _clean,
    add_config_options,
    add_packet_options,
    add_topology_option,
    announce_long_run,
)
from .run import SimSpec, load_inputs
from .run import run as run_sim

#: Student's t 0.975 quantiles for 1..30 degrees of freedom (standard t tables, e.g.
#: Abramowitz & Stegun, Handbook of Mathematical Functions, table 26.10); beyond: 1.96.
T975 = (12.706, 4.303, 3.182, 2.776, 2.571, 2.447, 2.365, 2.306, 2.262, 2.228,
        2.201, 2.179, 2.160, 2.145, 2.131, 2.120, 2.110, 2.101, 2.093, 2.086,
        2.080, 2.074, 2.069, 2.064, 2.060, 2.056, 2.052, 2.048, 2.045, 2.042)

#: the table's leading columns; every other summary key follows in sorted order
LEAD = ("policy", "rate_pps", "seed", "offered", "delivered", "dropped", "ttl_expired",
        "delivery_ratio", "mean_delivery_s", "mean_delivery_ci95_s", "lost_fraction",
        "p50_delivery_s",
        "p95_delivery_s", "p99_delivery_s", "mean_hops", "throughput_pps", "link_util_max",
        "events", "wall_s")

DEFAULT_POLICIES = "shortest,reroute,qrouting,mindelay"


def t975(df: int) -> float:
    return T975[df - 1] if 1 <= df <= len(T975) else 1.96


# ---- options ------------------------------------------------------------------------

def configure(p: argparse.ArgumentParser) -> None:
    add_topology_option(p)
    p.add_argument("--policies", metavar="LIST", default=DEFAULT_POLICIES,
                   help=f"comma-separated policies, from {', '.join(_policies.NAMES)} "
                        f"(default {DEFAULT_POLICIES})")
    g = p.add_mutually_exclusive_group(required=True)
    g.add_argument("--rates", metavar="LIST", help="comma-separated offered rates, packets/s, "
                                                   "e.g. 200,400,800")
    g.add_argument("--rate-range", metavar="FIRST:LAST:COUNT",
                   help="COUNT evenly spaced rates from FIRST to LAST packets/s, e.g. 200:2000:10")
    p.add_argument("--seeds", metavar="N", type=int, default=3,
                   help="runs per (policy, rate), seeds FIRST..FIRST+N-1 (default 3)")
    p.add_argument("--first-seed", metavar="N", type=int, default=1, help="first seed (default 1)")
    p.add_argument("--duration", metavar="S", type=float, default=20.0,
                   help="virtual seconds per run (default 20)")
    p.add_argument("--warmup", metavar="S", type=float, default=None,
                   help="statistics cover packets injected after this (default: a tenth of --duration)")
    add_packet_options(p)
    p.add_argument("--demands", action="store_true",
                   help="pick pairs in proportion to the topology's demand matrix (default uniform)")
    p.add_argument("--scenario", metavar="FILE", default=None,
                   help="scenario YAML applied to every run (load factors, link events)")
    p.add_argument("--jobs", metavar="N", type=int, default=None,
                   help="worker processes: the local pool's (default: one per CPU, at most one "
                        "per run; 1 = no pool) or the Dask LocalCluster's (default 2)")
    p.add_argument("--executor", choices=_executors.EXECUTORS, default=None,
                   help="where runs execute: local (a process pool) or dask (a Dask cluster; "
                        "needs routerd[cluster]) (default: the config's sim.executor, local)")
    p.add_argument("--scheduler", metavar="ADDRESS", default=None,
                   help="with --executor dask: the scheduler to send runs to, e.g. "
                        "tcp://HOST:8786 (default: the config's sim.scheduler, else a "
                        "LocalCluster of --jobs worker processes on this host)")
    p.add_argument("--out", metavar="DIR", required=True, help="output directory (created)")
    add_config_options(p, "override one config setting for every run (repeatable)")
    p.add_argument("--log-y", action="store_true", help="logarithmic delivery-time axis")
    p.add_argument("--no-plot", action="store_true", help="write the table only (no matplotlib)")
    p.add_argument("--quiet", action="store_true", help="no progress bar on stderr")


def parse_rates(rates: str | None, rate_range: str | None) -> list[float]:
    """The offered rates, ascending and distinct; InputError naming the flag otherwise."""
    out: list[float] = []
    if rates is not None:
        for i, item in enumerate(rates.split(",")):
            item = item.strip()
            try:
                v = float(item)
            except ValueError:
                raise InputError(Problem(f"--rates[{i}]", item, "is not a number (packets/s)")) from None
            if not (math.isfinite(v) and v > 0):
                raise InputError(Problem(f"--rates[{i}]", item, "must be a finite rate > 0 (packets/s)"))
            out.append(v)
    elif rate_range is not None:
        parts = rate_range.split(":")
        if len(parts) != 3:
            raise InputError(Problem("--rate-range", rate_range, "must look like FIRST:LAST:COUNT"))
        try:
            a, b, c = float(parts[0]), float(parts[1]), int(parts[2])
        except ValueError:
            raise InputError(Problem("--rate-range", rate_range,
                                     "needs numbers FIRST and LAST and a whole COUNT")) from None
        if not (math.isfinite(a) and math.isfinite(b) and 0 < a <= b):
            raise InputError(Problem("--rate-range", rate_range, "needs 0 < FIRST <= LAST"))
        if c < 1 or (c == 1 and a != b):
            raise InputError(Problem("--rate-range", rate_range,
                                     "COUNT must be >= 2 (or 1 with FIRST = LAST)"))
        out = [a] if c == 1 else [a + (b - a) * i / (c - 1) for i in range(c)]
    if not out:
        raise InputError(Problem("--rates", "", "give at least one rate"))
    return sorted(set(out))


def parse_policies(text: str) -> list[str]:
    names = [s.strip() for s in text.split(",") if s.strip()]
    if not names:
        raise InputError(Problem("--policies", text, "names no policy"))
    bad = [s for s in names if s not in _policies.NAMES]
    if bad:
        raise InputError(Problem("--policies", ",".join(bad),
                                 f"is not a policy ({', '.join(_policies.NAMES)})"))
    seen: list[str] = []
    for s in names:
        if s not in seen:
            seen.append(s)
    return seen


def build_specs(args: argparse.Namespace) -> list[dict[str, Any]]:
    """The run grid as plain spec dicts (policy-major, then rate, then seed)."""
    problems: list[Problem] = []
    try:
        rates = parse_rates(args.rates, args.rate_range)
    except InputError as e:
        problems += e.problems  # type: ignore[arg-type]
        rates = []
    try:
        pols = parse_policies(args.policies)
    except InputError as e:
        problems += e.problems  # type: ignore[arg-type]
        pols = []
    if args.seeds < 1:
        problems.append(Problem("--seeds", args.seeds, "must be >= 1"))
    if args.first_seed < 0:
        problems.append(Problem("--first-seed", args.first_seed, "must be >= 0"))
    if args.jobs is not None and args.jobs < 1:
        problems.append(Problem("--jobs", args.jobs, "must be >= 1"))
    if problems:
        raise InputError(problems)
    base = {
        "duration_s": args.duration, "topology": args.topology, "packet_bytes": args.packet_bytes,
        "size_dist": args.size_dist, "warmup_s": args.warmup, "scenario": args.scenario,
        "demands": args.demands, "config": args.config, "overrides": tuple(args.overrides),
        "capacity_bps": args.capacity_bps, "buffer_pkts": args.buffer_pkts,
        "series": False, "progress": False,
    }
    return [{**base, "policy": p, "rate_pps": r, "seed": args.first_seed + i}
            for p in pols for r in rates for i in range(args.seeds)]


def inline_specs(specs: Sequence[Mapping[str, Any]]) -> list[dict[str, Any]]:
    """The grid with every input carried as a document instead of a path, so a run needs
    nothing from the caller's folder (or host): the topology as its mapping (explicit
    capacities and buffers, so the link defaults are applied already), the scenario as its
    parsed document, the config as its nested dict with the overrides applied (and
    ``topology.file`` cleared: the topology travels itself), and the routerd version the
    worker must have.  Same inputs for every spec (one sweep), loaded once."""
    if not specs:
        return []
    sp = SimSpec.of(specs[0])
    cfg, topo, _ = load_inputs(sp)
    topo_doc = _topology.to_mapping(topo)
    scen = sp.scenario
    scen_doc = read_yaml(str(scen)) if scen is not None and not isinstance(scen, Mapping) else scen
    cfg_doc = cfg.with_overrides({"topology.file": None}).nested()
    common = {"topology": topo_doc, "scenario": scen_doc, "config": cfg_doc, "overrides": (),
              "capacity_bps": None, "buffer_pkts": None, "routerd_version": __version__}
    return [{**dict(s), **common} for s in specs]


def check_specs(specs: Sequence[Mapping[str, Any]]) -> None:
    """Load the inputs once per policy in this process, so a bad file or flag is reported
    before any worker starts (InputError listing every problem)."""
    done: set[str] = set()
    for sp in specs:
        if sp["policy"] in done:
            continue
        load_inputs(SimSpec.of(sp))
        done.add(sp["policy"])


# ---- running ----------------------------------------------------------------------------

def _cost(spec: Mapping[str, Any]) -> float:
    """Rough relative cost of a run, to start the longest first (LPT scheduling)."""
    weight = 6.0 if spec["policy"] == "qrouting" else 1.0
    return float(spec["rate_pps"]) * float(spec["duration_s"]) * weight


def plain(v: Any) -> Any:
    """A result value as plain Python (numpy scalars and arrays to numbers and lists), so
    a row pickles the same from any worker and reads the same anywhere."""
    if isinstance(v, Mapping):
        return {str(k): plain(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [plain(x) for x in v]
    if isinstance(v, np.ndarray):
        return plain(v.tolist())
    if isinstance(v, np.generic):
        return v.item()
    return v


#: least wall time between two progress reports of one run
REPORT_EVERY_S = 0.5


def run_one(spec: Mapping[str, Any], index: int = -1, sink: Any = None) -> dict[str, Any]:
    """One run's summary as plain values, or ``{"error": ...}`` with the spec's keys if it
    failed.  With ``index`` >= 0, reports ``(index, simulated fraction)`` on ``sink`` (or
    on the local pool worker's queue) at most every :data:`REPORT_EVERY_S`."""
    spec = dict(spec)
    want = spec.pop("routerd_version", None)
    if sink is None and index >= 0:
        sink = _executors.worker_sink()
    try:
        if want is not None and want != __version__:
            raise RuntimeError(f"this worker has routerd {__version__}, the sweep was started "
                               f"with {want}: install the same version on every worker")
        progress = None
        if sink is not None:
            dur = float(spec.get("duration_s") or 1.0)
            last = [-math.inf]

            def progress(t: float, events: int) -> None:
                now = time.monotonic()
                if now - last[0] < REPORT_EVERY_S:
                    return
                last[0] = now
                try:
                    sink.put((index, min(t / dur, 1.0)))
                except Exception:  # noqa: BLE001, S110 -- progress is never worth failing a run for
                    pass

        row = plain(run_sim(spec, progress=progress)["summary"])
        # beside the mean: it covers delivered packets only
        row["lost_fraction"] = ((row["dropped"] + row["ttl_expired"]) / row["offered"]
                                if row["offered"] else math.nan)
        return row
    except Exception as e:  # noqa: BLE001 -- one failed run must not lose the others
        return error_row(spec, e)


def error_row(spec: Mapping[str, Any], e: BaseException) -> dict[str, Any]:
    return {"policy": str(spec["policy"]), "rate_pps": float(spec["rate_pps"]),
            "seed": int(spec["seed"]), "error": f"{type(e).__name__}: {e}"}


class Interrupted(KeyboardInterrupt):
    """Ctrl-C during :func:`run_grid`: ``rows`` holds the runs that finished (in spec
    order), ``total`` the number of runs asked for."""

    def __init__(self, rows: list[dict[str, Any]], total: int):
        super().__init__(f"{len(rows)} of {total} runs finished")
        self.rows = rows
        self.total = total


def run_grid(specs: Sequence[Mapping[str, Any]], jobs: int | None = None,
             on_done: Callable[..., None] | None = None, *,
             pool: _executors.Pool | None = None) -> list[dict[str, Any]]:
    """Run every spec; rows in the order of ``specs``.

    ``pool``: where to run (default: a local pool of ``jobs`` processes; ``jobs`` 1 runs
    here, without a pool).  ``on_done(done, total, partial)`` after each finished run and
    as progress arrives, ``partial`` being the summed simulated fraction of the runs still
    going.  Ctrl-C raises :class:`Interrupted` carrying the finished rows, after
    cancelling the runs not started (and stopping the workers of a pool made here; a
    caller's ``pool`` is the caller's to close, with ``interrupted=True``).  A run whose
    future fails (a worker lost) is a row with its error.
    """
    total = len(specs)
    rows: list[dict[str, Any] | None] = [None] * total
    order = sorted(range(total), key=lambda i: -_cost(specs[i]))
    running: dict[int, float] = {}
    done = 0

    def finished() -> list[dict[str, Any]]:
        return [r for r in rows if r is not None]

    def tell() -> None:
        if on_done:
            on_done(done, total, sum(running.values()))

    own = pool is None
    if own:
        jobs = min(jobs or os.cpu_count() or 1, max(total, 1))
        if jobs <= 1:
            inline = _InlineSink(running)
            try:
                for i in order:
                    inline.current = i
                    rows[i] = run_one(specs[i], i, inline.with_tell(tell))
                    running.pop(i, None)
                    done += 1
                    tell()
            except KeyboardInterrupt:
                raise Interrupted(finished(), total) from None
            return finished()
        pool = _executors.open_pool("local", jobs)
    assert pool is not None
    interrupted = False
    try:
        pending: dict[Future[dict[str, Any]], int] = {
            pool.executor.submit(run_one, dict(specs[i]), i, pool.sink): i for i in order}
        while pending:
            fin, _ = wait(pending, timeout=0.25, return_when=FIRST_COMPLETED)
            for index, frac in pool.drain():
                if rows[index] is None:
                    running[index] = float(frac)
            for f in fin:
                i = pending.pop(f)
                try:
                    rows[i] = f.result()
                except Exception as e:  # noqa: BLE001 -- a lost worker fails one row
                    rows[i] = error_row(specs[i], e)
                running.pop(i, None)
                done += 1
            tell()
    except KeyboardInterrupt:
        interrupted = True
        for f in pending:        # nothing new starts while the caller writes what finished
            f.cancel()
        raise Interrupted(finished(), total) from None
    finally:
        if own:
            pool.close(interrupted)
    return finished()


class _InlineSink:
    """Progress of runs made in this process (``--jobs 1``)."""

    def __init__(self, running: dict[int, float]):
        self.running = running
        self.current = -1
        self._tell: Callable[[], None] = lambda: None

    def with_tell(self, tell: Callable[[], None]) -> _InlineSink:
        self._tell = tell
        return self

    def put(self, item: tuple[int, float]) -> None:
        self.running[item[0]] = item[1]
        self._tell()


class ProgressBar:
    """Progress on a stream, shown only once a job has run ``after_s``.

    On a terminal: one line redrawn in place.  Elsewhere (a log file, a CI console):
    a plain line at each tenth of the work, so logs stay readable.
    """

    def __init__(self, total: int, label: str = "runs", stream: IO[str] | None = None,
                 after_s: float = 2.0, enabled: bool = True):
        self.total = total
        self.label = label
        self.stream = stream if stream is not None else sys.stderr
        self.after_s = after_s
        self.enabled = enabled
        self.line = StatusLine(self.stream)
        self.tty = self.line.tty
        self.t0 = time.perf_counter()
        self.shown = False
        self._last = 0.0
        self._drawn = -1
        self._tenth = -1

    def __call__(self, done: int, total: int | None = None, partial: float = 0.0) -> None:
        self.update(done, partial)

    def update(self, done: int, partial: float = 0.0) -> None:
        """``done`` runs finished, and ``partial`` runs' worth of simulated time in the
        runs still going (their fractions summed): the bar moves within runs."""
        if not self.enabled or (done == self._drawn and done == self.total):
            return
        now = time.perf_counter()
        el = now - self.t0
        if el < self.after_s:
            return
        frac = min((done + partial) / self.total, 1.0) if self.total else 1.0
        if self.tty:
            if now - self._last < 0.2 and done < self.total:
                return
        else:
            tenth = int(frac * 10)
            if tenth == self._tenth:
                return
            self._tenth = tenth
        self._last = now
        self._drawn = done
        self.shown = True
        eta = el * (1 - frac) / frac if frac > 0 else math.nan
        text = f"{done}/{self.total} {self.label}  {_dur(el)} elapsed  eta {_dur(eta)}"
        if self.tty:
            self.line.show(f"[{'#' * int(frac * 30):<30}] {text}", force=True)
        else:
            self.line.show(f"{int(frac * 100)}%  {text}", force=True)

    def close(self, done: int | None = None) -> None:
        """The last line, if any was shown: all done, or ``done`` runs when the sweep was
        cut short (the bar then says so rather than claiming 100%)."""
        if not self.shown:
            return
        if done is None or done >= self.total:
            self.update(self.total)
        else:
            el = time.perf_counter() - self.t0
            self.line.show(f"stopped: {done}/{self.total} {self.label} finished  "
                           f"{_dur(el)} elapsed", force=True)
        self.line.done()


def _dur(s: float) -> str:
    if not math.isfinite(s):
        return "?"
    s = round(s)
    return f"{s // 60}m{s % 60:02d}s" if s >= 60 else f"{s}s"


# ---- aggregation and output -----------------------------------------------------------

def aggregate(rows: Iterable[Mapping[str, Any]]) -> list[dict[str, Any]]:
    """One point per (policy, rate): the mean over seeds and its 95% half-width."""
    groups: dict[tuple[str, float], list[Mapping[str, Any]]] = {}
    for r in rows:
        if "error" in r:
            continue
        groups.setdefault((str(r["policy"]), float(r["rate_pps"])), []).append(r)
    points = []
    for (pol, rate), rs in groups.items():
        means = [float(r["mean_delivery_s"]) for r in rs if _finite(r.get("mean_delivery_s"))]
        k = len(means)
        mu = sum(means) / k if k else math.nan
        if k >= 2:
            sd = math.sqrt(sum((x - mu) ** 2 for x in means) / (k - 1))
            half = t975(k - 1) * sd / math.sqrt(k)
            basis = "seeds"
        elif k == 1:
            one = next(r for r in rs if _finite(r.get("mean_delivery_s")))
            half = float(one.get("mean_delivery_ci95_s", math.nan))
            basis = "batch_means"
        else:
            half, basis = math.nan, "none"
        offered = sum(float(r["offered"]) for r in rs)
        lost = sum(float(r["dropped"]) + float(r["ttl_expired"]) for r in rs)
        model = [float(r["policy_mindelay_model_delay_s"]) for r in rs
                 if _finite(r.get("policy_mindelay_model_delay_s"))]
        pt: dict[str, Any] = {
            "policy": pol, "rate_pps": rate, "runs": len(rs), "runs_with_deliveries": k,
            "mean_delivery_s": mu, "ci95_s": half, "ci_basis": basis,
            "p99_delivery_s": _mean(r.get("p99_delivery_s") for r in rs),
            "mean_hops": _mean(r.get("mean_hops") for r in rs),
            "throughput_pps": _mean(r.get("throughput_pps") for r in rs),
            "link_util_max": _mean(r.get("link_util_max") for r in rs),
            "lost_fraction": lost / offered if offered else math.nan,
            "dropped": sum(int(r["dropped"]) for r in rs),
            "ttl_expired": sum(int(r["ttl_expired"]) for r in rs),
        }
        if model:
            pt["model_delay_s"] = model[0]  # the same routing for every seed
        points.append(pt)
    pol_order = {p: i for i, p in enumerate(dict.fromkeys(str(r["policy"]) for r in rows))}
    points.sort(key=lambda p: (pol_order.get(p["policy"], 0), p["rate_pps"]))
    return points


def _finite(v: Any) -> bool:
    return isinstance(v, (int, float)) and math.isfinite(float(v))


def _mean(vals: Iterable[Any]) -> float:
    xs = [float(v) for v in vals if _finite(v)]
    return sum(xs) / len(xs) if xs else math.nan


def columns(rows: Sequence[Mapping[str, Any]]) -> list[str]:
    keys = set().union(*(r.keys() for r in rows)) if rows else set()
    return [k for k in LEAD if k in keys] + sorted(keys - set(LEAD))


def write_table(rows: Sequence[Mapping[str, Any]], points: Sequence[Mapping[str, Any]],
                meta: Mapping[str, Any], out: str) -> list[str]:
    os.makedirs(out, exist_ok=True)
    cols = columns(rows)
    csv_path = os.path.join(out, "sweep.csv")
    with open(csv_path, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(cols)
        for r in rows:
            w.writerow(["" if _clean(r.get(c)) is None else _fmt(r.get(c)) for c in cols])
    json_path = os.path.join(out, "sweep.json")
    doc = {
        "sweep": {k: _clean(v) for k, v in meta.items()},
        "runs": [{k: _clean(v) for k, v in r.items()} for r in rows],
        "points": [{k: _clean(v) for k, v in p.items()} for p in points],
    }
    with open(json_path, "w", encoding="utf-8") as fh:
        json.dump(doc, fh, indent=2, sort_keys=True)
        fh.write("\n")
    return [csv_path, json_path]


def _fmt(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, float):
        return f"{v:.9g}"
    return str(v)


#: a fixed colour per policy, so the same policy looks the same in every sweep
COLOURS = {"shortest": "#d62728", "reroute": "#8c564b", "ecmp": "#ff7f0e", "qrouting": "#1f77b4", "mindelay": "#2ca02c"}


#: a point losing at least this share of its packets is ringed on the delivery-time line
LOSS_MARK = 0.001


def _band_text(points: Sequence[Mapping[str, Any]], meta: Mapping[str, Any]) -> str:
    """What the band and "±" are, from how the points' intervals were made."""
    bases = {p.get("ci_basis") for p in points}
    if bases <= {"seeds", "none"}:
        return (f"95% confidence interval of the mean over {meta.get('seeds')} seeds "
                f"(Student's t)")
    if bases <= {"batch_means", "none"}:
        return "95% confidence interval of the run's mean (20 batch means)"
    return "95% confidence interval of the mean (over seeds, or batch means for one seed)"


def figure(points: Sequence[Mapping[str, Any]], meta: Mapping[str, Any],
           log_y: bool = False) -> Any:
    """The figure ``sweep.png`` shows: delivery time against load with bands, the lost share."""
    from matplotlib.lines import Line2D

    from . import plotstyle as ps

    plt = ps.pyplot()
    fig, (ax, ax2) = plt.subplots(2, 1, figsize=(9.5, 7.0), dpi=110, sharex=True,
                                  gridspec_kw={"height_ratios": [3, 1.2]})
    fig.subplots_adjust(left=0.10, right=0.72, top=0.90, bottom=0.09, hspace=0.10)
    pols = list(dict.fromkeys(p["policy"] for p in points))
    cut = ringed = False
    ys: list[float] = []
    lost_top = 1.0
    for i, pol in enumerate(pols):
        pts = [p for p in points if p["policy"] == pol and _finite(p["mean_delivery_s"])]
        colour = COLOURS.get(pol, f"C{4 + i}")
        allp = [p for p in points if p["policy"] == pol]
        if pts:
            x = [p["rate_pps"] for p in pts]
            y = [p["mean_delivery_s"] * 1e3 for p in pts]
            h = [p["ci95_s"] * 1e3 if _finite(p["ci95_s"]) else 0.0 for p in pts]
            ax.plot(x, y, "-o", color=colour, label=pol, markersize=4)
            # a delivery time is never negative: the band stops at zero (log: at a tenth of
            # the mean), and the figure says so
            floor = [a / 10 if log_y else 0.0 for a in y]
            lo = [max(a - b, f) for a, b, f in zip(y, h, floor)]
            cut = cut or any(a - b < f for a, b, f in zip(y, h, floor))
            ax.fill_between(x, lo, [a + b for a, b in zip(y, h)], color=colour, alpha=0.2, linewidth=0)
            ys += lo + [a + b for a, b in zip(y, h)]
            lossy = [(p["rate_pps"], p["mean_delivery_s"] * 1e3) for p in pts
                     if _finite(p.get("lost_fraction")) and p["lost_fraction"] >= LOSS_MARK]
            if lossy:
                ringed = True
                ax.plot(*zip(*lossy), ls="none", marker="o", ms=10, mfc="none",
                        mec=ps.DOWN_COLOUR, mew=1.3, zorder=1)
        mod = [p for p in allp if _finite(p.get("model_delay_s"))]
        if mod:
            ax.plot([p["rate_pps"] for p in mod], [p["model_delay_s"] * 1e3 for p in mod], "--",
                    color=colour, linewidth=1, label=f"{pol} (M/M/1 model)")
            ys += [p["model_delay_s"] * 1e3 for p in mod]
        share = [100 * p["lost_fraction"] for p in allp]
        ax2.plot([p["rate_pps"] for p in allp], share, "-o", color=colour, markersize=3)
        if any(_finite(v) for v in share):
            lost_top = max(lost_top, max(v for v in share if _finite(v)))
    if log_y:
        ps.ms_log_axis(ax, *ps.log_limits(ys, floor=0.01))
    else:
        ax.set_ylim(bottom=0)
    ax.set_ylabel("mean delivery time (ms)\n(delivered packets only)")
    band = _band_text(points, meta)
    ax.set_title(f"{meta.get('topology_name', 'topology')}: {meta.get('seeds')} seed(s) × "
                 f"{meta.get('duration_s'):g} s per point\nband: {band}", fontsize=9)
    ax.grid(True, alpha=0.3)
    handles, labels = ax.get_legend_handles_labels()
    if ringed:
        handles.append(Line2D([], [], ls="none", marker="o", ms=10, mfc="none",
                              mec=ps.DOWN_COLOUR))
        labels.append(f"point losing ≥ {LOSS_MARK:.1%}\nof its packets: its mean\n"
                      "covers delivered ones only")
    ps.legend_outside(ax, handles, labels)
    if cut:
        ax.text(0.01, 0.98, "band cut at " + ("a tenth of the mean" if log_y else "0") +
                ": the interval reaches below it\n(few seeds, widely spread)",
                transform=ax.transAxes, fontsize=7, va="top", color="#444444")
    ax2.set_xlabel("offered load (packets/s)")
    ax2.set_ylabel("lost (% of offered)")
    ps.zero_visible(ax2, lost_top * 1.15)
    ax2.grid(True, alpha=0.3)
    return fig


def plot(points: Sequence[Mapping[str, Any]], meta: Mapping[str, Any], out: str,
         log_y: bool = False) -> str:
    """Draw ``DIR/sweep.png`` (see :func:`figure`)."""
    from . import plotstyle as ps

    fig = figure(points, meta, log_y)
    path = os.path.join(out, "sweep.png")
    fig.savefig(path)
    ps.pyplot().close(fig)
    return path


def text_table(points: Sequence[Mapping[str, Any]]) -> str:
    """Per rate and policy: mean delivery time (ms) ± the 95% half-width, then the share
    of offered packets lost, and a footnote saying what ± is."""
    pols = list(dict.fromkeys(p["policy"] for p in points))
    rates = sorted({p["rate_pps"] for p in points})
    by = {(p["policy"], p["rate_pps"]): p for p in points}
    means: dict[tuple[str, float], str] = {}
    losts: dict[tuple[str, float], str] = {}
    for (pol, r), p in by.items():
        lost = p.get("lost_fraction", math.nan)
        losts[(pol, r)] = "n/a" if not _finite(lost) else (
            "0%" if lost == 0 else f"{lost * 100:.2g}%" if lost < 0.001 else f"{lost * 100:.1f}%")
        if not _finite(p["mean_delivery_s"]):
            means[(pol, r)] = "n/a"
            continue
        ci = f"±{p['ci95_s'] * 1e3:.2f}" if _finite(p["ci95_s"]) else ""
        means[(pol, r)] = f"{p['mean_delivery_s'] * 1e3:.2f}{ci} ms"
    wm = max([len(c) for c in means.values()] + [len("mean ± 95%")]) + 3
    wl = max([len(c) for c in losts.values()] + [len("lost")]) + 2
    lines = ["".ljust(12) + "".join(p.rjust(wm + wl) for p in pols),
             "rate pkt/s".ljust(12) + ("mean ± 95%".rjust(wm) + "lost".rjust(wl)) * len(pols)]
    for r in rates:
        lines.append(f"{r:<12g}" + "".join(means.get((pol, r), "n/a").rjust(wm)
                                           + losts.get((pol, r), "n/a").rjust(wl) for pol in pols))
    bases = {p.get("ci_basis") for p in points}
    how = ("over seeds (Student's t)" if bases <= {"seeds", "none"} else
           "from the run's batch means" if bases <= {"batch_means", "none"} else
           "over seeds, or from batch means for one seed")
    lines.append(f"± = half-width of the mean's 95% confidence interval, {how};")
    lines.append("mean delivery time counts delivered packets only; lost = dropped or TTL "
                 "expired, % of offered")
    return "\n".join(lines)


# ---- the command --------------------------------------------------------------------------

def _executor_choice(args: argparse.Namespace, spec0: Mapping[str, Any]) -> tuple[str, str | None]:
    """(executor, scheduler) from the flags, else the config's sim.executor / sim.scheduler;
    InputError for combinations that cannot mean anything."""
    cfg, _, _ = load_inputs(SimSpec.of(spec0))
    kind = args.executor or cfg["sim.executor"]
    sched = args.scheduler if args.scheduler is not None else cfg["sim.scheduler"]
    problems = []
    if args.scheduler is not None and kind != "dask":
        problems.append(Problem("--scheduler", args.scheduler, "needs --executor dask"))
    if kind == "dask" and sched is not None:
        if args.jobs is not None:
            problems.append(Problem("--jobs", args.jobs, "has no effect with a Dask scheduler "
                                    "(its workers run the runs); leave it out"))
        if not str(sched).strip():
            problems.append(Problem("--scheduler", sched, "is empty"))
    if problems:
        raise InputError(problems)
    return kind, (sched if kind == "dask" else None)


def run(args: argparse.Namespace) -> int:
    try:
        specs = build_specs(args)
        check_specs(specs)
        kind, sched = _executor_choice(args, specs[0])
        _, topo, _ = load_inputs(SimSpec.of(specs[0]))
        output_dir(args.out)          # before the runs: a bad --out costs nothing
        specs = inline_specs(specs)
    except InputError as e:
        print(f"routerd sweep: {len(e.problems)} problem(s)", file=sys.stderr)
        for p in e.problems:
            print(f"  {p}", file=sys.stderr)
        return 2
    n_runs = len(specs)
    announce_long_run("sweep", max(float(sp["rate_pps"]) * float(sp["duration_s"]) for sp in specs),
                      "in the largest run (rate x --duration): long runs", "keeps")
    t0 = time.perf_counter()
    pool: _executors.Pool | None = None
    jobs = min(args.jobs or os.cpu_count() or 1, n_runs)
    try:
        if kind == "dask":
            pool = _executors.open_pool("dask", args.jobs, sched)
            jobs = pool.workers
        elif jobs > 1:
            pool = _executors.open_pool("local", jobs)
    except _executors.MissingDask as e:
        print(f"routerd sweep: {e}", file=sys.stderr)
        return 2
    except (OSError, TimeoutError) as e:
        print(f"routerd sweep: --scheduler {sched}: cannot reach the Dask scheduler "
              f"({type(e).__name__}: {e})", file=sys.stderr)
        return 2
    interrupted: Interrupted | None = None
    try:
        bar = ProgressBar(n_runs, enabled=not args.quiet)  # from here: eta without start-up
        try:
            rows = run_grid(specs, jobs, bar, pool=pool)
        except Interrupted as e:
            interrupted = e
            rows = e.rows
        # what finished is written before the workers are stopped (a Dask worker busy
        # with a long run can take seconds to let go)
        return _report(args, specs, rows, topo.name, kind, sched, jobs, t0, bar,
                       interrupted, pool.where if pool is not None else "this process")
    finally:
        if pool is not None:
            if interrupted is not None and pool.kind == "dask":
                print("routerd sweep: closing the Dask client (a run in progress may take a few "
                      "seconds to let go)",
                      file=sys.stderr)
            pool.close(interrupted is not None)


def _report(args: argparse.Namespace, specs: Sequence[Mapping[str, Any]],
            rows: list[dict[str, Any]], topo_name: str, kind: str, sched: str | None,
            jobs: int, t0: float, bar: ProgressBar, interrupted: Interrupted | None,
            where: str) -> int:
    """Write and print the outputs of the rows that finished; the exit status."""
    n_runs = len(specs)
    bar.close(len(rows) if interrupted is not None else None)
    wall = time.perf_counter() - t0
    points = aggregate(rows)
    meta = {
        "topology": args.topology, "topology_name": topo_name, "policies": args.policies,
        "rates_pps": sorted({float(s["rate_pps"]) for s in specs}), "seeds": args.seeds,
        "first_seed": args.first_seed, "duration_s": args.duration, "warmup_s": args.warmup,
        "packet_bytes": args.packet_bytes, "size_dist": args.size_dist, "demands": args.demands,
        "scenario": args.scenario, "config": args.config, "overrides": list(args.overrides),
        "executor": kind, "scheduler": sched,
        "jobs": jobs, "runs": n_runs, "runs_finished": len(rows),
        "partial": interrupted is not None, "wall_s": wall,
    }
    written = write_table(rows, points, meta, args.out)
    failed = [r for r in rows if "error" in r]
    if not args.no_plot and points:
        try:
            written.append(plot(points, meta, args.out, log_y=args.log_y))
        except ImportError as e:
            print(f"routerd sweep: the plot needs matplotlib ({e}); the table is written",
                  file=sys.stderr)
    print(f"{n_runs} runs ({len(specs) // max(args.seeds, 1)} points x {args.seeds} seeds) on "
          f"{topo_name} in {wall:.1f} s on {where}")
    if interrupted is not None:
        print(f"interrupted: {len(rows)} of {n_runs} runs finished; the outputs below hold "
              f"those only (sweep.json: \"partial\": true)")
    print(text_table(points) if points else "no run finished with results: no table")
    for p in written:
        print(f"wrote {p}")
    for r in failed:
        print(f"routerd sweep: run {r['policy']} at {r['rate_pps']:g}/s seed {r['seed']} "
              f"failed: {r['error']}", file=sys.stderr)
    if interrupted is not None:
        print(f"routerd sweep: interrupted; kept {len(rows)} finished run(s) of {n_runs}",
              file=sys.stderr)
        return 130
    return 1 if failed else 0
