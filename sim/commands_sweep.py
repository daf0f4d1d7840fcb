"""``routerd sweep``: simulate rates × policies × seeds and draw delivery time against load.

Owns: the command's options, the run grid, running it on a process pool, the
aggregation over seeds, its outputs and the progress bar:

* ``DIR/sweep.csv`` — one row per run (rate, policy, seed and every summary figure);
* ``DIR/sweep.json`` — the same rows under ``runs``, the per-(policy, rate) points under
  ``points`` and the sweep's inputs under ``sweep``;
* ``DIR/sweep.png`` — mean delivery time against offered load, one line per policy with
  its 95% confidence band, and the share of packets lost (dropped or TTL expired).

Each run is :func:`sim.run.run` on a plain dict spec, a pure function of its spec, so
the grid maps onto worker processes as it is and the table does not depend on
``--jobs``.  The confidence band comes from independent replications (one run per seed;
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
from concurrent.futures import FIRST_COMPLETED, Future, ProcessPoolExecutor, wait
from typing import IO, Any

from routerd.errors import InputError, Problem

from . import policies as _policies
from .commands_simulate import _clean, add_config_options, add_packet_options, add_topology_option
from .run import SimSpec, load_inputs
from .run import run as run_sim

#: Student's t 0.975 quantiles for 1..30 degrees of freedom (standard t tables, e.g.
#: Abramowitz & Stegun, Handbook of Mathematical Functions, table 26.10); beyond: 1.96.
T975 = (12.706, 4.303, 3.182, 2.776, 2.571, 2.447, 2.365, 2.306, 2.262, 2.228,
        2.201, 2.179, 2.160, 2.145, 2.131, 2.120, 2.110, 2.101, 2.093, 2.086,
        2.080, 2.074, 2.069, 2.064, 2.060, 2.056, 2.052, 2.048, 2.045, 2.042)

#: the table's leading columns; every other summary key follows in sorted order
LEAD = ("policy", "rate_pps", "seed", "offered", "delivered", "dropped", "ttl_expired",
        "delivery_ratio", "mean_delivery_s", "mean_delivery_ci95_s", "p50_delivery_s",
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
                   help="worker processes (default: one per CPU, at most one per run; 1 = no pool)")
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


def run_one(spec: Mapping[str, Any]) -> dict[str, Any]:
    """One run's summary, or ``{"error": ...}`` with the spec's keys if it failed."""
    try:
        return dict(run_sim(dict(spec))["summary"])
    except Exception as e:  # noqa: BLE001 -- one failed run must not lose the others
        return {"policy": spec["policy"], "rate_pps": float(spec["rate_pps"]),
                "seed": int(spec["seed"]), "error": f"{type(e).__name__}: {e}"}


def run_grid(specs: Sequence[Mapping[str, Any]], jobs: int | None = None,
             on_done: Callable[[int, int], None] | None = None) -> list[dict[str, Any]]:
    """Run every spec; rows in the order of ``specs``.  ``on_done(done, total)`` after each."""
    total = len(specs)
    jobs = min(jobs or os.cpu_count() or 1, max(total, 1))
    rows: list[dict[str, Any] | None] = [None] * total
    order = sorted(range(total), key=lambda i: -_cost(specs[i]))
    done = 0
    if jobs <= 1:
        for i in order:
            rows[i] = run_one(specs[i])
            done += 1
            if on_done:
                on_done(done, total)
        return [r for r in rows if r is not None]
    with ProcessPoolExecutor(max_workers=jobs) as pool:
        pending: dict[Future[dict[str, Any]], int] = {
            pool.submit(run_one, dict(specs[i])): i for i in order}
        try:
            while pending:
                fin, _ = wait(pending, return_when=FIRST_COMPLETED)
                for f in fin:
                    rows[pending.pop(f)] = f.result()
                    done += 1
                    if on_done:
                        on_done(done, total)
        except BaseException:
            for f in pending:
                f.cancel()
            raise
    return [r for r in rows if r is not None]


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
        self.tty = bool(getattr(self.stream, "isatty", lambda: False)())
        self.t0 = time.perf_counter()
        self.shown = False
        self._last = 0.0
        self._drawn = -1
        self._tenth = -1

    def __call__(self, done: int, total: int | None = None) -> None:
        self.update(done)

    def update(self, done: int) -> None:
        if not self.enabled or done == self._drawn:
            return
        now = time.perf_counter()
        el = now - self.t0
        if el < self.after_s:
            return
        frac = done / self.total if self.total else 1.0
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
            bar = "#" * int(frac * 30)
            self.stream.write(f"\r[{bar:<30}] {text}   ")
        else:
            self.stream.write(f"{int(frac * 100)}%  {text}\n")
        self.stream.flush()

    def close(self) -> None:
        if self.shown:
            self.update(self.total)
            if self.tty:
                self.stream.write("\n")
            self.stream.flush()


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


def plot(points: Sequence[Mapping[str, Any]], meta: Mapping[str, Any], out: str,
         log_y: bool = False) -> str:
    """Draw ``DIR/sweep.png``: delivery time against load with bands, and the lost share."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, (ax, ax2) = plt.subplots(2, 1, figsize=(7.5, 7.0), sharex=True,
                                  gridspec_kw={"height_ratios": [3, 1.2]})
    pols = list(dict.fromkeys(p["policy"] for p in points))
    for i, pol in enumerate(pols):
        pts = [p for p in points if p["policy"] == pol and _finite(p["mean_delivery_s"])]
        colour = COLOURS.get(pol, f"C{4 + i}")
        allp = [p for p in points if p["policy"] == pol]
        if pts:
            x = [p["rate_pps"] for p in pts]
            y = [p["mean_delivery_s"] * 1e3 for p in pts]
            h = [p["ci95_s"] * 1e3 if _finite(p["ci95_s"]) else 0.0 for p in pts]
            ax.plot(x, y, "-o", color=colour, label=pol, markersize=4)
            lo = [max(a - b, 1e-9) if log_y else a - b for a, b in zip(y, h)]
            ax.fill_between(x, lo, [a + b for a, b in zip(y, h)], color=colour, alpha=0.2, linewidth=0)
        mod = [p for p in allp if _finite(p.get("model_delay_s"))]
        if mod:
            ax.plot([p["rate_pps"] for p in mod], [p["model_delay_s"] * 1e3 for p in mod], "--",
                    color=colour, linewidth=1, label=f"{pol} (M/M/1 model)")
        ax2.plot([p["rate_pps"] for p in allp], [100 * p["lost_fraction"] for p in allp], "-o",
                 color=colour, markersize=3)
    if log_y:
        ax.set_yscale("log")
    ax.set_ylabel("mean delivery time (ms)")
    band = "95% CI over seeds" if meta.get("seeds", 1) > 1 else "95% CI (batch means)"
    ax.set_title(f"{meta.get('topology_name', 'topology')}: {meta.get('seeds')} seed(s) × "
                 f"{meta.get('duration_s'):g} s per point, band: {band}", fontsize=10)
    ax.grid(True, alpha=0.3)
    ax.legend(fontsize=8)
    ax2.set_xlabel("offered load (packets/s)")
    ax2.set_ylabel("lost (%)")
    ax2.set_ylim(bottom=0)   # a loss share is never negative (matplotlib centres an all-zero line on 0)
    ax2.grid(True, alpha=0.3)
    fig.tight_layout()
    path = os.path.join(out, "sweep.png")
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path


def text_table(points: Sequence[Mapping[str, Any]]) -> str:
    """Mean delivery time (ms) ± half-width per rate and policy, and the share lost."""
    pols = list(dict.fromkeys(p["policy"] for p in points))
    rates = sorted({p["rate_pps"] for p in points})
    by = {(p["policy"], p["rate_pps"]): p for p in points}
    cells: dict[tuple[str, float], str] = {}
    for (pol, r), p in by.items():
        if not _finite(p["mean_delivery_s"]):
            cells[(pol, r)] = "n/a"
            continue
        ci = f"±{p['ci95_s'] * 1e3:.2f}" if _finite(p["ci95_s"]) else ""
        lost = p["lost_fraction"]
        tail = f" ({lost * 100:.1f}% lost)" if _finite(lost) and lost >= 0.0005 else ""
        cells[(pol, r)] = f"{p['mean_delivery_s'] * 1e3:.2f}{ci} ms{tail}"
    w = max([len(c) for c in cells.values()] + [len(p) for p in pols] + [8]) + 3
    lines = ["rate pkt/s".ljust(12) + "".join(p.rjust(w) for p in pols)]
    for r in rates:
        lines.append(f"{r:<12g}" + "".join(cells.get((pol, r), "n/a").rjust(w) for pol in pols))
    return "\n".join(lines)


# ---- the command --------------------------------------------------------------------------

def run(args: argparse.Namespace) -> int:
    try:
        specs = build_specs(args)
        check_specs(specs)
        _, topo, _ = load_inputs(SimSpec.of(specs[0]))
    except InputError as e:
        print(f"routerd sweep: {len(e.problems)} problem(s)", file=sys.stderr)
        for p in e.problems:
            print(f"  {p}", file=sys.stderr)
        return 2
    n_runs = len(specs)
    jobs = min(args.jobs or os.cpu_count() or 1, n_runs)
    bar = ProgressBar(n_runs, enabled=not args.quiet)
    t0 = time.perf_counter()
    rows = run_grid(specs, jobs, bar)
    bar.close()
    wall = time.perf_counter() - t0
    points = aggregate(rows)
    meta = {
        "topology": args.topology, "topology_name": topo.name, "policies": args.policies,
        "rates_pps": sorted({float(s["rate_pps"]) for s in specs}), "seeds": args.seeds,
        "first_seed": args.first_seed, "duration_s": args.duration, "warmup_s": args.warmup,
        "packet_bytes": args.packet_bytes, "size_dist": args.size_dist, "demands": args.demands,
        "scenario": args.scenario, "config": args.config, "overrides": list(args.overrides),
        "jobs": jobs, "runs": n_runs, "wall_s": wall,
    }
    written = write_table(rows, points, meta, args.out)
    failed = [r for r in rows if "error" in r]
    if not args.no_plot:
        try:
            written.append(plot(points, meta, args.out, log_y=args.log_y))
        except ImportError as e:
            print(f"routerd sweep: the plot needs matplotlib ({e}); the table is written",
                  file=sys.stderr)
    print(f"{n_runs} runs ({len(specs) // max(args.seeds, 1)} points x {args.seeds} seeds) on "
          f"{topo.name} in {wall:.1f} s with {jobs} worker(s)")
    print(text_table(points))
    for p in written:
        print(f"wrote {p}")
    for r in failed:
        print(f"routerd sweep: run {r['policy']} at {r['rate_pps']:g}/s seed {r['seed']} "
              f"failed: {r['error']}", file=sys.stderr)
    return 1 if failed else 0
