"""Durable state: the append-only journal, engine snapshots, and the one replay path.

Owns the on-disk formats under a state directory, start-up recovery (torn tails, corrupt
records, corrupt snapshots), and :func:`replay_into` — the single function that applies
journal records to an :class:`~routerd.engine.Engine`, used by the service's start-up
recovery and by offline replay alike, so both reach the same state bit for bit.

Must not import: zmq, prometheus, the simulator, the service.  Reads the clock only for
the ``interval`` fsync policy and the snapshot's informational ``written_at``.  Never
pickles: bodies are msgpack, numpy arrays travel as a msgpack ext (dtype, shape, bytes).

Layout (``STATE_DIR``)::

    journal/seg-<first record number, 20 digits>.rj     append-only segments
    snapshots/snap-<record number, 20 digits>.rs        engine state covering records <= n

Segment file: a 16-byte header ``b"RDJOURN1"`` + first record number (u64 LE), then
records.  Record: a 20-byte header — magic ``b"RJ"``, flags u16 (0), body length u32,
record number u64, CRC32 u32 of the first 16 header bytes and the body — then the body,
a msgpack map ``{"kind": kind, "body": {...}}``.  Record numbers start at 1 and rise by one.

Record kinds (bodies are maps):

* ``start``  — the service started: ``topology`` (digest), ``nodes``, ``settings``, ``epoch``;
  the first one also fixes the engine settings a replay from scratch starts with.
* ``batch``  — accepted observations: ``reporter``, ``batch``, ``t`` (the engine's ``now``),
  columns ``from``/``via``/``dst`` (int32 LE bytes), ``latency_s``/``estimate_s`` (float64 LE
  bytes, NaN = absent), ``links`` ``[[src, dst, up], ...]`` (indices), ``ack`` (what was sent
  back).  Applied as hops first, then links (:func:`apply_batch`) — the service must use the
  same function.
* ``link``   — an operator override: ``from``, ``to`` (indices), ``up``, ``t``.
* ``tick``   — the service called ``Engine.decide(t)``: ``t``.
* ``config`` — a reload: ``settings`` (every :class:`EngineSettings` field).

Recovery rules (theory of operation).  Records are read in order; the first record that
does not check out ends the journal:

* *torn* — the file ends inside a header or inside the body a valid header announces
  (a write cut short by a crash): the segment is truncated at that record's offset.
* *corrupt* — bad magic, bad CRC, a length beyond the limit or a record number out of
  sequence with bytes after it: the segment is truncated at that offset, the cut bytes are
  kept beside it as ``<segment>.tail-<offset>.bad``, and every later segment is renamed
  ``<segment>.bad``.  Nothing later can be applied without the missing record, so nothing
  later is applied; nothing is deleted either.

Both are reported (:class:`RecoveryReport`), never fatal.  A gap in numbering *between*
segments (records lost under ``fsync: never`` below a snapshot) is reported, not fatal.
Snapshots are read newest first; one that fails its CRC or does not decode is reported and
the previous one is used (with the journal from its record on — retire segments only
before :meth:`SnapshotStore.retire_point`, the oldest kept snapshot).
"""
from __future__ import annotations

import dataclasses
import glob
import os
import re
import struct
import time
import zlib
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import msgpack
import numpy as np

from . import kernels as _kernels
from .engine import Decision, Engine, EngineSettings, HopBatch, ObserveResult
from .fsmode import open_private, private_dir
from .topology import Topology

KINDS: tuple[str, ...] = ("start", "batch", "link", "tick", "config")
FSYNC_POLICIES: tuple[str, ...] = ("batch", "interval", "never")

SEG_MAGIC = b"RDJOURN1"
SEG_HEADER = struct.Struct("<8sQ")            # magic, first record number
REC_HEAD = struct.Struct("<2sHIQ")            # magic, flags, length, record number
REC_CRC = struct.Struct("<I")
REC_MAGIC = b"RJ"
REC_HEADER_LEN = REC_HEAD.size + REC_CRC.size  # 20
MAX_RECORD = 1 << 30

SNAP_MAGIC = b"RDSNAPS1"
SNAP_HEADER = struct.Struct("<8sQQI")         # magic, record number, body length, CRC32(body)

_SEG_RE = re.compile(r"^seg-(\d{20})\.rj$")
_SNAP_RE = re.compile(r"^snap-(\d{20})\.rs$")
_ND_EXT = 1
_ND_KINDS = frozenset("biufc")


class JournalError(Exception):
    """The journal cannot be used as asked (misuse, or corruption found while running)."""


# ---- body codec: msgpack with numpy arrays as ext ---------------------------------------
def _default(o: Any) -> Any:
    if isinstance(o, np.ndarray):
        if o.dtype.kind not in _ND_KINDS or o.dtype.hasobject:
            raise TypeError(f"cannot store a numpy array of dtype {o.dtype}")
        a = np.ascontiguousarray(o)
        return msgpack.ExtType(_ND_EXT, msgpack.packb(
            [a.dtype.str, list(a.shape), a.tobytes()], use_bin_type=True))
    if isinstance(o, np.generic):
        return o.item()
    if isinstance(o, (set, frozenset)):
        return sorted(o)
    raise TypeError(f"cannot store a {type(o).__name__} in the journal or a snapshot")


def _ext_hook(code: int, data: bytes) -> Any:
    if code != _ND_EXT:
        raise ValueError(f"unknown msgpack ext type {code}")
    dt, shape, raw = msgpack.unpackb(data, raw=False)
    dtype = np.dtype(dt)
    if dtype.kind not in _ND_KINDS or dtype.hasobject:
        raise ValueError(f"refusing array dtype {dt!r}")
    return np.frombuffer(raw, dtype=dtype).reshape(tuple(shape)).copy()


def pack(obj: Any) -> bytes:
    """Plain values (maps, lists, numbers, strings, bytes, None) and numpy arrays → bytes."""
    return msgpack.packb(obj, use_bin_type=True, default=_default)


def unpack(data: bytes | memoryview) -> Any:
    return msgpack.unpackb(data, raw=False, strict_map_key=False, ext_hook=_ext_hook)


# ---- records ------------------------------------------------------------------------------
@dataclass(frozen=True, slots=True)
class Record:
    no: int
    kind: str
    body: dict[str, Any]


@dataclass(frozen=True, slots=True)
class Cut:
    """Where recovery (or a read) stopped early in one segment."""

    segment: str
    offset: int
    torn: bool          # True: an unfinished write at the end; False: corruption
    detail: str
    bytes_cut: int
    kept_as: str | None = None   # where the cut bytes were kept (corruption only)


@dataclass
class RecoveryReport:
    """What :func:`recover` found and did."""

    directory: str
    segments: int = 0
    records: int = 0
    first_record: int | None = None
    last_record: int = 0            # 0: no records
    next_record: int = 1
    cuts: list[Cut] = field(default_factory=list)
    quarantined: list[str] = field(default_factory=list)
    gaps: list[tuple[int, int]] = field(default_factory=list)   # (expected, found)
    removed_empty: list[str] = field(default_factory=list)

    @property
    def clean(self) -> bool:
        return not (self.cuts or self.quarantined or self.gaps)

    def lines(self) -> list[str]:
        out = [f"journal {self.directory}: {self.segments} segments, {self.records} records"
               + (f" ({self.first_record}..{self.last_record})" if self.records else "")]
        for c in self.cuts:
            what = "torn tail" if c.torn else "corrupt record"
            out.append(f"{what} in {c.segment} at byte {c.offset}: {c.detail}; cut {c.bytes_cut} bytes"
                       + (f", kept as {c.kept_as}" if c.kept_as else ""))
        for q in self.quarantined:
            out.append(f"set aside (after a corrupt record): {q}")
        for e, f in self.gaps:
            out.append(f"gap in record numbers: expected {e}, next segment starts at {f}")
        for r in self.removed_empty:
            out.append(f"removed a segment with a torn header and no records: {r}")
        return out


def _segments(d: str) -> list[tuple[int, str]]:
    try:
        names = os.listdir(d)
    except FileNotFoundError:
        return []
    out = [(int(m.group(1)), os.path.join(d, n)) for n in names if (m := _SEG_RE.match(n))]
    out.sort()
    return out


def _seg_name(d: str, first: int) -> str:
    return os.path.join(d, f"seg-{first:020d}.rj")


class _Walk:
    """Iterate the records of one segment buffer; afterwards ``end`` is the offset after
    the last good record and ``problem``/``torn`` say why it stopped early (if it did)."""

    def __init__(self, buf: bytes, first: int):
        self.buf = buf
        self.first = first
        self.end = 0
        self.problem: str | None = None
        self.torn = False
        self.last = first - 1

    def __iter__(self) -> Iterator[tuple[int, memoryview]]:
        buf = memoryview(self.buf)
        n = len(buf)
        if n < SEG_HEADER.size:
            self.problem, self.torn = f"segment header is {n} of {SEG_HEADER.size} bytes", True
            return
        magic, first = SEG_HEADER.unpack_from(buf, 0)
        if magic != SEG_MAGIC or first != self.first:
            self.problem = (f"bad segment header (magic {bytes(magic)!r}, first record {first}, "
                            f"file name says {self.first})")
            return
        off = SEG_HEADER.size
        self.end = off
        expect = self.first
        while off < n:
            if n - off < REC_HEADER_LEN:
                self.problem, self.torn = f"record header is {n - off} of {REC_HEADER_LEN} bytes", True
                return
            magic, _flags, length, no = REC_HEAD.unpack_from(buf, off)
            (crc,) = REC_CRC.unpack_from(buf, off + REC_HEAD.size)
            if magic != REC_MAGIC:
                self.problem = f"bad record magic {bytes(magic)!r}"
                return
            if length > MAX_RECORD:
                self.problem = f"record length {length} is above the limit {MAX_RECORD}"
                return
            body_at = off + REC_HEADER_LEN
            if body_at + length > n:
                self.problem = f"record body is {n - body_at} of {length} bytes"
                self.torn = True
                return
            body = buf[body_at: body_at + length]
            if zlib.crc32(body, zlib.crc32(buf[off: off + REC_HEAD.size])) != crc:
                self.problem = f"CRC mismatch in record {no}"
                return
            if no != expect:
                self.problem = f"record number {no}, expected {expect}"
                return
            off = body_at + length
            self.end = off
            self.last = no
            expect += 1
            yield no, body


def _fsync_dir(d: str) -> None:
    fd = os.open(d, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def recover(directory: str) -> RecoveryReport:
    """Check every segment; cut a torn or corrupt tail (see the module docstring)."""
    rep = RecoveryReport(directory)
    segs = _segments(directory)
    changed = False
    expect: int | None = None
    for i, (first, path) in enumerate(segs):
        with open(path, "rb") as fh:
            buf = fh.read()
        w = _Walk(buf, first)
        count = sum(1 for _ in w)
        if expect is not None and first != expect:
            rep.gaps.append((expect, first))
        if w.problem is None:
            rep.segments += 1
        elif w.end == 0 and w.torn and i == len(segs) - 1:
            # created but its header never made it: holds nothing
            os.unlink(path)
            rep.removed_empty.append(os.path.basename(path))
            changed = True
            rep.next_record = max(rep.next_record, first)
            expect = first
            continue
        else:
            last_seg = i == len(segs) - 1
            torn = w.torn and last_seg
            kept: str | None = None
            cut = len(buf) - w.end
            if not torn:
                kept = f"{path}.tail-{w.end}.bad"
                with os.fdopen(open_private(kept, os.O_WRONLY | os.O_CREAT | os.O_TRUNC), "wb") as fh:
                    fh.write(buf[w.end:])
                    fh.flush()
                    os.fsync(fh.fileno())
            end = w.end
            if end == 0:
                # the header itself is bad: keep an empty, valid segment in its place
                with open(path, "wb") as fh:
                    fh.write(SEG_HEADER.pack(SEG_MAGIC, first))
                    fh.flush()
                    os.fsync(fh.fileno())
            else:
                with open(path, "r+b") as fh:
                    fh.truncate(end)
                    fh.flush()
                    os.fsync(fh.fileno())
            rep.cuts.append(Cut(os.path.basename(path), end, torn, w.problem, cut,
                                os.path.basename(kept) if kept else None))
            rep.segments += 1
            changed = True
            if not last_seg:
                for _, later in segs[i + 1:]:
                    os.replace(later, later + ".bad")
                    rep.quarantined.append(os.path.basename(later) + ".bad")
        if count:
            rep.records += count
            rep.first_record = first if rep.first_record is None else rep.first_record
            rep.last_record = w.last
        rep.next_record = max(rep.next_record, w.last + 1, first)
        expect = w.last + 1
        if w.problem is not None:
            break
    if changed:
        _fsync_dir(directory)
    return rep


@dataclass
class ReadReport:
    """Filled by :func:`iter_records`: where reading stopped early, if it did."""

    records: int = 0
    stopped: Cut | None = None


def iter_records(directory: str, after: int = 0, report: ReadReport | None = None
                 ) -> Iterator[Record]:
    """Records numbered above ``after``, in order, from a journal directory, read-only
    (offline replay).  Stops at the first bad record and notes it in ``report``."""
    segs = _segments(directory)
    for i, (first, path) in enumerate(segs):
        if i + 1 < len(segs) and segs[i + 1][0] - 1 <= after:
            continue
        with open(path, "rb") as fh:
            buf = fh.read()
        w = _Walk(buf, first)
        for no, body in w:
            if no <= after:
                continue
            obj = unpack(body)
            if report is not None:
                report.records += 1
            yield Record(no, obj["kind"], obj["body"])
        if w.problem is not None:
            if report is not None:
                report.stopped = Cut(os.path.basename(path), w.end, w.torn, w.problem,
                                     len(buf) - w.end)
            return


class Journal:
    """Append-only journal in one directory.  Opening it runs :func:`recover` first
    (``self.recovery``).

    fsync policies: ``batch`` — every :meth:`append` is on disk when it returns (pass
    ``sync=False`` to group several appends, then call :meth:`commit` once before
    acknowledging them); ``interval`` — fsync when ``fsync_interval_s`` has passed since the
    last one, checked on each append and on :meth:`maybe_sync` (call it from the event
    loop); ``never`` — the OS decides (a crash may lose the tail; it is then cut as torn).
    """

    def __init__(self, directory: str, fsync: str = "batch", fsync_interval_s: float = 0.05,
                 segment_bytes: int = 64 * 1024 * 1024, *, start_after: int = 0):
        if fsync not in FSYNC_POLICIES:
            raise ValueError(f"fsync policy {fsync!r} is not one of {', '.join(FSYNC_POLICIES)}")
        if segment_bytes < 1024:
            raise ValueError(f"segment_bytes {segment_bytes} is below 1024")
        self.dir = directory
        self.fsync = fsync
        self.fsync_interval_s = float(fsync_interval_s)
        self.segment_bytes = int(segment_bytes)
        private_dir(directory)
        self.recovery = recover(directory)
        self._next = max(self.recovery.next_record, start_after + 1)
        segs = _segments(directory)
        self._sizes = {p: os.path.getsize(p) for _, p in segs}
        self._fd = -1
        self._dirty = False
        self._last_sync = time.monotonic()
        if segs and segs[-1][0] <= self._next and (self._next - segs[-1][0]) == \
                self._count_in(segs[-1][1], segs[-1][0]):
            first, path = segs[-1]
            self._seg_first, self._seg_path = first, path
            self._seg_records = self._next - first
            self._fd = os.open(path, os.O_WRONLY | os.O_APPEND)
        else:
            self._open_new()

    @staticmethod
    def _count_in(path: str, first: int) -> int:
        with open(path, "rb") as fh:
            return sum(1 for _ in _Walk(fh.read(), first))

    # ---- writing ----------------------------------------------------------------------
    def _open_new(self) -> None:
        path = _seg_name(self.dir, self._next)
        fd = open_private(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL | os.O_APPEND)
        try:
            _write_all(fd, SEG_HEADER.pack(SEG_MAGIC, self._next))
            if self.fsync != "never":
                os.fsync(fd)
                _fsync_dir(self.dir)
        except BaseException:
            os.close(fd)
            raise
        self._fd = fd
        self._seg_first, self._seg_path = self._next, path
        self._seg_records = 0
        self._sizes[path] = SEG_HEADER.size

    def _roll(self) -> None:
        if self.fsync != "never":
            self._sync()
        os.close(self._fd)
        self._fd = -1
        self._open_new()

    def append(self, kind: str, body: Mapping[str, Any], *, sync: bool | None = None) -> int:
        """Write one record; returns its number.  ``sync``: True forces an fsync, False
        defers it (under ``batch``; then :meth:`commit` before acknowledging)."""
        if self._fd < 0:
            raise JournalError(f"journal {self.dir} is closed")
        if kind not in KINDS:
            raise ValueError(f"record kind {kind!r} is not one of {', '.join(KINDS)}")
        payload = pack({"kind": kind, "body": dict(body)})
        if len(payload) > MAX_RECORD:
            raise ValueError(f"a {kind} record of {len(payload)} bytes is above {MAX_RECORD}")
        if self._seg_records and self._sizes[self._seg_path] >= self.segment_bytes:
            self._roll()
        no = self._next
        head = REC_HEAD.pack(REC_MAGIC, 0, len(payload), no)
        crc = zlib.crc32(payload, zlib.crc32(head))
        data = head + REC_CRC.pack(crc) + payload
        size = self._sizes[self._seg_path]
        try:
            _write_all(self._fd, data)
        except BaseException:
            # never leave half a record in the middle of a segment
            os.ftruncate(self._fd, size)
            raise
        self._sizes[self._seg_path] = size + len(data)
        self._next += 1
        self._seg_records += 1
        self._dirty = True
        if sync is True:
            self._sync()
        elif sync is None:
            if self.fsync == "batch":
                self._sync()
            elif self.fsync == "interval":
                self.maybe_sync()
        return no

    def _sync(self) -> None:
        if hasattr(os, "fdatasync"):
            os.fdatasync(self._fd)
        else:  # pragma: no cover - not Linux
            os.fsync(self._fd)
        self._dirty = False
        self._last_sync = time.monotonic()

    def commit(self) -> None:
        """Make every append so far durable as the policy promises (``batch``: fsync now if
        anything is unsynced; ``interval``: as :meth:`maybe_sync`; ``never``: nothing)."""
        if self._dirty:
            if self.fsync == "batch":
                self._sync()
            elif self.fsync == "interval":
                self.maybe_sync()

    def flush_sync(self) -> None:
        """fsync now, whatever the policy."""
        if self._fd >= 0:
            self._sync()

    def maybe_sync(self) -> bool:
        """fsync if something is unsynced and the interval has passed.  True if it did."""
        if self._dirty and time.monotonic() - self._last_sync >= self.fsync_interval_s:
            self._sync()
            return True
        return False

    # ---- reading and retiring ---------------------------------------------------------
    def records(self, after: int = 0) -> Iterator[Record]:
        """Records numbered above ``after``, in order.  Corruption found here (after the
        start-up recovery) raises :class:`JournalError`."""
        rep = ReadReport()
        yield from iter_records(self.dir, after, rep)
        if rep.stopped is not None:
            c = rep.stopped
            raise JournalError(f"journal {self.dir}: {c.segment} at byte {c.offset}: {c.detail}")

    def retire_before(self, record_no: int) -> int:
        """Delete every segment whose records are all numbered below ``record_no`` (never
        the segment being written).  Returns how many were deleted."""
        segs = _segments(self.dir)
        gone = 0
        for i in range(len(segs) - 1):
            first_next, _ = segs[i + 1]
            path = segs[i][1]
            if path == self._seg_path or first_next - 1 >= record_no:
                break
            os.unlink(path)
            self._sizes.pop(path, None)
            gone += 1
        if gone:
            _fsync_dir(self.dir)
        return gone

    @property
    def bytes_total(self) -> int:
        return sum(self._sizes.values())

    @property
    def last_record(self) -> int:
        """Number of the last record written (0: none yet)."""
        return self._next - 1

    @property
    def segments(self) -> int:
        return len(self._sizes)

    def close(self) -> None:
        if self._fd >= 0:
            if self.fsync != "never":
                self._sync()
            os.close(self._fd)
            self._fd = -1

    def __enter__(self) -> Journal:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def _write_all(fd: int, data: bytes) -> None:
    mv = memoryview(data)
    while mv:
        n = os.write(fd, mv)
        mv = mv[n:]


# ---- snapshots ----------------------------------------------------------------------------
class SnapshotStore:
    """Engine snapshots in one directory, written atomically; the last ``keep`` are kept."""

    def __init__(self, directory: str, keep: int = 3):
        if keep < 2:
            raise ValueError("keep at least 2 snapshots, so a corrupt newest one has a fallback")
        self.dir = directory
        self.keep = keep
        self.problems: list[str] = []
        private_dir(directory)
        for tmp in glob.glob(os.path.join(directory, ".snap-*.tmp*")):
            os.unlink(tmp)   # a write cut short by a crash; never renamed, never valid

    def list(self) -> list[tuple[int, str]]:
        out = [(int(m.group(1)), os.path.join(self.dir, n))
               for n in os.listdir(self.dir) if (m := _SNAP_RE.match(n))]
        out.sort()
        return out

    def write(self, state: Mapping[str, Any], record_no: int) -> str:
        """Write a snapshot covering journal records up to ``record_no``; returns its path."""
        body = pack({"record_no": int(record_no), "written_at": time.time(), "state": dict(state)})
        head = SNAP_HEADER.pack(SNAP_MAGIC, int(record_no), len(body), zlib.crc32(body))
        final = os.path.join(self.dir, f"snap-{int(record_no):020d}.rs")
        tmp = os.path.join(self.dir, f".snap-{int(record_no):020d}.tmp{os.getpid()}")
        fd = open_private(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC)
        try:
            _write_all(fd, head + body)
            os.fsync(fd)
        finally:
            os.close(fd)
        os.replace(tmp, final)
        _fsync_dir(self.dir)
        for _, old in self.list()[: -self.keep]:
            os.unlink(old)
        return final

    @staticmethod
    def read(path: str) -> tuple[dict[str, Any], int]:
        """One snapshot file → (state, record number).  Raises ValueError if it is bad."""
        with open(path, "rb") as fh:
            data = fh.read()
        if len(data) < SNAP_HEADER.size:
            raise ValueError(f"{path}: {len(data)} bytes, shorter than the header")
        magic, no, length, crc = SNAP_HEADER.unpack_from(data, 0)
        if magic != SNAP_MAGIC:
            raise ValueError(f"{path}: bad magic {magic!r}")
        body = data[SNAP_HEADER.size:]
        if len(body) != length:
            raise ValueError(f"{path}: body is {len(body)} bytes, header says {length}")
        if zlib.crc32(body) != crc:
            raise ValueError(f"{path}: CRC mismatch")
        try:
            obj = unpack(body)
        except Exception as e:  # noqa: BLE001 - any decode failure means a bad file
            raise ValueError(f"{path}: does not decode: {e}") from None
        if not isinstance(obj, dict) or obj.get("record_no") != no or not isinstance(obj.get("state"), dict):
            raise ValueError(f"{path}: not a snapshot body")
        return obj["state"], no

    def latest(self) -> tuple[dict[str, Any], int] | None:
        """The newest snapshot that reads back intact, falling back to older ones (each
        skipped one is noted in ``self.problems``).  None if there is none."""
        for _, path in reversed(self.list()):
            try:
                return self.read(path)
            except (OSError, ValueError) as e:
                self.problems.append(f"snapshot skipped: {e}")
        return None

    def retire_point(self) -> int:
        """Journal records below this number are covered by every kept snapshot: pass it
        to :meth:`Journal.retire_before`.  0 while no snapshot exists."""
        snaps = self.list()
        return snaps[0][0] if snaps else 0


# ---- applying records ---------------------------------------------------------------------
def settings_to_dict(s: EngineSettings) -> dict[str, Any]:
    return dataclasses.asdict(s)


def settings_from_dict(d: Mapping[str, Any]) -> EngineSettings:
    known = {f.name for f in dataclasses.fields(EngineSettings)}
    unknown = set(d) - known
    if unknown:
        raise ValueError(f"unknown engine settings in the journal: {sorted(unknown)}")
    d = dict(d)
    if d.get("kernels") == "compiled" and not _kernels.available():
        # a journal written where the kernels were built, read where they are not: both
        # paths give the same results, so the replay runs on the reference path
        d["kernels"] = "auto"
    return EngineSettings(**d)


def accepted_part(hops: HopBatch, rejected: Sequence[tuple[int, str]]) -> HopBatch:
    """The rows of ``hops`` the engine accepted (``rejected`` from its ObserveResult)."""
    if not len(rejected):
        return hops
    keep = np.ones(len(hops), dtype=bool)
    keep[[i for i, _ in rejected]] = False
    return hops.take(np.flatnonzero(keep))


def batch_body(reporter: str, batch: int, t: float, hops: HopBatch,
               links: Iterable[Sequence[Any]] = (), ack: Mapping[str, Any] | None = None
               ) -> dict[str, Any]:
    """A ``batch`` record body from the accepted hops and link events."""
    body: dict[str, Any] = {
        "reporter": reporter, "batch": int(batch), "t": float(t),
        "from": np.ascontiguousarray(hops.src, dtype="<i4").tobytes(),
        "via": np.ascontiguousarray(hops.via, dtype="<i4").tobytes(),
        "dst": np.ascontiguousarray(hops.dst, dtype="<i4").tobytes(),
        "latency_s": np.ascontiguousarray(hops.latency, dtype="<f8").tobytes(),
        "estimate_s": np.ascontiguousarray(hops.estimate, dtype="<f8").tobytes(),
        "links": [[int(a), int(b), bool(u)] for a, b, u in links],
    }
    if ack is not None:
        body["ack"] = dict(ack)
    return body


def batch_hops(body: Mapping[str, Any]) -> HopBatch:
    """The HopBatch a ``batch`` record holds."""
    def col(k: str, dt: str) -> np.ndarray:
        return np.frombuffer(body[k], dtype=dt)
    return HopBatch(col("from", "<i4").astype(np.int64), col("via", "<i4").astype(np.int64),
                    col("dst", "<i4").astype(np.int64), col("latency_s", "<f8").copy(),
                    col("estimate_s", "<f8").copy())


def apply_batch(engine: Engine, hops: HopBatch, links: Iterable[Sequence[Any]], now: float
                ) -> tuple[ObserveResult, list[bool]]:
    """Apply one batch the one way both the service and replay do: hops, then links."""
    res = engine.observe(hops, now=now)
    changed = [engine.set_link(int(a), int(b), bool(u), now=now) for a, b, u in links]
    return res, changed


@dataclass
class ReplayReport:
    records: int = 0
    batches: int = 0
    hops: int = 0
    links: int = 0
    ticks: int = 0
    configs: int = 0
    starts: int = 0
    last_record: int = 0


def replay_into(engine: Engine, journal_records: Iterable[Record], *,
                on_tick: Callable[[Record, Decision], None] | None = None,
                on_record: Callable[[Record], None] | None = None) -> ReplayReport:
    """Apply journal records to ``engine`` in order (the start-up recovery and the replay
    command both call this).  ``on_tick`` sees each decision as the service made it."""
    rep = ReplayReport()
    for r in journal_records:
        b = r.body
        if r.kind == "batch":
            hops = batch_hops(b)
            apply_batch(engine, hops, b.get("links", ()), float(b["t"]))
            rep.batches += 1
            rep.hops += len(hops)
            rep.links += len(b.get("links", ()))
        elif r.kind == "tick":
            d = engine.decide(float(b["t"]))
            rep.ticks += 1
            if on_tick is not None:
                on_tick(r, d)
        elif r.kind == "link":
            engine.set_link(int(b["from"]), int(b["to"]), bool(b["up"]), now=float(b["t"]))
            rep.links += 1
        elif r.kind == "config":
            engine.reconfigure(settings_from_dict(b["settings"]))
            rep.configs += 1
        elif r.kind == "start":
            if b.get("topology") not in (None, engine.topo.digest):
                raise JournalError(f"record {r.no}: the journal was written for topology "
                                   f"{b.get('topology')}, the engine has {engine.topo.digest}")
            rep.starts += 1
        else:
            raise JournalError(f"record {r.no}: unknown kind {r.kind!r}")
        rep.records += 1
        rep.last_record = r.no
        if on_record is not None:
            on_record(r)
    return rep


# ---- whole state directory ------------------------------------------------------------
def journal_dir(state_dir: str) -> str:
    return os.path.join(state_dir, "journal")


def snapshot_dir(state_dir: str) -> str:
    return os.path.join(state_dir, "snapshots")


def engine_state(engine: Engine, **extra: Any) -> dict[str, Any]:
    """A snapshot state: the engine's arrays and scalars, its settings, and anything else
    the caller keeps (e.g. the service's dedup table) as plain values."""
    return {"engine": engine.export_state(), "settings": settings_to_dict(engine.settings), **extra}


@dataclass
class Restored:
    engine: Engine
    snapshot_record: int           # 0: started from scratch
    state: dict[str, Any]          # the snapshot's state (empty from scratch)
    replay: ReplayReport
    read: ReadReport
    snapshot_problems: list[str]


def restore(state_dir: str, topo: Topology, settings: EngineSettings, *,
            on_tick: Callable[[Record, Decision], None] | None = None,
            on_record: Callable[[Record], None] | None = None) -> Restored:
    """Latest good snapshot + the journal after it → an engine, read-only (the caller opens
    the :class:`Journal` first when it wants recovery's cuts).  Without a snapshot the
    engine starts from the first ``start`` record's settings (else ``settings``)."""
    store = SnapshotStore(snapshot_dir(state_dir))
    snap = store.latest()
    jdir = journal_dir(state_dir)
    read = ReadReport()
    if snap is not None:
        state, after = snap
        s_snap = settings_from_dict(state["settings"]) if "settings" in state else settings
        eng = Engine.from_state(topo, s_snap, state["engine"])
    else:
        state, after = {}, 0
        first = next(iter_records(jdir, 0), None)
        s0 = settings
        if first is not None and first.kind == "start" and "settings" in first.body:
            s0 = settings_from_dict(first.body["settings"])
        eng = Engine(topo, s0)
    rep = replay_into(eng, iter_records(jdir, after, read), on_tick=on_tick, on_record=on_record)
    return Restored(eng, after, state, rep, read, list(store.problems))
