"""Plots of a capacity search, drawn from its ``capacity.json`` data (so a report can redraw them).

- throughput against load: the measured steps, the fitted Universal Scalability Law curve,
  its peak N*, and the capacity with its band;
- latency against load: per latency SLO, the measured percentile, the monotone curve
  through it, the SLO line and the capacity.

Drawn with matplotlib's object API on the Agg canvas (no pyplot, no global state, no
display), written as SVG and PNG.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

from matplotlib.axes import Axes
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

__all__ = ["PLOT_FORMATS", "capacity_figures", "write_capacity_plots"]

PLOT_FORMATS = ("svg", "png")
_WITHIN = "#2b7bb9"
_OVER = "#d1495b"
_FIT = "#555555"
_LIMIT = "#e08a00"


def write_capacity_plots(data: Mapping[str, Any], folder: Path) -> list[Path]:
    """Write every figure of a capacity search into ``folder``; returns the files written."""
    written = []
    for name, figure in capacity_figures(data).items():
        for fmt in PLOT_FORMATS:
            path = folder / f"{name}.{fmt}"
            metadata = {"Date": None} if fmt == "svg" else {}
            figure.savefig(path, format=fmt, dpi=110, metadata=metadata)
            written.append(path)
    return written


def capacity_figures(data: Mapping[str, Any]) -> dict[str, Figure]:
    """The figures by file stem; none when no step measured anything."""
    steps = [s for s in data.get("steps", []) if s.get("verdict") != "failed" and s["requests"]["ok"]]
    if not steps:
        return {}
    return {
        "capacity-throughput": _throughput_figure(data, steps),
        "capacity-latency": _latency_figure(data, steps),
    }


def _new_figure(width: float, height: float) -> Figure:
    figure = Figure(figsize=(width, height), layout="constrained")
    FigureCanvasAgg(figure)
    return figure


def _throughput_figure(data: Mapping[str, Any], steps: Sequence[Mapping[str, Any]]) -> Figure:
    figure = _new_figure(7.0, 4.2)
    axes = figure.add_subplot()
    loads = [s["load"] for s in steps]
    rates = [s["throughput"]["requests_per_s"] for s in steps]
    colours = [_OVER if s["verdict"] == "over" else _WITHIN for s in steps]
    axes.scatter(loads, rates, c=colours, zorder=3, label="measured step (red: breaks an SLO)")
    usl = (data.get("fits") or {}).get("usl")
    if usl and usl.get("curve") and data.get("axis", "concurrency") == "concurrency":
        curve = usl["curve"]
        axes.plot(
            curve["loads"],
            curve["requests_per_s"],
            color=_FIT,
            linewidth=1.2,
            label=f"USL fit (sigma {usl['sigma']:.3g}, kappa {usl['kappa']:.2g})",
        )
        peak = usl.get("peak_concurrency")
        if peak is not None and math.isfinite(peak) and peak <= max(curve["loads"]):
            axes.axvline(peak, color=_FIT, linestyle=":", linewidth=1, label=f"peak N* = {peak:.1f}")
    _mark_capacity(axes, data)
    axes.set_xscale("log")
    axes.set_xlabel(_axis_label(data))
    axes.set_ylabel("requests / s")
    axes.set_ylim(bottom=0)
    axes.set_title("Throughput against load")
    axes.grid(True, which="both", alpha=0.3)
    axes.legend(fontsize="small", loc="lower right")
    return figure


def _latency_figure(data: Mapping[str, Any], steps: Sequence[Mapping[str, Any]]) -> Figure:
    slos = [slo for slo in data.get("slos", []) if slo["key"] != "errors"]
    panels: list[tuple[str, str, float | None]] = [
        (slo["key"], slo["label"], float(slo["limit"])) for slo in slos
    ] or [("e2e_p99", "e2e p99 (no latency SLO given)", None)]
    figure = _new_figure(7.0, 2.9 * len(panels) + 0.4)
    curves = (data.get("fits") or {}).get("latency_curves", {})
    for row, (key, label, limit) in enumerate(panels, start=1):
        axes = figure.add_subplot(len(panels), 1, row)
        metric, _, percentile = key.partition("_")
        column = f"{percentile}_ms"
        points = [(s["load"], s["latency"][metric].get(column)) for s in steps]
        points = [p for p in points if p[1] is not None]
        axes.scatter(
            [p[0] for p in points],
            [p[1] for p in points],
            c=[_OVER if limit is not None and p[1] > limit else _WITHIN for p in points],
            zorder=3,
            label=f"measured {metric} {percentile}" + (" (red: over this SLO)" if limit is not None else ""),
        )
        if key in curves:
            axes.plot(
                curves[key]["loads"], curves[key]["values"], color=_FIT, linewidth=1.2, label="monotone fit"
            )
        if limit is not None:
            axes.axhline(limit, color=_OVER, linestyle="--", linewidth=1, label=f"SLO {limit:g} ms")
        _mark_capacity(axes, data)
        axes.set_xscale("log")
        axes.set_ylabel("ms")
        axes.set_ylim(bottom=0)
        axes.set_title(label, fontsize="medium")
        axes.grid(True, which="both", alpha=0.3)
        axes.legend(fontsize="small", loc="upper left")
        if row == len(panels):
            axes.set_xlabel(_axis_label(data))
    return figure


def _mark_capacity(axes: Axes, data: Mapping[str, Any]) -> None:
    capacity = data.get("capacity") or {}
    load = capacity.get("load")
    if not capacity.get("found") or not load:
        return
    low, high = capacity.get("low"), capacity.get("high")
    if low is not None and high is not None and high > low:
        axes.axvspan(low, high, color=_LIMIT, alpha=0.15, linewidth=0)
    axes.axvline(load, color=_LIMIT, linewidth=1.5, label=f"capacity {load:.1f} ({capacity['limited_by']})")


def _axis_label(data: Mapping[str, Any]) -> str:
    if data.get("axis", "concurrency") == "concurrency":
        return "requests in flight (concurrency)"
    return "arrival rate offered (requests / s)"
