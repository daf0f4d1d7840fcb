"""The look every routerd PNG shares: time axes, delivery-time axes, loss axes, markers.

Owns: the conventions the demo's, ``simulate``'s, ``sweep``'s and ``replay``'s figures
follow, so a reader who learns one figure can read the others:

* delivery times are in milliseconds; on a log axis the ticks read 1, 2, 5, 10, 20 ...
  (plain numbers, never powers of ten);
* a share (lost packets, exploration, utilisation) is in percent, 0-100;
* an axis that can hold zero starts a little below it, so a line at zero stays visible
  above the axis line instead of hiding in it (no tick is labelled below zero);
* link failures are a shaded span from the failure to the recovery with a dashed line
  at each end (failure: dark red, recovery: dark green); other link changes a dotted line;
* legends sit outside the data, at the right of the axes, and every figure with a time
  axis keeps its axes at the same horizontal place (``TIME_AXES_LEFT``/``_RIGHT``), so
  two figures of the same run line up when compared.

Plain matplotlib with our own choices (colours, markers, layout).  matplotlib is
imported inside the functions only.  Must not import: zmq, prometheus, the engine, the
simulator.
"""
from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from typing import Any

#: where the axes of every time-series figure start and end (figure fraction); the
#: legend goes in the margin at the right
TIME_AXES_LEFT = 0.10
TIME_AXES_RIGHT = 0.74
#: link event colours (ours): failure, recovery, any other change
DOWN_COLOUR = "#a3122a"
UP_COLOUR = "#1d7a3a"
OTHER_COLOUR = "#555555"
#: what a warm-up span looks like
WARMUP_COLOUR = "#9a9a9a"


def pyplot() -> Any:
    """matplotlib.pyplot on the Agg backend (files only, no display)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def plain_number(v: float, _pos: Any = None) -> str:
    """A tick label without exponent notation: 0.5, 1, 20, 1000."""
    if v <= 0 or not math.isfinite(v):
        return ""
    return f"{v:.10g}" if v >= 1 else f"{v:.3g}"


def ms_log_axis(ax: Any, bottom: float, top: float) -> None:
    """A log y axis in milliseconds from ``bottom`` to ``top`` with ticks at 1-2-5 steps
    labelled as plain numbers."""
    from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter

    ax.set_yscale("log")
    ax.set_ylim(bottom, top)
    ax.yaxis.set_major_locator(LogLocator(base=10.0, subs=(1.0, 2.0, 5.0)))
    ax.yaxis.set_major_formatter(FuncFormatter(plain_number))
    ax.yaxis.set_minor_formatter(NullFormatter())


def log_limits(values: Iterable[float], floor: float = 0.1) -> tuple[float, float]:
    """Limits of a log axis that hold every finite positive value, with some room."""
    vs = [v for v in values if math.isfinite(v) and v > 0]
    if not vs:
        return floor, floor * 10
    lo, hi = min(vs), max(vs)
    return max(floor, lo / 1.6), hi * 2.5   # room at the top for event labels


def zero_visible(ax: Any, top: float) -> None:
    """y from a little below 0 to ``top``: a series that stays at 0 is drawn above the
    axis line, and no tick is labelled below 0."""
    from matplotlib.ticker import MaxNLocator

    top = top if math.isfinite(top) and top > 0 else 1.0
    ax.set_ylim(-0.05 * top, top)
    ax.yaxis.set_major_locator(nonnegative_locator(
        MaxNLocator(nbins=4, steps=[1, 2, 2.5, 5, 10], min_n_ticks=2)))


def nonnegative_locator(inner: Any) -> Any:
    """A matplotlib tick locator: ``inner``'s ticks without those below zero."""
    from matplotlib.ticker import Locator

    class NonNegative(Locator):  # type: ignore[misc]
        def __call__(self) -> Sequence[float]:
            assert self.axis is not None, "a locator is used once set on an axis"
            vmin, vmax = self.axis.get_view_interval()
            return self.tick_values(vmin, vmax)

        def tick_values(self, vmin: float, vmax: float) -> Sequence[float]:
            return [v for v in inner.tick_values(vmin, vmax) if v >= 0]

    return NonNegative()


def mark_link_spans(axes: Sequence[Any], spans: Iterable[tuple[float, float, str]],
                    label_ax: Any = None) -> None:
    """Shade each link failure ``(down_s, up_s, name)`` on every axes; name it on
    ``label_ax`` (at the top, inside the axes)."""
    for a, b, name in spans:
        for ax in axes:
            ax.axvspan(a, b, color=DOWN_COLOUR, alpha=0.07, lw=0)
            ax.axvline(a, color=DOWN_COLOUR, lw=1, ls="--")
            ax.axvline(b, color=UP_COLOUR, lw=1, ls="--")
        if label_ax is not None:
            tr = label_ax.get_xaxis_transform()
            label_ax.text(a, 0.98, f" {name} down", transform=tr, color=DOWN_COLOUR, fontsize=8,
                          va="top", ha="left")
            label_ax.text(b, 0.98, " up", transform=tr, color=UP_COLOUR, fontsize=8, va="top",
                          ha="left")


def link_spans(events: Iterable[tuple[float, str, str]], end_s: float
               ) -> tuple[list[tuple[float, float, str]], list[tuple[float, str, str]]]:
    """Link events ``(t, action, link name)`` → failure spans ``(down, up or end, name)``
    and the other events (capacity and delay changes).  A ``down`` of a link already down
    and an ``up`` of one already up change nothing and are not marked."""
    spans: list[tuple[float, float, str]] = []
    other: list[tuple[float, str, str]] = []
    open_: dict[str, float] = {}
    for t, action, name in sorted(events, key=lambda e: e[0]):
        if t > end_s:
            continue
        if action == "down":
            open_.setdefault(name, t)
        elif action == "up":
            if name in open_:
                spans.append((open_.pop(name), t, name))
        else:
            other.append((t, action, name))
    spans += [(t, end_s, name) for name, t in open_.items()]
    return sorted(spans), other


def mark_other_events(axes: Sequence[Any], events: Iterable[tuple[float, str, str]],
                      label_ax: Any = None) -> None:
    """A dotted line per link change that is not a failure span, named on ``label_ax``."""
    for t, action, name in events:
        for ax in axes:
            ax.axvline(t, color=OTHER_COLOUR, lw=1, ls=":")
        if label_ax is not None:
            label_ax.text(t, 0.02, f" {name} {action}", transform=label_ax.get_xaxis_transform(),
                          color=OTHER_COLOUR, fontsize=7, rotation=90, va="bottom")


def legend_outside(ax: Any, handles: Any = None, labels: Any = None, **kw: Any) -> Any:
    """A legend in the margin at the right of ``ax``, clear of the data."""
    args = () if handles is None else (handles, labels)
    return ax.legend(*args, loc="upper left", bbox_to_anchor=(1.01, 1.0), borderaxespad=0.0,
                     fontsize=8, frameon=False, **kw)


def time_figure(plt: Any, rows: int, height: float, ratios: Sequence[float] | None = None
                ) -> tuple[Any, Any]:
    """A figure of ``rows`` time-series axes sharing x, at the common horizontal place."""
    fig, axes = plt.subplots(rows, 1, figsize=(10, height), dpi=100, sharex=True,
                             gridspec_kw={"height_ratios": list(ratios)} if ratios else None)
    fig.subplots_adjust(left=TIME_AXES_LEFT, right=TIME_AXES_RIGHT, top=0.93, bottom=0.08,
                        hspace=0.12)
    return fig, axes
