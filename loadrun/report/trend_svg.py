"""A trend of chosen percentiles over time as a self-contained SVG chart (no dependency).

One panel per percentile, stacked, each with its own millisecond scale from 0 (a TTFT of
tens of milliseconds stays readable beside an end-to-end latency of seconds), all on one
time axis: the runs' start times, oldest left. A run the gate found regressed is ringed
in red; an invalid one is drawn hollow.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable, Sequence
from xml.sax.saxutils import escape, quoteattr

from loadrun.history import TrendRow

__all__ = ["trend_svg"]

WIDTH = 880
LEFT, RIGHT, TOP, BOTTOM = 70, 30, 50, 55
PANEL_HEIGHT, PANEL_GAP = 150, 34
COLOURS = ("#1f77b4", "#ff7f0e", "#2ca02c", "#9467bd", "#8c564b", "#17becf", "#7f7f7f", "#bcbd22")
REGRESSION_COLOUR = "#d62728"


def trend_svg(rows: Sequence[TrendRow], labels: Sequence[str], title: str) -> str:
    times = [row.run.started_unix for row in rows]
    plot_w = WIDTH - LEFT - RIGHT
    height = TOP + len(labels) * (PANEL_HEIGHT + PANEL_GAP) - PANEL_GAP + BOTTOM
    t_min, t_max = (min(times), max(times)) if times else (0.0, 1.0)
    span = t_max - t_min

    def x_of(index: int) -> float:
        # Runs within one second of each other are spread evenly instead of stacked.
        if span <= 0:
            return LEFT + plot_w * (index + 0.5) / max(1, len(rows))
        return LEFT + plot_w * (times[index] - t_min) / span

    out = [
        f'<svg xmlns="http://www.w3.org/2000/svg" width="{WIDTH}" height="{height}" '
        f'viewBox="0 0 {WIDTH} {height}" font-family="sans-serif" font-size="12">',
        f"<title>{escape(title)}</title>",
        f'<rect x="0" y="0" width="{WIDTH}" height="{height}" fill="white"/>',
        f'<text x="{LEFT}" y="22" font-size="15" font-weight="bold">{escape(title)}</text>',
        f'<circle cx="{WIDTH - RIGHT - 200}" cy="18" r="6" fill="none" stroke="{REGRESSION_COLOUR}" '
        f'stroke-width="2"/><text x="{WIDTH - RIGHT - 188}" y="22">regression</text>',
        f'<circle cx="{WIDTH - RIGHT - 90}" cy="18" r="3.5" fill="white" stroke="black"/>'
        f'<text x="{WIDTH - RIGHT - 80}" y="22">invalid run</text>',
    ]
    for number, label in enumerate(labels):
        top = TOP + number * (PANEL_HEIGHT + PANEL_GAP)
        out += _panel(rows, label, top, x_of, COLOURS[number % len(COLOURS)])
    axis_y = TOP + len(labels) * (PANEL_HEIGHT + PANEL_GAP) - PANEL_GAP
    for index in sorted({0, len(rows) // 2, len(rows) - 1}) if rows else []:
        x = x_of(index)
        anchor = "start" if x < LEFT + 60 else "end" if x > WIDTH - RIGHT - 60 else "middle"
        stamp = time.strftime("%Y-%m-%d %H:%M", time.localtime(times[index]))
        out.append(
            f'<line x1="{x:.1f}" y1="{axis_y}" x2="{x:.1f}" y2="{axis_y + 5}" stroke="black"/>'
            f'<text x="{x:.1f}" y="{axis_y + 20}" text-anchor="{anchor}">{escape(stamp)}</text>'
        )
    out.append(
        f'<text x="{LEFT + plot_w / 2:.1f}" y="{height - 10}" text-anchor="middle">'
        f"{len(rows)} runs, oldest left; milliseconds</text>"
    )
    out.append("</svg>")
    return "\n".join(out) + "\n"


def _panel(
    rows: Sequence[TrendRow], label: str, top: int, x_of: Callable[[int], float], colour: str
) -> list[str]:
    plot_w = WIDTH - LEFT - RIGHT
    values = [value for row in rows if (value := row.values_ms.get(label)) is not None]
    y_top = _nice_ceiling(max(values) * 1.05) if values else 1.0

    def y_of(value: float) -> float:
        return top + PANEL_HEIGHT * (1.0 - value / y_top)

    out = [
        f'<g class="panel" data-label={quoteattr(label)}>',
        f'<text x="{LEFT + 6}" y="{top + 14}" font-weight="bold" fill="{colour}">{escape(label)}</text>',
    ]
    for tick in _ticks(y_top):
        y = y_of(tick)
        out.append(
            f'<line x1="{LEFT}" y1="{y:.1f}" x2="{LEFT + plot_w}" y2="{y:.1f}" stroke="#e5e5e5"/>'
            f'<text x="{LEFT - 8}" y="{y + 4:.1f}" text-anchor="end">{tick:g}</text>'
        )
    bottom = top + PANEL_HEIGHT
    out.append(
        f'<line x1="{LEFT}" y1="{bottom}" x2="{LEFT + plot_w}" y2="{bottom}" stroke="black"/>'
        f'<line x1="{LEFT}" y1="{top}" x2="{LEFT}" y2="{bottom}" stroke="black"/>'
    )
    points = [
        (x_of(index), y_of(value), value, row)
        for index, row in enumerate(rows)
        if (value := row.values_ms.get(label)) is not None
    ]
    if len(points) > 1:
        path = " ".join(f"{x:.1f},{y:.1f}" for x, y, _, _ in points)
        out.append(
            f'<polyline class="series" points="{path}" fill="none" stroke="{colour}" stroke-width="2"/>'
        )
    for x, y, value, row in points:
        fill = "white" if row.run.verdict == "invalid" else colour
        tip = f"run {row.run.id} {row.run.started_at}: {label} {value:.2f} ms"
        if row.run.verdict:
            tip += f" ({row.run.verdict})"
        out.append(
            f'<circle cx="{x:.1f}" cy="{y:.1f}" r="3.5" fill="{fill}" stroke="{colour}">'
            f"<title>{escape(tip)}</title></circle>"
        )
        if row.run.verdict == "regression":
            out.append(
                f'<circle class="regression" cx="{x:.1f}" cy="{y:.1f}" r="7" fill="none" '
                f'stroke="{REGRESSION_COLOUR}" stroke-width="2"/>'
            )
    out.append("</g>")
    return out


def _nice_ceiling(value: float) -> float:
    """The next 1, 2, 2.5 or 5 times a power of ten at or above ``value``."""
    if value <= 0:
        return 1.0
    power = 10.0 ** math.floor(math.log10(value))
    for step in (1.0, 2.0, 2.5, 5.0, 10.0):
        if step * power >= value * (1 - 1e-12):
            return step * power
    return 10.0 * power


def _ticks(top: float) -> list[float]:
    step = top / 5
    return [round(step * i, 10) for i in range(6)]
