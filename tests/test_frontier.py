"""Routing frontier: mixture percentiles from two histograms, blended cost, the frontier."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from loadrun.cli import main
from loadrun.compare import CompareSettings, compare
from loadrun.errors import UsageError
from loadrun.frontier import (
    FRONTIER_FILE,
    MeasuredTarget,
    blended_cost,
    measured_from_compare,
    mixture_percentiles_us,
    routing_frontier,
    write_frontier,
)
from loadrun.metrics import HistogramSet, LatencyHistogram
from loadrun.profile import Profile, RequestSpec
from loadrun.targets import Prices, TargetSpec

HDR_PRECISION = 0.001
"""3 significant figures: a bucket is at most 0.1 % of its value wide (HdrHistogram, G. Tene)."""


def _histogram(samples_us: np.ndarray) -> LatencyHistogram:
    histogram = LatencyHistogram()
    for value in samples_us:
        histogram.record_us(int(value))
    return histogram


@pytest.fixture(scope="module")
def two_targets() -> tuple[np.ndarray, np.ndarray, LatencyHistogram, LatencyHistogram]:
    rng = np.random.default_rng(20261202)
    fast = np.round(rng.lognormal(np.log(180_000), 0.35, 40_000))  # a small model, ~180 ms
    slow = np.round(rng.lognormal(np.log(1_400_000), 0.5, 40_000))  # a large one, ~1.4 s
    return fast, slow, _histogram(fast), _histogram(slow)


@pytest.mark.parametrize("share", [0.0, 0.05, 0.3, 0.5, 0.95, 1.0])
def test_mixture_percentiles_agree_with_weighted_numpy(
    two_targets: tuple[np.ndarray, np.ndarray, LatencyHistogram, LatencyHistogram], share: float
) -> None:
    """Reference: numpy.percentile with weights (method inverted_cdf, numpy >= 2.0) on the
    same samples, each target's samples weighted by its share over its count; agreement
    within the histogram's precision (3 significant figures, plus the bucket's top)."""
    fast, slow, fast_histogram, slow_histogram = two_targets
    mixed = mixture_percentiles_us(fast_histogram, slow_histogram, share, (50.0, 90.0, 95.0, 99.0))
    samples = np.concatenate([fast, slow])
    weights = np.concatenate(
        [np.full(fast.size, (1 - share) / fast.size), np.full(slow.size, share / slow.size)]
    )
    for percentile, value in mixed.items():
        expected = float(np.percentile(samples, percentile, weights=weights, method="inverted_cdf"))
        assert value == pytest.approx(expected, rel=2 * HDR_PRECISION), percentile


@pytest.mark.parametrize("share", [0.05, 0.5])
def test_mixture_percentiles_agree_with_a_drawn_split(
    two_targets: tuple[np.ndarray, np.ndarray, LatencyHistogram, LatencyHistogram], share: float
) -> None:
    """Reference: numpy.percentile (plain) on a fresh sample drawn from the same two
    distributions with the split: ``share`` of 60,000 requests from the slow one, the rest
    from the fast one. The tolerance is the sampling error of a 60,000-draw percentile (a few
    per cent at most here), not the histogram's."""
    _, _, fast_histogram, slow_histogram = two_targets
    rng = np.random.default_rng(7)
    draws = 60_000
    to_slow = round(share * draws)
    drawn = np.concatenate(
        [
            np.round(rng.lognormal(np.log(1_400_000), 0.5, to_slow)),
            np.round(rng.lognormal(np.log(180_000), 0.35, draws - to_slow)),
        ]
    )
    mixed = mixture_percentiles_us(fast_histogram, slow_histogram, share, (50.0, 95.0))
    for percentile, value in mixed.items():
        assert value == pytest.approx(float(np.percentile(drawn, percentile)), rel=0.04), percentile


def test_mixture_weights_by_share_not_by_count() -> None:
    """A target measured on ten times more requests does not weigh ten times more."""
    small = LatencyHistogram()
    small.record_us(1_000, count=1000)
    large = LatencyHistogram()
    large.record_us(9_000, count=100)
    # Half and half: the median is the small target's value, p51 already the large one's.
    values = mixture_percentiles_us(small, large, 0.5, (50.0, 51.0))
    assert values[50.0] == pytest.approx(1_000, rel=HDR_PRECISION)
    assert values[51.0] == pytest.approx(9_000, rel=HDR_PRECISION)


def test_blended_yearly_cost() -> None:
    """$36,000 a year all to the large model, $900 all to the small one: 5 % to the large
    one costs 0.05 x 36,000 + 0.95 x 900 = $2,655 (common practice, no source)."""
    assert blended_cost(900.0, 36_000.0, 0.05) == pytest.approx(2_655.0)
    assert blended_cost(900.0, 36_000.0, 0.0) == 900.0
    assert blended_cost(900.0, 36_000.0, 1.0) == 36_000.0
    with pytest.raises(UsageError):
        blended_cost(900.0, 36_000.0, 1.5)


def test_frontier_marks_splits_no_other_beats(tmp_path: Path) -> None:
    """A fast, dear target and a slow, cheap one: every split trades latency for cost, so all
    are on the frontier; with a slow AND dear second target only 0 % is."""
    fast = LatencyHistogram()
    slow = LatencyHistogram()
    rng = np.random.default_rng(3)
    for value in rng.lognormal(np.log(200_000), 0.3, 4000):
        fast.record_us(int(value))
    for value in rng.lognormal(np.log(900_000), 0.3, 4000):
        slow.record_us(int(value))
    trade = routing_frontier(
        MeasuredTarget("quick", fast, 0.004, tokens_per_request=400.0),
        MeasuredTarget("thrifty", slow, 0.001, tokens_per_request=400.0),
        steps=20,
    )
    assert len(trade.points) == 21
    p95 = [point.percentiles_ms[95.0] for point in trade.points]
    assert p95 == sorted(p95)  # more to the slow target: a slower mix
    assert all(point.on_frontier for point in trade.points)
    assert trade.point(0.25).cost_per_request == pytest.approx(0.75 * 0.004 + 0.25 * 0.001)
    assert trade.point(0.0).cost_per_million_tokens == pytest.approx(0.004 / 400 * 1e6)

    dominated = routing_frontier(
        MeasuredTarget("quick", fast, 0.001), MeasuredTarget("dear", slow, 0.004), steps=20
    )
    assert [point.share_second for point in dominated.points if point.on_frontier] == [0.0]

    paths = write_frontier(tmp_path, trade)
    assert {path.name for path in paths} == {FRONTIER_FILE, "frontier.svg", "frontier.png"}
    data = json.loads((tmp_path / FRONTIER_FILE).read_text())
    assert len(data["points"]) == 21 and data["share_is_of"] == "thrifty"
    assert (tmp_path / "frontier.png").read_bytes().startswith(b"\x89PNG")


def test_mixture_refuses_a_share_for_an_empty_target() -> None:
    measured = LatencyHistogram()
    measured.record_us(5_000)
    assert mixture_percentiles_us(measured, LatencyHistogram(), 0.0, (50.0,)) == {
        50.0: measured.percentile_us(50.0)
    }
    with pytest.raises(UsageError):
        mixture_percentiles_us(measured, LatencyHistogram(), 0.1, (50.0,))


def _run_folder(path: Path, samples_us: np.ndarray) -> Path:
    histograms = HistogramSet()
    for value in samples_us:
        histograms.record_us("e2e", int(value))
    path.mkdir(parents=True)
    (path / "summary.json").write_text(
        json.dumps({"histograms": histograms.encode(), "target": {"name": path.name}})
    )
    return path


def test_frontier_command_from_two_run_folders(
    tmp_path: Path, two_targets: tuple[np.ndarray, np.ndarray, LatencyHistogram, LatencyHistogram]
) -> None:
    fast, slow, _, _ = two_targets
    first = _run_folder(tmp_path / "quick", fast[:2000])
    second = _run_folder(tmp_path / "thrifty", slow[:2000])
    main(["frontier", str(first), str(second), "--cost", "0.002", "--cost", "0.0005"])
    data = json.loads((first / FRONTIER_FILE).read_text())
    assert (data["first"], data["second"]) == ("quick", "thrifty")
    half = next(point for point in data["points"] if point["share_second"] == 0.5)
    assert half["cost_per_request"] == pytest.approx(0.00125)
    assert (first / "frontier.svg").read_text().lstrip().startswith("<?xml")
    with pytest.raises(SystemExit) as ended:
        main(["frontier", str(first), str(second), "--cost", "0.002"])
    assert ended.value.code == 2


def test_frontier_from_a_comparison_folder(tmp_path: Path) -> None:
    """Two mock targets compared in one short round each; the frontier's end points are the
    two targets' own E2E percentiles and costs as the comparison reports them."""
    targets = (
        TargetSpec("skiff", "skiff-s", mock_engine="small-fast", prices=Prices(1.0, 4.0)),
        TargetSpec("barge", "barge-l", mock_engine="small-fast", prices=Prices(0.2, 0.8)),
    )
    profile = Profile(request=RequestSpec(input_tokens=40, output_tokens=8))
    result = compare(
        CompareSettings(
            targets=targets,
            profile=profile,
            levels=(2,),
            rounds=1,
            requests_per_round=12,
            warmup_s=0.0,
            out_dir=tmp_path,
            write_report=False,
            resamples=200,
        )
    )
    first, second = measured_from_compare(result.folder, "skiff", "barge")
    frontier = routing_frontier(first, second, steps=10)
    aggregates = result.data["levels"][0]["targets"]
    assert frontier.points[0].percentiles_ms[95.0] == aggregates["skiff"]["latency"]["e2e"]["p95_ms"]
    assert frontier.points[-1].percentiles_ms[95.0] == aggregates["barge"]["latency"]["e2e"]["p95_ms"]
    assert frontier.points[-1].cost_per_request == pytest.approx(aggregates["barge"]["cost"]["per_request"])
    with pytest.raises(UsageError, match="no target 'tug'"):
        measured_from_compare(result.folder, "skiff", "tug")
