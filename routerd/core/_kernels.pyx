# cython: language_level=3, boundscheck=False, wraparound=False, cdivision=True, initializedcheck=False
"""Compiled hot paths of routerd.core.engine (Cython).  Use them through routerd.core.kernels.

Each function is a transcription of the numpy reference in routerd/core/engine.py, operation
for operation, so the results are the same to the bit (the build passes
-ffp-contract=off: no fused multiply-add).  Typed memoryviews only: no numpy C API, so
numpy is not a build dependency.  Pure: no I/O, no global state.
"""
from libc.math cimport INFINITY, fabs, isfinite
from libc.stdint cimport int64_t, uint8_t, INT64_MAX
from libc.stdlib cimport malloc, free

cdef extern from *:
    """
    #if defined(__GNUC__) || defined(__clang__)
    #define RD_PREFETCH(p) __builtin_prefetch((const void *)(p), 1, 3)
    #else
    #define RD_PREFETCH(p) ((void)0)
    #endif
    """
    void RD_PREFETCH(const void* p) noexcept nogil

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


def observe(double[:, :, ::1] Q, int64_t[:, :, ::1] N, double[:, ::1] td,
            const uint8_t[:, ::1] live, const int64_t[:, ::1] slot_of,
            const double[::1] steps, bint clamped, object beyond, double ceil, double sm,
            const int64_t[::1] xs, const int64_t[::1] ys, const int64_t[::1] ds,
            const double[::1] lats, const double[::1] ests,
            int64_t[::1] code, double[::1] tde,
            uint8_t[::1] kdirty, uint8_t[::1] kcols):
    """Check and apply hop rows one by one, in order (Engine._observe_rows' rules).

    code[i]: -1 accepted, else the reason index; tde[:accepted]: the accepted rows' TD
    errors in order.  Returns the number accepted.  Past the step table: its last entry
    when ``clamped`` (Engine._step_beyond's rule), else ``beyond(nn)``, the engine's own
    code (counts past STEP_TABLE_MAX with a far or zero floor: rare, exact by construction).
    """
    cdef Py_ssize_t n = Q.shape[0], K = Q.shape[2], m = xs.shape[0], lim = steps.shape[0]
    cdef Py_ssize_t i, c, acc = 0
    cdef int64_t x, y, d, j, nn, px, py, pd
    cdef double lat, e, tail, v, target, old, delta, a, new, keep = 1.0 - sm
    for i in range(min(m, AHEAD)):
        px = xs[i]; py = ys[i]
        if 0 <= px < n and 0 <= py < n:
            RD_PREFETCH(&slot_of[px, py])
    for i in range(m):
        if i + AHEAD < m:
            px = xs[i + AHEAD]; py = ys[i + AHEAD]; pd = ds[i + AHEAD]
            if 0 <= px < n and 0 <= py < n and 0 <= pd < n:
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
        else:
            code[i] = -1
            if y == d:
                tail = 0.0
            elif e == e:        # not NaN: the neighbour's own estimate
                tail = e
            else:               # absent slots hold inf, dead ones exactly the ceiling
                tail = Q[y, d, 0]
                for c in range(1, K):
                    v = Q[y, d, c]
                    if v < tail:
                        tail = v
            target = lat + tail
            old = Q[x, d, j]
            nn = N[x, d, j] + 1
            N[x, d, j] = nn
            delta = target - old
            if nn < lim:
                a = steps[nn]
            elif clamped:       # every count past the table has the last step (the floor)
                a = steps[lim - 1]
            else:
                a = beyond(nn)
            new = old + a * delta
            Q[x, d, j] = ceil if new > ceil else (0.0 if new < 0.0 else new)
            td[x, d] = keep * td[x, d] + sm * fabs(delta)
            kdirty[x * n + d] = 1
            kcols[d] = 1
            tde[acc] = delta
            acc += 1
    return acc


cdef int _cycles(const int64_t* nh, uint8_t* cyc, uint8_t* col, int64_t* path,
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


cdef void _depths(const int64_t* nh, int64_t d, int64_t* dep, int64_t* path,
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


def decide(const double[:, :, ::1] q, const uint8_t[:, ::1] live, const int64_t[:, ::1] slots,
           const int64_t[:, ::1] slot_of, const int64_t[:, ::1] spt, const int64_t[::1] ds,
           int64_t[:, ::1] greedy, double[:, ::1] eps, uint8_t[:, :, ::1] alt,
           uint8_t[:, ::1] forced, int64_t[:, ::1] hyst_st, uint8_t[::1] stable,
           const double[:, ::1] td, const int64_t[:, :, ::1] N, bint visits,
           double keepf, double ceil, double td_ref, double emin, double espan,
           double eps_max, double visits_half,
           int64_t[:, ::1] choice, int64_t[:, ::1] hy, double[:, ::1] vx,
           int64_t[:, ::1] pot, int64_t[:, ::1] nhT, int64_t[:, ::1] prevT,
           int64_t[:, ::1] potT, const int64_t[::1] deg, uint8_t[::1] changed):
    """Engine._decide_full for destinations ds.  Returns (route changes, loops newly
    prevented); prevented is -1 if the fallback ladder failed to converge (a bug).

    Destinations go in blocks of B (the scratch arrays' width, choice: (n, B)): per block
    the three phases below run on scratch that stays in cache, so the state arrays are
    each read and written once, in order, and only Q is a large read (as in values()).
    Phase 2 works on per-destination rows (nhT, prevT, potT: (B, n)), written and read
    back node-major by phases 1 and 3.  deg[x] is x's number of present slots: they are a
    prefix of its slot row (topology.slots), and absent slots are never live, never
    chosen and never candidates, so the slot loops stop there.
    """
    cdef Py_ssize_t n = q.shape[0], K = q.shape[2], m = ds.shape[0], B = choice.shape[1]
    cdef Py_ssize_t x, ii, i0, nb, c, it
    cdef int64_t d, best, inc, ch, h, pv, bound, p, tot
    cdef double bv, v, incv, vv, fr, e, r
    cdef const double* qr
    cdef bint keep, anyalt, cg, cw, fnew, unstable, failed = False
    cdef int64_t changes = 0, prevented = 0
    cdef int64_t big = (n + 1) * n
    cdef int64_t* nh
    cdef int64_t* prev
    cdef int64_t* pt
    cdef int64_t kx
    cdef uint8_t au, cwu, anyu
    cdef int64_t* path = <int64_t*> malloc((n + 2) * sizeof(int64_t))
    cdef int64_t* dep = <int64_t*> malloc(n * sizeof(int64_t))
    cdef uint8_t* level = <uint8_t*> malloc(n)
    cdef uint8_t* cyc = <uint8_t*> malloc(n)
    cdef uint8_t* c1 = <uint8_t*> malloc(n)
    cdef uint8_t* col = <uint8_t*> malloc(n)
    if not (path and dep and level and cyc and c1 and col):
        free(path); free(dep); free(level); free(cyc); free(c1); free(col)
        raise MemoryError()
    try:
        for i0 in range(0, m, B):
            nb = min(B, m - i0)
            # phase 1, node-major: greedy with hysteresis, and the chosen value
            for x in range(n):
                kx = deg[x]
                for ii in range(nb):
                    d = ds[i0 + ii]
                    qr = &q[x, d, 0]
                    best = 0
                    bv = qr[0] if live[x, 0] else INFINITY
                    for c in range(1, kx):
                        v = qr[c] if live[x, c] else INFINITY
                        if v < bv:
                            best = c
                            bv = v
                    inc = greedy[x, d]
                    incv = qr[inc] if (inc >= 0 and live[x, inc]) else INFINITY
                    keep = isfinite(incv) and not (bv < incv * keepf)
                    ch = inc if keep else best
                    if not isfinite(bv) or x == d:
                        ch = -1
                    hy[x, ii] = ch
                    choice[x, ii] = ch
                    vx[x, ii] = qr[ch] if (ch >= 0 and live[x, ch]) else INFINITY
                    nhT[ii, x] = slots[x, ch] if ch >= 0 else -1
                    prevT[ii, x] = slots[x, inc] if inc >= 0 else -1
            # phase 2, per destination: the loop fallback ladder, depths, potentials
            for ii in range(nb):
                d = ds[i0 + ii]
                nh = &nhT[ii, 0]
                prev = &prevT[ii, 0]
                for x in range(n):
                    level[x] = 0
                    c1[x] = 0
                for it in range(2 * n + 3):
                    if not _cycles(nh, cyc, col, path, n):
                        break
                    if it == 0:
                        for x in range(n):
                            c1[x] = cyc[x]
                    for x in range(n):
                        if not cyc[x]:
                            continue
                        if level[x] == 0:
                            pv = prev[x]
                            if pv >= 0 and live[x, slot_of[x, pv]]:
                                nh[x] = pv
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
                _depths(nh, d, dep, path, n)
                unstable = False
                pt = &potT[ii, 0]
                for x in range(n):
                    if level[x]:        # moved by the ladder: its slot (unmoved: as chosen)
                        choice[x, ii] = slot_of[x, nh[x]] if nh[x] >= 0 else -1
                        if choice[x, ii] != hy[x, ii] and not c1[x]:
                            unstable = True
                    pt[x] = dep[x] * n + x
                stable[d] = not unstable
            if failed:
                break
            for x in range(n):          # potentials back to node-major for phase 3
                for ii in range(nb):
                    pot[x, ii] = potT[ii, x]
            for ii in range(nb):
                pot[n, ii] = INT64_MAX
            # phase 3, node-major: candidates, shares, what changed, the writes
            for x in range(n):
                kx = deg[x]
                for ii in range(nb):
                    d = ds[i0 + ii]
                    ch = choice[x, ii]
                    h = hy[x, ii]
                    if ch >= 0:
                        p = pot[x, ii]
                        bound = p if p < big else big
                    else:
                        bound = -1
                    anyu = 0
                    cwu = 0
                    for c in range(kx):         # branch-free: the outcomes are data
                        au = live[x, c] & (ch != c) & (pot[slots[x, c], ii] < bound)
                        anyu |= au
                        if alt[x, d, c] != au:  # written only when it changes: no
                            cwu = 1             # write-back of untouched lines
                            alt[x, d, c] = au
                    anyalt = anyu
                    cw = cwu
                    if ch == h:
                        v = vx[x, ii]
                    else:
                        v = q[x, d, ch] if (ch >= 0 and live[x, ch]) else INFINITY
                    if not visits:
                        vv = v if isfinite(v) else ceil
                        if not (vv >= 1e-12):
                            vv = 1e-12
                        r = td[x, d] / vv / td_ref
                        fr = r if r < 1.0 else 1.0
                    else:
                        tot = N[x, d, 0]
                        for c in range(1, K):
                            tot += N[x, d, c]
                        fr = visits_half / (visits_half + <double> tot)
                    e = emin + espan * fr
                    if not (e < eps_max):
                        e = eps_max
                    if not anyalt:
                        e = 0.0
                    cg = greedy[x, d] != ch
                    if cg or fabs(eps[x, d] - e) > 1e-9:
                        cw = True
                    fnew = ch != h
                    if fnew and not (forced[x, d] and not cg):
                        prevented += 1
                    if cg:
                        changes += 1
                    if cg:
                        greedy[x, d] = ch
                    if eps[x, d] != e:
                        eps[x, d] = e
                    if forced[x, d] != fnew:
                        forced[x, d] = fnew
                    if hyst_st[x, d] != h:
                        hyst_st[x, d] = h
                    if cw:
                        changed[x] = 1
    finally:
        free(path); free(dep); free(level); free(cyc); free(c1); free(col)
    if failed:
        return changes, -1
    return changes, prevented


def routes(const int64_t[::1] rows, const int64_t[:, ::1] greedy, const int64_t[:, ::1] slots,
           const uint8_t[:, :, ::1] alt, const double[:, ::1] eps, list out):
    """Engine.routes_many for nodes ``rows``: appends to ``out`` one dict per node,
    destination -> [(next_hop, weight), ...], greedy first, then alternates in slot order;
    weights 1 - eps and eps / count (the reference's operations), 1.0 without alternates."""
    cdef Py_ssize_t n = greedy.shape[1], K = slots.shape[1], r, c, d, cnt
    cdef int64_t x, g
    cdef double e, share
    cdef dict table
    cdef list ws
    for r in range(rows.shape[0]):
        x = rows[r]
        table = {}
        for d in range(n):
            g = greedy[x, d]
            if g < 0 or d == x:
                continue
            cnt = 0
            for c in range(K):
                cnt += alt[x, d, c]
            if cnt:
                e = eps[x, d]
                share = e / <double> cnt
                ws = [(slots[x, g], 1.0 - e)]
                for c in range(K):
                    if alt[x, d, c]:
                        ws.append((slots[x, c], share))
            else:
                ws = [(slots[x, g], 1.0)]
            table[d] = ws
        out.append(table)
