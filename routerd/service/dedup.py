"""Duplicate detection for ingest batches: a byte-bounded window of recent answers per
reporter, and a per-reporter high-water mark that outlives the window.

Owns the rule that decides whether a batch (reporter name, batch number) is new, a
repeat whose answer is known, a repeat whose answer was forgotten, or a batch from a new
reporter that cannot be tracked; and the compact form these answers are kept and
snapshotted in.  Pure: numpy only — no zmq, files, clocks or metrics.  The service and
the shard front drive it; the service's snapshot and journal replay rebuild it.

Theory of operation
-------------------
*Window.*  For each reporter the most recent batches it had applied, in the order they
were applied, each with the acknowledgement it got: the number of accepted rows and at
most :data:`REJECTIONS_KEPT` rejections, packed as 5 bytes each (row u32 LE, reason code
u8, the code an index into the reason tuple the owner passes in) instead of tuples of
strings.  A re-sent batch found here is answered with the same acknowledgement and not
applied again.  Bounds: ``per_reporter`` batches per reporter (the oldest leave first),
``reporters`` reporters, and ``budget_bytes`` for everything (an estimate per entry and per
reporter, see :data:`ENTRY_BYTES`): over it, the least recently seen reporter's window
goes first, then the oldest batches of the reporter being served.  Every batch that
leaves the window is counted (:attr:`Dedup.evictions`, by cause ``window`` or ``budget``).

*High-water mark.*  A batch leaving the window raises its reporter's mark to at least its
number.  A batch at or below the mark that is not in the window is **stale**: it may have
been applied (an acknowledgement lost, the batch re-sent after its entry left), so it is
never applied again — the owner refuses it whole with a specific reason (it cannot repeat
an acknowledgement it no longer has, and a plain acknowledgement would claim rows it
cannot vouch for).  Reporters number batches upwards (routerd's reporter starts at the
clock in microseconds), so a mark only ever catches re-sent batches, and a batch that was
held back (``rate_limited``, ``unavailable``) for longer than its reporter's window lasted:
that one is refused loudly, never applied twice and never acknowledged as applied.

*Marks are never forgotten.*  Forgetting a mark would let a re-sent batch apply twice, so
the table of marks holds one entry per reporter name ever admitted, bounded by
``marks_budget_bytes`` (name bytes plus :data:`MARK_BYTES` each).  With CURVE the allow
file bounds the names; without it any string up to 256 bytes is a name, so the budget is
what bounds them: when it is full a batch from a *new* name is refused whole
(:data:`FULL`, counted) while every known reporter keeps working.  Restoring a snapshot
or replaying the journal never drops a mark, even past the budget (then new names are
refused until the operator raises the budget).

*State.*  :meth:`Dedup.export` gives plain values and numpy arrays (for the snapshot);
:meth:`Dedup.restore` reads that and the older list-of-tuples form.  Replaying journal
``batch`` records through :meth:`Dedup.put` in order rebuilds windows and marks exactly.
"""
from __future__ import annotations

from collections import OrderedDict
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from itertools import islice
from typing import Any

import numpy as np

#: Rejections remembered per batch (a repeated acknowledgement lists at most this many).
REJECTIONS_KEPT = 256
#: Estimated bytes of one window entry without rejections (dict slot, int key, the value
#: tuple and its ints); a packed rejection list adds its length plus :data:`BLOB_BYTES`.
ENTRY_BYTES = 160
BLOB_BYTES = 40
#: Estimated bytes of one reporter's window (its OrderedDict and the outer entry) on top of
#: its entries, plus the name's UTF-8 length.
REPORTER_BYTES = 420
#: Estimated bytes of one mark (dict slot, the name string, the int), plus the name length.
MARK_BYTES = 120

#: What :meth:`Dedup.check` says about a batch.
FRESH = "fresh"     # never seen: apply it
REPEAT = "repeat"   # in the window: answer with the stored acknowledgement
STALE = "stale"     # at or below the reporter's mark, not in the window: refuse, never apply
FULL = "full"       # a reporter name not yet known and no room for its mark: refuse

_REJ = np.dtype([("row", "<u4"), ("why", "u1")])


@dataclass(frozen=True, slots=True)
class Seen:
    """The answer of :meth:`Dedup.check`."""

    kind: str
    accepted: int = 0
    rejected: tuple[tuple[int, str], ...] = ()
    mark: int = -1          # the reporter's high-water mark (-1: none yet)


class Dedup:
    """Recent batch numbers per reporter with their acknowledgements, and marks."""

    def __init__(self, reasons: Sequence[str], *, per_reporter: int = 1024,
                 reporters: int = 4096, budget_bytes: int = 4 << 20,
                 marks_budget_bytes: int = 8 << 20):
        if len(reasons) > 255 or len(set(reasons)) != len(reasons):
            raise ValueError("reasons must be distinct and at most 255")
        if min(per_reporter, reporters, budget_bytes, marks_budget_bytes) < 1:
            raise ValueError("dedup bounds must be >= 1")
        self.reasons = tuple(reasons)
        self._code = {r: i for i, r in enumerate(self.reasons)}
        self.per_reporter = per_reporter
        self.reporters = reporters
        self.budget_bytes = budget_bytes
        self.marks_budget_bytes = marks_budget_bytes
        # reporter -> batch -> (accepted, packed rejections or b"")
        self._by: OrderedDict[str, OrderedDict[int, tuple[int, bytes]]] = OrderedDict()
        self._cost: dict[str, int] = {}      # bytes estimated per reporter window
        self.bytes = 0
        self._entries = 0
        self.marks: dict[str, int] = {}
        self.marks_bytes = 0
        self.evictions = {"window": 0, "budget": 0}
        self.refused_full = 0

    # ---- lookups -------------------------------------------------------------------------
    def check(self, reporter: str, batch: int) -> Seen:
        """What to do with this batch (see the module docstring); counts FULL refusals."""
        w = self._by.get(reporter)
        if w is not None:
            hit = w.get(batch)
            if hit is not None:
                return Seen(REPEAT, hit[0], self._unpack(hit[1]), self.marks.get(reporter, -1))
        mark = self.marks.get(reporter)
        if mark is None:
            if self.marks_bytes + _mark_cost(reporter) > self.marks_budget_bytes:
                self.refused_full += 1
                return Seen(FULL)
            return Seen(FRESH)
        if batch <= mark:
            return Seen(STALE, mark=mark)
        return Seen(FRESH, mark=mark)

    def get(self, reporter: str, batch: int) -> tuple[int, tuple[tuple[int, str], ...]] | None:
        """The stored acknowledgement (accepted, rejections) of a batch in the window."""
        w = self._by.get(reporter)
        hit = None if w is None else w.get(batch)
        return None if hit is None else (hit[0], self._unpack(hit[1]))

    # ---- recording -----------------------------------------------------------------------
    def put(self, reporter: str, batch: int, accepted: int, rejected: Iterable[Any]) -> None:
        """Remember an applied batch and its acknowledgement (then enforce the bounds)."""
        if reporter not in self.marks:
            self.marks[reporter] = -1
            self.marks_bytes += _mark_cost(reporter)
        w = self._by.get(reporter)
        if w is None:
            w = self._by[reporter] = OrderedDict()
            self._cost[reporter] = REPORTER_BYTES + len(reporter.encode("utf-8", "surrogatepass"))
            self.bytes += self._cost[reporter]
        else:
            self._by.move_to_end(reporter)
        blob = self._pack(rejected)
        old = w.pop(batch, None)
        if old is not None:
            self._drop_cost(reporter, old)
        w[batch] = (int(accepted), blob)
        c = ENTRY_BYTES + (len(blob) + BLOB_BYTES if blob else 0)
        self._cost[reporter] += c
        self.bytes += c
        self._entries += 1
        while len(w) > self.per_reporter:
            self._evict_oldest(reporter, w, "window")
        while len(self._by) > self.reporters:
            self._evict_reporter(next(iter(self._by)))
        while self.bytes > self.budget_bytes:
            first = next(iter(self._by))
            if first != reporter:
                self._evict_reporter(first)
            elif len(w) > 1:
                self._evict_oldest(reporter, w, "budget")
            else:
                break   # one batch over the budget on its own: kept until the next one

    def _evict_oldest(self, reporter: str, w: OrderedDict[int, tuple[int, bytes]], cause: str) -> None:
        b, v = w.popitem(last=False)
        self._drop_cost(reporter, v)
        if b > self.marks[reporter]:
            self.marks[reporter] = b
        self.evictions[cause] += 1

    def _evict_reporter(self, reporter: str) -> None:
        w = self._by.pop(reporter)
        if w:
            m = max(w)
            if m > self.marks[reporter]:
                self.marks[reporter] = m
        self.evictions["budget"] += len(w)
        self._entries -= len(w)
        self.bytes -= self._cost.pop(reporter)

    def _drop_cost(self, reporter: str, v: tuple[int, bytes]) -> None:
        c = ENTRY_BYTES + (len(v[1]) + BLOB_BYTES if v[1] else 0)
        self._cost[reporter] -= c
        self.bytes -= c
        self._entries -= 1

    def _pack(self, rejected: Iterable[Any]) -> bytes:
        if type(rejected) is list and not rejected:
            return b""
        kept = list(islice(rejected, REJECTIONS_KEPT))
        if not kept:
            return b""
        rows, reasons = zip(*kept)
        a = np.empty(len(kept), dtype=_REJ)
        a["row"] = rows
        # a reason outside the set is our bug: KeyError
        a["why"] = list(map(self._code.__getitem__, map(str, reasons)))
        return a.tobytes()

    def _unpack(self, blob: bytes) -> tuple[tuple[int, str], ...]:
        if not blob:
            return ()
        a = np.frombuffer(blob, dtype=_REJ)
        rs = self.reasons
        return tuple((r, rs[c]) for r, c in zip(a["row"].tolist(), a["why"].tolist()))

    # ---- state -------------------------------------------------------------------------
    def export(self) -> dict[str, Any]:
        """Plain values and numpy arrays: windows in order (least recently seen first)."""
        windows = []
        for rep, w in self._by.items():
            windows.append([rep, np.fromiter(w.keys(), np.int64, len(w)),
                            np.fromiter((v[0] for v in w.values()), np.int64, len(w)),
                            [v[1] for v in w.values()]])
        return {"v": 2, "reasons": list(self.reasons), "marks": [[k, v] for k, v in self.marks.items()],
                "windows": windows}

    def restore(self, data: Any) -> None:
        """Add an :meth:`export` (or the older ``[[reporter, [[batch, accepted, rejections],
        ...]], ...]`` list) on top of what is held.  Never lowers a mark.  Evictions it
        causes are not counted (they happened, and were counted, before the snapshot)."""
        ev = dict(self.evictions)
        try:
            self._restore(data)
        finally:
            self.evictions = ev

    def _restore(self, data: Any) -> None:
        if isinstance(data, Mapping):
            names = list(data.get("reasons", ()))
            for rep, mark in data.get("marks", ()):
                rep = str(rep)
                if rep not in self.marks:
                    self.marks[rep] = -1
                    self.marks_bytes += _mark_cost(rep)
                self.marks[rep] = max(self.marks[rep], int(mark))
            for rep, bs, acc, blobs in data.get("windows", ()):
                for b, a, blob in zip(np.asarray(bs).tolist(), np.asarray(acc).tolist(), blobs):
                    rej: list[tuple[int, str]] = []
                    if blob:
                        arr = np.frombuffer(bytes(blob), dtype=_REJ)
                        rej = [(r, names[c]) for r, c in zip(arr["row"].tolist(), arr["why"].tolist())
                               if c < len(names) and names[c] in self._code]
                    self.put(str(rep), int(b), int(a), rej)
            return
        for rep, entries in data:
            for b, a, rj in entries:
                self.put(str(rep), int(b), int(a),
                         [(int(x[0]), str(x[1])) for x in rj if str(x[1]) in self._code])

    def knows(self, reason: str) -> bool:
        """Whether ``reason`` is one this window can store."""
        return reason in self._code

    def statistics(self) -> dict[str, int]:
        return {"entries": self._entries, "reporters": len(self._by), "bytes": self.bytes,
                "budget_bytes": self.budget_bytes, "marks": len(self.marks),
                "marks_bytes": self.marks_bytes, "marks_budget_bytes": self.marks_budget_bytes,
                "evicted_window": self.evictions["window"],
                "evicted_budget": self.evictions["budget"], "refused_full": self.refused_full}

    def __len__(self) -> int:
        return self._entries


def _mark_cost(reporter: str) -> int:
    return MARK_BYTES + len(reporter.encode("utf-8", "surrogatepass"))
