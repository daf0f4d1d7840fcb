"""`routerd demo` (routerd/tools/demo.py): completes in its time bound, writes every file it
promises, draws real plots, and leaves nothing behind when interrupted."""
from __future__ import annotations

import argparse
import json
import math
import os
import re
import signal
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from routerd.tools import demo

#: the issue's bound for the whole command, on this class of machine (2 cores)
TIME_BOUND_S = 60.0


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    try:  # a zombie has exited
        with open(f"/proc/{pid}/stat") as fh:
            return fh.read().split(")")[-1].split()[0] != "Z"
    except OSError:
        return False


def _service_pids_for(out: Path) -> list[int]:
    """Processes whose command line names this demo's state directory."""
    key = str(out / "state").encode()
    found = []
    for d in os.listdir("/proc"):
        if d.isdigit():
            try:
                with open(f"/proc/{d}/cmdline", "rb") as fh:
                    if key in fh.read():
                        found.append(int(d))
            except OSError:
                pass
    return [p for p in found if _alive(p)]


def _assert_real_png(path: Path) -> None:
    """Decodes with matplotlib's own reader and is not blank: many distinct colours and
    a real spread of pixel values (a blank or single-colour canvas has neither)."""
    import matplotlib.image as mpimg

    img = mpimg.imread(str(path))
    assert img.ndim == 3 and img.shape[0] >= 300 and img.shape[1] >= 400, img.shape
    rgb = img[..., :3].reshape(-1, 3)
    assert float(rgb.std()) > 0.05
    colours = np.unique((rgb * 255).astype(np.uint8), axis=0)
    assert len(colours) > 50
    # not mostly background: at least 2% of the pixels differ from pure white
    assert float((rgb.min(axis=1) < 0.95).mean()) > 0.02


# ---- fast: the parts --------------------------------------------------------------------
def test_scenario_is_stretched_to_the_duration() -> None:
    doc = demo.stretched_scenario(60.0)
    sc = doc["scenario"]
    links = sc["links"]
    assert [e["at_s"] for e in links] == [30.0, 42.0]     # 15 s and 21 s of the 30 s script
    assert sc["load"][1]["from_s"] == 8.0 and sc["load"][1]["to_s"] == 20.0
    from routerd.io import scenario

    s = scenario.from_mapping(doc)
    assert s.max_factor() == 1.0 and float(s.factor(0.0)) == 0.4


def test_bad_options_are_refused(capsys: Any) -> None:
    ns = argparse.Namespace(out="x", duration=0.5, seed=1, speed=1.0)
    assert demo.run(ns) == 2
    assert "--duration: 0.5 must be between 2 and 3600" in capsys.readouterr().err
    # refused before the service starts (it ended in numpy's traceback after the live run)
    ns = argparse.Namespace(out="x", duration=30.0, seed=-1, speed=1.0)
    assert demo.run(ns) == 2
    assert "--seed: -1 must be >= 0" in capsys.readouterr().err


def _figures(sh_mean: float, q_mean: float, sv_mean: float, sv_lost_fail: int) -> dict[str, Any]:
    base = {"p99_delivery_s": 0.02, "delivered": 100, "offered": 100, "lost": 0, "lost_share": 0.0,
            "lost_during_failure": 0, "peak_mean_delivery_s": 0.01, "trunk_util_peak": 0.5,
            "detour_share": 0.6, "route_changes": 10.0, "exploration_share": 0.01}
    return {"peak_from_s": 10.0, "peak_rate_pps": 1300.0, "hall_pairs_static_on_trunk": 1.0,
            "failures": [{"link": "w3-w4", "down_s": 15.0, "up_s": 21.0}],
            "shortest": {**base, "mean_delivery_s": sh_mean, "trunk_util_peak": 1.0, "lost": 50,
                         "lost_share": 0.5, "lost_during_failure": 40},
            "qrouting": {**base, "mean_delivery_s": q_mean},
            "service": {**base, "mean_delivery_s": sv_mean, "lost_during_failure": sv_lost_fail}}


def test_reading_follows_the_figures() -> None:
    d = demo.Demo("/nonexistent", 30.0, 1, 1.0)
    good = d.reading(_figures(0.0447, 0.0063, 0.0064, 0))
    assert "44.7 ms" in good and "7.1 times faster than static routes" in good and "saturated" in good
    assert "every hall-to-hall packet over the trunk" in good
    assert "1.6% above the in-process learner — the same behaviour" in good
    assert "40 of them while w3-w4 was down" in good
    assert "lost 50 packets (50.0% of those offered)" in good
    bad = d.reading(_figures(0.0060, 0.0063, 0.0090, 12))
    assert "did no better here" in bad and "a real difference" in bad
    assert "lost 12 packets against 0 in process" in bad
    assert good != bad


def test_reading_gives_the_services_optimality_gap_or_why_not() -> None:
    d = demo.Demo("/nonexistent", 30.0, 1, 1.0)
    figs = _figures(0.0447, 0.0063, 0.0064, 0)
    assert "optimum" not in d.reading(figs)
    figs["optimum"] = {"available": True, "demand_pps": 1234.4, "optimal_delay_s": 0.0041,
                       "published_delay_s": 0.00533, "gap_ratio": 0.00533 / 0.0041, "age_s": 1.2,
                       "published_reason": None}
    text = d.reading(figs)
    assert "1234 packets/s" in text and "optimum's mean delay at 4.1 ms" in text
    assert "published tables' at 5.3 ms: 1.30 times the optimum" in text
    figs["optimum"] = {"available": False, "reason": "no_demand"}
    assert "not available at the end: it had measured no demand" in d.reading(figs)
    figs["optimum"] = {**figs["optimum"], "available": True, "demand_pps": 10.0,
                       "optimal_delay_s": 0.004, "published_delay_s": None, "gap_ratio": None,
                       "published_reason": "a link at or over capacity"}
    assert "could not rate its published tables (a link at or over capacity)" in d.reading(figs)


def test_progress_plain_lines_when_not_a_terminal() -> None:
    import io

    buf = io.StringIO()
    p = demo.Progress(30.0, buf)
    view = {"t_s": 3.0, "delivered": 120, "dropped": 2, "ttl_expired": 1, "in_network": 4,
            "deliveries": [0.005, 0.006, 0.007]}
    p.show(p.line(view, 17, 0.025, 0.5, "link w3-w4 DOWN since 2 s"))
    out = buf.getvalue()
    assert out.endswith("\n") and "\r" not in out
    assert "t   3.0/30 s" in out and "delivered     120" in out and "lost     3" in out
    assert "mean    6.0 ms" in out and "route changes    17" in out and "exploring  2.5%" in out
    assert "trunk  50%" in out and "w3-w4 DOWN" in out


# ---- the figures and the table, from in-process runs (no service) -----------------------------
@pytest.fixture(scope="module")
def offline(tmp_path_factory: Any) -> demo.Demo:
    """A Demo whose four results are in-process runs (the 'service' one: qrouting with
    another seed, so its line differs a little from the in-process learner's)."""
    from routerd.io import scenario, topofiles
    from routerd.sim.run import DEMO_TOPOLOGY

    dur = 8.0
    d = demo.Demo(str(tmp_path_factory.mktemp("demo")), dur, 1, 1.0)
    d.scenario_doc = demo.stretched_scenario(dur)
    d.scenario = scenario.from_mapping(d.scenario_doc)
    d.topo = topofiles.load(DEMO_TOPOLOGY)
    d.link_events = [(c.at_s, c.action, c.ends[0]) for c in d.scenario.links]
    for pol in ("shortest", "reroute", "qrouting"):
        d.results[pol] = d.run_in_process(pol)
    d.seed = 2
    d.results["service"] = d.run_in_process("qrouting")
    d.seed = 1
    return d


def _style(line: Any) -> tuple[Any, ...]:
    return (line.get_color(), str(line.get_linestyle()), line.get_marker(),
            line.get_linewidth(), line.get_markerfacecolor())


def test_delivery_figure_mean_p99_and_losses_with_distinct_lines(offline: demo.Demo) -> None:
    import matplotlib.figure

    fig = offline.delivery_figure()
    assert isinstance(fig, matplotlib.figure.Figure)
    ax, axp, ax2 = fig.axes
    assert "mean" in ax.get_ylabel() and "p99" in axp.get_ylabel() and "lost" in ax2.get_ylabel()
    # every policy has a line on each panel, and no two look alike
    for a in (ax, axp, ax2):
        styles = [_style(ln) for ln in a.get_lines() if ln.get_xydata().shape[0] > 2]
        assert len(styles) >= 3 and len(set(styles)) == len(styles)
    # per-second p99 from the runs themselves
    se = offline.results["qrouting"]["series"]
    assert len(se["p99_delivery_s"]) == len(se["t_s"])
    p99 = np.asarray(se["p99_delivery_s"], dtype=float)
    md = np.asarray(se["mean_delivery_s"], dtype=float)
    ok = np.isfinite(p99) & np.isfinite(md)
    assert ok.sum() >= 6 and (p99[ok] >= md[ok]).all()
    # log axes in ms whose ticks read as plain numbers (1, 2, 5, 10 ...), not powers of ten
    fig.canvas.draw()
    for a in (ax, axp):
        assert a.get_yscale() == "log"
        labels = [t.get_text() for t in a.get_yticklabels() if t.get_text()]
        assert len(labels) >= 3
        for lb in labels:
            assert "$" not in lb and "^" not in lb, lb
            float(lb)
        assert {"5", "10", "20"} <= set(labels)
    # the loss panel holds zero lines above its axis line and has no negative tick
    assert ax2.get_ylim()[0] < 0 and min(ax2.get_yticks()) >= 0
    # the time axis: 0 to the run's length; the legend off the data
    assert ax2.get_xlim() == (0.0, offline.duration)
    leg = ax.get_legend()
    assert leg.get_window_extent().x0 >= ax.get_window_extent().x1
    assert any("delivered packets only" in t.get_text() for t in leg.get_texts())


def test_load_figure_agrees_with_delivery_on_time_and_shows_unclipped_utilisation(
        offline: demo.Demo) -> None:
    dfig, lfig = offline.delivery_figure(), offline.load_figure()
    ax, ax2 = lfig.axes
    # the two figures' time axes: the same limits and the same horizontal place
    assert ax2.get_xlim() == dfig.axes[-1].get_xlim() == (0.0, offline.duration)
    for a in lfig.axes:
        for b in dfig.axes:
            assert a.get_position().x0 == pytest.approx(b.get_position().x0)
            assert a.get_position().x1 == pytest.approx(b.get_position().x1)
    assert lfig.get_figwidth() == dfig.get_figwidth()
    # a time series is titled as one
    title = ax.get_title()
    assert "load curve" not in title and "over time" in title
    # trunk utilisation is drawn as measured (never clipped; at most 100% by construction)
    topo = offline.topo
    trunk = [topo.link(*demo.TRUNK), topo.link(demo.TRUNK[1], demo.TRUNK[0])]
    lines = [ln for ln in ax2.get_lines() if ln.get_xydata().shape[0] > 2]
    for pol, ln in zip(demo.POLICIES, lines):
        u = np.asarray(offline.results[pol]["series"]["link_util"], dtype=float)
        assert np.array_equal(ln.get_ydata(), u[:, trunk].max(axis=1) * 100)
        assert ln.get_ydata().max() <= 100.0 + 1e-9
    styles = [_style(ln) for ln in lines]
    assert len(set(styles)) == len(demo.POLICIES) == 4
    assert ax.get_ylim()[0] == 0 and ax2.get_ylim() == (0.0, 105.0)
    lfig.canvas.draw()
    leg = ax.get_legend()
    assert leg.get_window_extent().x0 >= ax.get_window_extent().x1


def test_table_puts_the_lost_share_beside_the_means(offline: demo.Demo) -> None:
    figs = offline.figures()
    rows = offline.table(figs)
    names = [n for n, _ in rows]
    i = names.index("mean delivery (ms)")
    assert names[i + 2].strip() == "lost (% of offered)"
    j = names.index("mean delivery at peak load (ms)")
    assert "lost at peak load" in names[j + 1]
    sh = figs["shortest"]
    assert sh["lost_share"] == pytest.approx(sh["lost"] / sh["offered"])
    assert 0 <= figs["qrouting"]["trunk_util_peak"] <= 1.0 + 1e-9
    assert 0 <= sh["trunk_util_peak"] <= 1.0 + 1e-9
    reading = offline.reading(figs)
    if sh["lost"]:
        assert "of those offered" in reading and "count only the packets that arrived" in reading


def test_lost_share_is_never_rounded_to_zero() -> None:
    assert demo._pct_lost(0.0) == "0%"
    assert demo._pct_lost(1 / 33522) == "0.003%"
    assert demo._pct_lost(0.056) == "5.6%"
    assert demo._pct_lost(math.nan) == "n/a"


# ---- slow: the whole command --------------------------------------------------------------
@pytest.mark.slow
def test_demo_completes_in_time_and_writes_every_file(tmp_path: Path) -> None:
    out = tmp_path / "demo-out"
    t0 = time.monotonic()
    cp = subprocess.run([sys.executable, "-m", "routerd", "demo", "--out", str(out)],
                        capture_output=True, text=True, timeout=180, check=False)
    took = time.monotonic() - t0
    assert cp.returncode == 0, cp.stdout[-3000:] + cp.stderr[-3000:]
    assert took < TIME_BOUND_S, f"the demo took {took:.1f} s (bound {TIME_BOUND_S:g} s)"
    for rel in demo.FILES:
        f = out / rel
        assert f.is_file() and f.stat().st_size > 0, rel
    for png in ("delivery.png", "load.png"):
        _assert_real_png(out / png)
    doc = json.loads((out / "summary.json").read_text())
    assert doc["demo"]["interrupted"] is False
    assert set(doc["summaries"]) == set(demo.POLICIES)
    sv = doc["summaries"]["service"]
    assert sv["policy"] == "service" and sv["delivered"] > 10_000
    # the only rows refused are hops that were on the wire when w3-w4 went down (they
    # arrive after the link-down report): a handful, as in process
    assert sv["policy_service_rows_rejected"] == sv.get("policy_service_rows_rejected_link_down", 0)
    assert sv["policy_service_rows_rejected"] <= 100
    # the same packets were offered to all three (same scenario and seed)
    assert len({doc["summaries"][p]["offered"] for p in demo.POLICIES}) == 1
    # the reading quotes the figures it was computed from
    reading = (out / "reading.txt").read_text()
    f = doc["figures"]
    for pol in demo.POLICIES:
        assert f"{f[pol]['mean_delivery_s'] * 1e3:.1f} ms" in reading
    assert reading.strip() == doc["reading"]
    # the printed table and where to find the service's state and metrics
    assert "shortest (static)" in cp.stdout and "service (live, ZeroMQ)" in cp.stdout
    assert f"service state (journal and snapshots): {out / 'state'}" in cp.stdout
    assert re.search(r"metrics were served at http://127\.0\.0\.1:\d+/metrics", cp.stdout)
    assert any((out / "state" / "snapshots").iterdir()), "no final snapshot"
    # the metrics page the service served parses with prometheus_client's own parser
    from prometheus_client.parser import text_string_to_metric_families

    fams = {m.name: m for m in text_string_to_metric_families((out / "metrics.prom").read_text())}
    acc = [s.value for s in fams["routerd_observations"].samples
           if s.name == "routerd_observations_total" and s.labels.get("result") == "accepted"]
    # (the page counts hop rows; the acknowledgements count the link rows too)
    assert sv["policy_service_link_rows_sent"] == 4        # w3-w4 down and up, both ways
    assert acc and acc[0] == sv["policy_service_rows_accepted"] - 4
    # one live line per simulated second, plain lines when stdout is not a terminal
    lines = [ln for ln in cp.stdout.splitlines() if ln.startswith("t ")]
    assert len(lines) == int(doc["demo"]["duration_s"])
    assert "\r" not in cp.stdout
    # nothing left running
    pid = doc["service"]["pid"]
    assert isinstance(pid, int) and not _alive(pid)
    assert _service_pids_for(out) == []
    csv_rows = (out / "comparison.csv").read_text().splitlines()
    assert csv_rows[0].startswith("figure,shortest (static),qrouting (in process)")
    assert not math.isnan(f["service"]["trunk_util_peak"])
    # the replay command the demo prints works as printed (the state dir carries its own
    # topology and config: no --topology needed)
    hint = re.search(r"offline \(or try other settings with --compare KEY=VALUE\): (routerd replay .+)$",
                     cp.stdout, re.M)
    assert hint, cp.stdout[-2000:]
    words = hint.group(1).split()
    assert "--topology" not in words
    rp = subprocess.run([sys.executable, "-m", "routerd", *words[1:], "--no-plot", "--quiet"],
                        capture_output=True, text=True, timeout=180, check=False)
    assert rp.returncode == 0, rp.stdout[-2000:] + rp.stderr[-2000:]
    assert (out / "replay").is_dir() and any((out / "replay").iterdir())


@pytest.mark.slow
def test_demo_sigint_leaves_no_process_and_writes_partial_results(tmp_path: Path) -> None:
    out = tmp_path / "demo-int"
    proc = subprocess.Popen([sys.executable, "-m", "routerd", "demo", "--out", str(out),
                             "--duration", "30"], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    service_pid = None
    try:
        assert proc.stdout is not None
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline:
            ln = proc.stdout.readline()
            if not ln:
                break
            m = re.search(r"routerd serve, pid (\d+)", ln)
            if m:
                service_pid = int(m.group(1))
            if ln.startswith("t   3.0/"):
                break
        assert service_pid is not None and _alive(service_pid)
        proc.send_signal(signal.SIGINT)
        rest, err = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait(10)
    assert proc.returncode == 130, err
    assert "interrupted" in err
    deadline = time.monotonic() + 10
    while time.monotonic() < deadline and _alive(service_pid):
        time.sleep(0.1)
    assert not _alive(service_pid)
    assert _service_pids_for(out) == []
    for rel in demo.PARTIAL_FILES:
        assert (out / rel).is_file() and (out / rel).stat().st_size > 0, rel
    doc = json.loads((out / "summary.json").read_text())
    assert doc["demo"]["interrupted"] is True
    part = json.loads((out / "runs" / "service" / "summary.json").read_text())
    assert part["interrupted"] is True and 3.0 <= part["reached_s"] < 30.0
    assert part["delivered"] > 0 and part["mean_delivery_s"] > 0
    series = (out / "runs" / "service" / "series.csv").read_text().splitlines()
    assert len(series) - 1 == int(part["reached_s"])
    _assert_real_png(out / "delivery.png")
    # the service stopped in order: its shutdown snapshot is there
    assert any((out / "state" / "snapshots").iterdir())
    assert "partial results in" in rest


def test_out_dir_earlier_demo_replaced_other_content_refused(tmp_path: Path) -> None:
    from routerd.core.errors import InputError

    old = tmp_path / "old"
    (old / "state" / "journal").mkdir(parents=True)
    (old / "state" / "journal" / "from-000000000001.rdj").write_bytes(b"x")
    (old / "scenario.yaml").write_text("scenario: {}\n")
    (old / "delivery.png").write_bytes(b"png")
    (old / "notes.txt").write_text("mine")
    demo.Demo(str(old), 30.0, 1, 1.0)._prepare_out()
    # the old service state would have seeded the new run: gone, with the old results
    assert not (old / "state").exists() and not (old / "delivery.png").exists()
    assert (old / "notes.txt").read_text() == "mine"      # not the demo's: kept
    other = tmp_path / "other"
    other.mkdir()
    (other / "data.csv").write_text("1\n")
    with pytest.raises(InputError, match="holds no earlier demo"):
        demo.Demo(str(other), 30.0, 1, 1.0)._prepare_out()
    assert (other / "data.csv").exists()
