"""Wire protocol v1: the one place msgpack bytes become validated values and back.

Owns every message shape the service speaks (ingest batches, acknowledgements, errors,
table publications, control requests and replies), the fixed sets of rejection reasons,
and the name ↔ index mapping of the wire.  Decoding never raises on peer input: it
returns a value (:class:`Ingest`, a dict) or a :class:`WireError` that says which field
held which value and which rule it broke.

Must not import: zmq, prometheus, files or clocks.  Imports numpy, msgpack, the
topology model, the engine's value types (``HopBatch``, ``REJECT_REASONS``) and the
compiled kernels' selector (:mod:`routerd.core.kernels`: the columnar decode) only.
Never pickle: only plain msgpack types cross the wire.

Messages (all msgpack maps; strings UTF-8, byte strings msgpack ``bin``)
-----------------------------------------------------------------------
Ingest, named rows (ROUTER or PULL)::

    {"v": 1, "reporter": str, "batch": int,
     "hops":  [[from, via, dst, latency_s] | [from, via, dst, latency_s, estimate_s], ...],
     "links": [[from, to, "down" | "up"], ...]}            # hops, links both optional

Ingest, columnar fast path (same endpoints)::

    {"v": 1, "reporter": str, "batch": int, "topology": id,
     "cols": {"from": bin, "via": bin, "dst": bin, "latency_s": bin[, "estimate_s": bin]},
     "links": [...]}                                         # links optional, named as above

Node columns are little-endian int32 indices into the service's node list (control
``{"op": "nodes"}``), numeric columns little-endian float64; an ``estimate_s`` of NaN
means "absent".  ``topology`` must equal the service's id (:attr:`Topology.digest`), or
the whole batch is refused, so indices never silently shift.  A named-row batch may
carry ``topology`` too (then it must match as well); unknown top-level fields are refused
(``unknown_field``) rather than ignored, so a misspelt ``"hop"`` never loses data silently.

**Row indexing.**  A batch's rows are numbered: hop rows ``0 .. H-1`` (H = number of
hops, in order), then link rows ``H .. H+L-1`` (link j is row ``H + j``).  Every
``rejected`` entry of an acknowledgement uses this numbering.

Acknowledgement: ``{"v": 1, "batch": n, "accepted": k, "rejected": [[row, reason], ...]}``
(``accepted`` counts hop and link rows).  A frame that cannot be read as a batch at all:
``{"v": 1, "error": reason}`` plus ``"batch": n`` whenever the batch number could be read.
Error reasons start with a fixed code (:data:`FRAME_ERRORS`) followed by ``": "`` and a
description naming the field and the value, e.g. ``"bad_version: field 'v' is 2, expected 1"``.

Envelope.  Clients send one payload frame, which may be preceded by one empty delimiter
frame (REQ adds it; :mod:`routerd.agent.client`'s DEALER adds it too, so the service can answer
both the same way).  Anything else is ``extra_frames``.

Tables (PUB), multipart::

    [b"tables/" + node, {"v": 1, "node": x, "seq": n, "epoch": e,
                         "routes": {dst: [[next_hop, weight], ...]}}]

Control (REP): a request ``{"op": "tables" | "estimates" | "health" | "snapshot" | "link" |
"nodes" | "reload", ...}`` (``"v": 1`` optional); replies ``{"v": 1, ...}`` or ``{"v": 1, "error": reason}``.
``nodes`` → ``{"v": 1, "nodes": [name, ...], "topology": id}``; ``estimates`` needs
``"node"``; ``link`` needs ``"from"``, ``"to"``, ``"state"``.

Row rejection reasons (:data:`REASONS`, a fixed set: metrics label on it): decode time
adds ``bad_row`` (not a list of 4 or 5 / 3 items, a name that is not a string),
``unknown_node``, ``bad_latency`` / ``bad_estimate`` (not a number),
``bad_link_state`` (not "down" or "up"), ``not_neighbour`` (a link that does not exist);
the engine adds its own at observe time (:data:`routerd.core.engine.REJECT_REASONS`: values
that are NaN, infinite or negative, a ``via`` that is not a neighbour, ``from == dst``,
a hop over a link marked down).
"""
from __future__ import annotations

import functools
import math
import sys
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from itertools import chain, repeat
from operator import itemgetter
from types import SimpleNamespace
from typing import Any

import msgpack
import numpy as np

from routerd.core import kernels as _kernels
from routerd.core.engine import REJECT_REASONS as _ENGINE_REASONS
from routerd.core.engine import HopBatch
from routerd.core.guards import row_numbers
from routerd.core.topology import Topology

VERSION = 1

#: Reasons a row is refused at decode time.
DECODE_REASONS: tuple[str, ...] = (
    "bad_row", "unknown_node", "bad_latency", "bad_estimate", "bad_link_state", "not_neighbour",
)
#: Every row rejection reason, decode time and engine (a fixed tuple: metrics labels use it).
REASONS: tuple[str, ...] = DECODE_REASONS + tuple(r for r in _ENGINE_REASONS
                                                   if r not in DECODE_REASONS)

#: Codes that start every whole-frame error reason (a fixed tuple: metrics labels use it).
FRAME_ERRORS: tuple[str, ...] = (
    "not_msgpack",        # the bytes do not parse as one msgpack object
    "not_a_map",          # the object is not a map
    "oversized",          # the frame is larger than the service accepts
    "bad_version",        # "v" missing or not 1
    "bad_reporter",       # "reporter" missing, not a string, empty or too long
    "bad_batch",          # "batch" missing or not a whole number in [0, 2^63)
    "unknown_field",      # a key this version does not define
    "conflicting_formats",  # both "hops" and "cols"
    "bad_hops",           # "hops" is not a list
    "bad_links",          # "links" is not a list
    "bad_cols",           # "cols" malformed: missing column, not bytes, lengths differ
    "wrong_topology",     # "topology" missing or not the service's id
    "too_many_rows",      # more rows than the service takes in one batch
    "extra_frames",       # the envelope had more frames than one payload (service side)
    "bad_request",        # a control request that is malformed
    "unknown_op",         # a control request with an op we do not know
)

CONTROL_OPS: tuple[str, ...] = ("tables", "estimates", "health", "snapshot", "link", "nodes",
                                 "reload")
LINK_STATES: tuple[str, ...] = ("down", "up")
TABLE_TOPIC = b"tables/"
MAX_REPORTER_LEN = 256

_INGEST_KEYS = frozenset({"v", "reporter", "batch", "hops", "links", "cols", "topology"})
_COLS_REQUIRED = ("from", "via", "dst", "latency_s")
_COLS_KEYS = frozenset(_COLS_REQUIRED + ("estimate_s",))
_I4 = np.dtype("<i4")
_U4 = np.dtype("<u4")
_F8 = np.dtype("<f8")
#: The compiled decode reads the column bytes as the host's int32/float64: little-endian only.
_LITTLE = sys.byteorder == "little"
#: ``decode_ingest(kernels=AUTO)``: the compiled kernels when built, else the reference.
AUTO: Any = object()


# ---- values ------------------------------------------------------------------------------
@dataclass(frozen=True, slots=True)
class WireError:
    """A frame that cannot be read at all.  A value, not an exception.

    ``reason`` is ``"<code>: <what, where, why>"`` with the code from :data:`FRAME_ERRORS`;
    ``batch``/``reporter`` are filled in when they could be read (so the error reply can
    name the batch)."""

    reason: str
    batch: int | None = None
    reporter: str | None = None

    @property
    def code(self) -> str:
        c = self.reason.split(":", 1)[0]
        return c if c in FRAME_ERRORS else "bad_request"


@dataclass(frozen=True, slots=True)
class Ingest:
    """A decoded batch.  ``hops`` holds node indices; ``hop_rows[i]`` is the original row
    number of ``hops`` row i; ``links`` are (src, dst, up) index triples from rows
    ``link_rows``; ``rejected`` lists the rows refused at decode time."""

    reporter: str
    batch: int
    hops: HopBatch
    hop_rows: np.ndarray
    links: tuple[tuple[int, int, bool], ...]
    link_rows: tuple[int, ...]
    rejected: tuple[tuple[int, str], ...]
    rows_total: int = 0
    columnar: bool = False
    #: a columnar frame whose every hop row decoded: its column bytes as received
    #: (little-endian int32 / float64, the journal's ``batch`` record layout), so an
    #: applied batch nobody trimmed is journaled without encoding its rows again
    raw_cols: Mapping[str, bytes] | None = None

    def rejections(self, engine_rejected: Sequence[tuple[int, str]] = ()) -> list[list[Any]]:
        """Every rejected row in wire numbering, sorted: decode-time ones plus the engine's
        (whose indices point into ``hops`` and are mapped back through ``hop_rows``)."""
        if not self.rejected and not len(engine_rejected):
            return []
        # decode-time rejections hold Python ints already (every path that makes them)
        out: list[list[Any]] = list(map(list, self.rejected))
        if len(engine_rejected):
            rows = self.hop_rows
            out += [[int(rows[i]), s] for i, s in engine_rejected]
        out.sort(key=itemgetter(0))      # ints already: no conversion per comparison
        return out


class BadReply(ValueError):
    """A reply or publication from the service that does not follow wire protocol v1."""


# ---- helpers -----------------------------------------------------------------------------
def _show(value: Any, limit: int = 60) -> str:
    """A bounded repr for error messages (peer values can be huge)."""
    try:
        s = repr(value)
    except Exception:  # noqa: BLE001 # pragma: no cover - repr of msgpack values does not fail
        s = f"<{type(value).__name__}>"
    return s if len(s) <= limit else s[: limit - 3] + "..."


def _is_int(x: Any) -> bool:
    return isinstance(x, int) and not isinstance(x, bool)


def _is_num(x: Any) -> bool:
    return (isinstance(x, (int, float))) and not isinstance(x, bool)


def topology_id(nodes: Sequence[str]) -> str:
    """The wire ``topology`` id of a node list — :attr:`Topology.digest`'s own code, applied
    to a bare list (so a client holding only names computes the same id)."""
    return Topology.digest.func(SimpleNamespace(nodes=tuple(nodes)))  # type: ignore[attr-defined]


def _unpack(frame: Any, max_bytes: int | None) -> Any:
    """msgpack → object, or WireError.  Limits keep a hostile frame from allocating more
    than its own size; ext types are refused (we define none on the wire)."""
    try:
        buf = memoryview(frame)
    except TypeError:
        return WireError(f"not_msgpack: the frame is a {type(frame).__name__}, not bytes")
    n = buf.nbytes
    if max_bytes is not None and n > max_bytes:
        return WireError(f"oversized: the frame is {n} bytes, the limit is {max_bytes}")
    if n == 0:
        return WireError("not_msgpack: the frame is empty")
    try:
        return msgpack.unpackb(buf, raw=False, strict_map_key=False, use_list=True,
                               max_ext_len=0, max_bin_len=n, max_str_len=n,
                               max_array_len=n, max_map_len=n)
    except msgpack.ExtraData:
        return WireError("not_msgpack: the frame holds more than one msgpack object")
    except Exception as e:  # noqa: BLE001 -  # every parse failure of peer bytes is the peer's fault
        first = bytes(buf.cast("B")[:1]).hex() if buf.contiguous else "?"
        detail = str(e) or f"no msgpack object starts with byte 0x{first}"
        return WireError(f"not_msgpack: {type(e).__name__}: {_show(detail, 80)} ({n} bytes)")


def _header(obj: Any) -> tuple[str, int] | WireError:
    if not isinstance(obj, dict):
        return WireError(f"not_a_map: the frame is a msgpack {type(obj).__name__}, expected a map")
    bn = obj.get("batch")
    batch = bn if isinstance(bn, int) and not isinstance(bn, bool) and 0 <= bn < 2**63 else None
    rep = obj.get("reporter")
    reporter = rep if isinstance(rep, str) else None
    v = obj.get("v", "<missing>")
    if not (_is_int(v) and v == VERSION):
        return WireError(f"bad_version: field 'v' is {_show(v)}, expected {VERSION}", batch, reporter)
    if "reporter" not in obj:
        return WireError("bad_reporter: field 'reporter' is missing", batch)
    if not isinstance(rep, str) or not rep or len(rep) > MAX_REPORTER_LEN:
        return WireError(f"bad_reporter: field 'reporter' is {_show(rep)}, expected a non-empty "
                         f"string of at most {MAX_REPORTER_LEN} characters", batch)
    if "batch" not in obj:
        return WireError("bad_batch: field 'batch' is missing", None, reporter)
    if batch is None:
        return WireError(f"bad_batch: field 'batch' is {_show(bn)}, expected a whole number "
                         "in [0, 2^63)", None, reporter)
    extra = [k for k in obj if k not in _INGEST_KEYS]
    if extra:
        return WireError(f"unknown_field: {_show(extra[0])} is not a field of a v1 batch "
                         f"(fields: {', '.join(sorted(_INGEST_KEYS))})", batch, reporter)
    return rep, batch


# ---- ingest ------------------------------------------------------------------------------
def decode_ingest(frame: bytes, topo: Topology, *, max_rows: int | None = None,
                  max_bytes: int | None = None, kernels: Any = AUTO) -> Ingest | WireError:
    """Decode one ingest frame against ``topo``.  Never raises on any input.

    ``kernels``: the compiled module (:func:`routerd.core.kernels.select`) whose
    ``cols_decode`` widens a columnar frame's columns and checks their indices in one
    pass, or None for the numpy reference (the same values either way:
    ``tests/test_ingest_kernels.py``); by default the compiled one when it is built."""
    try:
        return _decode_ingest(frame, topo, max_rows, max_bytes,
                              _kernels.select("auto") if kernels is AUTO else kernels)
    except Exception as e:  # noqa: BLE001 -  # a bug of ours must not take the service down; say so loudly
        return WireError(f"bad_request: internal decoder error {type(e).__name__}: "
                         f"{_show(str(e), 80)} (please report)")


def _decode_ingest(frame: Any, topo: Topology, max_rows: int | None,
                   max_bytes: int | None, kern: Any = None) -> Ingest | WireError:
    obj = _unpack(frame, max_bytes)
    if isinstance(obj, WireError):
        return obj
    h = _header(obj)
    if isinstance(h, WireError):
        return h
    reporter, batch = h

    def err(msg: str) -> WireError:
        return WireError(msg, batch, reporter)

    links_in = obj.get("links", [])
    if links_in is None:
        links_in = []
    if not isinstance(links_in, list):
        return err(f"bad_links: field 'links' is a {type(links_in).__name__}, expected a list")
    if "cols" in obj:
        if "hops" in obj:
            return err("conflicting_formats: a batch has 'hops' or 'cols', not both")
        cols = _decode_cols(obj, topo, err, kern)
        if isinstance(cols, WireError):
            return cols
        hops, hop_rows, rej = cols
        columnar = True
        raw = None if rej else obj["cols"]
    else:
        if "topology" in obj and obj["topology"] != topo.digest:
            return err(f"wrong_topology: field 'topology' is {_show(obj['topology'])}, the "
                       f"service's is {topo.digest!r}")
        hops_in = obj.get("hops", [])
        if hops_in is None:
            hops_in = []
        if not isinstance(hops_in, list):
            return err(f"bad_hops: field 'hops' is a {type(hops_in).__name__}, expected a list")
        if max_rows is not None and len(hops_in) + len(links_in) > max_rows:
            return err(f"too_many_rows: {len(hops_in) + len(links_in)} rows, the limit is {max_rows}")
        res = _rows_fast(hops_in, topo)
        if res is None:
            res = _rows_slow(hops_in, topo)
        hops, hop_rows, rej = res
        columnar = False
        raw = None
    n_h = _hop_count(hop_rows, rej)
    if max_rows is not None and n_h + len(links_in) > max_rows:
        return err(f"too_many_rows: {n_h + len(links_in)} rows, the limit is {max_rows}")
    links, link_rows, lrej = _decode_links(links_in, topo, n_h)
    return Ingest(reporter, batch, hops, hop_rows, links, link_rows, tuple(rej) + lrej,
                  n_h + len(links_in), columnar, raw)


def _hop_count(hop_rows: np.ndarray, rej: Sequence[tuple[int, str]]) -> int:
    return int(hop_rows.shape[0]) + len(rej)


def _decode_cols(obj: dict[Any, Any], topo: Topology, err: Any, kern: Any = None
                 ) -> tuple[HopBatch, np.ndarray, list[tuple[int, str]]] | WireError:
    if "topology" not in obj:
        return err("wrong_topology: a columnar batch needs field 'topology' (the service's "
                   f"id is {topo.digest!r}; ask control {{'op': 'nodes'}})")
    if obj["topology"] != topo.digest:
        return err(f"wrong_topology: field 'topology' is {_show(obj['topology'])}, the "
                   f"service's is {topo.digest!r} (node indices would not match)")
    cols = obj["cols"]
    if not isinstance(cols, dict):
        return err(f"bad_cols: field 'cols' is a {type(cols).__name__}, expected a map")
    for k in cols:
        if k not in _COLS_KEYS:
            return err(f"bad_cols: column {_show(k)} is not defined (columns: "
                       f"{', '.join(sorted(_COLS_KEYS))})")
    arrs: dict[str, np.ndarray] = {}
    m: int | None = None
    for k in _COLS_REQUIRED + ("estimate_s",):
        if k not in cols:
            if k == "estimate_s":
                continue
            return err(f"bad_cols: column {k!r} is missing")
        b = cols[k]
        if not isinstance(b, bytes):
            return err(f"bad_cols: column {k!r} is a {type(b).__name__}, expected bytes (msgpack bin)")
        dt = _I4 if k in ("from", "via", "dst") else _F8
        if len(b) % dt.itemsize:
            return err(f"bad_cols: column {k!r} has {len(b)} bytes, not a multiple of {dt.itemsize}")
        rows = len(b) // dt.itemsize
        if m is None:
            m = rows
        elif rows != m:
            return err(f"bad_cols: column {k!r} has {rows} rows, column 'from' has {m}")
        if kern is None or not _LITTLE:
            arrs[k] = np.frombuffer(b, dtype=dt)
    assert m is not None
    n = topo.n
    if kern is not None and _LITTLE:
        # one compiled pass: widen the columns, count indices out of [0, n)
        ii = np.empty((3, m), dtype=np.int64)
        ff = np.empty((2, m), dtype=np.float64)
        s, v, d = ii
        lat, est = ff
        bad_n = kern.cols_decode(cols["from"], cols["via"], cols["dst"], cols["latency_s"],
                                 cols.get("estimate_s"), n, s, v, d, lat, est)
        if not bad_n:
            return HopBatch(s, v, d, lat, est), row_numbers(m), []
        return _unknown_nodes(s, v, d, lat, est, n)
    s = arrs["from"].astype(np.int64)
    v = arrs["via"].astype(np.int64)
    d = arrs["dst"].astype(np.int64)
    lat = arrs["latency_s"].astype(np.float64)
    est = arrs["estimate_s"].astype(np.float64) if "estimate_s" in arrs else _nans(m)
    if m == 0 or max(arrs[k].view(_U4).max() for k in ("from", "via", "dst")) < n:
        # every index in range, the common case (read as unsigned, a negative one is huge)
        return HopBatch(s, v, d, lat, est), row_numbers(m), []
    return _unknown_nodes(s, v, d, lat, est, n)


def _unknown_nodes(s: np.ndarray, v: np.ndarray, d: np.ndarray, lat: np.ndarray,
                   est: np.ndarray, n: int
                   ) -> tuple[HopBatch, np.ndarray, list[tuple[int, str]]]:
    """Rows naming a node index outside [0, n) rejected ``unknown_node``, the rest kept."""
    bad = (s < 0) | (s >= n) | (v < 0) | (v >= n) | (d < 0) | (d >= n)
    if bad.any():
        keep = np.flatnonzero(~bad)
        rej = [(int(i), "unknown_node") for i in np.flatnonzero(bad)]
        return (HopBatch(s[keep], v[keep], d[keep], lat[keep], est[keep]), keep, rej)
    return HopBatch(s, v, d, lat, est), np.arange(s.shape[0], dtype=np.int64), []


_NANS = np.full(0, np.nan)


def _nans(m: int) -> np.ndarray:
    """``np.full(m, nan)`` (absent estimates) as a read-only view of one cached array."""
    global _NANS
    if _NANS.shape[0] < m:
        _NANS = np.full(max(m, 4096), np.nan)
        _NANS.flags.writeable = False
    return _NANS[:m]


def _rows_fast(rows: list[Any], topo: Topology
               ) -> tuple[HopBatch, np.ndarray, list[tuple[int, str]]] | None:
    """All rows well formed (the common case) in C-level loops, rows naming a node that
    does not exist rejected ``unknown_node``; None → take the slow path."""
    m = len(rows)
    if m == 0:
        e = np.empty(0, dtype=np.int64)
        return HopBatch(e, e, e, np.empty(0), np.empty(0)), e, []
    try:
        if set(map(type, rows)) != {list}:
            return None
        lens = set(map(len, rows))
        if len(lens) != 1:
            return None
        width = lens.pop()
        if width not in (4, 5):
            return None
        cols = list(zip(*rows))
        # topo.index has only str keys, so any other type fails the lookup (KeyError or
        # TypeError) and the row goes to the slow path: no separate type check needed.
        # one C-level lookup of all 3m names (itemgetter of >= 3 keys returns a tuple)
        names = list(chain(cols[0], cols[1], cols[2]))
        unknown = None
        try:
            sv = np.array(itemgetter(*names)(topo.index), dtype=np.int64)
        except KeyError:
            # some name is not a node: still C-level when every name is a string (the
            # slow path's reason for such a row is then unknown_node, whatever its values)
            if set(map(type, names)) != {str}:
                return None
            sv = np.fromiter(map(topo.index.get, names, repeat(-1)), dtype=np.int64,
                             count=3 * m)
            unknown = (sv[:m] < 0) | (sv[m:2 * m] < 0) | (sv[2 * m:] < 0)
        s, v, d = sv[:m], sv[m:2 * m], sv[2 * m:]
        if not set(map(type, cols[3])) <= {float, int}:
            return None
        lat = np.array(cols[3], dtype=np.float64)
        if width == 5:
            et = set(map(type, cols[4]))
            if not et <= {float, int, type(None)}:
                return None
            if type(None) in et:
                est = np.array([math.nan if x is None else x for x in cols[4]], dtype=np.float64)
            else:
                est = np.array(cols[4], dtype=np.float64)
        else:
            est = np.full(m, np.nan)
    except (KeyError, TypeError, OverflowError, ValueError):
        return None
    if unknown is not None:
        keep = np.flatnonzero(~unknown)
        rej = [(i, "unknown_node") for i in np.flatnonzero(unknown).tolist()]
        return HopBatch(s[keep], v[keep], d[keep], lat[keep], est[keep]), keep, rej
    return HopBatch(s, v, d, lat, est), np.arange(m, dtype=np.int64), []


def _rows_slow(rows: list[Any], topo: Topology
               ) -> tuple[HopBatch, np.ndarray, list[tuple[int, str]]]:
    """Row by row, naming the reason of each refused row.  Same result as the fast path
    wherever that one applies (tested)."""
    idx = topo.index
    s: list[int] = []
    v: list[int] = []
    d: list[int] = []
    lat: list[float] = []
    est: list[float] = []
    keep: list[int] = []
    rej: list[tuple[int, str]] = []
    for i, r in enumerate(rows):
        if not isinstance(r, list) or len(r) not in (4, 5):
            rej.append((i, "bad_row"))
            continue
        a, b, c = r[0], r[1], r[2]
        if not (isinstance(a, str) and isinstance(b, str) and isinstance(c, str)):
            rej.append((i, "bad_row"))
            continue
        ia, ib, ic = idx.get(a), idx.get(b), idx.get(c)
        if ia is None or ib is None or ic is None:
            rej.append((i, "unknown_node"))
            continue
        x = r[3]
        if not _is_num(x):
            rej.append((i, "bad_latency"))
            continue
        e = r[4] if len(r) == 5 else None
        if e is not None and not _is_num(e):
            rej.append((i, "bad_estimate"))
            continue
        try:
            xf = float(x)
            ef = math.nan if e is None else float(e)
        except OverflowError:  # an int beyond float range (msgpack ints cannot be; API use)
            rej.append((i, "bad_latency" if not _fits(x) else "bad_estimate"))
            continue
        s.append(ia); v.append(ib); d.append(ic); lat.append(xf); est.append(ef); keep.append(i)
    hb = HopBatch(np.array(s, dtype=np.int64), np.array(v, dtype=np.int64),
                  np.array(d, dtype=np.int64), np.array(lat, dtype=np.float64),
                  np.array(est, dtype=np.float64))
    return hb, np.array(keep, dtype=np.int64), rej


def _fits(x: Any) -> bool:
    try:
        float(x)
        return True
    except OverflowError:
        return False


def _decode_links(links: list[Any], topo: Topology, first_row: int
                  ) -> tuple[tuple[tuple[int, int, bool], ...], tuple[int, ...],
                             tuple[tuple[int, str], ...]]:
    idx = topo.index
    li = topo.link_index
    out: list[tuple[int, int, bool]] = []
    rows: list[int] = []
    rej: list[tuple[int, str]] = []
    for j, r in enumerate(links):
        row = first_row + j
        if not isinstance(r, list) or len(r) != 3 or not isinstance(r[0], str) \
                or not isinstance(r[1], str):
            rej.append((row, "bad_row"))
            continue
        a, b = idx.get(r[0]), idx.get(r[1])
        if a is None or b is None:
            rej.append((row, "unknown_node"))
            continue
        if r[2] not in LINK_STATES or not isinstance(r[2], str):
            rej.append((row, "bad_link_state"))
            continue
        if (a, b) not in li:
            rej.append((row, "not_neighbour"))
            continue
        out.append((a, b, r[2] == "up"))
        rows.append(row)
    return tuple(out), tuple(rows), tuple(rej)


def encode_ingest_rows(reporter: str, batch: int, hops: Sequence[Sequence[Any]],
                       links: Sequence[Sequence[Any]] = ()) -> bytes:
    """A named-row batch.  ``hops`` rows are ``[from, via, dst, latency_s(, estimate_s)]``."""
    obj: dict[str, Any] = {"v": VERSION, "reporter": reporter, "batch": int(batch),
                           "hops": [list(r) for r in hops]}
    if len(links):
        obj["links"] = [list(r) for r in links]
    return _pack(obj)


def encode_ingest_cols(reporter: str, batch: int, topology_id: str, src: Any, via: Any,
                       dst: Any, latency: Any, estimate: Any = None,
                       links: Sequence[Sequence[Any]] = ()) -> bytes:
    """A columnar batch from index and seconds arrays (anything numpy accepts)."""
    cols: dict[str, bytes] = {
        "from": np.ascontiguousarray(src, dtype=_I4).tobytes(),
        "via": np.ascontiguousarray(via, dtype=_I4).tobytes(),
        "dst": np.ascontiguousarray(dst, dtype=_I4).tobytes(),
        "latency_s": np.ascontiguousarray(latency, dtype=_F8).tobytes(),
    }
    if estimate is not None:
        cols["estimate_s"] = np.ascontiguousarray(estimate, dtype=_F8).tobytes()
    obj: dict[str, Any] = {"v": VERSION, "reporter": reporter, "batch": int(batch),
                           "topology": topology_id, "cols": cols}
    if len(links):
        obj["links"] = [list(r) for r in links]
    return _pack(obj)


# ---- replies -----------------------------------------------------------------------------
def _plain(o: Any) -> Any:
    """msgpack ``default``: numpy scalars and arrays to plain values; anything else is a bug."""
    if isinstance(o, np.generic):
        return o.item()
    if isinstance(o, np.ndarray):
        return o.tolist()
    if isinstance(o, (tuple, frozenset, set)):
        return list(o)
    raise TypeError(f"cannot put a {type(o).__name__} on the wire")


def _pack(obj: Any) -> bytes:
    return msgpack.packb(obj, use_bin_type=True, default=_plain)


#: An acknowledgement without rejections, around its two numbers: the bytes msgpack gives
#: the map ``{"v": 1, "batch": b, "accepted": k, "rejected": []}`` (in that key order)
_ACK_HEAD = b"\x84" + msgpack.packb("v") + msgpack.packb(VERSION) + msgpack.packb("batch")
_ACK_MID = msgpack.packb("accepted")
_ACK_TAIL = msgpack.packb("rejected") + b"\x90"


def _uint(v: int) -> bytes:
    """msgpack's encoding of a whole number in [0, 2^64): the shortest form."""
    if v < 0x80:
        return bytes((v,))
    if v < 0x100:
        return bytes((0xCC, v))
    if v < 0x10000:
        return b"\xcd" + v.to_bytes(2, "big")
    if v < 0x100000000:
        return b"\xce" + v.to_bytes(4, "big")
    return b"\xcf" + v.to_bytes(8, "big")


def encode_ack(batch: int, accepted: int, rejected: Sequence[Sequence[Any]] = ()) -> bytes:
    # each (row, reason) pair goes out as is: msgpack writes a tuple as an array, a numpy
    # integer through _plain; a copy of every pair cost 0.7 us a row (a flood of refused rows)
    b, k = int(batch), int(accepted)
    if not len(rejected) and 0 <= b < 1 << 64 and 0 <= k < 1 << 64:
        # the common answer, spliced: the same bytes as packing the map (tests/test_wire.py)
        return b"".join((_ACK_HEAD, _uint(b), _ACK_MID, _uint(k), _ACK_TAIL))
    return _pack({"v": VERSION, "batch": b, "accepted": k,
                  "rejected": rejected if type(rejected) is list else list(rejected)})


def encode_error(reason: str | WireError, batch: int | None = None) -> bytes:
    """``{"v": 1, "error": reason}`` (plus ``"batch"`` when known)."""
    if isinstance(reason, WireError):
        batch = reason.batch if batch is None else batch
        reason = reason.reason
    obj: dict[str, Any] = {"v": VERSION, "error": reason}
    if batch is not None:
        obj["batch"] = int(batch)
    return _pack(obj)


def encode_reply(obj: Mapping[str, Any]) -> bytes:
    """A control reply: the map with ``"v": 1`` added."""
    return _pack({"v": VERSION, **obj})


def encode_request(obj: Mapping[str, Any]) -> bytes:
    """A control request (client side)."""
    return _pack(dict(obj))


def decode_reply(data: bytes) -> dict[str, Any]:
    """A reply from the service (ack, error or control reply).  Raises :class:`BadReply`."""
    try:
        obj = msgpack.unpackb(data, raw=False, strict_map_key=False, max_ext_len=0)
    except Exception as e:  # noqa: BLE001 - any parse failure is the peer's
        raise BadReply(f"reply is not msgpack: {type(e).__name__}: {_show(str(e), 80)}") from None
    if not isinstance(obj, dict):
        raise BadReply(f"reply is a {type(obj).__name__}, expected a map")
    if obj.get("v") != VERSION:
        raise BadReply(f"reply has 'v' {_show(obj.get('v'))}, expected {VERSION}")
    return obj


# ---- tables ------------------------------------------------------------------------------
def table_message(node_name: str, seq: int, epoch: int | str,
                  routes: Mapping[str, Sequence[Sequence[Any]]]) -> list[bytes]:
    """The two frames of one table publication."""
    return table_message_encoded(node_name, seq, epoch, table_routes(routes))


def table_routes(routes: Mapping[str, Sequence[Sequence[Any]]]) -> bytes:
    """A table's ``routes`` map, encoded once: :func:`table_message_encoded` splices these
    bytes into every publication of the table until it changes."""
    return _pack({d: [[h, float(w)] for h, w in ws] for d, ws in routes.items()})


_TABLE_KEYS = [msgpack.packb(k) for k in ("v", "node", "seq", "epoch", "routes")]


def _container_head(n: int, fix: int, b16: bytes, b32: bytes) -> bytes:
    if n < 16:
        return bytes((fix | n,))
    if n < 1 << 16:
        return b16 + n.to_bytes(2, "big")
    return b32 + n.to_bytes(4, "big")


class TableCodec:
    """Encodes tables straight from :meth:`Engine.table_arrays`, with no object per entry:
    every byte of the msgpack map is gathered in one numpy pass from a source buffer that
    holds each node's packed name (once per topology), the list heads and the weights'
    big-endian float64 bytes.  The bytes are those :func:`table_routes` gives for the same
    table (tested)."""

    def __init__(self, names: Sequence[str], kernels: Any = AUTO):
        #: the compiled ``table_gather`` (the same bytes by copying), or None: the numpy gather
        self.kernels = _kernels.select("auto") if kernels is AUTO else kernels
        keys = [_pack(nm) for nm in names]
        hops = [b"\x92" + k + b"\xcb" for k in keys]    # [name, float64 ...
        heads = [bytes((0x90 | c,)) for c in range(16)]
        blobs = (hops, keys, heads)
        self._static = b"".join(b"".join(x) for x in blobs)
        offs, lens, at = [], [], 0
        for group in blobs:
            ln = np.array([len(b) for b in group], dtype=np.int64)
            offs.append(at + np.concatenate(([0], np.cumsum(ln)[:-1])))
            lens.append(ln)
            at += int(ln.sum())
        (self._hop_off, self._key_off, self._head_off) = offs
        (self._hop_len, self._key_len, _) = lens
        self._names = list(names)

    def routes(self, dsts: np.ndarray, counts: np.ndarray, hops: np.ndarray,
               weights: np.ndarray) -> bytes:
        m = len(dsts)
        if m and int(counts.max()) >= 16:      # long lists: the general encoder
            ws = weights.tolist()
            hl = hops.tolist()
            routes: dict[str, list[list[Any]]] = {}
            i = 0
            for d, c in zip(dsts.tolist(), counts.tolist()):
                routes[self._names[d]] = [[self._names[hl[j]], ws[j]] for j in range(i, i + c)]
                i += c
            return table_routes(routes)
        body, _ = self._gather(dsts, counts, hops, weights)
        return _container_head(m, 0x80, b"\xde", b"\xdf") + body

    def routes_many(self, owner: np.ndarray, dsts: np.ndarray, counts: np.ndarray,
                    hops: np.ndarray, weights: np.ndarray, nodes: int) -> list[bytes]:
        """:meth:`routes` of several tables at once, from :meth:`Engine.table_arrays_many`
        (``owner[i]``: which of the ``nodes`` tables entry i belongs to, entries grouped by
        owner in order): one numpy pass for all of them, the same bytes table by table."""
        m = len(dsts)
        per = np.bincount(owner, minlength=nodes) if m else np.zeros(nodes, dtype=np.int64)
        if m and int(counts.max()) >= 16:      # long lists somewhere: table by table
            out, ei, hi = [], 0, 0
            for c in per.tolist():
                cs = counts[ei:ei + c]
                nh = int(cs.sum())
                out.append(self.routes(dsts[ei:ei + c], cs, hops[hi:hi + nh], weights[hi:hi + nh]))
                ei, hi = ei + c, hi + nh
            return out
        body, entry_at = self._gather(dsts, counts, hops, weights)
        bounds = entry_at[np.concatenate(([0], np.cumsum(per)))].tolist()
        return [_container_head(c, 0x80, b"\xde", b"\xdf") + body[a:b]
                for c, a, b in zip(per.tolist(), bounds[:-1], bounds[1:])]

    def _gather(self, dsts: np.ndarray, counts: np.ndarray, hops: np.ndarray,
                weights: np.ndarray) -> tuple[bytes, np.ndarray]:
        """The entries' bytes (each: key, list head, its [name, weight] pairs) in a row,
        and the byte offset where each entry starts (plus the total at the end)."""
        m, e = len(dsts), len(hops)
        kern = self.kernels
        if kern is not None and _LITTLE:
            i8 = np.int64
            entry_at = np.empty(m + 1, dtype=i8)
            body = kern.table_gather(
                self._static, self._key_off, self._key_len, self._head_off, self._hop_off,
                self._hop_len, np.ascontiguousarray(dsts, dtype=i8),
                np.ascontiguousarray(counts, dtype=i8), np.ascontiguousarray(hops, dtype=i8),
                np.ascontiguousarray(weights, dtype=np.float64), entry_at)
            return bytes(body), entry_at
        base = len(self._static)
        wsrc = base + 8 * np.arange(e, dtype=np.int64)
        src = np.frombuffer(self._static + np.ascontiguousarray(weights, dtype=">f8").tobytes(),
                            dtype=np.uint8)
        first = np.concatenate(([0], np.cumsum(counts)[:-1])).astype(np.int64) if m else \
            np.zeros(0, dtype=np.int64)
        owner = np.repeat(np.arange(m, dtype=np.int64), counts)
        off = np.empty(2 * (m + e), dtype=np.int64)
        ln = np.empty(2 * (m + e), dtype=np.int64)
        at = 2 * np.arange(m, dtype=np.int64) + 2 * first
        off[at], ln[at] = self._key_off[dsts], self._key_len[dsts]
        off[at + 1], ln[at + 1] = self._head_off[counts], 1
        at = 2 * (owner + 1 + np.arange(e, dtype=np.int64))
        off[at], ln[at] = self._hop_off[hops], self._hop_len[hops]
        off[at + 1], ln[at + 1] = wsrc, 8
        ends = np.cumsum(ln)
        total = int(ends[-1]) if len(ends) else 0
        starts = ends - ln
        # the source index of every output byte: +1 within a piece, a jump at each piece's
        # start (every piece is at least one byte long), summed up in one pass
        step = np.ones(total, dtype=np.int32)
        if len(off):
            jump = off.copy()
            jump[1:] -= off[:-1] + ln[:-1] - 1
            step[starts] = jump
        idx = np.cumsum(step, dtype=np.int32)
        entry_at = np.append(starts[2 * np.arange(m, dtype=np.int64) + 2 * first], total)
        return src[idx].tobytes(), entry_at


@functools.lru_cache(maxsize=8192, typed=True)
def _table_parts(node_name: str, epoch: int | str) -> tuple[bytes, bytes, bytes]:
    """The parts of a node's table publication that do not change from one to the next:
    (topic frame, the body up to the ``seq`` value, the ``epoch`` key and value with the
    ``routes`` key) — a service publishes the same few names under one epoch."""
    k = _TABLE_KEYS
    return (TABLE_TOPIC + node_name.encode(),
            b"".join((b"\x85", k[0], _pack(VERSION), k[1], _pack(node_name), k[2])),
            b"".join((k[3], _pack(epoch), k[4])))


def table_message_encoded(node_name: str, seq: int, epoch: int | str, routes: bytes) -> list[bytes]:
    """The two frames of one table publication from the routes :func:`table_routes`
    encoded: byte for byte what :func:`table_message` gives for the same table."""
    topic, head, mid = _table_parts(node_name, epoch)
    return [topic, b"".join((head, _pack(int(seq)), mid, routes))]


def decode_table(frames: Sequence[bytes]) -> dict[str, Any]:
    """A table publication back to its map.  Raises :class:`BadReply`."""
    if len(frames) != 2:
        raise BadReply(f"a table publication has 2 frames, got {len(frames)}")
    topic = bytes(frames[0])
    if not topic.startswith(TABLE_TOPIC):
        raise BadReply(f"topic {_show(topic)} does not start with {TABLE_TOPIC!r}")
    obj = decode_reply(bytes(frames[1]))
    node = obj.get("node")
    if not isinstance(node, str) or topic[len(TABLE_TOPIC):] != node.encode():
        raise BadReply(f"topic {_show(topic)} does not match node {_show(node)}")
    if not _is_int(obj.get("seq")) or not isinstance(obj.get("routes"), dict):
        raise BadReply("a table publication needs an integer 'seq' and a map 'routes'")
    return obj


def routes_by_name(engine: Any, x: int) -> dict[str, list[list[Any]]]:
    """Engine.routes(x) with node names: ``{dst: [[next_hop, weight], ...]}``."""
    many = getattr(engine, "routes_many", None)     # whole-table arrays when the engine has them
    return _named(engine.topo.nodes, many([x])[0] if many is not None else engine.routes(x))


def _named(names: Any, routes: dict[int, list[tuple[int, float]]]) -> dict[str, list[list[Any]]]:
    return {names[d]: [[names[y], float(w)] for y, w in ws] for d, ws in routes.items()}


def tables_by_name(engine: Any) -> dict[str, dict[str, list[list[Any]]]]:
    """Every node's table (the control ``tables`` reply's ``"tables"`` value)."""
    names = engine.topo.nodes
    many = getattr(engine, "routes_many", None)
    if many is None:
        return {names[x]: routes_by_name(engine, x) for x in range(engine.n)}
    return {names[x]: _named(names, r) for x, r in enumerate(many())}


def estimates_by_name(engine: Any, x: int) -> dict[str, dict[str, float]]:
    """x's estimates over live links: ``{dst: {neighbour: seconds}}`` (control ``estimates``)."""
    names = engine.topo.nodes
    slots = engine.topo.slots[x]
    live = [(j, names[int(y)]) for j, y in enumerate(slots.tolist())
            if y >= 0 and bool(engine.live[x, j])]
    q = engine.Q[x]          # columns: the engine's owned destinations (all by default)
    owned = getattr(engine, "owned", None)
    dests = range(engine.n) if owned is None else owned.tolist()
    return {names[d]: {nm: float(q[c, j]) for j, nm in live}
            for c, d in enumerate(dests) if d != x}


def nodes_reply(topo: Topology) -> dict[str, Any]:
    """The control ``nodes`` reply."""
    return {"v": VERSION, "nodes": list(topo.nodes), "topology": topo.digest}


# ---- control -----------------------------------------------------------------------------
def decode_control(frame: bytes, topo: Topology | None = None) -> dict[str, Any] | WireError:
    """A control request, checked (names too when ``topo`` is given).  Never raises."""
    try:
        return _decode_control(frame, topo)
    except Exception as e:  # noqa: BLE001 -  # pragma: no cover - defensive, as in decode_ingest
        return WireError(f"bad_request: internal decoder error {type(e).__name__}: {_show(str(e), 80)}")


def _decode_control(frame: Any, topo: Topology | None) -> dict[str, Any] | WireError:
    obj = _unpack(frame, None)
    if isinstance(obj, WireError):
        return obj
    if not isinstance(obj, dict):
        return WireError(f"not_a_map: the request is a msgpack {type(obj).__name__}, expected a map")
    if "v" in obj and not (_is_int(obj["v"]) and obj["v"] == VERSION):
        return WireError(f"bad_version: field 'v' is {_show(obj['v'])}, expected {VERSION}")
    op = obj.get("op")
    if op not in CONTROL_OPS or not isinstance(op, str):
        return WireError(f"unknown_op: field 'op' is {_show(op)}, expected one of "
                         f"{', '.join(CONTROL_OPS)}")
    names = ("node",) if op == "estimates" else ("from", "to") if op == "link" else ()
    for k in names:
        val = obj.get(k)
        if not isinstance(val, str):
            return WireError(f"bad_request: op {op!r} needs field {k!r} as a node name, "
                             f"got {_show(val)}")
        if topo is not None and val not in topo.index:
            return WireError(f"bad_request: field {k!r} is {_show(val)}, not a node of "
                             f"topology {topo.name!r}")
    if op == "link":
        st = obj.get("state")
        if st not in LINK_STATES or not isinstance(st, str):
            return WireError(f"bad_request: field 'state' is {_show(st)}, expected 'down' or 'up'")
        if topo is not None and (topo.index[obj["from"]], topo.index[obj["to"]]) not in topo.link_index:
            return WireError(f"bad_request: there is no link {obj['from']} -> {obj['to']} in "
                             f"topology {topo.name!r}")
    return obj
