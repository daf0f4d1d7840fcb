"""routerd.service.metrics: the collector's page, read back with prometheus_client's own parser and
checked with ``promtool check metrics`` (Debian package ``prometheus``) when it is installed.

References: the Prometheus text exposition format (prometheus.io, "Exposition formats":
cumulative ``le`` buckets ending in ``+Inf``, whose count equals ``_count``) and its naming
conventions ("Metric and label naming": ``_total`` counters, base units).
"""
from __future__ import annotations

import math
import shutil
import subprocess
from collections.abc import Mapping
from typing import Any

import numpy as np
import pytest
from prometheus_client import generate_latest
from prometheus_client.parser import text_string_to_metric_families
from prometheus_client.registry import CollectorRegistry

from routerd.core.engine import Engine, HopBatch
from routerd.io import config, wire
from routerd.io.inputs import load_topology
from routerd.service import metrics
from routerd.service.daemon import SERVICE_REASONS

DEMO = load_topology(config.load(None))

REQUIRED = {
    # name as parsed (counters lose _total in the family name) → type
    "routerd_observations": "counter",
    "routerd_batches": "counter",
    "routerd_table_publications": "counter",
    "routerd_route_changes": "counter",
    "routerd_loops_prevented": "counter",
    "routerd_exploration_share": "gauge",
    "routerd_td_error_seconds": "histogram",
    "routerd_update_duration_seconds": "histogram",
    "routerd_journal_bytes": "gauge",
    "routerd_snapshot_age_seconds": "gauge",
}


class FakeSource:
    """What the service hands the collector, with an engine that has seen real rows."""

    def __init__(self) -> None:
        self.counters = metrics.Counters(row_reasons=wire.REASONS + SERVICE_REASONS,
                                         frame_reasons=wire.FRAME_ERRORS)
        self.engine = Engine(DEMO)
        rng = np.random.default_rng(5)
        link = rng.integers(0, DEMO.n_links, 500)
        d = rng.integers(0, DEMO.n, 500)
        res = self.engine.observe(HopBatch.of(DEMO.src[link], DEMO.dst[link], d,
                                              DEMO.delay_s[link] * 5))
        self.engine.decide(1.0)
        self.counters.observations_accepted = res.accepted
        for _, r in res.rejected:
            self.counters.reject(r)
        self.counters.td_error.observe_many(np.abs(res.td_errors))
        self.counters.update_duration.observe(0.0012)
        self.counters.refuse("not_msgpack")

    def engine_statistics(self) -> Any:
        return self.engine.statistics()

    def journal_bytes(self) -> int:
        return 12345

    def snapshot_age_s(self) -> float | None:
        return 7.5

    def uptime_s(self) -> float:
        return 60.0

    def info(self) -> Mapping[str, str]:
        return {"version": "test", "topology": DEMO.digest}


def page(source: Any) -> str:
    reg = CollectorRegistry(auto_describe=False)
    reg.register(metrics.RouterdCollector(source))
    return generate_latest(reg).decode()


def families(text: str) -> dict[str, Any]:
    return {f.name: f for f in text_string_to_metric_families(text)}


def test_page_parses_with_prometheus_clients_parser_and_has_every_family() -> None:
    src = FakeSource()
    fams = families(page(src))
    for name, kind in REQUIRED.items():
        assert name in fams, name
        assert fams[name].type == kind, name
    obs = {tuple(sorted(s.labels.items())): s.value for s in fams["routerd_observations"].samples}
    assert obs[(("result", "accepted"),)] == src.counters.observations_accepted
    st = src.engine.statistics()
    for reason in wire.REASONS:
        got = obs[(("reason", reason), ("result", "rejected"))]
        assert got == st.rejected.get(reason, 0), reason
    assert sum(v for k, v in obs.items() if len(k) == 2) == 500 - src.counters.observations_accepted
    assert fams["routerd_route_changes"].samples[0].value == st.route_changes
    assert fams["routerd_loops_prevented"].samples[0].value == st.loops_prevented
    assert fams["routerd_exploration_share"].samples[0].value == pytest.approx(st.exploration_share)
    assert fams["routerd_journal_bytes"].samples[0].value == 12345
    assert fams["routerd_snapshot_age_seconds"].samples[0].value == 7.5
    b = {tuple(sorted(s.labels.items())): s.value for s in fams["routerd_batches"].samples}
    assert b[(("reason", "not_msgpack"), ("result", "refused"))] == 1
    # every counter sample ends in _total, every label value comes from a fixed set
    fixed = set(wire.REASONS + SERVICE_REASONS + wire.FRAME_ERRORS + metrics.BATCH_RESULTS
                + metrics.PUBLICATION_CAUSES + metrics.CONTROL_OPS + metrics.CONTROL_RESULTS
                + metrics.SNAPSHOT_CAUSES + metrics.INGEST_SOCKETS + metrics.RELOAD_RESULTS) | {"accepted", "rejected"}
    for f in fams.values():
        for s in f.samples:
            if f.type == "counter" and not s.name.endswith("_created"):
                assert s.name.endswith("_total"), s.name
            for k, v in s.labels.items():
                if k in ("le", "version", "topology"):
                    continue
                assert v in fixed, (s.name, k, v)


def test_histograms_are_cumulative_with_le_inclusive_and_inf_equal_to_count() -> None:
    h = metrics.Histo((0.001, 0.01, 0.1))
    h.observe_many(np.array([0.0, 0.001, 0.0011, 0.05, 0.1, 3.0]))
    h.observe(0.01)
    src = FakeSource()
    src.counters.td_error = h
    fam = families(page(src))["routerd_td_error_seconds"]
    buckets = {s.labels["le"]: s.value for s in fam.samples if s.name.endswith("_bucket")}
    # "le" is less-than-or-equal (exposition format): 0.001 falls in the first bucket
    assert buckets == {"0.001": 2, "0.01": 4, "0.1": 6, "+Inf": 7}
    count = next(s.value for s in fam.samples if s.name.endswith("_count"))
    total = next(s.value for s in fam.samples if s.name.endswith("_sum"))
    assert count == 7 and total == pytest.approx(0.0 + 0.001 + 0.0011 + 0.05 + 0.1 + 3.0 + 0.01)
    with pytest.raises(ValueError):
        metrics.Histo((0.1, 0.01))


def test_reasons_outside_the_fixed_set_fail_loudly() -> None:
    c = metrics.Counters(row_reasons=("a",), frame_reasons=("b",))
    with pytest.raises(KeyError):
        c.reject("made_up")
    with pytest.raises(KeyError):
        c.refuse("a")
    c.control_request("anything", ok=True)          # unknown ops count as "other"
    assert c.control[("other", "ok")] == 1


def test_snapshot_age_is_nan_before_the_first_snapshot() -> None:
    src = FakeSource()
    src.snapshot_age_s = lambda: None  # type: ignore[method-assign]
    v = families(page(src))["routerd_snapshot_age_seconds"].samples[0].value
    assert math.isnan(v)


def test_parse_address() -> None:
    assert metrics.parse_address("127.0.0.1:9307") == ("127.0.0.1", 9307)
    assert metrics.parse_address("[::1]:0") == ("::1", 0)
    for bad in ("9307", "host:", "host:99999", ":80"):
        with pytest.raises(ValueError, match="HOST:PORT"):
            metrics.parse_address(bad)


def promtool_check(text: str) -> None:
    exe = shutil.which("promtool")
    if exe is None:
        pytest.skip("promtool is not installed (Debian package 'prometheus'; .ci/run installs it)")
    r = subprocess.run([exe, "check", "metrics"], input=text, text=True, capture_output=True,
                       timeout=60, check=False)
    assert r.returncode == 0, r.stdout + r.stderr
    assert not r.stdout.strip() and not r.stderr.strip(), r.stdout + r.stderr   # no lint remarks


def test_promtool_accepts_the_page() -> None:
    promtool_check(page(FakeSource()))



@pytest.mark.slow
def test_live_service_page_over_http(base: str) -> None:
    from routerd.agent import client
    from service_harness import running

    with running(base) as sp:
        with client.Reporter(sp.endpoints["ingest"], "m", control=sp.endpoints["control"],
                             batch_rows=32) as rep:
            for i in range(100):
                rep.add_hop("w1", "w2", "e3", 0.002 + i * 1e-5)
            rep.add_hop("w1", "w1", "e3", 0.001)          # not a neighbour: rejected
        text = sp.metrics_text()
    fams = families(text)
    for name, kind in REQUIRED.items():
        assert fams[name].type == kind, name
    obs = {tuple(sorted(s.labels.items())): s.value for s in fams["routerd_observations"].samples}
    assert obs[(("result", "accepted"),)] == 100
    assert obs[(("reason", "not_neighbour"), ("result", "rejected"))] == 1
    upd = fams["routerd_update_duration_seconds"]
    assert [s.value for s in upd.samples if s.name.endswith("_count")] == [4]   # 4 batches
    promtool_check(text)


def test_histogram_small_and_vector_paths_agree() -> None:
    rng = np.random.default_rng(3)
    bounds = metrics.TD_BUCKETS_S
    vals = np.concatenate([rng.exponential(0.01, 500), np.array(bounds)])   # bounds exactly too
    one, many = metrics.Histo(bounds), metrics.Histo(bounds)
    for chunk in np.array_split(vals, 100):          # < SMALL values per call: bisect path
        one.observe_many(chunk)
    many.observe_many(vals)                          # one call: numpy path
    assert one.counts.tolist() == many.counts.tolist()
    assert one.sum == pytest.approx(many.sum)


def test_connection_families_cover_every_listening_socket() -> None:
    src = FakeSource()
    src.connection_state = lambda: {  # type: ignore[attr-defined]
        "cap": 112, "open": {"ingest": 100, "control": 2}, "refused": {"ingest": 3},
        "accept_failures": {}, "pauses": 1, "paused": ["ingest", "publish"], "fd_limit": 256}
    fams = families(page(src))
    open_ = {s.labels["socket"]: s.value for s in fams["routerd_ingest_connections"].samples}
    assert open_ == {"ingest": 100, "pull": 0, "publish": 0, "control": 2, "control_ro": 0, "shards": 0}
    refused = {s.labels["socket"]: s.value for s in fams["routerd_ingest_connections_refused"].samples}
    assert refused["ingest"] == 3 and set(refused) == set(metrics.LISTEN_SOCKETS)
    assert all(s.name.endswith("_total") for s in fams["routerd_ingest_connections_refused"].samples)
    assert fams["routerd_ingest_connection_pauses"].samples[0].value == 1
    assert fams["routerd_ingest_connection_cap"].samples[0].value == 112
    assert fams["routerd_ingest_paused"].samples[0].value == 1


def test_split_counters_are_exported() -> None:
    from routerd.core.engine import EngineSettings

    src = FakeSource()
    eng = Engine(DEMO, EngineSettings(mode="split"))
    rng = np.random.default_rng(6)
    for i in range(4):
        link = rng.integers(0, DEMO.n_links, 400)
        d = rng.integers(0, DEMO.n, 400)
        d = np.where(d == DEMO.src[link], DEMO.dst[link], d)
        eng.observe(HopBatch.of(DEMO.src[link], DEMO.dst[link], d, DEMO.delay_s[link] * 5), 0.5 * (i + 1))
        eng.decide(0.5 * (i + 1))
    src.engine = eng
    reg = CollectorRegistry()
    reg.register(metrics.RouterdCollector(src))
    fams = {f.name: f for f in text_string_to_metric_families(generate_latest(reg).decode())}
    st = eng.statistics()
    assert st.split_publications > 0
    assert fams["routerd_split_key_publications"].samples[0].value == st.split_publications
    assert fams["routerd_split_fallbacks"].samples[0].value == st.split_fallbacks


def test_a_shard_workers_page_labels_every_sample_with_its_shard() -> None:
    """A shard worker's page (metrics.serve(..., labels=)): the same families and values
    as the plain page, every sample with shard="K" added (read back by prometheus_client's
    own parser; histograms keep their le label)."""
    src = FakeSource()
    plain = families(page(src))
    reg = CollectorRegistry(auto_describe=False)
    reg.register(metrics.LabelledCollector(metrics.RouterdCollector(src), {"shard": "3"}))
    got = families(generate_latest(reg).decode())
    assert set(got) == set(plain)
    for name, fam in got.items():
        assert fam.type == plain[name].type, name
        assert all(s.labels.get("shard") == "3" for s in fam.samples), name
        want = sorted((s.name, tuple(sorted(s.labels.items())), s.value) for s in plain[name].samples)
        strip = sorted((s.name, tuple(sorted((k, v) for k, v in s.labels.items() if k != "shard")),
                        s.value) for s in fam.samples)
        assert strip == want, name
