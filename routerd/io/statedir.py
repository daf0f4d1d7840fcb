"""The state directory: the one folder a service writes, and everything needed to restart,
replay or inspect it without any other file.

Layout (names relative to the state directory ``S``)::

    S/journal/      journal segments (:mod:`routerd.io.journal`)
    S/snapshots/    engine snapshots (:class:`routerd.io.journal.SnapshotStore`)
    S/lock          the exclusive lock file (see "Lock" below)
    S/documents/    the topology and effective config documents the journal's
                    ``start`` / ``config`` records refer to, by content id

Must not import: zmq, prometheus_client, the engine, the simulator.
"""
from __future__ import annotations

import argparse
import errno
import fcntl
import hashlib
import os
import re
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from typing import Any

from routerd.core import topology as _topology
from routerd.core.errors import InputError, Problem
from routerd.core.topology import Topology

from . import config as _config
from . import topofiles as _topofiles
from .config import Config
from .files import Dumper, read_yaml
from .fsmode import open_private, private_dir

# ---- lock ---------------------------------------------------------------------------------
# (one writer per state directory: service, replay into a directory, shard workers)
#
# Why flock and not lockf: a POSIX record lock (lockf / F_SETLK) is released when the
# process closes *any* descriptor of the file, so merely reading the holder's pid from
# the lock file in the same process would drop it.  An flock lock belongs to the open file
# description: it lives exactly as long as our descriptor, and dies with the process (a
# kill -9 included), so a lock file left behind by a dead process locks nothing.  Not
# for network file systems that do not carry flock.

LOCK_NAME = "lock"
_SHARD_DIR = re.compile(r"^shard-\d+-of-\d+$")


class StateDirBusy(Exception):
    """Another live process holds the state directory's lock (the message names the
    directory and, when it could be read, the holder's pid)."""

    def __init__(self, directory: str, holder: int | None, what: str | None):
        self.directory = directory
        self.holder = holder
        who = f"pid {holder}" if holder is not None else "a process whose pid is not written yet"
        super().__init__(
            f"state dir {directory} is in use by another routerd process ({who}"
            + (f", {what}" if what else "") + "): stop it first, or give another --state-dir")


def _holder(fd: int) -> tuple[int | None, str | None]:
    """(pid, what) as the holder wrote them: ``<pid>\n<what>\n``; None where unreadable."""
    try:
        raw = os.pread(fd, 256, 0).decode("utf-8", "replace").splitlines()
    except OSError:
        return None, None
    pid = int(raw[0]) if raw and raw[0].strip().isdigit() else None
    return pid, (raw[1].strip() or None) if len(raw) > 1 else None


class StateLock:
    """The exclusive lock of one state directory, held from :meth:`acquire` until
    :meth:`release` (or the process's end).  Non-blocking: a held lock raises
    :class:`StateDirBusy` at once.  Usable as a context manager."""

    def __init__(self, directory: str, what: str = "routerd"):
        self.directory = os.path.abspath(directory)
        self.path = os.path.join(self.directory, LOCK_NAME)
        self.what = what
        self._fd = -1

    @property
    def held(self) -> bool:
        return self._fd >= 0

    def acquire(self) -> StateLock:
        if self._fd >= 0:
            return self
        private_dir(self.directory)
        fd = open_private(self.path, os.O_RDWR | os.O_CREAT | os.O_CLOEXEC)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError as e:
            if e.errno not in (errno.EWOULDBLOCK, errno.EAGAIN, errno.EACCES):
                os.close(fd)
                raise
            pid, what = _holder(fd)
            os.close(fd)
            raise StateDirBusy(self.directory, pid, what) from None
        try:
            # ours now: whatever a dead holder left in the file is stale
            os.ftruncate(fd, 0)
            os.pwrite(fd, f"{os.getpid()}\n{self.what}\n".encode(), 0)
        except OSError:
            os.close(fd)
            raise
        self._fd = fd
        return self

    def release(self) -> None:
        if self._fd < 0:
            return
        fd, self._fd = self._fd, -1
        try:
            os.ftruncate(fd, 0)   # the file names a holder only while there is one
        except OSError:
            pass
        os.close(fd)              # closing drops the flock

    def __enter__(self) -> StateLock:
        return self.acquire()

    def __exit__(self, *exc: object) -> None:
        self.release()


def busy(directory: str) -> StateDirBusy | None:
    """Who holds ``directory``'s lock, when a live process does (None: nobody, or no lock
    file).  Looks without creating anything; used to explain another refusal (an endpoint
    in use) by the process that holds the directory."""
    try:
        fd = os.open(os.path.join(os.path.abspath(directory), LOCK_NAME), os.O_RDONLY | os.O_CLOEXEC)
    except OSError:
        return None
    try:
        try:
            # a shared lock, dropped at once: it fails only while a holder has it exclusively
            fcntl.flock(fd, fcntl.LOCK_SH | fcntl.LOCK_NB)
        except OSError as e:
            if e.errno not in (errno.EWOULDBLOCK, errno.EAGAIN, errno.EACCES):
                return None
            pid, what = _holder(fd)
            return StateDirBusy(os.path.abspath(directory), pid, what)
        return None
    finally:
        os.close(fd)


def unusable(directory: str) -> str | None:
    """Why ``directory`` cannot be a state dir for a writer (None: it can): a file in its
    place or on its way, or a folder this process may not write.  Looks only; creates
    nothing (so a command refuses before anything is written)."""
    path = os.path.abspath(directory)
    if os.path.exists(path):
        if not os.path.isdir(path):
            return "is a file, not a folder"
        if not os.access(path, os.W_OK | os.X_OK):
            return "is a folder this user may not write"
        return None
    up = os.path.dirname(path)
    while not os.path.exists(up):
        up = os.path.dirname(up)
    if not os.path.isdir(up):
        return f"cannot be made: {up} is a file, not a folder"
    if not os.access(up, os.W_OK | os.X_OK):
        return f"cannot be made: this user may not write {up}"
    return None


def _is_state_dir(p: str) -> bool:
    # a service's dir has journal/; a sharded front's root has its lock file beside the
    # shards' dirs.  A stray file named "lock" alone does not make a state dir: it is
    # never opened (taking the lock would overwrite it).
    if os.path.isdir(os.path.join(p, "journal")):
        return True
    if not os.path.isfile(os.path.join(p, LOCK_NAME)):
        return False
    try:
        return any(_SHARD_DIR.match(n) for n in os.listdir(p))
    except OSError:
        return False


def enclosing_state_dir(path: str) -> str | None:
    """The state directory ``path`` lies in (itself or its nearest ancestor that is one: it
    holds ``journal/``, or a lock file beside ``shard-K-of-N`` dirs), else None: where
    ``routerd replay --out`` writes into a service's directory, it takes that directory's
    lock."""
    p = os.path.abspath(path)
    while True:
        if _is_state_dir(p):
            return p
        up = os.path.dirname(p)
        if up == p:
            return None
        p = up


# ---- recorded documents -------------------------------------------------------------------
# (topology and effective config kept beside the journal, by content id)
#
# Theory of operation.  Every ``start`` record names, under ``documents``, the content ids
# of the topology and of the effective config the service ran with; every ``config``
# record names the effective config after the reload.  The documents themselves live in
# ``S/documents/`` as ``topology-<id>.yaml`` and ``config-<id>.yaml`` (and a copy of the
# config's ``shard.map`` file as ``shardmap-<id>.yaml``, named by ``start`` records and
# used in place of the original when the recorded config is): the id is the first
# 16 hex digits of the SHA-256 of the file's bytes, so a file never changes once written
# and a damaged one is detected on reading.  Both are our own formats (a topology file
# with every link directed and every value explicit; a full config file with every key),
# so ``routerd serve --topology S/documents/topology-<id>.yaml`` works too.
#
# Order of writes (a crash at any point leaves a usable directory):
#   1. the documents (temp file, fsync, rename, fsync dir), if not already there;
#   2. the record that refers to them, committed as the journal's fsync policy says;
#   3. ``current.yaml``, the pointer to the documents of the newest committed record
#      (same atomic write).
# A crash between 2 and 3 leaves the pointer at the previous documents, which the journal
# also ran with (same node list: a service refuses another topology).  ``serve`` reads the
# pointer (the journal's references when there is none); replay reads the records' own
# references first, the pointer only where no record names any (segments retired behind
# snapshots, or a sharded front, which has no journal).  Written under the
# directory's lock (the caller holds it: the service for its whole life).

DOCUMENTS = "documents"
CURRENT = "current.yaml"


class DocumentError(InputError):
    """A recorded document is missing or damaged, or a state dir has none to offer."""


@dataclass(frozen=True)
class DocRefs:
    """Content ids of the recorded documents (None: not recorded) and the topology's wire
    id (:attr:`Topology.digest`, the id journal ``start`` records carry)."""

    topology: str | None = None
    config: str | None = None
    topology_id: str | None = None
    shard_map: str | None = None     # a copy of the config's shard.map file

    def body(self) -> dict[str, str]:
        """What a ``start`` / ``config`` record carries under ``documents``."""
        return {k: v for k, v in (("topology", self.topology), ("config", self.config),
                                  ("shard_map", self.shard_map)) if v}


def documents_dir(state_dir: str) -> str:
    return os.path.join(state_dir, DOCUMENTS)


def content_id(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()[:16]


def topology_bytes(topo: Topology) -> bytes:
    """The canonical document of a topology: reads back (:func:`routerd.io.topofiles.load`) as
    the same nodes, links in the same order, the same values bit for bit and the same id."""
    return _yaml_bytes(_topology.to_mapping(topo), sort_keys=False)


def config_bytes(cfg: Config) -> bytes:
    """The canonical document of an effective config: every key, as a config file."""
    return _yaml_bytes(cfg.nested(), sort_keys=True)


def _yaml_bytes(doc: Any, *, sort_keys: bool) -> bytes:
    # libyaml's emitter when present (a 1,000-node topology: 0.65 s -> a fraction); the
    # representers, and so every value's text, are PyYAML's own either way
    # (files.Dumper: a string the readers would take for a number is quoted)
    import yaml

    return yaml.dump(doc, Dumper=Dumper, sort_keys=sort_keys, allow_unicode=True,
                     width=1 << 16).encode("utf-8")


def _doc_path(state_dir: str, kind: str, cid: str) -> str:
    return os.path.join(documents_dir(state_dir), f"{kind}-{cid}.yaml")


def _write_atomic(path: str, data: bytes) -> None:
    """temp file, fsync, rename, fsync dir (the snapshot store's discipline)."""
    d = os.path.dirname(path)
    tmp = os.path.join(d, f".{os.path.basename(path)}.tmp{os.getpid()}")
    fd = open_private(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC)
    try:
        mv = memoryview(data)
        while mv:
            mv = mv[os.write(fd, mv):]
        os.fsync(fd)
    finally:
        os.close(fd)
    os.replace(tmp, path)
    dfd = os.open(d, os.O_RDONLY)
    try:
        os.fsync(dfd)
    finally:
        os.close(dfd)


def _store(state_dir: str, kind: str, data: bytes) -> str:
    cid = content_id(data)
    path = _doc_path(state_dir, kind, cid)
    try:
        with open(path, "rb") as fh:
            if fh.read() == data:
                return cid            # content-addressed: already there, byte for byte
    except FileNotFoundError:
        pass
    private_dir(documents_dir(state_dir))
    _write_atomic(path, data)
    return cid


def store(state_dir: str, topo: Topology | None, cfg: Config | None) -> DocRefs:
    """Write the documents a record is about to refer to (step 1); their ids.  A config
    naming a ``shard.map`` file gets a byte-for-byte copy of it recorded too (a missing one
    is not: a service that is not sharded never reads it)."""
    smap = None
    if cfg is not None and cfg["shard.map"]:
        try:
            with open(cfg["shard.map"], "rb") as fh:
                smap = _store(state_dir, "shardmap", fh.read())
        except FileNotFoundError:
            pass
    return DocRefs(_store(state_dir, "topology", topology_bytes(topo)) if topo is not None else None,
                   _store(state_dir, "config", config_bytes(cfg)) if cfg is not None else None,
                   topo.digest if topo is not None else None, smap)


def set_current(state_dir: str, refs: DocRefs) -> None:
    """Point ``current.yaml`` at the documents of the newest committed record (step 3)."""
    import yaml

    doc = {"topology": refs.topology, "config": refs.config, "topology_id": refs.topology_id,
           "shard_map": refs.shard_map}
    private_dir(documents_dir(state_dir))
    _write_atomic(os.path.join(documents_dir(state_dir), CURRENT),
                  yaml.safe_dump(doc, sort_keys=True).encode("utf-8"))


def current(state_dir: str) -> DocRefs | None:
    """What ``current.yaml`` points at; None when the directory has no documents."""
    path = os.path.join(documents_dir(state_dir), CURRENT)
    if not os.path.exists(path):
        return None
    doc = read_yaml(path, DocumentError)
    ok = isinstance(doc, dict) and all(
        doc.get(k) is None or (isinstance(doc.get(k), str) and re.fullmatch(r"[0-9a-f]{16}", doc[k]))
        for k in ("topology", "config", "topology_id", "shard_map"))
    if not ok:
        raise DocumentError(Problem(path, doc, "is not a pointer to recorded documents "
                                    "(topology, config, topology_id, shard_map: 16 hex "
                                    "digits each)"))
    return DocRefs(doc.get("topology"), doc.get("config"), doc.get("topology_id"),
                   doc.get("shard_map"))


def refs_in(records: Iterable[Any]) -> DocRefs:
    """The documents the newest records refer to: the last ``start`` record's topology (and
    the wire id it was written for), the last ``start`` or ``config`` record's config.
    ``records``: journal records (objects with ``kind`` and ``body``), in order."""
    topo = cfg = tid = smap = None
    for r in records:
        if r.kind not in ("start", "config"):
            continue
        docs = r.body.get("documents") or {}
        if r.kind == "start":
            tid = r.body.get("topology", tid)
            topo = docs.get("topology")
            smap = docs.get("shard_map")     # shard.map needs a restart: only start records
        cfg = docs.get("config")      # a record without one: that config is not known
    return DocRefs(topo, cfg, tid, smap)


def _read_doc(state_dir: str, kind: str, cid: str) -> tuple[str, bytes]:
    path = _doc_path(state_dir, kind, cid)
    try:
        with open(path, "rb") as fh:
            data = fh.read()
    except FileNotFoundError:
        flag = {"topology": "--topology", "config": "--config"}.get(kind, "--config")
        raise DocumentError(Problem(path, cid, f"is the recorded {kind} document and it is "
                                    f"missing from the state dir: give {flag} FILE")) from None
    if content_id(data) != cid:
        flag = {"topology": "--topology", "config": "--config"}.get(kind, "--config")
        raise DocumentError(Problem(path, content_id(data), f"is the content id of this file, "
                                    f"not {cid}: the recorded {kind} document is damaged; "
                                    f"give {flag} FILE"))
    return path, data


def load_topology(state_dir: str, cid: str) -> Topology:
    """The recorded topology document ``cid`` (checked against its id)."""
    path, _ = _read_doc(state_dir, "topology", cid)
    return _topofiles.load(path)


def load_config(state_dir: str, cid: str) -> Config:
    """The recorded effective config ``cid`` (checked against its id and the schema)."""
    path, _ = _read_doc(state_dir, "config", cid)
    return _config.load(path)


def topology_path(state_dir: str, cid: str) -> str:
    return _doc_path(state_dir, "topology", cid)


@dataclass
class Chosen:
    """The config and topology a command runs with, and where each came from."""

    cfg: Config
    topo: Topology
    said: list[str]                 # one line per input for the banner / the report
    recorded_topology: bool         # the topology came from the state dir's documents
    base: Config | None             # the recorded config the flags went on top of (None: none)


def choose(args: argparse.Namespace, state_dir: str, refs: DocRefs | None, *,
           state_root: str, written_for: Callable[[], str | None],
           load_config_fn: Callable[[argparse.Namespace, Config | None], Config],
           load_topology_fn: Callable[[Config], Topology]) -> Chosen:
    """The one rule for what a command on an existing state dir runs with.

    * config: ``--config FILE`` (plus flags); else the recorded effective config (plus
      flags); else the defaults (plus flags).
    * topology: ``--topology``, or the ``topology.file`` of a ``--config`` given; else the
      recorded topology document; else, only when the directory holds no journal written
      for another network, the built-in demo lab.  Never the demo lab for a directory
      written for another network: :class:`DocumentError` asks for ``--topology`` /
      ``--config`` (a directory from before documents were kept).

    An explicit topology whose id is not the recorded one is refused here, naming both
    ids; one with the recorded id but other links or values is taken and said so.  The
    journal's own records are checked again by the callers (serve: the start-up restore;
    replay: its ``_check_topology``), which also covers directories without documents.

    ``state_dir``: where the documents are (a shard worker's own dir); ``state_root``: the
    ``service.state_dir`` the command runs with (put into a recorded config, whose own
    value may name where the directory used to be); ``refs``: the documents to use (the
    records' references or :func:`current`); ``written_for``: the wire id of the
    journal's first ``start`` record, or None (called only when needed); the two loaders
    are the shells' (flags on top of a config, and the config's topology file or the
    demo lab).
    """
    said: list[str] = []
    explicit_cfg = bool(getattr(args, "config", None))
    base = None
    if not explicit_cfg and refs is not None and refs.config:
        base = load_config(state_dir, refs.config)
        over: dict[str, Any] = {"service.state_dir": state_root}
        if base["shard.map"] and refs.shard_map:
            # the recorded copy, not the file it was copied from (which may be gone)
            over["shard.map"] = os.path.abspath(_doc_path(state_dir, "shardmap", refs.shard_map))
            _read_doc(state_dir, "shardmap", refs.shard_map)
        base = base.with_overrides(over, where=f"recorded config {refs.config}")
        said.append(f"config   recorded in {os.path.abspath(_doc_path(state_dir, 'config', refs.config))} "
                    "(no --config given)")
    cfg = load_config_fn(args, base)
    if explicit_cfg:
        said.append(f"config   {args.config}")
    elif base is None:
        said.append("config   defaults (no --config given, none recorded)")
    if getattr(args, "topology", None) or (explicit_cfg and cfg["topology.file"]):
        topo = load_topology_fn(cfg)
        said.append(f"topology {topo.source}")
        if refs is not None and refs.topology_id and refs.topology_id != topo.digest:
            # also where no start record is left to say so (retired behind snapshots)
            raise DocumentError(Problem(state_dir, refs.topology_id, (
                f"is the topology id the state dir was written for; {topo.name!r} from "
                f"{topo.source} has id {topo.digest}: another topology needs another "
                "state dir; " + ("give no --topology (the state dir keeps its own)"
                                 if refs.topology else "give the service's --topology or --config"))))
        if (refs is not None and refs.topology and refs.topology_id == topo.digest
                and content_id(topology_bytes(topo)) != refs.topology):
            # same nodes (same id), other links or values: allowed, but never unnoticed
            said.append(f"topology differs from the recorded {refs.topology} in links or "
                        "values (same nodes)")
        return Chosen(cfg, topo, said, False, base)
    if refs is not None and refs.topology:
        topo = load_topology(state_dir, refs.topology)
        if refs.topology_id and topo.digest != refs.topology_id:
            raise DocumentError(Problem(topology_path(state_dir, refs.topology), topo.digest,
                                        f"is the id of the recorded topology, the records "
                                        f"say {refs.topology_id}"))
        said.append(f"topology recorded in {os.path.abspath(topo.source)} (no --topology given)")
        return Chosen(cfg, topo, said, True, base)
    demo = load_topology_fn(cfg.with_overrides({"topology.file": None}, where=cfg.source))
    wid = written_for()
    if wid is not None and wid != demo.digest:
        raise DocumentError(Problem(state_dir, wid, (
            "is the topology id the journal was written for, and the state dir keeps no "
            "copy of that topology (it was written before routerd kept one): give the "
            "service's --topology FILE or --config FILE (the built-in demo lab has id "
            f"{demo.digest})")))
    said.append(f"topology the built-in demo lab ({demo.source})"
                + ("; the journal was written for it" if wid is not None else ""))
    return Chosen(cfg, demo, said, False, base)
