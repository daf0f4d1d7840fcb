"""Sharding as data: who owns which destination, where each shard keeps its state, and a
sharded state directory's tables read back from the shards' journals.

Owns: the destination map (:class:`ShardMap`: CRC-32 of the node name mod N, or a
``shard.map`` YAML file), the layout of a sharded state dir (``STATE/shard-K-of-N``:
:func:`shard_dir`, :func:`sharded_state`), a node's table restricted to the destinations
a shard owns (:func:`owned_routes`), the merge of per-shard tables (:func:`merge_tables`)
and the offline merged replay (:func:`replay_shards`: every shard through
:func:`routerd.io.journal.restore`, the service's own restore path).

It sits below both shells that use it: the shard front and workers
(:mod:`routerd.service.shard`) and ``routerd replay`` (:mod:`routerd.tools.replay`), so
neither has to import the other.

Must not import: zmq, prometheus_client, ``routerd.service``, ``routerd.agent``,
``routerd.sim``, ``routerd.tools``.
"""
from __future__ import annotations

import os
import re
import zlib
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from routerd.core import topology as _topology
from routerd.core.errors import InputError

__all__ = ["ShardMap", "engine_owned", "merge_tables", "owned_routes", "replay_shards", "shard_dir",
           "sharded_state", "stable_hash"]

_SHARD_DIR_RE = re.compile(r"^shard-(\d+)-of-(\d+)$")


# ---- the destination map ---------------------------------------------------------------
def stable_hash(name: str) -> int:
    """CRC-32 of the UTF-8 name: the same on every host and Python run (unlike hash())."""
    return zlib.crc32(name.encode("utf-8"))


@dataclass(frozen=True)
class ShardMap:
    """Owner shard of every destination: ``owner[d]`` for node index d."""

    n_shards: int
    owner: np.ndarray
    source: str = "hash"

    @classmethod
    def build(cls, topo: _topology.Topology, n_shards: int, map_file: str | None = None) -> ShardMap:
        """By :func:`stable_hash` modulo N, or from a YAML map file ``{node: shard}`` (nodes
        it does not name fall back to the hash).  Raises InputError naming the entry."""
        if n_shards < 1:
            raise InputError(f"shards: {n_shards} is below 1")
        owner = np.array([stable_hash(x) % n_shards for x in topo.nodes], dtype=np.int64)
        src = f"crc32(name) mod {n_shards}"
        if map_file:
            import yaml

            try:
                with open(map_file, encoding="utf-8") as fh:
                    m = yaml.safe_load(fh) or {}
            except OSError as e:
                raise InputError(f"{map_file}: {e.strerror}") from None
            except yaml.YAMLError as e:
                raise InputError(f"{map_file}: not YAML: {e}") from None
            if not isinstance(m, dict):
                raise InputError(f"{map_file}: expected a map node -> shard, got a {type(m).__name__}")
            for k, v in m.items():
                if k not in topo.index:
                    raise InputError(f"{map_file}: {k!r} is not a node of topology {topo.name!r}")
                if not isinstance(v, int) or isinstance(v, bool) or not 0 <= v < n_shards:
                    raise InputError(f"{map_file}: {k}: {v!r} is not a shard in 0..{n_shards - 1}")
                owner[topo.index[k]] = v
            src = f"{map_file} (else crc32 mod {n_shards})"
        return cls(n_shards, owner, src)

    def owned(self, k: int) -> np.ndarray:
        """Node indices (destinations) shard k owns, ascending."""
        return np.flatnonzero(self.owner == k)

    def counts(self) -> list[int]:
        return np.bincount(self.owner, minlength=self.n_shards).tolist()


# ---- the sharded state dir -------------------------------------------------------------------
def shard_dir(state_root: str, k: int, n: int) -> str:
    """Shard k of n's own state dir inside the sharded service's ``state_root``."""
    return os.path.join(state_root, f"shard-{k}-of-{n}")


def sharded_state(path: str) -> int | None:
    """N when ``path`` is a sharded service's state dir (``shard-K-of-N`` subdirs, no
    journal of its own), else None."""
    if not os.path.isdir(path) or os.path.isdir(os.path.join(path, "journal")):
        return None
    ns = {int(m.group(2)) for x in os.listdir(path) if (m := _SHARD_DIR_RE.match(x))}
    return max(ns) if ns else None


def engine_owned(smap: ShardMap, k: int, variant: str, mode: str = "greedy") -> np.ndarray | None:
    """The destinations shard k's engine holds (``Engine(owned=)``): its own, or None (all)
    under a variant or in split mode, whose state spans destinations (the plain rule in
    greedy mode only: per-link rates in split mode are measured over every destination)."""
    own = smap.owned(k)
    # (a shard that owns nothing keeps a whole engine: an engine has at least one column)
    return own if (variant == "plain" and mode == "greedy"
                   and 0 < own.size < smap.owner.size) else None


# ---- tables ----------------------------------------------------------------------------------
def owned_routes(engine: Any, x: int, mask: np.ndarray) -> dict[str, list[list[Any]]]:
    """:func:`routerd.io.wire.routes_by_name` restricted to the destinations where ``mask``
    (bool, one per node) is set; the same weights, from the engine's whole-table path when
    it has one."""
    names = engine.topo.nodes
    many = getattr(engine, "routes_many", None)
    # the whole-table path costs a whole row whatever is owned; per destination is
    # cheaper once a worker owns a quarter or less (200 nodes: 76 vs 97 ms at 1/4,
    # 82 vs 36 ms at 1/8 for every node's table)
    # (an engine owning only its destinations has only those rows: the whole-table path)
    if many is not None and (getattr(engine, "partial", False) or 4 * int(mask.sum()) > mask.size):
        table = many([x])[0]
        own = mask.tolist()
        return {names[d]: [[names[y], float(w)] for y, w in ws]
                for d, ws in table.items() if own[d]}
    out: dict[str, list[list[Any]]] = {}
    for d in np.flatnonzero(mask).tolist():
        if d != x:
            ws = engine.weights(x, d)
            if ws:
                out[names[d]] = [[names[y], float(w)] for y, w in ws]
    return out


def merge_tables(parts: Iterable[Mapping[str, Mapping[str, Any]]]) -> dict[str, dict[str, Any]]:
    """Per-shard ``{node: {dst: weights}}`` maps → one (destinations are disjoint)."""
    out: dict[str, dict[str, Any]] = {}
    for p in parts:
        for node, routes in p.items():
            out.setdefault(node, {}).update(routes)
    return out


def replay_shards(state_root: str, topo: _topology.Topology, n_shards: int,
                  settings: Any = None, map_file: str | None = None) -> dict[str, dict[str, Any]]:
    """Every shard's snapshot + journal (the offline path, :func:`journal.restore`) → the
    merged tables, as the control ``tables`` reply of the front would give them."""
    from routerd.core.engine import EngineSettings
    from routerd.io import journal as _journal

    smap = ShardMap.build(topo, n_shards, map_file)
    parts = []
    for k in range(n_shards):
        s = settings or EngineSettings(mode="greedy")     # what shard workers run (config.split_fits)
        r = _journal.restore(shard_dir(state_root, k, n_shards), topo, s,
                             owned=engine_owned(smap, k, s.variant, s.mode))
        own = smap.owner == k
        parts.append({topo.nodes[x]: owned_routes(r.engine, x, own) for x in range(topo.n)})
    return merge_tables(parts)
