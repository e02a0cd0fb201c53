"""Plots for the HTML report, drawn with matplotlib's Agg backend and returned as inline SVG.

Every function takes plain data (no files) and returns one ``<svg>`` element as text, with
its element ids prefixed so that several plots can share one HTML page. Text stays text
(``svg.fonttype = none``), which keeps the files small and lets the browser pick the font.
"""

from __future__ import annotations

import io
import itertools
import math
import re
from collections.abc import Mapping, Sequence
from typing import Any

import matplotlib

matplotlib.use("Agg")  # no display, no GUI toolkit: the report is written in batch

import matplotlib.pyplot as plt
import matplotlib.ticker
import numpy as np
from matplotlib.figure import Figure

__all__ = [
    "capacity_curves",
    "color_for",
    "latency_cdfs",
    "outcome_shares",
    "percentiles_over_time",
    "ratio_intervals",
]

_PALETTE = ("#1f77b4", "#d62728", "#2ca02c", "#9467bd", "#ff7f0e", "#8c564b", "#e377c2", "#17becf")
_METRIC_TITLES = {
    "ttft": "TTFT (time to first token)",
    "itl": "ITL (inter-token latency)",
    "tpot": "TPOT (time per output token)",
    "e2e": "E2E (end-to-end)",
}
_CDF_POINTS = 400
"""An ECDF is drawn through this many quantiles: enough for the eye, small for the file."""
_RC: Any = {
    "svg.fonttype": "none",
    "svg.hashsalt": "loadrun",
    "font.size": 9.0,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.grid": True,
    "grid.alpha": 0.3,
}
_RATIO_TICKS = (
    0.01,
    0.02,
    0.05,
    0.1,
    0.2,
    0.5,
    0.7,
    0.8,
    0.9,
    1.0,
    1.1,
    1.25,
    1.5,
    2.0,
    5.0,
    10.0,
    20.0,
    50.0,
)
_plot_counter = itertools.count(1)


def color_for(index: int) -> str:
    return _PALETTE[index % len(_PALETTE)]


def _svg(figure: Figure) -> str:
    """The figure as one inline <svg> element with page-unique ids."""
    buffer = io.StringIO()
    figure.savefig(buffer, format="svg", bbox_inches="tight")
    plt.close(figure)
    text = buffer.getvalue()
    text = text[text.index("<svg") :]
    prefix = f"lr{next(_plot_counter)}-"
    ids = set(re.findall(r'\bid="([^"]+)"', text))
    for old in sorted(ids, key=len, reverse=True):
        new = prefix + old
        text = text.replace(f'id="{old}"', f'id="{new}"')
        text = text.replace(f"#{old})", f"#{new})").replace(f'"#{old}"', f'"#{new}"')
    return text


def _figure(width: float, height: float, rows: int = 1, cols: int = 1) -> tuple[Figure, Any]:
    with plt.rc_context(_RC):
        figure, axes = plt.subplots(rows, cols, figsize=(width, height), squeeze=False)
    return figure, axes


def latency_cdfs(samples: Mapping[str, Mapping[str, Sequence[float] | np.ndarray[Any, Any]]]) -> str:
    """One panel per latency metric, one line per target: the share of requests at or below x ms."""
    metrics = [m for m in _METRIC_TITLES if any(len(s.get(m, ())) for s in samples.values())]
    if not metrics:
        metrics = list(_METRIC_TITLES)
    cols = 2
    rows = math.ceil(len(metrics) / cols)
    with plt.rc_context(_RC):
        figure, axes = _figure(9.0, 3.0 * rows, rows, cols)
        for panel, metric in enumerate(metrics):
            ax = axes[panel // cols][panel % cols]
            for index, (name, by_metric) in enumerate(samples.items()):
                values = np.asarray(by_metric.get(metric, ()), dtype=np.float64)
                if not values.size:
                    continue
                shares = np.linspace(0.0, 1.0, min(_CDF_POINTS, values.size) + 1)[1:]
                points = np.quantile(values, shares, method="inverted_cdf")
                ax.step(points, shares, where="post", color=color_for(index), label=name, linewidth=1.4)
            ax.set_title(_METRIC_TITLES[metric], loc="left")
            ax.set_xlabel("milliseconds")
            ax.set_ylabel("share at or below")
            ax.set_ylim(0, 1.02)
            if _wide_range(samples, metric):
                _plain_log_axis(ax)
            if ax.has_data():
                ax.legend(loc="best", frameon=False)
            else:
                ax.text(0.5, 0.5, "no samples", ha="center", va="center", transform=ax.transAxes)
        for panel in range(len(metrics), rows * cols):
            axes[panel // cols][panel % cols].set_visible(False)
        figure.tight_layout()
        return _svg(figure)


def _plain_log_axis(ax: Any) -> None:
    """A log x axis labelled with plain numbers at 1, 2 and 5 of each decade ("20", not "2x10^1")."""
    ax.set_xscale("log")
    ax.xaxis.set_major_locator(matplotlib.ticker.LogLocator(subs=(1.0, 2.0, 5.0)))
    ax.xaxis.set_major_formatter(matplotlib.ticker.FuncFormatter(lambda value, _pos: f"{value:g}"))
    ax.xaxis.set_minor_formatter(matplotlib.ticker.NullFormatter())


def _wide_range(samples: Mapping[str, Mapping[str, Any]], metric: str) -> bool:
    """Spread over more than a factor of 20: a log axis keeps the fast targets readable."""
    values = [np.asarray(s.get(metric, ()), dtype=np.float64) for s in samples.values()]
    values = [v[v > 0] for v in values if v.size]
    values = [v for v in values if v.size]
    if not values:
        return False
    low = min(float(v.min()) for v in values)
    high = max(float(v.max()) for v in values)
    return high / low > 20


def percentiles_over_time(
    series: Mapping[str, Mapping[str, Sequence[tuple[float, float, float]]]], metrics: Sequence[str]
) -> str:
    """Per metric a panel: p50 (solid) and p95 (dashed) per time bin, one color per target.

    ``series[target][metric]`` is a list of (seconds since the start, p50 ms, p95 ms); a gap
    in a target's bins (another target's round) breaks its line.
    """
    with plt.rc_context(_RC):
        figure, axes = _figure(9.0, 2.6 * len(metrics), len(metrics), 1)
        for row, metric in enumerate(metrics):
            ax = axes[row][0]
            for index, (name, by_metric) in enumerate(series.items()):
                points = by_metric.get(metric, [])
                if not points:
                    continue
                times, p50, p95 = (np.array(column, dtype=np.float64) for column in zip(*points, strict=True))
                times, p50, p95 = _break_gaps(times, p50, p95)
                color = color_for(index)
                ax.plot(times, p50, color=color, linewidth=1.4, marker=".", markersize=3, label=f"{name} p50")
                ax.plot(times, p95, color=color, linewidth=1.0, linestyle="--", label=f"{name} p95")
            ax.set_title(_METRIC_TITLES.get(metric, metric), loc="left")
            ax.set_ylabel("milliseconds")
            ax.set_xlabel("seconds since the first request (by completion time)")
            if ax.has_data():
                ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False, fontsize=7.5)
            else:
                ax.text(0.5, 0.5, "no samples", ha="center", va="center", transform=ax.transAxes)
        figure.tight_layout()
        return _svg(figure)


def _break_gaps(
    times: np.ndarray[Any, Any], *columns: np.ndarray[Any, Any]
) -> tuple[np.ndarray[Any, Any], ...]:
    """Insert NaN where consecutive points are far apart, so the line does not bridge them."""
    if times.size < 2:
        return (times, *columns)
    steps = np.diff(times)
    typical = float(np.median(steps))
    cut = np.nonzero(steps > 2.5 * typical)[0] + 1
    if not cut.size:
        return (times, *columns)
    times = np.insert(times, cut, np.nan)
    return (times, *(np.insert(column, cut, np.nan) for column in columns))


def outcome_shares(by_target: Mapping[str, Mapping[str, int]]) -> str:
    """Horizontal stacked bars: the share of each outcome per target."""
    outcomes = sorted({outcome for counts in by_target.values() for outcome in counts}, key=_outcome_order)
    names = list(by_target)
    with plt.rc_context(_RC):
        figure, axes = _figure(9.0, 0.6 + 0.45 * max(1, len(names)))
        ax = axes[0][0]
        left = np.zeros(len(names))
        for index, outcome in enumerate(outcomes):
            totals = np.array([max(1, sum(by_target[name].values())) for name in names], dtype=np.float64)
            shares = np.array([by_target[name].get(outcome, 0) for name in names], dtype=np.float64) / totals
            color = "#9ecf8f" if outcome == "ok" else _PALETTE[(index + 1) % len(_PALETTE)]
            ax.barh(names, shares, left=left, color=color, label=outcome, height=0.6)
            left += shares
        ax.set_xlim(0, 1)
        ax.set_xlabel("share of measured requests")
        ax.invert_yaxis()
        ax.grid(False)
        ax.legend(
            loc="upper center", bbox_to_anchor=(0.5, -0.35 - 0.1 / max(1, len(names))), ncol=6, frameon=False
        )
        figure.tight_layout()
        return _svg(figure)


def _outcome_order(outcome: str) -> tuple[int, str]:
    return (0 if outcome == "ok" else 1, outcome)


def ratio_intervals(rows: Sequence[Mapping[str, Any]], title: str) -> str:
    """Forest plot of ratio intervals: one line per (metric, percentile), 1 marked."""
    labels = [f"{row['metric']} p{row['percentile']:g}" for row in rows]
    with plt.rc_context(_RC):
        figure, axes = _figure(6.5, 0.6 + 0.32 * max(1, len(rows)))
        ax = axes[0][0]
        for position, row in enumerate(rows):
            color = {"faster": "#2ca02c", "slower": "#d62728"}.get(row["verdict"], "#7f7f7f")
            ax.plot([row["ratio_low"], row["ratio_high"]], [position, position], color=color, linewidth=2.2)
            ax.plot([row["ratio"]], [position], marker="o", color=color, markersize=4)
        ax.axvline(1.0, color="#333333", linewidth=0.8)
        ax.set_yticks(range(len(rows)), labels)
        ax.invert_yaxis()
        ax.set_xscale("log")
        ax.set_xlabel("ratio of percentiles (left of 1: first target faster)")
        ax.set_title(title, loc="left")
        low = min([1.0, *(row["ratio_low"] for row in rows)])
        high = max([1.0, *(row["ratio_high"] for row in rows)])
        ticks = [t for t in _RATIO_TICKS if low / 1.2 <= t <= high * 1.2]
        ax.xaxis.set_major_locator(matplotlib.ticker.FixedLocator(ticks))
        ax.xaxis.set_major_formatter(matplotlib.ticker.FuncFormatter(lambda value, _pos: f"{value:g}"))
        ax.xaxis.set_minor_formatter(matplotlib.ticker.NullFormatter())
        figure.tight_layout()
        return _svg(figure)


def capacity_curves(
    loads: Sequence[float],
    throughput: Sequence[float | None],
    latency: Mapping[str, Sequence[float | None]],
    fitted: tuple[Sequence[float], Sequence[float]] | None,
    load_label: str,
    markers: Mapping[str, float] | None = None,
) -> str:
    """Throughput and latency percentiles against the load level of each capacity step."""
    with plt.rc_context(_RC):
        figure, axes = _figure(9.0, 3.2, 1, 2)
        left, right = axes[0][0], axes[0][1]
        order = sorted(range(len(loads)), key=lambda i: loads[i])
        loads = [loads[i] for i in order]
        throughput = [throughput[i] for i in order]
        latency = {name: [values[i] for i in order] for name, values in latency.items()}
        # Fits and markers are drawn only over the measured range (and a little past it): a
        # peak predicted far beyond it would squeeze the measurements into one corner.
        shown_max = 1.5 * max(loads) if loads else 0.0
        points = [(x, y) for x, y in zip(loads, throughput, strict=True) if y is not None]
        if points:
            xs, ys = zip(*points, strict=True)
            left.plot(xs, ys, "o", color=color_for(0), label="measured")
        if fitted is not None:
            kept = [(x, y) for x, y in zip(*fitted, strict=True) if x <= shown_max]
            if kept:
                fit_x, fit_y = zip(*kept, strict=True)
                left.plot(fit_x, fit_y, "-", color=color_for(1), label="fit")
        for label, value in (markers or {}).items():
            if not 0 < value <= shown_max:
                continue
            left.axvline(value, color="#555555", linestyle=":", linewidth=1.0)
            left.text(
                value, 0.02, f" {label}", rotation=90, va="bottom", transform=left.get_xaxis_transform()
            )
        left.set_title("throughput", loc="left")
        left.set_xlabel(load_label)
        left.set_ylabel("requests per second")
        if left.has_data():
            left.legend(loc="lower right", frameon=False)
        for index, (name, values) in enumerate(latency.items()):
            pairs = [(x, y) for x, y in zip(loads, values, strict=True) if y is not None]
            if pairs:
                xs, ys = zip(*pairs, strict=True)
                right.plot(xs, ys, "o-", color=color_for(index + 2), label=name, markersize=3)
        right.set_title("latency", loc="left")
        right.set_xlabel(load_label)
        right.set_ylabel("milliseconds")
        if right.has_data():
            right.legend(loc="upper left", frameon=False)
        else:
            right.text(
                0.5, 0.5, "no latency in the steps", ha="center", va="center", transform=right.transAxes
            )
        figure.tight_layout()
        return _svg(figure)
