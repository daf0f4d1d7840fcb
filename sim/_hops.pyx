# cython: language_level=3, boundscheck=False, wraparound=False, cdivision=True, initializedcheck=False
"""Compiled event loop of the simulator (Cython).  Use it through routerd.sim.core.run_core.

A transcription of the reference loop in sim/core.py, statement for statement where a
value is computed, so a run gives the same bits on either path (the build passes
-ffp-contract=off: no fused multiply-add).  What changes is where the state lives:

* the event heap is a C array of (time, code) kept by CPython's own heapq algorithm
  (``_siftdown`` / ``_siftup``, transcribed), so its layout is the reference heap's layout
  and a link cut walks the queued packets in the same order (its float sums agree);
* per-packet state is in C arrays; a link's FIFO queue is a ring of departure times;
* the next hop is read from the policy's ``table`` (a list of lists, read in place each
  hop, so a policy that rewrites entries is seen at once); ``-2`` calls ``next_hop``;
* hop observations go to the policy one call per hop (``on_hop``) or, for a policy with
  ``on_hops``, in batches of arrays flushed before every ``tick``, every ``on_link`` and
  at the end, so the policy has seen every hop before anything it does depends on them;
  or, for a policy with ``hop_rows`` (qrouting), written as rows into its :class:`QRows`,
  which also does that policy's ordering, cut, table refresh and estimates at each tick.

* a table entry -2 is sampled here for a policy that describes its splits
  (``split_arrays``; qrouting), with its own uniform draws and ``next_hop``'s arithmetic.

Everything that calls back (policy ticks and link events, progress, observer) stays a
Python call at the same virtual time as on the reference path.  ``refresh`` is qrouting's
table refresh (sim/policies.py, ``QRouting._refresh``) compiled.  No numpy C API (typed
memoryviews only); numpy makes the arrays handed over.  Imports nothing of routerd.
"""
from libc.stdlib cimport malloc, realloc, free
from libc.string cimport memcmp, memset
from libc.stdint cimport int64_t
from cpython.object cimport PyObject
from cpython.exc cimport PyErr_CheckSignals

import numpy as np

cdef extern from "Python.h":
    bint PyList_CheckExact(PyObject* o)
    long PyLong_AsLong(PyObject* o) except? -1
    PyObject* _GET_ITEM "PyList_GET_ITEM"(PyObject* o, Py_ssize_t i)
    Py_ssize_t _GET_SIZE "PyList_GET_SIZE"(PyObject* o)

# control event codes (packet ids are >= 0), as in sim/core.py
cdef enum:
    INJECT = -1
    TICK = -2
    SAMPLE = -3
    WARMUP = -4
    LINK0 = -5

# hops buffered before a batched on_hops call
cdef enum:
    HOPBUF = 8192


cdef struct Ev:
    double t
    int64_t c


cdef inline bint ev_lt(Ev a, Ev b) noexcept nogil:
    # tuple order of (t, c): the first unequal item decides
    if a.t == b.t:
        return a.c < b.c
    return a.t < b.t


cdef class _Heap:
    """A binary heap with CPython heapq's exact algorithm (same array layout)."""
    cdef Ev* a
    cdef Py_ssize_t n, cap

    def __cinit__(self):
        self.cap = 1024
        self.n = 0
        self.a = <Ev*>malloc(self.cap * sizeof(Ev))
        if self.a == NULL:
            raise MemoryError()

    def __dealloc__(self):
        free(self.a)

    cdef int push(self, double t, int64_t c) except -1:
        cdef Ev* na
        if self.n == self.cap:
            na = <Ev*>realloc(self.a, 2 * self.cap * sizeof(Ev))
            if na == NULL:
                raise MemoryError()
            self.a = na
            self.cap *= 2
        self.a[self.n].t = t
        self.a[self.n].c = c
        self.n += 1
        self._siftdown(0, self.n - 1)
        return 0

    cdef inline void _siftdown(self, Py_ssize_t startpos, Py_ssize_t pos) noexcept:
        cdef Ev newitem = self.a[pos]
        cdef Ev parent
        cdef Py_ssize_t parentpos
        while pos > startpos:
            parentpos = (pos - 1) >> 1
            parent = self.a[parentpos]
            if ev_lt(newitem, parent):
                self.a[pos] = parent
                pos = parentpos
                continue
            break
        self.a[pos] = newitem

    cdef inline void _siftup(self, Py_ssize_t pos) noexcept:
        cdef Py_ssize_t endpos = self.n
        cdef Py_ssize_t startpos = pos
        cdef Ev newitem = self.a[pos]
        cdef Py_ssize_t childpos = 2 * pos + 1
        cdef Py_ssize_t rightpos
        while childpos < endpos:
            rightpos = childpos + 1
            if rightpos < endpos and not ev_lt(self.a[childpos], self.a[rightpos]):
                childpos = rightpos
            self.a[pos] = self.a[childpos]
            pos = childpos
            childpos = 2 * pos + 1
        self.a[pos] = newitem
        self._siftdown(startpos, pos)

    cdef inline Ev pop(self) noexcept:
        # callers never pop an empty heap (the end marker is always there)
        cdef Ev last
        cdef Ev ret
        self.n -= 1
        last = self.a[self.n]
        if self.n == 0:
            return last
        ret = self.a[0]
        self.a[0] = last
        self._siftup(0)
        return ret


cdef struct Ring:
    double* v
    Py_ssize_t head, size, cap


cdef class _Queues:
    """Per link, the departure times still queued (non-decreasing), as a growable ring."""
    cdef Ring* q
    cdef Py_ssize_t nl

    def __cinit__(self, Py_ssize_t nl):
        cdef Py_ssize_t k
        self.nl = nl
        self.q = <Ring*>malloc((nl if nl > 0 else 1) * sizeof(Ring))
        if self.q == NULL:
            raise MemoryError()
        for k in range(nl):
            self.q[k].v = NULL
            self.q[k].head = 0
            self.q[k].size = 0
            self.q[k].cap = 0

    def __dealloc__(self):
        cdef Py_ssize_t k
        if self.q != NULL:
            for k in range(self.nl):
                free(self.q[k].v)
            free(self.q)

    cdef int append(self, Py_ssize_t k, double dep) except -1:
        cdef Ring* r = &self.q[k]
        cdef Py_ssize_t nc, i
        cdef double* nv
        if r.size == r.cap:
            nc = 8 if r.cap == 0 else 2 * r.cap
            nv = <double*>malloc(nc * sizeof(double))
            if nv == NULL:
                raise MemoryError()
            for i in range(r.size):
                nv[i] = r.v[(r.head + i) % r.cap]
            free(r.v)
            r.v = nv
            r.head = 0
            r.cap = nc
        r.v[(r.head + r.size) % r.cap] = dep
        r.size += 1
        return 0

    cdef inline Py_ssize_t occupancy(self, Py_ssize_t k, double t) noexcept:
        # drop departures at or before t: the count is then exact (the reference trims
        # lazily, but only where the count cannot reach the buffer size, see sim/core.py)
        cdef Ring* r = &self.q[k]
        while r.size > 0 and r.v[r.head] <= t:
            r.head += 1
            if r.head == r.cap:
                r.head = 0
            r.size -= 1
        return r.size

    cdef inline void clear(self, Py_ssize_t k) noexcept:
        self.q[k].size = 0
        self.q[k].head = 0


cdef class _Packets:
    """Per-packet state in C arrays, indexed by packet id (grown on demand)."""
    cdef int64_t* node
    cdef int64_t* dst       # -1 free id, -2 dropped with its arrival still pending
    cdef double* t0
    cdef int64_t* ttl
    cdef int64_t* flow
    cdef double* bits
    cdef int64_t* prev
    cdef double* enq
    cdef Py_ssize_t n, cap

    def __cinit__(self):
        self.n = 0
        self.cap = 0
        self.node = self.dst = self.ttl = self.flow = self.prev = NULL
        self.t0 = self.bits = self.enq = NULL

    def __dealloc__(self):
        free(self.node); free(self.dst); free(self.t0); free(self.ttl)
        free(self.flow); free(self.bits); free(self.prev); free(self.enq)

    cdef int grow(self) except -1:
        cdef Py_ssize_t nc = 1024 if self.cap == 0 else 2 * self.cap
        self.node = <int64_t*>_re(self.node, nc * sizeof(int64_t))
        self.dst = <int64_t*>_re(self.dst, nc * sizeof(int64_t))
        self.t0 = <double*>_re(self.t0, nc * sizeof(double))
        self.ttl = <int64_t*>_re(self.ttl, nc * sizeof(int64_t))
        self.flow = <int64_t*>_re(self.flow, nc * sizeof(int64_t))
        self.bits = <double*>_re(self.bits, nc * sizeof(double))
        self.prev = <int64_t*>_re(self.prev, nc * sizeof(int64_t))
        self.enq = <double*>_re(self.enq, nc * sizeof(double))
        self.cap = nc
        return 0


cdef void* _re(void* p, size_t size) except NULL:
    cdef void* q = realloc(p, size)
    if q == NULL:
        raise MemoryError()
    return q


cdef class _HopBuffer:
    """Hop observations waiting for one batched ``on_hops`` call."""
    cdef object x, y, d, lat, now, flow
    cdef int64_t[::1] xv, yv, dv, fv
    cdef double[::1] lv, nv
    cdef Py_ssize_t n

    def __cinit__(self):
        self.x = np.empty(HOPBUF, dtype=np.int64)
        self.y = np.empty(HOPBUF, dtype=np.int64)
        self.d = np.empty(HOPBUF, dtype=np.int64)
        self.flow = np.empty(HOPBUF, dtype=np.int64)
        self.lat = np.empty(HOPBUF, dtype=np.float64)
        self.now = np.empty(HOPBUF, dtype=np.float64)
        self.xv = self.x; self.yv = self.y; self.dv = self.d; self.fv = self.flow
        self.lv = self.lat; self.nv = self.now
        self.n = 0

    cdef int flush(self, object on_hops) except -1:
        cdef Py_ssize_t m = self.n
        if m == 0:
            return 0
        self.n = 0
        on_hops(self.x[:m].copy(), self.y[:m].copy(), self.d[:m].copy(),
                self.lat[:m].copy(), self.now[:m].copy(), self.flow[:m].copy())
        return 0


cdef class _Splits:
    """Random splits (table entry -2) sampled here instead of by ``policy.next_hop``, for a
    policy that describes them (``split_arrays()``, ``draws()`` / ``set_draws()``; see
    ``QRouting``): greedy hop ``gh[x, d]`` with weight 1 - eps, then each candidate slot in
    slot order with eps / count, cumulated left to right with the last weight set to 1,
    and one uniform draw per packet from the policy's own blocks of 4096 (the same draws,
    the same sums, the same comparisons as ``QRouting.next_hop``)."""
    cdef object arrays_fn, rng, block, arrays
    cdef const int64_t[:, ::1] gh
    cdef const double[:, ::1] eps
    cdef const unsigned char[:, :, ::1] alt
    cdef const int64_t[:, ::1] slots
    cdef const double[::1] u
    cdef Py_ssize_t ui, K

    def __cinit__(self, object policy):
        self.arrays_fn = policy.split_arrays
        self.rng = policy.rng
        block, self.ui = policy.draws()
        self.block = np.ascontiguousarray(block, dtype=np.float64)
        self.u = self.block
        self.update()

    cdef int update(self) except -1:
        arrays = self.arrays_fn()
        if self.arrays is not None and all(a is b for a, b in zip(arrays, self.arrays)):
            return 0   # the same arrays (written in place): already bound
        self.arrays = arrays
        gh, eps, alt, slots = arrays
        self.gh = gh
        self.eps = eps
        self.alt = alt
        self.slots = slots
        self.K = alt.shape[2]
        return 0

    cdef int64_t sample(self, int64_t x, int64_t d) except? -3:
        cdef double uu, e, share, acc, c
        cdef Py_ssize_t j, nalt = 0, cnt = 0
        cdef int64_t last = -1
        if self.ui >= self.u.shape[0]:
            self.block = self.rng.random(4096)
            self.u = self.block
            self.ui = 0
        uu = self.u[self.ui]
        self.ui += 1
        for j in range(self.K):
            if self.alt[x, d, j]:
                nalt += 1
        if nalt == 0:
            return self.gh[x, d]
        e = self.eps[x, d]
        share = e / nalt
        acc = 1.0 - e
        if uu < acc:
            return self.gh[x, d]
        for j in range(self.K):
            if self.alt[x, d, j]:
                cnt += 1
                acc += share
                c = 1.0 if cnt == nalt else acc
                last = self.slots[x, j]
                if uu < c:
                    return last
        return last

    def give_back(self, object policy):
        policy.set_draws(self.block, self.ui)


cdef class _FreeIds:
    """Packet ids free for reuse (a stack)."""
    cdef int64_t* a
    cdef Py_ssize_t n, cap

    def __cinit__(self):
        self.a = NULL
        self.n = 0
        self.cap = 0

    def __dealloc__(self):
        free(self.a)

    cdef inline int push(self, int64_t c) except -1:
        if self.n == self.cap:
            self.cap = 1024 if self.cap == 0 else 2 * self.cap
            self.a = <int64_t*>_re(self.a, self.cap * sizeof(int64_t))
        self.a[self.n] = c
        self.n += 1
        return 0


cdef inline int _retire(_Packets P, _FreeIds free_ids, int64_t c, double t, bint measuring,
                        double* area, double* last_t, int64_t* in_net) except -1:
    """Packet ``c`` leaves the network at ``t`` (delivered, dropped or out of TTL): the
    packets-in-network area up to ``t`` (Little's law), one packet fewer, its id free."""
    if measuring:
        area[0] += in_net[0] * (t - last_t[0])
        last_t[0] = t
    in_net[0] -= 1
    P.dst[c] = -1
    return free_ids.push(c)


#: Events between two chances for Python's signal handlers (Ctrl-C) inside the loop
#: (about 10-30 ms of a compiled run).
cdef enum:
    SIGNAL_EVERY = 65536


cdef inline double _cut(_Heap heap, double end) noexcept:
    """Where a stop request ends the run (routerd.sim.core "Stopping early"): the time of
    the next pending event, at most ``end``."""
    return heap.a[0].t if heap.n > 0 and heap.a[0].t < end else end


cdef inline Py_ssize_t _link(const int64_t* nb_start, const int64_t* nb_node,
                             const int64_t* nb_link, int64_t x, int64_t h) noexcept:
    cdef Py_ssize_t i
    for i in range(nb_start[x], nb_start[x + 1]):
        if nb_node[i] == h:
            return nb_link[i]
    return -1


def loop(object topo_lists, object policy, object table, object first, object packets_next,
         object hooks, double end, double warm, int64_t ttl, double ivl,
         list events_sorted, object progress, object observer, object stop=None):
    """The event loop of :func:`routerd.sim.core.run_core` (see there and its module
    docstring); returns the raw figures as a dict, the wall time excepted."""
    cdef list src_l, dst_l, delay_l, inv_cap_l, buf_l
    src_l, dst_l, delay_l, inv_cap_l, buf_l = topo_lists
    cdef Py_ssize_t n, nl, k, i, qlen
    n = hooks["n"]
    nl = len(src_l)
    cdef object next_hop = hooks["next_hop"]
    cdef object on_hop = hooks["on_hop"]
    cdef object on_hops = hooks["on_hops"]
    cdef bint hop_flow = hooks["hop_flow"]
    cdef object tick_iv_o = hooks["tick_interval_s"]
    cdef double tick_iv = 0.0
    if tick_iv_o is not None:
        tick_iv = float(tick_iv_o)

    # links: arrays, and each node's out-links sorted by head for the lookup
    cdef int64_t[::1] src = np.asarray(src_l, dtype=np.int64)
    cdef int64_t[::1] dstn = np.asarray(dst_l, dtype=np.int64)
    cdef double[::1] delay = np.asarray(delay_l, dtype=np.float64)
    cdef double[::1] inv_cap = np.asarray(inv_cap_l, dtype=np.float64)
    cdef int64_t[::1] buf = np.asarray(buf_l, dtype=np.int64)
    order = np.lexsort((np.asarray(dst_l, dtype=np.int64), np.asarray(src_l, dtype=np.int64)))
    cdef int64_t[::1] nb_link = np.ascontiguousarray(order, dtype=np.int64)
    cdef int64_t[::1] nb_node = np.ascontiguousarray(np.asarray(dst_l, dtype=np.int64)[order])
    cdef int64_t[::1] nb_start = np.searchsorted(
        np.asarray(src_l, dtype=np.int64)[order], np.arange(n + 1), side="left").astype(np.int64)
    cdef const int64_t* p_nbs = &nb_start[0]
    cdef const int64_t* p_nbn = &nb_node[0] if nl else NULL
    cdef const int64_t* p_nbl = &nb_link[0] if nl else NULL

    cdef bytearray up_b = bytearray(b"\x01" * nl)
    cdef unsigned char* up = up_b
    cdef double[::1] free_at = np.zeros(max(nl, 1))
    cdef double[::1] busy = np.zeros(max(nl, 1))
    cdef int64_t[::1] carried = np.zeros(max(nl, 1), dtype=np.int64)
    cdef _Queues queues = _Queues(nl)
    cdef _Packets P = _Packets()
    cdef _FreeIds free_ids = _FreeIds()
    cdef _Heap heap = _Heap()
    # a policy's compiled row store (QRows) takes every hop in place of on_hop / on_hops
    cdef QRows rows = hooks.get("rows")
    cdef _HopBuffer hb = _HopBuffer() if on_hops is not None and rows is None else None
    cdef _Splits splits = _Splits(policy) if hooks["splits"] else None

    # the table: a list of n lists read in place (fast), anything else through indexing
    cdef bint fast_table = type(table) is list and len(table) == n
    cdef PyObject* rowp
    cdef PyObject* tbl = <PyObject*>table

    cdef object pending = first   # the source's first packet, or None
    cdef double pend_t = 0.0
    if pending is not None:
        pend_t = pending[0]
        heap.push(pend_t, INJECT)
    if tick_iv_o is not None:
        heap.push(tick_iv, TICK)
    heap.push(ivl, SAMPLE)
    if warm > 0:
        heap.push(warm, WARMUP)
    cdef Py_ssize_t n_ev = len(events_sorted)
    for i in range(n_ev):
        heap.push(float(events_sorted[i].t), LINK0 - i)
    cdef int64_t end_code = LINK0 - n_ev
    heap.push(np.nextafter(end, np.inf), end_code)
    cdef int64_t ctrl_pushed = heap.n - (1 if pending is not None else 0)
    cdef bint stopped = False     # ended early by a StopRequest (see routerd.sim.core)
    # events left until the loop lets Python run its signal handlers: otherwise a Ctrl-C
    # waits for the next policy tick, which a very high rate puts tens of seconds away
    cdef int64_t until_signals = SIGNAL_EVERY

    cdef int64_t offered = 0, delivered = 0, ttl_expired = 0
    cdef int64_t drop_buf = 0, drop_down = 0, drop_noroute = 0
    cdef int64_t offered_all = 0, delivered_all = 0, dropped_all = 0, ttl_all = 0
    cdef list deliveries = []
    cdef int64_t hops_sum = 0
    cdef double sys_sum = 0.0
    cdef int64_t left = 0
    cdef int64_t in_net = 0
    cdef double area = 0.0
    cdef double last_t = 0.0
    cdef bint measuring = warm <= 0.0
    cdef list s_t = [], s_deliv = [], s_dsum = [], s_drop = [], s_ttl = [], s_busy = []
    cdef list s_in_net = []
    cdef int64_t b_deliv = 0, b_drop = 0, b_ttl = 0
    cdef double b_dsum = 0.0
    cdef double[::1] last_busy = np.zeros(max(nl, 1))
    cdef double[::1] busy_warm = np.zeros(max(nl, 1))
    cdef int64_t inj_pushed = 1 if pending is not None else 0
    cdef double t = 0.0, t0, dt, f, start, dep, t_wire, te
    cdef int64_t c, d, y, x, h, ttl_c, reason, a_k, b_k, pid, s, carried_sum
    cdef Ev ev
    cdef object evo, hobj
    cdef list done
    cdef bint going_up
    cdef double bits_in
    cdef int64_t flow_in

    try:
        while True:
            until_signals -= 1
            if until_signals == 0:
                until_signals = SIGNAL_EVERY
                PyErr_CheckSignals()     # runs the handlers; raises what they raise
                if stop is not None and stop.requested:
                    stopped = True
                    t = end = _cut(heap, end)
                    break
            ev = heap.pop()
            t = ev.t
            c = ev.c
            if c >= 0:
                d = P.dst[c]
                if d < 0:  # dropped at a link cut while on its way: now the id is free
                    P.dst[c] = -1
                    free_ids.push(c)
                    continue
                y = P.node[c]
                if rows is not None:
                    rows.add(P.prev[c], y, d, t - P.enq[c], t)
                elif hb is not None:
                    if hb.n == HOPBUF:
                        hb.flush(on_hops)
                    i = hb.n
                    hb.xv[i] = P.prev[c]; hb.yv[i] = y; hb.dv[i] = d
                    hb.lv[i] = t - P.enq[c]; hb.nv[i] = t; hb.fv[i] = P.flow[c]
                    hb.n = i + 1
                elif on_hop is not None:
                    if hop_flow:
                        on_hop(P.prev[c], y, d, t - P.enq[c], t, P.flow[c])
                    else:
                        on_hop(P.prev[c], y, d, t - P.enq[c], t)
                if y == d:
                    t0 = P.t0[c]
                    if t0 >= warm:
                        delivered += 1
                        dt = t - t0
                        deliveries.append(dt)
                        hops_sum += ttl - P.ttl[c]
                        sys_sum += dt
                        left += 1
                    b_deliv += 1
                    b_dsum += t - t0
                    delivered_all += 1
                    _retire(P, free_ids, c, t, measuring, &area, &last_t, &in_net)
                    continue
                x = y
            elif c == INJECT:
                x = pending[1]
                d = pending[2]
                bits_in = pending[3]
                flow_in = pending[4]
                try:
                    pending = packets_next()
                    pend_t = pending[0]
                    heap.push(pend_t, INJECT)
                    inj_pushed += 1
                except StopIteration:
                    pending = None
                if not (0 <= x < n and 0 <= d < n):
                    raise ValueError(f"traffic source produced a packet from node {x} to "
                                     f"node {d}; nodes are 0..{n - 1}")
                if free_ids.n:
                    free_ids.n -= 1
                    c = free_ids.a[free_ids.n]
                else:
                    if P.n == P.cap:
                        P.grow()
                    c = P.n
                    P.n += 1
                P.node[c] = x; P.dst[c] = d; P.t0[c] = t; P.ttl[c] = ttl
                P.flow[c] = flow_in; P.bits[c] = bits_in; P.prev[c] = -1; P.enq[c] = t
                if t >= warm:
                    offered += 1
                offered_all += 1
                if measuring:
                    area += in_net * (t - last_t)
                    last_t = t
                in_net += 1
                if x == d:
                    raise ValueError(f"traffic source produced a packet from node {x} to itself")
            elif c == TICK:
                if hb is not None:
                    hb.flush(on_hops)
                policy.tick(t)
                if splits is not None:
                    splits.update()
                heap.push(t + tick_iv, TICK)
                ctrl_pushed += 1
                if stop is not None and stop.requested:
                    stopped = True
                    t = end = _cut(heap, end)
                    break
                continue
            elif c == SAMPLE:
                s_t.append(t); s_deliv.append(b_deliv); s_dsum.append(b_dsum)
                s_drop.append(b_drop); s_ttl.append(b_ttl); s_in_net.append(in_net)
                done = [busy[k] - (free_at[k] - t if free_at[k] > t else 0.0) for k in range(nl)]
                s_busy.append([(<double>done[k] - last_busy[k]) / ivl for k in range(nl)])
                for k in range(nl):
                    last_busy[k] = done[k]
                b_deliv = 0; b_dsum = 0.0; b_drop = 0; b_ttl = 0
                heap.push(t + ivl, SAMPLE)
                ctrl_pushed += 1
                if progress is not None:
                    carried_sum = 0
                    for k in range(nl):
                        carried_sum += carried[k]
                    progress(t, carried_sum + inj_pushed + ctrl_pushed - heap.n)
                if observer is not None:
                    observer({"t_s": t, "delivered": delivered_all, "dropped": dropped_all,
                              "ttl_expired": ttl_all, "in_network": in_net,
                              "deliveries": deliveries,
                              "series": {"t_s": s_t, "delivered": s_deliv,
                                         "delivery_sum_s": s_dsum, "dropped": s_drop,
                                         "ttl_expired": s_ttl, "in_network": s_in_net,
                                         "link_util": s_busy}})
                if stop is not None and stop.requested:
                    stopped = True
                    t = end = _cut(heap, end)
                    break
                continue
            elif c == WARMUP:
                measuring = True
                last_t = t
                area = 0.0
                for k in range(nl):
                    busy_warm[k] = busy[k] - (free_at[k] - t if free_at[k] > t else 0.0)
                continue
            elif c == end_code:
                t = end
                break
            else:
                if hb is not None:
                    hb.flush(on_hops)
                evo = events_sorted[LINK0 - c]
                for ko in evo.links:
                    k = ko
                    if evo.action == "capacity":
                        inv_cap[k] = 1.0 / <double>float(evo.capacity_bps)
                        continue
                    if evo.action == "delay":
                        delay[k] = float(evo.delay_s)
                        continue
                    going_up = evo.action == "up"
                    if (up[k] != 0) == going_up:
                        continue
                    up[k] = 1 if going_up else 0
                    if not going_up:
                        a_k = src[k]
                        b_k = dstn[k]
                        t_wire = t + delay[k]
                        for i in range(heap.n):
                            te = heap.a[i].t
                            pid = heap.a[i].c
                            if (pid >= 0 and te > t_wire and P.dst[pid] >= 0
                                    and P.prev[pid] == a_k and P.node[pid] == b_k):
                                P.dst[pid] = -2
                                if P.t0[pid] >= warm:
                                    drop_down += 1
                                    sys_sum += t - P.t0[pid]
                                    left += 1
                                b_drop += 1
                                dropped_all += 1
                                if measuring:
                                    area += in_net * (t - last_t)
                                    last_t = t
                                in_net -= 1
                        if free_at[k] > t:
                            busy[k] -= free_at[k] - t
                            free_at[k] = t
                        queues.clear(k)
                    policy.on_link(src_l[k], dst_l[k], going_up, t)
                    if splits is not None:
                        splits.update()
                continue

            # ---- forward packet c from node x ----
            ttl_c = P.ttl[c]
            if ttl_c <= 0:
                reason = 3
            else:
                if fast_table:
                    rowp = _GET_ITEM(tbl, x)
                    if PyList_CheckExact(rowp) and d < _GET_SIZE(rowp):
                        h = PyLong_AsLong(_GET_ITEM(rowp, d))
                    else:
                        h = table[x][d]
                else:
                    h = table[x][d]
                if h < -1:
                    if splits is not None:
                        h = splits.sample(x, d)
                    else:
                        h = next_hop(x, d, P.flow[c], t)
                if h < 0:
                    reason = 2
                else:
                    k = _link(p_nbs, p_nbn, p_nbl, x, h) if 0 <= h < n else -1
                    if k < 0:
                        raise KeyError(h)
                    if up[k]:
                        qlen = queues.occupancy(k, t)
                        if qlen < buf[k]:
                            f = free_at[k]
                            start = f if f > t else t
                            dep = start + P.bits[c] * inv_cap[k]
                            free_at[k] = dep
                            queues.append(k, dep)
                            busy[k] += dep - start
                            carried[k] += 1
                            P.node[c] = h
                            P.prev[c] = x
                            P.enq[c] = t
                            P.ttl[c] = ttl_c - 1
                            heap.push(dep + delay[k], c)
                            continue
                        reason = 0
                    else:
                        reason = 1
            t0 = P.t0[c]
            if reason == 3:
                b_ttl += 1
            else:
                b_drop += 1
            if t0 >= warm:
                if reason == 3:
                    ttl_expired += 1
                else:
                    if reason == 0:
                        drop_buf += 1
                    elif reason == 1:
                        drop_down += 1
                    else:
                        drop_noroute += 1
                sys_sum += t - t0
                left += 1
            if reason == 3:
                ttl_all += 1
            else:
                dropped_all += 1
            _retire(P, free_ids, c, t, measuring, &area, &last_t, &in_net)
        if hb is not None:
            hb.flush(on_hops)
    finally:
        if splits is not None:
            splits.give_back(policy)

    for k in range(nl):
        if free_at[k] > end:
            busy[k] -= free_at[k] - end
    carried_sum = 0
    for k in range(nl):
        carried_sum += carried[k]
    if measuring:
        area += in_net * (end - last_t)
    return {
        "offered": offered, "delivered": delivered, "drop_buf": drop_buf,
        "drop_down": drop_down, "drop_noroute": drop_noroute, "ttl_expired": ttl_expired,
        "in_net": in_net, "offered_all": offered_all, "delivered_all": delivered_all,
        "dropped_all": dropped_all, "ttl_all": ttl_all, "deliveries": deliveries,
        "hops_sum": hops_sum,
        # every pop was an event; the end marker is still queued when the run was stopped
        "events": carried_sum + inj_pushed + ctrl_pushed - heap.n - (0 if stopped else 1),
        "stopped": stopped, "end": end,
        "area": area, "left": left, "sys_sum": sys_sum,
        "busy": [busy[k] for k in range(nl)], "carried": [carried[k] for k in range(nl)],
        "busy_warm": [busy_warm[k] for k in range(nl)],
        "s_t": s_t, "s_deliv": s_deliv, "s_dsum": s_dsum, "s_drop": s_drop, "s_ttl": s_ttl,
        "s_in_net": s_in_net, "s_busy": s_busy,
    }


def refresh(const int64_t[:, ::1] greedy, const double[:, ::1] eps,
            const unsigned char[:, :, ::1] alt, const int64_t[:, ::1] slots,
            int64_t[:, ::1] gh, double[:, ::1] epsc, unsigned char[:, :, ::1] altc,
            const int64_t[::1] xs, list table, list gh_rows, list er_rows, list splits,
            int64_t[::1] moved):
    """``QRouting._refresh`` (sim/policies.py) for nodes ``xs``: bring the cached greedy
    hop, share and candidates (``gh``, ``epsc``, ``altc``) and the fast-path rows up to
    the engine's tables, rewriting only entries whose inputs changed (the same Python
    values the reference writes) and dropping their cached splits.  Writes the keys
    ``x * n + d`` whose greedy hop moved into ``moved`` (row-major, as ``np.nonzero``);
    returns how many."""
    cdef Py_ssize_t i, nm = 0
    for i in range(xs.shape[0]):
        nm = _refresh_row(greedy, eps, alt, slots, gh, epsc, altc, xs[i], table, gh_rows,
                          er_rows, splits, &moved[0] if moved.shape[0] else NULL, nm)
    return nm


cdef Py_ssize_t _refresh_row(const int64_t[:, ::1] greedy, const double[:, ::1] eps,
                             const unsigned char[:, :, ::1] alt, const int64_t[:, ::1] slots,
                             int64_t[:, ::1] gh, double[:, ::1] epsc,
                             unsigned char[:, :, ::1] altc, int64_t x, list table,
                             list gh_rows, list er_rows, list splits, int64_t* moved,
                             Py_ssize_t nm) except -1:
    """:func:`refresh` for node ``x``: appends its moved keys to ``moved`` from ``nm`` on,
    returns the new count."""
    cdef Py_ssize_t n = greedy.shape[1], K = alt.shape[2]
    cdef Py_ssize_t d, j
    cdef int64_t gs, h
    cdef double ev
    cdef bint anyalt, altchg, mv, rowalt
    cdef unsigned char a
    cdef list row_t = table[x], row_g = gh_rows[x], row_e = er_rows[x]
    cdef dict sp = splits[x]
    # the candidates of a whole row compared at once: where they are equal, no entry's
    # are (the same outcome as the per-entry compare, one call a row)
    rowalt = K > 0 and n > 0 and memcmp(&alt[x, 0, 0], &altc[x, 0, 0], n * K) != 0
    for d in range(n):
        gs = greedy[x, d]
        h = slots[x, gs] if gs >= 0 else -1
        ev = eps[x, d]
        mv = gh[x, d] != h
        if mv:
            moved[nm] = x * n + d
            nm += 1
        altchg = rowalt and memcmp(&alt[x, d, 0], &altc[x, d, 0], K) != 0
        if mv or epsc[x, d] != ev or altchg:   # NaN (never set) counts as changed
            anyalt = False
            for j in range(K):
                a = alt[x, d, j]
                altc[x, d, j] = a
                if a:
                    anyalt = True
            gh[x, d] = h
            epsc[x, d] = ev
            row_t[d] = -2 if (gs >= 0 and anyalt and ev > 0) else h
            row_g[d] = h
            row_e[d] = ev
            if sp:
                sp.pop(d, None)
    return nm


cdef void _stable_order(const double* key, int64_t* perm, int64_t* tmp, Py_ssize_t m) noexcept:
    """``perm``: 0..m-1 in the order of ``key``, ties in index order (numpy's stable
    argsort: a bottom-up merge sort; ``tmp`` is scratch of m entries)."""
    cdef Py_ssize_t w, lo, mid, hi, i, j, o
    cdef int64_t* a = perm
    cdef int64_t* b = tmp
    cdef int64_t* sw
    for i in range(m):
        a[i] = i
    w = 1
    while w < m:
        lo = 0
        while lo < m:
            mid = lo + w if lo + w < m else m
            hi = lo + 2 * w if lo + 2 * w < m else m
            i = lo
            j = mid
            o = lo
            while i < mid and j < hi:
                if key[a[j]] < key[a[i]]:   # the left one first on a tie: stable
                    b[o] = a[j]
                    j += 1
                else:
                    b[o] = a[i]
                    i += 1
                o += 1
            while i < mid:
                b[o] = a[i]
                i += 1
                o += 1
            while j < hi:
                b[o] = a[j]
                j += 1
                o += 1
            lo = hi
        sw = a
        a = b
        b = sw
        w *= 2
    if a != perm:
        for i in range(m):
            perm[i] = a[i]


cdef class QRows:
    """QRouting's work between two ticks and at a tick, compiled (``QRouting.hop_rows``;
    sim/policies.py keeps the numpy reference: ``on_hops``, ``tick``, ``_decide``).

    * :meth:`add` (the loop, every hop): the row ``(due, x, y, d, latency, estimate)`` with
      ``due = now + prop[x, y]`` and the estimate ``values[y, d]`` read at the hop, as
      ``on_hops`` builds it (the values only change at a tick or a link event, after the
      loop has handed over every earlier hop);
    * :meth:`take` (the tick): every row not yet applied in due-time order, stable (the
      rows carried over first, already in that order, then the new ones as reported: a
      stable sort of all of them, numpy's ``argsort(kind="stable")``), and the due prefix
      as the columns of one ``HopBatch`` (every row with ``instant``);
    * :meth:`step` (after ``Engine.decide``): the table refresh of the changed nodes
      (:func:`refresh`), then, with ``estimates``, each node's published estimate
      (``Engine.published_estimates``: the Q-value of the greedy slot, the ceiling without
      one, 0 at the destination) rewritten where a row was just applied or a greedy hop
      moved; then the applied rows are dropped.

    Every array is bound once (:meth:`bind_values` after the policy replaces its values);
    the engine must own every destination (column d is destination d)."""
    cdef Py_ssize_t n, m, cap, k
    cdef object ax, ay, ad, adue, alat, aest
    cdef int64_t[::1] x, y, d
    cdef double[::1] due, lat, est
    cdef int64_t* perm
    cdef int64_t* tmp
    cdef const double[:, ::1] prop
    cdef double[:, ::1] values
    cdef const double[:, :, ::1] Q
    cdef double ceiling
    cdef const int64_t[:, ::1] greedy
    cdef const double[:, ::1] eps
    cdef const unsigned char[:, :, ::1] alt
    cdef const int64_t[:, ::1] slots
    cdef int64_t[:, ::1] gh
    cdef double[:, ::1] epsc
    cdef unsigned char[:, :, ::1] altc
    cdef list table, gh_rows, er_rows, splits
    cdef object akeys
    cdef int64_t[::1] keys
    cdef unsigned char* mark

    def __cinit__(self):
        self.perm = NULL
        self.tmp = NULL
        self.mark = NULL

    def __init__(self, const double[:, ::1] prop, double[:, ::1] values,
                 const double[:, :, ::1] Q, double ceiling,
                 const int64_t[:, ::1] greedy, const double[:, ::1] eps,
                 const unsigned char[:, :, ::1] alt, const int64_t[:, ::1] slots,
                 int64_t[:, ::1] gh, double[:, ::1] epsc, unsigned char[:, :, ::1] altc,
                 list table, list gh_rows, list er_rows, list splits):
        self.n = greedy.shape[0]
        self.prop = prop
        self.values = values
        self.Q = Q
        self.ceiling = ceiling
        self.greedy = greedy
        self.eps = eps
        self.alt = alt
        self.slots = slots
        self.gh = gh
        self.epsc = epsc
        self.altc = altc
        self.table = table
        self.gh_rows = gh_rows
        self.er_rows = er_rows
        self.splits = splits
        # moved keys of one step (a node's row at most n of them), applied keys' marks
        self.akeys = np.empty(self.n * self.n, dtype=np.int64)
        self.keys = self.akeys
        self.mark = <unsigned char*>_re(NULL, self.n * self.n if self.n else 1)
        memset(self.mark, 0, self.n * self.n)
        self.m = 0
        self.k = 0
        self.cap = 0
        self._grow(1024)

    def __dealloc__(self):
        free(self.perm)
        free(self.tmp)
        free(self.mark)

    def bind_values(self, double[:, ::1] values):
        """The estimates the rows carry from now on (the policy's new ``_Vn``)."""
        self.values = values

    def bind_q(self, const double[:, :, ::1] Q):
        """The engine's Q-values (where the engine replaced its array)."""
        self.Q = Q

    @property
    def pending(self):
        """Rows not yet applied."""
        return self.m

    cdef int _grow(self, Py_ssize_t cap) except -1:
        cdef Py_ssize_t m = self.m
        cols = [np.empty(cap, dtype=np.int64) for _ in range(3)]
        fcols = [np.empty(cap, dtype=np.float64) for _ in range(3)]
        if m:
            cols[0][:m] = self.ax[:m]; cols[1][:m] = self.ay[:m]; cols[2][:m] = self.ad[:m]
            fcols[0][:m] = self.adue[:m]; fcols[1][:m] = self.alat[:m]
            fcols[2][:m] = self.aest[:m]
        self.ax, self.ay, self.ad = cols
        self.adue, self.alat, self.aest = fcols
        self.x = self.ax; self.y = self.ay; self.d = self.ad
        self.due = self.adue; self.lat = self.alat; self.est = self.aest
        self.perm = <int64_t*>_re(self.perm, cap * sizeof(int64_t))
        self.tmp = <int64_t*>_re(self.tmp, cap * sizeof(int64_t))
        self.cap = cap
        return 0

    cdef inline int add(self, int64_t x, int64_t y, int64_t d, double lat, double now) except -1:
        cdef Py_ssize_t i = self.m
        if x < 0:      # an injection: no sender, no row (as on_hops)
            return 0
        if i == self.cap:
            self._grow(2 * self.cap)
        self.due[i] = now + self.prop[x, y]
        self.x[i] = x
        self.y[i] = y
        self.d[i] = d
        self.lat[i] = lat
        self.est[i] = self.values[y, d]
        self.m = i + 1
        return 0

    def extend(self, const int64_t[::1] x, const int64_t[::1] y, const int64_t[::1] d,
               const double[::1] lat, const double[::1] now):
        """:meth:`add` for arrays of hops in order (``on_hops``' arguments, without flow);
        every node index must be one of the network's (ValueError naming the row)."""
        cdef Py_ssize_t i, m = x.shape[0]
        if not (y.shape[0] == d.shape[0] == lat.shape[0] == now.shape[0] == m):
            raise ValueError("QRows.extend: the columns must all have the same length")
        for i in range(m):
            if not (-1 <= x[i] < self.n and 0 <= y[i] < self.n and 0 <= d[i] < self.n):
                raise ValueError(f"QRows.extend: row {i} ({x[i]}, {y[i]}, {d[i]}) names a "
                                 f"node outside 0..{self.n - 1}")
        for i in range(m):
            self.add(x[i], y[i], d[i], lat[i], now[i])

    def take(self, double now, bint instant):
        """Order the rows (see the class) and return the due ones as the columns
        ``(src, via, dst, latency, estimate)`` of a ``HopBatch``, or None when none is
        due.  They stay the first rows until :meth:`step` drops them."""
        cdef Py_ssize_t m = self.m, i, k
        cdef bint ordered = True
        for i in range(1, m):
            if self.due[i] < self.due[i - 1]:
                ordered = False
                break
        if not ordered:
            _stable_order(&self.due[0], self.perm, self.tmp, m)
            self._permute_i(self.x)
            self._permute_i(self.y)
            self._permute_i(self.d)
            self._permute_f(self.due)
            self._permute_f(self.lat)
            self._permute_f(self.est)
        if instant:
            k = m
        else:
            k = 0
            while k < m and self.due[k] <= now:   # searchsorted(side="right")
                k += 1
        self.k = k
        if k == 0:
            return None
        return self.ax[:k], self.ay[:k], self.ad[:k], self.alat[:k], self.aest[:k]

    cdef void _permute_i(self, int64_t[::1] col) noexcept:
        cdef Py_ssize_t i, m = self.m
        cdef int64_t* t = self.tmp
        for i in range(m):
            t[i] = col[self.perm[i]]
        for i in range(m):
            col[i] = t[i]

    cdef void _permute_f(self, double[::1] col) noexcept:
        cdef Py_ssize_t i, m = self.m
        cdef double* t = <double*>self.tmp   # int64 and double: the same width
        for i in range(m):
            t[i] = col[self.perm[i]]
        for i in range(m):
            col[i] = t[i]

    def step(self, object nodes, bint estimates):
        """After ``Engine.decide``: refresh the tables of ``nodes`` (sorted node indices),
        then with ``estimates`` rewrite the published estimates where a row of the last
        :meth:`take` was applied or a greedy hop moved; drop those rows.  Returns how many
        estimates were rewritten."""
        cdef Py_ssize_t nm = 0, i, j, n = self.n, k = self.k, m = self.m, nk = 0
        cdef int64_t key, x, dd, g
        cdef int64_t* kp = &self.keys[0] if n else NULL
        for x in nodes:
            nm = _refresh_row(self.greedy, self.eps, self.alt, self.slots, self.gh, self.epsc,
                              self.altc, x, self.table, self.gh_rows, self.er_rows,
                              self.splits, kp, nm)
        if estimates:
            # the keys: applied rows', then moved ones, each once
            for i in range(k):
                key = self.x[i] * n + self.d[i]
                if not self.mark[key]:
                    self.mark[key] = 1
                    nk += 1
            for i in range(nm):
                key = kp[i]
                if not self.mark[key]:
                    self.mark[key] = 1
                    nk += 1
            for j in range(2):
                for i in range(k if j == 0 else nm):
                    key = self.x[i] * n + self.d[i] if j == 0 else kp[i]
                    if not self.mark[key]:
                        continue
                    self.mark[key] = 0
                    x = key // n
                    dd = key - x * n
                    if x == dd:
                        self.values[x, dd] = 0.0
                    else:
                        g = self.greedy[x, dd]
                        self.values[x, dd] = self.Q[x, dd, g] if g >= 0 else self.ceiling
        if k:
            for i in range(k, m):
                self.x[i - k] = self.x[i]; self.y[i - k] = self.y[i]
                self.d[i - k] = self.d[i]; self.due[i - k] = self.due[i]
                self.lat[i - k] = self.lat[i]; self.est[i - k] = self.est[i]
            self.m = m - k
            self.k = 0
        return nk
