"""Routing frontier: what a split of traffic between two targets would give, without rerunning.

From two targets measured on the same profile (their latency histograms and their cost per
request), every split p (the share of requests sent to the second target, 0 to 100 %) gets

- the mixture's latency percentiles: the two histograms' bucket counts are combined with
  weights (1 - p) / total_a and p / total_b (each histogram normalised by its own total, so
  a target measured on more requests does not weigh more), and the percentile is read off
  the combined counts: the top of the first bucket whose cumulative weight reaches the
  percentile less half a sample (HdrHistogram rounds a rank to the nearest sample; here the
  half sample of each histogram, weighted by its share), so that a split next to 0 or 100 %
  reads like the target's own percentile, which is what 0 and 100 % give exactly. With
  thousands of samples this is ``numpy.percentile`` with weights and ``inverted_cdf``;
- the blended cost per request, (1 - p) x cost_a + p x cost_b.

A split is *on the frontier* when no other split is both cheaper and faster (p95 no higher
and cost no higher, one of them strictly lower). The mixture assumes each target keeps the
latency it had when measured: sending it more traffic than it had then may slow it down.

Sources, in order of preference: a comparison folder (``compare.json`` and its rounds), a
routed-mix run folder (``routed.json``), or two run folders with the costs given.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from hdrh.histogram import HdrHistogram

from loadrun.cost import MILLION
from loadrun.errors import StoreError, UsageError
from loadrun.metrics import LATENCY_METRICS, HistogramSet, LatencyHistogram
from loadrun.store import RunFolder

__all__ = [
    "FRONTIER_FILE",
    "Frontier",
    "FrontierPoint",
    "MeasuredTarget",
    "blended_cost",
    "frontier_table",
    "measured_from_compare",
    "measured_from_run",
    "mixture_percentiles_us",
    "routing_frontier",
    "write_frontier",
]

FRONTIER_FILE = "frontier.json"
FRONTIER_PERCENTILES: tuple[float, ...] = (50.0, 95.0, 99.0)
TABLE_SPLITS: tuple[float, ...] = (0.0, 0.05, 0.1, 0.25, 0.5, 0.75, 1.0)
"""The splits the terminal table shows (the plot and frontier.json hold every step)."""
_RANK_SLACK = 1e-12
"""Float sums of weights may fall a hair short of a rank they reach exactly."""


@dataclass(frozen=True, slots=True)
class MeasuredTarget:
    """One target as measured: a latency histogram and what one request costs."""

    name: str
    histogram: LatencyHistogram
    cost_per_request: float | None
    currency: str = "USD"
    tokens_per_request: float | None = None
    """Input plus output tokens per request (for cost per million tokens), when known."""


def _buckets(histogram: LatencyHistogram) -> tuple[np.ndarray[Any, Any], np.ndarray[Any, Any]]:
    """(top value of each non-empty bucket, its count), ascending."""
    raw = HdrHistogram.decode(histogram.encode())
    values = []
    counts = []
    for item in raw.get_recorded_iterator():
        values.append(int(raw.get_highest_equivalent_value(item.value_iterated_to)))
        counts.append(int(item.count_added_in_this_iter_step))
    return np.asarray(values, dtype=np.int64), np.asarray(counts, dtype=np.float64)


def _check_layout(first: LatencyHistogram, second: LatencyHistogram) -> None:
    if (first.lowest_us, first.highest_us, first.significant_figures) != (
        second.lowest_us,
        second.highest_us,
        second.significant_figures,
    ):
        raise UsageError("the two histograms differ in range or precision: their buckets do not line up")


def mixture_percentiles_us(
    first: LatencyHistogram,
    second: LatencyHistogram,
    share_second: float,
    percentiles: Sequence[float] = FRONTIER_PERCENTILES,
) -> dict[float, int]:
    """Percentiles (microseconds) of the mixture that sends ``share_second`` to ``second``."""
    return _Mixture(first, second).percentiles_us(share_second, percentiles)


class _Mixture:
    """Two histograms' buckets, read once, mixed at any split."""

    def __init__(self, first: LatencyHistogram, second: LatencyHistogram) -> None:
        _check_layout(first, second)
        self.first = first
        self.second = second
        self._buckets = [_buckets(histogram) if histogram.count else None for histogram in (first, second)]

    def percentiles_us(self, share_second: float, percentiles: Sequence[float]) -> dict[float, int]:
        if not 0.0 <= share_second <= 1.0 or math.isnan(share_second):
            raise UsageError(f"a split is a share from 0 to 1, got {share_second}")
        for percentile in percentiles:
            if not 0.0 <= percentile <= 100.0:
                raise UsageError(f"a percentile lies within 0..100, got {percentile}")
        if share_second in (0.0, 1.0):
            # All traffic to one target: exactly its own percentiles (HdrHistogram's rank rule).
            only = self.second if share_second else self.first
            if not only.count:
                raise UsageError("a target with no measured request cannot take a share of the traffic")
            return only.percentiles_us(percentiles)
        parts = []
        half_sample = 0.0
        for buckets, weight in zip(self._buckets, (1.0 - share_second, share_second), strict=True):
            if buckets is None:
                raise UsageError("a target with no measured request cannot take a share of the traffic")
            values, counts = buckets
            parts.append((values, counts * (weight / counts.sum())))
            half_sample += weight * 0.5 / counts.sum()
        values = np.concatenate([part[0] for part in parts])
        weights = np.concatenate([part[1] for part in parts])
        order = np.argsort(values, kind="stable")
        values, cumulative = values[order], np.cumsum(weights[order])
        out = {}
        for percentile in percentiles:
            rank = percentile / 100.0 - half_sample - _RANK_SLACK
            index = int(np.searchsorted(cumulative, rank, side="left"))
            out[percentile] = int(values[min(index, len(values) - 1)])
        return out


def blended_cost(first: float, second: float, share_second: float) -> float:
    """Cost when ``share_second`` of the traffic goes to the target costing ``second``.

    Per request, per year, per anything that scales with the number of requests.
    """
    if not 0.0 <= share_second <= 1.0:
        raise UsageError(f"a split is a share from 0 to 1, got {share_second}")
    return (1.0 - share_second) * first + share_second * second


@dataclass(frozen=True, slots=True)
class FrontierPoint:
    share_second: float
    percentiles_ms: dict[float, float]
    cost_per_request: float | None
    cost_per_million_tokens: float | None
    on_frontier: bool = False


@dataclass(frozen=True, slots=True)
class Frontier:
    first: str
    second: str
    metric: str
    currency: str
    points: tuple[FrontierPoint, ...]
    source: str = ""

    def point(self, share_second: float) -> FrontierPoint:
        return min(self.points, key=lambda point: abs(point.share_second - share_second))

    def to_json(self) -> dict[str, Any]:
        return {
            "kind": "routing_frontier",
            "first": self.first,
            "second": self.second,
            "share_is_of": self.second,
            "metric": self.metric,
            "currency": self.currency,
            "source": self.source,
            "assumption": "each target keeps the latency it had when measured, whatever its share",
            "points": [
                {
                    "share_second": point.share_second,
                    **{f"p{key:g}_ms": value for key, value in point.percentiles_ms.items()},
                    "cost_per_request": point.cost_per_request,
                    "cost_per_million_tokens": point.cost_per_million_tokens,
                    "on_frontier": point.on_frontier,
                }
                for point in self.points
            ],
            "table_splits": list(TABLE_SPLITS),
        }


def routing_frontier(
    first: MeasuredTarget,
    second: MeasuredTarget,
    *,
    metric: str = "e2e",
    steps: int = 100,
    source: str = "",
) -> Frontier:
    """Every split from 0 to 100 % in ``steps`` steps: mixture percentiles and blended cost."""
    if steps < 1:
        raise UsageError("the frontier needs at least one step")
    if first.currency != second.currency and first.cost_per_request is not None:
        raise UsageError(f"the two targets are priced in {first.currency} and {second.currency}")
    raw: list[FrontierPoint] = []
    mixture = _Mixture(first.histogram, second.histogram)
    for step in range(steps + 1):
        share = step / steps
        values = mixture.percentiles_us(share, FRONTIER_PERCENTILES)
        cost = None
        per_million = None
        if first.cost_per_request is not None and second.cost_per_request is not None:
            cost = blended_cost(first.cost_per_request, second.cost_per_request, share)
            if first.tokens_per_request and second.tokens_per_request:
                tokens = blended_cost(first.tokens_per_request, second.tokens_per_request, share)
                per_million = cost / tokens * MILLION
        raw.append(
            FrontierPoint(share, {key: value / 1000 for key, value in values.items()}, cost, per_million)
        )
    points = tuple(
        FrontierPoint(
            point.share_second,
            point.percentiles_ms,
            point.cost_per_request,
            point.cost_per_million_tokens,
            on_frontier=_unbeaten(point, raw),
        )
        for point in raw
    )
    return Frontier(first.name, second.name, metric, first.currency, points, source)


def _unbeaten(point: FrontierPoint, points: Sequence[FrontierPoint]) -> bool:
    """No other split is at least as good on p95 and cost, and better on one."""
    latency = point.percentiles_ms[95.0]
    cost = point.cost_per_request if point.cost_per_request is not None else 0.0
    for other in points:
        other_latency = other.percentiles_ms[95.0]
        other_cost = other.cost_per_request if other.cost_per_request is not None else 0.0
        if other_latency <= latency and other_cost <= cost and (other_latency < latency or other_cost < cost):
            return False
    return True


# --- sources ----------------------------------------------------------------------------


def _histogram(encoded: Mapping[str, str], metric: str, where: str) -> LatencyHistogram:
    if metric not in LATENCY_METRICS:
        raise UsageError(f"unknown metric {metric!r}: {', '.join(LATENCY_METRICS)}")
    if metric not in encoded:
        raise UsageError(f"{where} holds no {metric} histogram")
    return HistogramSet.decode(encoded).get(metric)


def measured_from_compare(
    folder: Path, first: str, second: str, *, metric: str = "e2e", level: int | None = None
) -> tuple[MeasuredTarget, MeasuredTarget]:
    """Two targets of a comparison folder, at one load level (default: the first)."""
    data = RunFolder(folder).read_json("compare.json")
    levels = data.get("levels") or []
    if not levels:
        raise UsageError(f"{folder}: the comparison holds no load level")
    chosen = levels[0] if level is None else next((x for x in levels if x["concurrency"] == level), None)
    if chosen is None:
        known = ", ".join(str(x["concurrency"]) for x in levels)
        raise UsageError(f"{folder}: no load level {level} (levels: {known})")
    currency = "USD"
    for entry in data.get("targets", []):
        currency = entry.get("prices", {}).get("currency", currency)
    out = []
    for name in (first, second):
        aggregate = chosen["targets"].get(name)
        if aggregate is None:
            raise UsageError(f"{folder}: no target {name!r} (targets: {', '.join(chosen['targets'])})")
        merged: HistogramSet | None = None
        for entry in data.get("rounds", []):
            if entry["target"] != name or entry["level"] != chosen["concurrency"]:
                continue
            summary = RunFolder(folder / entry["folder"]).read_json("summary.json")
            histograms = HistogramSet.decode(summary.get("histograms") or {})
            if merged is None:
                merged = histograms
            else:
                merged.merge(histograms)
        if merged is None:
            raise UsageError(f"{folder}: target {name!r} has no measured round")
        histogram = _histogram(merged.encode(), metric, f"{folder} ({name})")
        cost = aggregate.get("cost") or {}
        tokens = aggregate.get("tokens") or {}
        per_request_tokens = None
        if tokens.get("input_mean") is not None and tokens.get("output_mean") is not None:
            per_request_tokens = float(tokens["input_mean"]) + float(tokens["output_mean"])
        out.append(MeasuredTarget(name, histogram, cost.get("per_request"), currency, per_request_tokens))
    return out[0], out[1]


def measured_from_run(
    folder: Path, cost_per_request: float | None, *, metric: str = "e2e", name: str | None = None
) -> MeasuredTarget:
    """One plain run folder (its summary's histograms) with a cost per request given."""
    try:
        summary = RunFolder(folder).read_json("summary.json")
    except StoreError as exc:
        raise UsageError(f"{folder}: not a run folder ({exc})") from exc
    histogram = _histogram(summary.get("histograms") or {}, metric, str(folder))
    label = name or str((summary.get("target") or {}).get("name") or folder.name)
    return MeasuredTarget(label, histogram, cost_per_request)


def frontier_table(frontier: Frontier, shares: Sequence[float] = TABLE_SPLITS) -> list[dict[str, Any]]:
    """A few splits for a printed table (frontier.json holds every step)."""
    data = frontier.to_json()
    rows = []
    for share in shares:
        rows.append(min(data["points"], key=lambda item: abs(item["share_second"] - share)))
    return rows


def write_frontier(folder: Path, frontier: Frontier) -> list[Path]:
    """frontier.json and the plot (PNG and SVG) into ``folder``."""
    from loadrun.report.frontier_plot import save_frontier_plot

    run = RunFolder(folder)
    paths = [run.write_json(FRONTIER_FILE, frontier.to_json())]
    paths.extend(save_frontier_plot(frontier.to_json(), folder))
    return paths
