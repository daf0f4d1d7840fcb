"""Published refinements of Q-routing as engine options: the value rules of each variant.

Owns: the variant names (:data:`VARIANTS`), the checks of their settings, and the
per-row update and decision-value rules of ``full_echo``, ``predictive`` and
``confidence`` (``dual`` changes which rows exist, not how a row is applied).
Pure: numpy and the standard library only — no sockets, files, clocks, YAML or metrics;
time comes in through the engine's ``now``.  Must not import routerd.core.engine (the engine
imports this module and hands itself in; only its arrays and step-size table are used).

Decisions stay in :meth:`routerd.core.engine.Engine.decide`: greedy choice, hysteresis, loop
freedom and bounded exploration are the core's, for every variant.  A variant changes the
values (its own update of a hop row) and, for ``predictive``, the value decisions read.

Order.  A variant applies a batch's accepted rows strictly one after another, in batch
order, with the same Python code a one-row batch takes, so a batch gives exactly the
result of its rows applied one by one (``tests/test_variants.py`` checks it).  Rows are
checked and rejected by the core's own checks first, with the same reasons.

Notation: row ``(x, y, d, l, e)`` — x handed a packet for d to neighbour y (slot j) and
the hop took l seconds; e is y's remaining estimate (NaN: absent, then the engine's own
``min_z Q[y, d, z]``); ``target = l + (0 if y == d else e)``; alpha is the core's step
size (constant or decaying per entry).

plain — Q-routing (Boyan & Littman, NIPS 6, 1994): ``Q[x,d,j] += alpha (target - Q)``;
the core's own vectorised path.

full_echo — Boyan & Littman (1994), "full echo": on every hop x asks *all* its neighbours
z for their estimates, not just the one it used, and updates every live slot::

    Q[x,d,j] += alpha_j (target - Q[x,d,j])                         the hop taken, first
    Q[x,d,z] += damping * alpha_z (L[x,z] + V(z, d) - Q[x,d,z])     every other live z, slot order

with ``V(z, d) = 0`` if z == d else ``min_w Q[z, d, w]`` read at that moment, and
``L[x, z]`` the link's expected hop latency: a moving average (weight
``echo_smoothing``) of the hop latencies accepted on x → z, starting from its
propagation delay.  Full echo is known to oscillate at high load (Shilova et al., 2016):
every node moves all its estimates at once on the same stale signal.  ``damping`` in
(0, 1] scales the echo steps (1 = the published rule).  Rows needed: the ordinary hop row
of the hop taken; the service holds every node's estimates and every link's latency, so
it answers the echo itself (no extra wire rows).  Rows a reporter sends for every
neighbour are ordinary hop rows and are applied (and echoed) as such.

predictive — Predictive Q-routing (Choi & Yeung, NIPS 8, 1996).  Each entry also keeps a
best estimate B, a recovery rate R <= 0 and its last update time U.  On a row::

    dQ = target - Q;   Q += alpha dQ;   B = min(B, Q)
    if dQ < 0 and now > U:  R += beta * dQ / (now - U)      (the path is recovering)
    elif dQ > 0:            R *= gamma                       (congestion: forget the trend)
    U = now                 (R is kept <= 0)

Decisions read the prediction ``P = max(Q + (now - U) R, B)`` instead of Q, so a path
abandoned under congestion looks better as time passes without news and is tried again
when load falls.  Example: Q = 20, R = -0.5, now - U = 10, B = 12 predicts
max(15, 12) = 15.  beta = 0.7, gamma = 0.9 are the paper's values as remembered (from
memory).  Estimates a node reports are its Q, not P.  Every destination with a
recovering entry (R < 0) is recomputed at each decision (its prediction moves with time).

confidence — Confidence-based Q-routing (Kumar & Miikkulainen, 1998).  Each entry carries
a confidence C in [0, 1]; the destination's own estimate (y == d) has C = 1.  On a row::

    C_old = C[x,d,j] decayed to now;  C_new = confidence of y's estimate
    eta = max(C_new, 1 - C_old)                   (learning rate: sure news or unsure old value)
    Q[x,d,j] += eta (target - Q);  C[x,d,j] = C_old + eta (C_new - C_old);  U = now

``C_new`` is 1 when y == d, else the row's confidence when the shell gives one, else
the decayed confidence of the entry y publishes for d (its greedy slot from the last
decision; its lowest slot if it has none) — the service holds y's table.  An entry
not updated decays: after k decay intervals (``conf_interval_s``) its confidence is
``C_0 * lambda^k`` (k = (now - U) / interval, continuous), so a stale estimate is
overwritten quickly by the next news about it.  ``conf_min_step`` floors eta
(0 = the published rule).  Initial confidence ``conf_initial`` (the paper starts unsure).

dual — Dual reinforcement Q-routing (Kumar & Miikkulainen, 1997).  A packet from source s
carries its sender's estimate ``V(x, s)`` on each hop x → y; y then learns about x as a
way back to s: the backward row ``(y, x, s, l, V(x, s))`` with the forward hop's latency
l standing in for y → x (the paper's symmetric-link assumption).  The engine applies it
as any hop row (rule as plain); the shells make the rows: the simulator's qrouting
adapter emits one per hop, a reporter at y sends it as an ordinary hop row.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

VARIANTS = ("plain", "full_echo", "predictive", "dual", "confidence")

#: EngineSettings field → (config key, default); routerd.io.config and routerd.tools.replay use it
FIELDS: dict[str, tuple[str, Any]] = {
    "variant": ("engine.variant", "plain"),
    "echo_damping": ("engine.full_echo.damping", 0.5),
    "echo_smoothing": ("engine.full_echo.latency_smoothing", 0.2),
    "pred_beta": ("engine.predictive.beta", 0.7),
    "pred_gamma": ("engine.predictive.gamma", 0.9),
    "conf_decay": ("engine.confidence.decay", 0.9),
    "conf_interval_s": ("engine.confidence.decay_interval_s", 1.0),
    "conf_initial": ("engine.confidence.initial", 0.0),
    "conf_min_step": ("engine.confidence.min_step", 0.05),
}


def problems(s: Any) -> list[str]:
    """What is wrong with the variant fields of an EngineSettings (empty: fine)."""
    bad: list[str] = []
    if s.variant not in VARIANTS:
        bad.append(f"variant {s.variant!r} is not one of {', '.join(VARIANTS)}")
    if not 0 < s.echo_damping <= 1:
        bad.append(f"echo_damping {s.echo_damping} is not in (0, 1]")
    if not 0 < s.echo_smoothing <= 1:
        bad.append(f"echo_smoothing {s.echo_smoothing} is not in (0, 1]")
    if not 0 < s.pred_beta <= 1:
        bad.append(f"pred_beta {s.pred_beta} is not in (0, 1]")
    if not 0 <= s.pred_gamma <= 1:
        bad.append(f"pred_gamma {s.pred_gamma} is not in [0, 1]")
    if not 0 < s.conf_decay <= 1:
        bad.append(f"conf_decay {s.conf_decay} is not in (0, 1]")
    if not (s.conf_interval_s > 0 and math.isfinite(s.conf_interval_s)):
        bad.append(f"conf_interval_s {s.conf_interval_s} is not a positive finite number")
    if not 0 <= s.conf_initial <= 1:
        bad.append(f"conf_initial {s.conf_initial} is not in [0, 1]")
    if not 0 <= s.conf_min_step <= 1:
        bad.append(f"conf_min_step {s.conf_min_step} is not in [0, 1]")
    return bad


def from_config(cfg: Any) -> dict[str, Any]:
    """EngineSettings variant fields from a config (keys missing: defaults)."""
    get = getattr(cfg, "get", None)
    out: dict[str, Any] = {}
    for f, (key, default) in FIELDS.items():
        out[f] = get(key, default) if get is not None else cfg[key]
    return out


def predict(Q: np.ndarray, B: np.ndarray, R: np.ndarray, U: np.ndarray, now: float) -> np.ndarray:
    """Predictive Q-routing's decision value ``max(Q + (now - U) R, B)`` (Choi & Yeung 1996)."""
    with np.errstate(invalid="ignore"):   # B <= Q by the update; min() keeps it so after a clip
        p = np.maximum(Q + (now - U) * R, np.minimum(B, Q))
    return np.where(np.isfinite(Q), p, Q)   # absent slots stay inf


def decayed(C: np.ndarray | float, dt: np.ndarray | float, lam: float, interval_s: float) -> Any:
    """Confidence after dt seconds unused: ``C * lam^(dt / interval)`` (Kumar & Miikkulainen 1998)."""
    return C * np.power(lam, np.maximum(dt, 0.0) / interval_s)


def make(engine: Any, old: VariantState | None = None) -> VariantState | None:
    """The state of the engine's configured variant (None: plain and dual use the core path).

    ``old`` (a reload): kept when the variant is the same, so learned state survives.
    """
    name = engine.settings.variant
    if name in ("plain", "dual"):
        return None
    if old is not None and old.name == name:
        return old
    cls = {"full_echo": FullEcho, "predictive": Predictive, "confidence": Confidence}[name]
    return cls(engine)


@dataclass
class _Rows:
    xs: list[int]
    ys: list[int]
    ds: list[int]
    js: list[int]
    lats: list[float]
    ests: list[float]
    confs: list[float]


class VariantState:
    """Per-entry state of one variant and its row rule.  Subclasses set ``name``/``ARRAYS``."""

    name = "base"
    ARRAYS: tuple[str, ...] = ()
    #: whether decisions read :meth:`decision_values` instead of Q
    predicts = False

    def __init__(self, engine: Any) -> None:
        self.n, self.k = engine.n, engine.k

    # ---- the engine's hooks ---------------------------------------------------------
    def observe(self, engine: Any, batch: Any, confidence: np.ndarray | None, result_cls: Any,
                reasons: tuple[str, ...]) -> Any:
        """Check with the core's rules, then apply accepted rows one by one, in order."""
        code, slot = engine._check(batch)
        m = len(batch)
        ok = np.ones(m, dtype=bool) if code is None else code < 0
        rejected: list[tuple[int, str]] = []
        if code is not None:
            for i in np.flatnonzero(~ok).tolist():
                r = reasons[int(code[i])]
                rejected.append((i, r))
                engine._rejected[r] += 1
        keep = np.flatnonzero(ok)
        conf = (np.full(m, np.nan) if confidence is None
                else np.asarray(confidence, dtype=np.float64))
        if conf.shape != (m,):
            raise ValueError(f"confidence has shape {conf.shape}, expected ({m},)")
        rows = _Rows(batch.src[keep].tolist(), batch.via[keep].tolist(), batch.dst[keep].tolist(),
                     slot[keep].tolist(), batch.latency[keep].tolist(),
                     batch.estimate[keep].tolist(), conf[keep].tolist())
        tde = self.apply(engine, rows, float(engine.now))
        if tde:
            engine._dirty[batch.dst[keep]] = True
            a = [abs(t) for t in tde]
            engine._account(len(tde), sum(a) / len(a), max(a))
        return result_cls(len(tde), tuple(rejected), np.array(tde, dtype=np.float64))

    def apply(self, engine: Any, rows: _Rows, now: float) -> list[float]:
        raise NotImplementedError

    def decision_values(self, engine: Any) -> np.ndarray:
        """The values Engine.decide compares (marks destinations dirty when they move)."""
        return engine.Q  # type: ignore[no-any-return]

    def on_link(self, engine: Any, x: int, j: int, up: bool) -> None:
        """After the core marked link slot (x, j) up or down."""

    # ---- state ------------------------------------------------------------------------
    def export(self) -> dict[str, Any]:
        return {"name": self.name, **{a: getattr(self, a).copy() for a in self.ARRAYS}}

    def restore(self, state: Any) -> None:
        if state.get("name") != self.name:
            raise ValueError(f"state was saved for variant {state.get('name')!r}, not {self.name!r}")
        for a in self.ARRAYS:
            arr = np.asarray(state[a])
            cur = getattr(self, a)
            if arr.shape != cur.shape:
                raise ValueError(f"variant state array {a} has shape {arr.shape}, expected {cur.shape}")
            setattr(self, a, np.array(arr, dtype=cur.dtype, order="C", copy=True))

    def same(self, other: VariantState | None) -> bool:
        return (other is not None and other.name == self.name
                and all(np.array_equal(getattr(self, a), getattr(other, a), equal_nan=True)
                        for a in self.ARRAYS))

    # ---- the core's plain update, one entry -------------------------------------------
    @staticmethod
    def _tail(engine: Any, y: int, d: int, e: float) -> float:
        if y == d:
            return 0.0
        if not math.isnan(e):  # the neighbour's own estimate
            return e
        n, K = engine.n, engine.k
        rb = (y * n + d) * K   # absent slots hold inf, dead ones exactly the ceiling
        return float(min(engine.Q.reshape(-1)[rb:rb + K].tolist()))

    @staticmethod
    def _step(engine: Any, k: int) -> float:
        """Count one more update of flat entry k; its core step size."""
        Nf = engine.N.reshape(-1)
        nn = int(Nf[k]) + 1
        Nf[k] = min(nn, engine._count_cap)     # counts saturate (engine: "Counts")
        tab = engine._steps()
        return float(tab[nn]) if nn < len(tab) else engine._step_beyond(nn)

    def _update(self, engine: Any, Qf: np.ndarray, k: int, y: int, d: int, lat: float,
                e: float, ceil: float) -> tuple[float, float]:
        """The core TD update of flat entry k from one row: (delta, the new clipped value);
        counts the update.  The caller stores the value."""
        old = float(Qf[k])
        a = self._step(engine, k)
        delta = lat + self._tail(engine, y, d, e) - old
        return delta, _clip(old + a * delta, ceil)

    @staticmethod
    def _td(engine: Any, w: int, delta: float) -> None:
        tdf = engine.td.reshape(-1)
        sm = engine.settings.td_smoothing
        tdf[w] = (1.0 - sm) * float(tdf[w]) + sm * abs(delta)


def _clip(v: float, ceil: float) -> float:
    return ceil if v > ceil else (max(v, 0.0))


class FullEcho(VariantState):
    """Full echo (Boyan & Littman 1994) with damped echo steps; see the module docstring."""

    name = "full_echo"
    ARRAYS = ("L",)

    def __init__(self, engine: Any) -> None:
        super().__init__(engine)
        # expected hop latency per link slot: starts at the propagation delay
        self.L = np.where(engine._present, engine._link_delay, 0.0).astype(np.float64)

    def apply(self, engine: Any, rows: _Rows, now: float) -> list[float]:
        s = engine.settings
        n, K = self.n, self.k
        Qf = engine.Q.reshape(-1)
        Lf = self.L.reshape(-1)
        live = engine.live
        slots = engine._slots
        ceil, damp, ws = s.ceiling_s, s.echo_damping, s.echo_smoothing
        engine._steps()
        tde: list[float] = []
        for x, y, d, j, lat, e in zip(rows.xs, rows.ys, rows.ds, rows.js, rows.lats, rows.ests):
            w = x * n + d
            k = w * K + j
            delta, q = self._update(engine, Qf, k, y, d, lat, e, ceil)
            Qf[k] = q
            self._td(engine, w, delta)
            lj = x * K + j
            Lf[lj] = (1.0 - ws) * float(Lf[lj]) + ws * lat
            tde.append(delta)
            for z in range(K):   # the echo: every other live neighbour, slot order
                if z == j or not live[x, z]:
                    continue
                yz = int(slots[x, z])
                kz = w * K + z
                oz = float(Qf[kz])
                az = self._step(engine, kz)
                dz = float(Lf[x * K + z]) + self._tail(engine, yz, d, math.nan) - oz
                Qf[kz] = _clip(oz + damp * az * dz, ceil)
        return tde

    def on_link(self, engine: Any, x: int, j: int, up: bool) -> None:
        if up:
            self.L[x, j] = engine._link_delay[x, j]


class Predictive(VariantState):
    """Predictive Q-routing (Choi & Yeung 1996); see the module docstring."""

    name = "predictive"
    ARRAYS = ("B", "R", "U")
    predicts = True

    def __init__(self, engine: Any) -> None:
        super().__init__(engine)
        self.B = engine.Q.copy()
        self.R = np.zeros(engine.Q.shape)
        self.U = np.full(engine.Q.shape, float(engine.now))

    def apply(self, engine: Any, rows: _Rows, now: float) -> list[float]:
        s = engine.settings
        n, K = self.n, self.k
        Qf = engine.Q.reshape(-1)
        Bf, Rf, Uf = self.B.reshape(-1), self.R.reshape(-1), self.U.reshape(-1)
        ceil, beta, gamma = s.ceiling_s, s.pred_beta, s.pred_gamma
        engine._steps()
        tde: list[float] = []
        for x, y, d, j, lat, e in zip(rows.xs, rows.ys, rows.ds, rows.js, rows.lats, rows.ests):
            w = x * n + d
            k = w * K + j
            delta, q = self._update(engine, Qf, k, y, d, lat, e, ceil)
            Qf[k] = q
            Bf[k] = min(Bf[k], q)
            u = float(Uf[k])
            if delta < 0.0 and now > u:
                r = float(Rf[k]) + beta * delta / (now - u)
                Rf[k] = min(0.0, r)
            elif delta > 0.0:
                Rf[k] = gamma * float(Rf[k])
            Uf[k] = now
            self._td(engine, w, delta)
            tde.append(delta)
        return tde

    def decision_values(self, engine: Any) -> np.ndarray:
        # recovering entries move with time: recompute their destinations every time
        moving = (self.R < 0.0).any(axis=(0, 2))
        engine._dirty |= moving
        p = predict(engine.Q, self.B, self.R, self.U, float(engine.now))
        # dead slots hold the ceiling (decide masks them anyway)
        return np.where(engine.live[:, None, :], p, engine.Q)

    def on_link(self, engine: Any, x: int, j: int, up: bool) -> None:
        # a re-admitted link starts afresh: best = its fresh estimate, no trend
        self.B[x, :, j] = engine.Q[x, :, j]
        self.R[x, :, j] = 0.0
        self.U[x, :, j] = float(engine.now)


class Confidence(VariantState):
    """Confidence-based Q-routing (Kumar & Miikkulainen 1998); see the module docstring."""

    name = "confidence"
    ARRAYS = ("C", "U")

    def __init__(self, engine: Any) -> None:
        super().__init__(engine)
        self.C = np.full(engine.Q.shape, float(engine.settings.conf_initial))
        self.U = np.full(engine.Q.shape, float(engine.now))

    def confidence_now(self, engine: Any) -> np.ndarray:
        """Every entry's confidence decayed to the engine's ``now``."""
        s = engine.settings
        return np.asarray(decayed(self.C, float(engine.now) - self.U, s.conf_decay, s.conf_interval_s))

    def apply(self, engine: Any, rows: _Rows, now: float) -> list[float]:
        s = engine.settings
        n, K = self.n, self.k
        Qf = engine.Q.reshape(-1)
        Cf, Uf = self.C.reshape(-1), self.U.reshape(-1)
        ceil, lam, iv, floor = s.ceiling_s, s.conf_decay, s.conf_interval_s, s.conf_min_step
        greedy = engine.greedy
        tde: list[float] = []
        for x, y, d, j, lat, e, c in zip(rows.xs, rows.ys, rows.ds, rows.js, rows.lats,
                                         rows.ests, rows.confs):
            w = x * n + d
            k = w * K + j
            old = float(Qf[k])
            c_old = float(decayed(float(Cf[k]), now - float(Uf[k]), lam, iv))
            if y == d:
                c_new = 1.0
            elif not math.isnan(c):   # given by the shell
                c_new = min(1.0, max(0.0, c))
            else:          # the entry y publishes for d (its greedy slot), else its lowest
                rb = (y * n + d) * K
                zb = int(greedy[y, d])
                if zb < 0:
                    zb = int(np.argmin(Qf[rb:rb + K]))
                c_new = float(decayed(float(Cf[rb + zb]), now - float(Uf[rb + zb]), lam, iv))
            eta = max(c_new, 1.0 - c_old, floor)
            Nf = engine.N.reshape(-1)
            Nf[k] = min(int(Nf[k]) + 1, engine._count_cap)
            delta = lat + self._tail(engine, y, d, e) - old
            Qf[k] = _clip(old + eta * delta, ceil)
            Cf[k] = c_old + eta * (c_new - c_old)
            Uf[k] = now
            self._td(engine, w, delta)
            tde.append(delta)
        return tde

    def on_link(self, engine: Any, x: int, j: int, up: bool) -> None:
        # down: nothing is known about the slot; up: a fresh, unsure estimate
        self.C[x, :, j] = 0.0 if not up else float(engine.settings.conf_initial)
        self.U[x, :, j] = float(engine.now)
