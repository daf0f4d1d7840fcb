"""``routerd demo``: the whole job in one command, with nothing configured, in under a minute.

Owns: the demo's flow, its live progress line, its side-by-side table, its two plots and
its reading of the result.  The lab and the scenario are packaged data of our own
invention (``routerd/data/demo-lab.yaml``, ``routerd/data/demo-scenario.yaml``); the
service, the closed loop and the simulator are the real ones (``routerd serve`` as a
child process, :mod:`routerd.sim.closedloop`, :func:`routerd.sim.run.run`).
Must not import at module level: matplotlib, zmq.

Flow.  (1) Start ``routerd serve`` on loopback TCP (ports picked by the system) with the
demo lab and a state directory under ``--out``; (2) drive it with the closed-loop
simulator, paced at real time, through the demo scenario (light load, a ramp that
saturates the thin trunk under static routes, one link that fails and recovers),
showing one live line per simulated second; (3) scrape the service's metrics page and
stop it (it writes its final snapshot); (4) run ``shortest`` and ``qrouting`` in process
on the same scenario and seed; (5) write the table, the plots and a reading computed
from the figures.  Ctrl-C (or SIGTERM) stops the run where it is: the service is stopped
and the partial live results are written.

Figures.  Delivery times count delivered packets only, so every table row and plot that
gives one has the lost share beside it.  ``delivery.png``: mean and p99 delivery time per
second (log axes in ms) and the share of packets lost per second, seconds that lost more
than 1% circled on the mean; ``load.png``: offered and delivered packets/s and the
trunk's utilisation over the same time axis (same limits, same place in the figure).
Each policy keeps one colour, line style and marker in both.
"""
from __future__ import annotations

import argparse
import csv
import json
import math
import os
import signal
import sys
import time
from collections.abc import Mapping, Sequence
from importlib import resources
from typing import Any

from routerd.core.errors import InputError
from routerd.io.cautions import CAUTIONS

#: the demo's base rate: the scenario's load factors multiply it (1000-byte packets)
BASE_RATE_PPS = 1300.0
#: the scenario file's times are written for this many seconds; --duration stretches them
SCENARIO_SPAN_S = 30.0
DEFAULT_DURATION_S = 30.0
#: the live optimality gap on a 30 s demo: a run every 2 s on 5 s of measured demand; the
#: demo knows its packets' size (BASE_RATE_PPS's 1000 bytes), so the model is not left to
#: infer it from the latencies
OPTIMUM_OVERRIDES = {"engine.optimum.interval_s": 2.0, "engine.optimum.window_s": 5.0,
                     "engine.optimum.packet_bytes": 1000.0}
#: the trunk of the demo lab: the congested bottleneck the plots and the reading follow
TRUNK = ("w3", "e3")
#: the detour's links out of each hall (cross-hall traffic that avoids the trunk)
DETOUR_ENTRIES = (("w6", "r1"), ("w5", "r3"), ("e6", "r2"), ("e5", "r4"))
POLICIES = ("shortest", "qrouting", "service", "reroute")
LABELS = {"shortest": "shortest (static)", "reroute": "reroute (recomputed on failure)",
          "qrouting": "qrouting (in process)", "service": "service (live, ZeroMQ)"}
#: how each policy is drawn in both figures: the live service's line lies close to the
#: in-process learner's, so the two differ in colour, line style, width and marker (a
#: hollow marker on a dashed line over a wide solid one: both stay visible)
STYLES: dict[str, dict[str, Any]] = {
    "shortest": {"color": "#5f5f5f", "ls": "-", "marker": "o", "ms": 3.5, "lw": 1.6},
    "qrouting": {"color": "#1f5fa8", "ls": "-", "marker": "s", "ms": 4.0, "lw": 2.8,
                 "alpha": 0.75},
    "service": {"color": "#d9730d", "ls": (0, (4, 2)), "marker": "^", "ms": 5.5, "mfc": "none",
                "mew": 1.2, "lw": 1.3},
    # reroute equals shortest until a link event: drawn last, hollow and dotted, so the
    # static line under it still shows through
    "reroute": {"color": "#7a4a2a", "ls": (0, (1, 1.5)), "marker": "D", "ms": 5.5, "mfc": "none",
                "mew": 1.1, "lw": 1.5},
}
COLOURS = {p: st["color"] for p, st in STYLES.items()}

#: every file a completed demo writes (relative to --out); the tests hold it to this list
FILES = (
    "summary.json", "comparison.csv", "reading.txt", "delivery.png", "load.png",
    "metrics.prom", "scenario.yaml",
    "runs/shortest/summary.json", "runs/shortest/series.csv", "runs/shortest/links.csv",
    "runs/reroute/summary.json", "runs/reroute/series.csv", "runs/reroute/links.csv",
    "runs/qrouting/summary.json", "runs/qrouting/series.csv", "runs/qrouting/links.csv",
    "runs/service/summary.json", "runs/service/series.csv", "runs/service/links.csv",
    "service/topology.yaml", "service/service.yaml", "service/service.log",
)
#: what an interrupted demo still writes
PARTIAL_FILES = ("summary.json", "runs/service/summary.json", "runs/service/series.csv",
                 "delivery.png")


class _Stop(Exception):
    """SIGTERM during the demo: stop like Ctrl-C."""


# ---- command line ---------------------------------------------------------------------
def configure(p: argparse.ArgumentParser) -> None:
    p.add_argument("--out", metavar="DIR", default="routerd-demo",
                   help="where every result goes (default ./routerd-demo)")
    p.add_argument("--duration", metavar="S", type=float, default=DEFAULT_DURATION_S,
                   help=f"seconds of the live run (default {DEFAULT_DURATION_S:g}; the scenario "
                        f"is stretched to it; the whole demo takes about this plus 10 s)")
    p.add_argument("--seed", metavar="N", type=int, default=1,
                   help="random seed of the traffic and of every policy (default 1)")
    p.add_argument("--speed", metavar="X", type=float, default=1.0,
                   help="virtual seconds per wall-clock second in the live run (default 1, real time)")
    p.add_argument("--config", metavar="FILE", default=None,
                   help="routerd config for the service and the in-process runs (engine, guards, "
                        "sim keys); its topology.file must keep the demo lab's nodes and links "
                        "(e.g. the demo lab with other capacities)")
    p.add_argument("--set", metavar="KEY=VALUE", action="append", default=[], dest="overrides",
                   help="override one config setting, e.g. --set engine.variant=dual (repeatable)")
    p.add_argument("--no-plot", action="store_true",
                   help="skip delivery.png and load.png (without matplotlib, i.e. without the "
                        "plot extra, the demo skips them anyway and says so)")


def run(args: argparse.Namespace) -> int:
    problems = []
    if not (math.isfinite(args.duration) and 2.0 <= args.duration <= 3600.0):
        problems.append(f"--duration: {args.duration:g} must be between 2 and 3600 seconds")
    if not (math.isfinite(args.speed) and 0.01 <= args.speed <= 1000):
        problems.append(f"--speed: {args.speed:g} must be between 0.01 and 1000")
    if args.seed < 0:
        problems.append(f"--seed: {args.seed} must be >= 0")
    if problems:
        print("routerd demo: " + "; ".join(problems), file=sys.stderr)
        return 2
    plots = not getattr(args, "no_plot", False)
    if plots:
        try:
            import matplotlib  # noqa: F401
        except ImportError:
            plots = False
            print("routerd demo: no plots (delivery.png, load.png): matplotlib is not installed; "
                  "pip install 'routerd[plot]' for them", file=sys.stderr)
    demo = Demo(os.path.abspath(args.out), args.duration, args.seed, args.speed,
                config=getattr(args, "config", None), overrides=getattr(args, "overrides", None) or (),
                plots=plots)
    try:
        from routerd.io.files import output_dir

        output_dir(args.out)
        demo.load_inputs()          # before anything is started or written
        return demo.main()
    except InputError as e:
        print(f"routerd demo: cannot run:\n{e}", file=sys.stderr)
        return 2


# ---- the scenario -------------------------------------------------------------------------
def packaged(name: str) -> str:
    """Text of a packaged data file."""
    return (resources.files("routerd") / "data" / name).read_text(encoding="utf-8")


def stretched_scenario(duration_s: float) -> dict[str, Any]:
    """The packaged demo scenario with every time multiplied by duration / 30 s."""
    from routerd.io.files import parse_yaml

    doc = parse_yaml(packaged("demo-scenario.yaml"))
    f = duration_s / SCENARIO_SPAN_S
    sc = doc["scenario"]
    for entry in list(sc.get("load", [])) + list(sc.get("links", [])):
        for k in ("at_s", "from_s", "to_s", "on_s", "off_s"):
            if k in entry:
                entry[k] = round(float(entry[k]) * f, 6)
    return doc


# ---- live progress --------------------------------------------------------------------------
class Progress:
    """One line per simulated second: rewritten in place on a terminal, plain lines otherwise."""

    def __init__(self, duration_s: float, stream: Any = None):
        from routerd.io.progress import StatusLine

        self.duration = duration_s
        self.status = StatusLine(stream or sys.stdout)
        self.tty = self.status.tty
        self.prev = 0

    def line(self, view: Mapping[str, Any], route_changes: int | None, explore: float,
             trunk_util: float | None, events: str) -> str:
        from routerd.sim.stats import delivery_stats

        dl = view["deliveries"]
        recent = delivery_stats(dl[self.prev:], ci=False)
        self.prev = len(dl)
        mean, p99 = recent.mean, recent.p99
        lost = view["dropped"] + view["ttl_expired"]
        rc = "-" if route_changes is None else f"{route_changes}"
        tu = "" if trunk_util is None else f" | trunk {trunk_util * 100:3.0f}%"
        return (f"t {view['t_s']:5.1f}/{self.duration:g} s | delivered {view['delivered']:7d} "
                f"lost {lost:5d} | last s: mean {_ms(mean)} p99 {_ms(p99)} | "
                f"route changes {rc:>5} | exploring {explore * 100:4.1f}%{tu}"
                + (f" | {events}" if events else ""))

    @property
    def last_line(self) -> str:
        return self.status.last_text

    def show(self, text: str) -> None:
        self.status.show(text, force=True)

    def done(self) -> None:
        self.status.done()


def optimum_sentence(opt: Mapping[str, Any]) -> str:
    """The reading's sentence on the service's live optimality gap (health's ``optimum``)."""
    if not opt.get("available"):
        why = {"waiting": "no run had finished yet", "no_demand": "it had measured no demand",
               "no_packet_size": "no link was busy enough to infer the packet size",
               "off": "engine.optimum.interval_s is 0", "too_large": "the network is too large",
               "failed": f"its last run failed ({opt.get('error')})"}.get(str(opt.get("reason")),
                                                                        str(opt.get("reason")))
        return f"The service's own optimality gap was not available at the end: {why}."
    head = (f"The service's own model (M/M/1 links plus propagation, fed the demand it "
            f"measured from the hop reports, {opt['demand_pps']:.0f} packets/s) put the "
            f"optimum's mean delay at {_msv(opt['optimal_delay_s'])}")
    pub, ratio = opt.get("published_delay_s"), opt.get("gap_ratio")
    if pub is None or ratio is None:
        return (head + f" and could not rate its published tables "
                f"({opt.get('published_reason') or 'no figure'}).")
    return (head + f" and its published tables' at {_msv(pub)}: {ratio:.2f} times the optimum "
            f"(model figures, {opt['age_s']:.0f} s before the end; the delivery times above "
            f"are measured).")


def _ms(v: float) -> str:
    return "   n/a  " if not math.isfinite(v) else f"{v * 1e3:6.1f} ms"


class IntervalTail:
    """An observer of :func:`routerd.sim.core.run_core`: at every series sample, the p99 of the
    delivery times of the packets delivered since the previous one (NaN if none), so the
    plots can show the tail per second beside the mean."""

    def __init__(self) -> None:
        self.prev = 0
        self.p99: list[float] = []

    def __call__(self, view: Mapping[str, Any]) -> None:
        from routerd.sim.stats import percentile

        dl = view["deliveries"]
        self.p99.append(percentile(sorted(dl[self.prev:]), 0.99))
        self.prev = len(dl)

    def attach(self, result: dict[str, Any]) -> dict[str, Any]:
        """``result`` with ``series["p99_delivery_s"]`` (one value per series row)."""
        se = result.get("series")
        if se:
            se["p99_delivery_s"] = self.p99[:len(se["t_s"])]
        return result


# ---- the demo -------------------------------------------------------------------------------
class Demo:
    def __init__(self, out: str, duration_s: float, seed: int, speed: float, *,
                 config: str | None = None, overrides: Sequence[str] = (), plots: bool = True):
        self.plots = plots
        self.out = out
        self.config = config
        self.overrides = tuple(overrides)
        self.cfg: Any = None
        self.topo: Any = None
        self.duration = float(duration_s)
        self.seed = int(seed)
        self.speed = float(speed)
        self.results: dict[str, dict[str, Any]] = {}
        self.view: dict[str, Any] | None = None
        self.proc: Any = None
        self.policy: Any = None
        self.written: list[str] = []
        self.metrics_url: str | None = None
        self.state_dir = os.path.join(out, "state")
        self.health: dict[str, Any] | None = None
        self.t0 = time.monotonic()
        self.tails: dict[str, IntervalTail] = {}

    def run_in_process(self, policy: str) -> dict[str, Any]:
        """One in-process run of the demo's scenario, with its per-second p99."""
        from routerd.sim.run import run as run_sim

        tail = self.tails[policy] = IntervalTail()
        return tail.attach(run_sim(self.spec(policy), observer=tail))

    def spec(self, policy: str) -> dict[str, Any]:
        return {"policy": policy, "rate_pps": BASE_RATE_PPS, "duration_s": self.duration,
                "seed": self.seed, "scenario": self.scenario_doc, "warmup_s": 0.0,
                "config": self.config, "topology": self.topo,
                "overrides": (*self.overrides, f"sim.service.speed={self.speed:g}"), "series": True}

    def load_inputs(self) -> None:
        """Config and topology by the one input rule (:mod:`routerd.io.inputs`: the
        config's topology.file relative to its folder, its link defaults, ``--set`` on
        top), the stretched scenario, and the check that the topology is the demo lab's
        shape (the scenario's links, the trunk and the detour); InputError otherwise."""
        import argparse as _argparse

        from routerd.core.errors import Problem
        from routerd.io import inputs as _inputs
        from routerd.io import scenario as _scenario

        self.cfg = _inputs.load_config(_argparse.Namespace(
            config=self.config, overrides=[*self.overrides, f"sim.service.speed={self.speed:g}"]))
        self.topo = _inputs.load_topology(self.cfg)
        self.scenario_doc = stretched_scenario(self.duration)
        self.scenario = _scenario.from_mapping(self.scenario_doc, source="demo-scenario.yaml")
        self.scenario.link_events(self.topo)
        missing = [f"{a}-{b}" for a, b in (TRUNK, *DETOUR_ENTRIES)
                   if a not in self.topo.index or b not in self.topo.index
                   or (self.topo.index[a], self.topo.index[b]) not in self.topo.link_index]
        if missing:
            raise InputError(Problem(self.topo.source or self.topo.name, ", ".join(missing),
                                     "are links the demo follows (trunk and detour): it runs "
                                     "on the demo lab's shape only"))

    def main(self) -> int:
        from routerd.sim import closedloop

        if self.cfg is None:
            self.load_inputs()
        cfg = self.cfg
        self._prepare_out()
        self._write_text("scenario.yaml", self._scenario_yaml())
        self.link_events = [(c.at_s, c.action, c.ends[0]) for c in self.scenario.links]
        print(f"routerd demo: the demo lab ({self.topo.n} nodes, {self.topo.n_links} directed "
              f"links: two halls, a thin trunk {TRUNK[0]}-{TRUNK[1]} and a wider detour), "
              f"{self.duration:g} s of {self.scenario.name} at up to {BASE_RATE_PPS:g} packets/s")
        print(CAUTIONS)
        old_term = signal.signal(signal.SIGTERM, _on_term)
        interrupted = False
        try:
            self.proc = closedloop.ServiceProcess(
                self.topo, cfg, base=os.path.join(self.out, "service"), state_dir=self.state_dir,
                transport="tcp", overrides={**closedloop.service_overrides(cfg, durable=True),
                                            **OPTIMUM_OVERRIDES})
            eps = self.proc.start()
            self.metrics_url = eps.get("metrics")
            print(f"service: routerd serve, pid {self.proc.pid}")
            for k in ("ingest", "publish", "control", "metrics"):
                print(f"  {k:<8} {eps.get(k, '-')}")
            print(f"  state    {self.state_dir}")
            print(f"live run: the simulator plays the lab and reports every hop; the service "
                  f"routes ({self.speed:g}x real time)")
            self._live()
            self._finish_service()
            print("in process, same scenario and seed: shortest, reroute, qrouting ...", flush=True)
            for pol in ("shortest", "reroute", "qrouting"):
                self.results[pol] = self.run_in_process(pol)
        except (KeyboardInterrupt, _Stop):
            interrupted = True
            if self.progress_obj is not None:
                self.progress_obj.done()
            print("\nrouterd demo: interrupted; stopping the service and writing the partial "
                  "results", file=sys.stderr)
            if self.proc is not None and self.proc.running:
                self._scrape_metrics(timeout_s=2.0)
        finally:
            signal.signal(signal.SIGTERM, old_term)
            if self.policy is not None:
                self.policy.close()
            if self.proc is not None:
                self.proc.stop()
        if interrupted:
            self._write_partial()
            print(f"partial results in {self.out}")
            for w in self.written:
                print(f"  {os.path.relpath(w, self.out)}")
            self._print_where()
            return 130
        self._write_all()
        return 0

    progress_obj: Progress | None = None

    def _prepare_out(self) -> None:
        """A fresh --out: an earlier demo's results there are replaced (its service state
        too, or the new service would start from what the old one learned); a non-empty
        directory that holds no demo is refused rather than written into."""
        import shutil

        if os.path.isdir(self.out) and os.listdir(self.out):
            marks = [os.path.join(self.out, "service", "service.yaml"),
                     os.path.join(self.out, "scenario.yaml")]
            if not any(os.path.exists(m) for m in marks):
                raise InputError(f"--out {self.out}: the directory is not empty and holds no "
                                 "earlier demo; choose another --out")
            print(f"routerd demo: replacing the earlier demo results in {self.out}")
            for rel in ("state", "service", "runs"):
                shutil.rmtree(os.path.join(self.out, rel), ignore_errors=True)
            for rel in FILES:
                if "/" not in rel and os.path.exists(os.path.join(self.out, rel)):
                    os.remove(os.path.join(self.out, rel))
        os.makedirs(self.out, exist_ok=True)

    # -- the live run -----------------------------------------------------------------------
    def _live(self) -> None:
        from routerd.sim import closedloop
        from routerd.sim.run import run as run_sim

        prog = self.progress_obj = Progress(self.duration)
        trunk = [self.topo.link(*TRUNK), self.topo.link(TRUNK[1], TRUNK[0])]
        state: dict[str, int | None] = {"rc": None}
        self.policy = closedloop.ServicePolicy(process=self.proc)

        tail = self.tails["service"] = IntervalTail()

        def observe(view: dict[str, Any]) -> None:
            self.view = view
            tail(view)
            t = view["t_s"]
            try:
                h = self.policy.health()
                state["rc"] = int(h["counts"]["route_changes"])
            except (TimeoutError, closedloop.ServiceLost, KeyError):
                pass
            util = view["series"]["link_util"]
            tu = max(util[-1][k] for k in trunk) if util else None
            prog.show(prog.line(view, state["rc"], self.policy.exploration_share(), tu,
                                self._events_at(t)))

        self.results["service"] = tail.attach(run_sim(self.spec("service"), policy=self.policy,
                                                      observer=observe))
        prog.done()
        s = self.results["service"]["summary"]
        print(f"live run done: {s['delivered']} of {s['offered']} packets delivered, mean "
              f"{_ms(s['mean_delivery_s']).strip()}, p99 {_ms(s['p99_delivery_s']).strip()}; "
              f"pacing lag max {s.get('policy_pacing_lag_max_s', 0) * 1e3:.0f} ms")

    def _events_at(self, t: float) -> str:
        down: dict[tuple[str, str], float] = {}
        for at, action, ends in self.link_events:
            if at <= t:
                if action == "down":
                    down[tuple(sorted(ends))] = at  # type: ignore[index]
                elif action == "up":
                    down.pop(tuple(sorted(ends)), None)  # type: ignore[arg-type]
        return ", ".join(f"link {a}-{b} DOWN since {at:g} s" for (a, b), at in down.items())

    def _finish_service(self) -> None:
        assert self.policy is not None
        try:
            self.health = self.policy.final_health or self.policy.health()
        except Exception:  # noqa: BLE001 - health is a nicety; the run's figures are kept
            self.health = None
        self._scrape_metrics()
        self.policy.close()
        rc = self.proc.stop()
        for f in ("topology.yaml", "service.yaml", "service.out", "service.log"):
            p = os.path.join(self.proc.base, f)
            if os.path.exists(p):
                self.written.append(p)
        print(f"service stopped (exit status {rc}); its final snapshot is in {self.state_dir}")

    def _scrape_metrics(self, timeout_s: float = 5.0) -> None:
        """The service's metrics page as it is now → metrics.prom."""
        import urllib.request

        if not self.metrics_url:
            return
        try:
            with urllib.request.urlopen(self.metrics_url, timeout=timeout_s) as r:
                self._write_text("metrics.prom", r.read().decode())
        except OSError as e:
            print(f"routerd demo: could not read the metrics page {self.metrics_url}: {e}",
                  file=sys.stderr)

    # -- files ---------------------------------------------------------------------------------
    def _path(self, rel: str) -> str:
        p = os.path.join(self.out, rel)
        os.makedirs(os.path.dirname(p), exist_ok=True)
        return p

    def _write_text(self, rel: str, text: str) -> str:
        p = self._path(rel)
        with open(p, "w", encoding="utf-8") as fh:
            fh.write(text)
        self.written.append(p)
        return p

    def _scenario_yaml(self) -> str:
        import yaml

        head = (f"# the demo scenario as run: routerd/data/demo-scenario.yaml with its times "
                f"stretched to {self.duration:g} s\n# base rate {BASE_RATE_PPS:g} packets/s\n")
        return head + yaml.safe_dump(self.scenario_doc, sort_keys=False)

    def _write_all(self) -> None:
        from routerd.sim.commands_simulate import write_outputs

        for pol in POLICIES:
            d = os.path.join(self.out, "runs", pol)
            os.makedirs(d, exist_ok=True)
            self.written += write_outputs(self.results[pol], d)
        figs = self.figures()
        rows = self.table(figs)
        with open(self._path("comparison.csv"), "w", newline="", encoding="utf-8") as fh:
            w = csv.writer(fh)
            w.writerow(["figure"] + [LABELS[p] for p in POLICIES])
            for name, vals in rows:
                w.writerow([name] + vals)
        self.written.append(self._path("comparison.csv"))
        reading = self.reading(figs)
        self._write_text("reading.txt", reading + "\n")
        if self.plots:
            self.written += [self.plot_delivery(self._path("delivery.png")),
                             self.plot_load(self._path("load.png"))]
        self._write_summary(figs, reading, interrupted=False)
        # the table, the reading, the files
        print()
        width = max(len(n) for n, _ in rows)
        heads = [LABELS[p] for p in POLICIES]
        cw = [max(len(h), 12) for h in heads]
        print(" " * width + "  " + "  ".join(h.rjust(c) for h, c in zip(heads, cw)))
        for name, vals in rows:
            print(name.ljust(width) + "  " + "  ".join(str(v).rjust(c) for v, c in zip(vals, cw)))
        print()
        print(_wrap(reading))
        print()
        print(f"wrote {len(self.written)} files to {self.out}:")
        for p in sorted(set(self.written)):
            print(f"  {os.path.relpath(p, self.out)}")
        self._print_where()
        print(f"(the demo took {time.monotonic() - self.t0:.0f} s)")

    def _print_where(self) -> None:
        print(f"service state (journal and snapshots): {self.state_dir}")
        if self.metrics_url:
            prom = os.path.join(self.out, "metrics.prom")
            print(f"metrics were served at {self.metrics_url} during the run"
                  + (f" (its last page: {prom})" if os.path.exists(prom) else ""))
        # the state dir carries its own topology and config (routerd.io.statedir)
        print(f"replay the run offline (or try other settings with --compare KEY=VALUE): "
              f"routerd replay {self.state_dir} --out {os.path.join(self.out, 'replay')}")
        print(f"bring the service back from that state and scrape it again: routerd serve "
              f"--state-dir {self.state_dir} --metrics 127.0.0.1:9307")

    def _write_summary(self, figs: dict[str, Any] | None, reading: str | None,
                       interrupted: bool) -> None:
        doc: dict[str, Any] = {
            "demo": {"duration_s": self.duration, "seed": self.seed, "speed": self.speed,
                     "base_rate_pps": BASE_RATE_PPS, "scenario": self.scenario.name,
                     "topology": self.topo.name, "interrupted": interrupted},
            "service": {"pid": self.proc.pid if self.proc is not None else None,
                        "endpoints": dict(self.proc.endpoints) if self.proc is not None else {},
                        "state_dir": self.state_dir, "metrics": self.metrics_url,
                        "health": self.health},
            "summaries": {p: self.results[p]["summary"] for p in POLICIES if p in self.results},
            "figures": figs,
            "reading": reading,
            "files": sorted(os.path.relpath(p, self.out) for p in set(self.written)),
        }
        with open(self._path("summary.json"), "w", encoding="utf-8") as fh:
            json.dump(_clean(doc), fh, indent=2, sort_keys=True)
            fh.write("\n")
        self.written.append(self._path("summary.json"))

    def _write_partial(self) -> None:
        """What an interrupted demo still knows: the live run up to its last sample."""
        from routerd.sim.stats import delivery_stats

        v = self.view
        if v is not None and "service" not in self.results:
            ds = delivery_stats(v["deliveries"], ci=False)
            se = v["series"]
            m = len(se["t_s"])
            summary = {
                "policy": "service", "interrupted": True, "reached_s": v["t_s"],
                "duration_s": self.duration, "seed": self.seed, "rate_pps": BASE_RATE_PPS,
                "delivered": v["delivered"], "dropped": v["dropped"],
                "ttl_expired": v["ttl_expired"], "in_network": v["in_network"],
                "mean_delivery_s": ds.mean, "p50_delivery_s": ds.p50, "p99_delivery_s": ds.p99,
            }
            series = {
                "t_s": list(se["t_s"][:m]), "delivered": list(se["delivered"][:m]),
                "mean_delivery_s": [s / c if c else math.nan
                                    for s, c in zip(se["delivery_sum_s"][:m], se["delivered"][:m])],
                "dropped": list(se["dropped"][:m]), "ttl_expired": list(se["ttl_expired"][:m]),
                "in_network": list(se["in_network"][:m]), "link_util": list(se["link_util"][:m]),
                "interval_s": 1.0,
            }
            if "service" in self.tails:
                series["p99_delivery_s"] = self.tails["service"].p99[:m]
            self.results["service"] = {"summary": summary, "series": series}
            with open(self._path("runs/service/summary.json"), "w", encoding="utf-8") as fh:
                json.dump(_clean(summary), fh, indent=2, sort_keys=True)
                fh.write("\n")
            self.written.append(self._path("runs/service/summary.json"))
            self._write_series(series, self._path("runs/service/series.csv"))
        if self.results and self.plots:
            try:
                self.written.append(self.plot_delivery(self._path("delivery.png")))
            except Exception as e:  # noqa: BLE001 - a partial plot is a nicety, the data is kept
                print(f"routerd demo: no partial plot: {e}", file=sys.stderr)
        self._write_summary(None, None, interrupted=True)

    def _write_series(self, s: Mapping[str, Any], path: str) -> None:
        names = [f"util:{self.topo.nodes[a]}->{self.topo.nodes[b]}"
                 for a, b in zip(self.topo.src.tolist(), self.topo.dst.tolist())]
        with open(path, "w", newline="", encoding="utf-8") as fh:
            w = csv.writer(fh)
            w.writerow(["t_s", "delivered", "mean_delivery_s", "dropped", "ttl_expired",
                        "in_network"] + names)
            for i, t in enumerate(s["t_s"]):
                md = s["mean_delivery_s"][i]
                w.writerow([f"{t:.6g}", s["delivered"][i], "" if not math.isfinite(md) else f"{md:.6g}",
                            s["dropped"][i], s["ttl_expired"][i], s["in_network"][i]]
                           + [f"{u:.4f}" for u in s["link_util"][i]])
        self.written.append(path)

    # -- figures and the reading ---------------------------------------------------------------
    def _downs(self) -> list[tuple[float, float, tuple[str, str]]]:
        """(down at, up at, link) spans of the scenario (up = the end if it never recovers)."""
        out = []
        for at, action, ends in self.link_events:
            if action == "down":
                ups = [a for a, act, e in self.link_events
                       if act == "up" and set(e) == set(ends) and a > at]
                out.append((at, min(ups) if ups else self.duration, ends))
        return out

    def figures(self) -> dict[str, Any]:
        """The numbers the table and the reading are made of, per policy."""
        import numpy as np

        topo = self.topo
        trunk = [topo.link(*TRUNK), topo.link(TRUNK[1], TRUNK[0])]
        detour = [topo.link(a, b) for a, b in DETOUR_ENTRIES]
        peak_from = max((c.end_s for c in self.scenario.load), default=0.0)
        downs = self._downs()
        # hall-to-hall pairs whose static (delay-shortest) path crosses the trunk
        nh = topo.spt_next_hops()
        west = [i for i, nm in enumerate(topo.nodes) if nm.startswith("w")]
        east = [i for i, nm in enumerate(topo.nodes) if nm.startswith("e")]
        tr = {(topo.index[TRUNK[0]], topo.index[TRUNK[1]]), (topo.index[TRUNK[1]], topo.index[TRUNK[0]])}
        on_trunk = total = 0
        for a_side, b_side in ((west, east), (east, west)):
            for x0 in a_side:
                for d in b_side:
                    x, hops, seen = x0, [], 0
                    while x != d and x >= 0 and seen <= topo.n:
                        y = int(nh[x, d])
                        hops.append((x, y))
                        x, seen = y, seen + 1
                    total += 1
                    on_trunk += any(h in tr for h in hops)
        out: dict[str, Any] = {"hall_pairs_static_on_trunk": on_trunk / total if total else math.nan,
                               "peak_from_s": peak_from,
                               "peak_rate_pps": BASE_RATE_PPS * self.scenario.max_factor(),
                               "failures": [{"link": f"{e[0]}-{e[1]}", "down_s": a, "up_s": b}
                                            for a, b, e in downs],
                               # the service's live optimality gap at the end (health)
                               "optimum": (self.health or {}).get("optimum")}
        for pol in POLICIES:
            r = self.results[pol]
            s, se, links = r["summary"], r["series"], r.get("links", [])
            t = np.asarray(se["t_s"], dtype=float)
            util = np.asarray(se["link_util"], dtype=float)
            peak = t > peak_from + 1.0                      # bins fully inside the peak
            lost = np.asarray(se["dropped"]) + np.asarray(se["ttl_expired"])
            in_out = np.zeros(t.shape, dtype=bool)
            for a, b, _ in downs:
                in_out |= (t > a) & (t <= b + 1.0)          # bins that saw the outage
            packets = [ln["packets"] for ln in links]
            cross = sum(packets[k] for k in trunk) + sum(packets[k] for k in detour) if packets else 0
            lost_n = s["dropped"] + s["ttl_expired"]
            # packets that left the network in the peak's bins, and the lost ones among them
            peak_lost = float(lost[peak].sum()) if peak.any() else 0.0
            peak_left = peak_lost + float(np.asarray(se["delivered"])[peak].sum()) if peak.any() else 0.0
            f = {
                "mean_delivery_s": s["mean_delivery_s"],
                "p99_delivery_s": s["p99_delivery_s"],
                "delivered": s["delivered"], "offered": s["offered"],
                "lost": lost_n,
                "lost_share": lost_n / s["offered"] if s["offered"] else math.nan,
                "lost_during_failure": int(lost[in_out].sum()) if in_out.any() else 0,
                "peak_mean_delivery_s": _nanmean_weighted(se, peak),
                "peak_lost_share": peak_lost / peak_left if peak_left else math.nan,
                "trunk_util_peak": (float(util[peak][:, trunk].max(axis=1).mean())
                                    if peak.any() else math.nan),
                "detour_share": (sum(packets[k] for k in detour) / cross) if cross else math.nan,
                "route_changes": s.get("policy_engine_route_changes", 0.0),
                "detect_s": s.get("policy_reroute_detect_s", math.nan),
                "exploration_share": s.get("policy_engine_exploration_share",
                                           s.get("policy_exploration_share", 0.0)),
            }
            out[pol] = f
        return out

    def table(self, figs: Mapping[str, Any]) -> list[tuple[str, list[str]]]:
        def row(name: str, key: str, fmt: Any) -> tuple[str, list[str]]:
            return name, [fmt(figs[p][key]) for p in POLICIES]

        def ms(v: float) -> str:
            return "n/a" if not math.isfinite(v) else f"{v * 1e3:.2f}"

        def pct(v: float) -> str:
            return "n/a" if not math.isfinite(v) else f"{v * 100:.1f}%"

        def lost_pct(key: str) -> list[str]:
            return [_pct_lost(figs[p].get(key, math.nan)) for p in POLICIES]

        # delivery times cover delivered packets only: each one has its lost share beside it
        return [
            row("mean delivery (ms)", "mean_delivery_s", ms),
            row("p99 delivery (ms)", "p99_delivery_s", ms),
            ("  lost (% of offered)", lost_pct("lost_share")),
            row("mean delivery at peak load (ms)", "peak_mean_delivery_s", ms),
            ("  lost at peak load (% of packets leaving)", lost_pct("peak_lost_share")),
            ("delivered / offered", [f"{figs[p]['delivered']}/{figs[p]['offered']}" for p in POLICIES]),
            row("packets lost", "lost", str),
            row("  of them around the link failure", "lost_during_failure", str),
            row("trunk utilisation at peak", "trunk_util_peak", pct),
            row("packets leaving the halls via the detour", "detour_share", pct),
            row("route changes", "route_changes", lambda v: f"{int(v)}"),
            row("exploration share at the end", "exploration_share", pct),
        ]

    def reading(self, figs: Mapping[str, Any]) -> str:
        """One paragraph, every number and every comparison taken from the figures."""
        sh, q, sv = figs["shortest"], figs["qrouting"], figs["service"]
        rr = figs.get("reroute")
        fail = figs["failures"][0] if figs["failures"] else None
        parts = []
        ratio = sh["mean_delivery_s"] / q["mean_delivery_s"] if q["mean_delivery_s"] > 0 else math.nan
        peak = (f"at the peak load ({figs['peak_rate_pps']:.0f} packets/s from "
                f"{figs['peak_from_s']:g} s on)")
        if sh["trunk_util_peak"] >= 0.9:
            share = figs["hall_pairs_static_on_trunk"]
            parts.append("Static shortest paths send "
                         + ("every" if share == 1.0 else f"{share * 100:.0f}% of the")
                         + f" hall-to-hall packet{'s' if share != 1.0 else ''} over the trunk "
                         f"{TRUNK[0]}-{TRUNK[1]}, which {peak} was "
                         + ("saturated" if sh["trunk_util_peak"] >= 0.99 else
                            f"{sh['trunk_util_peak'] * 100:.0f}% busy") +
                         f": their mean delivery "
                         f"time was {_msv(sh['mean_delivery_s'])} (p99 {_msv(sh['p99_delivery_s'])})"
                         f" and they lost {sh['lost']} packets{_share(sh)}")
        else:
            parts.append(f"Static shortest paths kept the trunk {TRUNK[0]}-{TRUNK[1]} at "
                         f"{sh['trunk_util_peak'] * 100:.0f}% {peak}, a mean delivery time of "
                         f"{_msv(sh['mean_delivery_s'])} and {sh['lost']} packets lost{_share(sh)}")
        if fail is not None and sh["lost_during_failure"] > 0:
            parts[-1] += (f", {sh['lost_during_failure']} of them while {fail['link']} was down "
                          f"({fail['down_s']:g}-{fail['up_s']:g} s), since static routes do not move")
        parts[-1] += "."
        if rr is not None:
            parts.append(f"Shortest paths recomputed after each link event (reroute, "
                         f"{rr['detect_s']:g} s to detect a failure) delivered in "
                         f"{_msv(rr['mean_delivery_s'])} on average and lost {rr['lost']} packets"
                         + (f", {rr['lost_during_failure']} of them around the failure"
                            if fail is not None else "") + ".")
        if sh["lost"] > 0:
            parts.append("Delivery times count only the packets that arrived, so losses make "
                         "a mean look better, not worse.")
        if ratio > 1.05:
            parts.append(f"The learner, in process, sent {q['detour_share'] * 100:.0f}% of the "
                         f"packets leaving the halls over the detour instead of the trunk "
                         f"(static routes: {sh['detour_share'] * 100:.0f}%, the relays' own "
                         f"traffic) and delivered in "
                         f"{_msv(q['mean_delivery_s'])} on average (p99 {_msv(q['p99_delivery_s'])}), "
                         f"{ratio:.1f} times faster than static routes, losing {_packets(q['lost'])}{_share(q)}.")
        else:
            parts.append(f"The learner, in process, did no better here: "
                         f"{_msv(q['mean_delivery_s'])} on average (p99 {_msv(q['p99_delivery_s'])}),"
                         f" {q['lost']} packets lost{_share(q)}.")
        rel = (sv["mean_delivery_s"] - q["mean_delivery_s"]) / q["mean_delivery_s"]
        close = abs(rel) <= 0.1
        parts.append(f"The live service, learning from the simulator's hop reports over ZeroMQ "
                     f"at {self.speed:g}x real time, delivered in {_msv(sv['mean_delivery_s'])} "
                     f"(p99 {_msv(sv['p99_delivery_s'])}), {abs(rel) * 100:.1f}% "
                     f"{'above' if rel > 0 else 'below'} the in-process learner"
                     + (" — the same behaviour" if close else " — a real difference") +
                     f", losing {_packets(sv['lost'])}{_share(sv)}, "
                     f"with {int(sv['route_changes'])} route changes and "
                     f"{sv['exploration_share'] * 100:.1f}% of traffic "
                     + ("off each table's main next hop (its split shares)"
                        if self.cfg is not None and self.cfg["engine.mode"] == "split"
                        else "exploring") + " at the end.")
        if fail is not None:
            extra = sv["lost_during_failure"] - q["lost_during_failure"]
            if extra > 0:
                parts.append(f"Around the failure of {fail['link']} it lost {sv['lost_during_failure']}"
                             f" packets against {q['lost_during_failure']} in process: the ones "
                             f"sent onto the dead link before the service's new tables arrived "
                             f"(its decisions reach the packets one to two decision intervals "
                             f"later than in process).")
            else:
                parts.append(f"Around the failure of {fail['link']} it lost "
                             f"{sv['lost_during_failure']} packets ({q['lost_during_failure']} in "
                             f"process): its new tables arrived before the losses could build up.")
        opt = figs.get("optimum")
        if opt:
            parts.append(optimum_sentence(opt))
        return " ".join(parts)

    # -- plots ---------------------------------------------------------------------------------
    # Both figures share one time axis: the same limits (0 to the run's duration), the same
    # horizontal place in the figure (routerd.sim.plotstyle) and bins drawn at their middles.
    def _policy_line(self, ax: Any, pol: str, x: Any, y: Any, label: bool = True) -> None:
        ax.plot(x, y, label=LABELS[pol] if label else None, **STYLES[pol])

    def _time_axes(self, axes: Any) -> None:
        from routerd.sim import plotstyle as ps

        spans = [(a, b, f"{e[0]}-{e[1]}") for a, b, e in self._downs()]
        ps.mark_link_spans(axes, spans, label_ax=axes[0])
        peak_from = max((c.end_s for c in self.scenario.load), default=0.0)
        for ax in axes:
            if peak_from > 0:
                ax.axvline(peak_from, color="#777777", lw=1, ls=":")
            ax.grid(alpha=0.3, which="major")
        if peak_from > 0:   # a second row under the failure's labels
            axes[0].text(peak_from, 0.90, " peak load from here", color="#555555", fontsize=8,
                         va="top", transform=axes[0].get_xaxis_transform())
        axes[-1].set_xlim(0, self.duration)
        axes[-1].set_xlabel("time since the start of the run (s)")

    def delivery_figure(self) -> Any:
        """delivery.png: mean and p99 delivery time per second (log ms), lost share per second."""
        import numpy as np

        from routerd.sim import plotstyle as ps
        from routerd.sim.plots import LOSS_MARK, lost_share

        plt = ps.pyplot()
        fig, (ax, axp, ax2) = ps.time_figure(plt, 3, 8.5, (2.4, 2.0, 1.3))
        values: list[float] = []
        lost_top = 1.0
        ringed = False
        for pol in POLICIES:
            if pol not in self.results:
                continue
            se = self.results[pol]["series"]
            iv = float(se.get("interval_s", 1.0))
            t = np.asarray(se["t_s"], dtype=float) - iv / 2
            md = np.asarray(se["mean_delivery_s"], dtype=float) * 1e3
            p99 = np.asarray(se.get("p99_delivery_s", [math.nan] * len(t)), dtype=float) * 1e3
            share = lost_share(se) * 100
            self._policy_line(ax, pol, t, md)
            self._policy_line(axp, pol, t, p99, label=False)
            self._policy_line(ax2, pol, t, share, label=False)
            hit = np.isfinite(share) & (share > LOSS_MARK * 100) & np.isfinite(md)
            if hit.any():
                ringed = True
                ax.plot(t[hit], md[hit], ls="none", marker="o", ms=9, mfc="none",
                        mec=ps.DOWN_COLOUR, mew=1.2, zorder=1)
            values += md.tolist() + p99.tolist()
            if np.isfinite(share).any():
                lost_top = max(lost_top, float(np.nanmax(share)))
        lo, hi = ps.log_limits(values, floor=0.5)
        ps.ms_log_axis(ax, lo, hi)
        ps.ms_log_axis(axp, lo, hi)
        ax.set_ylabel("mean delivery time\nper second (ms)")
        axp.set_ylabel("p99 delivery time\nper second (ms)")
        ax2.set_ylabel("lost (% of packets\nleaving per second)")
        ps.zero_visible(ax2, lost_top * 1.15)
        self._time_axes([ax, axp, ax2])
        from matplotlib.lines import Line2D

        handles, labels = ax.get_legend_handles_labels()
        if ringed:
            handles.append(Line2D([], [], ls="none", marker="o", ms=9, mfc="none",
                                  mec=ps.DOWN_COLOUR))
            labels.append(f"a second with > {LOSS_MARK:.0%} lost:\nits times cover the\n"
                          "delivered packets only")
        ps.legend_outside(ax, handles, labels)
        interrupted = ("service" in self.results
                       and self.results["service"]["summary"].get("interrupted"))
        ax.set_title(f"routerd demo: delivery time and losses on {self.topo.name}, scenario "
                     f"{self.scenario.name}, seed {self.seed}"
                     + (" (interrupted)" if interrupted else ""), fontsize=10)
        return fig

    def plot_delivery(self, path: str) -> str:
        from routerd.sim import plotstyle as ps

        fig = self.delivery_figure()
        fig.savefig(path)
        ps.pyplot().close(fig)
        return path

    def load_figure(self) -> Any:
        """load.png: offered and delivered packets/s over time, and the trunk's utilisation."""
        import numpy as np

        from routerd.sim import plotstyle as ps

        plt = ps.pyplot()
        topo = self.topo
        trunk = [topo.link(*TRUNK), topo.link(TRUNK[1], TRUNK[0])]
        fig, (ax, ax2) = ps.time_figure(plt, 2, 6.5)
        tt = np.linspace(0.0, self.duration, 600)
        ax.plot(tt, BASE_RATE_PPS * self.scenario.factor(tt), color="black", lw=2.2,
                label="offered (scenario)", zorder=1)
        for pol in POLICIES:
            se = self.results[pol]["series"]
            iv = float(se.get("interval_s", 1.0))
            t = np.asarray(se["t_s"], dtype=float) - iv / 2
            self._policy_line(ax, pol, t, np.asarray(se["delivered"], dtype=float) / iv)
            util = np.asarray(se["link_util"], dtype=float)
            self._policy_line(ax2, pol, t, util[:, trunk].max(axis=1) * 100, label=False)
        ax.set_ylabel("packets/s: offered, and\ndelivered per second")
        ax.set_ylim(0, ax.get_ylim()[1] * 1.25)    # room for the event labels at the top
        ps.legend_outside(ax)
        ax.set_title(f"routerd demo: offered and delivered load over time, and the trunk "
                     f"{TRUNK[0]}-{TRUNK[1]}'s utilisation, on {topo.name}", fontsize=10)
        ax2.axhline(100, color="black", lw=0.8, ls=":")
        ax2.set_ylabel(f"trunk {TRUNK[0]}-{TRUNK[1]} utilisation\n(busier direction, %)")
        ax2.set_ylim(0, 105)
        self._time_axes([ax, ax2])
        return fig

    def plot_load(self, path: str) -> str:
        from routerd.sim import plotstyle as ps

        fig = self.load_figure()
        fig.savefig(path)
        ps.pyplot().close(fig)
        return path


def _on_term(signum: int, frame: Any) -> None:
    raise _Stop()


def _nanmean_weighted(se: Mapping[str, Any], mask: Any) -> float:
    """Mean delivery time over the bins in ``mask``, weighted by deliveries."""
    import numpy as np

    c = np.asarray(se["delivered"], dtype=float)
    md = np.asarray(se["mean_delivery_s"], dtype=float)
    ok = mask & (c > 0) & np.isfinite(md)
    return float((md[ok] * c[ok]).sum() / c[ok].sum()) if ok.any() else math.nan


def _pct_lost(v: float) -> str:
    """A lost share in percent that never rounds a loss to zero: 0%, 0.003%, 5.6%."""
    if not (isinstance(v, (int, float)) and math.isfinite(v)):
        return "n/a"
    if v == 0:
        return "0%"
    return f"{v * 100:.2g}%" if v < 0.001 else f"{v * 100:.1f}%"


def _share(f: Mapping[str, Any]) -> str:
    """" (2.5% of those offered)" beside a count of lost packets; nothing when none."""
    v = f.get("lost_share", math.nan)
    if f.get("lost", 0) == 0 or not (isinstance(v, float) and math.isfinite(v)):
        return ""
    return f" ({_pct_lost(v)} of those offered)"


def _packets(n: int) -> str:
    return "1 packet" if n == 1 else f"{n} packets"


def _msv(v: float) -> str:
    if not math.isfinite(v):
        return "n/a"
    return f"{v * 1e3:.1f} ms" if v < 1 else f"{v:.2f} s"


def _clean(v: Any) -> Any:
    """JSON has no NaN or infinity: null instead."""
    if isinstance(v, float) and not math.isfinite(v):
        return None
    if isinstance(v, Mapping):
        return {str(k): _clean(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [_clean(x) for x in v]
    return v


def _wrap(text: str, width: int = 92) -> str:
    import textwrap

    return textwrap.fill(text, width)


__all__: Sequence[str] = ("FILES", "PARTIAL_FILES", "Demo", "configure", "run")
