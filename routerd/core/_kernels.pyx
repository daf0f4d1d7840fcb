# cython: language_level=3, boundscheck=False, wraparound=False, cdivision=True, initializedcheck=False
"""Compiled hot paths of routerd.core.engine (Cython).  Use them through routerd.core.kernels.

Each function is a transcription of the numpy reference in routerd/core/engine.py, operation
for operation, so the results are the same to the bit (the build passes
-ffp-contract=off: no fused multiply-add).  Typed memoryviews only: no numpy C API, so
numpy is not a build dependency.  Pure: no I/O, no global state.
"""
from libc.math cimport INFINITY, fabs, isfinite
from libc.stdint cimport int16_t, int32_t, int64_t, uint8_t, uint16_t, uint32_t, uint64_t, INT64_MAX
from libc.stdlib cimport malloc, free
from libc.string cimport memcpy

cdef extern from *:
    """
    #if defined(__GNUC__) || defined(__clang__)
    #define RD_PREFETCH(p) __builtin_prefetch((const void *)(p), 1, 3)
    #define RD_PREFETCH_R(p) __builtin_prefetch((const void *)(p), 0, 3)
    #else
    #define RD_PREFETCH(p) ((void)0)
    #define RD_PREFETCH_R(p) ((void)0)
    #endif
    """
    void RD_PREFETCH(const void* p) noexcept nogil
    void RD_PREFETCH_R(const void* p) noexcept nogil

# the engine's update counts N: the narrow saturating types of engine.COUNT_TYPES
ctypedef fused count_t:
    uint8_t
    uint16_t
    uint32_t

# topology.slot_of: int16, or int32 for a node with 32,000 neighbours or more
ctypedef fused slot_t:
    int16_t
    int32_t

# rows ahead whose state is fetched into cache while a row is applied: the update is
# bound by random reads of Q, N and td (a prefetch changes no value)
cdef enum:
    AHEAD = 12

# reason codes: indices into engine.REJECT_REASONS (tests/test_kernels.py checks the order)
cdef enum:
    UNKNOWN_NODE = 0
    NOT_NEIGHBOUR = 1
    AT_DESTINATION = 2
    BAD_LATENCY = 3
    BAD_ESTIMATE = 4
    LINK_DOWN = 5
    NOT_OWNED = 6


cdef Py_ssize_t _observe(double[:, :, ::1] Q, count_t[:, :, ::1] N, int64_t cap, double[:, ::1] td,
            const uint8_t[:, ::1] live, const slot_t[:, ::1] slot_of,
            const double[::1] steps, bint clamped, object beyond, double ceil, double sm,
            const int64_t[::1] xs, const int64_t[::1] ys, const int64_t[::1] ds,
            const double[::1] lats, const double[::1] ests,
            int64_t[::1] code, double[::1] tde,
            uint8_t[::1] kdirty, uint8_t[::1] kcols, const int64_t[::1] dcol) except -1:
    """Check and apply hop rows one by one, in order (Engine._observe_rows' rules).

    ``dcol[d]``: destination d's column in Q, N, td, kcols (-1: not owned); Q is
    (n, owned, K).  A count stores at most ``cap`` (Engine._count_cap: it saturates).

    code[i]: -1 accepted, else the reason index; tde[:accepted]: the accepted rows' TD
    errors in order.  Returns the number accepted.  Past the step table: its last entry
    when ``clamped`` (Engine._step_beyond's rule), else ``beyond(nn)``, the engine's own
    code (counts past STEP_TABLE_MAX with a far or zero floor: rare, exact by construction).
    """
    cdef Py_ssize_t n = Q.shape[0], nd = Q.shape[1], K = Q.shape[2], m = xs.shape[0]
    cdef Py_ssize_t lim = steps.shape[0]
    cdef Py_ssize_t i, c, acc = 0
    cdef int64_t x, y, d, dc, j, nn, px, py, pd
    cdef double lat, e, tail, v, target, old, delta, a, new, keep = 1.0 - sm
    for i in range(min(m, AHEAD)):
        px = xs[i]; py = ys[i]
        if 0 <= px < n and 0 <= py < n:
            RD_PREFETCH(&slot_of[px, py])
    for i in range(m):
        if i + AHEAD < m:
            px = xs[i + AHEAD]; py = ys[i + AHEAD]; pd = ds[i + AHEAD]
            if 0 <= px < n and 0 <= py < n and 0 <= pd < n and dcol[pd] >= 0:
                pd = dcol[pd]
                RD_PREFETCH(&slot_of[px, py])
                RD_PREFETCH(&Q[px, pd, 0])
                RD_PREFETCH(&Q[px, pd, K - 1])
                RD_PREFETCH(&N[px, pd, 0])
                RD_PREFETCH(&N[px, pd, K - 1])
                RD_PREFETCH(&td[px, pd])
                RD_PREFETCH(&Q[py, pd, 0])
                RD_PREFETCH(&Q[py, pd, K - 1])
        x = xs[i]; y = ys[i]; d = ds[i]; lat = lats[i]; e = ests[i]
        if not (0 <= x < n and 0 <= y < n and 0 <= d < n):
            code[i] = UNKNOWN_NODE
            continue
        j = slot_of[x, y]
        if j < 0:
            code[i] = NOT_NEIGHBOUR
        elif x == d:
            code[i] = AT_DESTINATION
        elif not (0.0 <= lat < INFINITY):
            code[i] = BAD_LATENCY
        elif e == e and not (0.0 <= e < INFINITY):
            code[i] = BAD_ESTIMATE
        elif not live[x, j]:
            code[i] = LINK_DOWN
        elif dcol[d] < 0:
            code[i] = NOT_OWNED
        else:
            code[i] = -1
            dc = dcol[d]
            if y == d:
                tail = 0.0
            elif e == e:        # not NaN: the neighbour's own estimate
                tail = e
            else:               # absent slots hold inf, dead ones exactly the ceiling
                tail = Q[y, dc, 0]
                for c in range(1, K):
                    v = Q[y, dc, c]
                    if v < tail:
                        tail = v
            target = lat + tail
            old = Q[x, dc, j]
            nn = <int64_t> N[x, dc, j] + 1
            N[x, dc, j] = <count_t> (nn if nn <= cap else cap)
            delta = target - old
            if nn < lim:
                a = steps[nn]
            elif clamped:       # every count past the table has the last step (the floor)
                a = steps[lim - 1]
            else:
                a = beyond(nn)
            new = old + a * delta
            Q[x, dc, j] = ceil if new > ceil else (0.0 if new < 0.0 else new)
            td[x, dc] = keep * td[x, dc] + sm * fabs(delta)
            kdirty[x * nd + dc] = 1
            kcols[dc] = 1
            tde[acc] = delta
            acc += 1
    return acc


def observe(double[:, :, ::1] Q, count_t[:, :, ::1] N, int64_t cap, double[:, ::1] td,
            const uint8_t[:, ::1] live, const slot_t[:, ::1] slot_of,
            const double[::1] steps, bint clamped, object beyond, double ceil, double sm,
            const int64_t[::1] xs, const int64_t[::1] ys, const int64_t[::1] ds,
            const double[::1] lats, const double[::1] ests,
            int64_t[::1] code, double[::1] tde,
            uint8_t[::1] kdirty, uint8_t[::1] kcols, const int64_t[::1] dcol):
    """:func:`_observe` with every array passed (the bound form: :class:`Bound`)."""
    return _observe(Q, N, cap, td, live, slot_of, steps, clamped, beyond, ceil, sm,
                    xs, ys, ds, lats, ests, code, tde, kdirty, kcols, dcol)


cdef int _cycles(const int32_t* nh, uint8_t* cyc, uint8_t* col, int64_t* path,
                 Py_ssize_t n) noexcept nogil:
    """cyc[x] = x lies on a loop of the functional graph nh (-1: terminal).  Returns
    whether any loop exists.  O(n): each node is walked once."""
    cdef Py_ssize_t x, top, t
    cdef int64_t y, z
    cdef int found = 0
    for x in range(n):
        cyc[x] = 0
        col[x] = 0
    for x in range(n):
        if col[x]:
            continue
        top = 0
        y = x
        while y >= 0 and col[y] == 0:
            col[y] = 1
            path[top] = y
            top += 1
            y = nh[y]
        if y >= 0 and col[y] == 1:      # came back onto this walk: a loop through y
            found = 1
            z = y
            while True:
                cyc[z] = 1
                z = nh[z]
                if z == y:
                    break
        for t in range(top):
            col[path[t]] = 2
    return found


cdef void _depths(const int32_t* nh, int64_t d, int64_t* dep, int64_t* path,
                  Py_ssize_t n) noexcept nogil:
    """Hops from each node to d along nh (loop-free), n + 1 where the path ends elsewhere
    (routerd.core.loops.depths for one table)."""
    cdef Py_ssize_t x, top, t
    cdef int64_t y, base
    for x in range(n):
        dep[x] = -1
    dep[d] = 0
    for x in range(n):
        if dep[x] >= 0:
            continue
        top = 0
        y = x
        while y >= 0 and dep[y] < 0 and top <= n:
            path[top] = y
            top += 1
            y = nh[y]
        if y >= 0 and dep[y] >= 0 and dep[y] <= n:
            base = dep[y]
        else:
            base = -1                    # ends without reaching d
        t = top - 1
        while t >= 0:
            if base < 0:
                dep[path[t]] = n + 1
            else:
                base += 1
                dep[path[t]] = base if base <= n else n + 1
            t -= 1
        # a path that ran into an unreached node inherits n + 1
    for x in range(n):
        if dep[x] > n:
            dep[x] = n + 1


cdef int _jump(const int32_t* nh, int64_t d, int64_t* pt, Py_ssize_t stride, int32_t* p,
               int32_t* s, Py_ssize_t n) noexcept nogil:
    """:func:`_cycles` and :func:`_depths` in one pass for the common table without a
    loop, by pointer jumping (the sweeps have no branch that depends on the data): p[x] is
    a node ahead of x on its path and s[x] the hops to it; each sweep sets p[x] = p[p[x]]
    (in place: a sweep goes at least as far as a doubling) until none moves.  Roots (d,
    and the nodes whose next hop is -1) point at themselves with s = 0.  A fixed point
    that is not a root lies on a loop: returns 1 (pt unusable; the caller runs the
    ladder, which finds the loop again).  Without a loop every path ends at a root within
    n hops, so ceil(log2 n) + 2 sweeps settle (else: a loop, 1).  Returns 0 with the
    potentials pt[x * stride] = dep[x] * n + x, dep[x] = s[x] for the nodes that reach d
    and n + 1 for the others: :func:`_depths`' values."""
    cdef Py_ssize_t x, r, lim = 2
    cdef int32_t y, z, moved
    while (<Py_ssize_t> 1 << (lim - 2)) < n:
        lim += 1
    for x in range(n):
        y = nh[x]
        if y < 0 or x == d:
            p[x] = <int32_t> x
            s[x] = 0
        else:
            p[x] = y
            s[x] = 1
    for r in range(lim):
        moved = 0
        for x in range(n):
            y = p[x]
            z = p[y]
            moved |= z ^ y
            s[x] += s[y]
            p[x] = z
        if not moved:
            break
    else:
        return 1
    for x in range(n):
        y = p[x]
        if y != d and nh[y] >= 0:
            return 1
        pt[x * stride] = (<int64_t> s[x] if y == d else n + 1) * n + x
    return 0


cdef inline void _prefetch(const void* a, Py_ssize_t nbytes) noexcept nogil:
    """Fetch into cache the lines of nbytes from a (a hint: changes no value)."""
    cdef const char* p = <const char*> a
    cdef Py_ssize_t i
    for i in range(0, nbytes + 63, 64):
        RD_PREFETCH_R(p + i)


cdef inline double _share(bint visits, double v, double tdv, int64_t tot, bint anyalt,
                          double ceil, double td_ref, double emin, double espan,
                          double eps_max, double visits_half) noexcept nogil:
    """A key's exploration share (Engine._explore's rule), for the full pass and the key
    lane alike: by TD error over the greedy value v (``visits`` off) or by the key's
    update count tot; 0 without an alternative next hop."""
    cdef double vv, r, fr, e
    if not anyalt:
        return 0.0
    if not visits:
        vv = v if isfinite(v) else ceil
        if not (vv >= 1e-12):
            vv = 1e-12
        r = tdv / vv / td_ref
        fr = r if r < 1.0 else 1.0
    else:
        fr = visits_half / (visits_half + <double> tot)
    e = emin + espan * fr
    if not (e < eps_max):
        e = eps_max
    return e


cdef object _decide(const double[:, :, ::1] q, const uint8_t[:, ::1] live, const int64_t[:, ::1] slots,
           const slot_t[:, ::1] slot_of, const int32_t[:, ::1] spt, const int64_t[::1] ds,
           int64_t[:, ::1] greedy, double[:, ::1] eps, uint8_t[:, :, ::1] alt,
           uint8_t[:, ::1] forced, slot_t[:, ::1] hyst_st, uint8_t[::1] stable,
           const double[:, ::1] td, const count_t[:, :, ::1] N, bint visits,
           double keepf, double ceil, double td_ref, double emin, double espan,
           double eps_max, double visits_half,
           int32_t[:, ::1] choice, int32_t[:, ::1] hy, double[:, ::1] vx,
           int64_t[:, ::1] pot, int32_t[:, ::1] nhT, const int64_t[::1] deg,
           uint8_t[::1] changed, const int64_t[::1] cs):
    """Engine._decide_full for destinations ds, whose columns (in q, greedy, eps, alt,
    forced, hyst_st, stable, td, N) are cs: node indices (x == d, spt, depths) use ds.
    Returns (route changes, loops newly prevented); prevented is -1 if the fallback
    ladder failed to converge (a bug).

    Destinations go in blocks of B (the scratch arrays' width, hy: (n, B)): per block
    the three phases below run on scratch that stays in cache, so the state arrays are
    each read and written once, in order, and only Q is a large read (as in values()).
    Phase 1 (node-major) writes each destination's next-hop row (nhT: (B, n)); phase 2
    checks it once per destination (:func:`_jump`: loop check and depths together), and
    only a table with a loop runs the fallback ladder (:func:`_cycles` finds the loop's
    nodes, :func:`_jump` checks again after each round; its choices in ``choice``, the
    other tables keep phase 1's, ``hy``); it writes the potentials node-major (pot) for
    phase 3.
    The rows of the next node are prefetched while a node is done (phases 1 and 3: the
    state is read in short runs, a block's columns, that the hardware does not foresee).
    deg[x] is x's number of present slots: they are a prefix of its slot row
    (topology.slots), and absent slots are never live, never chosen and never
    candidates, so the slot loops stop there.
    """
    cdef Py_ssize_t n = q.shape[0], nd = q.shape[1], K = q.shape[2], m = ds.shape[0]
    cdef Py_ssize_t B = hy.shape[1]
    cdef Py_ssize_t x, ii, i0, nb, c, it, ln
    cdef int64_t d, dc, dc0, dcl, best, inc, ch, h, g, pv, bound, p, tot
    cdef bint span
    cdef const uint8_t* lv
    cdef const double* qx
    cdef const int64_t* sx
    cdef int64_t* gx
    cdef double* epx
    cdef const double* tdx
    cdef uint8_t* ax
    cdef uint8_t* ar
    cdef uint8_t* fx
    cdef slot_t* hsx
    cdef int32_t* hyx
    cdef int32_t* chx
    cdef double* vxx
    cdef int64_t* ptx
    cdef uint8_t wx
    cdef bint lt
    cdef double bv, v, incv, e, tdv
    cdef const double* qr
    cdef bint keep, cg, cw, fnew, unstable, failed = False
    cdef int64_t changes = 0, prevented = 0
    cdef int64_t big = (n + 1) * n
    cdef int32_t* nh
    cdef uint8_t au, cwu, anyu
    cdef Py_ssize_t kx
    cdef int64_t* path = <int64_t*> malloc((n + 2) * sizeof(int64_t))
    cdef int64_t* dep = <int64_t*> malloc(n * sizeof(int64_t))
    cdef uint8_t* level = <uint8_t*> malloc(n)
    cdef uint8_t* cyc = <uint8_t*> malloc(n)
    cdef uint8_t* c1 = <uint8_t*> malloc(n)
    cdef uint8_t* col = <uint8_t*> malloc(n)
    cdef uint8_t* looped = <uint8_t*> malloc(B)
    cdef int64_t** prow = <int64_t**> malloc((K + 1) * sizeof(int64_t*))
    cdef int32_t* jp = <int32_t*> malloc((n + 1) * sizeof(int32_t))
    cdef int32_t* js = <int32_t*> malloc((n + 1) * sizeof(int32_t))
    if not (path and dep and level and cyc and c1 and col and looped and prow and jp and js):
        free(path); free(dep); free(level); free(cyc); free(c1); free(col); free(looped)
        free(prow); free(jp); free(js)
        raise MemoryError()
    try:
        for i0 in range(0, m, B):
            nb = min(B, m - i0)
            # phase 1, node-major: greedy with hysteresis, and the chosen value
            dc0 = cs[i0]
            dcl = cs[i0 + nb - 1]
            span = dc0 <= dcl and dcl - dc0 < 2 * nb     # the block's columns: one short run
            for x in range(n):
                kx = deg[x]
                lv = &live[x, 0]
                qx = &q[x, 0, 0]
                gx = &greedy[x, 0]
                sx = &slots[x, 0]
                hyx = &hy[x, 0]
                vxx = &vx[x, 0]
                if x + 1 < n and span:  # the next node's run of Q and greedy
                    _prefetch(qx + nd * K + dc0 * K, (dcl - dc0 + 1) * K * sizeof(double))
                    _prefetch(gx + nd + dc0, (dcl - dc0 + 1) * sizeof(int64_t))
                for ii in range(nb):
                    d = ds[i0 + ii]
                    dc = cs[i0 + ii]
                    qr = qx + dc * K
                    if x + 1 < n and not span:
                        RD_PREFETCH_R(qr + nd * K)
                        RD_PREFETCH_R(qr + nd * K + K - 1)
                        RD_PREFETCH_R(gx + nd + dc)
                    best = 0
                    bv = qr[0] if lv[0] else INFINITY
                    for c in range(1, kx):      # branch-free: which slot wins is data
                        v = qr[c] if lv[c] else INFINITY
                        lt = v < bv
                        best = c if lt else best
                        bv = v if lt else bv
                    inc = gx[dc]
                    incv = qr[inc] if (inc >= 0 and lv[inc]) else INFINITY
                    keep = isfinite(incv) and not (bv < incv * keepf)
                    ch = inc if keep else best
                    if not isfinite(bv) or x == d:
                        ch = -1
                    hyx[ii] = <int32_t> ch
                    vxx[ii] = qr[ch] if (ch >= 0 and lv[ch]) else INFINITY
                    nhT[ii, x] = <int32_t> sx[ch] if ch >= 0 else -1
            # phase 2, per destination: loop check and depths in one walk; the loop
            # fallback ladder only for a table with a loop; the potentials
            for ii in range(nb):
                d = ds[i0 + ii]
                dc = cs[i0 + ii]
                nh = &nhT[ii, 0]
                if not _jump(nh, d, &pot[0, ii], pot.shape[1], jp, js, n):
                    looped[ii] = 0          # every choice as phase 1 made it: stable
                    stable[dc] = True
                    continue
                looped[ii] = 1
                for x in range(n):
                    level[x] = 0
                    c1[x] = 0
                for it in range(2 * n + 3):
                    # after a round of the ladder, _jump checks the table again and, when
                    # the loops are gone, writes its potentials (the same verdict as
                    # _cycles, and _depths' values); with a loop, _cycles finds its nodes
                    if it > 0 and not _jump(nh, d, &pot[0, ii], pot.shape[1], jp, js, n):
                        break
                    if not _cycles(nh, cyc, col, path, n):  # (not after _jump's verdict)
                        _depths(nh, d, dep, path, n)
                        for x in range(n):
                            pot[x, ii] = dep[x] * n + x
                        break
                    if it == 0:
                        for x in range(n):
                            c1[x] = cyc[x]
                    for x in range(n):
                        if not cyc[x]:
                            continue
                        if level[x] == 0:
                            inc = greedy[x, dc]     # the previous choice (phase 3 has not
                            pv = slots[x, inc] if inc >= 0 else -1  # written it yet)
                            if pv >= 0 and live[x, slot_of[x, pv]]:
                                nh[x] = <int32_t> pv
                                level[x] = 1
                            else:
                                nh[x] = spt[x, d]
                                level[x] = 2
                        else:
                            nh[x] = spt[x, d]
                            level[x] = 2
                else:
                    failed = True
                    break
                unstable = False
                for x in range(n):
                    ch = hy[x, ii]
                    if level[x]:        # moved by the ladder: its slot (unmoved: as chosen)
                        ch = slot_of[x, nh[x]] if nh[x] >= 0 else -1
                        if ch != hy[x, ii] and not c1[x]:
                            unstable = True
                    choice[x, ii] = <int32_t> ch
                stable[dc] = not unstable
            if failed:
                break
            for ii in range(nb):
                pot[n, ii] = INT64_MAX
            # phase 3, node-major: candidates, shares, what changed, the writes
            for x in range(n):
                kx = deg[x]
                lv = &live[x, 0]
                gx = &greedy[x, 0]
                epx = &eps[x, 0]
                tdx = &td[x, 0]
                ax = &alt[x, 0, 0]
                fx = &forced[x, 0]
                hsx = &hyst_st[x, 0]
                hyx = &hy[x, 0]
                chx = &choice[x, 0]
                vxx = &vx[x, 0]
                ptx = &pot[x, 0]
                for c in range(kx):             # the neighbours' potentials, by slot
                    prow[c] = &pot[slots[x, c], 0]
                if x + 1 < n and span:  # the next node's runs of the state read here
                    ln = dcl - dc0 + 1
                    _prefetch(ax + nd * K + dc0 * K, ln * K)
                    _prefetch(epx + nd + dc0, ln * sizeof(double))
                    _prefetch(tdx + nd + dc0, ln * sizeof(double))
                    _prefetch(gx + nd + dc0, ln * sizeof(int64_t))
                    _prefetch(fx + nd + dc0, ln)
                    _prefetch(hsx + nd + dc0, ln * sizeof(slot_t))
                    if visits:
                        _prefetch(&N[x, 0, 0] + nd * K + dc0 * K, ln * K * sizeof(count_t))
                wx = 0
                for ii in range(nb):
                    dc = cs[i0 + ii]
                    ar = ax + dc * K
                    if x + 1 < n and not span:
                        RD_PREFETCH_R(ar + nd * K)
                        RD_PREFETCH_R(ar + nd * K + K - 1)
                        RD_PREFETCH_R(epx + nd + dc)
                        RD_PREFETCH_R(tdx + nd + dc)
                        RD_PREFETCH_R(fx + nd + dc)
                        RD_PREFETCH_R(hsx + nd + dc)
                    h = hyx[ii]
                    ch = chx[ii] if looped[ii] else h
                    if ch >= 0:
                        p = ptx[ii]
                        bound = p if p < big else big
                    else:
                        bound = -1
                    anyu = 0
                    cwu = 0
                    for c in range(kx):         # branch-free: the outcomes are data
                        au = lv[c] & (ch != c) & (prow[c][ii] < bound)
                        anyu |= au
                        if ar[c] != au:         # written only when it changes: no
                            cwu = 1             # write-back of untouched lines
                            ar[c] = au
                    cw = cwu
                    e = 0.0                     # no alternative: no share (_share's rule)
                    if anyu:
                        tot = 0
                        v = 0.0
                        tdv = 0.0
                        if visits:
                            for c in range(K):
                                tot += <int64_t> N[x, dc, c]
                        else:
                            if ch == h:
                                v = vxx[ii]
                            else:
                                v = q[x, dc, ch] if (ch >= 0 and lv[ch]) else INFINITY
                            tdv = tdx[dc]
                        e = _share(visits, v, tdv, tot, True, ceil, td_ref, emin, espan,
                                   eps_max, visits_half)
                    g = gx[dc]
                    cg = g != ch
                    if cg or fabs(epx[dc] - e) > 1e-9:
                        cw = True
                    fnew = ch != h
                    if fnew and not (fx[dc] and not cg):
                        prevented += 1
                    if cg:
                        changes += 1
                        gx[dc] = ch
                    if epx[dc] != e:
                        epx[dc] = e
                    if fx[dc] != fnew:
                        fx[dc] = fnew
                    if hsx[dc] != h:
                        hsx[dc] = <slot_t> h
                    wx |= cw
                if wx:
                    changed[x] = 1
    finally:
        free(path); free(dep); free(level); free(cyc); free(c1); free(col); free(looped)
        free(prow); free(jp); free(js)
    if failed:
        return changes, -1
    return changes, prevented


def decide(const double[:, :, ::1] q, const uint8_t[:, ::1] live, const int64_t[:, ::1] slots,
           const slot_t[:, ::1] slot_of, const int32_t[:, ::1] spt, const int64_t[::1] ds,
           int64_t[:, ::1] greedy, double[:, ::1] eps, uint8_t[:, :, ::1] alt,
           uint8_t[:, ::1] forced, slot_t[:, ::1] hyst_st, uint8_t[::1] stable,
           const double[:, ::1] td, const count_t[:, :, ::1] N, bint visits,
           double keepf, double ceil, double td_ref, double emin, double espan,
           double eps_max, double visits_half,
           int32_t[:, ::1] choice, int32_t[:, ::1] hy, double[:, ::1] vx,
           int64_t[:, ::1] pot, int32_t[:, ::1] nhT, const int64_t[::1] deg,
           uint8_t[::1] changed, const int64_t[::1] cs):
    """:func:`_decide` with every array passed (the bound form: :class:`Bound`)."""
    if not (choice.shape[0] == hy.shape[0] == vx.shape[0] == pot.shape[0] - 1 == nhT.shape[1]
            == q.shape[0] and choice.shape[1] == vx.shape[1] == pot.shape[1] == nhT.shape[0]
            == hy.shape[1]):
        raise ValueError("decide: scratch shapes do not match (n, B), (n + 1, B), (B, n)")
    return _decide(q, live, slots, slot_of, spt, ds, greedy, eps, alt, forced, hyst_st, stable,
                   td, N, visits, keepf, ceil, td_ref, emin, espan, eps_max, visits_half,
                   choice, hy, vx, pot, nhT, deg, changed, cs)


def routes(const int64_t[::1] rows, const int64_t[:, ::1] greedy, const int64_t[:, ::1] slots,
           const uint8_t[:, :, ::1] alt, const double[:, ::1] eps, list out,
           const int64_t[::1] owned):
    """Engine.routes_many for nodes ``rows``: appends to ``out`` one dict per node,
    destination -> [(next_hop, weight), ...], greedy first, then alternates in slot order;
    weights 1 - eps and eps / count (the reference's operations), 1.0 without alternates.
    Column dc of greedy, alt and eps is destination owned[dc]."""
    cdef Py_ssize_t n = greedy.shape[1], K = slots.shape[1], r, c, dc, cnt
    cdef int64_t x, g, d
    cdef double e, share
    cdef dict table
    cdef list ws
    for r in range(rows.shape[0]):
        x = rows[r]
        table = {}
        for dc in range(n):
            g = greedy[x, dc]
            d = owned[dc]
            if g < 0 or d == x:
                continue
            cnt = 0
            for c in range(K):
                cnt += alt[x, dc, c]
            if cnt:
                e = eps[x, dc]
                share = e / <double> cnt
                ws = [(slots[x, g], 1.0 - e)]
                for c in range(K):
                    if alt[x, dc, c]:
                        ws.append((slots[x, c], share))
            else:
                ws = [(slots[x, g], 1.0)]
            table[d] = ws
        out.append(table)


def table_arrays(const int64_t[::1] rows, const int64_t[:, ::1] greedy,
                 const int64_t[:, ::1] slots, const uint8_t[:, :, ::1] alt,
                 const double[:, ::1] eps, empty):
    """Engine.table_arrays_many for nodes ``rows`` of a whole engine (column c of greedy,
    alt and eps is destination c): ``(owner, dsts, counts, hops, weights)`` as new arrays
    made by ``empty`` (numpy.empty) — an entry per (node, destination) with a greedy slot,
    destination not the node itself, nodes in the order of ``rows`` and destinations
    ascending (numpy's nonzero order); per entry the greedy next hop with 1 - eps (1.0
    without alternates), then the alternates in slot order with eps / count: the
    reference's operations, the same floats."""
    cdef Py_ssize_t nr = rows.shape[0], nd = greedy.shape[1], K = slots.shape[1]
    cdef Py_ssize_t r, c, j, m = 0, h = 0, i, cnt
    cdef int64_t x, g
    cdef double e, share
    for r in range(nr):
        x = rows[r]
        for c in range(nd):
            if greedy[x, c] >= 0 and c != x:
                m += 1
                h += 1
                for j in range(K):
                    h += alt[x, c, j]
    owner_o = empty(m, dtype="i8")
    dsts_o = empty(m, dtype="i8")
    counts_o = empty(m, dtype="i8")
    hops_o = empty(h, dtype="i8")
    w_o = empty(h, dtype="f8")
    cdef int64_t[::1] owner = owner_o, dsts = dsts_o, counts = counts_o, hops = hops_o
    cdef double[::1] w = w_o
    i = 0
    h = 0
    for r in range(nr):
        x = rows[r]
        for c in range(nd):
            g = greedy[x, c]
            if g < 0 or c == x:
                continue
            owner[i] = r
            dsts[i] = c
            cnt = 0
            for j in range(K):
                cnt += alt[x, c, j]
            counts[i] = cnt + 1
            i += 1
            hops[h] = slots[x, g]
            if cnt:
                e = eps[x, c]
                share = e / <double> cnt
                w[h] = 1.0 - e
                h += 1
                for j in range(K):
                    if alt[x, c, j]:
                        hops[h] = slots[x, j]
                        w[h] = share
                        h += 1
            else:
                w[h] = 1.0
                h += 1
    return owner_o, dsts_o, counts_o, hops_o, w_o


cdef object _decide_keys(const double[:, :, ::1] q, const uint8_t[:, ::1] live, const int64_t[::1] owned,
                const int64_t[:, ::1] greedy, double[:, ::1] eps, const uint8_t[:, :, ::1] alt,
                const uint8_t[:, ::1] forced, const slot_t[:, ::1] hyst_st,
                const uint8_t[::1] stable, const double[:, ::1] td, const count_t[:, :, ::1] N,
                bint visits, double keepf, double ceil, double td_ref, double emin,
                double espan, double eps_max, double visits_half,
                const uint8_t[::1] kdirty, const uint8_t[::1] kcols, uint8_t[::1] dirty,
                const int64_t[::1] deg, int64_t[::1] cols, uint8_t[::1] full):
    """Engine._decide_keys (the key lane of decide), the same comparisons and arithmetic:
    marks in ``dirty`` the destination columns the full pass must take, writes the
    exploration shares of the written keys of the others, and returns the nodes whose
    weights changed (a frozenset).  kdirty is the flat (n * nd) key mask; cols and full
    are scratch of nd entries.  The arithmetic of a share is the full pass's (decide)."""
    cdef Py_ssize_t n = q.shape[0], nd = q.shape[1], K = q.shape[2]
    cdef Py_ssize_t x, i, c, nc = 0
    cdef int64_t dc, best, inc, ch, ref, tot
    cdef double bv, v, incv, e
    cdef const double* qr
    cdef bint keep, anyalt
    cdef set out = set()
    for dc in range(nd):                # the columns the lane takes: touched, not due
        full[dc] = 0
        if kcols[dc] and not dirty[dc]:
            cols[nc] = dc
            nc += 1
    if nc == 0:
        return frozenset()
    # pass 1: does any key of a column move its hysteresis choice (or hold an unstable
    # fallback)?  then the column goes to the full pass
    for x in range(n):
        for i in range(nc):
            dc = cols[i]
            if full[dc] or not (kdirty[x * nd + dc] or forced[x, dc]):
                continue
            qr = &q[x, dc, 0]
            best = 0
            bv = qr[0] if live[x, 0] else INFINITY
            for c in range(1, deg[x]):
                v = qr[c] if live[x, c] else INFINITY
                if v < bv:
                    best = c
                    bv = v
            inc = greedy[x, dc]
            incv = qr[inc] if (inc >= 0 and live[x, inc]) else INFINITY
            keep = isfinite(incv) and not (bv < incv * keepf)
            ch = inc if keep else best
            if not isfinite(bv) or x == owned[dc]:
                ch = -1
            ref = hyst_st[x, dc] if forced[x, dc] else inc
            if ch != ref or (forced[x, dc] and not stable[dc]):
                full[dc] = 1
    for i in range(nc):
        dc = cols[i]
        if full[dc]:
            dirty[dc] = 1
    # pass 2: the written keys of the columns that keep their graph: shares only
    for x in range(n):
        for i in range(nc):
            dc = cols[i]
            if full[dc] or not kdirty[x * nd + dc]:
                continue
            anyalt = False
            for c in range(K):
                if alt[x, dc, c]:
                    anyalt = True
            inc = greedy[x, dc]
            v = q[x, dc, inc] if (inc >= 0 and live[x, inc]) else INFINITY
            tot = 0
            if visits:
                for c in range(K):
                    tot += <int64_t> N[x, dc, c]
            e = _share(visits, v, td[x, dc], tot, anyalt, ceil, td_ref, emin, espan, eps_max,
                       visits_half)
            if fabs(eps[x, dc] - e) > 1e-9:
                out.add(x)
            eps[x, dc] = e
    return frozenset(out)


def decide_keys(const double[:, :, ::1] q, const uint8_t[:, ::1] live, const int64_t[::1] owned,
                const int64_t[:, ::1] greedy, double[:, ::1] eps, const uint8_t[:, :, ::1] alt,
                const uint8_t[:, ::1] forced, const slot_t[:, ::1] hyst_st,
                const uint8_t[::1] stable, const double[:, ::1] td, const count_t[:, :, ::1] N,
                bint visits, double keepf, double ceil, double td_ref, double emin,
                double espan, double eps_max, double visits_half,
                const uint8_t[::1] kdirty, const uint8_t[::1] kcols, uint8_t[::1] dirty,
                const int64_t[::1] deg, int64_t[::1] cols, uint8_t[::1] full):
    """:func:`_decide_keys` with every array passed (the bound form: :class:`Bound`)."""
    return _decide_keys(q, live, owned, greedy, eps, alt, forced, hyst_st, stable, td, N,
                        visits, keepf, ceil, td_ref, emin, espan, eps_max, visits_half,
                        kdirty, kcols, dirty, deg, cols, full)

# ---- split mode (routerd.core.splitting) -------------------------------------------------
# error codes of split_decide (the glue raises AssertionError with the reference's words)
cdef enum:
    SPLIT_UNCYCLE = -1       # loop repair did not converge
    SPLIT_OLD_CYCLE = -2     # a cycle made of old edges only
    SPLIT_REVERT = -3        # cycle reversion did not converge
    SPLIT_PUBLISHED = -5     # the published share graph has a cycle
    SPLIT_BLOCK = 8          # destinations gathered per block (scratch: 24 n K B bytes)


cdef inline bint _any(const uint8_t* a, Py_ssize_t n) noexcept nogil:
    cdef Py_ssize_t i
    for i in range(n):
        if a[i]:
            return True
    return False


cdef Py_ssize_t _peel(const double* wc, const int64_t* slots, const int64_t* in_ptr,
                      const int64_t* in_x, const int64_t* in_j, int64_t d, Py_ssize_t n,
                      Py_ssize_t K, uint8_t* alive, int64_t* cnt, int64_t* order) noexcept nogil:
    """Peel sinks off destination d's weighted graph (``wc[x * K + j] > 0``: edge x ->
    slots[x, j]): ``order`` gets the peeled nodes, every successor before its
    predecessors; nodes left with ``alive[x] = 1`` lie on a cycle or lead only into one
    (routerd.core.splitting.cyclic's set).  Returns how many were peeled.  O(n K)."""
    cdef Py_ssize_t x, j, top = 0, head = 0, i
    cdef int64_t y, c
    for x in range(n):
        alive[x] = 0
        if x == d:
            continue
        for j in range(K):
            if wc[x * K + j] > 0:
                alive[x] = 1
                break
    for x in range(n):
        c = 0
        if alive[x]:
            for j in range(K):
                if wc[x * K + j] > 0 and alive[slots[x * K + j]]:
                    c += 1
            if c == 0:
                order[top] = x
                top += 1
        cnt[x] = c
    while head < top:
        y = order[head]
        head += 1
        alive[y] = 0
        for i in range(in_ptr[y], in_ptr[y + 1]):
            x = in_x[i]
            if alive[x] and cnt[x] > 0 and wc[x * K + in_j[i]] > 0:
                cnt[x] -= 1
                if cnt[x] == 0:
                    order[top] = x
                    top += 1
    return top


cdef inline double _dmin(double a, double b) noexcept nogil:
    return a if (a <= b or a != a) else b        # numpy.minimum's rule


cdef inline double _dmax(double a, double b) noexcept nogil:
    return a if (a >= b or a != a) else b        # numpy.maximum's rule


def split_values(const double[:, :, ::1] pub, const double[:, :, ::1] Q, double ceil,
                 double[:, ::1] out):
    """out[x, d] = the published estimate of x for d (routerd.core.splitting.published_values,
    operation for operation): sum_j of pub * Q over the slots with a share, added in slot
    order from 0.0 as splitting.ksum adds (0.0 where a slot has none), then the ceiling
    as a cap; the ceiling where x has no share (shares are never negative or NaN, so
    "some share > 0" is the reference's "shares sum > 0"); 0 at the destination.  The
    reference's (n, n, K) temporaries are not made."""
    cdef Py_ssize_t n = pub.shape[0], nd = pub.shape[1], K = pub.shape[2]
    cdef Py_ssize_t x, d, j
    cdef double v, p
    cdef bint anyp
    cdef const double* pr
    cdef const double* qr
    if Q.shape[0] != n or Q.shape[1] != nd or Q.shape[2] != K or out.shape[0] != n or out.shape[1] != nd:
        raise ValueError("split_values: pub, Q and out do not match")
    with nogil:
        for x in range(n):
            for d in range(nd):
                pr = &pub[x, d, 0] if K else NULL
                qr = &Q[x, d, 0] if K else NULL
                v = 0.0
                anyp = False
                for j in range(K):
                    p = pr[j]
                    if p > 0:
                        v = v + p * qr[j]
                        anyp = True
                    else:
                        v = v + 0.0
                out[x, d] = _dmin(v, ceil) if anyp else ceil
            if x < nd:
                out[x, x] = 0.0


def split_decide(double[:, :, ::1] Q, double[:, :, ::1] w, double[:, :, ::1] pub,
                 const uint8_t[:, ::1] live, const uint8_t[:, ::1] present,
                 const int64_t[:, ::1] slots, const int64_t[:, ::1] rev, const int64_t[::1] in_ptr,
                 const int64_t[::1] in_x, const int64_t[::1] in_j,
                 const double[:, ::1] L, const double[:, ::1] mg, const double[:, ::1] ex,
                 const double[:, ::1] cv, const int64_t[:, ::1] spt_slot,
                 double refresh, double ceil, const double[::1] etas,
                 const double[::1] max_steps, const double[::1] drains,
                 double threshold,
                 int64_t[:, ::1] greedy, double[:, ::1] eps, uint8_t[:, :, ::1] alt,
                 uint8_t[::1] changed, int64_t[::1] counts, const int64_t[::1] dests):
    """One split-mode decision, destination by destination (routerd.core.splitting.decide's
    per-destination part, operation for operation: the refresh, the repair and loop
    fallback, the marginal sums in peel order, the share step, the cycle reversion, the
    publication and the readers).  ``mg``, ``ex``, ``cv``: per-slot marginal, externality,
    flow-weighted curvature; per destination: ``etas`` the step, ``max_steps`` its bound,
    ``drains`` the least share an uphill used next hop gives up.  Only the destinations in
    ``dests`` (distinct, in range) are decided, in that order; the others' columns are not
    read or written.  counts[:] += fallbacks, uncycled, reverted, share moves,
    forced, whole publications, publications, route changes.  Returns 0, or an error
    code (< 0) when a repair did not converge."""
    cdef Py_ssize_t n = Q.shape[0], K = Q.shape[2], nds = dests.shape[0]
    cdef Py_ssize_t d, x, j, it, top, js, ps
    cdef int64_t y, s0, gx
    cdef double v, q, tgt, nv, tot, p, best, dstar, hstar, raw, give, acc, mx
    cdef double eta, max_step, drain
    if etas.shape[0] != n or max_steps.shape[0] != n or drains.shape[0] != n:
        raise ValueError("split_decide: etas, max_steps and drains need one entry per node")
    for x in range(nds):
        if dests[x] < 0 or dests[x] >= n:
            raise ValueError(f"split_decide: destination {dests[x]} out of range")
    cdef bint anyp, lost, has, anykey, upd, forced, anyn, diffc, anyupd
    cdef Py_ssize_t nfresh
    cdef double* V = <double*>malloc(n * sizeof(double))
    cdef double* Mv = <double*>malloc(n * sizeof(double))
    cdef double* Ev = <double*>malloc(n * sizeof(double))
    cdef double* Hv = <double*>malloc(n * sizeof(double))
    cdef double* wo = <double*>malloc(n * K * sizeof(double))
    cdef double* wc = <double*>malloc(n * K * sizeof(double))
    cdef double* nw = <double*>malloc(n * K * sizeof(double))
    cdef double* pc = <double*>malloc(n * K * sizeof(double))
    cdef double* po = <double*>malloc(n * K * sizeof(double))
    cdef double* dl = <double*>malloc(K * sizeof(double))
    cdef double* hj = <double*>malloc(K * sizeof(double))
    cdef double* gv = <double*>malloc(K * sizeof(double))
    cdef uint8_t* cand = <uint8_t*>malloc(K * sizeof(uint8_t))
    cdef uint8_t* upj = <uint8_t*>malloc(K * sizeof(uint8_t))
    cdef uint8_t* fresh = <uint8_t*>malloc(n * K * sizeof(uint8_t))
    cdef uint8_t* alive = <uint8_t*>malloc(n * sizeof(uint8_t))
    cdef uint8_t* cyc = <uint8_t*>malloc(n * sizeof(uint8_t))
    cdef int64_t* cnt = <int64_t*>malloc(n * sizeof(int64_t))
    cdef int64_t* order = <int64_t*>malloc(n * sizeof(int64_t))
    cdef int64_t* jsall = <int64_t*>malloc(n * sizeof(int64_t))
    cdef int64_t r
    cdef const int64_t* sl = &slots[0, 0]
    # a block of destinations' columns of Q, w and pub, gathered into contiguous scratch:
    # Q[x, d0:d0 + B, :] is one run of memory, Q[x, d, :] alone a stride of n K apart
    cdef Py_ssize_t B = SPLIT_BLOCK if nds >= SPLIT_BLOCK else nds, nb, b, d0, nK = n * K
    cdef double* qb = <double*>malloc((B if B > 0 else 1) * nK * sizeof(double))
    cdef double* wb = <double*>malloc((B if B > 0 else 1) * nK * sizeof(double))
    cdef double* pbk = <double*>malloc((B if B > 0 else 1) * nK * sizeof(double))
    cdef double* qd
    cdef double* wd
    cdef double* pd
    cdef int64_t err = 0
    cdef int64_t fallbacks = 0, uncycled = 0, reverted = 0, moves = 0, nforced = 0
    cdef int64_t whole = 0, pubs = 0, rchanges = 0
    if not (V and Mv and Ev and Hv and wo and wc and nw and pc and po and dl and hj and gv
            and cand and upj and fresh and alive and cyc and cnt and order and qb and wb and pbk
            and jsall):
        free(V); free(Mv); free(Ev); free(Hv); free(wo); free(wc); free(nw); free(pc)
        free(po); free(dl); free(hj); free(gv); free(cand); free(upj); free(fresh); free(alive)
        free(cyc); free(cnt); free(order); free(qb); free(wb); free(pbk); free(jsall)
        raise MemoryError("split_decide: scratch")
    with nogil:
      d0 = 0
      while d0 < nds and not err:
        nb = B if d0 + B <= nds else nds - d0
        for x in range(n):
            for b in range(nb):
                d = dests[d0 + b]
                for j in range(K):
                    qb[b * nK + x * K + j] = Q[x, d, j]
                    wb[b * nK + x * K + j] = w[x, d, j]
                    pbk[b * nK + x * K + j] = pub[x, d, j]
        for b in range(nb):
            d = dests[d0 + b]
            eta = etas[d]
            max_step = max_steps[d]
            drain = drains[d]
            qd = &qb[b * nK]
            wd = &wb[b * nK]
            pd = &pbk[b * nK]
            # 0. V[y] = published estimate (old Q), 1. refresh every live slot's entry
            for y in range(n):
                v = 0.0
                anyp = False
                for j in range(K):
                    p = pd[y * K + j]
                    if p > 0:
                        v = v + p * qd[y * K + j]
                        anyp = True
                    else:
                        v = v + 0.0
                    pc[y * K + j] = p
                V[y] = _dmin(v, ceil) if anyp else ceil
            V[d] = 0.0
            for x in range(n):
                for j in range(K):
                    if live[x, j]:
                        q = qd[x * K + j]
                        tgt = L[x, j] + V[sl[x * K + j]]
                        nv = q + refresh * (tgt - q)
                        qd[x * K + j] = _dmin(_dmax(nv, 0.0), ceil)
            # 2. repair: no share on a dead link, reachable keys routed
            for x in range(n):
                lost = False
                tot = 0.0
                for j in range(K):
                    p = wd[x * K + j]
                    wo[x * K + j] = p
                    if p > 0 and not live[x, j]:
                        lost = True
                    wc[x * K + j] = p if live[x, j] else 0.0
                    tot = tot + wc[x * K + j]
                if lost and tot > 0:
                    for j in range(K):
                        wc[x * K + j] = wc[x * K + j] / tot
                s0 = spt_slot[x, d]
                if s0 < 0:
                    for j in range(K):
                        wc[x * K + j] = 0.0
                elif not (tot > 0):
                    for j in range(K):
                        wc[x * K + j] = 1.0 if j == s0 else 0.0
                    fallbacks += 1
            # loop fallback: nodes on (or into) a cycle take the live shortest-path tree
            # (the last peel, of an acyclic graph, is the order of the marginal sums)
            it = 0
            while True:
                top = _peel(wc, sl, &in_ptr[0], &in_x[0], &in_j[0], d, n, K, alive, cnt, order)
                if not _any(alive, n):
                    break
                it += 1
                if it > n + 2:
                    err = SPLIT_UNCYCLE
                    break
                for x in range(n):
                    if alive[x]:
                        s0 = spt_slot[x, d]
                        for j in range(K):
                            wc[x * K + j] = 1.0 if j == s0 else 0.0
                        uncycled += 1
                        fallbacks += 1
            if err:
                break
            # 3. marginal sums in peel order (successors first)
            for x in range(n):
                Mv[x] = INFINITY if x != d else 0.0
                Ev[x] = 0.0
                Hv[x] = 0.0
            for it in range(top):
                x = order[it]
                v = 0.0
                tot = 0.0
                acc = 0.0
                for j in range(K):
                    p = wc[x * K + j]
                    if p > 0:
                        y = sl[x * K + j]
                        v = v + p * (mg[x, j] + Mv[y])
                        tot = tot + p * (ex[x, j] + Ev[y])
                        acc = acc + p * (cv[x, j] + Hv[y])
                    else:
                        v = v + 0.0
                        tot = tot + 0.0
                        acc = acc + 0.0
                Mv[x] = v
                Ev[x] = tot
                Hv[x] = acc
            # the share step, key by key: pass 0 finds every key's cheapest slot (an
            # uphill share is drained when its neighbour's cheapest is the edge back),
            # pass 1 steps
            for ps in range(2):
              for x in range(n):
                has = False
                for j in range(K):
                    y = sl[x * K + j]
                    cand[j] = 0
                    upj[j] = 0
                    if x != d and live[x, j] and present[x, j] and y >= 0:
                        if Mv[y] < Mv[x]:
                            cand[j] = 1
                        elif wc[x * K + j] > 0:
                            cand[j] = 1
                            upj[j] = 1          # used, not downhill: drained (drain)
                    if cand[j]:
                        has = True
                        dl[j] = (qd[x * K + j] + ex[x, j]) + Ev[y]
                        hj[j] = cv[x, j] + Hv[y]
                    else:
                        dl[j] = INFINITY
                        hj[j] = 0.0
                if not has:
                    if ps == 0:
                        jsall[x] = -1
                    else:
                        for j in range(K):
                            nw[x * K + j] = wc[x * K + j]
                    continue
                js = 0
                best = dl[0]
                for j in range(1, K):
                    if dl[j] < best:
                        best = dl[j]
                        js = j
                if ps == 0:
                    jsall[x] = js
                    continue
                dstar = best
                hstar = hj[js]
                acc = 0.0
                for j in range(K):
                    p = wc[x * K + j]
                    if j == js:
                        give = 0.0
                    elif cand[j]:
                        raw = eta * (dl[j] - dstar) / (1.0 * (hj[j] + hstar))
                        if raw != raw:
                            raw = INFINITY
                        raw = _dmax(raw, 0.0)
                        give = _dmin(_dmin(p, max_step), raw)
                        if upj[j]:
                            y = sl[x * K + j]
                            r = rev[x, j]
                            if r >= 0 and jsall[y] == r and wc[y * K + r] == 0:
                                give = _dmax(give, _dmin(p, drain))
                    else:
                        give = p
                    nw[x * K + j] = p - give
                    acc = acc + give
                nw[x * K + js] = nw[x * K + js] + acc
            # revert new edges that close a cycle (none added: a subgraph of wc, acyclic)
            nfresh = 0
            for x in range(n * K):
                fresh[x] = nw[x] > 0 and not (wc[x] > 0)
                nfresh += fresh[x]
            it = 0
            while nfresh:
                top = _peel(nw, sl, &in_ptr[0], &in_x[0], &in_j[0], d, n, K, alive, cnt, order)
                if not _any(alive, n):
                    break
                it += 1
                if it > n * n + 1:
                    err = SPLIT_REVERT
                    break
                anykey = False
                for x in range(n):
                    cyc[x] = 0
                    if alive[x]:
                        for j in range(K):
                            if fresh[x * K + j]:
                                cyc[x] = 1
                                anykey = True
                                break
                if not anykey:
                    err = SPLIT_OLD_CYCLE
                    break
                for x in range(n):
                    if not cyc[x]:
                        continue
                    tot = 0.0
                    for j in range(K):
                        if fresh[x * K + j]:
                            gv[j] = 0.0
                        else:
                            gv[j] = nw[x * K + j]
                        tot = tot + gv[j]
                    if tot > 0:
                        mx = 1.0 / tot
                        for j in range(K):
                            nw[x * K + j] = gv[j] * mx
                    else:
                        for j in range(K):
                            nw[x * K + j] = wc[x * K + j] * 1.0
                    for j in range(K):
                        fresh[x * K + j] = 0
                    reverted += 1
            if err:
                break
            # 4. moved / publish (threshold, forced), keep the published graph acyclic
            # (nothing replaced: the published graph is the last one, acyclic)
            anyupd = False
            for x in range(n):
                diffc = False
                upd = False
                anyp = False
                anyn = False
                forced = False
                mx = 0.0
                for j in range(K):
                    if nw[x * K + j] != wo[x * K + j]:
                        diffc = True
                    wd[x * K + j] = nw[x * K + j]
                    p = pc[x * K + j]
                    mx = _dmax(mx, fabs(nw[x * K + j] - p))
                    if p > 0:
                        anyp = True
                        if not live[x, j]:
                            forced = True
                    if nw[x * K + j] > 0:
                        anyn = True
                    po[x * K + j] = p
                if diffc:
                    moves += 1
                upd = mx > threshold
                if anyp != anyn:
                    forced = True
                if forced and not upd:
                    nforced += 1
                if upd or forced:
                    anyupd = True
                    for j in range(K):
                        pc[x * K + j] = nw[x * K + j]
            if anyupd:
                _peel(pc, sl, &in_ptr[0], &in_x[0], &in_j[0], d, n, K, alive, cnt, order)
            if anyupd and _any(alive, n):
                for x in range(n * K):
                    pc[x] = nw[x]
                whole += 1
                _peel(pc, sl, &in_ptr[0], &in_x[0], &in_j[0], d, n, K, alive, cnt, order)
                if _any(alive, n):
                    err = SPLIT_PUBLISHED
                    break
            # readers: greedy = the largest published share, eps = the rest
            for x in range(n):
                diffc = False
                anyp = False
                gx = 0
                best = pc[x * K]
                for j in range(K):
                    p = pc[x * K + j]
                    if p != po[x * K + j]:
                        diffc = True
                    pd[x * K + j] = p
                    if p > 0:
                        anyp = True
                    if p > best:
                        best = p
                        gx = j
                if diffc:
                    pubs += 1
                    changed[x] = 1
                if not anyp:
                    gx = -1
                if gx != greedy[x, d]:
                    rchanges += 1
                greedy[x, d] = gx
                eps[x, d] = 1.0 - best if anyp else 0.0
                for j in range(K):
                    alt[x, d, j] = pc[x * K + j] > 0 and j != gx
        for x in range(n):
            for b in range(nb):
                d = dests[d0 + b]
                for j in range(K):
                    Q[x, d, j] = qb[b * nK + x * K + j]
                    w[x, d, j] = wb[b * nK + x * K + j]
                    pub[x, d, j] = pbk[b * nK + x * K + j]
        d0 += nb
    free(V); free(Mv); free(Ev); free(Hv); free(wo); free(wc); free(nw); free(pc)
    free(po); free(dl); free(hj); free(gv); free(cand); free(upj); free(fresh); free(alive)
    free(cyc); free(cnt); free(order); free(qb); free(wb); free(pbk); free(jsall)
    counts[0] += fallbacks
    counts[1] += uncycled
    counts[2] += reverted
    counts[3] += moves
    counts[4] += nforced
    counts[5] += whole
    counts[6] += pubs
    counts[7] += rchanges
    return err


# ==== ingest: the service's columnar ingest ===================================================
# (routerd.io.wire's columnar decode, routerd.core.guards' screen, routerd.service.optimum's
# meter).  Each is the one-pass transcription of its numpy reference, which stays the
# reference (tests/test_ingest_kernels.py: compiled == reference on random and malformed
# input).  This block is separate from the engine's kernels above on purpose.
from libc.math cimport NAN
from libc.stdint cimport uint64_t
from libc.string cimport memcpy


def cols_decode(const uint8_t[::1] fb, const uint8_t[::1] vb, const uint8_t[::1] db,
                const uint8_t[::1] lb, const uint8_t[::1] eb, int64_t n,
                int64_t[::1] xs, int64_t[::1] ys, int64_t[::1] ds, double[::1] lat,
                double[::1] est):
    """A columnar frame's columns (``from``/``via``/``dst`` int32, ``latency_s``/``estimate_s``
    float64, little-endian bytes of m rows each; ``eb`` None: no estimates, NaN) widened
    into ``xs``/``ys``/``ds`` (int64) and ``lat``/``est`` (float64) of m rows, read with
    memcpy (the bytes need no alignment).  The caller checked the lengths and that the host
    is little-endian.  Returns how many rows name a node index outside [0, n) (the rows are
    written all the same)."""
    cdef Py_ssize_t m = xs.shape[0], i
    cdef int32_t a, b, c
    cdef int64_t bad = 0
    cdef bint has_e = eb is not None
    with nogil:
        for i in range(m):
            memcpy(&a, &fb[4 * i], 4)
            memcpy(&b, &vb[4 * i], 4)
            memcpy(&c, &db[4 * i], 4)
            xs[i] = a
            ys[i] = b
            ds[i] = c
            if a < 0 or a >= n or b < 0 or b >= n or c < 0 or c >= n:
                bad += 1
        if m:
            memcpy(&lat[0], &lb[0], 8 * m)
            if has_e:
                memcpy(&est[0], &eb[0], 8 * m)
            else:
                for i in range(m):
                    est[i] = NAN
    return bad


def guards_clean(const int64_t[::1] xs, const int64_t[::1] ys, const int64_t[::1] ds,
                 const double[::1] lat, const double[::1] est, int64_t n,
                 const int64_t[::1] lk_flat, const double[::1] floor_link,
                 const double[::1] floor_dist, double ceiling):
    """:meth:`routerd.core.guards.Guards._clean` in one pass: True when every index is in
    [0, n) and no row reaches a floor or the ceiling (NaN compares false everywhere, as in
    numpy); ``floor_link``'s last entry is the one for a via that is no neighbour."""
    cdef Py_ssize_t m = xs.shape[0], i
    cdef int64_t x, y, d, lk
    cdef Py_ssize_t last = floor_link.shape[0] - 1
    cdef double l, e, fl
    cdef bint ok = True
    with nogil:
        for i in range(m):
            x = xs[i]
            y = ys[i]
            d = ds[i]
            if <uint64_t>x >= <uint64_t>n or <uint64_t>y >= <uint64_t>n or <uint64_t>d >= <uint64_t>n:
                ok = False
                break
            lk = lk_flat[x * n + y]
            fl = floor_link[lk] if lk >= 0 else floor_link[last]
            l = lat[i]
            e = est[i]
            if l < fl or l > ceiling or e > ceiling:
                ok = False
                break
            # a NaN estimate (absent) compares false: its floor is not read (a random
            # read in an n x n table per row, the screen's costliest; same result)
            if lk >= 0 and e == e and e < floor_dist[y * n + d]:
                ok = False
                break
    return ok


def meter_add(double[::1] out, double[::1] into, double[::1] lk, double[::1] latsum,
              const int64_t[::1] link_of, const int64_t[::1] src, const int64_t[::1] via,
              const int64_t[::1] dst, const double[::1] latency, int64_t n):
    """:meth:`routerd.service.optimum.Meter.add`'s four ``np.add.at`` in one pass, in row
    order (the same additions in the same order): per row one out of (src, dst), one into
    (via, dst), one on the link and its latency on the link's sum; a link index of -1
    counts on the last link, as numpy's negative index does.  Indices are in range (the
    rows were accepted by the engine)."""
    cdef Py_ssize_t m = src.shape[0], i
    cdef Py_ssize_t nl = lk.shape[0]
    cdef int64_t k
    with nogil:
        for i in range(m):
            out[src[i] * n + dst[i]] += 1.0
            into[via[i] * n + dst[i]] += 1.0
            k = link_of[src[i] * n + via[i]]
            if k < 0:
                k += nl
            lk[k] += 1.0
            latsum[k] += latency[i]


def histo_add(int64_t[::1] counts, const double[::1] bounds, const double[::1] values,
              const int64_t[::1] lut):
    """:meth:`routerd.service.metrics.Histo`'s binning in one pass: each value counted in the
    first bucket whose bound it does not exceed (``np.searchsorted(..., side="left")``: a
    value equal to a bound is in that bound's bucket; NaN goes past every bound, into the
    last, as numpy sorts it); returns the values' sum, added in order.  ``lut`` (2048
    entries, one per binary exponent) holds how many bounds lie below the smallest
    non-negative double of that exponent (0 for exponent 0): a value >= 0 starts there and
    steps over the few bounds left in its binade; a negative one counts every bound."""
    cdef Py_ssize_t m = values.shape[0], nb = bounds.shape[0], i, j, lo
    cdef double v, s = 0.0
    cdef uint64_t bits
    with nogil:
        for i in range(m):
            v = values[i]
            s += v
            if v != v:
                lo = nb
            elif v >= 0:
                memcpy(&bits, &v, 8)
                lo = lut[(bits >> 52) & 0x7FF]
                while lo < nb and bounds[lo] < v:
                    lo += 1
            else:
                lo = 0
                for j in range(nb):
                    lo += bounds[j] < v
            counts[lo] += 1
    return s


cdef extern from *:
    """
    static inline unsigned long long rd_bswap64(unsigned long long x) {
    #if defined(__GNUC__) || defined(__clang__)
        return __builtin_bswap64(x);
    #else
        x = ((x & 0x00000000FFFFFFFFull) << 32) | ((x & 0xFFFFFFFF00000000ull) >> 32);
        x = ((x & 0x0000FFFF0000FFFFull) << 16) | ((x & 0xFFFF0000FFFF0000ull) >> 16);
        return ((x & 0x00FF00FF00FF00FFull) << 8) | ((x & 0xFF00FF00FF00FF00ull) >> 8);
    #endif
    }
    """
    unsigned long long rd_bswap64(unsigned long long x) noexcept nogil


def table_gather(const uint8_t[::1] static, const int64_t[::1] key_off,
                 const int64_t[::1] key_len, const int64_t[::1] head_off,
                 const int64_t[::1] hop_off, const int64_t[::1] hop_len,
                 const int64_t[::1] dsts, const int64_t[::1] counts, const int64_t[::1] hops,
                 const double[::1] weights, int64_t[::1] entry_at):
    """:meth:`routerd.io.wire.TableCodec._gather` by copying: per entry its packed key, its
    list head, then per hop the ``[name, `` piece and the weight's big-endian float64
    bytes, in a row.  ``entry_at`` (m + 1) gets each entry's byte offset and the total.
    Returns the bytes (a bytearray).  The caller checked that every count is below 16 and
    that the host is little-endian."""
    cdef Py_ssize_t m = dsts.shape[0], i, j, h = 0
    cdef int64_t total = 0, at
    cdef unsigned long long bits
    if m == 0:
        entry_at[0] = 0
        return bytearray()
    for i in range(m):
        total += key_len[dsts[i]] + 1
        for j in range(counts[i]):
            total += hop_len[hops[h]] + 8
            h += 1
    out = bytearray(total)
    cdef uint8_t[::1] o = out
    h = 0
    at = 0
    with nogil:
        for i in range(m):
            entry_at[i] = at
            memcpy(&o[at], &static[key_off[dsts[i]]], key_len[dsts[i]])
            at += key_len[dsts[i]]
            o[at] = static[head_off[counts[i]]]
            at += 1
            for j in range(counts[i]):
                memcpy(&o[at], &static[hop_off[hops[h]]], hop_len[hops[h]])
                at += hop_len[hops[h]]
                memcpy(&bits, &weights[h], 8)
                bits = rd_bswap64(bits)
                memcpy(&o[at], &bits, 8)
                at += 8
                h += 1
        entry_at[m] = at
    return out


def meter_add_cols(double[::1] out, double[::1] into, double[::1] lk, double[::1] latsum,
                   const int64_t[::1] link_of, const uint8_t[::1] fb, const uint8_t[::1] vb,
                   const uint8_t[::1] db, const uint8_t[::1] lb, int64_t n):
    """:func:`meter_add` on a ``batch`` record's column bytes as they are (int32 / float64
    little-endian, read with memcpy: no alignment needed, no widened copies); the caller
    checked the lengths and that the host is little-endian."""
    cdef Py_ssize_t m = fb.shape[0] // 4, i
    cdef Py_ssize_t nl = lk.shape[0]
    cdef int32_t x, y, d
    cdef int64_t k
    cdef double l
    with nogil:
        for i in range(m):
            memcpy(&x, &fb[4 * i], 4)
            memcpy(&y, &vb[4 * i], 4)
            memcpy(&d, &db[4 * i], 4)
            memcpy(&l, &lb[8 * i], 8)
            out[<int64_t>x * n + d] += 1.0
            into[<int64_t>y * n + d] += 1.0
            k = link_of[<int64_t>x * n + y]
            if k < 0:
                k += nl
            lk[k] += 1.0
            latsum[k] += l


# ---- an engine's arrays, bound once (routerd.core.kernels.bound) -------------------------

cdef class Bound:
    """One engine's arrays as typed views, acquired once: :meth:`observe` and
    :meth:`decide_keys` then take only the per-call inputs (converting twenty-odd arrays
    on every call was most of a small batch's cost).  Every call first checks that the
    engine still holds the very arrays (and settings, and step table) bound here, by
    identity; when the engine has replaced one (a reload, a restore, a resize) the call
    returns ``None`` without touching anything and the glue binds afresh.  The kernels are
    the module's own (:func:`observe`, :func:`decide_keys`): the same results to the bit.
    Construction raises ValueError when an array is not of a kind the kernels take (the
    glue then keeps to the unbound functions' rules)."""
    cdef object o_Q, o_N, o_td, o_live, o_slot, o_col, o_kdirty, o_kcols, o_alphas, o_settings
    cdef object o_owned, o_greedy, o_eps, o_alt, o_forced, o_hyst, o_stable, o_dirty, o_deg
    cdef object beyond, empty, code_o, o_slots
    cdef int64_t[:, ::1] slots, s_pot
    cdef int32_t[:, ::1] s_choice, s_hy, s_nhT
    cdef double[:, ::1] s_vx
    cdef uint8_t[::1] s_changed
    cdef double[:, :, ::1] Q
    cdef uint8_t[:, :, ::1] N8
    cdef uint16_t[:, :, ::1] N16
    cdef uint32_t[:, :, ::1] N32
    cdef int nkind, skind
    cdef double[:, ::1] td
    cdef uint8_t[:, ::1] live
    cdef int16_t[:, ::1] so16
    cdef int16_t[:, ::1] hy16
    cdef int32_t[:, ::1] so32
    cdef int32_t[:, ::1] hy32
    cdef int64_t[::1] col, owned, deg, cols, code
    cdef uint8_t[::1] kdirty, kcols, stable, dirty, full
    cdef int64_t[:, ::1] greedy
    cdef double[:, ::1] eps
    cdef uint8_t[:, :, ::1] alt
    cdef uint8_t[:, ::1] forced
    cdef double[::1] steps
    cdef bint clamped, visits
    cdef int64_t cap
    cdef double ceil, sm, keepf, td_ref, emin, espan, eps_max, visits_half

    def __init__(self, eng, slot_of, empty, Py_ssize_t block):
        """``slot_of``: the engine's ``_slot_of``, C-ordered; ``empty``: ``numpy.empty``
        (the scratch and the TD errors returned are numpy arrays); ``block``: the full
        pass's destinations per block (the width of its scratch)."""
        s = eng.settings
        eng._steps()                    # builds the step table (eng._alphas) when needed
        self.o_Q = eng.Q; self.o_N = eng.N; self.o_td = eng.td; self.o_live = eng.live
        self.o_slot = eng._slot_of; self.o_col = eng._col; self.o_kdirty = eng._kdirty
        self.o_kcols = eng._kcols; self.o_alphas = eng._alphas; self.o_settings = s
        self.o_owned = eng.owned; self.o_greedy = eng.greedy; self.o_eps = eng.eps
        self.o_alt = eng.alt; self.o_forced = eng._forced; self.o_hyst = eng._hyst
        self.o_stable = eng._stable; self.o_dirty = eng._dirty; self.o_deg = eng._slot_deg
        self.Q = eng.Q
        N = eng.N
        if N.dtype.itemsize == 1:
            self.N8 = N; self.nkind = 1
        elif N.dtype.itemsize == 2:
            self.N16 = N; self.nkind = 2
        else:
            self.N32 = N; self.nkind = 3
        h = eng._hyst
        if h.dtype != slot_of.dtype:
            raise ValueError("the hysteresis choices and the slot map differ in type")
        if slot_of.dtype.itemsize == 2:
            self.so16 = slot_of; self.hy16 = h; self.skind = 1
        else:
            self.so32 = slot_of; self.hy32 = h; self.skind = 2
        self.td = eng.td
        self.live = eng.live.view("u1")
        self.col = eng._col
        self.kdirty = eng._kdirty.view("u1")
        self.kcols = eng._kcols.view("u1")
        self.owned = eng.owned
        self.greedy = eng.greedy
        self.eps = eng.eps
        self.alt = eng.alt.view("u1")
        self.forced = eng._forced.view("u1")
        self.stable = eng._stable.view("u1")
        self.dirty = eng._dirty.view("u1")
        self.deg = eng._slot_deg
        self.steps = eng._alphas
        self.clamped = eng._alpha_clamped
        self.beyond = eng._step_beyond
        self.cap = eng._count_cap
        self.ceil = s.ceiling_s
        self.sm = s.td_smoothing
        self.visits = s.explore_basis != "td"
        self.keepf = 1.0 - s.margin
        self.td_ref = s.td_ref
        self.emin = s.explore_min
        self.espan = s.explore_max - s.explore_min
        self.eps_max = s.eps_max
        self.visits_half = s.visits_half
        self.empty = empty
        nd = eng.nd
        self.cols = empty(nd, dtype="i8")
        self.full = empty(nd, dtype="u1")
        self.code_o = empty(64, dtype="i8")
        self.code = self.code_o
        self.o_slots = eng._slots
        self.slots = eng._slots
        n = eng.n
        # the full pass's scratch for a block of destinations (every entry it reads it
        # writes first; `changed` is cleared at each call)
        self.s_choice = empty((n, block), dtype="i4")
        self.s_hy = empty((n, block), dtype="i4")
        self.s_vx = empty((n, block), dtype="f8")
        self.s_pot = empty((n + 1, block), dtype="i8")
        self.s_nhT = empty((block, n), dtype="i4")
        self.s_changed = empty(n, dtype="u1")

    cdef bint _fresh(self, e) except -1:
        return (e.Q is self.o_Q and e.N is self.o_N and e.td is self.o_td
                and e.live is self.o_live and e._slot_of is self.o_slot and e._col is self.o_col
                and e._kdirty is self.o_kdirty and e._kcols is self.o_kcols
                and e._alphas is self.o_alphas and e.settings is self.o_settings
                and e.owned is self.o_owned and e.greedy is self.o_greedy and e.eps is self.o_eps
                and e.alt is self.o_alt and e._forced is self.o_forced and e._hyst is self.o_hyst
                and e._stable is self.o_stable and e._dirty is self.o_dirty
                and e._slot_deg is self.o_deg and e._slots is self.o_slots)

    def fresh(self, eng):
        """Whether ``eng`` still holds the arrays bound here."""
        return self._fresh(eng)

    def codes(self):
        """The last :meth:`observe`'s reason codes (scratch: its first rows' worth)."""
        return self.code_o

    def observe(self, eng, src, via, dst, latency, estimate):
        """:func:`observe` on the bound arrays: ``(accepted, tde)`` (``tde`` a fresh array
        of one entry per row, the first ``accepted`` of them set; the codes in
        :meth:`codes`); None when the engine no longer holds the bound arrays; False when
        the columns are not C-ordered int64 (src, via, dst) and float64 of one length (the
        caller converts them).  Nothing is written unless a tuple is returned."""
        cdef const int64_t[::1] xs
        cdef const int64_t[::1] ys
        cdef const int64_t[::1] ds
        cdef const double[::1] lats
        cdef const double[::1] ests
        cdef Py_ssize_t m, acc
        if not self._fresh(eng):
            return None
        try:
            xs = src; ys = via; ds = dst; lats = latency; ests = estimate
        except (ValueError, TypeError, BufferError):
            return False
        m = xs.shape[0]
        if ys.shape[0] != m or ds.shape[0] != m or lats.shape[0] != m or ests.shape[0] != m:
            return False
        if self.code.shape[0] < m:
            self.code_o = self.empty(max(m, 2 * self.code.shape[0]), dtype="i8")
            self.code = self.code_o
        tde_o = self.empty(m)
        cdef double[::1] tde = tde_o
        if self.nkind == 1:
            acc = _b_observe(self, self.N8, xs, ys, ds, lats, ests, tde)
        elif self.nkind == 2:
            acc = _b_observe(self, self.N16, xs, ys, ds, lats, ests, tde)
        else:
            acc = _b_observe(self, self.N32, xs, ys, ds, lats, ests, tde)
        return acc, tde_o

    def decide_keys(self, eng):
        """:func:`decide_keys` on the bound arrays (the same frozenset), or None when the
        engine no longer holds the bound arrays."""
        if not self._fresh(eng):
            return None
        return self._keys()

    cdef object _keys(self):
        if self.nkind == 1:
            return _b_keys(self, self.N8)
        elif self.nkind == 2:
            return _b_keys(self, self.N16)
        return _b_keys(self, self.N32)

    def decide_full(self, eng, cs_o, spt_o):
        """:func:`decide` on the bound arrays for destination columns ``cs`` (C-ordered
        int64) and the live shortest-path tree ``spt`` (int32): ``(changed nodes,
        route changes, loops newly prevented)`` (prevented -1: the fallback did not
        converge); None when the engine no longer holds the bound arrays or the values
        decided on are not Q (a variant's); False when ``cs`` or ``spt`` is not of the
        kind taken.  Nothing is written unless a tuple is returned."""
        cdef const int64_t[::1] cs
        cdef const int32_t[:, ::1] spt
        if not self._fresh(eng) or eng._qdec is not self.o_Q:
            return None
        try:
            cs = cs_o; spt = spt_o
        except (ValueError, TypeError, BufferError):
            return False
        return self._full(cs, spt)

    cdef object _full(self, const int64_t[::1] cs, const int32_t[:, ::1] spt):
        cdef Py_ssize_t i, m, x, n = self.Q.shape[0]
        m = cs.shape[0]
        ds_o = self.empty(m, dtype="i8")
        cdef int64_t[::1] ds = ds_o
        for i in range(m):      # owned.take(cs): numpy's rules for the column indices
            if not 0 <= cs[i] < self.owned.shape[0]:
                return False
            ds[i] = self.owned[cs[i]]
        self.s_changed[:] = 0
        if self.nkind == 1:
            r = _b_full(self, self.N8, spt, ds, cs)
        elif self.nkind == 2:
            r = _b_full(self, self.N16, spt, ds, cs)
        else:
            r = _b_full(self, self.N32, spt, ds, cs)
        out = set()
        for x in range(n):
            if self.s_changed[x]:
                out.add(x)
        changes, prevented = r
        return frozenset(out), changes, prevented

    def decide_due(self, eng):
        """:meth:`Engine.decide`'s unlimited step on the bound arrays, for the plain rule
        (the values decided on are Q): the key lane when a key was written (its masks
        then cleared), then the full pass over every due destination (the due mask
        cleared).  Returns ``(changed nodes, route changes, loops newly prevented,
        destinations in the full pass)``, or None, having written nothing, when the engine
        no longer holds the bound arrays (prevented -1: the fallback did not converge)."""
        cdef Py_ssize_t dc, nd = self.dirty.shape[0], nk = self.kdirty.shape[0], nc = 0
        cdef int64_t[::1] cs
        cdef bint keyed = False
        if not self._fresh(eng) or eng._qdec is not self.o_Q:
            return None
        for dc in range(nd):
            if self.kcols[dc]:
                keyed = True
                break
        extra = frozenset()
        if keyed:
            extra = self._keys()
            self.kdirty[:] = 0
            self.kcols[:] = 0
        for dc in range(nd):
            if self.dirty[dc]:
                nc += 1
        if nc == 0:
            return extra, 0, 0, 0
        cs_o = self.empty(nc, dtype="i8")
        cs = cs_o
        nc = 0
        for dc in range(nd):
            if self.dirty[dc]:
                cs[nc] = dc
                nc += 1
        self.dirty[:] = 0
        out = self._full(cs, eng._spt_live())
        nodes, changes, prevented = out
        return nodes | extra, changes, prevented, nc


# Bound's kernel calls, one call site per kernel: the engine's count type (count_t) and its
# slot map's type (slot_t, the same for the hysteresis choices) pick the specialisation.
cdef Py_ssize_t _b_observe(Bound b, count_t[:, :, ::1] N, const int64_t[::1] xs,
                           const int64_t[::1] ys, const int64_t[::1] ds,
                           const double[::1] lats, const double[::1] ests,
                           double[::1] tde) except -1:
    if b.skind == 1:
        return _b_observe_s(b, N, b.so16, xs, ys, ds, lats, ests, tde)
    return _b_observe_s(b, N, b.so32, xs, ys, ds, lats, ests, tde)


cdef Py_ssize_t _b_observe_s(Bound b, count_t[:, :, ::1] N, const slot_t[:, ::1] so,
                             const int64_t[::1] xs, const int64_t[::1] ys,
                             const int64_t[::1] ds, const double[::1] lats,
                             const double[::1] ests, double[::1] tde) except -1:
    return _observe(b.Q, N, b.cap, b.td, b.live, so, b.steps, b.clamped, b.beyond, b.ceil,
                    b.sm, xs, ys, ds, lats, ests, b.code, tde, b.kdirty, b.kcols, b.col)


cdef object _b_keys(Bound b, count_t[:, :, ::1] N):
    if b.skind == 1:
        return _b_keys_s(b, N, b.hy16)
    return _b_keys_s(b, N, b.hy32)


cdef object _b_keys_s(Bound b, count_t[:, :, ::1] N, slot_t[:, ::1] hy):
    return _decide_keys(b.Q, b.live, b.owned, b.greedy, b.eps, b.alt, b.forced, hy,
                        b.stable, b.td, N, b.visits, b.keepf, b.ceil, b.td_ref, b.emin,
                        b.espan, b.eps_max, b.visits_half, b.kdirty, b.kcols, b.dirty,
                        b.deg, b.cols, b.full)


cdef object _b_full(Bound b, count_t[:, :, ::1] N, const int32_t[:, ::1] spt,
                    const int64_t[::1] ds, const int64_t[::1] cs):
    if b.skind == 1:
        return _b_full_s(b, N, b.so16, b.hy16, spt, ds, cs)
    return _b_full_s(b, N, b.so32, b.hy32, spt, ds, cs)


cdef object _b_full_s(Bound b, count_t[:, :, ::1] N, const slot_t[:, ::1] so,
                      slot_t[:, ::1] hy, const int32_t[:, ::1] spt, const int64_t[::1] ds,
                      const int64_t[::1] cs):
    return _decide(b.Q, b.live, b.slots, so, spt, ds, b.greedy, b.eps, b.alt, b.forced, hy,
                   b.stable, b.td, N, b.visits, b.keepf, b.ceil, b.td_ref, b.emin, b.espan,
                   b.eps_max, b.visits_half, b.s_choice, b.s_hy, b.s_vx, b.s_pot, b.s_nhT,
                   b.deg, b.s_changed, cs)


# ==== topology: least-weight paths ==============================================================
# routerd.core.topology._to_targets_reference, compiled: one Dijkstra per target over reversed
# links, with the same pop order (a binary heap of (distance, node) pairs compared like
# Python's tuples; every pair pushed is distinct, since a node is pushed again only at a
# strictly smaller distance, so any correct heap pops the same sequence), the same
# relaxation order (each node's in-links in link order) and the same IEEE additions: the
# same distances and next hops to the bit (tests/test_topology.py).

cdef inline bint _hless(double da, int64_t va, double db, int64_t vb) noexcept nogil:
    return da < db or (da == db and va < vb)


cdef inline void _hput(double* hk, int64_t* hx, Py_ssize_t j, Py_ssize_t hn, double kd,
                       int64_t kv, bint up) noexcept nogil:
    """Place (kd, kv) in the binary heap (hk, hx) of hn entries from hole j: up toward the
    root (a push) or down toward the leaves (the last entry refilling the root, a pop)."""
    cdef Py_ssize_t c
    while True:
        if up:
            if j == 0:
                break
            c = (j - 1) // 2
            if not _hless(kd, kv, hk[c], hx[c]):
                break
        else:
            c = 2 * j + 1
            if c >= hn:
                break
            if c + 1 < hn and _hless(hk[c + 1], hx[c + 1], hk[c], hx[c]):
                c += 1
            if not _hless(hk[c], hx[c], kd, kv):
                break
        hk[j] = hk[c]
        hx[j] = hx[c]
        j = c
    hk[j] = kd
    hx[j] = kv


def to_targets(const int64_t[::1] ptr, const int64_t[::1] frm, const double[::1] wt,
               const int64_t[::1] targets, double[:, ::1] D, int32_t[:, ::1] NH):
    """Columns ``D[:, k]``, ``NH[:, k]`` for each target ``targets[k]``: least weight to it
    and the next hop on such a path (-1: the target itself, or unreachable).  The reversed
    links in CSR form: node b's in-links are ``frm[ptr[b]:ptr[b + 1]]`` (their tails, in
    link order) with weights ``wt`` (only finite ones are given).  D and NH come filled
    with inf and -1."""
    cdef Py_ssize_t n = ptr.shape[0] - 1, nt = targets.shape[0], m = frm.shape[0]
    cdef Py_ssize_t k, i, hn, cap = m + 2
    cdef int64_t t, u, v
    cdef double du, nd
    cdef double* dist = <double*> malloc(n * sizeof(double))
    cdef int64_t* via = <int64_t*> malloc(n * sizeof(int64_t))
    cdef double* hk = <double*> malloc(cap * sizeof(double))
    cdef int64_t* hx = <int64_t*> malloc(cap * sizeof(int64_t))
    if not (dist and via and hk and hx):
        free(dist); free(via); free(hk); free(hx)
        raise MemoryError()
    with nogil:
        for k in range(nt):
            t = targets[k]
            for i in range(n):
                dist[i] = INFINITY
                via[i] = -1
            dist[t] = 0.0
            hk[0] = 0.0
            hx[0] = t
            hn = 1
            while hn > 0:
                du = hk[0]
                u = hx[0]
                hn -= 1                      # pop: the last entry refills the root
                if hn > 0:
                    _hput(hk, hx, 0, hn, hk[hn], hx[hn], False)
                if du > dist[u]:
                    continue
                for i in range(ptr[u], ptr[u + 1]):
                    v = frm[i]
                    nd = du + wt[i]
                    if nd < dist[v]:
                        dist[v] = nd
                        via[v] = u
                        _hput(hk, hx, hn, hn + 1, nd, v, True)    # push
                        hn += 1
            for i in range(n):
                D[i, k] = dist[i]
                NH[i, k] = <int32_t> via[i]
    free(dist); free(via); free(hk); free(hx)



def split_observe_prep(const int64_t[::1] xs, const int64_t[::1] vs, const int64_t[::1] ds,
                       const slot_t[:, ::1] slot_of, double[::1] lk_t, double[::1] key_t,
                       double now, double window, int64_t[:, ::1] cell, int64_t[:, ::1] fi,
                       double[::1] arg):
    """:meth:`routerd.core.splitting.SplitState.observe`'s first half on the compiled path.
    Per row its link cell ``x K + slot`` and key cell ``x n + d`` (``cell[0]``, ``cell[1]``);
    for a cell named for the first time in the batch whose time is not ``now``, the index in
    ``arg`` of its decay exponent ``-(now - t0) / window`` (the reference's operations), else
    -1 (``fi[0]``, ``fi[1]``); the cell's time is then stamped ``now``.  Cells of one old time
    share one exponent: returns how many distinct exponents ``arg`` holds (the batches come at
    a few distinct times, so a few dozen exps instead of two per row).  The caller takes
    numpy's exp of them (the reference's own exp: C's may differ in the last bit) for
    :func:`split_observe_apply`.  Rows are accepted ones (indices in range, link present)."""
    cdef Py_ssize_t m = xs.shape[0], i, h, lane
    cdef Py_ssize_t n = slot_of.shape[0]
    cdef Py_ssize_t K = lk_t.shape[0] // n
    cdef int64_t x, c, nu = 0
    cdef double t0
    cdef double* tt
    cdef Py_ssize_t hs = 64
    while hs < 4 * m:
        hs *= 2
    # open addressing on the old time's bits: slot -> index in arg (-1 empty)
    cdef int64_t* tab = <int64_t*>malloc(hs * sizeof(int64_t))
    cdef double* keyv = <double*>malloc(hs * sizeof(double))
    cdef uint64_t bits
    cdef double last_t0[2]
    cdef int64_t last_i[2]
    last_t0[0] = last_t0[1] = now      # never looked up: a time equal to now decays nothing
    last_i[0] = last_i[1] = -1
    if not tab or not keyv:
        free(tab); free(keyv)
        raise MemoryError("split_observe_prep: scratch")
    with nogil:
        for h in range(hs):
            tab[h] = -1
        for i in range(m):
            x = xs[i]
            cell[0, i] = x * K + <int64_t>slot_of[x, vs[i]]
            cell[1, i] = x * n + ds[i]
            for lane in range(2):
                c = cell[lane, i]
                tt = &lk_t[0] if lane == 0 else &key_t[0]
                t0 = tt[c]
                if t0 == now:
                    fi[lane, i] = -1
                    continue
                if t0 == last_t0[lane]:     # most rows: the same old time as the last
                    fi[lane, i] = last_i[lane]
                    tt[c] = now
                    continue
                memcpy(&bits, &t0, sizeof(double))
                h = <Py_ssize_t>(((bits ^ (bits >> 29)) * <uint64_t>0x9E3779B97F4A7C15ULL) >> 40) & (hs - 1)
                while tab[h] >= 0 and keyv[h] != t0:
                    h = (h + 1) & (hs - 1)
                if tab[h] < 0:
                    tab[h] = nu
                    keyv[h] = t0
                    arg[nu] = -(now - t0) / window
                    nu += 1
                fi[lane, i] = tab[h]
                last_t0[lane] = t0
                last_i[lane] = tab[h]
                tt[c] = now
    free(tab)
    free(keyv)
    return nu


def split_observe_apply(double[::1] lk_cnt, double[::1] lk_sum, double[::1] key_cnt,
                        const int64_t[:, ::1] cell, const int64_t[:, ::1] fi,
                        const double[::1] lat, const double[::1] f):
    """:meth:`routerd.core.splitting.SplitState.observe`'s second half, row by row: a cell's
    first row decays it by its factor (``f[fi]``, from its time before the batch; none when
    ``fi`` is -1), then every row adds 1 to both counts and its latency to the link's sum.
    The reference decays each cell named once (all read before any write), then adds the
    rows in order (``np.add.at``): the same multiplications and additions in the same order
    for each cell."""
    cdef Py_ssize_t m = cell.shape[1], i
    cdef int64_t l, k, a
    with nogil:
        for i in range(m):
            l = cell[0, i]
            a = fi[0, i]
            if a >= 0:
                lk_cnt[l] = lk_cnt[l] * f[a]
                lk_sum[l] = lk_sum[l] * f[a]
            lk_sum[l] = lk_sum[l] + lat[i]
            lk_cnt[l] = lk_cnt[l] + 1.0
            k = cell[1, i]
            a = fi[1, i]
            if a >= 0:
                key_cnt[k] = key_cnt[k] * f[a]
            key_cnt[k] = key_cnt[k] + 1.0
