"""PNG plots of one simulation: delivery time over time, link utilisation over the graph.

Owns: drawing (matplotlib, Agg backend, imported here only) and a deterministic graph
layout.  Must not import: zmq, prometheus, the engine.
"""
from __future__ import annotations

import math
import os
from typing import Any

import numpy as np

from routerd.topology import Topology


def _mpl() -> Any:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


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


def plot_delivery(result: dict[str, Any], path: str) -> str:
    plt = _mpl()
    s = result["series"]
    summ = result["summary"]
    t = np.asarray(s["t_s"], dtype=float)
    md = np.asarray(s["mean_delivery_s"], dtype=float) * 1e3
    drops = np.asarray(s["dropped"], dtype=float) + np.asarray(s["ttl_expired"], dtype=float)
    fig, ax = plt.subplots(figsize=(8, 4.5), dpi=100)
    ax.plot(t, md, color="tab:blue", marker=".", label="mean delivery time")
    ax.set_xlabel("virtual time (s)")
    ax.set_ylim(bottom=0, top=max(1e-3, float(np.nanmax(md)) * 1.1) if np.isfinite(md).any() else 1.0)
    ax.set_ylabel("mean delivery time per interval (ms)", color="tab:blue")
    if summ.get("warmup_s", 0) > 0:
        ax.axvline(summ["warmup_s"], color="grey", ls=":", lw=1)
        ax.text(summ["warmup_s"], ax.get_ylim()[1], " warm-up", va="top", fontsize=8, color="grey")
    end_s = float(summ.get("duration_s", np.inf))
    for ev in result.get("link_events", []):
        if ev["t_s"] > end_s:   # scheduled after the run ended: it never happened
            continue
        ax.axvline(ev["t_s"], color="tab:green" if ev["action"] == "up" else "tab:purple",
                   ls="--", lw=1)
        label = ev["links"][0].replace("->", "-") if ev["links"] else ""
        ax.text(ev["t_s"], ax.get_ylim()[1] * 0.97, f" {label} {ev['action']}", va="top",
                fontsize=7, rotation=90, color="dimgrey")
    ax2 = ax.twinx()
    ax2.bar(t - s["interval_s"] / 2, drops, width=s["interval_s"] * 0.8, color="tab:red",
            alpha=0.3, label="drops + TTL expiries")
    ax2.set_ylabel("packets lost per interval", color="tab:red")
    ax2.set_ylim(bottom=0, top=max(1.0, float(drops.max()) * 1.1) if drops.size else 1.0)
    ax.set_title(f"{summ['policy']} on {summ['topology']}: {summ['rate_pps']:g} packets/s, "
                 f"seed {summ['seed']}")
    ax.grid(alpha=0.3)
    fig.tight_layout()
    fig.savefig(path)
    plt.close(fig)
    return path


def plot_utilisation(result: dict[str, Any], topo: Topology, path: str) -> str:
    plt = _mpl()
    from matplotlib import cm, colors
    from matplotlib.collections import LineCollection

    summ = result["summary"]
    util = np.array([ln["utilisation"] for ln in result["links"]], dtype=float)
    pos = layout(topo)
    fig, ax = plt.subplots(figsize=(8, 7), dpi=100)
    segs = []
    # each direction drawn beside the other: offset perpendicular to the link
    for a, b in zip(topo.src.tolist(), topo.dst.tolist()):
        p, q = pos[a], pos[b]
        v = q - p
        nrm = np.array([-v[1], v[0]]) / max(float(np.linalg.norm(v)), 1e-9)
        off = nrm * 0.012
        segs.append([p + off + 0.08 * v, q + off - 0.08 * v])
    norm = colors.Normalize(vmin=0.0, vmax=1.0)
    cmap = plt.get_cmap("inferno_r")
    lc = LineCollection(segs, colors=cmap(norm(np.nan_to_num(util))), linewidths=3.0)
    ax.add_collection(lc)
    ax.scatter(pos[:, 0], pos[:, 1], s=120 if topo.n <= 60 else 20, color="white",
               edgecolors="black", zorder=3)
    if topo.n <= 60:
        for i, nm in enumerate(topo.nodes):
            ax.annotate(nm, pos[i], fontsize=8, ha="center", va="center", zorder=4)
    sm = cm.ScalarMappable(norm=norm, cmap=cmap)
    fig.colorbar(sm, ax=ax, fraction=0.04, pad=0.02, label="link utilisation (after warm-up)")
    ax.set_aspect("equal")
    ax.set_xlim(-1.15, 1.15)
    ax.set_ylim(-1.15, 1.15)
    ax.axis("off")
    ax.set_title(f"link utilisation: {summ['policy']} on {summ['topology']}, "
                 f"{summ['rate_pps']:g} packets/s")
    fig.tight_layout()
    fig.savefig(path)
    plt.close(fig)
    return path


def draw_all(result: dict[str, Any], topo: Topology, out: str) -> list[str]:
    return [plot_delivery(result, os.path.join(out, "delivery.png")),
            plot_utilisation(result, topo, os.path.join(out, "utilisation.png"))]
