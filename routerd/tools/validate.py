"""``routerd validate FILE...``: check config, topology and scenario files as the commands
that read them would.

Prints ``OK`` and a one-line summary per good file, or every problem found, each naming
the file, the key path or element, the bad value and the rule.  Exit 1 if any file is bad;
exit 2 for bad usage.

The file's kind is told from its content: a mapping with a ``topology`` mapping holding
``nodes`` is a topology; one with a ``scenario`` key is a scenario; one with an
``underlay`` key is an agent's underlay map (its form; node names are checked through a
config that names it with its topology); other mappings are configs.  GraphML and node-link JSON files are topologies.  An empty file, a directory or
a binary file is a problem, not a config of defaults.

What a config gets (what ``serve``, ``agent``, ``simulate`` ... check before they start):
the schema (values, ranges, endpoints and addresses), its paths by the one input rule
(:mod:`routerd.io.inputs`: relative to the config's folder), the topology it names with
its link defaults, the CURVE key and allow files (both or neither; the allow file's nodes
against the topology), and the agent's underlay map against the topology.  Files given
together are checked together: a scenario must fit a topology on the command line (or
named by a config there) — its links must be links of it (of one of them, when several
are given).
"""
from __future__ import annotations

import argparse
import os
import sys
from typing import Any

from routerd.core.errors import InputError, Problem
from routerd.core.topology import Topology, from_mapping
from routerd.io import config as _config
from routerd.io import inputs as _inputs
from routerd.io import topofiles
from routerd.io.files import read_yaml


def configure(p: argparse.ArgumentParser) -> None:
    p.add_argument("files", nargs="*", metavar="FILE", help="config, topology or scenario files "
                   "(topohub:GROUP/NAME references work too); files given together are "
                   "cross-checked (a scenario against the topologies)")
    p.add_argument("--capacity-bps", type=float, default=None,
                   help="capacity for topology links that give none (as topology.default_capacity_bps)")
    p.add_argument("--buffer-pkts", type=int, default=None,
                   help="buffer for topology links that give none (as topology.default_buffer_pkts)")
    p.add_argument("--set", metavar="KEY=VALUE", action="append", default=[], dest="overrides",
                   help="override one setting of every config checked (repeatable)")
    p.add_argument("--schema", action="store_true", help="print every config setting with its default and range")


def kind_of(path: str) -> tuple[str, Any]:
    """('topology' | 'scenario' | 'config', parsed document or None)."""
    if path.startswith("topohub:"):
        return "topology", None
    ext = os.path.splitext(path)[1].lower()
    if ext in (".graphml", ".json"):
        return "topology", None
    doc = read_yaml(path)
    if doc is None:
        raise InputError(Problem(path, None, "is empty: not a config, topology or scenario "
                                 "(an empty --config would silently run on the defaults)"))
    if isinstance(doc, dict) and isinstance(doc.get("topology"), dict) and "nodes" in doc["topology"]:
        return "topology", doc
    if isinstance(doc, dict) and "scenario" in doc:
        return "scenario", doc
    if isinstance(doc, dict) and "underlay" in doc:
        return "underlay", doc
    if isinstance(doc, dict) and "topology" not in doc and ("nodes" in doc or "links" in doc):
        # a topology written without its top-level `topology:` key: say that, rather than
        # calling every key an unknown config setting
        raise InputError(Problem(path, sorted(k for k in ("nodes", "links") if k in doc),
                                 "are topology keys at the top level: a topology file puts "
                                 "name, nodes, links and defaults under 'topology:'"))
    return "config", doc


class Checked:
    """What one file turned out to be (for the cross-checks)."""

    def __init__(self, path: str, kind: str, summary: str, topo: Topology | None = None,
                 scenario: Any = None):
        self.path, self.kind, self.summary, self.topo, self.scenario = path, kind, summary, topo, scenario


def _flags(args: argparse.Namespace) -> argparse.Namespace:
    return argparse.Namespace(capacity_bps=getattr(args, "capacity_bps", None),
                              buffer_pkts=getattr(args, "buffer_pkts", None),
                              overrides=list(getattr(args, "overrides", None) or []))


def check_file(path: str, args: argparse.Namespace | None = None) -> Checked:
    """One file checked as the commands would read it; raises InputError listing every
    problem otherwise.  ``args``: the command line's ``--capacity-bps``, ``--buffer-pkts``
    and ``--set``."""
    fl = _flags(args if args is not None else argparse.Namespace())
    kind, doc = kind_of(path)
    if kind == "topology":
        # link defaults by the one rule, from the command line (no config here)
        d = _inputs.link_defaults(_inputs.load_config(argparse.Namespace(
            capacity_bps=fl.capacity_bps, buffer_pkts=fl.buffer_pkts)))
        t = from_mapping(doc, source=path, defaults=d) if doc is not None else topofiles.load(path, d)
        return Checked(path, kind, t.summary(), topo=t)
    if kind == "scenario":
        from routerd.io import scenario as _scenario

        sc = _scenario.from_mapping(doc, source=path)
        return Checked(path, kind, sc.summary(), scenario=sc)
    if kind == "underlay":
        from routerd.agent.forwarder import underlay_entries  # the agent owns the format

        ents = underlay_entries(path)
        hosts = {addr[0] for _, _, pa, pb in ents for addr in (pa, pb)}
        return Checked(path, kind, f"underlay map: {len(ents)} link(s), {len(hosts)} host "
                       "address(es) (node names are checked through a config naming it with "
                       "its topology)")
        return Checked(path, kind, sc.summary(), scenario=sc)
    _config.from_mapping(doc, path)          # the schema, with this file's name on each problem
    cfg = _inputs.load_config(argparse.Namespace(config=path, **vars(fl)))
    topo = _inputs.load_topology(cfg)
    problems: list[Problem | str] = []
    problems += [Problem(f"{path}: {dict(_config.SERVICE_ENDPOINTS)[name]}", ep,
                         f"is also the {other} endpoint (routerd serve binds each once)")
                 for name, ep, other in _config.endpoint_clashes(cfg)]
    problems += _security_problems(cfg, topo)
    problems += _agent_problems(cfg, topo)
    if problems:
        raise InputError(problems)  # type: ignore[arg-type]
    changed = sum(1 for k, f in _config.SCHEMA.items() if cfg[k] != f.default)
    extra = f"; {topo.summary()}" if cfg["topology.file"] else ""
    why = _config.split_fits(cfg, topo.n)[1]    # what routerd serve would run on its topology
    if why is not None:
        extra += f"; on topology {topo.name!r}: {why}"
    if cfg["agent.underlay"]:
        from routerd.agent.forwarder import underlay_entries

        written = (doc.get("agent") or {}).get("underlay", cfg["agent.underlay"])
        extra += f"; underlay map {written}: {len(underlay_entries(cfg['agent.underlay']))} link(s)"
    return Checked(path, kind, f"config: {changed} setting(s) differ from the defaults{extra}",
                   topo=topo if cfg["topology.file"] else None)


def _security_problems(cfg: _config.Config, topo: Topology) -> list[Problem | str]:
    """The service's CURVE files, as ``serve`` checks them before it binds."""
    from routerd.io import security as _security

    out: list[Problem | str] = []
    try:
        sk, al = _security.check_pair(cfg)
        if sk is not None and al is not None:
            for fn, arg in ((_security.load_server_key, (sk,)), (_security.load_allow, (al, topo))):
                try:
                    fn(*arg)   # type: ignore[operator]
                except InputError as e:
                    out += e.problems
    except InputError as e:
        out += e.problems
    return out


def _agent_problems(cfg: _config.Config, topo: Topology) -> list[Problem | str]:
    """The agent's underlay map and CURVE files, as ``routerd agent`` reads them."""
    from routerd.io import security as _security

    out: list[Problem | str] = []
    if cfg["agent.underlay"]:
        from routerd.agent.forwarder import load_underlay

        try:
            ul = load_underlay(cfg["agent.underlay"], topo)
        except InputError as e:
            out += e.problems
        else:
            missing = sorted({tuple(sorted((topo.nodes[a], topo.nodes[b])))
                              for a, b in zip(topo.src.tolist(), topo.dst.tolist()) if (a, b) not in ul})
            if missing:   # an agent on either end would refuse to start
                out.append(Problem(f"{cfg['agent.underlay']}: underlay.links", [list(m) for m in missing],
                                   f"gives no addresses for these links of topology "
                                   f"{topo.name!r} (every link needs an entry)"))
    try:
        _security.client_keys(cfg["agent.client_key"], cfg["agent.server_key"], "agent")
    except InputError as e:
        out += e.problems
    return out


def cross_check(done: list[Checked]) -> dict[str, list[Problem | str]]:
    """Problems between files given together: a scenario must fit a topology on the
    command line (a config's included) — one of them when several are given (``validate
    configs/*.yaml``), else every problem against each is listed."""
    topos = [c for c in done if c.topo is not None]
    out: dict[str, list[Problem | str]] = {}
    for c in done:
        if c.scenario is None or not topos:
            continue
        misfits: list[Problem | str] = []
        for t in topos:
            try:
                c.scenario.link_events(t.topo)
                break                              # it fits this one
            except InputError as e:
                misfits += [f"{p} (with {t.path})" for p in dict.fromkeys(e.problems)]
        else:
            out[c.path] = misfits
    return out


def run(args: argparse.Namespace) -> int:
    if args.schema:
        print(_config.describe())
        return 0
    if not args.files:
        print("routerd validate: name at least one FILE (or --schema)", file=sys.stderr)
        return 2
    bad = 0
    done: list[Checked] = []
    failed: dict[str, list[Problem | str]] = {}
    for path in args.files:
        try:
            done.append(check_file(path, args))
        except InputError as e:
            failed[path] = list(e.problems)
    for path, probs in cross_check(done).items():
        failed.setdefault(path, []).extend(probs)
    summaries = {c.path: c.summary for c in done}
    for path in args.files:
        if path in failed:
            bad += 1
            print(f"{path}: {len(failed[path])} problem(s)")
            for p in failed[path]:
                print(f"  {p}")
        else:
            print(f"OK {path}: {summaries[path]}")
    return 1 if bad else 0
