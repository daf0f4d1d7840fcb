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
* ``routes_many``: the published tables as the same Python objects and floats.

Pure like the engine: imports numpy and the compiled module only; never the engine at
import time (the engine imports this module).
"""
from __future__ import annotations

from typing import Any

import numpy as np

MODES = ("auto", "compiled", "reference")
# destinations per block of the compiled decide (its scratch: about 32 * n * B bytes)
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


def observe(eng: Any, batch: Any, result_cls: Any, reasons: tuple[str, ...],
            scalar_batch: int) -> Any:
    """:meth:`Engine.observe` on the compiled path (plain rule).  None when the batch's
    columns are not of the kinds the kernel takes (the reference path then runs)."""
    cols = (batch.src, batch.via, batch.dst)
    if not all(c.dtype.kind in "iu" for c in cols):
        return None
    m = len(batch)
    xs, ys, ds = (np.ascontiguousarray(c, dtype=np.int64) for c in cols)
    lat = np.ascontiguousarray(batch.latency, dtype=np.float64)
    est = np.ascontiguousarray(batch.estimate, dtype=np.float64)
    code = np.empty(m, dtype=np.int64)
    tde = np.empty(m, dtype=np.float64)
    eng._steps()                # builds the table (eng._alphas) when needed
    s = eng.settings
    acc = _compiled.observe(eng.Q, eng.N, eng.td, _u8(eng.live), eng._slot_of_i64,
                            eng._alphas, eng._alpha_clamped, eng._step_beyond,
                            s.ceiling_s, s.td_smoothing,
                            xs, ys, ds, lat, est, code, tde,
                            _u8(eng._kdirty), _u8(eng._kcols))
    rejected: tuple[tuple[int, str], ...] = ()
    if acc < m:
        bad = np.flatnonzero(code >= 0)
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
            eng._account(acc, float(a_.sum()) / acc, float(a_.max()))
    return result_cls(acc, rejected, tde)


# ---- decide ----------------------------------------------------------------------------

def decide_ok(eng: Any) -> bool:
    """Whether the full pass can take the compiled path (the values it compares are a
    C-ordered float64 array, as Q always is)."""
    q = eng._qdec
    return bool(q.dtype == np.float64 and q.flags.c_contiguous)


def decide_full(eng: Any, ds: np.ndarray) -> tuple[frozenset[int], int, int]:
    """:meth:`Engine._decide_full` on the compiled path: same tables, same counters."""
    s = eng.settings
    n = eng.n
    m = ds.size
    ds = np.ascontiguousarray(ds, dtype=np.int64)
    spt = eng._spt_live()
    if spt.dtype != np.int64 or not spt.flags.c_contiguous:
        spt = np.ascontiguousarray(spt, dtype=np.int64)
    changed = np.zeros(n, dtype=np.uint8)
    # scratch for a block of destinations, small enough to stay in cache (see _kernels)
    b = max(1, min(m, DECIDE_BLOCK))
    choice = np.empty((n, b), dtype=np.int64)
    hyst = np.empty((n, b), dtype=np.int64)
    vx = np.empty((n, b), dtype=np.float64)
    pot = np.empty((n + 1, b), dtype=np.int64)
    nhT, prevT, potT = (np.empty((b, n), dtype=np.int64) for _ in range(3))
    visits = s.explore_basis != "td"
    changes, prevented = _compiled.decide(
        eng._qdec, _u8(eng.live), eng._slots, eng._slot_of_i64, spt, ds,
        eng.greedy, eng.eps, _u8(eng.alt), _u8(eng._forced), eng._hyst, _u8(eng._stable),
        eng.td, eng.N, bool(visits),
        1.0 - s.margin, s.ceiling_s, s.td_ref, s.explore_min, s.explore_max - s.explore_min,
        s.eps_max, s.visits_half,
        choice, hyst, vx, pot, nhT, prevT, potT, eng._slot_deg, changed)
    if prevented < 0:  # unreachable: the live shortest-path tree has no loop
        raise AssertionError("loop fallback did not converge")
    return frozenset(np.flatnonzero(changed).tolist()), int(changes), int(prevented)


# ---- tables ------------------------------------------------------------------------------

def routes(eng: Any, rows: np.ndarray) -> list[dict[int, list[tuple[int, float]]]]:
    """:meth:`Engine.routes_many` on the compiled path: the same dicts, the same floats."""
    out: list[dict[int, list[tuple[int, float]]]] = []
    # numpy's indexing rules for the node list (negative from the end, IndexError beyond)
    r = np.ascontiguousarray(np.arange(eng.n, dtype=np.int64)[rows])
    _compiled.routes(r, eng.greedy, eng._slots, _u8(eng.alt), eng.eps, out)
    return out
