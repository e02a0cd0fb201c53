"""The routing frontier drawn from its ``frontier.json`` data: cost per request against p95
latency, one point per split, the splits no other split beats on both marked and joined.

Drawn with matplotlib's object API on the Agg canvas (no pyplot, no display), written as
SVG and PNG.
"""

from __future__ import annotations

from collections.abc import Mapping
from pathlib import Path
from typing import Any

from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

__all__ = ["FRONTIER_PLOT", "frontier_figure", "save_frontier_plot"]

FRONTIER_PLOT = "frontier"
_FORMATS = ("svg", "png")
_ALL = "#9aa5b1"
_BEST = "#d1495b"
_LABELLED_SHARES = (0.0, 0.05, 0.25, 0.5, 0.75, 1.0)


def frontier_figure(data: Mapping[str, Any]) -> Figure:
    points = data["points"]
    second = data["second"]
    figure = Figure(figsize=(6.4, 4.2), layout="constrained")
    FigureCanvasAgg(figure)
    ax = figure.add_subplot()
    priced = all(point["cost_per_request"] is not None for point in points)
    xs = [point["p95_ms"] for point in points]
    ys = [point["cost_per_request"] if priced else point["share_second"] * 100 for point in points]
    ax.scatter(xs, ys, s=10, color=_ALL, label="split", zorder=2)
    best = [(x, y) for x, y, point in zip(xs, ys, points, strict=True) if point["on_frontier"]]
    best.sort()
    ax.plot(
        [x for x, _ in best],
        [y for _, y in best],
        marker="o",
        markersize=4,
        color=_BEST,
        label="not beaten on both",
        zorder=3,
    )
    for x, y, point in zip(xs, ys, points, strict=True):
        if any(abs(point["share_second"] - share) < 1e-9 for share in _LABELLED_SHARES):
            ax.annotate(
                f"{point['share_second'] * 100:g} %",
                (x, y),
                textcoords="offset points",
                xytext=(4, 4),
                fontsize=7,
            )
    ax.set_xlabel(f"{data['metric'].upper()} p95 of the mix (ms)")
    if priced:
        ax.set_ylabel(f"blended cost per request ({data['currency']})")
    else:
        ax.set_ylabel(f"share to {second} (%) - no prices known")
    ax.set_title(f"Routing frontier: share of requests to {second}, the rest to {data['first']}", fontsize=9)
    ax.grid(True, alpha=0.3)
    ax.legend(fontsize=8, loc="best")
    return figure


def save_frontier_plot(data: Mapping[str, Any], folder: Path) -> list[Path]:
    """Write frontier.svg and frontier.png into ``folder``; returns the files written."""
    figure = frontier_figure(data)
    written = []
    for fmt in _FORMATS:
        path = folder / f"{FRONTIER_PLOT}.{fmt}"
        metadata = {"Date": None} if fmt == "svg" else {}
        figure.savefig(path, format=fmt, dpi=110, metadata=metadata)
        written.append(path)
    return written
