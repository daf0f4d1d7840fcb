"""PNG plots of one simulation: delivery time and losses over time, link utilisation
over the graph.

Owns: drawing one ``routerd.sim.run.run`` result (matplotlib, Agg backend, imported inside the
functions only) and a deterministic graph layout.  The shared look (ms axes, loss axes,
link event marks, legends) is :mod:`routerd.sim.plotstyle`'s.
Must not import: zmq, prometheus, the engine.

``delivery.png``: the mean delivery time per series interval (its length is stated),
with the warm-up shaded (its packets are not in ``summary.json``) and intervals that
lost packets marked, since a mean over delivered packets falls as losses rise; below
it, the share of the packets leaving the network in each interval that were lost.
``utilisation.png``: every directed link an arrow on its own right-hand side, coloured
by its *mean* utilisation after the warm-up, as wide as its capacity; the busiest links'
mean and peak (per interval) listed beside the graph.
"""
from __future__ import annotations

import math
import os
from typing import Any

import numpy as np

from routerd.core.topology import Topology

from . import plotstyle as ps

#: an interval whose lost share exceeds this is marked on the delivery-time line
LOSS_MARK = 0.01
#: utilisation colours, ours: light blue (idle, still visible on white) → blue → violet →
#: crimson → maroon (saturated); lightness falls all the way, with no grey in the middle
UTIL_COLOURS = ("#aac4e2", "#3d7cc9", "#7b4fb0", "#c8325a", "#5e0818")


def layout(topo: Topology, iterations: int = 300) -> np.ndarray:
    """(n, 2) node positions by a force-directed layout (Fruchterman & Reingold,
    Software—Practice and Experience 21, 1991), started on a circle so it is deterministic."""
    n = topo.n
    ang = 2 * np.pi * np.arange(n) / n
    pos = np.stack([np.cos(ang), np.sin(ang)], axis=1)
    if n <= 2:
        return pos
    k = 1.0 / math.sqrt(n)
    A = np.zeros((n, n))
    A[topo.src, topo.dst] = 1.0
    A = np.maximum(A, A.T)
    temp = 0.1
    for _ in range(iterations):
        delta = pos[:, None, :] - pos[None, :, :]
        dist = np.maximum(np.linalg.norm(delta, axis=2), 1e-3)
        rep = (k * k / dist ** 2)[..., None] * delta
        att = -(A * dist / k)[..., None] * delta
        disp = (rep + att).sum(axis=1)
        ln = np.maximum(np.linalg.norm(disp, axis=1), 1e-9)
        pos = pos + disp / ln[:, None] * np.minimum(ln, temp)[:, None]
        temp = max(temp * 0.99, 0.002)
    pos -= pos.mean(axis=0)
    pos /= max(float(np.abs(pos).max()), 1e-9)
    return pos


def lost_share(series: dict[str, Any]) -> np.ndarray:
    """Per interval: lost (dropped + TTL expired) / packets that left the network in it
    (NaN where none left)."""
    lost = np.asarray(series["dropped"], dtype=float) + np.asarray(series["ttl_expired"], dtype=float)
    left = lost + np.asarray(series["delivered"], dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(left > 0, lost / np.where(left > 0, left, 1.0), np.nan)


def delivery_figure(result: dict[str, Any]) -> Any:
    """The figure ``delivery.png`` shows (the caller saves or inspects it)."""
    plt = ps.pyplot()
    s = result["series"]
    summ = result["summary"]
    iv = float(s["interval_s"])
    t = np.asarray(s["t_s"], dtype=float) - iv / 2           # the middle of each interval
    md = np.asarray(s["mean_delivery_s"], dtype=float) * 1e3
    share = lost_share(s) * 100
    end_s = float(summ.get("duration_s", t[-1] + iv if t.size else 1.0))
    warm = float(summ.get("warmup_s", 0.0) or 0.0)
    fig, (ax, ax2) = ps.time_figure(plt, 2, 6.0, (3, 1.4))
    ax.plot(t, md, color="#1f5fa8", marker=".", lw=1.5, label="mean delivery time")
    hit = np.isfinite(share) & (share > LOSS_MARK * 100) & np.isfinite(md)
    if hit.any():
        ax.plot(t[hit], md[hit], ls="none", marker="o", ms=8, mfc="none", mec=ps.DOWN_COLOUR,
                mew=1.3, label=f"interval with > {LOSS_MARK:.0%} lost:\nits mean covers the\ndelivered packets only")
    top = float(np.nanmax(md)) * 1.15 if np.isfinite(md).any() else 1.0
    ax.set_ylim(0, max(top, 1e-3))
    ax.set_ylabel(f"mean delivery time per\n{iv:g} s interval (ms)")
    ax2.plot(t, share, color=ps.DOWN_COLOUR, marker=".", lw=1.2,
             label="lost: dropped or TTL expired")
    ps.zero_visible(ax2, max(1.0, float(np.nanmax(share)) * 1.15) if np.isfinite(share).any() else 1.0)
    ax2.set_ylabel(f"lost (% of packets\nleaving per {iv:g} s)")
    ax2.set_xlabel("virtual time (s)")
    ax2.set_xlim(0, end_s)
    if warm > 0:
        for a in (ax, ax2):
            a.axvspan(0, warm, color=ps.WARMUP_COLOUR, alpha=0.18, lw=0, hatch="//",
                      label="warm-up (not in summary.json)" if a is ax else None)
    events = [(ev["t_s"], ev["action"], ev["links"][0].replace("->", "-") if ev["links"] else "")
              for ev in result.get("link_events", [])]
    spans, other = ps.link_spans(events, end_s)
    ps.mark_link_spans((ax, ax2), spans, label_ax=ax)
    ps.mark_other_events((ax, ax2), other, label_ax=ax)
    for a in (ax, ax2):
        a.grid(alpha=0.3)
    ps.legend_outside(ax)
    ps.legend_outside(ax2)
    lost_pct = ((summ["dropped"] + summ["ttl_expired"]) / summ["offered"] * 100
                if summ.get("offered") else math.nan)
    ax.set_title(f"{summ['policy']} on {summ['topology']}: {summ['rate_pps']:g} packets/s, "
                 f"seed {summ['seed']}; after the warm-up: mean {_ms(summ['mean_delivery_s'])}, "
                 f"lost {lost_pct:.1f}%", fontsize=10)
    return fig


def plot_delivery(result: dict[str, Any], path: str) -> str:
    fig = delivery_figure(result)
    fig.savefig(path)
    ps.pyplot().close(fig)
    return path


def _ms(v: float) -> str:
    return "n/a" if not math.isfinite(v) else f"{v * 1e3:.1f} ms"


def _bps(v: float) -> str:
    for unit, f in (("Gbit/s", 1e9), ("Mbit/s", 1e6), ("kbit/s", 1e3)):
        if v >= f:
            return f"{v / f:.3g} {unit}"
    return f"{v:.3g} bit/s"


def capacity_widths(cap: np.ndarray, thin: float = 2.2, wide: float = 5.5) -> np.ndarray:
    """Line widths (points) growing with the log of the capacity; one width if all agree.
    The thinnest stays wide enough to show its colour: a thin link is often the bottleneck."""
    lo, hi = float(cap.min()), float(cap.max())
    if not hi > lo * 1.0001:
        return np.full(cap.shape, (thin + wide) / 2)
    return thin + (wide - thin) * np.log(cap / lo) / math.log(hi / lo)


def peak_utilisation(result: dict[str, Any]) -> np.ndarray:
    """Per link, the highest utilisation of any series interval after the warm-up (NaN
    without a series)."""
    s = result.get("series") or {}
    nl = len(result["links"])
    if not s.get("link_util"):
        return np.full(nl, np.nan)
    u = np.asarray(s["link_util"], dtype=float)
    t = np.asarray(s["t_s"], dtype=float)
    keep = t - float(s["interval_s"]) >= float(result["summary"].get("warmup_s", 0.0)) - 1e-9
    return u[keep].max(axis=0) if keep.any() else u.max(axis=0)


def colour_scale() -> Any:
    """The utilisation colour map (0 = idle, 1 = saturated)."""
    from matplotlib import colors

    return colors.LinearSegmentedColormap.from_list("routerd_util", UTIL_COLOURS)


def label_direction(pos: np.ndarray, topo: Topology, i: int) -> np.ndarray:
    """A unit vector from node i into the widest angular gap between its links (away
    from the centre for a node without links), where its label covers no arrow."""
    nb = sorted(set(topo.dst[topo.src == i].tolist()) | set(topo.src[topo.dst == i].tolist()))
    if not nb:
        out = pos[i] - pos.mean(axis=0)
        return out / max(float(np.linalg.norm(out)), 1e-9)
    ang = np.sort(np.array([math.atan2(*(pos[j] - pos[i])[::-1]) for j in nb]))
    gaps = np.diff(np.append(ang, ang[0] + 2 * math.pi))
    g = int(np.argmax(gaps))
    a = ang[g] + gaps[g] / 2
    return np.array([math.cos(a), math.sin(a)])


def utilisation_figure(result: dict[str, Any], topo: Topology) -> Any:
    """The figure ``utilisation.png`` shows."""
    plt = ps.pyplot()
    from matplotlib import colors
    from matplotlib.lines import Line2D
    from matplotlib.patches import FancyArrowPatch

    summ = result["summary"]
    util = np.array([ln["utilisation"] for ln in result["links"]], dtype=float)
    peak = peak_utilisation(result)
    cap = topo.capacity_bps.astype(float)
    pos = layout(topo)
    big = topo.n > 60
    fig = plt.figure(figsize=(11, 7.5), dpi=100)
    ax = fig.add_axes((0.01, 0.03, 0.62, 0.88))
    cax = fig.add_axes((0.65, 0.08, 0.018, 0.78))
    norm = colors.Normalize(vmin=0.0, vmax=100.0)
    cmap = colour_scale()
    widths = capacity_widths(cap) * (0.5 if big else 1.0)
    node_r = 0.035 if not big else 0.012
    for k, (a, b) in enumerate(zip(topo.src.tolist(), topo.dst.tolist())):
        p, q = pos[a], pos[b]
        v = q - p
        ln = max(float(np.linalg.norm(v)), 1e-9)
        right = np.array([v[1], -v[0]]) / ln         # each direction on its right-hand side
        off = right * (0.013 + 0.0015 * widths[k])
        u = util[k] * 100 if math.isfinite(util[k]) else 0.0
        ax.add_patch(FancyArrowPatch(
            tuple(p + off + v * (node_r / ln)), tuple(q + off - v * (node_r / ln)),
            arrowstyle=f"-|>,head_length={2.0 + widths[k] * 0.6:.2f},head_width={1.2 + widths[k] * 0.4:.2f}",
            color=cmap(norm(u)), lw=widths[k], shrinkA=0, shrinkB=0, zorder=2,
            joinstyle="miter", capstyle="butt"))
    ax.scatter(pos[:, 0], pos[:, 1], s=40 if not big else 8, color="#333333", zorder=3)
    if not big:
        for i, nm in enumerate(topo.nodes):
            out = label_direction(pos, topo, i)
            ax.annotate(nm, pos[i], xytext=tuple(out * np.array([22.0, 13.0])),
                        textcoords="offset points",
                        fontsize=9, ha="center", va="center", zorder=4,
                        bbox={"boxstyle": "round,pad=0.2", "fc": "white", "ec": "#bbbbbb",
                              "alpha": 0.9, "lw": 0.6})
    sm = plt.cm.ScalarMappable(norm=norm, cmap=cmap)
    warm = float(summ.get("warmup_s", 0.0) or 0.0)
    fig.colorbar(sm, cax=cax, label=f"mean utilisation from {warm:g} s to "
                                    f"{float(summ['duration_s']):g} s (%)")
    ax.set_aspect("equal")
    ax.set_xlim(-1.2, 1.2)
    ax.set_ylim(-1.2, 1.2)
    ax.axis("off")
    # capacity legend: the widths in use
    caps = sorted(set(np.round(cap, 6).tolist()))
    shown = caps if len(caps) <= 4 else [caps[0], caps[len(caps) // 2], caps[-1]]
    handles = [Line2D([], [], color="#555555", lw=float(capacity_widths(cap)[np.argmin(np.abs(cap - c))])
                      * (0.5 if big else 1.0)) for c in shown]
    labels = [_bps(c) for c in shown]
    if len(caps) == 1:
        labels = [f"every link {_bps(caps[0])}"]
    fig.legend(handles, labels, title="width: capacity", loc="upper left",
               bbox_to_anchor=(0.73, 0.90), fontsize=8, title_fontsize=8, frameon=False)
    # the busiest links, mean and peak
    iv = float((result.get("series") or {}).get("interval_s", math.nan))
    order = np.argsort(-np.nan_to_num(util, nan=-1.0))[:8]
    lines = [f"busiest links: mean / peak {iv:g} s (%)" if math.isfinite(iv)
             else "busiest links: mean (%)"]
    names = {k: f"{topo.nodes[topo.src[k]]} → {topo.nodes[topo.dst[k]]}" for k in order.tolist()}
    wide = max((len(v) for v in names.values()), default=0)
    for k in order.tolist():
        pk = f" / {peak[k] * 100:3.0f}" if math.isfinite(peak[k]) else ""
        lines.append(f"{names[k].ljust(wide)}  {util[k] * 100:3.0f}{pk}")
    if big:
        lines.append(f"({topo.n} nodes: names not drawn)")
    fig.text(0.73, 0.62, "\n".join(lines), fontsize=8, va="top", ha="left", family="monospace")
    fig.text(0.73, 0.12, "arrows: direction of travel,\neach drawn on its right-hand side",
             fontsize=8, va="bottom", ha="left", color="#444444")
    fig.suptitle(f"link utilisation: {summ['policy']} on {summ['topology']}, "
                 f"{summ['rate_pps']:g} packets/s, seed {summ['seed']}", fontsize=11)
    return fig


def plot_utilisation(result: dict[str, Any], topo: Topology, path: str) -> str:
    fig = utilisation_figure(result, topo)
    fig.savefig(path)
    ps.pyplot().close(fig)
    return path


def draw_all(result: dict[str, Any], topo: Topology, out: str) -> list[str]:
    return [plot_delivery(result, os.path.join(out, "delivery.png")),
            plot_utilisation(result, topo, os.path.join(out, "utilisation.png"))]
