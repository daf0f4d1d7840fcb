"""The ingest pipeline: one frame and a time in; its answer, journal records and counts out.

Owns: everything that happens to an ingest frame between a socket and the journal —
decoding (:func:`wire.decode_ingest`), who may say it (with CURVE on, the frame's key is
one reporter of :mod:`routerd.io.security`), the storage state (no acknowledgement while
the journal cannot be written), duplicates (:mod:`routerd.service.dedup`), the per-reporter
rate limits and the plausibility guards (:mod:`routerd.core.guards`), the engine update
(:func:`journal.apply_batch`, the order replay uses) and the ``batch`` record that makes it
durable.  It returns values (:class:`Fed`) and does no I/O.

Must not import: zmq or anything that opens a socket or a file, :mod:`routerd.service.metrics`,
the daemon, the shard front, the simulator.  It reads no clock: the caller passes the
wall time (what the engine and the journal record) and the monotonic time (what the rate
limits measure), and, if it wants the engine's update time measured, a ``timer``.

Theory of operation
-------------------
Three shells drive the same object: the service's socket loop
(:mod:`routerd.service.daemon`), the shard front (:mod:`routerd.service.shard`, which applies
nothing itself) and the fuzzer (``.ci/fuzz_ingest.py``, no sockets at all).  A frame
passes the stages of :data:`STAGES` in order; the first one that answers ends it:

=========== ============================================ ===================================
stage        rule                                          answer when it stops the frame
=========== ============================================ ===================================
decode       :func:`wire.decode_ingest` (size, shape,      the decoder's error code
             rows, topology id); bad rows are rejected
             one by one, never the whole batch
who          CURVE on: the batch names the key's reporter  ``not_authorised``
storage      the journal can be written (``down`` unset)   ``unavailable``
duplicates   a batch number seen before is re-answered     the first answer (a duplicate),
             from the window, never applied twice          ``stale_batch``, ``reporters_full``
rate         the reporter's token buckets                  ``rate_limited`` (no tokens taken)
rights       CURVE on: rows leave the reporter's nodes     (rows) ``not_authorised``
guards       floor, ceiling, jump (engine shells only)     (rows) the guard's reason
engine       hops then links (:func:`journal.apply_batch`) (rows) the engine's reason
=========== ============================================ ===================================

:meth:`Pipeline.admit` runs decode to rights (what the shard front needs before it splits
a batch among its workers); :meth:`Pipeline.feed` runs them all and, for an applied batch,
returns the ``batch`` record and remembers the answer in the duplicate window;
:meth:`Pipeline.settle` remembers the answer of a batch applied elsewhere (the front's
workers).

The contract with the shell — why an acknowledgement always means "journaled":

1. Append every record of a :class:`Fed` to the journal before feeding the next frame.
2. Send no answer before the turn's group commit (one fsync for every frame of the turn).
3. If an append or the commit fails, the engine and the duplicate window hold a batch the
   journal may lack: put both back to what is stored (the shell assigns ``engine`` and
   ``dedup`` rebuilt from disk), set ``down`` to the reason, and send ``unavailable``
   (:func:`unavailable`) instead of the turn's acknowledgements.  While ``down`` is set
   the pipeline answers ``unavailable`` itself after the decode and who stages.
"""
from __future__ import annotations

import dataclasses
from collections import Counter
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from operator import itemgetter
from typing import Any

import numpy as np

from routerd.core import guards as _guards
from routerd.core import kernels as _kernels
from routerd.core.engine import Engine, HopBatch
from routerd.core.topology import Topology
from routerd.io import journal as _journal
from routerd.io import security as _security
from routerd.io import wire

from . import dedup as _dedup

__all__ = ["SERVICE_FRAME_ERRORS", "SERVICE_REASONS", "STAGES", "Counts", "Fed", "Pipeline",
           "dedup_refusal", "envelope", "extra_frames", "make_dedup", "unavailable"]

#: The stages in order (the table of the module docstring).
STAGES = ("decode", "who", "storage", "duplicates", "rate", "rights", "guards", "engine")
#: Service-side row rejection reasons (added to :data:`wire.REASONS` for the metrics):
#: duplicates, rows outside the reporter's rights, and the plausibility guards' reasons.
SERVICE_REASONS = ("duplicate", _security.NOT_AUTHORISED) + _guards.REASONS
#: Service-side whole-frame refusals (added to :data:`wire.FRAME_ERRORS`): a batch whose
#: key is not the named reporter's, a reporter over its rate, a journal that cannot be
#: written (nothing of the batch was stored: send it again later), a re-sent batch at or
#: below its reporter's high-water mark whose answer is no longer kept
#: (routerd.service.dedup), a new reporter name when the table of marks is full.
SERVICE_FRAME_ERRORS = (_security.NOT_AUTHORISED, _guards.RATE_LIMITED, "unavailable",
                        "stale_batch", "reporters_full")

#: A journal record to append: (kind, body) — :mod:`routerd.io.journal`'s kinds and bodies.
Record = tuple[str, Mapping[str, Any]]


@dataclass(frozen=True, slots=True, kw_only=True, eq=False)
class Counts:
    """What one frame adds to the service's counters (:meth:`metrics.Counters.add`).

    ``result`` is the batch outcome of :data:`metrics.BATCH_RESULTS`; ``refused`` the frame
    error code when the whole frame was refused (then ``result`` is ``"refused"``);
    ``rejected`` the rejected rows per reason; ``td_errors`` the |TD error| of every applied
    hop row; ``update_s`` the engine's time for the batch when a timer was given."""

    result: str
    refused: str | None = None
    rejected: tuple[tuple[str, int], ...] = ()
    observations: int = 0
    link_reports: int = 0
    td_errors: np.ndarray | None = None
    update_s: float | None = None

    def __post_init__(self) -> None:
        if self.result not in ("accepted", "duplicate", "refused"):
            raise ValueError(f"Counts.result: {self.result!r} is not a batch outcome")
        if (self.refused is None) != (self.result != "refused"):
            raise ValueError("Counts: a refused frame names its code, and only a refused one")


@dataclass(frozen=True, slots=True, kw_only=True, eq=False)
class Fed:
    """The outcome of one frame: ``answer`` (the reply frame's bytes: an ack or an error),
    ``batch`` (its number when it could be read), ``records`` (to append to the journal
    before the answer may go out), ``counts``, ``touched`` (the engine changed: a
    decision is due) and ``urgent`` (the source nodes of links that changed state: the
    shell decides at once and publishes their tables first)."""

    answer: bytes
    batch: int | None
    counts: Counts
    records: tuple[Record, ...] = ()
    touched: bool = False
    #: source nodes of the batch's links whose state changed (decided and published first)
    urgent: tuple[int, ...] = ()

    @property
    def refused(self) -> bool:
        return self.counts.refused is not None


def _refused(code: str, answer: bytes, batch: int | None) -> Fed:
    return Fed(answer=answer, batch=batch, counts=Counts(result="refused", refused=code))


def envelope(parts: list[bytes], routed: bool) -> tuple[list[bytes], list[bytes]]:
    """A received message as (reply envelope, payload frames): a ROUTER's routing id
    (``routed``) and an optional empty delimiter go back with the answer; the payload
    should then be exactly one frame (else :func:`extra_frames`)."""
    env: list[bytes] = []
    body = parts
    if routed:
        env, body = parts[:1], parts[1:]
    if body and body[0] == b"" and len(body) > 1:
        env, body = env + [b""], body[1:]
    return env, body


def extra_frames(n: int) -> Fed:
    """The answer to a message whose payload is not exactly one frame (``n`` of them)."""
    return _refused("extra_frames", wire.encode_error(
        f"extra_frames: expected one payload frame (after an optional empty delimiter), got {n}"),
        None)


def unavailable(reason: str | None, batch: int | None = None) -> Fed:
    """The answer while (or because) the journal cannot be written."""
    return _refused("unavailable", wire.encode_error(
        f"unavailable: the journal cannot be written ({reason}); nothing of this batch was "
        "stored, send it again later", batch), batch)


def make_dedup(cfg: Any) -> _dedup.Dedup:
    """The duplicate window with the config's bounds (service, shard workers and front)."""
    return _dedup.Dedup(wire.REASONS + SERVICE_REASONS, per_reporter=cfg["service.dedup_batches"],
                        reporters=cfg["service.dedup_reporters"],
                        budget_bytes=cfg["service.dedup_budget_bytes"],
                        marks_budget_bytes=cfg["service.dedup_marks_budget_bytes"])


def dedup_refusal(seen: _dedup.Seen, reporter: str, batch: int, dd: _dedup.Dedup) -> str:
    """The error text for a batch the duplicate window refuses (STALE or FULL)."""
    if seen.kind == _dedup.STALE:
        return (f"stale_batch: batch {batch} of reporter {wire._show(reporter)} is at or below "
                f"its high-water mark {seen.mark} and its acknowledgement is no longer kept "
                "(service.dedup_budget_bytes, service.dedup_batches): it may have been applied "
                "already, so it is not applied again; batch numbers must rise")
    st = dd.statistics()
    return (f"reporters_full: reporter {wire._show(reporter)} is new and the service already keeps "
            f"high-water marks for {st['marks']} reporter names (service.dedup_marks_budget_bytes "
            f"= {st['marks_budget_bytes']} is full; marks are never forgotten, so a re-sent batch "
            "cannot apply twice); known reporters are served; nothing was applied")


class Pipeline:
    """The ingest stages over one topology (see the module docstring).

    State it holds and the shell may replace: ``engine`` (None in the shard front, which
    applies nothing), ``dedup`` (the duplicate window), ``guards`` (rate buckets, jump
    references, their statistics), ``allow`` (CURVE on when set: the allowed reporters) and
    ``down`` (why the journal cannot be written; None when it can)."""

    def __init__(self, topo: Topology, cfg: Any, *, engine: Engine | None = None,
                 dedup: _dedup.Dedup | None = None, allow: _security.Allow | None = None,
                 timer: Callable[[], float] | None = None):
        self.topo = topo
        self.max_rows: int = cfg["service.max_rows"]
        self.max_bytes: int = cfg["service.max_message_bytes"]
        self.engine = engine
        self.dedup = dedup if dedup is not None else make_dedup(cfg)
        #: the compiled ingest kernels (columnar decode, guard screen) or None: the numpy
        #: reference (``engine.kernels``, as for the engine)
        self.kernels = _kernels.select(cfg["engine.kernels"])
        self.guards = _guards.Guards(topo, _guards.GuardSettings.from_config(cfg),
                                     kernels=self.kernels)
        self.allow = allow
        self.down: str | None = None
        self._timer = timer

    def reconfigure(self, cfg: Any) -> None:
        """A reloaded config: the guards' tunables (the size limits need a restart)."""
        self.guards.reconfigure(_guards.GuardSettings.from_config(cfg))

    # -- the stages -----------------------------------------------------------------------
    def admit(self, frame: bytes, peer: _security.Reporter | None, mono: float
              ) -> wire.Ingest | Fed:
        """Decode to rights: the batch that may go on (rows outside the reporter's rights
        already among its rejections), or the :class:`Fed` that answers the frame."""
        ing = wire.decode_ingest(frame, self.topo, max_rows=self.max_rows, max_bytes=self.max_bytes,
                                 kernels=self.kernels)
        if isinstance(ing, wire.WireError):
            return _refused(ing.code, wire.encode_error(ing), ing.batch)
        if self.allow is not None and (peer is None or peer.name != ing.reporter):
            who = "no allowed key" if peer is None else f"the key of reporter {peer.name!r}"
            return _refused(_security.NOT_AUTHORISED, wire.encode_error(
                f"not_authorised: the batch names reporter {wire._show(ing.reporter)} but came "
                f"with {who}", ing.batch), ing.batch)
        if self.down is not None:
            return unavailable(self.down, ing.batch)
        seen = self.dedup.check(ing.reporter, ing.batch)
        if seen.kind == _dedup.REPEAT:
            return Fed(answer=wire.encode_ack(ing.batch, seen.accepted, seen.rejected),
                       batch=ing.batch, counts=Counts(result="duplicate",
                                                      rejected=(("duplicate", ing.rows_total),)))
        if seen.kind != _dedup.FRESH:
            code = "stale_batch" if seen.kind == _dedup.STALE else "reporters_full"
            return _refused(code, wire.encode_error(
                dedup_refusal(seen, ing.reporter, ing.batch, self.dedup), ing.batch), ing.batch)
        if not self.guards.admit(ing.reporter, ing.rows_total, mono):
            g = self.guards.settings
            return _refused(_guards.RATE_LIMITED, wire.encode_error(
                f"rate_limited: reporter {wire._show(ing.reporter)} is over its rate "
                f"({g.rate_batches_per_s:g} batches/s, {g.rate_rows_per_s:g} rows/s; 0 = "
                "unlimited); nothing was applied, send it again later", ing.batch), ing.batch)
        return self._rights(ing, peer) if peer is not None else ing

    def feed(self, frame: bytes, peer: _security.Reporter | None, wall: float, mono: float) -> Fed:
        """Every stage: the frame's answer, and for an applied batch its ``batch`` record
        (the duplicate window already holds the answer: see the contract above)."""
        ing = self.admit(frame, peer, mono)
        if isinstance(ing, Fed):
            return ing
        return self._apply(self._guard(ing), wall)

    def settle(self, reporter: str, batch: int, accepted: int, rejected: list[list[Any]]) -> Fed:
        """A batch admitted here and applied elsewhere (the shard front's workers all
        acknowledged their pieces): remember its answer for a re-sent copy, and return it."""
        self.dedup.put(reporter, batch, accepted, rejected)
        return Fed(answer=wire.encode_ack(batch, accepted, rejected), batch=batch,
                   counts=Counts(result="accepted"))

    # -- helpers --------------------------------------------------------------------------
    @staticmethod
    def _rights(ing: wire.Ingest, peer: _security.Reporter) -> wire.Ingest:
        """Rows outside the reporter's nodes rejected ``not_authorised`` (wire numbering)."""
        hops, rows = ing.hops, ing.hop_rows
        links, link_rows = ing.links, ing.link_rows
        rej = list(ing.rejected)
        ok = _security.hop_rights(peer, hops.src)
        if not ok.all():
            rej += [(int(rows[i]), _security.NOT_AUTHORISED) for i in np.flatnonzero(~ok)]
            keep = np.flatnonzero(ok)
            hops, rows = hops.take(keep), rows[keep]
        lok = _security.link_rights(peer, links)
        if not all(lok):
            rej += [(r, _security.NOT_AUTHORISED) for r, k in zip(link_rows, lok) if not k]
            links = tuple(x for x, k in zip(links, lok) if k)
            link_rows = tuple(r for r, k in zip(link_rows, lok) if k)
        if hops is ing.hops and links is ing.links:
            return ing
        return dataclasses.replace(ing, hops=hops, hop_rows=rows, links=links,
                                   link_rows=link_rows, rejected=tuple(rej), raw_cols=None)

    def _guard(self, ing: wire.Ingest) -> wire.Ingest:
        """The plausibility guards on the hop rows; rejections join the batch's."""
        hops, rows = ing.hops, ing.hop_rows
        chk = self.guards.check(hops.src, hops.via, hops.dst, hops.latency, hops.estimate)
        if not (chk.rejected or chk.clipped):
            return ing
        k = chk.keep
        rej = list(ing.rejected) + [(int(rows[i]), r) for i, r in chk.rejected]
        hops = HopBatch(hops.src[k], hops.via[k], hops.dst[k], chk.latency, hops.estimate[k])
        return dataclasses.replace(ing, hops=hops, hop_rows=rows[k], rejected=tuple(rej),
                                   raw_cols=None)

    def _apply(self, ing: wire.Ingest, wall: float) -> Fed:
        eng = self.engine
        if eng is None:
            raise RuntimeError("Pipeline.feed needs an engine (the shard front calls admit)")
        timer = self._timer
        t0 = timer() if timer is not None else 0.0
        res, changed = _journal.apply_batch(eng, ing.hops, ing.links, wall)
        dt = timer() - t0 if timer is not None else None
        rejected = ing.rejections(res.rejected)
        accepted = res.accepted + len(ing.links)
        # every row as received was applied: journal the frame's own column bytes
        raw = ing.raw_cols if not len(res.rejected) else None
        record = ("batch", _journal.batch_body(
            ing.reporter, ing.batch, wall, _journal.accepted_part(ing.hops, res.rejected),
            ing.links, {"accepted": accepted, "rejected": rejected}, raw=raw))
        self.dedup.put(ing.reporter, ing.batch, accepted, rejected)
        by_reason = Counter(map(itemgetter(1), rejected)) if rejected else {}
        counts = Counts(result="accepted", rejected=tuple(by_reason.items()),
                        observations=res.accepted, link_reports=len(ing.links),
                        td_errors=np.abs(res.td_errors) if res.accepted else None, update_s=dt)
        return Fed(answer=wire.encode_ack(ing.batch, accepted, rejected), batch=ing.batch,
                   counts=counts, records=(record,), touched=bool(res.accepted or any(changed)),
                   urgent=tuple(int(lk[0]) for lk, c in zip(ing.links, changed) if c))
