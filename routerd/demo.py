"""``routerd demo``: the whole job in one command, with nothing configured, in under a minute.

Owns: the demo's flow, its live progress line, its side-by-side table, its two plots and
its reading of the result.  The lab and the scenario are packaged data of our own
invention (``routerd/data/demo-lab.yaml``, ``routerd/data/demo-scenario.yaml``); the
service, the closed loop and the simulator are the real ones (``routerd serve`` as a
child process, :mod:`sim.closedloop`, :func:`sim.run.run`).
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

from .cautions import CAUTIONS
from .errors import InputError

#: the demo's base rate: the scenario's load factors multiply it (1000-byte packets)
BASE_RATE_PPS = 1300.0
#: the scenario file's times are written for this many seconds; --duration stretches them
SCENARIO_SPAN_S = 30.0
DEFAULT_DURATION_S = 30.0
#: the trunk of the demo lab: the congested bottleneck the plots and the reading follow
TRUNK = ("w3", "e3")
#: the detour's links out of each hall (cross-hall traffic that avoids the trunk)
DETOUR_ENTRIES = (("w6", "r1"), ("w5", "r3"), ("e6", "r2"), ("e5", "r4"))
POLICIES = ("shortest", "qrouting", "service", "reroute")
LABELS = {"shortest": "shortest (static)", "reroute": "reroute (recomputed on failure)",
          "qrouting": "qrouting (in process)", "service": "service (live, ZeroMQ)"}
COLOURS = {"shortest": "tab:grey", "reroute": "tab:brown", "qrouting": "tab:blue",
           "service": "tab:orange"}

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


def run(args: argparse.Namespace) -> int:
    problems = []
    if not (math.isfinite(args.duration) and 2.0 <= args.duration <= 3600.0):
        problems.append(f"--duration: {args.duration:g} must be between 2 and 3600 seconds")
    if not (math.isfinite(args.speed) and 0.01 <= args.speed <= 1000):
        problems.append(f"--speed: {args.speed:g} must be between 0.01 and 1000")
    if problems:
        print("routerd demo: " + "; ".join(problems), file=sys.stderr)
        return 2
    try:
        import matplotlib  # noqa: F401
    except ImportError:
        print("routerd demo: the plots need matplotlib: pip install 'routerd[plot]'", file=sys.stderr)
        return 2
    demo = Demo(os.path.abspath(args.out), args.duration, args.seed, args.speed)
    try:
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
    import yaml

    doc = yaml.safe_load(packaged("demo-scenario.yaml"))
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
        self.duration = duration_s
        self.stream = stream or sys.stdout
        self.tty = bool(getattr(self.stream, "isatty", lambda: False)())
        self.prev = 0
        self.last_line = ""
        self.shown = False

    def line(self, view: Mapping[str, Any], route_changes: int | None, explore: float,
             trunk_util: float | None, events: str) -> str:
        from sim.core import percentile

        dl = view["deliveries"]
        recent = sorted(dl[self.prev:])
        self.prev = len(dl)
        mean = sum(recent) / len(recent) if recent else math.nan
        p99 = percentile(recent, 0.99)
        lost = view["dropped"] + view["ttl_expired"]
        rc = "-" if route_changes is None else f"{route_changes}"
        tu = "" if trunk_util is None else f" | trunk {trunk_util * 100:3.0f}%"
        return (f"t {view['t_s']:5.1f}/{self.duration:g} s | delivered {view['delivered']:7d} "
                f"lost {lost:5d} | last s: mean {_ms(mean)} p99 {_ms(p99)} | "
                f"route changes {rc:>5} | exploring {explore * 100:4.1f}%{tu}"
                + (f" | {events}" if events else ""))

    def show(self, text: str) -> None:
        self.last_line = text
        self.shown = True
        try:
            if self.tty:
                self.stream.write("\r\033[K" + text)
            else:
                self.stream.write(text + "\n")
            self.stream.flush()
        except (OSError, ValueError):
            pass

    def done(self) -> None:
        if self.tty and self.shown:
            try:
                self.stream.write("\n")
                self.stream.flush()
            except (OSError, ValueError):
                pass


def _ms(v: float) -> str:
    return "   n/a  " if not math.isfinite(v) else f"{v * 1e3:6.1f} ms"


# ---- the demo -------------------------------------------------------------------------------
class Demo:
    def __init__(self, out: str, duration_s: float, seed: int, speed: float):
        self.out = out
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

    def spec(self, policy: str) -> dict[str, Any]:
        return {"policy": policy, "rate_pps": BASE_RATE_PPS, "duration_s": self.duration,
                "seed": self.seed, "scenario": self.scenario_doc, "warmup_s": 0.0,
                "overrides": (f"sim.service.speed={self.speed:g}",), "series": True}

    def main(self) -> int:
        from routerd import config as _config
        from routerd import topology as _topology
        from sim import closedloop
        from sim import scenario as _scenario

        self._prepare_out()
        self.scenario_doc = stretched_scenario(self.duration)
        self.scenario = _scenario.from_mapping(self.scenario_doc, source="demo-scenario.yaml")
        self._write_text("scenario.yaml", self._scenario_yaml())
        cfg = _config.load(None, [f"sim.service.speed={self.speed:g}"])
        with resources.as_file(resources.files("routerd") / "data" / "demo-lab.yaml") as p:
            self.topo = _topology.load(str(p))
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
                transport="tcp", overrides=closedloop.service_overrides(cfg, durable=True))
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
            from sim.run import run as run_sim

            for pol in ("shortest", "reroute", "qrouting"):
                self.results[pol] = run_sim(self.spec(pol))
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
        from sim import closedloop
        from sim.run import run as run_sim

        prog = self.progress_obj = Progress(self.duration)
        trunk = [self.topo.link(*TRUNK), self.topo.link(TRUNK[1], TRUNK[0])]
        state: dict[str, int | None] = {"rc": None}
        self.policy = closedloop.ServicePolicy(process=self.proc)

        def observe(view: dict[str, Any]) -> None:
            self.view = view
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

        self.results["service"] = run_sim(self.spec("service"), policy=self.policy,
                                          observer=observe)
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
        from sim.commands_simulate import write_outputs

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
        topo = os.path.join(self.out, "service", "topology.yaml")
        print(f"replay the run offline (or try other settings with --compare KEY=VALUE): "
              f"routerd replay {self.state_dir} --topology {topo} --out "
              f"{os.path.join(self.out, 'replay')}")
        print(f"bring the service back from that state and scrape it again: routerd serve "
              f"--topology {topo} --state-dir {self.state_dir} --metrics 127.0.0.1:9307")

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
        from sim.core import percentile

        v = self.view
        if v is not None and "service" not in self.results:
            dl = v["deliveries"]
            srt = sorted(dl)
            se = v["series"]
            m = len(se["t_s"])
            summary = {
                "policy": "service", "interrupted": True, "reached_s": v["t_s"],
                "duration_s": self.duration, "seed": self.seed, "rate_pps": BASE_RATE_PPS,
                "delivered": v["delivered"], "dropped": v["dropped"],
                "ttl_expired": v["ttl_expired"], "in_network": v["in_network"],
                "mean_delivery_s": sum(dl) / len(dl) if dl else math.nan,
                "p50_delivery_s": percentile(srt, 0.5), "p99_delivery_s": percentile(srt, 0.99),
            }
            series = {
                "t_s": list(se["t_s"][:m]), "delivered": list(se["delivered"][:m]),
                "mean_delivery_s": [s / c if c else math.nan
                                    for s, c in zip(se["delivery_sum_s"][:m], se["delivered"][:m])],
                "dropped": list(se["dropped"][:m]), "ttl_expired": list(se["ttl_expired"][:m]),
                "in_network": list(se["in_network"][:m]), "link_util": list(se["link_util"][:m]),
                "interval_s": 1.0,
            }
            self.results["service"] = {"summary": summary, "series": series}
            with open(self._path("runs/service/summary.json"), "w", encoding="utf-8") as fh:
                json.dump(_clean(summary), fh, indent=2, sort_keys=True)
                fh.write("\n")
            self.written.append(self._path("runs/service/summary.json"))
            self._write_series(series, self._path("runs/service/series.csv"))
        if self.results:
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
                                            for a, b, e in downs]}
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
            f = {
                "mean_delivery_s": s["mean_delivery_s"],
                "p99_delivery_s": s["p99_delivery_s"],
                "delivered": s["delivered"], "offered": s["offered"],
                "lost": s["dropped"] + s["ttl_expired"],
                "lost_during_failure": int(lost[in_out].sum()) if in_out.any() else 0,
                "peak_mean_delivery_s": _nanmean_weighted(se, peak),
                # transmissions are booked at enqueue: a saturated second can read above 1
                "trunk_util_peak": (float(np.minimum(util[peak][:, trunk].max(axis=1), 1.0).mean())
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

        return [
            row("mean delivery (ms)", "mean_delivery_s", ms),
            row("p99 delivery (ms)", "p99_delivery_s", ms),
            row("mean delivery at peak load (ms)", "peak_mean_delivery_s", ms),
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
                         f" and they lost {sh['lost']} packets")
        else:
            parts.append(f"Static shortest paths kept the trunk {TRUNK[0]}-{TRUNK[1]} at "
                         f"{sh['trunk_util_peak'] * 100:.0f}% {peak}, a mean delivery time of "
                         f"{_msv(sh['mean_delivery_s'])} and {sh['lost']} packets lost")
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
        if ratio > 1.05:
            parts.append(f"The learner, in process, sent {q['detour_share'] * 100:.0f}% of the "
                         f"packets leaving the halls over the detour instead of the trunk "
                         f"(static routes: {sh['detour_share'] * 100:.0f}%, the relays' own "
                         f"traffic) and delivered in "
                         f"{_msv(q['mean_delivery_s'])} on average (p99 {_msv(q['p99_delivery_s'])}), "
                         f"{ratio:.1f} times faster, losing {q['lost']} packets.")
        else:
            parts.append(f"The learner, in process, did no better here: "
                         f"{_msv(q['mean_delivery_s'])} on average (p99 {_msv(q['p99_delivery_s'])}),"
                         f" {q['lost']} packets lost.")
        rel = (sv["mean_delivery_s"] - q["mean_delivery_s"]) / q["mean_delivery_s"]
        close = abs(rel) <= 0.1
        parts.append(f"The live service, learning from the simulator's hop reports over ZeroMQ "
                     f"at {self.speed:g}x real time, delivered in {_msv(sv['mean_delivery_s'])} "
                     f"(p99 {_msv(sv['p99_delivery_s'])}), {abs(rel) * 100:.1f}% "
                     f"{'above' if rel > 0 else 'below'} the in-process learner"
                     + (" — the same behaviour" if close else " — a real difference") +
                     f", with {int(sv['route_changes'])} route changes and "
                     f"{sv['exploration_share'] * 100:.1f}% of traffic exploring at the end.")
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
        return " ".join(parts)

    # -- plots ---------------------------------------------------------------------------------
    def plot_delivery(self, path: str) -> str:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
        import numpy as np

        fig, (ax, ax2) = plt.subplots(2, 1, figsize=(9, 6.5), dpi=100, sharex=True,
                                      gridspec_kw={"height_ratios": [3, 1.3]})
        top = 1e-3
        lost_top = 1.0
        for pol in POLICIES:
            if pol not in self.results:
                continue
            se = self.results[pol]["series"]
            t = np.asarray(se["t_s"], dtype=float)
            md = np.asarray(se["mean_delivery_s"], dtype=float) * 1e3
            lost = np.asarray(se["dropped"], dtype=float) + np.asarray(se["ttl_expired"], dtype=float)
            iv = float(se.get("interval_s", 1.0))
            ls = "--" if pol == "service" else "-"      # it lies on top of qrouting's line
            ax.plot(t - iv / 2, md, marker=".", ls=ls, color=COLOURS[pol], label=LABELS[pol])
            ax2.step(t - iv / 2, lost, where="mid", ls=ls, color=COLOURS[pol], label=LABELS[pol])
            if np.isfinite(md).any():
                top = max(top, float(np.nanmax(md)))
            if lost.size:
                lost_top = max(lost_top, float(lost.max()))
        ax.set_yscale("log")
        ax.set_ylim(bottom=1.0, top=top * 2.0)
        ax.set_ylabel("mean delivery time per second (ms, log)")
        for a, b, ends in self._downs():
            for axx in (ax, ax2):
                axx.axvspan(a, b, color="tab:red", alpha=0.08)
                axx.axvline(a, color="tab:red", lw=1, ls="--")
                axx.axvline(b, color="tab:green", lw=1, ls="--")
            ax.text(a, top * 1.6, f" {ends[0]}-{ends[1]} fails", color="tab:red", fontsize=8, va="top")
            ax.text(b, top * 1.6, " recovers", color="tab:green", fontsize=8, va="top")
        peak_from = max((c.end_s for c in self.scenario.load), default=0.0)
        if peak_from > 0:
            ax.axvline(peak_from, color="grey", lw=1, ls=":")
            ax.text(peak_from, 1.1, " peak load", color="grey", fontsize=8)
        ax.legend(loc="upper left", fontsize=8)
        ax.grid(alpha=0.3, which="both")
        ax2.set_ylabel("packets lost\nper second")
        ax2.set_xlabel("time (s)")
        ax2.set_ylim(0, lost_top * 1.1)
        ax2.set_xlim(0, self.duration)
        ax2.grid(alpha=0.3)
        ax.set_title(f"routerd demo: delivery time on {self.topo.name}, scenario "
                     f"{self.scenario.name}, seed {self.seed}"
                     + (" (interrupted)" if "service" in self.results
                        and self.results["service"]["summary"].get("interrupted") else ""),
                     fontsize=10)
        fig.tight_layout()
        fig.savefig(path)
        plt.close(fig)
        return path

    def plot_load(self, path: str) -> str:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
        import numpy as np

        topo = self.topo
        trunk = [topo.link(*TRUNK), topo.link(TRUNK[1], TRUNK[0])]
        fig, (ax, ax2) = plt.subplots(2, 1, figsize=(9, 6.5), dpi=100, sharex=True)
        tt = np.linspace(0.0, self.duration, 600)
        ax.plot(tt, BASE_RATE_PPS * self.scenario.factor(tt), color="black", lw=2,
                label="offered load (scenario)")
        for pol in POLICIES:
            se = self.results[pol]["series"]
            t = np.asarray(se["t_s"], dtype=float)
            iv = float(se.get("interval_s", 1.0))
            ls = "--" if pol == "service" else "-"      # it lies on top of qrouting's line
            ax.plot(t - iv / 2, np.asarray(se["delivered"], dtype=float) / iv, color=COLOURS[pol],
                    marker=".", lw=1, ls=ls, label=f"delivered: {LABELS[pol]}")
            util = np.asarray(se["link_util"], dtype=float)
            # the simulator books a packet's transmission when it enters the queue, so a
            # saturated link's "busy" share of a second can exceed 1: shown as 100%
            ax2.plot(t - iv / 2, np.minimum(util[:, trunk].max(axis=1), 1.0) * 100,
                     color=COLOURS[pol], marker=".", ls=ls, label=LABELS[pol])
        ax.set_ylabel("packets/s")
        ax.set_ylim(bottom=0)
        ax.legend(loc="lower right", fontsize=8)
        ax.grid(alpha=0.3)
        ax.set_title(f"load curve: offered and delivered packets/s; trunk {TRUNK[0]}-{TRUNK[1]} "
                     f"utilisation", fontsize=10)
        ax2.axhline(100, color="black", lw=0.8, ls=":")
        ax2.set_ylabel(f"trunk {TRUNK[0]}-{TRUNK[1]} utilisation\n(busier direction, %; 100 = saturated)")
        ax2.set_ylim(0, 110)
        ax2.set_xlabel("time (s)")
        for a, b, ends in self._downs():
            for axx in (ax, ax2):
                axx.axvspan(a, b, color="tab:red", alpha=0.08)
            ax.text((a + b) / 2, 60, f"{ends[0]}-{ends[1]} down", color="tab:red", fontsize=8,
                    ha="center")
        ax2.grid(alpha=0.3)
        fig.tight_layout()
        fig.savefig(path)
        plt.close(fig)
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
