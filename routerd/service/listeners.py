"""The service's listening endpoints: file-descriptor budget, connection cap, ipc claims.

Owns: how a listening ZeroMQ socket is made (:class:`SocketOptions`, :func:`bind_socket`:
the one place the service and the shard front set HWM, linger, MAXMSGSIZE, heartbeats,
ROUTER_MANDATORY, backlog and CURVE before binding), how many peer connections the listening ZeroMQ sockets of a service may hold at
once (:func:`fd_budget`), the pure accounting that decides when to stop and restart
taking new ones (:class:`Gate`), the shell that applies it to real sockets
(:class:`Listeners`: one monitor per listening socket, holding a listener without closing
it, cutting off a connection accepted over the cap), and the ipc:// endpoint check made
before every bind (:func:`claim_ipc`).  Must not import: the engine, the journal, the
simulator.

Theory of operation
-------------------
libzmq accepts connections in its I/O thread as long as the listening socket is bound,
and has no limit of its own.  When the process runs out of file descriptors, ``accept``
fails with EMFILE: on ipc:// libzmq 4.3 aborts the process (an assertion in
ipc_listener.cpp), on tcp:// the connection stays queued, the listener stays readable and
the I/O thread spins at full CPU.  So the service keeps the number of connections below
what its descriptor limit allows:

* at start-up the soft ``RLIMIT_NOFILE`` is raised to the hard limit (logged);
* the cap (``service.max_connections``; 0 = derived) is the limit minus the descriptors
  already open after binding, minus :data:`RESERVE` for the service's own later needs
  (journal segments, snapshot files, metrics scrapes) and :data:`BURST` per listening
  socket for connections libzmq may accept before the loop has read the monitor (each
  listener's ZMQ_BACKLOG is set to :data:`BURST`, so the kernel queues no more);
* every listening socket has a monitor (``EVENT_ACCEPTED``, ``EVENT_DISCONNECTED``,
  ``EVENT_ACCEPT_FAILED``); the :class:`Gate` counts open connections over all of them;
* when the count reaches the cap the listeners are *held*: an ipc:// socket file is moved
  aside (a connect finds no file), a tcp:// listener gets a socket filter that drops
  every incoming packet (a connect's SYN goes unanswered and the peer's kernel retries).
  The listener itself stays open: ``zmq_unbind`` would close every connection accepted
  through the endpoint too (libzmq 4.3 ends the listener's sessions with it; measured,
  and no disconnect event is sent for them).  Control sockets keep
  :data:`CONTROL_SHARE` connections of the cap for themselves, so an operator can still
  ask ``health`` while reporters flood the ingest;
* a connection accepted over the cap anyway (queued before the hold) is cut off at once
  (``shutdown`` of its descriptor; libzmq then closes it) and counted as refused; until
  its disconnect event it is counted apart (it uses the BURST headroom, not the cap), so
  a burst on the work sockets never takes the control share;
* when the count falls to :data:`LOW_WATER` of the cap the listeners are released;
* an ``EVENT_ACCEPT_FAILED`` (descriptors gone whatever we counted: something else used
  them) closes that listener, the only way to end the tcp spin, and it listens again a
  second later.

Each hold is logged once (and its end once); refusals, holds and open connections are
metrics.  The Gate is pure (events in, actions out) so its rules are tested without
sockets; its transitions are the table :data:`TRANSITIONS`.
"""
from __future__ import annotations

import contextlib
import os
import socket as _socket
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any

#: Descriptors kept free for the service's own use after start-up: a new journal segment,
#: a snapshot's temp file and directory fsync, metrics scrapes, a reload's config file,
#: the shard workers' pipes.  A value chosen with margin, not measured to the last one.
RESERVE = 24
#: Connections libzmq may accept on one listening socket between two reads of its
#: monitor (the kernel's accept queue is drained in one go): kept free per socket, and
#: the socket's ZMQ_BACKLOG is set to it so the kernel queue is no longer than that.
BURST = 32
#: Connections of the cap only control sockets may use.
CONTROL_SHARE = 8
#: Accepting starts again when open connections fall to this share of the cap.
LOW_WATER = 0.8
#: Sockets that are control sockets (the rest are work sockets); ``shards`` is the shard
#: front's endpoint where workers announce themselves.
CONTROL_SOCKETS = ("control", "control_ro", "shards")

#: The Gate's states and what moves it, as data (test_listeners walks it):
#: (state, level) -> state.  "open": every listener takes connections; "work_paused":
#: work listeners held, control ones still take them; "paused": every listener held.
#: The level is the number of open connections after a change: ``low`` at or below the
#: low-water mark, ``mid`` below the work limit (cap - CONTROL_SHARE), ``work`` from the
#: work limit to ``high`` (the upper half of the control share), ``cap`` at the cap.  Held
#: listeners wait for a lower level than the one that held them (no flapping at a limit).
TRANSITIONS: Mapping[tuple[str, str], str] = {
    ("open", "low"): "open", ("open", "mid"): "open", ("open", "work"): "work_paused",
    ("open", "high"): "work_paused", ("open", "cap"): "paused",
    ("work_paused", "low"): "open", ("work_paused", "mid"): "work_paused",
    ("work_paused", "work"): "work_paused", ("work_paused", "high"): "work_paused",
    ("work_paused", "cap"): "paused",
    ("paused", "low"): "open", ("paused", "mid"): "work_paused",
    ("paused", "work"): "work_paused", ("paused", "high"): "paused", ("paused", "cap"): "paused",
}
LEVELS = ("low", "mid", "work", "high", "cap")
STATES = ("open", "work_paused", "paused")


class EndpointInUse(Exception):
    """An ipc:// endpoint's socket file is held by a live listener of another process."""


def claim_ipc(endpoint: str, timeout_s: float = 0.5) -> str | None:
    """Before binding ``endpoint``: refuse it if another process listens there, clear a
    stale socket file left by a crash.  Returns a line for the log when a stale file was
    removed, else None; raises :class:`EndpointInUse` naming the endpoint.

    libzmq's ipc bind silently unlinks an existing file, which would steal the endpoint
    from a running service (its peers would connect to us from then on)."""
    if not endpoint.startswith("ipc://"):
        return None
    path = endpoint[len("ipc://"):]
    if not path or path == "*" or path.startswith("@"):   # wildcard or abstract name
        return None
    try:
        st = os.lstat(path)
    except FileNotFoundError:
        return None
    except OSError as e:
        raise EndpointInUse(f"{endpoint}: cannot look at the socket file ({e.strerror})") from None
    import stat

    if not stat.S_ISSOCK(st.st_mode):
        raise EndpointInUse(f"{endpoint}: {path} exists and is not a socket file")
    probe = _socket.socket(_socket.AF_UNIX, _socket.SOCK_STREAM)
    probe.settimeout(timeout_s)
    try:
        probe.connect(path)
    except (ConnectionRefusedError, FileNotFoundError):
        pass                     # nobody listens: a file left by a process that died
    except OSError as e:         # EAGAIN (its queue is full), a timeout: someone is there
        raise EndpointInUse(f"{endpoint}: in use by another process ({e.strerror or e})") from None
    else:
        raise EndpointInUse(f"{endpoint}: in use by another process (it accepts connections)")
    finally:
        probe.close()
    try:
        os.unlink(path)
    except FileNotFoundError:
        pass
    except OSError as e:
        raise EndpointInUse(f"{endpoint}: stale socket file, cannot remove it ({e.strerror})") from None
    return f"removed a stale socket file (nobody listened on it): {path}"


@dataclass(frozen=True)
class SocketOptions:
    """Options every listening socket of a process gets, set before ``bind``."""

    hwm: int                        # send and receive high-water marks, messages
    linger_ms: int
    max_message_bytes: int          # MAXMSGSIZE on every kind but PUB (it only sends)
    heartbeat_ms: int = 0           # ZMTP heartbeats (timeout and TTL 3x); 0 = off
    backlog: int | None = None      # ZMQ_BACKLOG; None = libzmq's default

    @classmethod
    def from_config(cls, cfg: Any, *, slack: int, heartbeats: bool = True,
                    backlog: int | None = BURST) -> SocketOptions:
        return cls(hwm=cfg["service.hwm_msgs"], linger_ms=int(cfg["service.linger_s"] * 1000),
                   max_message_bytes=cfg["service.max_message_bytes"] + slack,
                   heartbeat_ms=int(cfg["service.heartbeat_s"] * 1000) if heartbeats else 0,
                   backlog=backlog)


def bind_socket(ctx: Any, kind: int, endpoint: str, opts: SocketOptions, *,
                curve: tuple[bytes, bytes] | None = None) -> tuple[Any, str | None]:
    """A socket of ``kind`` with ``opts`` (and CURVE server keys ``(public, secret)``),
    bound to ``endpoint`` after :func:`claim_ipc`: (socket, the stale-file note or None).
    Raises :class:`EndpointInUse` or ``zmq.ZMQError`` with the socket already closed."""
    import zmq

    s = ctx.socket(kind)
    try:
        s.sndhwm = opts.hwm
        s.rcvhwm = opts.hwm
        s.linger = opts.linger_ms
        if kind != zmq.PUB:
            s.setsockopt(zmq.MAXMSGSIZE, opts.max_message_bytes)
        if opts.heartbeat_ms > 0:
            s.setsockopt(zmq.HEARTBEAT_IVL, opts.heartbeat_ms)
            s.setsockopt(zmq.HEARTBEAT_TIMEOUT, 3 * opts.heartbeat_ms)
            s.setsockopt(zmq.HEARTBEAT_TTL, 3 * opts.heartbeat_ms)
        if kind == zmq.ROUTER:
            # an answer for a peer that is gone (or whose queue is full) raises instead of
            # vanishing, so it is counted
            s.setsockopt(zmq.ROUTER_MANDATORY, 1)
        if opts.backlog is not None:
            # the kernel queues at most this many connects: libzmq's burst of accepts
            # before the loop reads the monitor is bounded by it
            s.setsockopt(zmq.BACKLOG, opts.backlog)
        if curve is not None:
            from routerd.io import security as _security

            _security.make_server(s, *curve)
        note = claim_ipc(endpoint)
        s.bind(endpoint)
    except BaseException:
        s.close(0)
        raise
    return s, note


def release_ipc(endpoints: Iterable[str]) -> None:
    """After our sockets are closed: remove the socket files of our ipc:// endpoints
    (libzmq 4.3 leaves them behind, and the next start would call them stale)."""
    import stat

    for ep in endpoints:
        if not ep.startswith("ipc://"):
            continue
        path = ep[len("ipc://"):]
        with contextlib.suppress(OSError):
            if stat.S_ISSOCK(os.lstat(path).st_mode):
                os.unlink(path)


# ---- the descriptor budget -------------------------------------------------------------
def close_transport(owner: Any, extra: Iterable[Any] = ()) -> None:
    """Close what a service or shard front opened, in a safe order (idempotent): its
    metrics server, then ``extra`` sockets (closed at once, linger 0), its listeners, its
    bound sockets, its authenticator, and last the ZeroMQ context, whose ipc files it claimed
    are then released.  The caller clears its own references to ``extra``."""
    if owner.metrics_server is not None:
        owner.metrics_server.shutdown()
        owner.metrics_server.server_close()
        owner.metrics_server = None
    for s in extra:
        if s is not None:
            s.close(0)
    if owner.listeners is not None:
        owner.listeners.close()
        owner.listeners = None
    for s in owner.sockets.values():
        s.close()
    owner.sockets = {}
    if owner.auth is not None:
        owner.auth.stop()
        owner.auth = None
    if owner.ctx is not None:
        owner.ctx.term()
        owner.ctx = None
        release_ipc(owner.endpoints.values())   # bound by us (claimed first)


def raise_nofile(log: Any = None) -> tuple[int, int, int]:
    """Raise the soft RLIMIT_NOFILE to the hard limit: (soft before, soft now, hard);
    said on ``log`` when it changed."""
    before, now, hard = _raise_nofile()
    if log is not None and now != before:
        log.info("raised the descriptor limit to the hard limit", before=before, now=now,
                 hard=hard)
    return before, now, hard


def _raise_nofile() -> tuple[int, int, int]:
    import resource

    soft, hard = resource.getrlimit(resource.RLIMIT_NOFILE)
    want = hard if hard != resource.RLIM_INFINITY else max(soft, 1 << 20)
    if soft != resource.RLIM_INFINITY and soft < want:
        try:
            resource.setrlimit(resource.RLIMIT_NOFILE, (want, hard))
        except (ValueError, OSError):
            return soft, soft, hard
        return soft, want, hard
    return soft, soft, hard


def open_fds() -> int:
    """Descriptors this process has open now (Linux /proc; elsewhere 0: no estimate)."""
    try:
        return len(os.listdir("/proc/self/fd")) - 1    # minus the listing's own
    except OSError:
        return 0


@dataclass(frozen=True)
class Budget:
    limit: int          # the soft RLIMIT_NOFILE in force
    in_use: int         # descriptors open when the cap was computed
    listeners: int      # listening sockets sharing the cap
    derived: int        # what the limit leaves for connections
    cap: int            # the cap in force (configured, or derived)

    def describe(self) -> str:
        return (f"{self.cap} connections (descriptor limit {self.limit}, {self.in_use} in "
                f"use, {RESERVE} kept for the service, {BURST} per listening socket x "
                f"{self.listeners} for bursts)")


def fd_budget(limit: int, in_use: int, listeners: int, configured: int) -> Budget:
    """The connection cap: ``configured`` when given (> 0) and within what the limit
    allows, else the derived value.  ValueError when the limit leaves no room at all."""
    derived = limit - in_use - RESERVE - BURST * listeners
    if derived < CONTROL_SHARE + 1:
        raise ValueError(f"the descriptor limit (RLIMIT_NOFILE {limit}, {in_use} already "
                         f"open) leaves no room for connections: raise it (ulimit -n, "
                         f"LimitNOFILE=) to at least {in_use + RESERVE + BURST * listeners + 64}")
    cap = derived if configured <= 0 else min(configured, derived)
    return Budget(limit, in_use, listeners, derived, max(cap, CONTROL_SHARE + 1))


# ---- the pure accounting -----------------------------------------------------------------
@dataclass
class Gate:
    """Open connections per listening socket against one cap (pure: no sockets).

    Each event returns the actions to take: ``("pause", names)``, ``("resume", names)``,
    ``("drop", fd)``.  Counts stay right whatever order accept and disconnect events of
    different sockets come in; a disconnect of an fd never seen accepted (a connection
    from before the counting started) is ignored.
    """

    cap: int
    names: tuple[str, ...]
    state: str = "open"
    open: dict[str, set[int]] = field(default_factory=dict)
    #: connections accepted over their limit and being cut off, until their disconnect
    #: event: outside the cap (they use the :data:`BURST` headroom), so a burst queued on
    #: the work sockets before a hold never takes the control share and holds control too
    cutting: dict[str, set[int]] = field(default_factory=dict)
    refused: dict[str, int] = field(default_factory=dict)
    accept_failures: dict[str, int] = field(default_factory=dict)
    pauses: int = 0

    def __post_init__(self) -> None:
        self.open = {n: set() for n in self.names}
        self.cutting = {n: set() for n in self.names}
        self.refused = dict.fromkeys(self.names, 0)
        self.accept_failures = dict.fromkeys(self.names, 0)

    @property
    def total(self) -> int:
        return sum(len(s) for s in self.open.values())

    @property
    def work_limit(self) -> int:
        return max(1, self.cap - CONTROL_SHARE) if any(
            n in CONTROL_SOCKETS for n in self.names) else self.cap

    @property
    def low_water(self) -> int:
        return int(self.work_limit * LOW_WATER)

    def paused(self) -> tuple[str, ...]:
        if self.state == "paused":
            return self.names
        if self.state == "work_paused":
            return tuple(n for n in self.names if n not in CONTROL_SOCKETS)
        return ()

    def _level(self) -> str:
        t = self.total
        if t >= self.cap:
            return "cap"
        if t >= self.cap - (self.cap - self.work_limit) // 2 and t > self.work_limit:
            return "high"
        if t >= self.work_limit:
            return "work"
        return "low" if t <= self.low_water else "mid"

    def _move(self, event: str) -> list[tuple[str, Any]]:
        before = set(self.paused())
        self.state = TRANSITIONS[(self.state, event)]
        after = set(self.paused())
        out: list[tuple[str, Any]] = []
        if after - before:
            if not before:
                self.pauses += 1
            out.append(("pause", tuple(n for n in self.names if n in after - before)))
        if before - after:
            out.append(("resume", tuple(n for n in self.names if n in before - after)))
        return out

    def accepted(self, name: str, fd: int) -> list[tuple[str, Any]]:
        limit = self.cap if name in CONTROL_SOCKETS else self.work_limit
        if self.total >= limit:
            self.refused[name] += 1
            self.cutting[name].add(fd)         # its disconnect event takes it off
            return [("drop", fd)]
        self.open[name].add(fd)
        return self._move(self._level())

    def disconnected(self, name: str, fd: int) -> list[tuple[str, Any]]:
        if fd in self.cutting[name]:
            self.cutting[name].discard(fd)
            return []
        if fd not in self.open[name]:
            return []
        self.open[name].discard(fd)
        return self._move(self._level())

    def accept_failed(self, name: str) -> list[tuple[str, Any]]:
        """EMFILE or ENFILE in libzmq's accept (tcp; the connection stays queued, so the
        I/O thread spins): out of descriptors whatever we counted.  Only closing the
        listener stops the spin, and that closes the socket's connections too."""
        self.accept_failures[name] += 1
        return [("reset", name)]

    def forget(self, name: str) -> list[tuple[str, Any]]:
        """``name``'s connections are gone without disconnect events (its listener was
        closed: libzmq closes the connections accepted through it)."""
        self.open[name].clear()
        self.cutting[name].clear()
        return self._move(self._level())

    def tick(self) -> list[tuple[str, Any]]:
        """Re-evaluate without an event (after an accept failure nothing may ever
        disconnect): called about once a second."""
        return self._move(self._level())


# ---- holding a listener without closing it -------------------------------------------------
_SO_ATTACH_FILTER = 26      # Linux <asm-generic/socket.h>
_SO_DETACH_FILTER = 27


def _drop_all_program() -> bytes:
    """A classic BPF socket filter of one instruction, ``ret #0`` (drop every packet),
    as the ``struct sock_fprog`` that SO_ATTACH_FILTER takes (Linux filter.txt)."""
    import ctypes

    class Insn(ctypes.Structure):
        _fields_ = [("code", ctypes.c_uint16), ("jt", ctypes.c_uint8), ("jf", ctypes.c_uint8),
                    ("k", ctypes.c_uint32)]

    class Prog(ctypes.Structure):
        _fields_ = [("len", ctypes.c_uint16), ("filter", ctypes.POINTER(Insn))]

    insns = (Insn * 1)(Insn(0x06, 0, 0, 0))      # BPF_RET | BPF_K, k = 0
    _KEEP.append(insns)                          # the kernel copies it; keep it alive anyway
    return bytes(Prog(1, insns))


_KEEP: list[Any] = []
_DROP_ALL = _drop_all_program()


def _aside(path: str) -> str:
    d, b = os.path.split(path)
    return os.path.join(d, f".{b}.paused-{os.getpid()}")


def _listening_fd(endpoint: str) -> int:
    """The descriptor of libzmq's listener for a tcp:// endpoint (a listening socket of
    ours on that port).  LookupError if there is none."""
    port = int(endpoint.rsplit(":", 1)[-1])
    for entry in os.listdir("/proc/self/fd"):
        fd = int(entry)
        try:
            s = _socket.socket(fileno=fd)
        except OSError:
            continue
        try:
            if (s.family in (_socket.AF_INET, _socket.AF_INET6)
                    and s.getsockopt(_socket.SOL_SOCKET, _socket.SO_ACCEPTCONN)
                    and s.getsockname()[1] == port):
                return fd
        except OSError:
            pass
        finally:
            s.detach()
    raise LookupError(f"no listening socket on {endpoint}")


# ---- the shell: real sockets --------------------------------------------------------------
class Listeners:
    """The listening sockets of one process, their monitors and the :class:`Gate`.

    ``sockets``/``endpoints``: name -> bound zmq socket / its resolved endpoint (the
    caller's dicts, read when pausing and resuming).  ``log``: the service's :class:`routerd.io.logs.EventLog`.
    Call :meth:`read` when any of :meth:`monitors` is readable (it never blocks)."""

    def __init__(self, sockets: Mapping[str, Any], endpoints: Mapping[str, str],
                 names: Iterable[str], budget: Budget, log: Any):
        import zmq

        self.sockets = sockets
        self.endpoints = endpoints
        self.budget = budget
        self.log = log
        self.gate = Gate(budget.cap, tuple(names))
        self.disconnects: dict[str, int] = dict.fromkeys(self.gate.names, 0)
        self._mon: dict[Any, str] = {}
        mask = zmq.EVENT_ACCEPTED | zmq.EVENT_DISCONNECTED | zmq.EVENT_ACCEPT_FAILED
        for n in self.gate.names:
            m = sockets[n].get_monitor_socket(mask)
            m.rcvhwm = 0     # every event counts: an event dropped would skew the count
            self._mon[m] = n
        self._held: set[str] = set()          # paused by a moved file / a socket filter
        self._closed: set[str] = set()        # unbound after an accept failure
        self._listen_fd: dict[str, int] = {}

    @classmethod
    def start(cls, sockets: Mapping[str, Any], endpoints: Mapping[str, str],
              configured: int, log: Any) -> Listeners:
        """After binding: the cap from the descriptor limit now in force and what is open
        (``configured``: ``service.max_connections``), a monitor on every socket of
        ``sockets``; logged.  ValueError when the limit leaves no room."""
        import resource

        # imported here, at start-up: its first import pulls in asyncio (about 40 ms), which
        # otherwise landed in the loop turn of the first connection event (read())
        import zmq.utils.monitor  # noqa: F401

        names = list(sockets)
        soft = resource.getrlimit(resource.RLIMIT_NOFILE)[0]
        # each monitor adds two sockets (ours and libzmq's end of the pair)
        budget = fd_budget(soft, open_fds() + 2 * len(names), len(names), configured)
        if 0 < configured != budget.cap:
            log.warning("service.max_connections is more than the descriptor limit allows; "
                        "using the derived cap", configured=configured, cap=budget.cap)
        out = cls(sockets, endpoints, names, budget, log)
        log.info("connection cap", detail=budget.describe())
        return out

    def monitors(self) -> list[Any]:
        return list(self._mon)

    def read(self) -> None:
        import zmq
        from zmq.utils.monitor import recv_monitor_message

        for m, name in self._mon.items():
            while True:
                try:
                    ev = recv_monitor_message(m, zmq.NOBLOCK)
                except zmq.Again:
                    break
                kind = ev.get("event")
                if kind == zmq.EVENT_ACCEPTED:
                    acts = self.gate.accepted(name, int(ev["value"]))
                elif kind == zmq.EVENT_DISCONNECTED:
                    self.disconnects[name] += 1
                    acts = self.gate.disconnected(name, int(ev["value"]))
                elif kind == zmq.EVENT_ACCEPT_FAILED:
                    acts = self.gate.accept_failed(name)
                else:
                    continue
                self._apply(acts)

    def waiting(self) -> bool:
        """True while a hold or a closed listener waits for :meth:`tick`."""
        return bool(self.gate.paused() or self._closed)

    def tick(self) -> None:
        """About once a second: listen again after an accept failure closed a listener."""
        self._apply(self.gate.tick())
        if self._closed:
            self._reopen()

    def _apply(self, acts: list[tuple[str, Any]]) -> None:
        for what, arg in acts:
            if what == "drop":
                self._drop(arg)
            elif what == "pause":
                self._pause(arg)
            elif what == "resume":
                self._resume(arg)
            else:
                self._reset(arg)

    def _pause(self, names: tuple[str, ...]) -> None:
        for n in names:
            self._hold(n, True)
        g = self.gate
        self.log.warning("connection cap reached: not accepting new connections until "
                         "some close (new connects wait or are refused meanwhile)",
                         sockets=",".join(names), open=g.total, cap=g.cap, resume_at=g.low_water)

    def _resume(self, names: tuple[str, ...]) -> None:
        for n in names:
            self._hold(n, False)
        self.log.info("accepting connections again", sockets=",".join(names),
                      open=self.gate.total, cap=self.gate.cap)

    def _hold(self, name: str, hold: bool) -> None:
        """Stop (or restart) taking new connections on ``name`` *without* closing its
        listener: libzmq's unbind would close every connection accepted through it.
        ipc: the socket file is moved aside (a connect finds no file) and back; tcp: a
        socket filter on the listener drops every incoming packet, so a connect's SYN goes
        unanswered and is retried by the peer's kernel until the filter is gone."""
        ep = self.endpoints[name]
        try:
            if ep.startswith("ipc://"):
                path = ep[len("ipc://"):]
                aside = _aside(path)
                if hold:
                    os.replace(path, aside)
                else:
                    os.link(aside, path)    # fails if another process took the path meanwhile
                    os.unlink(aside)
            elif ep.startswith("tcp://"):
                fd = self._listen_fd.get(name)
                if fd is None:
                    fd = self._listen_fd[name] = _listening_fd(ep)
                s = _socket.socket(fileno=fd)
                try:
                    if hold:
                        s.setsockopt(_socket.SOL_SOCKET, _SO_ATTACH_FILTER, _DROP_ALL)
                    else:
                        s.setsockopt(_socket.SOL_SOCKET, _SO_DETACH_FILTER, 0)
                finally:
                    s.detach()
            else:
                return            # inproc and the like: nothing to hold
        except (OSError, LookupError) as e:
            self.log.error("cannot " + ("pause" if hold else "resume") + " a listening endpoint",
                           socket=name, endpoint=ep, reason=str(e))
            if not hold and ep.startswith("ipc://") and name not in self._closed:
                # the file moved aside is gone, or another process took the path: without
                # a socket file nobody can connect again, so start this listener afresh
                self._held.discard(name)
                self._reset(name, "cannot put the ipc socket file back")
            return
        if hold:
            self._held.add(name)
        else:
            self._held.discard(name)

    def _reset(self, name: str, why: str = "out of file descriptors accepting a "
               "connection") -> None:
        """Close the listener and listen again on a later tick: after an accept failure
        (the only thing that stops the tcp spin), or when a held ipc socket file cannot
        be put back.  Its connections go with it (libzmq closes them with the listener)."""
        import zmq

        ep = self.endpoints[name]
        if name in self._closed:
            return
        if name in self._held:     # the listener goes anyway: no need to release it
            self._held.discard(name)
            with contextlib.suppress(OSError):
                if ep.startswith("ipc://"):
                    os.unlink(_aside(ep[len("ipc://"):]))
        with contextlib.suppress(zmq.ZMQError):
            self.sockets[name].unbind(ep)
        self._listen_fd.pop(name, None)
        self._closed.add(name)
        self.log.error(f"{why}: stopped listening (its connections closed); listening "
                       "again in a second", socket=name, endpoint=ep, open=self.gate.total,
                       cap=self.gate.cap)
        self._apply(self.gate.forget(name))

    def _reopen(self) -> None:
        import zmq

        for name in sorted(self._closed):
            ep = self.endpoints[name]
            try:
                note = claim_ipc(ep)
                self.sockets[name].bind(ep)
            except (zmq.ZMQError, EndpointInUse) as e:
                self.log.error("cannot listen again; retrying in a second", socket=name,
                               endpoint=ep, reason=str(e))
                continue
            if note:
                self.log.warning(note, socket=name)
            self._closed.discard(name)
            if name in self.gate.paused():
                self._hold(name, True)
            self.log.info("listening again", socket=name, endpoint=ep)

    def _drop(self, fd: int) -> None:
        """Cut off a connection accepted over the cap: shut its descriptor down (libzmq
        sees the end, closes it and reports the disconnect).  Only if the descriptor still
        is a connection to one of our listening endpoints (never anything else the number
        might have been reused for)."""
        try:
            s = _socket.socket(fileno=fd)
        except OSError:
            return
        try:
            local = s.getsockname()
            # never a listener (shutting one down would make libzmq's accept fail with
            # EINVAL, which it does not survive): the number may have been reused
            if not s.getsockopt(_socket.SOL_SOCKET, _socket.SO_ACCEPTCONN) and \
                    self._ours(s.family, local):
                s.shutdown(_socket.SHUT_RDWR)
        except OSError:
            pass
        finally:
            s.detach()

    def _ours(self, family: int, local: Any) -> bool:
        for ep in self.endpoints.values():
            if family == _socket.AF_UNIX and ep.startswith("ipc://"):
                if isinstance(local, str) and local == ep[len("ipc://"):]:
                    return True
            elif family in (_socket.AF_INET, _socket.AF_INET6) and ep.startswith("tcp://"):
                port = ep.rsplit(":", 1)[-1]
                if port.isdigit() and isinstance(local, tuple) and local[1] == int(port):
                    return True
        return False

    def figures(self) -> dict[str, Any]:
        g = self.gate
        return {"cap": g.cap, "open": {n: len(s) for n, s in g.open.items()},
                "cutting": {n: len(s) for n, s in g.cutting.items()},
                "refused": dict(g.refused), "accept_failures": dict(g.accept_failures),
                "pauses": g.pauses, "paused": list(g.paused()), "fd_limit": self.budget.limit,
                "resets": len(self._closed)}

    def close(self) -> None:
        import zmq

        for n in list(self._held):      # put moved socket files back: libzmq removes them
            self._hold(n, False)
        for m, n in self._mon.items():
            with contextlib.suppress(zmq.ZMQError):
                self.sockets[n].disable_monitor()
            m.close(0)
        self._mon = {}
