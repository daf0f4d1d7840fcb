"""The state directory: the one folder a service writes, and everything needed to restart,
replay or inspect it without any other file.

Layout (names relative to the state directory ``S``)::

    S/journal/      journal segments (:mod:`routerd.journal`)
    S/snapshots/    engine snapshots (:class:`routerd.journal.SnapshotStore`)
    S/lock          the exclusive lock file (see "Lock" below)
    S/documents/    the topology and effective config documents the journal's
                    ``start`` / ``config`` records refer to, by content id

Must not import: zmq, prometheus_client, the engine, the simulator.
"""
from __future__ import annotations


# ---- lock ---------------------------------------------------------------------------------
# (one writer per state directory: service, replay into a directory, shard workers)



















# ---- recorded documents -------------------------------------------------------------------
# (topology and effective config kept beside the journal, by content id)
