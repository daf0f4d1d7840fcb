"""Which implementation runs the engine's hot paths: the compiled kernels or the numpy reference.

Owns the choice (``engine.kernels``: ``auto`` | ``compiled`` | ``reference``), the one-line
account of it (:func:`status`, shown in the service banner and ``health``), and the glue
that hands an :class:`routerd.core.engine.Engine`'s arrays to :mod:`routerd.core._kernels` (Cython,
built by the package's own build when a C compiler is there; see ``setup.py``).

Both paths give bit-for-bit the same state, tables and counters (tests:
``tests/test_kernels.py``, and the engine's property tests run on both):

* ``observe``: the compiled loop checks and applies the rows one by one, in order, with
  the same IEEE operations as the per-row reference path (``old + alpha * delta``, the
  clip, ``(1 - s) * td + s * |delta|``), the same step-size table (and, past its end,
  :meth:`Engine._step_beyond`, the reference's own code), and the extension is compiled
  with ``-ffp-contract=off`` so no multiply-add is fused.  Exact in-order semantics are
  then free: no rounds are needed.
* ``decide``'s full pass per destination: greedy with hysteresis, the loop fallback
  ladder, depths, candidates and shares, in the reference's order of operations.
* ``decide``'s key lane (``decide_keys``, :meth:`Engine._decide_keys`): per written or
  held key, whether its hysteresis choice moved (the destination then goes to the full
  pass), else the written keys' shares; a small network's decide was mostly this lane's
  numpy calls.
* ``routes_many``: the published tables as the same Python objects and floats.
* split mode's decision (``split_decide``, called from :mod:`routerd.core.splitting`):
  destination by destination in O(n K) each, against the reference's whole-array passes
  (whose loop checks and marginal sums iterate up to the longest path); sums over slots
  are added in slot order on both paths (``splitting.ksum``).
* split mode's link and key rates (``split_observe_prep`` / ``split_observe_apply``,
  called from :meth:`routerd.core.splitting.SplitState.observe_compiled`): the rows'
  cells and decays in one pass each; the decay factors are numpy's exp (the reference's
  own, since C's may differ in the last bit), one per distinct old time.

Pure like the engine: imports numpy and the compiled module only; never the engine at
import time (the engine imports this module).
"""
from __future__ import annotations

from typing import Any

import numpy as np

MODES = ("auto", "compiled", "reference")
# destinations per block of the compiled decide (its scratch: about 28 * n * B bytes)
DECIDE_BLOCK = 32

try:  # the extension is optional: an install without a C compiler has only the reference
    from routerd.core import _kernels as _compiled  # type: ignore[attr-defined]  # built by setup.py
    _WHY = "routerd.core._kernels is built"
except ImportError as e:  # pragma: no cover - depends on the install
    _compiled = None
    _WHY = (f"routerd.core._kernels could not be imported ({e}); the package was installed "
            "without a working C compiler (reinstall with one for the compiled path)")


def available() -> bool:
    """Whether the compiled kernels can be used in this install."""
    return _compiled is not None


def select(mode: str) -> Any:
    """The compiled module for ``mode``, or None for the numpy reference.

    ``compiled`` insists: without the extension it raises ``RuntimeError`` saying why.
    """
    if mode not in MODES:
        raise ValueError(f"engine.kernels: {mode!r} is not one of {', '.join(MODES)}")
    if mode == "reference":
        return None
    if _compiled is None and mode == "compiled":
        raise RuntimeError(f"engine.kernels is compiled, but {_WHY}")
    return _compiled


def status(mode: str = "auto") -> dict[str, str]:
    """Which path ``mode`` runs on in this install, and why: ``{"path", "mode", "reason"}``."""
    return status_of(mode, _compiled is not None, _WHY)


def status_of(mode: str, built: bool, why: str) -> dict[str, str]:
    """The ``engine.kernels`` rule for any compiled module (the engine's, the simulator's
    loop): ``reference`` runs the reference; ``auto`` the compiled module when ``built``;
    ``compiled`` without it is ``unavailable`` (its user raises, saying ``why``)."""
    if mode not in MODES:
        raise ValueError(f"engine.kernels: {mode!r} is not one of {', '.join(MODES)}")
    if mode == "reference":
        return {"path": "reference", "mode": mode, "reason": "engine.kernels is reference"}
    if not built:
        return {"path": "reference" if mode == "auto" else "unavailable", "mode": mode,
                "reason": why}
    return {"path": "compiled", "mode": mode, "reason": why}


def describe(mode: str = "auto") -> str:
    """:func:`status` as one log line."""
    st = status(mode)
    return f"engine kernels: {st['path']} (engine.kernels = {mode}; {st['reason']})"


# ---- observe -----------------------------------------------------------------------------

def _u8(a: np.ndarray) -> np.ndarray:
    return a.view(np.uint8)


# the kernels' fused types (routerd/core/_kernels.pyx: count_t, slot_t)
_COUNTS = frozenset(np.dtype(t) for t in (np.uint8, np.uint16, np.uint32))
_SLOTS = frozenset(np.dtype(t) for t in (np.int16, np.int32))


_ADD = np.add.reduce
_MAX = np.maximum.reduce


def _kinds_ok(eng: Any) -> bool:
    """Whether the engine's counts and slot map are of the kinds the kernels take (the
    engine's own always are; anything else runs on the reference path)."""
    return (eng.N.dtype in _COUNTS and eng._slot_of.dtype in _SLOTS
            and eng._hyst.dtype == eng._slot_of.dtype)


def _slots_of(eng: Any) -> np.ndarray:
    """The topology's slot_of (int16, or int32 for huge degrees), C-ordered: no wide copy."""
    return np.ascontiguousarray(eng._slot_of)


def bound(eng: Any) -> Any:
    """The engine's :class:`routerd.core._kernels.Bound` (its arrays as typed views,
    acquired once), bound afresh when the engine has replaced an array, its settings or
    its step table; None when its arrays are not of the kinds the kernels take (the
    unbound glue then applies its own rules)."""
    b = eng._bound
    if b is not None and b.fresh(eng):
        return b
    eng._bound = None
    if not _kinds_ok(eng) or not (eng.Q.dtype == np.float64 and eng.Q.flags.c_contiguous):
        return None
    try:
        b = _compiled.Bound(eng, _slots_of(eng), np.empty, max(1, min(eng.nd, DECIDE_BLOCK)))
    except (ValueError, TypeError, BufferError):  # an array of a kind the kernels do not take
        return None
    eng._bound = b
    return b


def observe(eng: Any, batch: Any, result_cls: Any, reasons: tuple[str, ...],
            scalar_batch: int) -> Any:
    """:meth:`Engine.observe` on the compiled path (plain rule).  None when the batch's
    columns are not of the kinds the kernel takes (the reference path then runs).

    The engine's bound arrays (:func:`bound`) take the batch's columns as they are when
    they are C-ordered int64 and float64 (the service's and the simulator's are); other
    kinds are converted first, as the unbound call does."""
    m = len(batch)
    b = eng._bound
    out = None
    if b is not None:   # None: stale (bound afresh below); False: columns to convert
        out = b.observe(eng, batch.src, batch.via, batch.dst, batch.latency, batch.estimate)
    if not out:
        cols = (batch.src, batch.via, batch.dst)
        if not all(c.dtype.kind in "iu" for c in cols):
            return None
        b = bound(eng)
        if b is None:
            return _observe_unbound(eng, batch, result_cls, reasons, scalar_batch)
        xs, ys, ds = (np.ascontiguousarray(c, dtype=np.int64) for c in cols)
        lat = np.ascontiguousarray(batch.latency, dtype=np.float64)
        est = np.ascontiguousarray(batch.estimate, dtype=np.float64)
        out = b.observe(eng, xs, ys, ds, lat, est)
        if not out:
            raise ValueError(f"hop batch columns differ in length: src {len(xs)}, via "
                             f"{len(ys)}, dst {len(ds)}, latency {len(lat)}, estimate {len(est)}")
    acc, tde = out
    return _observed(eng, m, acc, b.codes(), tde, result_cls, reasons, scalar_batch)


def _observe_unbound(eng: Any, batch: Any, result_cls: Any, reasons: tuple[str, ...],
                     scalar_batch: int) -> Any:
    """:func:`observe` with every array passed (an engine :func:`bound` does not take)."""
    cols = (batch.src, batch.via, batch.dst)
    if not all(c.dtype.kind in "iu" for c in cols) or not _kinds_ok(eng):
        return None
    m = len(batch)
    xs, ys, ds = (np.ascontiguousarray(c, dtype=np.int64) for c in cols)
    lat = np.ascontiguousarray(batch.latency, dtype=np.float64)
    est = np.ascontiguousarray(batch.estimate, dtype=np.float64)
    code = np.empty(m, dtype=np.int64)
    tde = np.empty(m, dtype=np.float64)
    eng._steps()                # builds the table (eng._alphas) when needed
    s = eng.settings
    acc = _compiled.observe(eng.Q, eng.N, eng._count_cap, eng.td, _u8(eng.live), _slots_of(eng),
                            eng._alphas, eng._alpha_clamped, eng._step_beyond,
                            s.ceiling_s, s.td_smoothing,
                            xs, ys, ds, lat, est, code, tde,
                            _u8(eng._kdirty), _u8(eng._kcols), eng._col)
    return _observed(eng, m, acc, code, tde, result_cls, reasons, scalar_batch)


def _observed(eng: Any, m: int, acc: int, code: np.ndarray, tde: np.ndarray, result_cls: Any,
              reasons: tuple[str, ...], scalar_batch: int) -> Any:
    """The rejections counted and the statistics accounted after the compiled loop
    (``code``: at least ``m`` entries, the first ``m`` this batch's)."""
    rejected: tuple[tuple[int, str], ...] = ()
    if acc < m:
        bad = np.flatnonzero(code[:m] >= 0)
        rejected = tuple((i, reasons[c]) for i, c in zip(bad.tolist(), code[bad].tolist()))
        for _, r in rejected:
            eng._rejected[r] += 1
    tde = tde[:acc]
    if acc:
        # the reference's own arithmetic for the statistics: Python's sum below the
        # per-row threshold, numpy's (pairwise) above it
        if m < scalar_batch:
            a = [abs(t) for t in tde.tolist()]
            eng._account(acc, sum(a) / acc, max(a))
        else:
            a_ = np.abs(tde)
            # ndarray.sum / .max are these reductions behind two Python wrappers
            eng._account(acc, float(_ADD(a_)) / acc, float(_MAX(a_)))
    return result_cls(acc, rejected, tde)


# ---- decide ----------------------------------------------------------------------------

def decide_ok(eng: Any) -> bool:
    """Whether the full pass can take the compiled path (the values it compares are a
    C-ordered float64 array, as Q always is)."""
    q = eng._qdec
    return bool(q.dtype == np.float64 and q.flags.c_contiguous) and _kinds_ok(eng)


def decide_full(eng: Any, cs: np.ndarray) -> tuple[frozenset[int], int, int]:
    """:meth:`Engine._decide_full` on the compiled path (``cs``: destination columns):
    same tables, same counters."""
    b = eng._bound
    if b is None or not b.fresh(eng):
        b = bound(eng)
    if b is not None:
        out = b.decide_full(eng, cs, eng._spt_live())
        if out:
            nodes, changes, prevented = out
            if prevented < 0:  # unreachable: the live shortest-path tree has no loop
                raise AssertionError("loop fallback did not converge")
            return nodes, int(changes), int(prevented)
    s = eng.settings
    n = eng.n
    cs = np.ascontiguousarray(cs, dtype=np.int64)
    ds = eng.owned.take(cs)
    spt = np.ascontiguousarray(eng._spt_live(), dtype=np.int32)
    # scratch for a block of destinations, small enough to stay in cache (see _kernels),
    # kept by the engine (every entry the kernel reads it writes first; `changed` is
    # cleared here): a small network's decide does not pay for eight allocations a call.
    # Its width is the engine's, not this call's (the blocks are independent: a wider
    # block than destinations gives the same tables)
    b = max(1, min(eng.nd, DECIDE_BLOCK))
    scratch = eng._decide_scratch
    if scratch is None or scratch[0].shape != (n, b):
        scratch = eng._decide_scratch = (
            np.empty((n, b), dtype=np.int32), np.empty((n, b), dtype=np.int32),
            np.empty((n, b), dtype=np.float64), np.empty((n + 1, b), dtype=np.int64),
            np.empty((b, n), dtype=np.int32), np.zeros(n, dtype=np.uint8))
    choice, hyst, vx, pot, nhT, changed = scratch
    changed[:] = 0
    visits = s.explore_basis != "td"
    changes, prevented = _compiled.decide(
        eng._qdec, _u8(eng.live), eng._slots, _slots_of(eng), spt, ds,
        eng.greedy, eng.eps, _u8(eng.alt), _u8(eng._forced), eng._hyst, _u8(eng._stable),
        eng.td, eng.N, bool(visits),
        1.0 - s.margin, s.ceiling_s, s.td_ref, s.explore_min, s.explore_max - s.explore_min,
        s.eps_max, s.visits_half,
        choice, hyst, vx, pot, nhT, eng._slot_deg, changed, cs)
    if prevented < 0:  # unreachable: the live shortest-path tree has no loop
        raise AssertionError("loop fallback did not converge")
    return frozenset(np.flatnonzero(changed).tolist()), int(changes), int(prevented)


def decide_due(eng: Any) -> tuple[frozenset[int], int, int, int] | None:
    """:meth:`Engine.decide` without a limit, plain rule, on the engine's bound arrays
    (:func:`bound`): the key lane, then the full pass over every due destination, in one
    compiled call (``Bound.decide_due``).  ``(changed nodes, route changes, loops newly
    prevented, destinations taken)``; None, having done nothing, when the engine's arrays
    are not of the kinds the kernels take (the caller's step-by-step path then runs)."""
    b = eng._bound
    out = b.decide_due(eng) if b is not None else None
    if out is None:     # not bound yet, or stale: bound afresh
        b = bound(eng)
        if b is None:
            return None
        out = b.decide_due(eng)
    if out is not None and out[2] < 0:  # unreachable: the live shortest-path tree has no loop
        raise AssertionError("loop fallback did not converge")
    return out


def decide_keys(eng: Any) -> frozenset[int]:
    """:meth:`Engine._decide_keys` (the key lane of decide) on the compiled path: the same
    columns marked due, the same shares written, the same nodes returned.  The caller
    checks :func:`decide_ok` (the values compared are Q, float64 and C-ordered)."""
    b = eng._bound
    if b is not None:
        out = b.decide_keys(eng)
        if out is not None:
            return out
    b = bound(eng)
    if b is not None:
        return b.decide_keys(eng)
    s = eng.settings
    nd = eng.nd
    return _compiled.decide_keys(
        eng.Q, _u8(eng.live), eng.owned, eng.greedy, eng.eps, _u8(eng.alt),
        _u8(eng._forced), eng._hyst, _u8(eng._stable), eng.td, eng.N,
        s.explore_basis != "td", 1.0 - s.margin, s.ceiling_s, s.td_ref, s.explore_min,
        s.explore_max - s.explore_min, s.eps_max, s.visits_half,
        _u8(eng._kdirty), _u8(eng._kcols), _u8(eng._dirty), eng._slot_deg,
        np.empty(nd, dtype=np.int64), np.empty(nd, dtype=np.uint8))


# ---- tables ------------------------------------------------------------------------------

def table_arrays(eng: Any, rows: np.ndarray) -> Any:
    """:meth:`Engine.table_arrays_many` on the compiled path (the same arrays, the same
    floats), or None for an engine whose columns are not its nodes (owned destinations:
    the reference runs)."""
    if eng.nd != eng.n:
        return None
    # numpy's indexing rules for the node list (negative from the end, IndexError beyond)
    r = np.ascontiguousarray(np.arange(eng.n, dtype=np.int64)[rows])
    return _compiled.table_arrays(r, eng.greedy, eng._slots, _u8(eng.alt), eng.eps, np.empty)


def routes(eng: Any, rows: np.ndarray) -> list[dict[int, list[tuple[int, float]]]]:
    """:meth:`Engine.routes_many` on the compiled path: the same dicts, the same floats."""
    out: list[dict[int, list[tuple[int, float]]]] = []
    # numpy's indexing rules for the node list (negative from the end, IndexError beyond)
    r = np.ascontiguousarray(np.arange(eng.n, dtype=np.int64)[rows])
    _compiled.routes(r, eng.greedy, eng._slots, _u8(eng.alt), eng.eps, out, eng.owned)
    return out
