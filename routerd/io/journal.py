"""Durable state: the append-only journal, engine snapshots, and the one replay path.

Owns the on-disk formats under a state directory, start-up recovery
(:func:`recover_state`: torn tails, corrupt records, gaps, corrupt or missing snapshots —
one procedure the service's start-up and offline replay both call), and
:func:`replay_into` — the single function that applies journal records to an
:class:`~routerd.core.engine.Engine`, used by the service's start-up recovery and by offline
replay alike, so both reach the same state bit for bit.

Must not import: zmq, prometheus, the simulator, the service.  Reads the clock only for
the ``interval`` fsync policy and the snapshot's informational ``written_at``.  Never
pickles: bodies are msgpack, numpy arrays travel as a msgpack ext (dtype, shape, bytes).

Layout (``STATE_DIR``)::

    journal/from-<first record number, 12 or more digits>.rdj    append-only segments
    snapshots/upto-<record number, 12 or more digits>.rdsnap     engine state covering records <= n

Names are written by :func:`segment_name` / :func:`snapshot_name` and parsed by
:func:`segment_first` / :func:`snapshot_record`, which also accept the names routerd wrote
up to 0.1.0 (``seg-<20 digits>.rj`` and ``snap-<20 digits>.rs``): a state directory
written by an earlier version recovers, appends and replays as it is (nothing is renamed;
new segments and snapshots get the new names, old ones retire as usual).

Snapshot file, format 2 (written since the streaming change; format 1 is still read): the
8-byte magic ``b"RDSNAPS2"`` and the record number (u64 LE), then chunks, each a 16-byte
head (``b"SC"``, kind u8: 0 meta / 1 data / 2 end, flags u8 = 0, CRC32 u32 of the payload,
payload length u64) and its payload.  The meta chunk holds two msgpack maps: the arrays'
``[dtype, shape]`` list, then ``{"record_no", "written_at", "state"}`` with each numpy
array replaced by a reference (msgpack ext 2 holding its index).  The arrays' raw C-order
bytes follow in data chunks of at most 8 MiB (:data:`SNAP_CHUNK`), in index order; the end
chunk (``{"arrays": n, "chunks": count}``) proves the file complete.  Written straight from
the arrays (:func:`write_stream`), read straight into new arrays: no second in-memory copy
on either side.  Format 1: a 28-byte header (``b"RDSNAPS1"``, record number, body length,
CRC32) and one msgpack body with arrays as ext 1.

Segment file: a 16-byte header ``b"RDJOURN1"`` + first record number (u64 LE), then
records.  Record: a 20-byte header — magic ``b"RJ"``, flags u16 (0), body length u32,
record number u64, CRC32 u32 of the first 16 header bytes and the body — then the body,
a msgpack map ``{"kind": kind, "body": {...}}``.  Record numbers start at 1 and rise by one.

Record kinds (bodies are maps):

* ``start``  — the service started: ``topology`` (digest), ``nodes``, ``settings``, ``epoch``;
  the first one also fixes the engine settings a replay from scratch starts with.
* ``batch``  — accepted observations: ``reporter``, ``batch``, ``t`` (the engine's ``now``),
  columns ``from``/``via``/``dst`` (int32 LE bytes), ``latency_s``/``estimate_s`` (float64 LE
  bytes, NaN = absent; the whole ``estimate_s`` column is left out when the received
  columnar frame had none: every estimate absent), ``links`` ``[[src, dst, up], ...]`` (indices), ``ack`` (what was sent
  back).  Applied as hops first, then links (:func:`apply_batch`) — the service must use the
  same function.
* ``link``   — an operator override: ``from``, ``to`` (indices), ``up``, ``t``.
* ``tick``   — the service called ``Engine.decide(t)``: ``t``; ``limit`` when it bounded
  the destinations that decision took (``Engine.decide(t, limit=...)``; older ticks lack it).
* ``config`` — a reload: ``settings`` (every :class:`EngineSettings` field).
* ``guide``  — split shares that seeded the engine (the service's ``engine.optimum.guide``):
  ``t``, ``shape`` and the nonzero entries ``x``, ``d``, ``j`` (int32 LE) and ``w``
  (float64 LE) bytes; applied with :func:`apply_guide` (:meth:`Engine.seed_shares`).

* ``snapshot`` — a note written right after a snapshot: ``record`` (what it covers) and
  ``kept`` (the snapshot records present after writing it); recovery reads the last note to
  tell a snapshot that went missing.  The engine ignores it.

Recovery (theory of operation; :func:`recover_state`, steps in :data:`RECOVERY_STEPS`).  A
snapshot holds the engine state covering records ``<= b``, so a restart needs only the
records after the newest snapshot that reads back intact.  Snapshots are read newest
first; one that fails its CRC or does not decode is reported and the next older one is
tried (b = 0 without one).  Then every journal record is read in order.  After damage the
reader resynchronises on the next record with a good CRC, which tells which record
numbers the damage lost.  Each finding is classified by whether everything it loses is
``<= b`` (*before*: the snapshot holds it) or not (*after*), and :data:`RECOVERY_RULES`
gives the action:

* *torn* — the file ends inside a header or inside the body a valid header announces, and
  nothing valid follows (a write cut short by a crash; never acknowledged, since acks wait
  for the fsync): the segment is truncated there (*cut*).
* *corrupt* — bad magic, bad CRC, a length beyond the limit, a bad segment header: before
  b it is reported and read past (*skip*: nothing lost, nothing changed); after b the
  journal *stops* there.
* *gap* — record numbers jump (a deleted segment, records lost under ``fsync: never``):
  before b *skip*, after b *stop*.  A journal that starts above b + 1 has a gap too.

A *stop* keeps the segment's bytes from the offset as ``<segment>.tail-<offset>.bad`` (the
whole segment as ``<segment>.bad`` when nothing before the offset is kept) and renames
every later segment ``<segment>.bad`` (a ``-2``, ``-3``... suffix instead of overwriting
an earlier one): nothing later can be applied without the missing records, so nothing
later is applied, loudly; nothing is deleted either.  All of it is reported
(:class:`RecoveryReport`), never fatal.  With ``apply=False`` (replay, read-only restores)
nothing is changed and the report is the same.  Retirement keeps the journal back to the
oldest kept intact snapshot (:meth:`SnapshotStore.retire_point`; from record 1 while
fewer than two are intact; never past the second-newest intact one), so a newest snapshot
found bad or deleted later falls back with every record it needs.
"""
from __future__ import annotations

import contextlib
import dataclasses
import glob
import os
import re
import struct
import threading
import time
import zlib
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import msgpack
import numpy as np

from routerd.core import kernels as _kernels
from routerd.core.engine import Decision, Engine, EngineSettings, HopBatch, ObserveResult
from routerd.core.topology import Topology

from .fsmode import open_private, private_dir

KINDS: tuple[str, ...] = ("start", "batch", "link", "tick", "config", "snapshot", "guide")
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

# current names first; the alternatives after them are the names before the rename
_SEG_RE = re.compile(r"^(?:from-(\d{12,})\.rdj|seg-(\d{20})\.rj)$")
_SNAP_RE = re.compile(r"^(?:upto-(\d{12,})\.rdsnap|snap-(\d{20})\.rs)$")
NAME_DIGITS = 12
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


_FINDING_LABEL = {"torn": "torn tail", "corrupt": "corrupt data", "gap": "gap in record numbers"}


@dataclass(frozen=True, slots=True)
class Finding:
    """One thing recovery found in the journal, and what it did about it.

    ``kind`` is ``torn``, ``corrupt`` or ``gap``; ``where`` says whether every record it
    loses is covered by the chosen snapshot (``before``) or not (``after``); ``action`` is
    :data:`RECOVERY_RULES` ``[(kind, where)]``.  ``lost`` is the range of record numbers
    that cannot be read there (None: not known, e.g. an unfinished write at the end)."""

    kind: str
    where: str
    action: str
    segment: str
    offset: int
    detail: str
    lost: tuple[int, int] | None = None
    bytes_cut: int = 0
    kept_as: str | None = None

    def line(self, base: int) -> str:
        rng = "" if self.lost is None else (
            f"record {self.lost[0]}" if self.lost[0] == self.lost[1] else f"records {self.lost[0]}..{self.lost[1]}")
        what = _FINDING_LABEL[self.kind]
        if rng:
            rng += " missing" if self.kind == "gap" else " unreadable"
        at = f"in {self.segment} at byte {self.offset}: {self.detail}"
        if self.action == "skip":
            return (f"{what} {at}; {rng or 'no record lost'}, covered by the snapshot at "
                    f"record {base}: nothing lost, nothing changed")
        if self.action == "cut":
            return f"{what} {at}; cut {self.bytes_cut} bytes (an unfinished write, never acknowledged)"
        return (f"{what} {at}; the journal stops here" + (f" ({rng})" if rng else "")
                + (f"; {self.bytes_cut} bytes kept as {self.kept_as}" if self.kept_as else "")
                + "; nothing after it is applied")


@dataclass
class RecoveryReport:
    """What recovery (:func:`recover_state`, or :func:`recover` for a bare journal) found
    and did.  Plain data: the service's ``health`` and start-up banner and the replay
    report all show :meth:`as_dict` / :meth:`lines` of the same report."""

    directory: str
    segments: int = 0
    records: int = 0
    first_record: int | None = None
    last_record: int = 0            # the last record kept (0: none)
    next_record: int = 1
    cuts: list[Cut] = field(default_factory=list)
    quarantined: list[str] = field(default_factory=list)
    gaps: list[tuple[int, int]] = field(default_factory=list)   # (expected, found)
    removed_empty: list[str] = field(default_factory=list)
    findings: list[Finding] = field(default_factory=list)
    base: int = 0                   # the chosen snapshot's record (0: from the journal's start)
    snapshot_file: str | None = None
    snapshots_skipped: list[str] = field(default_factory=list)
    snapshots_missing: list[str] = field(default_factory=list)
    contiguous_from: int | None = None   # first record of the undamaged run reaching the end
    noted_snapshots: list[int] | None = None   # the last snapshot note's list (None: no note)

    @property
    def clean(self) -> bool:
        return not (self.findings or self.cuts or self.quarantined or self.gaps
                    or self.snapshots_skipped or self.snapshots_missing)

    @property
    def stopped(self) -> Finding | None:
        """The finding the journal stops at (a cut or a stop), if any."""
        return next((f for f in self.findings if f.action != "skip"), None)

    def lines(self) -> list[str]:
        """A summary line, then one line per finding (the lines every shell prints)."""
        src = (f"snapshot {self.snapshot_file} (records up to {self.base})" if self.snapshot_file
               else "the journal's first record")
        out = [f"state {self.directory}: from {src}; journal {self.segments} segments, "
               f"{self.records} records" + (f" ({self.first_record}..{self.last_record})" if self.records else "")]
        out += [f"snapshot skipped: {p}" for p in self.snapshots_skipped]
        out += [f"snapshot missing: {m} (the journal's last snapshot note lists it)"
                for m in self.snapshots_missing]
        out += [f.line(self.base) for f in self.findings]
        out += [f"set aside (after the journal's stop): {q}" for q in self.quarantined]
        out += [f"removed a segment with a torn header and no records: {r}" for r in self.removed_empty]
        return out

    def as_dict(self) -> dict[str, Any]:
        """Plain values (lists, not tuples): the same after a msgpack or JSON round trip."""
        return {
            "clean": self.clean,
            "snapshot": None if self.snapshot_file is None else {"file": self.snapshot_file,
                                                                 "record": self.base},
            "snapshots_skipped": list(self.snapshots_skipped),
            "snapshots_missing": list(self.snapshots_missing),
            "journal": {"segments": self.segments, "records": self.records,
                        "first_record": self.first_record, "last_record": self.last_record,
                        "next_record": self.next_record},
            "findings": [{"kind": f.kind, "where": f.where, "action": f.action, "segment": f.segment,
                          "offset": f.offset, "detail": f.detail,
                          "lost": None if f.lost is None else list(f.lost),
                          "bytes_cut": f.bytes_cut, "kept_as": f.kept_as} for f in self.findings],
            "set_aside": list(self.quarantined),
            "removed_empty": list(self.removed_empty),
            "lines": self.lines()[1:],
        }


def _number(rx: re.Pattern[str], name: str) -> int | None:
    m = rx.match(name)
    if m is None:
        return None
    return int(next(g for g in m.groups() if g is not None))


def segment_first(name: str) -> int | None:
    """The first record number of a journal segment's file name (current or pre-rename
    name), or None if ``name`` is not a segment's."""
    return _number(_SEG_RE, name)


def snapshot_record(name: str) -> int | None:
    """The record number a snapshot file's name says it covers (current or pre-rename
    name), or None if ``name`` is not a snapshot's."""
    return _number(_SNAP_RE, name)


def segment_name(first: int) -> str:
    """The file name a new segment starting at record ``first`` gets."""
    return f"from-{int(first):0{NAME_DIGITS}d}.rdj"


def snapshot_name(record_no: int) -> str:
    """The file name a snapshot covering records ``<= record_no`` gets."""
    return f"upto-{int(record_no):0{NAME_DIGITS}d}.rdsnap"


def _numbered(d: str, parse: Callable[[str], int | None]) -> list[tuple[int, str]]:
    try:
        names = os.listdir(d)
    except FileNotFoundError:
        return []
    out = [(no, os.path.join(d, n)) for n in names if (no := parse(n)) is not None]
    out.sort()
    return out


def _segments(d: str) -> list[tuple[int, str]]:
    return _numbered(d, segment_first)


def _seg_name(d: str, first: int) -> str:
    return os.path.join(d, segment_name(first))


class _Walk:
    """Iterate the records of one segment buffer, strictly (no resynchronisation; used to
    count a segment's records before appending to it); afterwards ``end`` is the offset
    after the last good record and ``problem``/``torn`` say why it stopped early."""

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
            no, end, problem, torn = _record_at(buf, off, n)
            if problem is not None:
                self.problem, self.torn = problem, torn
                return
            if no != expect:
                self.problem = f"record number {no}, expected {expect}"
                return
            body = buf[off + REC_HEADER_LEN: end]
            off = self.end = end
            self.last = no
            expect += 1
            yield no, body


def _record_at(buf: memoryview | bytes, off: int, n: int) -> tuple[int, int, str | None, bool]:
    """(record number, end offset, problem, torn) for the record starting at ``off``:
    problem None when a whole record with a good CRC is there; torn when the file ends
    inside it."""
    if n - off < REC_HEADER_LEN:
        return 0, off, f"record header is {n - off} of {REC_HEADER_LEN} bytes", True
    magic, _flags, length, no = REC_HEAD.unpack_from(buf, off)
    (crc,) = REC_CRC.unpack_from(buf, off + REC_HEAD.size)
    if magic != REC_MAGIC:
        return no, off, f"bad record magic {bytes(magic)!r}", False
    if length > MAX_RECORD:
        return no, off, f"record length {length} is above the limit {MAX_RECORD}", False
    body_at = off + REC_HEADER_LEN
    if body_at + length > n:
        return no, off, f"record body is {n - body_at} of {length} bytes", True
    if zlib.crc32(buf[body_at: body_at + length], zlib.crc32(buf[off: off + REC_HEAD.size])) != crc:
        return no, off, f"CRC mismatch in record {no}", False
    return no, body_at + length, None, False


def _resync(buf: bytes, off: int, above: int) -> int | None:
    """Offset of the next whole record with a good CRC after ``off`` numbered above
    ``above``, else None.  (A false match needs a valid CRC-32 over a forged header and
    body: not by chance.)"""
    n = len(buf)
    mv = memoryview(buf)
    pos = off
    while True:
        pos = buf.find(REC_MAGIC, pos + 1)
        if pos < 0:
            return None
        no, _end, problem, _torn = _record_at(mv, pos, n)
        if problem is None and no > above:
            return pos


class _Damage:
    """Damage :func:`_scan` found: where, why, and where reading resumes (None: nowhere
    further in this segment)."""

    __slots__ = ("detail", "offset", "resume", "resume_no", "torn")

    def __init__(self, offset: int, detail: str, torn: bool, resume: int | None, resume_no: int | None):
        self.offset, self.detail, self.torn, self.resume, self.resume_no = offset, detail, torn, resume, resume_no


def _scan(buf: bytes, first: int, above: int) -> Iterator[tuple[int, int, int] | _Damage]:
    """The records ``(number, offset, end)`` of one segment and the damage between them,
    resynchronising after damage on the next record with a good CRC (``above``: the last
    good record number before this segment).  ``torn`` damage is an unfinished write: the
    file ends inside it and nothing valid follows."""
    n = len(buf)
    mv = memoryview(buf)       # CRCs over slices of it copy nothing
    if n < SEG_HEADER.size:
        yield _Damage(0, f"segment header is {n} of {SEG_HEADER.size} bytes", True, None, None)
        return
    magic, hfirst = SEG_HEADER.unpack_from(buf, 0)
    off = SEG_HEADER.size
    if magic != SEG_MAGIC or hfirst != first:
        r = _resync(buf, -1, above)
        yield _Damage(0, f"bad segment header (magic {bytes(magic)!r}, first record {hfirst}, "
                         f"file name says {first})", False, r,
                      None if r is None else _record_at(mv, r, n)[0])
        if r is None:
            return
        off = r
    while off < n:
        no, end, problem, torn = _record_at(mv, off, n)
        if problem is None:
            yield no, off, end
            above = max(above, no)
            off = end
            continue
        r = _resync(buf, off, above)
        yield _Damage(off, problem, torn and r is None, r, None if r is None else _record_at(mv, r, n)[0])
        if r is None:
            return
        off = r


#: What recovery does with each finding, by whether every record it loses is covered by the
#: chosen snapshot ("before") or not ("after").  A test walks this table.
RECOVERY_RULES: dict[tuple[str, str], str] = {
    ("torn", "before"): "cut",     # an unfinished write at the end: truncate (never acknowledged)
    ("torn", "after"): "cut",
    ("corrupt", "before"): "skip",  # the snapshot holds those records: report, read on
    ("corrupt", "after"): "stop",   # nothing later can be applied without it: stop, set aside
    ("gap", "before"): "skip",
    ("gap", "after"): "stop",
}

#: The recovery procedure, step by step (:func:`recover_state` follows it; the docs quote it).
RECOVERY_STEPS: tuple[tuple[str, str], ...] = (
    ("snapshots", ("list the snapshots newest first; the first that reads back intact is the "
                   "base (its record b; b = 0 without one); each one that does not is reported")),
    ("walk", ("read every journal record in order, resynchronising after damage on the next "
              "record with a good CRC")),
    ("classify", ("a torn tail, a corrupt stretch or a gap in record numbers is 'before' when "
                  "every record it loses is <= b, else 'after'; RECOVERY_RULES gives the action")),
    ("stop", ("at the first 'stop': keep the segment's bytes from there as "
              "<segment>.tail-<offset>.bad (or the whole segment as <segment>.bad) and every "
              "later segment as <segment>.bad; nothing is deleted")),
    ("missing", ("the last readable snapshot note (past a stop too) names the snapshots that "
                 "should exist; one absent (and not older than every snapshot present) is "
                 "reported missing")),
    ("replay", "the engine is the base plus records b+1 .. the last record kept"),
)

_NOTE_PREFIX = b"\x82" + msgpack.packb("kind") + msgpack.packb("snapshot")
_NOTE_LEN = len(_NOTE_PREFIX)


class _Reader:
    """Walks a journal directory under :data:`RECOVERY_RULES` relative to ``base``; yields
    the records it keeps, fills ``findings`` and stops where the rules say.  ``leading_ok``:
    a journal whose first record is above ``base + 1`` starts there (a bare journal, whose
    early segments were retired) instead of having a gap."""

    def __init__(self, directory: str, base: int, *, leading_ok: bool, skip_to: int = 0,
                 notes: bool = False):
        self.dir = directory
        self.base = base
        self.leading_ok = leading_ok
        self.skip_to = skip_to
        self.notes = notes
        self.segs = _segments(directory)
        self.findings: list[Finding] = []
        self.stop: tuple[int, int, bool, int] | None = None  # (segment index, offset, torn, kept records in it)
        self.last: int | None = None
        self.first_record: int | None = None
        self.records = 0
        self.segments_read = 0
        self.run_start: int | None = None
        self.note: dict[str, Any] | None = None
        self.next_floor = 1                  # numbering continues at least here

    def _where(self, hi: int | None) -> str:
        return "before" if hi is not None and hi <= self.base else "after"

    def _finding(self, kind: str, where: str, seg: str, off: int, detail: str,
                 lost: tuple[int, int] | None) -> str:
        action = RECOVERY_RULES[(kind, where)]
        self.findings.append(Finding(kind, where, action, os.path.basename(seg), off, detail, lost))
        return action

    def __iter__(self) -> Iterator[tuple[int, memoryview]]:
        segs = self.segs
        for i, (first, path) in enumerate(segs):
            if i + 1 < len(segs) and segs[i + 1][0] - 1 <= self.skip_to:
                continue        # every record in it is at or below skip_to: not needed
            with open(path, "rb") as fh:
                buf = fh.read()
            mv = memoryview(buf)
            self.segments_read += 1
            last_seg = i == len(segs) - 1
            kept_here = 0
            for ev in _scan(buf, first, self.last or 0):
                if isinstance(ev, _Damage):
                    nxt = ev.resume_no
                    if nxt is None and not last_seg:
                        nxt = segs[i + 1][0]
                    if self.last is not None:
                        lo = self.last + 1
                    else:
                        lo = first if self.leading_ok else self.base + 1
                    kind = "torn" if ev.torn and last_seg else "corrupt"
                    lost: tuple[int, int] | None = None
                    if kind == "torn":
                        where = "before" if (self.last or 0) < self.base else "after"
                    elif nxt is None:
                        where = "after"         # nothing readable follows: not known what is lost
                    elif nxt - 1 < lo:
                        where = "before"        # stray bytes between records: nothing lost
                    else:
                        lost = (lo, nxt - 1)
                        where = self._where(nxt - 1)
                    if self._finding(kind, where, path, ev.offset, ev.detail, lost) != "skip":
                        self.stop = (i, ev.offset, kind == "torn", kept_here)
                        return
                    self.run_start = None
                    if nxt is not None:
                        self.last = max(self.last or 0, nxt - 1)
                    continue
                no, off, end = ev
                if self.last is not None and no != self.last + 1:
                    if no <= self.last:
                        detail = f"record number {no}, expected {self.last + 1}"
                        where = self._where(self.last)
                        if self._finding("corrupt", where, path, off, detail, None) != "skip":
                            self.stop = (i, off, False, kept_here)
                            return
                        continue
                    detail = (f"record number {no}, expected {self.last + 1}" if off > SEG_HEADER.size
                              else f"expected record {self.last + 1}, the segment starts at {no}")
                    if self._finding("gap", self._where(no - 1), path, off, detail,
                                     (self.last + 1, no - 1)) != "skip":
                        self.stop = (i, off, False, kept_here)
                        return
                    self.run_start = None
                elif self.last is None and not self.leading_ok and no > self.base + 1:
                    self._finding("gap", "after", path, off,
                                  f"expected record {self.base + 1}, the journal starts at {no}",
                                  (self.base + 1, no - 1))
                    self.stop = (i, off, False, kept_here)
                    return
                self.last = no
                if self.run_start is None:
                    self.run_start = no
                if self.first_record is None:
                    self.first_record = no
                self.records += 1
                kept_here += 1
                body = mv[off + REC_HEADER_LEN: end]
                if self.notes and body[:_NOTE_LEN] == _NOTE_PREFIX:
                    obj = unpack(body)
                    if isinstance(obj.get("body"), dict):
                        self.note = obj["body"]
                yield no, body
            self.next_floor = max(self.next_floor, first)


def _last_note(segs: Sequence[tuple[int, str]], offset: int, above: int) -> dict[str, Any] | None:
    """The last readable snapshot note in ``segs`` (the first one read from ``offset``)."""
    note: dict[str, Any] | None = None
    for k, (first, path) in enumerate(segs):
        with open(path, "rb") as fh:
            buf = fh.read()
        mv = memoryview(buf)
        for ev in _scan(buf, first, above):
            if isinstance(ev, _Damage):
                continue
            _, off, end = ev
            if k == 0 and off < offset:
                continue
            body = mv[off + REC_HEADER_LEN: end]
            if body[:_NOTE_LEN] == _NOTE_PREFIX:
                with contextlib.suppress(Exception):
                    obj = unpack(body)
                    if isinstance(obj.get("body"), dict):
                        note = obj["body"]
    return note


def _aside_name(path: str, suffix: str) -> str:
    """``path + suffix``, or with ``-2``, ``-3``... when an earlier recovery kept one there:
    nothing set aside is ever overwritten."""
    cand, k = path + suffix, 2
    while os.path.exists(cand):
        cand, k = f"{path}{suffix}-{k}", k + 1
    return cand


def _fsync_dir(d: str) -> None:
    fd = os.open(d, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def recover(directory: str, *, base: int | None = None, apply: bool = True,
            report: RecoveryReport | None = None) -> RecoveryReport:
    """Check a journal directory under :data:`RECOVERY_RULES` and (``apply``) cut a torn
    tail and set aside what follows a stop.  ``base``: the record the chosen snapshot
    covers (None: a bare journal, no snapshot; it starts at its first record).  With
    ``apply=False`` nothing is changed and the report is the same."""
    rep = report if report is not None else RecoveryReport(os.path.abspath(directory))
    rd = _Reader(directory, base if base is not None else 0, leading_ok=base is None, notes=True)
    for _ in rd:
        pass
    rep.records, rep.first_record = rd.records, rd.first_record
    rep.last_record = rd.last or 0
    rep.segments = len(rd.segs)
    rep.contiguous_from = rd.run_start
    rep.next_record = max(rep.last_record + 1, (base or 0) + 1,
                          rd.next_floor if rd.stop is None else 1)
    rep.findings = list(rd.findings)
    rep.gaps = [(f.lost[0], f.lost[1] + 1) for f in rd.findings if f.kind == "gap" and f.lost]
    note = rd.note
    if rd.stop is not None:
        # nothing after the stop is applied, but its snapshot notes still tell which
        # snapshots should exist (a deleted newest one behind the damage is reported)
        note = _last_note(rd.segs[rd.stop[0]:], rd.stop[1], rd.last or 0) or note
    kept = note.get("kept") if note is not None else None
    rep.noted_snapshots = [int(x) for x in kept] if isinstance(kept, list) else None
    if rd.stop is None:
        return rep
    i, off, torn, kept_here = rd.stop
    path = rd.segs[i][1]
    size = os.path.getsize(path)
    stop = rep.findings[-1]
    changed: list[tuple[Any, ...]] = []   # (op, path, ...): planned, done only with apply
    if torn:
        if kept_here == 0 and off <= SEG_HEADER.size and (off == 0 or size < SEG_HEADER.size):
            rep.removed_empty.append(os.path.basename(path))
            changed.append(("unlink", path))
            # numbering continues where this empty segment would have started
            rep.next_record = max(rep.next_record, rd.segs[i][0])
        else:
            changed.append(("truncate", path, off))
        cut = size - off
        rep.findings[-1] = dataclasses.replace(stop, bytes_cut=cut)
        rep.cuts.append(Cut(os.path.basename(path), off, True, stop.detail, cut))
    else:
        if kept_here == 0:
            kept = _aside_name(path, ".bad")
            changed.append(("rename", path, kept))
            later_from = i + 1
            rep.quarantined.append(os.path.basename(kept))
        else:
            kept = _aside_name(path, f".tail-{off}.bad")
            changed.append(("keep_tail", path, off, kept))
            later_from = i + 1
        rep.findings[-1] = dataclasses.replace(stop, bytes_cut=size - off, kept_as=os.path.basename(kept))
        rep.cuts.append(Cut(os.path.basename(path), off, False, stop.detail, size - off,
                            os.path.basename(kept)))
        for _, later in rd.segs[later_from:]:
            dest = _aside_name(later, ".bad")
            changed.append(("rename", later, dest))
            rep.quarantined.append(os.path.basename(dest))
    if apply:
        for op in changed:
            if op[0] == "unlink":
                os.unlink(op[1])
            elif op[0] == "truncate":
                with open(op[1], "r+b") as fh:
                    fh.truncate(op[2])
                    fh.flush()
                    os.fsync(fh.fileno())
            elif op[0] == "keep_tail":
                _, p, o, kept = op
                with open(p, "rb") as fh:
                    fh.seek(o)
                    tail = fh.read()
                with os.fdopen(open_private(kept, os.O_WRONLY | os.O_CREAT | os.O_TRUNC), "wb") as fh:
                    fh.write(tail)
                    fh.flush()
                    os.fsync(fh.fileno())
                with open(p, "r+b") as fh:
                    fh.truncate(o)
                    fh.flush()
                    os.fsync(fh.fileno())
            else:
                os.replace(op[1], op[2])
        _fsync_dir(directory)
    return rep


@dataclass
class Recovery:
    """:func:`recover_state`'s result: the report, and the chosen snapshot's state (None:
    the engine starts from the journal's first record)."""

    report: RecoveryReport
    state: dict[str, Any] | None
    state_dir: str


def _snapshot_files(d: str) -> list[tuple[int, str]]:
    return _numbered(d, snapshot_record)


def recover_state(state_dir: str, *, apply: bool) -> Recovery:
    """The recovery procedure of a state directory (:data:`RECOVERY_STEPS`): choose the
    newest snapshot that reads back intact, check the journal against it
    (:data:`RECOVERY_RULES`), report what is missing.  The service's start-up calls it with
    ``apply=True`` (holding the directory's lock: cuts and set-asides happen), replay and
    read-only restores with ``apply=False``; the report is the same either way."""
    rep = RecoveryReport(os.path.abspath(state_dir))
    snaps = _snapshot_files(snapshot_dir(state_dir))
    state: dict[str, Any] | None = None
    for no, path in reversed(snaps):
        try:
            state, got = SnapshotStore.read(path)
        except (OSError, ValueError) as e:
            rep.snapshots_skipped.append(f"{os.path.basename(path)}: "
                                         + str(e).replace(path + ": ", "").replace(path, os.path.basename(path)))
            continue
        rep.base, rep.snapshot_file = got, os.path.basename(path)
        break
    recover(journal_dir(state_dir), base=rep.base, apply=apply, report=rep)
    if rep.noted_snapshots is not None:
        present = {no for no, _ in snaps}
        oldest = min(present) if present else None
        rep.snapshots_missing = [
            snapshot_name(no) for no in sorted(rep.noted_snapshots)
            # older than every one present: retention may have removed it after the note
            if no not in present and (oldest is None or no > oldest)]
    return Recovery(rep, state, os.path.abspath(state_dir))


@dataclass
class ReadReport:
    """Filled by :func:`iter_records`: where reading stopped early, if it did, and the
    damage it read past (all at or below ``after``)."""

    records: int = 0
    stopped: Cut | None = None
    skipped: list[Finding] = field(default_factory=list)


def iter_records(directory: str, after: int = 0, report: ReadReport | None = None, *,
                 until: int | None = None) -> Iterator[Record]:
    """Records numbered above ``after`` (and at most ``until``), in order, from a journal
    directory, read-only.  The recovery rules with ``after`` as the base: damage losing
    only records at or below ``after`` is read past; the first torn, corrupt or missing
    record above it stops the reading (noted in ``report``)."""
    rd = _Reader(directory, after, leading_ok=True, skip_to=after)
    for no, body in rd:
        if no <= after:
            continue
        if until is not None and no > until:
            break
        obj = unpack(body)
        if report is not None:
            report.records += 1
        yield Record(no, obj["kind"], obj["body"])
    if report is not None:
        report.skipped = [f for f in rd.findings if f.action == "skip"]
        if rd.stop is not None and (until is None or (rd.last or 0) < until):
            f = rd.findings[-1]
            path = rd.segs[rd.stop[0]][1]
            report.stopped = Cut(f.segment, f.offset, rd.stop[2], f.detail,
                                 os.path.getsize(path) - f.offset)


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
                 segment_bytes: int = 64 * 1024 * 1024, *, start_after: int = 0,
                 recovery: RecoveryReport | None = None):
        if fsync not in FSYNC_POLICIES:
            raise ValueError(f"fsync policy {fsync!r} is not one of {', '.join(FSYNC_POLICIES)}")
        if segment_bytes < 1024:
            raise ValueError(f"segment_bytes {segment_bytes} is below 1024")
        self.dir = directory
        self.fsync = fsync
        self.fsync_interval_s = float(fsync_interval_s)
        self.segment_bytes = int(segment_bytes)
        private_dir(directory)
        # a state directory's recovery (recover_state) has already been applied; a bare
        # journal is checked here on its own
        self.recovery = recovery if recovery is not None else recover(directory)
        self._next = max(self.recovery.next_record, start_after + 1)
        segs = _segments(directory)
        self._sizes = {p: os.path.getsize(p) for _, p in segs}
        self._fd = -1
        self._dirty = False
        self._last_sync = time.monotonic()
        # records appended with ``hold=True`` and not yet written (:meth:`flush`): their
        # bytes (header + CRC, payload) in order, how many, their size and the first number
        self._held: list[bytes] = []
        self._held_n = 0
        self._held_bytes = 0
        self._held_first = 0
        # one packer for this journal's records (pack()'s settings; msgpack.packb makes
        # a new one per call): the journal is appended to from one thread
        self._packer = msgpack.Packer(use_bin_type=True, default=_default)
        # held while the descriptor is synced from another thread (Syncer) and while it is
        # closed or replaced (roll, close), so a sync never meets a closed or reused fd
        self._fd_lock = threading.Lock()
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
        self.flush()
        with self._fd_lock:
            if self.fsync != "never":
                self._sync()
            os.close(self._fd)
            self._fd = -1
            self._open_new()

    def append(self, kind: str, body: Mapping[str, Any], *, sync: bool | None = None,
               hold: bool = False) -> int:
        """Write one record; returns its number.  ``sync``: True forces an fsync, False
        defers it (under ``batch``; then :meth:`commit` before acknowledging).  ``hold``:
        keep the record's bytes and write them with the next :meth:`flush` (one write for
        every record held since; the caller flushes before it asks for an fsync or reads
        the journal — every other method here flushes first by itself).  The record is
        numbered now; a failed flush writes none of the held records and takes their
        numbers back."""
        if self._fd < 0:
            raise JournalError(f"journal {self.dir} is closed")
        if kind not in KINDS:
            raise ValueError(f"record kind {kind!r} is not one of {', '.join(KINDS)}")
        payload = self._packer.pack({"kind": kind, "body": body if type(body) is dict else dict(body)})
        if len(payload) > MAX_RECORD:
            raise ValueError(f"a {kind} record of {len(payload)} bytes is above {MAX_RECORD}")
        if self._seg_records and self._sizes[self._seg_path] >= self.segment_bytes:
            self._roll()
        no = self._next
        head = REC_HEAD.pack(REC_MAGIC, 0, len(payload), no)
        head += REC_CRC.pack(zlib.crc32(payload, zlib.crc32(head)))
        size = self._sizes[self._seg_path]
        n = len(head) + len(payload)
        if hold:
            if not self._held_n:
                self._held_first = no
            self._held += (head, payload)
            self._held_n += 1
            self._held_bytes += n
        else:
            if self._held_n:
                self.flush()
            try:
                _write_all(self._fd, [head, payload])
            except BaseException:
                # never leave half a record in the middle of a segment
                os.ftruncate(self._fd, size)
                raise
        self._sizes[self._seg_path] = size + n
        self._next += 1
        self._seg_records += 1
        self._dirty = True
        if hold:
            return no
        if sync is True:
            self._sync()
        elif sync is None:
            if self.fsync == "batch":
                self._sync()
            elif self.fsync == "interval":
                self.maybe_sync()
        return no

    def flush(self) -> None:
        """Write every record held (:meth:`append` with ``hold=True``) in one go.  If the
        write fails, the segment is cut back to where it was, none of them is kept (their
        numbers are free again) and the error is raised."""
        if not self._held_n:
            return
        held, n, nbytes, first = self._held, self._held_n, self._held_bytes, self._held_first
        self._held, self._held_n, self._held_bytes = [], 0, 0
        size = self._sizes[self._seg_path] - nbytes
        try:
            _write_all(self._fd, held)
        except BaseException:
            # never leave half a record in the middle of a segment
            os.ftruncate(self._fd, size)
            self._sizes[self._seg_path] = size
            self._next = first
            self._seg_records -= n
            raise

    @property
    def held(self) -> int:
        """How many appended records wait for :meth:`flush`."""
        return self._held_n

    def drop_held(self) -> None:
        """Forget the held records without writing them (their numbers are free again):
        for an owner that gave up on the journal after a storage failure."""
        if self._held_n:
            self._sizes[self._seg_path] -= self._held_bytes
            self._next = self._held_first
            self._seg_records -= self._held_n
            self._held, self._held_n, self._held_bytes = [], 0, 0

    def _sync(self) -> None:
        if self._held_n:
            self.flush()
        if hasattr(os, "fdatasync"):
            os.fdatasync(self._fd)
        else:  # pragma: no cover - not Linux
            os.fsync(self._fd)
        self._dirty = False
        self._last_sync = time.monotonic()

    def commit(self) -> None:
        """Make every append so far durable as the policy promises (``batch``: fsync now if
        anything is unsynced; ``interval``: as :meth:`maybe_sync`; ``never``: nothing)."""
        if self._held_n:
            self.flush()
        if self._dirty:
            if self.fsync == "batch":
                self._sync()
            elif self.fsync == "interval":
                self.maybe_sync()

    def flush_sync(self) -> None:
        """fsync now, whatever the policy."""
        if self._fd >= 0:
            self._sync()

    def sync_written(self) -> None:
        """fdatasync every record written so far, callable from another thread while the
        owner goes on appending (:class:`Syncer`): what was written before the call is on
        disk when it returns.  Leaves the owner's bookkeeping alone (a later :meth:`commit`
        syncs again, harmlessly)."""
        with self._fd_lock:
            if self._fd < 0:
                raise JournalError(f"journal {self.dir} is closed")
            if hasattr(os, "fdatasync"):
                os.fdatasync(self._fd)
            else:  # pragma: no cover - not Linux
                os.fsync(self._fd)

    def maybe_sync(self) -> bool:
        """fsync if something is unsynced and the interval has passed.  True if it did."""
        if self._held_n:
            self.flush()
        if self._dirty and time.monotonic() - self._last_sync >= self.fsync_interval_s:
            self._sync()
            return True
        return False

    # ---- reading and retiring ---------------------------------------------------------
    def records(self, after: int = 0) -> Iterator[Record]:
        """Records numbered above ``after``, in order.  Corruption found here (after the
        start-up recovery) raises :class:`JournalError`."""
        self.flush()
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
        with self._fd_lock:
            if self._fd >= 0:
                try:
                    self.flush()
                    if self.fsync != "never":
                        self._sync()
                finally:
                    os.close(self._fd)
                    self._fd = -1

    def __enter__(self) -> Journal:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def _fsync_core() -> Any:
    """The compiled writer loop (``routerd.io._fsync``, built by setup.py beside the
    engine's kernels), or None where it was not built."""
    try:
        from routerd.io import _fsync
    except ImportError:
        return None
    return _fsync


class _CoreFdLock:
    """``Journal._fd_lock`` while a compiled writer loop syncs the journal: the loop's own
    descriptor lock, handed the journal's descriptor as it is on every release (the
    journal changes ``_fd`` only under this lock: a roll, a close)."""

    def __init__(self, core: Any, journal: Journal):
        self._core = core
        self._journal = journal

    def __enter__(self) -> None:
        self._core.lock_fd()

    def __exit__(self, *exc: object) -> None:
        self._core.unlock_fd(self._journal._fd)


class Syncer:
    """Group commit off the caller's thread: a writer thread that fdatasyncs a
    :class:`Journal` while its owner goes on appending.

    The owner appends records as usual (``sync=False``) and calls :meth:`request` with
    the last record number it wants durable; the thread syncs (:meth:`Journal.sync_written`),
    which covers every record written before the sync started, then publishes that number
    as :attr:`durable` and writes one byte to a pipe whose read end (:attr:`wake_fd`) the
    owner polls next to its sockets.  Requests that arrive during a sync are covered by the
    next one (one fsync for all of them).  An ``OSError`` of the sync is kept in
    :attr:`error` and the thread stops syncing: nothing numbered above :attr:`durable` may
    then be acknowledged.  The owner must :meth:`close` the syncer before the journal.
    Uses no clock and no sockets: a pipe, a condition variable, a thread.

    ``compiled`` (default: when built): the thread runs the same loop in C without the
    GIL (``routerd.io._fsync``, whose docstring says why: the Python loop took the GIL
    back from the owner's thread after every sync); the journal's ``_fd_lock`` is then the
    loop's descriptor lock until :meth:`close`.  False: this module's Python loop, which
    syncs through :meth:`Journal.sync_written` (the reference; tests replace that method
    to make a sync wait or fail)."""

    def __init__(self, journal: Journal, compiled: bool | None = None):
        self.journal = journal
        self._cond = threading.Condition()
        self._target = 0
        self._durable = journal.last_record     # everything before us was synced by its writer
        self._syncs = 0
        self._error: BaseException | None = None
        self._stop = False
        core = _fsync_core() if compiled is not False else None
        if compiled and core is None:
            raise RuntimeError("the compiled journal writer (routerd.io._fsync) is not built")
        self.wake_fd, self._wake_w = os.pipe()
        os.set_blocking(self.wake_fd, False)
        os.set_blocking(self._wake_w, False)
        self._core: Any = None
        self._fd_lock_before: Any = None
        if core is not None:
            with journal._fd_lock:     # no roll or close while the descriptor is handed over
                self._core = core.Writer(journal.last_record, journal._fd, self._wake_w)
                self._fd_lock_before = journal._fd_lock
                journal._fd_lock = _CoreFdLock(self._core, journal)
            target = self._core.run
        else:
            target = self._run
        self._thread = threading.Thread(target=target, name="routerd-journal-sync", daemon=True)
        self._thread.start()

    @property
    def compiled(self) -> bool:
        """Whether the thread runs the compiled loop."""
        return self._core is not None

    @property
    def durable(self) -> int:
        """The highest record number known to be on disk."""
        if self._core is not None:
            return int(self._core.durable)
        return self._durable

    @property
    def syncs(self) -> int:
        """fdatasyncs done."""
        if self._core is not None:
            return int(self._core.state()[1])
        return self._syncs

    @property
    def error(self) -> BaseException | None:
        """The failed sync's error (then nothing more becomes durable), else None."""
        if self._core is not None and self._error is None:
            e = self._core.state()[2]
            if e:
                self._error = OSError(e, os.strerror(e))
        return self._error

    def request(self, upto: int) -> None:
        """Ask for every record up to ``upto`` (already written) to be made durable."""
        if self._core is not None:
            self._core.request(upto)
            return
        with self._cond:
            if upto > self._target:
                self._target = upto
                self._cond.notify()

    def drain(self) -> None:
        """Empty the wake pipe (call when :attr:`wake_fd` is readable)."""
        with contextlib.suppress(BlockingIOError, OSError):
            while os.read(self.wake_fd, 4096):
                pass

    def _run(self) -> None:
        while True:
            with self._cond:
                while not self._stop and (self._target <= self._durable or self._error is not None):
                    self._cond.wait()
                if self._stop:
                    return
                upto = self._target
            try:
                self.journal.sync_written()
            except (OSError, JournalError) as e:
                self._error = e
            else:
                self._syncs += 1
                self._durable = upto
            with contextlib.suppress(BlockingIOError, OSError):
                os.write(self._wake_w, b"s")

    def close(self) -> None:
        """Stop the thread (a sync in progress finishes first) and close the pipe."""
        if self._core is not None:
            self._core.stop()
        with self._cond:
            self._stop = True
            self._cond.notify()
        self._thread.join()
        if self._core is not None and isinstance(self.journal._fd_lock, _CoreFdLock):
            self.error    # noqa: B018 - keep the loop's last error before it goes
            self._core.lock_fd()
            self.journal._fd_lock = self._fd_lock_before
            self._core.unlock_fd(-1)
        for fd in (self.wake_fd, self._wake_w):
            with contextlib.suppress(OSError):
                os.close(fd)


def _write_all(fd: int, data: Any) -> None:
    """Write ``data`` (a bytes-like object, or a list of them written in order with as
    few system calls as the OS takes: ``os.writev``, at most ``_IOV_MAX`` pieces a call)."""
    if isinstance(data, list):
        i = 0
        while i < len(data):
            part = data[i:i + _IOV_MAX]
            n = os.writev(fd, part)
            for b in part:
                k = len(b)
                if n < k:           # a short write: the rest of this piece, then go on
                    _write_all(fd, memoryview(b)[n:])
                    n = 0
                else:
                    n -= k
            i += len(part)
        return
    mv = memoryview(data)
    while mv:
        n = os.write(fd, mv)
        mv = mv[n:]


#: pieces per ``os.writev`` call (Linux's IOV_MAX is 1024)
_IOV_MAX = 512


# ---- snapshots ----------------------------------------------------------------------------
# Format 2 (streamed): ``b"RDSNAPS2"`` + record number (u64 LE), then chunks.  A chunk is a
# 16-byte head — ``b"SC"``, kind u8 (0 meta, 1 data, 2 end), flags u8 (0), CRC32 u32 of the
# payload, payload length u64 — then the payload.  The meta chunk is msgpack: ``record_no``,
# ``written_at``, ``arrays`` ([dtype, shape] each) and ``state`` with every numpy array
# replaced by a reference (msgpack ext 2: its index).  Then each array's raw C-order bytes
# in data chunks of at most SNAP_CHUNK bytes, arrays in index order; then the end chunk
# (msgpack ``{"arrays": n, "chunks": count}``).  Written straight from the arrays' memory,
# read straight into freshly allocated arrays: neither side holds a second copy.
SNAP2_MAGIC = b"RDSNAPS2"
SNAP2_HEADER = struct.Struct("<8sQ")
CHUNK_HEAD = struct.Struct("<2sBBIQ")
CHUNK_MAGIC = b"SC"
CHUNK_META, CHUNK_DATA, CHUNK_END = 0, 1, 2
SNAP_CHUNK = 8 << 20
_REF_EXT = 2


def _chunk(fd: int, kind: int, payload: Any) -> None:
    mv = memoryview(payload).cast("B")
    _write_all(fd, CHUNK_HEAD.pack(CHUNK_MAGIC, kind, 0, zlib.crc32(mv), mv.nbytes))
    _write_all(fd, mv)


def write_stream(fd: int, state: Mapping[str, Any], record_no: int) -> None:
    """Write a format-2 snapshot of ``state`` to an open file descriptor."""
    arrays: list[np.ndarray] = []

    def ref(o: Any) -> Any:
        if isinstance(o, np.ndarray):
            if o.dtype.kind not in _ND_KINDS or o.dtype.hasobject:
                raise TypeError(f"cannot store a numpy array of dtype {o.dtype}")
            arrays.append(np.ascontiguousarray(o))   # no copy for C-contiguous arrays
            return msgpack.ExtType(_REF_EXT, msgpack.packb(len(arrays) - 1))
        return _default(o)

    meta = msgpack.packb({"record_no": int(record_no), "written_at": time.time(),
                          "state": dict(state)}, use_bin_type=True, default=ref)
    # the array list is known only after packing the state: a second small map carries it
    head = msgpack.packb({"arrays": [[a.dtype.str, list(a.shape)] for a in arrays]},
                         use_bin_type=True)
    _write_all(fd, SNAP2_HEADER.pack(SNAP2_MAGIC, int(record_no)))
    _chunk(fd, CHUNK_META, head + meta)
    chunks = 0
    for a in arrays:
        raw = memoryview(a.reshape(-1).view(np.uint8)) if a.size else memoryview(b"")
        for off in range(0, raw.nbytes, SNAP_CHUNK):
            _chunk(fd, CHUNK_DATA, raw[off: off + SNAP_CHUNK])
            chunks += 1
    _chunk(fd, CHUNK_END, msgpack.packb({"arrays": len(arrays), "chunks": chunks}))


class _Ref:
    __slots__ = ("i",)

    def __init__(self, i: int):
        self.i = i


def _read_stream(path: str, fh: Any) -> tuple[dict[str, Any], int]:
    """The rest of a format-2 file after its magic (see :func:`write_stream`)."""
    def fail(why: str) -> ValueError:
        return ValueError(f"{path}: {why}")

    def head(want: int) -> tuple[int, int]:
        h = fh.read(CHUNK_HEAD.size)
        if len(h) != CHUNK_HEAD.size:
            raise fail(f"cut inside a chunk head at byte {fh.tell() - len(h)}")
        magic, kind, flags, crc, length = CHUNK_HEAD.unpack(h)
        if magic != CHUNK_MAGIC or kind != want or flags != 0:
            raise fail(f"bad chunk head at byte {fh.tell() - CHUNK_HEAD.size} (magic "
                       f"{magic!r}, kind {kind}, expected {want})")
        return crc, length

    def small(kind: int) -> bytes:
        crc, length = head(kind)
        if length > MAX_RECORD:
            raise fail(f"chunk of {length} bytes is above the limit {MAX_RECORD}")
        data = fh.read(length)
        if len(data) != length or zlib.crc32(data) != crc:
            raise fail("CRC mismatch or cut in a meta/end chunk")
        return data

    rest = fh.read(SNAP2_HEADER.size - 8)
    if len(rest) != SNAP2_HEADER.size - 8:
        raise fail("shorter than the header")
    (no,) = struct.unpack("<Q", rest)
    try:
        up = msgpack.Unpacker(raw=False, strict_map_key=False, max_buffer_size=MAX_RECORD,
                              ext_hook=lambda c, d: _Ref(msgpack.unpackb(d)) if c == _REF_EXT
                              else _ext_hook(c, d))
        up.feed(small(CHUNK_META))
        descr = next(up)["arrays"]
        obj = next(up)
        arrays = []
        for dt, shape in descr:
            dtype = np.dtype(dt)
            if dtype.kind not in _ND_KINDS or dtype.hasobject:
                raise fail(f"refusing array dtype {dt!r}")
            arrays.append(np.empty(tuple(shape), dtype=dtype))
    except ValueError:
        raise
    except Exception as e:  # noqa: BLE001 - any decode failure means a bad file
        raise fail(f"meta chunk does not decode: {e}") from None
    chunks = 0
    for a in arrays:
        raw = memoryview(a.reshape(-1).view(np.uint8)) if a.size else memoryview(bytearray())
        off = 0
        while off < raw.nbytes:
            crc, length = head(CHUNK_DATA)
            if length > raw.nbytes - off:
                raise fail(f"data chunk of {length} bytes overruns its array")
            got = fh.readinto(raw[off: off + length])
            if got != length:
                raise fail("cut inside a data chunk")
            if zlib.crc32(raw[off: off + length]) != crc:
                raise fail(f"CRC mismatch in data chunk {chunks}")
            off += length
            chunks += 1
    try:
        end = msgpack.unpackb(small(CHUNK_END))
    except ValueError:
        raise
    except Exception as e:  # noqa: BLE001
        raise fail(f"end chunk does not decode: {e}") from None
    if end != {"arrays": len(arrays), "chunks": chunks} or fh.read(1):
        raise fail("end chunk does not match the file (or bytes after it)")

    def fill(o: Any) -> Any:
        if isinstance(o, _Ref):
            if not 0 <= o.i < len(arrays):
                raise fail(f"array reference {o.i} out of range")
            return arrays[o.i]
        if isinstance(o, dict):
            return {k: fill(v) for k, v in o.items()}
        if isinstance(o, list):
            return [fill(v) for v in o]
        return o

    if not isinstance(obj, dict) or obj.get("record_no") != no or not isinstance(obj.get("state"), dict):
        raise fail("not a snapshot body")
    return fill(obj["state"]), no


class SnapshotStore:
    """Engine snapshots in one directory, written atomically; the last ``keep`` are kept."""

    def __init__(self, directory: str, keep: int = 3):
        if keep < 2:
            raise ValueError("keep at least 2 snapshots, so a corrupt newest one has a fallback")
        self.dir = directory
        self.keep = keep
        self.problems: list[str] = []
        self._verified: dict[str, tuple[int, int, int]] = {}   # path -> (inode, size, mtime_ns) read back intact
        private_dir(directory)
        for tmp in glob.glob(os.path.join(directory, ".snap-*.tmp*")):
            os.unlink(tmp)   # a write cut short by a crash; never renamed, never valid

    def list(self) -> list[tuple[int, str]]:
        return _numbered(self.dir, snapshot_record)

    def write(self, state: Mapping[str, Any], record_no: int) -> str:
        """Write a snapshot covering journal records up to ``record_no``; returns its path.
        Streaming (format 2): no second copy of the state is built in memory."""
        tmp = self.prepare(record_no)
        try:
            self.write_file(tmp, state, record_no)
        except BaseException:
            with contextlib.suppress(OSError):
                os.unlink(tmp)
            raise
        return self.install(tmp, record_no)

    def prepare(self, record_no: int) -> str:
        """The temporary file name a snapshot for ``record_no`` is written to first."""
        return os.path.join(self.dir, f".snap-{int(record_no):0{NAME_DIGITS}d}.tmp{os.getpid()}")

    @staticmethod
    def write_file(tmp: str, state: Mapping[str, Any], record_no: int) -> None:
        """Write and fsync the temporary file (safe to call in a forked child: files and
        numpy only).  :meth:`install` then makes it the snapshot."""
        fd = open_private(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC)
        try:
            write_stream(fd, state, record_no)
            os.fsync(fd)
        finally:
            os.close(fd)

    def install(self, tmp: str, record_no: int) -> str:
        """Rename a written temporary file into place, fsync the directory, drop the
        snapshots beyond ``keep``.  Only after this may journal segments be retired."""
        final = os.path.join(self.dir, snapshot_name(record_no))
        os.replace(tmp, final)
        for no, same in self.list():
            if no == int(record_no) and same != final:
                os.unlink(same)   # the pre-rename file of the same record: the new one replaces it
        _fsync_dir(self.dir)
        for _, old in self.list()[: -self.keep]:
            os.unlink(old)
        return final

    @staticmethod
    def read(path: str) -> tuple[dict[str, Any], int]:
        """One snapshot file (format 1 or 2) → (state, record number).  Raises ValueError
        if it is bad."""
        with open(path, "rb") as fh:
            magic = fh.read(8)
            if magic == SNAP2_MAGIC:
                return _read_stream(path, fh)
            data = magic + fh.read()
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
        """Journal records below this number may be retired (pass it to
        :meth:`Journal.retire_before`): the oldest kept snapshot that reads back intact,
        provided at least two do (so never later than the second-newest intact one); 0
        while fewer than two do.  A newest snapshot found bad or deleted later therefore
        still has a fallback with every journal record after it."""
        intact = [no for no, path in self.list() if self._intact(path)]
        return intact[0] if len(intact) >= 2 else 0

    def trust(self, path: str) -> None:
        """Note that ``path`` was just written and synced by us: :meth:`retire_point` need
        not read it back (until the file changes)."""
        with contextlib.suppress(OSError):
            st = os.stat(path)
            self._verified[path] = (st.st_ino, st.st_size, st.st_mtime_ns)

    def _intact(self, path: str) -> bool:
        try:
            st = os.stat(path)
        except OSError:
            return False
        key = (st.st_ino, st.st_size, st.st_mtime_ns)
        if self._verified.get(path) == key:
            return True
        try:
            self.read(path)
        except (OSError, ValueError) as e:
            self.problems.append(f"snapshot not counted for retirement: {e}")
            return False
        self._verified[path] = key
        return True


# ---- applying records ---------------------------------------------------------------------
def settings_to_dict(s: EngineSettings) -> dict[str, Any]:
    return dataclasses.asdict(s)


#: a settings field a stored dict (a ``start``/``config`` record, a snapshot) lacks was written
#: by a version before the field: the engine then ran as the field's introduction kept it,
#: which is not always today's default — engine.mode came in as greedy (the behaviour until
#: then) and the default became split later.  Fields not named here read as their default.
BEFORE_THE_FIELD: dict[str, Any] = {"mode": "greedy"}


def settings_from_dict(d: Mapping[str, Any]) -> EngineSettings:
    """Stored settings → EngineSettings; a field the dict lacks reads as what the writer
    ran (:data:`BEFORE_THE_FIELD`, else the field's default)."""
    known = {f.name for f in dataclasses.fields(EngineSettings)}
    unknown = set(d) - known
    if unknown:
        raise ValueError(f"unknown engine settings in the journal: {sorted(unknown)}")
    d = {**BEFORE_THE_FIELD, **d}
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
               links: Iterable[Sequence[Any]] = (), ack: Mapping[str, Any] | None = None,
               *, raw: Mapping[str, bytes] | None = None) -> dict[str, Any]:
    """A ``batch`` record body from the accepted hops and link events.  ``raw``: the
    received frame's columns (``from``, ``via``, ``dst`` int32 LE, ``latency_s`` and
    optionally ``estimate_s`` float64 LE bytes) when they hold exactly ``hops`` — taken
    as they are instead of encoding the rows again (no ``estimate_s`` column in the frame:
    none in the record, read back as NaN, as the decoder reads it).  Either way
    :func:`batch_hops` reads back the same arrays."""
    if raw is not None:
        # a frame without estimates: no column of NaNs (a third of the record) to pack,
        # checksum and write; batch_hops reads its absence as NaN, as the decoder did
        cols = {k: raw[k] for k in ("from", "via", "dst", "latency_s", "estimate_s") if k in raw}
    else:
        cols = {"from": np.ascontiguousarray(hops.src, dtype="<i4").tobytes(),
                "via": np.ascontiguousarray(hops.via, dtype="<i4").tobytes(),
                "dst": np.ascontiguousarray(hops.dst, dtype="<i4").tobytes(),
                "latency_s": np.ascontiguousarray(hops.latency, dtype="<f8").tobytes(),
                "estimate_s": np.ascontiguousarray(hops.estimate, dtype="<f8").tobytes()}
    body: dict[str, Any] = {
        "reporter": reporter, "batch": int(batch), "t": float(t), **cols,
        "links": [[int(a), int(b), bool(u)] for a, b, u in links],
    }
    if ack is not None:
        body["ack"] = dict(ack)
    return body


def batch_hops(body: Mapping[str, Any]) -> HopBatch:
    """The HopBatch a ``batch`` record holds."""
    def col(k: str, dt: str) -> np.ndarray:
        return np.frombuffer(body[k], dtype=dt)
    lat = col("latency_s", "<f8").copy()
    est = col("estimate_s", "<f8").copy() if "estimate_s" in body else np.full(len(lat), np.nan)
    return HopBatch(col("from", "<i4").astype(np.int64), col("via", "<i4").astype(np.int64),
                    col("dst", "<i4").astype(np.int64), lat, est)


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
    snapshots: int = 0
    guides: int = 0
    last_record: int = 0


def guide_body(t: float, W: np.ndarray) -> dict[str, Any]:
    """A ``guide`` record body: split shares (n, n, K) to seed the engine with (the
    service's ``engine.optimum.guide``), as their nonzero entries (``x``, ``d``, ``j``
    int32 LE and ``w`` float64 LE bytes)."""
    x, d, j = np.nonzero(np.asarray(W) > 0)
    return {"t": float(t), "shape": [int(v) for v in np.shape(W)],
            "x": x.astype("<i4").tobytes(), "d": d.astype("<i4").tobytes(),
            "j": j.astype("<i4").tobytes(), "w": np.asarray(W)[x, d, j].astype("<f8").tobytes()}


def apply_guide(engine: Engine, body: Mapping[str, Any]) -> tuple[int, int]:
    """Seed ``engine`` from a ``guide`` record body (:meth:`Engine.seed_shares`), the one way
    both the service and replay do it: (destinations seeded, left alone)."""
    W = np.zeros(tuple(int(v) for v in body["shape"]))
    x, d, j = (np.frombuffer(body[k], dtype="<i4") for k in ("x", "d", "j"))
    W[x, d, j] = np.frombuffer(body["w"], dtype="<f8")
    return engine.seed_shares(W)


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
        elif r.kind == "tick":     # "limit": the service bounded that decision (Engine.decide)
            d = engine.decide(float(b["t"]), limit=b.get("limit"))
            rep.ticks += 1
            if on_tick is not None:
                on_tick(r, d)
        elif r.kind == "link":
            engine.set_link(int(b["from"]), int(b["to"]), bool(b["up"]), now=float(b["t"]))
            rep.links += 1
        elif r.kind == "config":
            engine.reconfigure(settings_from_dict(b["settings"]))
            rep.configs += 1
        elif r.kind == "guide":
            apply_guide(engine, b)
            rep.guides += 1
        elif r.kind == "snapshot":
            rep.snapshots += 1          # a note for recovery; the engine is not touched
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


def written_for(directory: str) -> str | None:
    """The topology id the first ``start`` record of the journal in ``directory`` names
    (None: no such record)."""
    return next((r.body.get("topology") for r in iter_records(directory, 0)
                 if r.kind == "start"), None)


def engine_state(engine: Engine, *, copy: bool = True, **extra: Any) -> dict[str, Any]:
    """A snapshot state: the engine's arrays and scalars, its settings, and anything else
    the caller keeps (e.g. the service's dedup table) as plain values.  ``copy=False``:
    the engine's own arrays, for a snapshot written before the engine changes again."""
    return {"engine": engine.export_state(copy=copy), "settings": settings_to_dict(engine.settings),
            **extra}


@dataclass
class Restored:
    engine: Engine
    snapshot_record: int           # 0: started from scratch
    state: dict[str, Any]          # the snapshot's state (empty from scratch)
    replay: ReplayReport
    read: ReadReport
    snapshot_problems: list[str]
    recovery: RecoveryReport


def restore(state_dir: str, topo: Topology, settings: EngineSettings, *,
            on_tick: Callable[[Record, Decision], None] | None = None,
            on_record: Callable[[Record], None] | None = None,
            recovery: Recovery | None = None, owned: Any = None) -> Restored:
    """The recovery's base (its snapshot, or the first ``start`` record's settings, else
    ``settings``) plus the journal records it keeps → an engine.  ``recovery``: what
    :func:`recover_state` returned (the service passes the one it applied); None: run it
    read-only here.  ``owned``: the destinations the engine holds (a shard's,
    ``Engine(owned=)``; None: all, or what the snapshot was saved with)."""
    rec = recovery if recovery is not None else recover_state(state_dir, apply=False)
    rep = rec.report
    jdir = journal_dir(state_dir)
    read = ReadReport()
    if rec.state is not None:
        state, after = rec.state, rep.base
        s_snap = settings_from_dict(state["settings"]) if "settings" in state else settings
        eng = Engine.from_state(topo, s_snap, state["engine"], owned=owned)
    else:
        state, after = {}, 0
        first = next(iter_records(jdir, 0, until=rep.last_record), None) if rep.last_record else None
        s0 = settings
        if first is not None and first.kind == "start" and "settings" in first.body:
            s0 = settings_from_dict(first.body["settings"])
        eng = Engine(topo, s0, owned=owned)
    records = iter_records(jdir, after, read, until=rep.last_record) if rep.last_record > after else iter(())
    res = replay_into(eng, records, on_tick=on_tick, on_record=on_record)
    return Restored(eng, after, state, res, read, list(rep.snapshots_skipped), rep)
