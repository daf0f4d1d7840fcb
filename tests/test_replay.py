"""routerd replay: exact reproduction of a real service's tables, what-if comparisons, errors.

The determinism test runs a real ``routerd serve`` on ipc:// endpoints in a tmp dir
(tests/service_harness.py), restarts it once (start-up recovery from a snapshot), and
compares the replay's ``tables.json`` with the control ``tables`` reply and the last
publication of every node.  The what-if checks recompute every figure independently:
engines driven call by call (not through the replay shell) and compared tick by tick.
"""
from __future__ import annotations

import argparse
import csv
import json
import math
import os
import signal
import time
from typing import Any

import numpy as np
import pytest

from routerd.agent import client
from routerd.core import engine as E
from routerd.io import config, wire
from routerd.io import journal as J
from routerd.io.inputs import load_topology
from routerd.tools import replay as R
from routerd.tools.cli import main
from service_harness import ServiceProc, service_args

DEMO = load_topology(config.load(None))


# ---- helpers ----------------------------------------------------------------------------
def args_for(source: str, out: str, *extra: str) -> argparse.Namespace:
    from routerd.tools import cli

    p = cli.build_parser()
    return p.parse_args(["replay", source, "--out", out, "--no-plot", *extra])


def rows(topo: Any, rng: np.random.Generator, m: int, slow: int | None = None) -> tuple[list[str], ...]:
    k = rng.integers(0, topo.n_links, m)
    x, y = topo.src[k], topo.dst[k]
    d = rng.integers(0, topo.n, m)
    ok = d != x
    lat = topo.delay_s[k] * (1 + rng.exponential(0.5, m))
    if slow is not None:
        lat = np.where(k == slow, lat * 8, lat)
    names = topo.nodes
    return ([names[i] for i in x[ok]], [names[i] for i in y[ok]], [names[i] for i in d[ok]],
            lat[ok].tolist())


class Writer:
    """Journals engine calls exactly as the service does (batch, link, tick, config)."""

    def __init__(self, topo: Any, d: str, settings: E.EngineSettings, seed: int = 3):
        self.topo, self.rng = topo, np.random.default_rng(seed)
        self.eng = E.Engine(topo, settings)
        self.j = J.Journal(J.journal_dir(d))
        self.j.append("start", {"topology": topo.digest, "nodes": list(topo.nodes),
                                "settings": J.settings_to_dict(settings), "epoch": 1})
        self.t = 1000.0
        self.b = 0

    def batch(self, m: int = 60, slow: int | None = None) -> None:
        t = self.topo
        k = self.rng.integers(0, t.n_links, m)
        d = self.rng.integers(0, t.n, m)
        lat = t.delay_s[k] * (1 + self.rng.exponential(0.5, m))
        if slow is not None:
            lat = np.where(k == slow, lat * 8, lat)
        hb = E.HopBatch.of(t.src[k], t.dst[k], d, lat)
        self.t += 0.01
        self.b += 1
        res, _ = J.apply_batch(self.eng, hb, [], self.t)
        self.j.append("batch", J.batch_body("w", self.b, self.t, J.accepted_part(hb, res.rejected)))

    def tick(self) -> None:
        self.t += 0.01
        self.eng.decide(self.t)
        self.j.append("tick", {"t": self.t})

    def link(self, a: int, b: int, up: bool) -> None:
        self.t += 0.01
        if self.eng.set_link(a, b, up, self.t):
            self.j.append("link", {"from": a, "to": b, "up": up, "t": self.t})

    def reload(self, s: E.EngineSettings) -> None:
        self.eng.reconfigure(s)
        self.j.append("config", {"settings": J.settings_to_dict(s)})



def synthetic(d: str, settings: E.EngineSettings | None = None) -> Writer:
    w = Writer(DEMO, d, settings or E.EngineSettings(step_mode="constant", alpha=0.4))
    trunk = DEMO.link("w3", "e3")
    for i in range(120):
        w.batch(slow=trunk if i > 50 else None)
        if i % 3 == 2:
            w.tick()
        if i == 70:
            w.link(DEMO.index["w6"], DEMO.index["r1"], False)
        if i == 90:
            w.link(DEMO.index["w6"], DEMO.index["r1"], True)
        if i == 80:
            w.reload(E.settings_with(w.eng.settings, margin=0.02, explore_max=0.15))
    w.tick()
    w.j.close()
    return w


# ---- the key table ------------------------------------------------------------------------
def test_engine_keys_are_the_inverse_of_from_config() -> None:
    # reference: EngineSettings.from_config, the one reading of engine.* keys
    # greedy base: the alternatives below include a variant (greedy only) and split mode
    base_cfg = config.load(None).with_overrides({"engine.mode": "greedy"})
    # engine.optimum.* is the service's live optimality gap: it reads the engine, never
    # changes it, so a replay has nothing to recompute for it
    # engine.split.max_nodes picks the mode a shell starts in (config.split_fits), not a field
    assert set(R.ENGINE_KEYS) == {k for k in config.SCHEMA if k.startswith("engine.")
                                  and not k.startswith("engine.optimum.")} - {"engine.split.max_nodes"}
    with pytest.raises(R.ReplayError, match="picks the mode a service or simulator starts in"):
        R.parse_changes(["engine.split.max_nodes=0"], "--set")
    alt = {"engine.step.mode": "constant", "engine.initial.mode": "constant",
           "engine.explore.basis": "visits", "engine.variant": "predictive",
           "engine.kernels": "reference", "engine.mode": "split",
           "engine.split.destinations_per_decision": 3}
    for key, fld in R.ENGINE_KEYS.items():
        f = config.SCHEMA[key]
        if key in alt:
            v: Any = alt[key]
        elif key == "engine.ceiling_s":
            v = 7.5
        elif key == "engine.explore.cap":
            v = 0.3
        elif key == "engine.explore.max_rate":
            v = 0.15
        elif key == "engine.explore.min_rate":
            v = 0.05
        elif key == "engine.initial.value_s":
            v = 0.25
        else:
            v = (f.default or 0.5) * 0.9 if isinstance(f.default, float) else f.default
        s = E.EngineSettings.from_config(base_cfg.with_overrides({key: v}))
        d = R.diff_settings(E.EngineSettings.from_config(base_cfg), s)
        assert d == {fld: v}, (key, d)


# ---- reproduction -----------------------------------------------------------------------
def test_synthetic_journal_reproduced_and_twice_identical(tmp_path: Any) -> None:
    d = str(tmp_path / "state")
    w = synthetic(d)
    out1, out2 = str(tmp_path / "o1"), str(tmp_path / "o2")
    r1 = R.replay_command(args_for(d, out1))
    with open(os.path.join(out1, "tables.json")) as fh:
        got = json.load(fh)
    assert got == {"v": 1, "tables": wire.tables_by_name(w.eng)}
    assert r1["info"]["ticks"] == 41 and r1["info"]["configs"] == 1
    assert r1["info"]["rows_refused_on_replay"] == 0
    R.replay_command(args_for(d, out2, "--compare", "engine.hysteresis.margin=0.3"))
    R.replay_command(args_for(d, out1, "--compare", "engine.hysteresis.margin=0.3"))
    for f in ("tables.json", "ticks.csv", "comparison.csv", "pairs.csv",
              "tables-engine.hysteresis.margin=0.3.json"):
        with open(os.path.join(out1, f), "rb") as a, open(os.path.join(out2, f), "rb") as b:
            assert a.read() == b.read(), f
    # one segment file works as the source too
    seg = J._segments(J.journal_dir(d))[0][1]
    R.replay_command(args_for(seg, str(tmp_path / "o3")))
    with open(os.path.join(str(tmp_path / "o3"), "tables.json")) as fh:
        assert json.load(fh) == got


def reference_variant(d: str, changes: dict[str, Any]) -> dict[str, Any]:
    """Drive a recorded and a variant engine call by call and compare at each tick."""
    recs = list(J.iter_records(J.journal_dir(d)))
    s0 = J.settings_from_dict(recs[0].body["settings"])
    a, b = E.Engine(DEMO, s0), E.Engine(DEMO, E.settings_with(s0, **changes))
    changes_a = changes_b = 0
    ever = np.zeros((DEMO.n, DEMO.n), dtype=bool)
    secs = np.zeros((DEMO.n, DEMO.n))
    prev: tuple[float, np.ndarray] | None = None
    last_t = 0.0
    for r in recs:
        body = r.body
        if "t" in body:
            last_t = float(body["t"])
        if r.kind == "batch":
            hb = J.batch_hops(body)
            a.observe(hb, now=body["t"])
            b.observe(hb, now=body["t"])
        elif r.kind == "link":
            for e in (a, b):
                e.set_link(body["from"], body["to"], body["up"], now=body["t"])
        elif r.kind == "config":
            s = J.settings_from_dict(body["settings"])
            a.reconfigure(s)
            b.reconfigure(E.settings_with(s, **changes))
        elif r.kind == "tick":
            changes_a += a.decide(body["t"]).route_changes
            changes_b += b.decide(body["t"]).route_changes
            diff = a.next_hops() != b.next_hops()
            if prev is not None:
                secs += prev[1] * (body["t"] - prev[0])
            ever |= diff
            prev = (body["t"], diff)
    assert prev is not None
    secs += prev[1] * (last_t - prev[0])
    return {"changes_a": changes_a, "changes_b": changes_b, "ever": int(ever.sum()),
            "secs": float(secs.sum()), "longest": float(secs.max()), "tables_b": wire.tables_by_name(b)}


def test_what_if_figures_match_an_independent_recomputation(tmp_path: Any) -> None:
    d = str(tmp_path / "state")
    # greedy: the figures count next-hop changes, and the keys varied are greedy mode's
    synthetic(d, E.EngineSettings(mode="greedy", step_mode="constant", alpha=0.4))
    out = str(tmp_path / "o")
    res = R.replay_command(args_for(d, out, "--set", "engine.hysteresis.margin=0.25",
                                    "--compare", "engine.step.alpha=0.9,engine.hysteresis.margin=0.0"))
    ref = reference_variant(d, {"margin": 0.25})
    ref2 = reference_variant(d, {"alpha": 0.9, "margin": 0.0})
    by = {s["variant"]: s for s in res["info"]["variants"]}
    assert set(by) == {"recorded", "engine.hysteresis.margin=0.25",
                       "engine.step.alpha=0.9,engine.hysteresis.margin=0.0"}
    assert by["recorded"]["route_changes"] == ref["changes_a"]
    for lab, rf in (("engine.hysteresis.margin=0.25", ref),
                    ("engine.step.alpha=0.9,engine.hysteresis.margin=0.0", ref2)):
        s = by[lab]
        assert s["route_changes"] == rf["changes_b"]
        assert s["pairs_differing_ever"] == rf["ever"]
        assert math.isclose(s["pair_seconds_differing"], rf["secs"], rel_tol=1e-9, abs_tol=1e-12)
        assert math.isclose(s["longest_pair_differing_s"], rf["longest"], rel_tol=1e-9, abs_tol=1e-12)
    assert ref["ever"] > 0 and ref2["changes_b"] != ref["changes_a"]   # the comparison has content
    # tables.json holds the --set variant; tables-recorded.json the recorded run
    with open(os.path.join(out, "tables.json")) as fh:
        assert json.load(fh)["tables"] == ref["tables_b"]
    # the CSV table says the same as the JSON
    with open(os.path.join(out, "comparison.csv")) as fh:
        table = {r["variant"]: r for r in csv.DictReader(fh)}
    assert int(table["engine.hysteresis.margin=0.25"]["pairs_differing_ever"]) == ref["ever"]
    with open(os.path.join(out, "pairs.csv")) as fh:
        prs = [r for r in csv.DictReader(fh) if r["variant"] == "engine.hysteresis.margin=0.25"]
    assert len(prs) == ref["ever"]
    assert math.isclose(sum(float(r["seconds_differing"]) for r in prs), ref["secs"], rel_tol=1e-5)


def test_printed_table_and_png(tmp_path: Any, capsys: pytest.CaptureFixture[str]) -> None:
    d = str(tmp_path / "state")
    synthetic(d)
    out = str(tmp_path / "o")
    assert main(["replay", d, "--out", out, "--compare", "engine.explore.max_rate=0.02",
                 "--compare", "engine.hysteresis.margin=0.3"]) == 0
    text = capsys.readouterr().out
    assert "variant" in text and "engine.explore.max_rate=0.02" in text and "pair-seconds" in text
    with open(os.path.join(out, "replay.png"), "rb") as fh:
        assert fh.read(8) == b"\x89PNG\r\n\x1a\n"


def test_link_marks_keep_only_changes_from_control_records_and_batches() -> None:
    m = R.LinkMarks()
    w6, r1 = DEMO.index["w6"], DEMO.index["r1"]
    m.add(J.Record(1, "link", {"from": w6, "to": r1, "up": True, "t": 1.0}))     # already up
    m.add(J.Record(2, "batch", {"t": 2.0, "links": [[w6, r1, False], [r1, w6, False]]}))
    m.add(J.Record(3, "batch", {"t": 2.5, "links": [[w6, r1, False]]}))          # still down
    m.add(J.Record(4, "link", {"from": w6, "to": r1, "up": True, "t": 3.0}))
    m.add(J.Record(5, "tick", {"t": 3.5}))
    assert m.events == [(2.0, w6, r1, False), (2.0, r1, w6, False), (3.0, w6, r1, True)]


def test_replay_figure_marks_link_events_in_percent_with_the_legend_aside(tmp_path: Any) -> None:
    d = str(tmp_path / "state")
    synthetic(d)
    src = R.locate(d)
    res = R.replay(src, DEMO, [R.Variant("engine.hysteresis.margin=0.3", {"margin": 0.3}),
                               R.Variant("engine.explore.max_rate=0.02", {"explore_max": 0.02})])
    # the synthetic journal takes w6->r1 down at its 71st batch and up at its 91st
    assert [(e[1], e[2], e[3]) for e in res["link_events"]] == [
        (DEMO.index["w6"], DEMO.index["r1"], False), (DEMO.index["w6"], DEMO.index["r1"], True)]
    fig = R.figure([res["base"], *res["others"]], res["tick_t"], res["t0"], DEMO,
                   res["link_events"], res["t_end"])
    ax0, ax1, _ = fig.axes
    down, up = (e[0] - res["t0"] for e in res["link_events"])
    # the failure: a shaded span from its down to its up on every panel, named once
    for ax in fig.axes:
        spans = [(round(p.get_x(), 9), round(p.get_x() + p.get_width(), 9)) for p in ax.patches]
        assert (round(down, 9), round(up, 9)) in spans
    assert [t.get_text() for t in ax0.texts if "down" in t.get_text()] == [" r1-w6 down"]
    # exploration in percent, as the demo shows it
    assert "%" in ax1.get_ylabel()
    base_ex = np.asarray(res["base"].exploration) * 100
    assert np.allclose(ax1.get_lines()[0].get_ydata(), base_ex)
    # the legend beside the data, not on it; every variant its own style
    fig.canvas.draw()
    leg = ax0.get_legend()
    assert leg.get_window_extent().x0 >= ax0.get_window_extent().x1
    assert [t.get_text() for t in leg.get_texts()] == [
        "recorded", "engine.hysteresis.margin=0.3", "engine.explore.max_rate=0.02"]
    styles = {(ln.get_color(), str(ln.get_linestyle()), ln.get_linewidth()) for ln in ax1.get_lines()
              if len(ln.get_xdata()) > 2}
    assert len(styles) == 3
    # zero lines stay above the axis line; no negative tick
    for ax in fig.axes:
        assert ax.get_ylim()[0] < 0 and min(ax.get_yticks()) >= 0


def test_link_trace_export_is_the_least_latency_per_bin(tmp_path: Any) -> None:
    d = str(tmp_path / "state")
    synthetic(d)
    lt = str(tmp_path / "links.csv")
    R.replay_command(args_for(d, str(tmp_path / "o"), "--export-link-trace", lt,
                              "--link-trace-interval", "0.25"))
    # reference: the minimum of the journaled latencies of each link in each 0.25 s bin
    recs = [r for r in J.iter_records(J.journal_dir(d)) if "t" in r.body]
    t0 = recs[0].body["t"]
    want: dict[tuple[float, str, str], float] = {}
    for r in recs:
        if r.kind != "batch":
            continue
        h = J.batch_hops(r.body)
        b = math.floor((r.body["t"] - t0) / 0.25) * 0.25
        for x, y, lat in zip(h.src.tolist(), h.via.tolist(), h.latency.tolist()):
            key = (b, DEMO.nodes[x], DEMO.nodes[y])
            want[key] = min(want.get(key, math.inf), lat)
    with open(lt) as fh:
        got = {(float(r["t_s"]), r["from"], r["to"]): float(r["delay_s"]) for r in csv.DictReader(fh)}
    assert got == want
    from routerd.sim import linktrace

    tr = linktrace.load(lt, DEMO)
    assert len(tr.changes) == len(want)


# ---- errors -------------------------------------------------------------------------------
def test_clear_errors(tmp_path: Any, capsys: pytest.CaptureFixture[str]) -> None:
    d = str(tmp_path / "state")
    synthetic(d)
    out = str(tmp_path / "o")
    assert main(["replay", str(tmp_path / "nope"), "--out", out]) == 2
    assert "does not exist" in capsys.readouterr().err
    os.makedirs(tmp_path / "empty")
    assert main(["replay", str(tmp_path / "empty"), "--out", out]) == 2
    assert "neither journal/ nor journal segments" in capsys.readouterr().err
    assert main(["replay", d, "--out", out, "--set", "service.debounce_s=1",
                 "--set", "engine.step.alpha=3", "--set", "engine.explor.cap=0.1"]) == 2
    err = capsys.readouterr().err
    assert "service.debounce_s" in err and "not an engine setting" in err
    assert "engine.step.alpha" in err and "above 1" in err
    assert "engine.explor.cap" in err and "not a known setting" in err
    assert main(["replay", d, "--out", out, "--compare", "engine.optimum.guide=true"]) == 2
    assert "engine.optimum.guide: 'true' is the service's live optimality gap, not an engine " \
        "setting" in capsys.readouterr().err
    assert main(["replay", d, "--out", out, "--compare", "engine.explore.min_rate=0.5"]) == 2
    assert "explore_min" in capsys.readouterr().err
    other = tmp_path / "other.yaml"
    other.write_text("topology:\n  nodes: [a, b]\n  links:\n    - {between: [a, b], delay_s: 0.001, "
                     "capacity_bps: 1.0e6, buffer_pkts: 10}\n")
    assert main(["replay", d, "--out", out, "--topology", str(other)]) == 2
    err = capsys.readouterr().err
    assert DEMO.digest in err and "give the service's --topology" in err


def test_a_restart_on_another_topology_is_refused(tmp_path: Any) -> None:
    d = str(tmp_path / "state")
    synthetic(d)
    j = J.Journal(J.journal_dir(d))
    j.append("start", {"topology": "0123456789abcdef", "nodes": ["a", "b"], "epoch": 2})
    j.close()
    with pytest.raises(R.ReplayError, match="cannot be replayed: record .* written for topology 0123456789abcdef"):
        R.replay_command(args_for(d, str(tmp_path / "o")))


def test_retired_journal_without_snapshot_is_refused(tmp_path: Any) -> None:
    d = str(tmp_path / "state")
    synthetic(d)
    segs = J._segments(J.journal_dir(d))
    assert len(segs) == 1
    # make the journal start at record 50: rewrite records 50.. into a new segment
    recs = [r for r in J.iter_records(J.journal_dir(d)) if r.no >= 50]
    os.unlink(segs[0][1])
    j = J.Journal(J.journal_dir(d), start_after=49)
    for r in recs:
        j.append(r.kind, r.body)
    j.close()
    with pytest.raises(R.ReplayError, match="no intact snapshot covers"):
        R.replay_command(args_for(d, str(tmp_path / "o")))


def test_a_journal_with_no_readable_record_is_refused_without_naming_one(
        tmp_path: Any, capsys: pytest.CaptureFixture[str]) -> None:
    # an emptied segment and one whose header is overwritten: nothing is left, so the
    # message must not name a "first record left" (it said '' and 2)
    for name, damage in (("empty", b""), ("header", b"X" * 20)):
        d = str(tmp_path / name)
        synthetic(d)
        seg = J._segments(J.journal_dir(d))[0][1]
        if damage:
            with open(seg, "r+b") as fh:
                fh.write(damage)
        else:
            open(seg, "wb").close()
        assert main(["replay", d, "--out", str(tmp_path / "o"), "--no-plot"]) == 2
        err = capsys.readouterr().err
        assert "holds no journal record that can be replayed" in err, err
        assert "first journal record left" not in err and "''" not in err


def test_an_unreadable_state_dir_is_named_without_a_traceback(
        tmp_path: Any, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch) -> None:
    # another user's 0700 state dir (tests run as root here, so the refusal is simulated);
    # it ended in a PermissionError traceback from os.listdir
    d = str(tmp_path / "state")
    synthetic(d)
    real = os.listdir
    for denied in (J.journal_dir(d),):
        def listdir(path: Any = ".", denied: str = denied) -> list[str]:
            if os.path.abspath(str(path)) == os.path.abspath(denied):
                raise PermissionError(13, "Permission denied", str(path))
            return real(path)
        monkeypatch.setattr(os, "listdir", listdir)
        assert main(["replay", d, "--out", str(tmp_path / "o"), "--no-plot"]) == 2
        err = capsys.readouterr().err
        assert f"routerd replay: {denied}: Permission denied" in err, err
    monkeypatch.setattr(os, "listdir", real)


def test_an_earlier_replays_comparison_files_do_not_outlive_it(
        tmp_path: Any, capsys: pytest.CaptureFixture[str]) -> None:
    # a plain replay into the --out of a --compare run left its comparison.csv, pairs.csv
    # and tables-*.json beside the new replay.json, which describes no such variant
    d = str(tmp_path / "state")
    synthetic(d)
    out = tmp_path / "o"
    assert main(["replay", d, "--out", str(out), "--no-plot", "--quiet",
                 "--compare", "engine.hysteresis.margin=0.2"]) == 0
    first = {"comparison.csv", "pairs.csv", "tables-recorded.json",
             "tables-engine.hysteresis.margin=0.2.json"}
    assert first <= set(os.listdir(out))
    (out / "mine.txt").write_text("not replay's")
    capsys.readouterr()
    assert main(["replay", d, "--out", str(out), "--no-plot"]) == 0
    assert sorted(os.listdir(out)) == ["mine.txt", "replay.json", "tables.json", "ticks.csv"]
    assert "removed the earlier replay's comparison.csv" in capsys.readouterr().out


# ---- a real service --------------------------------------------------------------------------
SERVICE_CFG = """\
engine:
  step: {{mode: constant, alpha: 0.3}}
  hysteresis: {{margin: {margin}}}
service:
  debounce_s: 0.01
  publish_interval_s: 0.3
  snapshot_interval_s: 3600
  journal: {{segment_bytes: 4096}}
"""
# Snapshots come from the control op and the final one at each stop only: with periodic
# ones, a slow second run (a busy machine) took enough of them to retire its own start and
# reload records, which this test replays (3 snapshots are kept; segments before the
# oldest go).


def feed(sp: ServiceProc, rng: np.random.Generator, batches: int, slow: int | None = None) -> None:
    rep = client.Reporter(sp.endpoints["ingest"], f"feeder-{rng.integers(1 << 30)}",
                          topology_nodes=DEMO, batch_rows=80)
    try:
        for _ in range(batches):
            rep.add_hops(*rows(DEMO, rng, 80, slow))
            rep.flush()
            time.sleep(0.02)
    finally:
        rep.close()


@pytest.mark.slow
def test_service_run_journal_replay_gives_identical_tables(base: str, tmp_path: Any) -> None:
    cfg = os.path.join(base, "c.yaml")
    with open(cfg, "w") as fh:
        fh.write(SERVICE_CFG.format(margin=0.05))
    rng = np.random.default_rng(5)
    trunk = DEMO.link("w3", "e3")
    # first run: batches, a control link override, a control snapshot, a reload (SIGHUP)
    sp = ServiceProc(base, service_args(base, "--config", cfg))
    try:
        feed(sp, rng, 25)
        ctl = sp.endpoints["control"]
        assert client.control(ctl, {"op": "link", "from": "w6", "to": "r1", "state": "down"})["link"]["changed"]
        feed(sp, rng, 10)
        assert "snapshot" in client.control(ctl, {"op": "snapshot"}, timeout_s=5)
        feed(sp, rng, 10, slow=trunk)
        sp.signal(signal.SIGTERM)
        assert sp.wait(20) == 0
    finally:
        sp.kill()
    # second run on the same state dir: start-up recovery from the snapshot, then more
    sp = ServiceProc(base, service_args(base, "--config", cfg))
    try:
        assert any("restored snapshot at record" in ln for ln in sp.stdout_lines)
        sub = client.TableSubscriber(sp.endpoints["publish"])
        feed(sp, rng, 20, slow=trunk)
        client.control(sp.endpoints["control"], {"op": "link", "from": "w6", "to": "r1", "state": "up"})
        # a reload (SIGHUP): journaled as a config record that replay applies in its place
        with open(cfg, "w") as fh:
            fh.write(SERVICE_CFG.format(margin=0.1))
        sp.signal(signal.SIGHUP)
        deadline = time.monotonic() + 10
        while not any("reloaded" in ln for ln in sp.stderr_lines) and time.monotonic() < deadline:
            time.sleep(0.05)
        feed(sp, rng, 8)
        time.sleep(0.2)                                     # > debounce: the last batch is decided
        live = client.control(sp.endpoints["control"], {"op": "tables"})
        sub.poll(0.8)                                       # > publish_interval: every node again
        sp.signal(signal.SIGTERM)
        assert sp.wait(20) == 0
        sub.poll(1.0)                                       # the final publication
        published = dict(sub.tables)
        sub.close()
    finally:
        sp.kill()
    jdir = J.journal_dir(sp.state_dir)
    assert J._segments(jdir)[0][0] > 1, "snapshots should have retired the first segments"
    kinds = [r.kind for r in J.iter_records(jdir)]
    assert "start" in kinds and "config" in kinds and "link" in kinds and "tick" in kinds
    out1, out2 = str(tmp_path / "r1"), str(tmp_path / "r2")
    r1 = R.replay_command(args_for(sp.state_dir, out1, "--config", cfg))
    with open(os.path.join(out1, "tables.json")) as fh:
        got = json.load(fh)
    assert got == live                                      # the control reply, bit for bit
    assert got["tables"] == published                       # and what was published last
    assert r1["info"]["rows_refused_on_replay"] == 0 and r1["info"]["journal_stopped"] is None
    assert r1["info"]["configs"] == 1 and r1["info"]["ticks"] > 10
    assert "snapshot" in r1["info"]["started_from"]
    # the service's own config changes nothing; without --config the result is the same
    R.replay_command(args_for(sp.state_dir, out2))
    for f in ("tables.json", "ticks.csv"):
        with open(os.path.join(out1, f), "rb") as a, open(os.path.join(out2, f), "rb") as b:
            assert a.read() == b.read(), f


def test_torn_journal_tail_is_reported_and_the_rest_replayed(tmp_path: Any,
                                                             capsys: pytest.CaptureFixture[str]) -> None:
    d = str(tmp_path / "state")
    w = synthetic(d)
    seg = J._segments(J.journal_dir(d))[-1][1]
    size = os.path.getsize(seg)
    with open(seg, "ab") as fh:
        fh.write(b"RJ\x00\x00\xff\x00")          # half a record header: a write cut short
    assert main(["replay", d, "--out", str(tmp_path / "o"), "--no-plot"]) == 0
    out = capsys.readouterr().out
    assert f"ends early in {os.path.basename(seg)} at byte {size}" in out
    with open(tmp_path / "o" / "tables.json") as fh:
        assert json.load(fh)["tables"] == wire.tables_by_name(w.eng)
    assert os.path.getsize(seg) == size + 6       # read-only: the journal is left as it was


def test_split_mode_journal_reproduced_bit_for_bit(tmp_path: Any) -> None:
    # engine.mode=split: its link and key rate state changes only through journaled
    # batches (with their t), link events and ticks, so replay gives the same tables and
    # the same state, bit for bit
    d = str(tmp_path / "state")
    w = synthetic(d, E.EngineSettings(mode="split"))
    out = str(tmp_path / "o1")
    R.replay_command(args_for(d, out))
    with open(os.path.join(out, "tables.json")) as fh:
        assert json.load(fh) == {"v": 1, "tables": wire.tables_by_name(w.eng)}
    eng2 = E.Engine(DEMO, E.EngineSettings(mode="split"))
    J.replay_into(eng2, J.iter_records(J.journal_dir(d)))
    assert eng2.same_state(w.eng) and eng2._split is not None
