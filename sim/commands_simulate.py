"""``routerd simulate``: run the packet-level simulator once and write its results.

Owns: the command's options and its output files (``summary.json``, ``series.csv``,
``links.csv``, with ``--plot`` ``delivery.png`` and ``utilisation.png``), and what Ctrl-C
does: the first SIGINT ends the run between two events (:class:`routerd.sim.core.StopRequest`)
and everything up to there is written as usual, marked partial (``interrupted: true`` and
``reached_s`` in ``summary.json``, ``PARTIAL`` on stdout), exit 130; a second one, or one
before the simulation is under way, interrupts at once (exit 130, nothing written).
Must not import at module level: matplotlib (only ``--plot`` needs it).
"""
from __future__ import annotations

import argparse
import csv
import json
import math
import os
import signal
import sys
import threading
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

from routerd.core.errors import InputError
from routerd.io.files import output_dir

from . import policies as _policies
from .core import StopRequest
from .run import SimSpec
from .run import run as run_sim

#: the exit status of a run ended by Ctrl-C (128 + SIGINT, as a shell reports it)
EXIT_INTERRUPTED = 130


@contextmanager
def ctrl_c_stops(stop: StopRequest) -> Iterator[None]:
    """While inside: SIGINT asks ``stop`` to end the run (the main thread only; elsewhere
    Ctrl-C keeps its default meaning)."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    old = signal.signal(signal.SIGINT, lambda signum, frame: stop.request())
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, old)


def add_topology_option(p: argparse.ArgumentParser) -> None:
    """--topology, as simulate and sweep take it."""
    p.add_argument("--topology", metavar="FILE", default=None,
                   help="topology file (.yaml, .graphml, .json) or topohub:GROUP/NAME; "
                        "default: the config's topology.file, else the built-in demo lab")


def add_packet_options(p: argparse.ArgumentParser) -> None:
    """--packet-bytes and --size-dist, as simulate and sweep take them."""
    p.add_argument("--packet-bytes", metavar="B", type=float, default=1000.0,
                   help="packet size in bytes (the mean with --size-dist exp; default 1000)")
    p.add_argument("--size-dist", choices=("fixed", "exp"), default="fixed",
                   help="packet sizes fixed or exponentially distributed (default fixed)")


def add_config_options(p: argparse.ArgumentParser, set_help: str) -> None:
    """--config, --set, --capacity-bps and --buffer-pkts, as simulate and sweep take them."""
    p.add_argument("--config", metavar="FILE", default=None, help="routerd config file")
    p.add_argument("--set", metavar="KEY=VALUE", action="append", default=[], dest="overrides",
                   help=set_help)
    p.add_argument("--capacity-bps", type=float, default=None,
                   help="capacity for links whose topology gives none (topohub files)")
    p.add_argument("--buffer-pkts", type=int, default=None,
                   help="buffer for links whose topology gives none (topohub files)")


def configure(p: argparse.ArgumentParser) -> None:
    add_topology_option(p)
    p.add_argument("--policy", required=True, metavar="NAME",
                   help=f"routing policy: {', '.join(_policies.NAMES)}; service[:ENDPOINTS] drives a "
                        "live routerd serve (started for the run, or the one at "
                        "ingest=EP,publish=EP,control=EP)")
    p.add_argument("--rate", metavar="PPS", type=float, default=None,
                   help="network-wide injection rate, packets/s (Poisson); needed unless --traffic")
    p.add_argument("--duration", metavar="S", type=float, default=None,
                   help="virtual seconds to simulate (needed unless --traffic; with it, default: "
                        "the trace's span + 1 s)")
    p.add_argument("--seed", metavar="N", type=int, required=True,
                   help="random seed: same inputs and seed give the same summary")
    add_packet_options(p)
    p.add_argument("--warmup", metavar="S", type=float, default=None,
                   help="statistics cover packets injected after this (default: a tenth of --duration)")
    p.add_argument("--scenario", metavar="FILE", default=None,
                   help="scenario YAML: load steps, ramps, bursts and link events")
    p.add_argument("--demands", action="store_true",
                   help="pick source and destination in proportion to the topology's demand matrix "
                        "(default: uniform over distinct pairs)")
    p.add_argument("--plot", action="store_true", help="also draw PNGs (needs matplotlib)")
    p.add_argument("--out", metavar="DIR", required=True, help="output directory (created)")
    add_config_options(p, "override one config setting, e.g. --set sim.feedback=instant "
                          "(repeatable)")
    p.add_argument("--quiet", action="store_true", help="no progress on stderr")
    p.add_argument("--speed", metavar="X", type=float, default=None,
                   help="with --traffic: replay the trace X times faster (its timestamps and "
                        "--link-trace's divided by X); else --policy service: virtual seconds per "
                        "wall-clock second (default 1, real time; same as --set sim.service.speed=X)")
    p.add_argument("--traffic", metavar="FILE", default=None,
                   help="trace-driven traffic instead of Poisson: a pcap or pcapng capture, or a CSV "
                        "or JSON-lines flow log (time,source,destination,bytes)")
    p.add_argument("--address-map", metavar="FILE", default=None,
                   help="YAML: node name -> list of IP addresses or CIDR prefixes (for --traffic)")
    p.add_argument("--allow-truncated", action="store_true",
                   help="use the packets before the point where a capture is cut short or corrupt")
    p.add_argument("--link-trace", metavar="FILE", default=None,
                   help="per-link delays over time, CSV t_s,from,to,delay_s (from routerd replay "
                        "--export-link-trace, or your own)")


def spec_from_args(args: argparse.Namespace) -> SimSpec:
    return SimSpec(
        policy=args.policy, rate_pps=args.rate, duration_s=args.duration, seed=args.seed,
        topology=args.topology, packet_bytes=args.packet_bytes, size_dist=args.size_dist,
        warmup_s=args.warmup, scenario=args.scenario, demands=args.demands,
        config=args.config, capacity_bps=args.capacity_bps,
        overrides=tuple(args.overrides) + ((f"sim.service.speed={args.speed}",)
                                           if getattr(args, "speed", None) is not None
                                           and getattr(args, "traffic", None) is None else ()),
        traffic=getattr(args, "traffic", None), address_map=getattr(args, "address_map", None),
        trace_speed=(args.speed if getattr(args, "traffic", None) is not None
                     and getattr(args, "speed", None) is not None else 1.0),
        allow_truncated=getattr(args, "allow_truncated", False),
        link_trace=getattr(args, "link_trace", None),
        buffer_pkts=args.buffer_pkts, series=True, progress=not args.quiet,
    )


def _clean(v: Any) -> Any:
    """JSON has no NaN: write null for statistics that do not exist (no deliveries)."""
    if isinstance(v, float) and not math.isfinite(v):
        return None
    return v


def write_outputs(result: dict[str, Any], out: str) -> list[str]:
    os.makedirs(out, exist_ok=True)
    written = []
    path = os.path.join(out, "summary.json")
    with open(path, "w", encoding="utf-8") as fh:
        json.dump({k: _clean(v) for k, v in result["summary"].items()}, fh, indent=2, sort_keys=True)
        fh.write("\n")
    written.append(path)
    links = result["links"]
    s = result["series"]
    path = os.path.join(out, "series.csv")
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(["t_s", "delivered", "mean_delivery_s", "dropped", "ttl_expired", "in_network"]
                   + [f"util:{ln['from']}->{ln['to']}" for ln in links])
        for i, t in enumerate(s["t_s"]):
            md = s["mean_delivery_s"][i]
            w.writerow([f"{t:.6g}", s["delivered"][i], "" if not math.isfinite(md) else f"{md:.6g}",
                        s["dropped"][i], s["ttl_expired"][i], s["in_network"][i]]
                       + [f"{u:.4f}" for u in s["link_util"][i]])
    written.append(path)
    path = os.path.join(out, "links.csv")
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(["from", "to", "capacity_bps", "delay_s", "utilisation", "packets"])
        for ln in links:
            w.writerow([ln["from"], ln["to"], f"{ln['capacity_bps']:.6g}", f"{ln['delay_s']:.6g}",
                        f"{ln['utilisation']:.4f}", ln["packets"]])
    written.append(path)
    return written


#: a run that injects at least this many packets is announced as long before it starts
LONG_RUN_PACKETS = 1e8

def announce_long_run(command: str, packets: float, what: str, ctrl_c: str) -> None:
    """Say on stderr, before it starts, that a run injects :data:`LONG_RUN_PACKETS` or more:
    a slip of the exponent (1e9 for 1e3) would otherwise look like a hang.  ``what`` follows
    the packet count, ``ctrl_c`` says what Ctrl-C does (``routerd simulate`` and ``routerd
    sweep`` word both their own way)."""
    if math.isfinite(packets) and packets >= LONG_RUN_PACKETS:
        print(f"routerd {command}: about {packets:.3g} packets to inject {what} (the compiled "
              f"loop does a few million hops a second); Ctrl-C {ctrl_c} what has finished",
              file=sys.stderr)


#: problems printed before the rest are summarised in one line
SHOW_PROBLEMS = 12


def report_problems(e: InputError) -> None:
    probs = e.problems
    print(f"routerd simulate: {len(probs)} problem(s)", file=sys.stderr)
    for p in probs[:SHOW_PROBLEMS]:
        print(f"  {p}", file=sys.stderr)
    if len(probs) > SHOW_PROBLEMS:
        print(f"  ... and {len(probs) - SHOW_PROBLEMS} more (routerd validate lists them all)",
              file=sys.stderr)
    if any("no default was given" in str(p) for p in probs):
        print("hint: --capacity-bps and --buffer-pkts give links without those values a default "
              "(topohub topologies carry none)", file=sys.stderr)


def run(args: argparse.Namespace) -> int:
    if getattr(args, "traffic", None) is not None and (args.rate is not None or args.demands):
        # routerd.sim.trace: the trace decides what is sent when; a rate would be silently ignored
        print("routerd simulate: --rate and --demands do not apply with --traffic (the trace "
              "sets the packets; --speed scales its timing)", file=sys.stderr)
        return 2
    spec = spec_from_args(args)
    stop = StopRequest()
    announce_long_run("simulate", (args.rate or 0.0) * (args.duration or 0.0),
                      "(--rate x --duration): a long run", "ends it and keeps")
    try:
        output_dir(args.out)          # before the run: an unusable --out must not lose it
        with ctrl_c_stops(stop):
            result = run_sim(spec, stop=stop)
    except InputError as e:
        report_problems(e)
        return 2
    s = result["summary"]
    for note in result.get("notes", ()):
        print(f"routerd simulate: note: {note}", file=sys.stderr)
    partial = bool(s.get("interrupted"))
    written = write_outputs(result, args.out)
    if args.plot:
        try:
            from . import plots
        except ImportError as e:  # matplotlib missing
            print(f"routerd simulate: --plot needs matplotlib ({e})", file=sys.stderr)
            return 2
        from .run import load_inputs

        _, topo, _ = load_inputs(spec)
        written += plots.draw_all(result, topo, args.out)
    if partial:
        print(f"PARTIAL: interrupted at t={s['reached_s']:.2f} of {s['duration_s']:g} s; the "
              f"figures and files cover the run up to there"
              + (f" (still in the {s['warmup_s']:g} s warm-up: no packet was measured)"
                 if s["reached_s"] <= s["warmup_s"] else ""))
    print(f"{s['policy']} on {s['topology']}: offered {s['offered']}, delivered {s['delivered']}, "
          f"dropped {s['dropped']}, ttl expired {s['ttl_expired']}; mean delivery "
          f"{_ms(s['mean_delivery_s'])} (p99 {_ms(s['p99_delivery_s'])}), "
          f"{lost_text(s)}; {s['events']} events in {s['wall_s']:.2f} s")
    for line in result.get("trace_lines", ()):   # routerd.sim.trace: what the trace could not inject
        print(line)
    for p in written:
        print(f"wrote {p}" + (" (partial)" if partial else ""))
    return EXIT_INTERRUPTED if partial else 0


def lost_share(summary: dict[str, Any]) -> float:
    """Dropped and TTL-expired packets over offered ones (after the warm-up; NaN when
    nothing was offered)."""
    off = summary.get("offered") or 0
    return (summary["dropped"] + summary["ttl_expired"]) / off if off else math.nan


def lost_text(summary: dict[str, Any]) -> str:
    """"lost 2.5%", and when packets were lost, that delivery times leave them out."""
    ls = lost_share(summary)
    if not math.isfinite(ls):
        return "lost n/a"
    if ls == 0:
        return "lost 0%"
    return f"lost {ls * 100:.{1 if ls >= 0.001 else 3}f}% (delivery times cover delivered packets only)"


def _ms(v: float) -> str:
    return "n/a" if not math.isfinite(v) else f"{v * 1e3:.3f} ms"
