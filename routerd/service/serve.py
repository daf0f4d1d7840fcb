"""``routerd serve``: the command's flags and the one place that chooses what runs.

Owns: the dispatch between one process (:func:`routerd.service.daemon.run`), a shard front
with its workers (``--shards N``) and one shard worker (``--shard K/N``), both
:func:`routerd.service.shard.run`.  The dependency goes one way: this module imports the
daemon and the shard module, the shard module imports the daemon (its worker is a
:class:`~routerd.service.daemon.Service`), and the daemon imports neither.

Must not import: ``routerd.sim``, ``routerd.tools`` (as the rest of ``routerd.service``).
"""
from __future__ import annotations

import argparse
import sys

from . import daemon, shard

__all__ = ["configure", "run"]


def configure(p: argparse.ArgumentParser) -> None:
    """Every flag of ``routerd serve``: the service's, then the sharding group."""
    daemon.configure(p)
    shard.configure(p)   # --shards N, --shard K/N, --upstream, --shard-listen, --external-workers


def run(args: argparse.Namespace) -> int:
    if getattr(args, "shards", None) is not None or getattr(args, "shard", None) is not None:
        return shard.run(args)
    # a sharding flag without --shards/--shard was ignored: a plain service started instead
    # of the front or worker asked for
    stray = shard.stray_flags(args, front=False, worker=False)
    if stray:
        print(f"routerd serve: cannot start:\n{stray}", file=sys.stderr)
        return 2
    return daemon.run(args)
