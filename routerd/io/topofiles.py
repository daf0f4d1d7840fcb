"""Topology files: the readers of every format a topology comes in.

Owns: :func:`load` (a path or a ``topohub:GROUP/NAME`` reference, told apart by its
extension: our YAML format, GraphML, networkx node-link JSON), :func:`load_graphml`,
:func:`from_node_link` (topohub's flavour included: edge ``dist`` in km becomes
propagation delay at 5 µs/km, the ITU-T G.114 planning figure for fibre),
:func:`load_topohub` / :func:`topohub_doc` (the installed ``topohub`` package's data).
Every file is read through :mod:`routerd.io.files` (a missing, unreadable or binary file
is an error naming it); numbers written as text follow :func:`routerd.io.values.as_number`.
The model itself and its checks are :mod:`routerd.core.topology`.
Must not import: sockets, zmq, prometheus, the engine, the simulator.
"""
from __future__ import annotations

import json
import os
import xml.etree.ElementTree as ET
from typing import Any

from routerd.core.errors import Problem, TopologyError
from routerd.core.topology import LinkDefaults, LinkSpec, Topology, build, from_mapping

from .files import read_text, read_yaml
from .values import as_number

#: Propagation in fibre, seconds per km (ITU-T G.114 planning figure, 5 µs/km).
FIBRE_S_PER_KM = 5e-6


def load(spec: str, defaults: LinkDefaults = LinkDefaults()) -> Topology:
    """Load a topology from a file path or a ``topohub:GROUP/NAME`` reference."""
    if spec.startswith("topohub:"):
        return load_topohub(spec[len("topohub:"):], defaults)
    if not os.path.exists(spec):
        raise TopologyError(Problem(spec, spec, "does not exist"))
    if os.path.isdir(spec):
        raise TopologyError(Problem(spec, spec, "is a directory, not a topology file"))
    ext = os.path.splitext(spec)[1].lower()
    if ext in (".yaml", ".yml"):
        return from_mapping(read_yaml(spec, TopologyError), source=spec, defaults=defaults)
    if ext == ".graphml":
        return load_graphml(spec, defaults)
    if ext == ".json":
        text = read_text(spec, TopologyError, "JSON file")
        try:
            doc = json.loads(text)
        except json.JSONDecodeError as e:
            raise TopologyError(Problem(spec, "", f"is not valid JSON: {e}")) from None
        return from_node_link(doc, source=spec, defaults=defaults)
    raise TopologyError(
        Problem(spec, ext or "(none)", "is not a known topology extension (.yaml, .yml, .graphml, .json)")
    )


def load_graphml(path: str, defaults: LinkDefaults = LinkDefaults()) -> Topology:
    """GraphML (http://graphml.graphdrawing.org/): nodes by id, edge data by key name."""
    try:
        root = ET.fromstring(read_text(path, TopologyError, "GraphML file"))
    except ET.ParseError as e:
        raise TopologyError(Problem(path, "", f"is not valid GraphML/XML: {e}")) from None
    ns = ""
    if root.tag.startswith("{"):
        ns = root.tag.split("}")[0] + "}"
    keys: dict[str, str] = {}
    for k in root.iter(f"{ns}key"):
        keys[k.get("id", "")] = k.get("attr.name") or k.get("id", "")
    graphs = list(root.iter(f"{ns}graph"))
    if not graphs:
        raise TopologyError(Problem(path, "", "has no <graph> element"))
    g = graphs[0]
    directed = g.get("edgedefault", "undirected") == "directed"
    nodes = [nd.get("id", "") for nd in g.iter(f"{ns}node")]
    specs: list[LinkSpec] = []
    problems: list[Problem] = []
    for i, edge in enumerate(g.iter(f"{ns}edge")):
        data = {keys.get(d.get("key", ""), d.get("key", "")): (d.text or "").strip()
                for d in edge.iter(f"{ns}data")}
        w = f"{path}: edge[{i}] ({edge.get('source')} - {edge.get('target')})"
        if "delay_s" not in data:
            problems.append(Problem(f"{w}.delay_s", None, "is missing"))
            continue
        a, b = edge.get("source", ""), edge.get("target", "")
        edir = edge.get("directed")
        is_dir = directed if edir is None else edir == "true"
        for s, t in ([(a, b)] if is_dir else [(a, b), (b, a)]):
            specs.append(LinkSpec(s, t, _num(data.get("delay_s")), _num(data.get("capacity_bps")),
                                  _num(data.get("buffer_pkts")), w))
    name = g.get("id") or os.path.splitext(os.path.basename(path))[0]
    try:
        topo = build(name, nodes, specs, defaults=defaults, source=path)
    except TopologyError as e:
        raise TopologyError(problems + e.problems) from None  # type: ignore[operator]
    if problems:
        raise TopologyError(problems)
    return topo


def _num(s: str | None) -> Any:
    if s is None or s == "":
        return None
    v = as_number(s.strip())
    return s if v is None else float(v)  # a string: build() says "is not a number" and where


def _json_kind(v: Any) -> str:
    """What a decoded JSON value is, in JSON's words (for a message)."""
    if v is None:
        return "null"
    if isinstance(v, bool):
        return "true/false"
    kinds: dict[type, str] = {dict: "an object", list: "an array", str: "a string"}
    return kinds.get(type(v), "a number" if isinstance(v, (int, float)) else type(v).__name__)


def from_node_link(doc: Any, *, source: str = "<node-link>",
                   defaults: LinkDefaults = LinkDefaults()) -> Topology:
    """networkx node-link JSON (``edges`` or ``links`` key), topohub's flavour included.

    Node names: the ``name`` attribute when every node has a distinct one, else the id.
    Edge delay: ``delay_s`` if present, else ``dist`` (km) × 5 µs/km. Capacity and buffer:
    ``capacity_bps``/``buffer_pkts`` if present, else the caller's defaults.
    """
    if not isinstance(doc, dict) or "nodes" not in doc:
        raise TopologyError(Problem(source, type(doc).__name__, "is not a node-link document"))
    raw_nodes = doc["nodes"]
    ekey = "edges" if "edges" in doc else "links"
    edges = doc.get(ekey, [])
    g = doc.get("graph") or {}
    # the document's shape first: every later step reads it as lists of maps
    shape = [Problem(f"{source}: {k}", None, f"is {_json_kind(v)}, must be {want}")
             for k, v, ok, want in (
                 ("nodes", raw_nodes, isinstance(raw_nodes, list), "an array of node objects"),
                 (ekey, edges, isinstance(edges, list), "an array of edge objects"),
                 ("graph", g, isinstance(g, dict), "an object"))
             if not ok]
    if not shape:
        shape = [Problem(f"{source}: {k}[{i}]", None, f"is {_json_kind(v)}, must be an object")
                 for k, items in (("nodes", raw_nodes), (ekey, edges))
                 for i, v in enumerate(items) if not isinstance(v, dict)]
    if not shape:
        shape = [Problem(f"{source}: nodes[{i}].id", nd.get("id"),
                         "must be a number or a string" if "id" in nd else "is missing")
                 for i, nd in enumerate(raw_nodes)
                 if isinstance(nd.get("id"), bool) or not isinstance(nd.get("id"), (int, float, str))]
    if shape:
        raise TopologyError(shape)
    ids = [nd.get("id") for nd in raw_nodes]
    names = [nd.get("name") for nd in raw_nodes]
    use_names = all(isinstance(x, str) and x for x in names) and len(set(names)) == len(names)
    label = {i: (str(nm) if use_names else str(i)) for i, nm in zip(ids, names)}
    if len(label) != len(ids):
        seen: set[Any] = set()
        dup = next(i for i in ids if i in seen or seen.add(i))   # type: ignore[func-returns-value]
        raise TopologyError(Problem(f"{source}: nodes", dup, "is an id given to more than one node"))
    directed = bool(doc.get("directed", False))
    specs: list[LinkSpec] = []
    problems: list[Problem] = []
    for i, e in enumerate(edges):
        w = f"{source}: {ekey}[{i}] ({e.get('source')} - {e.get('target')})"
        ends = (e.get("source"), e.get("target"))
        if not all(isinstance(x, (int, float, str)) and x in label for x in ends):
            problems.append(Problem(w, ends, "names an unknown node id"))
            continue
        if "delay_s" in e:
            delay = e["delay_s"]
        elif "dist" in e:
            try:
                delay = float(e["dist"]) * FIBRE_S_PER_KM
            except (TypeError, ValueError):
                problems.append(Problem(f"{w}.dist", e["dist"], "is not a number"))
                continue
        else:
            problems.append(Problem(w, None, "has neither delay_s nor dist (km)"))
            continue
        a, b = label[e["source"]], label[e["target"]]
        for s, t in ([(a, b)] if directed else [(a, b), (b, a)]):
            specs.append(LinkSpec(s, t, delay, e.get("capacity_bps"), e.get("buffer_pkts"), w))
    dem = None
    if isinstance(g.get("demands"), dict):
        dem = {}
        by_id = {str(k): v for k, v in label.items()}
        for a, row in g["demands"].items():
            if row is not None and not isinstance(row, dict):
                problems.append(Problem(f"{source}: graph.demands[{a}]", None,
                                        f"is {_json_kind(row)}, must be an object of destination "
                                        "-> demand"))
                continue
            for b, v in (row or {}).items():
                dem[(by_id.get(str(a), str(a)), by_id.get(str(b), str(b)))] = v
    name = str(g.get("name") or os.path.splitext(os.path.basename(source))[0])
    meta = {"stats": g.get("stats", {})} if isinstance(g.get("stats"), dict) else {}
    try:
        topo = build(name, [label[i] for i in ids], specs, defaults=defaults, demands=dem,
                     source=source, meta=meta)
    except TopologyError as e:
        raise TopologyError(problems + e.problems) from None  # type: ignore[operator]
    if problems:
        raise TopologyError(problems)
    return topo


def load_topohub(key: str, defaults: LinkDefaults = LinkDefaults()) -> Topology:
    """A topology from the installed ``topohub`` package, e.g. ``sndlib/abilene``."""
    return from_node_link(topohub_doc(key), source=f"topohub:{key}", defaults=defaults)


def topohub_doc(key: str) -> dict[str, Any]:
    """topohub's node-link document for ``GROUP/NAME``, read from the package's data files.

    Equivalent to ``topohub.get(key)`` (demand keys become ints, as there), but closes the
    file it opens (topohub 1.5's ``get`` leaves it to the garbage collector).
    """
    where = f"topohub:{key}"
    try:
        import importlib.resources

        import topohub  # type: ignore[import-not-found]
    except ImportError:
        raise TopologyError(Problem(where, key, "needs the topohub package, which is not installed: "
                                    "pip install 'routerd[topohub]'")) from None
    parts = key.split("/")
    if not key or any(p in ("", ".", "..") or not all(c.isalnum() or c in "-_." for c in p)
                      for p in parts):
        raise TopologyError(Problem(where, key, "is not a GROUP/NAME key (e.g. sndlib/abilene)"))
    res = importlib.resources.files(topohub) / "data" / (key + ".json")
    try:
        with res.open("rb") as fh:
            doc = json.load(fh)
    except OSError:
        raise TopologyError(Problem(where, key, "is not in topohub (see topohub's data/ "
                                    "directory for GROUP/NAME keys)")) from None
    except json.JSONDecodeError as e:
        raise TopologyError(Problem(where, key, f"is not valid node-link JSON: {e}")) from None
    g = doc.get("graph") or {}
    if isinstance(g.get("demands"), dict):
        g["demands"] = {int(a): {int(b): v for b, v in (row or {}).items()}
                        for a, row in g["demands"].items()}
    return doc


