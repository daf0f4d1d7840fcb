"""Client side of wire protocol v1: a batching reporter, a table subscriber, control calls.

Owns the reporter's delivery rules (batch numbers, acknowledgements, retries, memory bound),
the subscriber's gap detection, the one-shot control request (:func:`control`) and
pipelined control requests (:class:`ControlPipe`).  Programs that talk to a service (the
agent, the closed-loop simulator, the shard front's fan-out) do so through these; none of
them needs zmq itself.  Every message shape
comes from :mod:`routerd.io.wire`; nothing is encoded here by hand.

Must not import: the engine, the journal, the service, prometheus.

Delivery (theory of operation).  A :class:`Reporter` numbers its batches (by default from
the wall clock in microseconds, so a restarted reporter with the same name never reuses a
number the service may still remember), sends each over a DEALER socket as soon as it is
full, and keeps it until the service acknowledges it.  A batch without an acknowledgement
after ``timeout_s`` is sent again with the *same* number (the service applies a batch
once and acknowledges repeats again; a send that cannot even be queued — no peer, e.g.
after a failed CURVE handshake — counts as one whose answer never came, ``blocked_sends``);
after ``retries`` resends :class:`DeliveryError` is raised and the batch stays pending
(the next :meth:`Reporter.flush` tries again).  Memory is bounded: at most ``max_pending`` unacknowledged batches of at most ``batch_rows`` rows; when
full, adding rows **blocks** until an acknowledgement frees a place, and raises
:class:`DeliveryError` if none comes within the retry budget.  LINGER is 0 on every socket:
delivery is certain once acknowledged, never because something was queued at exit.

Refusals.  A batch refused whole with a code of :data:`DEFER_CODES` (``rate_limited``: the
reporter is over its token bucket; ``unavailable``: the service cannot store it now) was
not applied and is kept: the reporter holds back every transmission for a backoff
(``backoff_s`` doubling per refusal of that batch, at most ``backoff_max_s``, with ±25 %
jitter from a per-reporter generator), then resends it with the *same* number.  A batch
refused so more than ``max_deferrals`` times raises :class:`DeliveryError` and stays
pending, as after the retry budget.  Any other whole-batch refusal is final: the batch is
dropped, counted in ``refused`` by code (``refused_rows``, ``refused_batches`` keep the
numbers, ``last_error`` the text) and :class:`ServiceError` is raised.  Deferred batches
count towards ``max_pending`` like any other, so the memory bound is unchanged; a
deferred batch may be applied after later ones (as after a lost acknowledgement).

CURVE.  ``curve=`` (:class:`routerd.io.security.ClientKeys`: our key pair and the service's
public key) on :class:`Reporter`, :class:`TableSubscriber` and :func:`control` makes every
socket a CURVE client before it connects.  A key the service does not allow, or the wrong
service key, cannot be told apart from an absent service: the handshake fails and nothing
is answered, so those calls time out (the messages say so).
"""
from __future__ import annotations

import math
import random
from collections import Counter, deque
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import zmq

from routerd.io import security, wire
from routerd.io.clock import SYSTEM, Clock

#: Whole-batch refusal codes after which the batch is kept and sent again later.
DEFER_CODES: tuple[str, ...] = ("rate_limited", "unavailable")


class DeliveryError(Exception):
    """Batches were not acknowledged within the retry budget (the service is unreachable,
    too slow, or kept refusing them as rate_limited / unavailable).  ``batches`` lists their
    numbers; they stay pending.  ``last_error``: the service's last refusal, if any."""

    def __init__(self, msg: str, batches: Sequence[int] = (), last_error: str | None = None):
        super().__init__(msg)
        self.batches = list(batches)
        self.last_error = last_error


class ServiceError(Exception):
    """The service refused a batch as a whole (an ``{"error": ...}`` reply)."""

    def __init__(self, reason: str, batch: int | None = None):
        super().__init__(f"service refused batch {batch}: {reason}" if batch is not None
                         else f"service error: {reason}")
        self.reason = reason
        self.batch = batch


class TransportError(ConnectionError):
    """The socket itself failed (a ZeroMQ error, e.g. its context was terminated): not a
    timeout and not a refusal by the service."""


class UnknownNode(ValueError):
    """A node name that is not in the service's node list (columnar format only: the named
    format sends it and the service counts it as ``unknown_node``)."""


@dataclass(frozen=True, slots=True)
class Ack:
    batch: int
    accepted: int
    rejected: tuple[tuple[int, str], ...]


def _socket(ctx: zmq.Context, kind: int, curve: security.ClientKeys | None = None) -> zmq.Socket:
    s = ctx.socket(kind)
    s.linger = 0                       # never block close/term on what is still queued
    s.setsockopt(zmq.RECONNECT_IVL, 100)
    s.setsockopt(zmq.RECONNECT_IVL_MAX, 2000)
    s.setsockopt(zmq.MAXMSGSIZE, 64 * 1024 * 1024)
    if curve is not None:
        curve.apply(s)                 # before connect: the handshake starts there
    return s


def _curve_hint(curve: security.ClientKeys | None) -> str:
    return ("" if curve is None else " (CURVE on: a key the service does not allow, or the "
            "wrong service key, looks the same as no service)")


def control(endpoint: str, request: Mapping[str, Any], timeout_s: float = 2.0, *,
            context: zmq.Context | None = None,
            curve: security.ClientKeys | None = None) -> dict[str, Any]:
    """One control request → its reply map (which may hold ``"error"``).  A fresh REQ
    socket with LINGER 0 each time, so a dead service costs ``timeout_s`` and never hangs.
    Raises TimeoutError when no reply arrives in time, wire.BadReply on a malformed one."""
    ctx = context or zmq.Context.instance()
    s = _socket(ctx, zmq.REQ, curve)
    try:
        s.connect(endpoint)
        try:
            s.send(wire.encode_request(request), flags=zmq.NOBLOCK)
        except zmq.Again:
            if not s.poll(int(timeout_s * 1000), zmq.POLLOUT):
                raise TimeoutError(f"could not send op {request.get('op')!r} to {endpoint} "
                                   f"within {timeout_s} s{_curve_hint(curve)}") from None
            s.send(wire.encode_request(request))
        if not s.poll(int(timeout_s * 1000), zmq.POLLIN):
            raise TimeoutError(f"no reply from {endpoint} to op {request.get('op')!r} "
                               f"within {timeout_s} s{_curve_hint(curve)}")
        return wire.decode_reply(s.recv())
    finally:
        s.close()


class ControlPipe:
    """Control requests over one DEALER socket: several in flight, answered in order by
    the service's REP socket (one per turn of its loop), without a round trip each.

    ``ask(requests)`` sends them all, then returns their reply maps in order (each may hold
    ``"error"``).  ``TimeoutError`` when not every reply came within ``timeout_s`` (the
    socket is then replaced, since the replies still owed would arrive out of step with
    the next requests), ``wire.BadReply`` on a malformed reply, :class:`TransportError`
    when the socket fails.  ``clock``: what ``timeout_s`` is measured on; the socket is
    polled with real timeouts (under a :class:`~routerd.io.clock.FakeClock` the wait ends
    only with the replies).  ``curve``: client CURVE keys, as for :func:`control`.
    """

    def __init__(self, endpoint: str, timeout_s: float = 2.0, *,
                 context: zmq.Context | None = None,
                 curve: security.ClientKeys | None = None, clock: Clock = SYSTEM):
        self.endpoint = endpoint
        self.timeout_s = timeout_s
        self.curve = curve
        self.clock = clock
        self._ctx = context or zmq.Context.instance()
        self._sock: zmq.Socket | None = None
        self._open()

    def _open(self) -> None:
        try:
            self._sock = _socket(self._ctx, zmq.DEALER, self.curve)
            self._sock.connect(self.endpoint)
        except zmq.ZMQError as e:
            raise TransportError(f"control pipe to {self.endpoint}: {e}") from None

    def ask(self, requests: Sequence[Mapping[str, Any]]) -> list[dict[str, Any]]:
        if self._sock is None:
            raise TransportError(f"control pipe to {self.endpoint} is closed")
        try:
            for r in requests:
                self._sock.send_multipart([b"", wire.encode_request(r)])
            out: list[dict[str, Any]] = []
            deadline = self.clock.monotonic() + self.timeout_s
            while len(out) < len(requests):
                left = deadline - self.clock.monotonic()
                if left <= 0 or not self._sock.poll(max(1, int(left * 1000)), zmq.POLLIN):
                    self._sock.close(0)
                    self._open()
                    raise TimeoutError(f"no reply from {self.endpoint} to "
                                       f"{len(requests) - len(out)} of {len(requests)} control "
                                       f"requests within {self.timeout_s:g} s"
                                       f"{_curve_hint(self.curve)}")
                out.append(wire.decode_reply(self._sock.recv_multipart()[-1]))
            return out
        except zmq.ZMQError as e:
            raise TransportError(f"control pipe to {self.endpoint}: {e}") from None

    def close(self) -> None:
        """Idempotent."""
        if self._sock is not None:
            self._sock.close(0)
            self._sock = None

    def __enter__(self) -> ControlPipe:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


@dataclass
class _Pending:
    frame: bytes
    rows: int
    sent_at: float | None
    attempts: int
    cols: tuple[np.ndarray, ...] | None      # columnar: (src, via, dst, lat, est) indices
    links: list[list[Any]]
    nodes: tuple[str, ...] | None
    deferrals: int = 0                       # rate_limited / unavailable replies so far
    deferred: bool = False                   # refused for now: resend after the backoff
    sent_once: bool = False                  # queued for sending at least once


class Reporter:
    """Batches hop (and link) rows by node name and delivers them with acknowledgements.

    ``endpoint``: the service's ingest endpoint.  Columnar (default) needs the node list:
    ``topology_nodes`` (a Topology, or names with ``topology_id``, else the id is computed
    from the names) or ``control`` (the control endpoint, asked ``{"op": "nodes"}``).
    ``curve``: client CURVE keys for both endpoints.  ``backoff_s``, ``backoff_max_s``,
    ``max_deferrals``: the handling of rate_limited / unavailable refusals (module docstring).
    ``clock``: where timeouts, backoffs and the first batch number read time
    (:mod:`routerd.io.clock`).  Under a :class:`~routerd.io.clock.FakeClock` only the calls that
    do not wait (``pump(0)``, adding rows and ``send_now`` while fewer than ``max_pending``
    batches are pending) make progress by themselves: ``flush`` and a full reporter wait
    for virtual time that only the test moves.
    """

    def __init__(self, endpoint: str, reporter_name: str, *,
                 topology_nodes: Any = None, topology_id: str | None = None,
                 control: str | None = None, columnar: bool = True, batch_rows: int = 1024,
                 max_pending: int = 16, timeout_s: float = 2.0, retries: int = 5,
                 first_batch: int | None = None, context: zmq.Context | None = None,
                 on_ack: Callable[[Ack], None] | None = None,
                 curve: security.ClientKeys | None = None, backoff_s: float = 0.05,
                 backoff_max_s: float = 2.0, max_deferrals: int = 30, clock: Clock = SYSTEM):
        if not reporter_name or len(reporter_name) > wire.MAX_REPORTER_LEN:
            raise ValueError(f"reporter name {reporter_name!r} must be 1..{wire.MAX_REPORTER_LEN} characters")
        if batch_rows < 1 or max_pending < 1 or timeout_s <= 0 or retries < 0:
            raise ValueError("batch_rows and max_pending must be >= 1, timeout_s > 0, retries >= 0")
        if not 0 < backoff_s <= backoff_max_s or max_deferrals < 0:
            raise ValueError("need 0 < backoff_s <= backoff_max_s and max_deferrals >= 0")
        self.curve = curve
        self.clock = clock
        self.backoff_s = float(backoff_s)
        self.backoff_max_s = float(backoff_max_s)
        self.max_deferrals = int(max_deferrals)
        self._hold_until = 0.0                # monotonic: no transmissions before this
        self._last_reply = -math.inf
        self.endpoint = endpoint
        self.name = reporter_name
        self.columnar = columnar
        self.batch_rows = batch_rows
        self.max_pending = max_pending
        self.timeout_s = float(timeout_s)
        self.retries = retries
        self.control_endpoint = control
        self.on_ack = on_ack
        self._ctx = context or zmq.Context.instance()
        self.nodes: tuple[str, ...] | None = None
        self.topology_id: str | None = None
        self._index: dict[str, int] = {}
        if columnar:
            self._set_nodes(topology_nodes, topology_id)
        self._next_batch = clock.wall_ns() // 1000 if first_batch is None else int(first_batch)
        self._pending: dict[int, _Pending] = {}
        self._order: deque[int] = deque()
        self._clear_buffer()
        # statistics
        self.batches_sent = 0
        self.resends = 0
        self.accepted = 0
        self.rejected: Counter[str] = Counter()
        self.late_acks = 0
        self.blocked_sends = 0
        self.last_ack: Ack | None = None
        self.deferred: Counter[str] = Counter()     # rate_limited / unavailable replies
        self.refused: Counter[str] = Counter()      # final whole-batch refusals, by code
        self.refused_rows = 0
        self.refused_batches: deque[tuple[int | None, str, int]] = deque(maxlen=64)
        self.last_error: str | None = None          # the latest refusal's full text
        # jitter of the backoff: a generator of our own (no global random state)
        self._rng = random.Random(f"{reporter_name}/{self._next_batch}")
        self._sock = _socket(self._ctx, zmq.DEALER, curve)
        self._sock.sndhwm = max(2 * max_pending, 16)
        self._sock.rcvhwm = max(2 * max_pending, 16)
        self._sock.connect(endpoint)

    # ---- node list --------------------------------------------------------------------
    def _set_nodes(self, nodes: Any, tid: str | None) -> None:
        if nodes is None:
            if self.control_endpoint is None:
                raise ValueError("the columnar format needs the service's node list: pass "
                                 "control=<control endpoint> or topology_nodes=..., "
                                 "or use columnar=False")
            rep = control(self.control_endpoint, {"op": "nodes"}, self.timeout_s,
                          context=self._ctx, curve=self.curve)
            if "error" in rep or not isinstance(rep.get("nodes"), list):
                raise ServiceError(f"op 'nodes' answered {rep!r}")
            nodes, tid = rep["nodes"], rep["topology"]
        elif hasattr(nodes, "nodes") and hasattr(nodes, "digest"):
            nodes, tid = nodes.nodes, nodes.digest
        self.nodes = tuple(nodes)
        self.topology_id = tid if tid is not None else wire.topology_id(self.nodes)
        self._index = {n: i for i, n in enumerate(self.nodes)}

    def _ix(self, name: str) -> int:
        try:
            return self._index[name]
        except KeyError:
            raise UnknownNode(f"node {name!r} is not in the service's node list "
                              f"(topology {self.topology_id})") from None

    # ---- adding rows --------------------------------------------------------------------
    def _clear_buffer(self) -> None:
        self._s: list[Any] = []
        self._v: list[Any] = []
        self._d: list[Any] = []
        self._lat: list[float] = []
        self._est: list[float] = []
        self._has_est = False
        self._rows: list[list[Any]] = []
        self._links: list[list[Any]] = []

    def _buffered(self) -> int:
        return len(self._lat) + len(self._rows) + len(self._links)

    def add_hop(self, frm: str, via: str, dst: str, latency_s: float,
                estimate_s: float | None = None) -> None:
        """One hop: ``frm`` handed a packet for ``dst`` to ``via``; it took ``latency_s``."""
        if self.columnar:
            self._s.append(self._ix(frm)); self._v.append(self._ix(via)); self._d.append(self._ix(dst))
            self._lat.append(latency_s)
            if estimate_s is None:
                self._est.append(np.nan)
            else:
                self._est.append(estimate_s)
                self._has_est = True
        else:
            self._rows.append([frm, via, dst, latency_s] if estimate_s is None
                              else [frm, via, dst, latency_s, estimate_s])
        if self._buffered() >= self.batch_rows:
            self._send_buffer()

    def add_hops(self, frm: Sequence[str], via: Sequence[str], dst: Sequence[str],
                 latency_s: Sequence[float], estimate_s: Sequence[float] | None = None) -> None:
        """Many hops at once (columns of names and seconds)."""
        est = [None] * len(frm) if estimate_s is None else estimate_s
        for a, b, c, x, e in zip(frm, via, dst, latency_s, est):
            self.add_hop(a, b, c, x, None if e is None or math.isnan(e) else e)

    def add_link(self, frm: str, to: str, state: str) -> None:
        """A link event: ``state`` is "down" or "up"."""
        if state not in wire.LINK_STATES:
            raise ValueError(f"link state {state!r} is not 'down' or 'up'")
        if self.columnar:
            self._ix(frm), self._ix(to)
        self._links.append([frm, to, state])
        if self._buffered() >= self.batch_rows:
            self._send_buffer()

    # ---- sending --------------------------------------------------------------------------
    def _send_buffer(self) -> None:
        n = self._buffered()
        if n == 0:
            return
        self._wait_for_room()
        b = self._next_batch
        self._next_batch += 1
        if self.columnar:
            assert self.topology_id is not None
            cols = (np.array(self._s, dtype=np.int32), np.array(self._v, dtype=np.int32),
                    np.array(self._d, dtype=np.int32), np.array(self._lat, dtype=np.float64),
                    np.array(self._est, dtype=np.float64))
            frame = wire.encode_ingest_cols(self.name, b, self.topology_id, *cols[:4],
                                            estimate=cols[4] if self._has_est else None,
                                            links=self._links)
            p = _Pending(frame, n, None, 0, cols, self._links, self.nodes)
        else:
            frame = wire.encode_ingest_rows(self.name, b, self._rows, self._links)
            p = _Pending(frame, n, None, 0, None, self._links, None)
        self._clear_buffer()
        self._pending[b] = p
        self._order.append(b)
        self._transmit(b, p)

    def _transmit(self, b: int, p: _Pending) -> None:
        now = self.clock.monotonic()
        if now < self._hold_until:
            return  # the service asked us to wait (rate_limited / unavailable): the pump sends it later
        # a try, answered or not, starts the timeout and takes one of the retry budget
        p.sent_at = now
        p.attempts += 1
        p.deferred = False
        try:
            self._sock.send_multipart([b"", p.frame], flags=zmq.NOBLOCK, copy=False)
        except zmq.Again:
            # nowhere to queue it (no peer: e.g. after a failed CURVE handshake; or the
            # queue full): counted like a send whose answer never comes
            self.blocked_sends += 1
            return
        if p.sent_once:
            self.resends += 1
        else:
            self.batches_sent += 1
            p.sent_once = True

    def _wait_for_room(self) -> None:
        if len(self._pending) < self.max_pending:
            return
        budget = self.timeout_s * (self.retries + 1)
        start = self.clock.monotonic()
        full = (f"no room for another batch: {len(self._pending)} batches pending at "
                f"{self.endpoint} (the limit is {self.max_pending})")
        while len(self._pending) >= self.max_pending:
            # any reply (a refusal to be sent again later too) shows the service is there:
            # the budget runs from the latest one; max_deferrals bounds endless refusals
            left = max(start, self._last_reply) + budget - self.clock.monotonic()
            if left <= 0:
                raise DeliveryError(f"{full} and none acknowledged within {budget:g} s"
                                    f"{_curve_hint(self.curve)}", list(self._pending),
                                    self.last_error)
            try:
                self.pump(min(left, self.timeout_s / 4))
            except DeliveryError as e:   # a pending batch ran out of its budget first
                raise DeliveryError(f"{full}: {e}", e.batches, e.last_error) from None

    def pump(self, timeout_s: float = 0.0) -> int:
        """Take acknowledgements for up to ``timeout_s`` and resend overdue batches.
        Returns the number of replies handled."""
        handled = 0
        wait_ms = max(0, int(timeout_s * 1000))
        hold = self._hold_until - self.clock.monotonic()
        if hold > 0 and any(p.deferred for p in self._pending.values()):
            wait_ms = min(wait_ms, max(1, math.ceil(hold * 1000)))   # resend when the hold ends
        while self._sock.poll(wait_ms, zmq.POLLIN):
            frames = self._sock.recv_multipart()
            self._reply(frames[-1])
            handled += 1
            wait_ms = 0
        self._resend_overdue()
        return handled

    def _reply(self, data: bytes) -> None:
        rep = wire.decode_reply(data)
        self._last_reply = self.clock.monotonic()
        b = rep.get("batch")
        if "error" in rep:
            self._refusal(str(rep["error"]), b if isinstance(b, int) and not isinstance(b, bool)
                          else None)
            return
        if not isinstance(b, int) or b not in self._pending:
            self.late_acks += 1
            return
        rej = tuple((int(i), str(r)) for i, r in rep.get("rejected", ()))
        ack = Ack(b, int(rep.get("accepted", 0)), rej)
        self._drop(b)
        self.accepted += ack.accepted
        self.rejected.update(r for _, r in rej)
        self.last_ack = ack
        if self.on_ack is not None:
            self.on_ack(ack)

    def _refusal(self, reason: str, bn: int | None) -> None:
        """A whole-batch refusal: kept for later (:data:`DEFER_CODES`), resent by name
        (``wrong_topology`` of a columnar batch), or final (dropped, counted, raised)."""
        code = reason.split(":", 1)[0]
        p = self._pending.get(bn) if bn is not None else None
        if bn is not None and p is None:
            self.late_acks += 1   # a copy of a batch already acknowledged
            return
        if bn is not None and p is not None:
            if code in DEFER_CODES:
                self._defer(bn, p, code, reason)
                return
            if code == "wrong_topology" and p.cols is not None:
                self._reencode_named(bn, p)
                return
        self.refused[code] += 1
        self.last_error = reason
        if bn is not None and p is not None:
            self.refused_rows += p.rows
            self.refused_batches.append((bn, reason, p.rows))
            self._drop(bn)
        raise ServiceError(reason, bn)

    def _defer(self, b: int, p: _Pending, code: str, reason: str) -> None:
        """Keep batch ``b``; hold every transmission back for the backoff."""
        self.deferred[code] += 1
        self.last_error = reason
        p.deferrals += 1
        p.deferred = True
        p.attempts = 0            # the service answered: the timeout budget starts afresh
        delay = self.backoff_s * 2.0 ** min(p.deferrals - 1, 40) * (0.75 + 0.5 * self._rng.random())
        self._hold_until = max(self._hold_until, self.clock.monotonic() + min(delay, self.backoff_max_s))
        if p.deferrals > self.max_deferrals:
            n = p.deferrals
            p.deferrals = 0       # a later flush() starts a fresh budget
            raise DeliveryError(f"batch {b} refused {n} times by {self.endpoint} ({code}); it "
                                f"stays pending.  Last reply: {reason}", [b], reason)

    def _drop(self, b: int) -> None:
        del self._pending[b]
        try:
            self._order.remove(b)
        except ValueError:  # pragma: no cover - kept in step with _pending
            pass

    def _reencode_named(self, b: int, p: _Pending) -> None:
        """The service's node list changed under us: resend this batch by name (always
        meaningful; unknown names come back as unknown_node) and refetch the list."""
        assert p.cols is not None and p.nodes is not None
        names = np.array(p.nodes, dtype=object)
        s, v, d, lat, est = p.cols
        rows = [[a, y, c, float(x)] if math.isnan(e) else [a, y, c, float(x), float(e)]
                for a, y, c, x, e in zip(names[s], names[v], names[d], lat.tolist(), est.tolist())]
        p.frame = wire.encode_ingest_rows(self.name, b, rows, p.links)
        p.cols = None
        p.sent_at = None
        p.attempts = 0
        if self.control_endpoint is not None:
            self._set_nodes(None, None)
        else:
            self.columnar = False   # no way to learn the new list: named rows from now on
        self._transmit(b, p)

    def _resend_overdue(self) -> None:
        now = self.clock.monotonic()
        failed = []
        for b in list(self._order):
            p = self._pending[b]
            if p.sent_at is None or p.deferred:
                self._transmit(b, p)
            elif now - p.sent_at >= self.timeout_s:
                if p.attempts > self.retries:
                    failed.append(b)
                    continue
                self._transmit(b, p)
        if failed:
            for b in failed:
                self._pending[b].attempts = 0   # a later flush() starts a fresh budget
            raise DeliveryError(f"batches {failed[:5]}{'...' if len(failed) > 5 else ''} not "
                                f"acknowledged by {self.endpoint} after {self.retries} resends"
                                f"{_curve_hint(self.curve)}", failed, self.last_error)

    # ---- finishing ----------------------------------------------------------------------------
    @property
    def pending(self) -> int:
        """Unacknowledged batches."""
        return len(self._pending)

    @property
    def pending_rows(self) -> int:
        return sum(p.rows for p in self._pending.values()) + self._buffered()

    def send_now(self) -> None:
        """Send what is buffered as one batch now, without waiting for acknowledgements
        (blocks only as adding rows does: when ``max_pending`` batches are unacknowledged)."""
        self._send_buffer()

    def flush(self) -> None:
        """Send what is buffered and wait until every batch is acknowledged (or raise
        :class:`DeliveryError` when the retry budget runs out)."""
        self._send_buffer()
        while self._pending:
            self.pump(self.timeout_s / 4)

    def close(self, flush: bool = True) -> None:
        """Flush (unless ``flush=False``), then close the socket.  Unacknowledged batches
        are lost only with ``flush=False`` or after a DeliveryError."""
        try:
            if flush and not self._sock.closed:
                self.flush()
        finally:
            if not self._sock.closed:
                self._sock.close()

    def __enter__(self) -> Reporter:
        return self

    def __exit__(self, exc_type: object, *exc: object) -> None:
        self.close(flush=exc_type is None)


class TableSubscriber:
    """Keeps the latest table of every node from the service's PUB endpoint.

    Gap detection: within one ``epoch`` (one service run) ``seq`` rises by one per node per
    publication; a jump of k counts k - 1 missed publications in ``gaps[node]``.  A new
    epoch resets the count base (``restarts``); a ``seq`` that does not rise is counted in
    ``stale``.  ``curve``: client CURVE keys (a subscriber the service does not allow
    receives nothing).  ``clock``: what :meth:`wait_for`'s timeout is measured on.
    """

    def __init__(self, endpoint: str, nodes: Sequence[str] | None = None, *,
                 context: zmq.Context | None = None, max_drain: int = 100_000,
                 curve: security.ClientKeys | None = None, clock: Clock = SYSTEM):
        self.clock = clock
        self._ctx = context or zmq.Context.instance()
        self._sock = _socket(self._ctx, zmq.SUB, curve)
        self._sock.rcvhwm = 100_000
        # topics match by prefix ("tables/w1" also matches "tables/w10"): keep the set to
        # drop what a prefix lets through
        self.only: frozenset[str] | None = None if nodes is None else frozenset(nodes)
        if nodes is None:
            self._sock.setsockopt(zmq.SUBSCRIBE, wire.TABLE_TOPIC)
        else:
            for n in nodes:
                self._sock.setsockopt(zmq.SUBSCRIBE, wire.TABLE_TOPIC + n.encode())
        self._sock.connect(endpoint)
        self.max_drain = max_drain
        self.tables: dict[str, dict[str, list[list[Any]]]] = {}
        self.seq: dict[str, int] = {}
        self.epoch: dict[str, Any] = {}
        self.gaps: Counter[str] = Counter()
        self.stale: Counter[str] = Counter()
        self.restarts = 0
        self.received = 0
        self.malformed = 0
        self.last_error: str | None = None

    def _take(self, frames: list[bytes]) -> None:
        try:
            msg = wire.decode_table(frames)
        except wire.BadReply as e:
            self.malformed += 1
            self.last_error = str(e)
            return
        node, seq, ep = msg["node"], msg["seq"], msg.get("epoch")
        if self.only is not None and node not in self.only:
            return
        self.received += 1
        if node in self.seq and self.epoch.get(node) == ep:
            prev = self.seq[node]
            if seq <= prev:
                self.stale[node] += 1
                return
            if seq > prev + 1:
                self.gaps[node] += seq - prev - 1
        elif node in self.seq:
            self.restarts += 1
        self.seq[node] = seq
        self.epoch[node] = ep
        self.tables[node] = msg["routes"]

    def poll(self, timeout_s: float = 0.0) -> int:
        """Wait up to ``timeout_s`` for publications, take every one available; returns
        how many were taken."""
        got = 0
        wait_ms = max(0, int(timeout_s * 1000))
        while got < self.max_drain and self._sock.poll(wait_ms, zmq.POLLIN):
            self._take(self._sock.recv_multipart())
            got += 1
            wait_ms = 0
        return got

    def wait_for(self, predicate: Callable[[TableSubscriber], bool], timeout_s: float) -> bool:
        """Poll until ``predicate(self)`` holds or ``timeout_s`` passes."""
        deadline = self.clock.monotonic() + timeout_s
        while not predicate(self):
            left = deadline - self.clock.monotonic()
            if left <= 0:
                return False
            self.poll(min(left, 0.1))
        return True

    @property
    def gaps_total(self) -> int:
        return sum(self.gaps.values())

    def close(self) -> None:
        if not self._sock.closed:
            self._sock.close()

    def __enter__(self) -> TableSubscriber:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()
