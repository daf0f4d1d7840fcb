"""The service's columnar ingest kernels (the ingest block of routerd/core/_kernels.pyx):
compiled == numpy reference on random and malformed input.

* ``cols_decode`` (:func:`routerd.io.wire.decode_ingest` with ``kernels=``): the same
  :class:`Ingest` values, or the same :class:`WireError`, on random frames with indices in
  and out of range, with and without estimates, and on malformed frames;
* ``guards_clean`` (:meth:`Guards._clean` / :meth:`Guards.check`): the same screen and the
  same kept rows, rejections and latencies on rows that hit every floor and the ceiling;
* ``meter_add`` (:meth:`routerd.service.optimum.Meter.add`): the same counts to the bit;
* the |TD error| histogram's deferred path (:meth:`Histo.defer`) counts what
  :meth:`Histo.observe_many` counts.
"""
from __future__ import annotations

import numpy as np
import pytest

from routerd.core import kernels
from routerd.core import topology as T
from routerd.core.guards import Guards, GuardSettings
from routerd.io import config, wire
from routerd.io.inputs import load_topology
from routerd.service import metrics
from routerd.service.optimum import Meter

needs_compiled = pytest.mark.skipif(not kernels.available(),
                                    reason=kernels.status("compiled")["reason"])
K = kernels.select("auto")
DEMO = load_topology(config.load(None))


def _cols(rng: np.random.Generator, topo: T.Topology, m: int, *, out_of_range: float = 0.0,
          est: bool = False) -> tuple[np.ndarray, ...]:
    link = rng.integers(0, topo.n_links, m)
    x, y = topo.src[link].astype(np.int64), topo.dst[link].astype(np.int64)
    d = rng.integers(0, topo.n, m)
    lat = topo.delay_s[link] * rng.uniform(0.2, 3.0, m)
    e = rng.uniform(0.0, 2.0, m) if est else np.full(m, np.nan)
    if est:
        e[rng.random(m) < 0.3] = np.nan
    if out_of_range:
        for a in (x, y, d):
            hit = rng.random(m) < out_of_range / 3
            a[hit] = rng.choice([-1, -(2 ** 31), topo.n, topo.n + 7, 2 ** 31 - 1], hit.sum())
    return x, y, d, lat, e


def _same_ingest(a: wire.Ingest | wire.WireError, b: wire.Ingest | wire.WireError) -> None:
    assert type(a) is type(b)
    if isinstance(a, wire.WireError):
        assert a == b
        return
    assert isinstance(b, wire.Ingest)
    for f in ("reporter", "batch", "links", "link_rows", "rejected", "rows_total", "columnar"):
        assert getattr(a, f) == getattr(b, f), f
    assert np.array_equal(a.hop_rows, b.hop_rows)
    for f in ("src", "via", "dst"):
        x, y = getattr(a.hops, f), getattr(b.hops, f)
        assert x.dtype == y.dtype == np.int64 and np.array_equal(x, y), f
    for f in ("latency", "estimate"):
        x, y = getattr(a.hops, f), getattr(b.hops, f)
        assert x.dtype == y.dtype == np.float64
        assert np.array_equal(x.view(np.uint64), y.view(np.uint64)), f   # NaNs too, to the bit
    assert (a.raw_cols is None) == (b.raw_cols is None)


@needs_compiled
@pytest.mark.parametrize("seed", range(12))
def test_cols_decode_equals_the_reference_on_random_frames(seed: int) -> None:
    rng = np.random.default_rng(seed)
    m = int(rng.choice([0, 1, 2, 7, 64, 1024, 3000]))
    x, y, d, lat, e = _cols(rng, DEMO, m, out_of_range=float(rng.choice([0.0, 0.01, 0.5])),
                            est=bool(seed % 2))
    lat[rng.random(m) < 0.05] = rng.choice([np.nan, np.inf, -1.0, 0.0])
    f = wire.encode_ingest_cols("k", seed, DEMO.digest, x, y, d, lat, e if seed % 2 else None,
                                links=[["a", "b", "down"]] if seed % 3 == 0 else ())
    ref = wire.decode_ingest(f, DEMO, kernels=None)
    got = wire.decode_ingest(f, DEMO, kernels=K)
    _same_ingest(ref, got)
    assert isinstance(got, wire.Ingest)
    if m and (x.min() < 0 or y.min() < 0 or d.min() < 0 or max(x.max(), y.max(), d.max()) >= DEMO.n):
        assert any(r == "unknown_node" for _, r in got.rejected)


@needs_compiled
def test_cols_decode_equals_the_reference_on_malformed_frames() -> None:
    import msgpack

    rng = np.random.default_rng(7)
    x, y, d, lat, e = _cols(rng, DEMO, 20, est=True)
    good = msgpack.unpackb(wire.encode_ingest_cols("k", 1, DEMO.digest, x, y, d, lat, e))
    cols = good["cols"]
    bad_cols = [
        {**cols, "from": cols["from"][:-1]},                # not a multiple of 4
        {**cols, "via": cols["via"][:-4]},                  # rows differ
        {**cols, "latency_s": cols["latency_s"][:-8]},
        {**cols, "estimate_s": cols["estimate_s"] + b"\0" * 8},
        {**cols, "dst": "text"},                            # not bytes
        {**cols, "extra": b""},                             # unknown column
        {k: v for k, v in cols.items() if k != "via"},      # missing column
        {k: b"" for k in cols},                             # zero rows
        "not a map",
    ]
    for c in bad_cols:
        f = msgpack.packb({**good, "cols": c})
        _same_ingest(wire.decode_ingest(f, DEMO, kernels=None), wire.decode_ingest(f, DEMO, kernels=K))
    for mutate in (lambda g: {**g, "topology": "x"}, lambda g: {k: v for k, v in g.items() if k != "topology"},
                   lambda g: {**g, "hops": []}):
        f = msgpack.packb(mutate(good))
        a, b = wire.decode_ingest(f, DEMO, kernels=None), wire.decode_ingest(f, DEMO, kernels=K)
        assert isinstance(a, wire.WireError)
        _same_ingest(a, b)
    for junk in (b"", b"\xc1", rng.bytes(64), msgpack.packb(good)[:-3]):
        _same_ingest(wire.decode_ingest(junk, DEMO, kernels=None), wire.decode_ingest(junk, DEMO, kernels=K))


def _guards(kern: object, **kw: float) -> Guards:
    return Guards(DEMO, GuardSettings(**kw), kernels=kern)


@needs_compiled
@pytest.mark.parametrize("seed", range(10))
def test_guard_screen_and_check_equal_the_reference(seed: int) -> None:
    rng = np.random.default_rng(100 + seed)
    m = int(rng.choice([1, 5, 64, 1024]))
    x, y, d, lat, e = _cols(rng, DEMO, m, out_of_range=0.02 if seed % 3 == 0 else 0.0, est=True)
    # rows for every outcome: at a floor, at the ceiling, NaN / inf / negative, via no neighbour
    pick = rng.random(m)
    lat[pick < 0.02] = 0.0
    lat[(pick > 0.02) & (pick < 0.03)] = 1e9
    e[(pick > 0.03) & (pick < 0.04)] = 1e-12
    lat[(pick > 0.04) & (pick < 0.05)] = np.nan
    y[(pick > 0.05) & (pick < 0.06)] = x[(pick > 0.05) & (pick < 0.06)]
    if seed % 2:         # a clean batch: only in-range, plausible rows
        x, y, d, lat, e = _cols(rng, DEMO, m, est=bool(seed % 4 == 1))
    for kw in ({}, {"floor_fraction": 0.0}, {"ceiling_s": 0.05}):
        ref, got = _guards(None, **kw), _guards(K, **kw)
        assert ref._clean(x, y, d, lat, e) == got._clean(x, y, d, lat, e)
        a, b = ref.check(x, y, d, lat, e), got.check(x, y, d, lat, e)
        assert np.array_equal(a.keep, b.keep) and a.rejected == b.rejected
        assert np.array_equal(a.latency, b.latency, equal_nan=True) and a.clipped == b.clipped
        assert ref.stats == got.stats


@needs_compiled
def test_guard_screen_takes_non_contiguous_columns_on_the_reference_path() -> None:
    rng = np.random.default_rng(3)
    x, y, d, lat, e = _cols(rng, DEMO, 200, est=True)
    g = _guards(K)
    sl = slice(None, None, 2)
    assert g._clean(x[sl], y[sl], d[sl], lat[sl], e[sl]) == \
        _guards(None)._clean(x[sl], y[sl], d[sl], lat[sl], e[sl])


@needs_compiled
@pytest.mark.parametrize("seed", range(4))
def test_meter_add_equals_the_reference_to_the_bit(seed: int) -> None:
    rng = np.random.default_rng(200 + seed)
    ref, got = Meter(DEMO, kernels=None), Meter(DEMO, kernels=K)
    for _ in range(5):
        x, y, d, lat, _e = _cols(rng, DEMO, int(rng.integers(0, 500)))
        for mt in (ref, got):
            mt.add(x.astype(np.int32), y.astype(np.int32), d.astype(np.int32), lat)
    assert ref.rows == got.rows
    for a, b in zip(ref.take(), got.take()):
        assert np.array_equal(a, b)


def test_deferred_histogram_counts_what_observe_many_counts() -> None:
    rng = np.random.default_rng(5)
    a, b = metrics.Histo(metrics.TD_BUCKETS_S), metrics.Histo(metrics.TD_BUCKETS_S)
    vals = [np.abs(rng.normal(0, 0.01, int(rng.integers(0, 3000)))) for _ in range(40)]
    vals.append(np.array([metrics.TD_BUCKETS_S[0], metrics.TD_BUCKETS_S[-1], 0.0]))  # on the bounds
    for v in vals:
        a.observe_many(v)
        b.defer(v)
    assert np.array_equal(a.counts, b.counts)
    assert b.count == sum(len(v) for v in vals)
    assert b.sum == pytest.approx(a.sum, rel=1e-12)
    assert a.exported()[0] == b.exported()[0]


def test_deferred_histogram_folds_once_enough_values_wait() -> None:
    h = metrics.Histo((0.1, 1.0))
    h.defer(np.full(metrics.Histo.PENDING_MAX, 0.5))
    assert not h._pending and h._counts.tolist() == [0, metrics.Histo.PENDING_MAX, 0]


@needs_compiled
@pytest.mark.parametrize("seed", range(6))
def test_histogram_binning_equals_numpys(seed: int) -> None:
    rng = np.random.default_rng(300 + seed)
    bounds = np.asarray(metrics.TD_BUCKETS_S)
    v = np.concatenate([np.abs(rng.normal(0, 10.0 ** -rng.integers(1, 6), 2000)), bounds,
                        [0.0, np.inf, np.nan, bounds[-1] * 2]])
    v = np.concatenate([v, -v[:50], np.nextafter(bounds, 0), np.nextafter(bounds, 1),
                        [5e-324, -0.0, 1e300, -np.inf]])
    lut = metrics._binade_starts(bounds)
    add = np.zeros(bounds.size + 1, dtype=np.int64)
    s = K.histo_add(add, bounds, v, lut)
    ref = np.bincount(np.searchsorted(bounds, v, side="left"), minlength=bounds.size + 1)
    assert np.array_equal(add, ref)
    assert np.isnan(s)      # a NaN in, a NaN sum out, as numpy's
    fin = v[np.isfinite(v)]
    add[:] = 0
    assert K.histo_add(add, bounds, fin, lut) == pytest.approx(float(fin.sum()), rel=1e-9)
    for other in (metrics.UPDATE_BUCKETS_S, metrics.SNAPSHOT_PAUSE_BUCKETS_S, (-1.0, 0.0, 1.0)):
        b = np.asarray(other, dtype=np.float64)
        add = np.zeros(b.size + 1, dtype=np.int64)
        K.histo_add(add, b, v, metrics._binade_starts(b))
        assert np.array_equal(add, np.bincount(np.searchsorted(b, v, side="left"),
                                               minlength=b.size + 1))


@needs_compiled
@pytest.mark.parametrize("seed", range(4))
def test_table_codec_compiled_gather_gives_the_same_bytes(seed: int) -> None:
    from routerd.core.engine import Engine, HopBatch

    rng = np.random.default_rng(400 + seed)
    eng = Engine(DEMO)
    x, y, d, lat, _e = _cols(rng, DEMO, 4000)
    ok = x != d
    eng.observe(HopBatch(x[ok], y[ok], d[ok], lat[ok], np.full(int(ok.sum()), np.nan)))
    eng.decide(1.0)
    names = DEMO.nodes
    ref, got = wire.TableCodec(names, kernels=None), wire.TableCodec(names, kernels=K)
    for node in range(DEMO.n):
        arrs = eng.table_arrays(node)
        assert ref.routes(*arrs) == got.routes(*arrs) == wire.table_routes(wire.routes_by_name(eng, node))
    xs = rng.permutation(DEMO.n)[: int(rng.integers(0, DEMO.n + 1))]
    many = eng.table_arrays_many(xs)
    assert ref.routes_many(*many, len(xs)) == got.routes_many(*many, len(xs))
    empty = (np.zeros(0, np.int64),) * 3 + (np.zeros(0),)
    assert ref.routes(*empty) == got.routes(*empty)


@needs_compiled
def test_meter_counts_a_batch_record_from_its_bytes_as_the_reference_does() -> None:
    from routerd.core.engine import HopBatch
    from routerd.io import journal

    rng = np.random.default_rng(500)
    ref, got = Meter(DEMO, kernels=None), Meter(DEMO, kernels=K)
    for m in (0, 1, 33, 700):
        x, y, d, lat, e = _cols(rng, DEMO, m)
        body = journal.batch_body("r", m, 1.0, HopBatch(x, y, d, lat, e))
        ref.add_record(body)
        got.add_record(body)
    assert ref.rows == got.rows
    for a, b in zip(ref.take(), got.take()):
        assert np.array_equal(a, b)
