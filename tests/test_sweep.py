"""``routerd sweep`` (sim/commands_sweep.py): the table, the aggregation over seeds, the
plot, determinism across worker counts, and bad input."""
from __future__ import annotations

import csv
import json
import math
import os

import numpy as np
import pytest

from routerd.sim import commands_sweep as sw
from routerd.tools import cli
from sim_helpers import FakeTerminal as _Stream

ARGS = ["sweep", "--rates", "300,1500", "--policies", "shortest,mindelay", "--seeds", "2",
        "--duration", "3", "--jobs", "2", "--quiet"]


@pytest.fixture(scope="module")
def small_sweep(tmp_path_factory: pytest.TempPathFactory) -> str:
    out = str(tmp_path_factory.mktemp("sweep"))
    assert cli.main(ARGS + ["--out", out]) == 0
    return out


def test_table_has_one_row_per_run(small_sweep: str) -> None:
    with open(os.path.join(small_sweep, "sweep.csv"), newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert len(rows) == 2 * 2 * 2
    assert {(r["policy"], float(r["rate_pps"]), int(r["seed"])) for r in rows} == {
        (p, r, s) for p in ("shortest", "mindelay") for r in (300.0, 1500.0) for s in (1, 2)}
    head = list(rows[0])
    assert head[: len(sw.LEAD)] == list(sw.LEAD)
    for r in rows:
        assert int(r["offered"]) > 0 and float(r["mean_delivery_s"]) > 0
    # mindelay's model figure is in its rows only
    assert all(r["policy_mindelay_model_delay_s"] for r in rows if r["policy"] == "mindelay")
    assert not any(r["policy_mindelay_model_delay_s"] for r in rows if r["policy"] == "shortest")
    with open(os.path.join(small_sweep, "sweep.json")) as fh:
        doc = json.load(fh)
    assert len(doc["runs"]) == 8 and len(doc["points"]) == 4
    assert doc["sweep"]["seeds"] == 2 and doc["sweep"]["rates_pps"] == [300.0, 1500.0]
    csv_means = sorted(float(r["mean_delivery_s"]) for r in rows)
    json_means = sorted(r["mean_delivery_s"] for r in doc["runs"])
    assert csv_means == pytest.approx(json_means, rel=1e-8)


def test_points_are_seed_means_with_t_intervals(small_sweep: str) -> None:
    with open(os.path.join(small_sweep, "sweep.json")) as fh:
        doc = json.load(fh)
    for p in doc["points"]:
        xs = [r["mean_delivery_s"] for r in doc["runs"]
              if r["policy"] == p["policy"] and r["rate_pps"] == p["rate_pps"]]
        assert len(xs) == 2
        mu = sum(xs) / 2
        sd = math.sqrt(sum((x - mu) ** 2 for x in xs))  # n - 1 = 1
        # independent replications (Law & Kelton, ch. 9): mu ± t(0.975, 1) s / sqrt(2)
        assert p["mean_delivery_s"] == pytest.approx(mu)
        assert p["ci95_s"] == pytest.approx(sw.t975(1) * sd / math.sqrt(2))
        assert p["ci_basis"] == "seeds"
    by = {(p["policy"], p["rate_pps"]): p for p in doc["points"]}
    # the demo lab's trunk saturates under shortest paths at 1500/s; the optimum does not
    assert by[("shortest", 1500.0)]["mean_delivery_s"] > 3 * by[("mindelay", 1500.0)]["mean_delivery_s"]


def test_png_decodes_and_is_not_blank(small_sweep: str) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.image as mpimg

    img = mpimg.imread(os.path.join(small_sweep, "sweep.png"))
    assert img.ndim == 3 and img.shape[0] > 300 and img.shape[1] > 300
    rgb = img[..., :3]
    assert rgb.std() > 0.05
    # both policies' line colours are drawn
    for hexcol in (sw.COLOURS["shortest"], sw.COLOURS["mindelay"]):
        want = np.array([int(hexcol[i:i + 2], 16) / 255 for i in (1, 3, 5)])
        close = np.all(np.abs(rgb - want) < 0.04, axis=2)
        assert close.sum() > 50, hexcol


def test_student_t_table_against_the_distribution() -> None:
    # Student's t density f(t) = Γ((ν+1)/2) / (sqrt(νπ) Γ(ν/2)) (1 + t²/ν)^(-(ν+1)/2)
    # (Abramowitz & Stegun 26.7.1); the tabulated t(0.975, ν) must have CDF 0.975 to the
    # table's three decimals.
    for nu in range(1, len(sw.T975) + 1):
        t = sw.t975(nu)
        c = math.gamma((nu + 1) / 2) / (math.sqrt(nu * math.pi) * math.gamma(nu / 2))
        xs = np.linspace(0.0, t, 200001)
        pdf = c * (1 + xs**2 / nu) ** (-(nu + 1) / 2)
        cdf = 0.5 + float(np.sum((pdf[1:] + pdf[:-1]) * 0.5 * np.diff(xs)))
        assert abs(cdf - 0.975) <= 0.0005 * pdf[-1] + 1e-7, (nu, cdf)
    assert sw.t975(1000) == 1.96


def test_results_do_not_depend_on_the_worker_count() -> None:
    specs = [{"policy": p, "rate_pps": r, "seed": s, "duration_s": 2.0, "series": False}
             for p in ("qrouting", "ecmp") for r in (400.0,) for s in (1, 2)]
    one = sw.run_grid(specs, jobs=1)
    two = sw.run_grid(specs, jobs=2)
    strip = [{k: v for k, v in r.items() if k != "wall_s"} for r in one]
    assert strip == [{k: v for k, v in r.items() if k != "wall_s"} for r in two]
    assert [(r["policy"], r["seed"]) for r in one] == [(s["policy"], s["seed"]) for s in specs]


def test_a_failing_run_is_recorded_and_the_rest_kept() -> None:
    rows = sw.run_grid([{"policy": "shortest", "rate_pps": 200.0, "seed": 1, "duration_s": 1.0,
                         "series": False},
                        {"policy": "shortest", "rate_pps": 200.0, "seed": 2, "duration_s": 1.0,
                         "series": False, "topology": "/no/such/file.yaml"}], jobs=1)
    assert "error" not in rows[0] and "does not exist" in rows[1]["error"]
    pts = sw.aggregate(rows)
    assert len(pts) == 1 and pts[0]["runs"] == 1 and pts[0]["ci_basis"] == "batch_means"


def test_bad_input_is_reported_before_anything_runs(tmp_path: os.PathLike[str],
                                                    capsys: pytest.CaptureFixture[str]) -> None:
    out = os.path.join(str(tmp_path), "o")
    rc = cli.main(["sweep", "--rates", "100,fast", "--policies", "shortest,psychic", "--seeds", "0",
                   "--out", out])
    err = capsys.readouterr().err
    assert rc == 2
    assert "--rates[1]: 'fast' is not a number" in err
    assert "'psychic' is not a policy" in err
    assert "--seeds: 0 must be >= 1" in err
    assert not os.path.exists(out)
    # a negative first seed failed every run with numpy's "expected non-negative integer"
    rc = cli.main(["sweep", "--rates", "100", "--first-seed", "-3", "--out", out])
    assert rc == 2 and "--first-seed: -3 must be >= 0" in capsys.readouterr().err
    assert not os.path.exists(out)
    rc = cli.main(["sweep", "--rate-range", "500:100:4", "--out", out])
    assert rc == 2 and "FIRST <= LAST" in capsys.readouterr().err
    rc = cli.main(["sweep", "--rates", "100", "--topology", "/no/such.yaml", "--out", out])
    assert rc == 2 and "does not exist" in capsys.readouterr().err


def test_rate_range_and_policy_lists() -> None:
    assert sw.parse_rates(None, "100:400:4") == [100.0, 200.0, 300.0, 400.0]
    assert sw.parse_rates("400, 100,400", None) == [100.0, 400.0]
    assert sw.parse_policies("qrouting,shortest,qrouting") == ["qrouting", "shortest"]


def test_progress_bar_only_after_a_few_seconds() -> None:
    quiet = _Stream(tty=True)
    bar = sw.ProgressBar(10, stream=quiet, after_s=60.0)
    for i in range(1, 11):
        bar.update(i)
    bar.close()
    assert quiet.getvalue() == ""
    log = _Stream(tty=False)
    bar = sw.ProgressBar(10, stream=log, after_s=0.0)
    for i in range(1, 11):
        bar.update(i)
    bar.close()
    lines = log.getvalue().splitlines()
    assert lines[-1].startswith("100%  10/10 runs")
    assert len(lines) == 10 and "\r" not in log.getvalue()
    term = _Stream(tty=True)
    bar = sw.ProgressBar(4, stream=term, after_s=0.0)
    bar.update(4)
    bar.close()
    assert term.getvalue().startswith("\r[") and term.getvalue().endswith("\n")


def test_terminal_table_shows_losses() -> None:
    pts = [{"policy": "shortest", "rate_pps": 300.0, "mean_delivery_s": 0.0054, "ci95_s": 0.0002,
            "lost_fraction": 0.239},
           {"policy": "qrouting", "rate_pps": 300.0, "mean_delivery_s": 0.0069, "ci95_s": 0.0001,
            "lost_fraction": 0.0},
           {"policy": "qrouting", "rate_pps": 900.0, "mean_delivery_s": math.nan, "ci95_s": math.nan,
            "lost_fraction": 1.0}]
    text = sw.text_table(pts)
    lines = text.splitlines()
    # a lost column beside each policy's mean
    assert lines[0].split() == ["shortest", "qrouting"]
    assert lines[1].split() == ["rate", "pkt/s", "mean", "±", "95%", "lost", "mean", "±", "95%", "lost"]
    assert lines[2].split() == ["300", "5.40±0.20", "ms", "23.9%", "6.90±0.10", "ms", "0%"]
    assert lines[3].split() == ["900", "n/a", "n/a", "n/a", "100.0%"]
    # and it says what ± is
    assert lines[-2].startswith("± = half-width of the mean's 95% confidence interval")
    assert "delivered packets only" in lines[-1]


def _pts(spread: float) -> list[dict]:
    # made-up points: qrouting's interval at 900/s reaches below zero; shortest loses
    # packets at 900/s
    return [
        {"policy": "shortest", "rate_pps": 300.0, "mean_delivery_s": 0.005, "ci95_s": 0.001,
         "lost_fraction": 0.0, "ci_basis": "seeds"},
        {"policy": "shortest", "rate_pps": 900.0, "mean_delivery_s": 0.040, "ci95_s": 0.004,
         "lost_fraction": 0.12, "ci_basis": "seeds"},
        {"policy": "qrouting", "rate_pps": 300.0, "mean_delivery_s": 0.006, "ci95_s": 0.001,
         "lost_fraction": 0.0, "ci_basis": "seeds"},
        {"policy": "qrouting", "rate_pps": 900.0, "mean_delivery_s": 0.010, "ci95_s": spread,
         "lost_fraction": 0.0, "ci_basis": "seeds"}]


META = {"topology_name": "demo-lab", "seeds": 2, "duration_s": 3.0}


def test_sweep_figure_band_never_below_zero_and_says_what_it_is() -> None:
    from matplotlib.collections import PolyCollection

    fig = sw.figure(_pts(0.025), META)
    ax, ax2 = fig.axes
    bands = [c for c in ax.collections if isinstance(c, PolyCollection)]
    assert len(bands) == 2
    for b in bands:
        ys = np.concatenate([p.vertices[:, 1] for p in b.get_paths()])
        assert ys.min() >= 0.0
    assert ax.get_ylim()[0] >= 0
    # the cut is said, and so is what the band (and the table's ±) is
    assert any("band cut at 0" in t.get_text() for t in ax.texts)
    assert "95% confidence interval of the mean over 2 seeds" in ax.get_title()
    assert "delivered packets only" in ax.get_ylabel()
    # shortest's lossy point is ringed, and the legend says what a ring means
    rings = [ln for ln in ax.get_lines() if ln.get_marker() == "o" and ln.get_linestyle() == "None"]
    assert len(rings) == 1 and list(rings[0].get_xdata()) == [900.0]
    fig.canvas.draw()
    leg = ax.get_legend()
    assert any("delivered ones only" in t.get_text() for t in leg.get_texts())
    assert leg.get_window_extent().x0 >= ax.get_window_extent().x1
    # the loss panel: zero lines above the axis line, no negative tick
    assert ax2.get_ylim()[0] < 0 and min(ax2.get_yticks()) >= 0
    # a narrow band is not cut and carries no note
    fig2 = sw.figure(_pts(0.002), META)
    assert not any("band cut" in t.get_text() for t in fig2.axes[0].texts)
    # no lossy point: no ring, and no legend entry for one
    fig3 = sw.figure([{**p, "lost_fraction": 0.0} for p in _pts(0.002)], META)
    assert not any("delivered ones only" in t.get_text()
                   for t in fig3.axes[0].get_legend().get_texts())


def test_sweep_figure_log_axis_ticks_are_plain_milliseconds() -> None:
    from matplotlib.collections import PolyCollection

    fig = sw.figure(_pts(0.025), META, log_y=True)
    ax = fig.axes[0]
    assert ax.get_yscale() == "log"
    for b in (c for c in ax.collections if isinstance(c, PolyCollection)):
        ys = np.concatenate([p.vertices[:, 1] for p in b.get_paths()])
        assert ys.min() > 0
    fig.canvas.draw()
    labels = [t.get_text() for t in ax.get_yticklabels() if t.get_text()]
    assert labels and all("$" not in lb and "^" not in lb for lb in labels)
    assert "10" in labels
    assert any("a tenth of the mean" in t.get_text() for t in ax.texts)


def test_a_sweep_with_a_run_of_many_packets_is_announced_as_long(
        tmp_path: os.PathLike[str], capsys: pytest.CaptureFixture[str],
        monkeypatch: pytest.MonkeyPatch) -> None:
    # routerd simulate says so; a sweep with --rates 1e9 sat silent behind its progress bar
    from routerd.sim import commands_simulate as CS

    args = ["sweep", "--rates", "100,300", "--policies", "shortest", "--seeds", "1",
            "--duration", "2", "--jobs", "1", "--quiet", "--no-plot"]
    assert cli.main(args + ["--out", os.path.join(str(tmp_path), "a")]) == 0
    assert "long runs" not in capsys.readouterr().err
    monkeypatch.setattr(CS, "LONG_RUN_PACKETS", 600)      # 300/s x 2 s reaches it
    assert cli.main(args + ["--out", os.path.join(str(tmp_path), "b")]) == 0
    assert "about 600 packets to inject in the largest run" in capsys.readouterr().err
