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

import errno
import fcntl
import os
import re

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
        os.makedirs(self.directory, exist_ok=True)
        fd = os.open(self.path, os.O_RDWR | os.O_CREAT | os.O_CLOEXEC, 0o600)
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
