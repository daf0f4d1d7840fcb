"""The plots module: a deterministic layout, and figures checked through their objects
(limits, labels, styles, spans, legend places), never through pixels."""
from __future__ import annotations

import itertools

import numpy as np
import pytest

from routerd.core import topology
from routerd.io import topofiles
from routerd.sim import plots
from routerd.sim.run import DEMO_TOPOLOGY, run

ABILENE = "topohub:sndlib/abilene"   # the topohub package's copy of SNDlib's abilene


def test_layout_is_deterministic_and_spread() -> None:
    t = topofiles.load(DEMO_TOPOLOGY)
    a, b = plots.layout(t), plots.layout(t)
    assert np.array_equal(a, b)
    d = np.linalg.norm(a[:, None] - a[None], axis=2) + np.eye(t.n)
    assert d.min() > 0.05  # no two nodes on top of each other
    # neighbours sit closer than the average pair (a force layout's point)
    nb = np.mean([d[x, y] for x, y in zip(t.src.tolist(), t.dst.tolist())])
    assert nb < d[~np.eye(t.n, dtype=bool)].mean()


def test_draw_all(tmp_path) -> None:
    import matplotlib.image as mpimg

    t = topofiles.load(DEMO_TOPOLOGY)
    r = run({"policy": "shortest", "rate_pps": 1500.0, "duration_s": 4.0, "seed": 1})
    paths = plots.draw_all(r, t, str(tmp_path))
    for p in paths:
        img = mpimg.imread(p)
        assert img[..., :3].std() > 0.05


def xspans(ax) -> list[tuple[float, float]]:
    """(x from, x to) of every shaded span (axvspan) on ``ax``."""
    from matplotlib.patches import Polygon, Rectangle

    out = []
    for p in ax.patches:
        if isinstance(p, Rectangle):
            out.append((round(p.get_x(), 9), round(p.get_x() + p.get_width(), 9)))
        elif isinstance(p, Polygon):
            xs = np.asarray(p.get_xy())[:, 0]
            out.append((round(float(xs.min()), 9), round(float(xs.max()), 9)))
    return out


def _outside_right(fig, ax, legend) -> bool:
    fig.canvas.draw()
    return legend.get_window_extent().x0 >= ax.get_window_extent().x1


@pytest.fixture(scope="module")
def lossy() -> dict:
    # the demo lab overloaded, with a trunk failure and 0.5 s intervals
    return run({"policy": "shortest", "rate_pps": 2600.0, "duration_s": 6.0, "seed": 2,
                "warmup_s": 1.5, "overrides": ["sim.series_interval_s=0.5"],
                "scenario": {"scenario": {"links": [
                    {"at_s": 3, "between": ["w3", "e3"], "down": True},
                    {"at_s": 4.5, "between": ["w3", "e3"], "up": True}]}}})


def test_delivery_figure_says_the_interval_and_marks_warmup_losses_and_failures(lossy) -> None:
    fig = plots.delivery_figure(lossy)
    ax, ax2 = fig.axes
    assert "0.5 s interval" in ax.get_ylabel() and "ms" in ax.get_ylabel()
    assert "per 0.5 s" in ax2.get_ylabel() and "%" in ax2.get_ylabel()
    # the warm-up is a labelled span from 0 to 1.5 s on both axes
    for a in (ax, ax2):
        assert (0.0, 1.5) in xspans(a), "no warm-up span"
    labels = ax.get_legend_handles_labels()[1]
    assert any("warm-up" in lb for lb in labels)
    # intervals that lost packets are marked on the mean line, and it says why
    marks = [ln for ln in ax.get_lines() if "lost" in (ln.get_label() or "")]
    assert marks and len(marks[0].get_xdata()) >= 1
    assert "delivered packets only" in marks[0].get_label()
    # the failure is shaded from 3 to 4.5 s and named
    assert (3.0, 4.5) in xspans(ax) and (3.0, 4.5) in xspans(ax2)
    assert any("w3-e3 down" in t.get_text() for t in ax.texts)
    # delivery times start at 0; the loss axis starts just below 0 with no negative tick
    assert ax.get_ylim()[0] == 0
    assert ax2.get_ylim()[0] < 0 and min(ax2.get_yticks()) >= 0
    assert "lost" in ax.get_title() and "%" in ax.get_title()
    assert ax2.get_xlim() == (0.0, 6.0)
    for a in (ax, ax2):
        assert _outside_right(fig, a, a.get_legend())


def test_delivery_figure_without_losses_keeps_the_zero_line_visible() -> None:
    r = run({"policy": "shortest", "rate_pps": 300.0, "duration_s": 4.0, "seed": 1})
    assert r["summary"]["dropped"] == 0
    fig = plots.delivery_figure(r)
    ax, ax2 = fig.axes
    assert not [ln for ln in ax.get_lines() if "lost" in (ln.get_label() or "")]
    (loss,) = ax2.get_lines()
    assert np.nanmax(loss.get_ydata()) == 0 and ax2.get_ylim()[0] < 0
    assert "lost 0.0%" in ax.get_title()


def _luminance(rgba) -> float:
    r, g, b = rgba[:3]
    return 0.2126 * r + 0.7152 * g + 0.0722 * b   # ITU-R BT.709 weights (common practice)


def test_utilisation_figure_on_abilene_readable_directed_and_says_mean_and_peak() -> None:
    from matplotlib.patches import FancyArrowPatch

    t = topofiles.load(ABILENE, topology.LinkDefaults(10e6, 64))
    r = run({"policy": "shortest", "rate_pps": 6000.0, "duration_s": 4.0, "seed": 1,
             "topology": ABILENE, "capacity_bps": 10e6, "buffer_pkts": 64})
    fig = plots.utilisation_figure(r, t)
    ax = fig.axes[0]
    arrows = [p for p in ax.patches if isinstance(p, FancyArrowPatch)]
    assert len(arrows) == t.n_links                      # one arrow per direction
    # with its head at the far end ("-|>")
    assert {type(a.get_arrowstyle()).__name__ for a in arrows} == {"CurveFilledB"}
    # the two directions of a link lie side by side, not on top of each other
    k_ab, k_ba = t.link("KSCYng", "IPLSng"), t.link("IPLSng", "KSCYng")
    pa = np.array(arrows[k_ab].get_path().vertices).mean(axis=0)
    pb = np.array(arrows[k_ba].get_path().vertices).mean(axis=0)
    assert np.linalg.norm(pa - pb) > 0.015
    # every node named, in a box, and no two names overlap
    fig.canvas.draw()
    names = [tx for tx in ax.texts if tx.get_text() in t.nodes]
    assert sorted(tx.get_text() for tx in names) == sorted(t.nodes)
    assert all(tx.get_bbox_patch() is not None and tx.get_fontsize() >= 8 for tx in names)
    boxes = [tx.get_window_extent() for tx in names]
    for i in range(len(boxes)):
        for j in range(i + 1, len(boxes)):
            assert not boxes[i].overlaps(boxes[j]), (names[i].get_text(), names[j].get_text())
    # the colour scale says mean, in percent, and its idle end is visible on white
    cbar_label = fig.axes[1].get_ylabel()
    assert "mean utilisation" in cbar_label and "%" in cbar_label
    lum = [_luminance(c) for c in plots.colour_scale()(np.linspace(0, 1, 11))]
    assert lum[0] < 0.85 and all(a > b for a, b in itertools.pairwise(lum))   # lightness only falls
    # capacity: the legend says it, and the peak is listed beside the mean
    texts = " ".join(tx.get_text() for tx in fig.texts)
    assert "mean / peak 1 s" in texts
    leg = fig.legends[0]
    assert "capacity" in leg.get_title().get_text() and "10 Mbit/s" in leg.get_texts()[0].get_text()


def test_utilisation_widths_follow_capacity() -> None:
    t = topofiles.load(DEMO_TOPOLOGY)
    r = run({"policy": "shortest", "rate_pps": 800.0, "duration_s": 3.0, "seed": 1})
    fig = plots.utilisation_figure(r, t)
    from matplotlib.patches import FancyArrowPatch

    arrows = [p for p in fig.axes[0].patches if isinstance(p, FancyArrowPatch)]
    w = np.array([a.get_linewidth() for a in arrows])
    cap = t.capacity_bps
    assert w[cap == cap.min()].max() < w[cap == cap.max()].min()
    assert len(fig.legends[0].get_texts()) == 2          # 2 Mbit/s and 10 Mbit/s
