"""``routerd validate FILE...``: check config, topology and scenario files.

Prints ``OK`` and a one-line summary per good file, or every problem found, each naming
the file, the key path or element, the bad value and the rule.  Exit 1 if any file is bad.

The file's kind is told from its content: a mapping with a ``topology`` mapping holding
``nodes`` is a topology; one with a ``scenario`` key is a scenario; one with an
``underlay`` key is an agent's underlay map (its form; node names are checked through a
config that names it); other mappings are configs.  GraphML and node-link JSON files are
topologies.  A config that names a topology file or an underlay map (``agent.underlay``,
relative to the config file) has it checked too, the underlay map against the topology.
"""
from __future__ import annotations

import argparse
import os
import sys
from typing import Any

from routerd.io import config as _config
from routerd.core import topology as _topology
from routerd.core.errors import InputError, Problem, read_yaml


def configure(p: argparse.ArgumentParser) -> None:
    p.add_argument("files", nargs="*", metavar="FILE", help="config, topology or scenario files "
                   "(topohub:GROUP/NAME references work too)")
    p.add_argument("--capacity-bps", type=float, default=None,
                   help="capacity for topology links that give none")
    p.add_argument("--buffer-pkts", type=int, default=None,
                   help="buffer for topology links that give none")
    p.add_argument("--schema", action="store_true", help="print every config setting with its default and range")


def kind_of(path: str) -> tuple[str, Any]:
    """('topology' | 'scenario' | 'config', parsed document or None)."""
    if path.startswith("topohub:"):
        return "topology", None
    ext = os.path.splitext(path)[1].lower()
    if ext in (".graphml", ".json"):
        return "topology", None
    doc = read_yaml(path)
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


def check_file(path: str, defaults: _topology.LinkDefaults) -> str:
    """Summary line for a good file; raises InputError listing every problem otherwise."""
    kind, doc = kind_of(path)
    if kind == "topology":
        if doc is not None:
            t = _topology.from_mapping(doc, source=path, defaults=defaults)
        else:
            t = _topology.load(path, defaults)
        return t.summary()
    if kind == "scenario":
        from routerd.io import scenario as _scenario  # the simulator owns the scenario format

        sc = _scenario.from_mapping(doc, source=path)
        return sc.summary()
    if kind == "underlay":
        from routerd.agent.forwarder import underlay_entries  # the agent owns the format

        ents = underlay_entries(path)
        hosts = {addr[0] for _, _, pa, pb in ents for addr in (pa, pb)}
        return (f"underlay map: {len(ents)} link(s), {len(hosts)} host address(es) "
                "(node names are checked through a config naming it with its topology)")
    cfg = _config.from_mapping(doc, path)
    tfile = cfg["topology.file"]
    extra = ""
    if tfile:
        base = os.path.dirname(path)
        tpath = tfile if tfile.startswith("topohub:") or os.path.isabs(tfile) else os.path.join(base, tfile)
        d = _topology.LinkDefaults(
            cfg["topology.default_capacity_bps"] if cfg["topology.default_capacity_bps"] else defaults.capacity_bps,
            cfg["topology.default_buffer_pkts"] if cfg["topology.default_buffer_pkts"] else defaults.buffer_pkts,
        )
        topo = _topology.load(tpath, d)
        extra = "; " + topo.summary()
    else:
        topo = None
    if cfg["agent.underlay"]:
        from routerd.agent.forwarder import load_underlay, underlay_entries

        u = cfg["agent.underlay"]
        upath = u if os.path.isabs(u) else os.path.join(os.path.dirname(path), u)
        if topo is not None:
            ul = load_underlay(upath, topo)
            missing = sorted({tuple(sorted((topo.nodes[a], topo.nodes[b])))
                              for a, b in zip(topo.src.tolist(), topo.dst.tolist()) if (a, b) not in ul})
            if missing:   # an agent on either end would refuse to start
                raise InputError(Problem(f"{upath}: underlay.links", [list(m) for m in missing],
                                         f"gives no addresses for these links of topology "
                                         f"{topo.name!r} (every link needs an entry)"))
            n = len(ul) // 2
        else:
            n = len(underlay_entries(upath))
        extra += f"; underlay map {u}: {n} link(s)"
    changed = sum(1 for k, f in _config.SCHEMA.items() if cfg[k] != f.default)
    return f"config: {changed} setting(s) differ from the defaults{extra}"


def run(args: argparse.Namespace) -> int:
    if args.schema:
        print(_config.describe())
        return 0
    if not args.files:
        print("routerd validate: name at least one FILE (or --schema)", file=sys.stderr)
        return 2
    defaults = _topology.LinkDefaults(args.capacity_bps, args.buffer_pkts)
    bad = 0
    for path in args.files:
        try:
            summary = check_file(path, defaults)
        except InputError as e:
            bad += 1
            print(f"{path}: {len(e.problems)} problem(s)")
            for p in e.problems:
                print(f"  {p}")
            continue
        print(f"OK {path}: {summary}")
    return 1 if bad else 0
