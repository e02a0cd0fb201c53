"""One load step of a capacity search: SLO syntax, steady state, early decisions, figures."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.stats import binomtest

from loadrun.capacity_steps import (
    ErrorShareSlo,
    PercentileSlo,
    StepSamples,
    parse_slo,
    percentile_of,
    slo_decision,
    slo_state,
    steady_state_start,
    step_stats,
)
from loadrun.errors import UsageError
from loadrun.metrics import LatencyHistogram
from loadrun.record import Outcome, Record

MS = 1_000_000


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        ("ttft=500", PercentileSlo("ttft", 99.0, 500.0)),
        ("tpot:p90=40", PercentileSlo("tpot", 90.0, 40.0)),
        ("E2E:p99.9=8000ms", PercentileSlo("e2e", 99.9, 8000.0)),
        ("itl : p50 = 25", PercentileSlo("itl", 50.0, 25.0)),
        ("errors=1%", ErrorShareSlo(0.01)),
        ("errors=0.02", ErrorShareSlo(0.02)),
    ],
)
def test_slo_syntax(text: str, expected: object) -> None:
    assert parse_slo(text) == expected


@pytest.mark.parametrize(
    "text", ["ttft", "ttft=", "ttft=-5", "ttft=abc", "speed=5", "ttft:p100=5", "errors:p99=1", "errors=150%"]
)
def test_bad_slos_are_usage_errors(text: str) -> None:
    with pytest.raises(UsageError):
        parse_slo(text)


def test_slo_labels_and_keys() -> None:
    assert parse_slo("ttft:p95=300").label() == "ttft p95 <= 300 ms"
    assert parse_slo("ttft:p95=300").key == "ttft_p95"
    assert parse_slo("errors=0.5%").label() == "errors <= 0.5 %"


# --- steady state (MSER-5, K. P. White 1997) ---------------------------------------------------


def test_a_constant_series_is_steady_from_the_start() -> None:
    assert steady_state_start([20.0] * 100) == 0


def test_an_initial_transient_is_cut_off() -> None:
    rng = np.random.default_rng(3)
    transient = 200 + 10 * rng.standard_normal(40)
    steady = 100 + 10 * rng.standard_normal(260)
    start = steady_state_start(np.concatenate([transient, steady]))
    assert start is not None and 35 <= start <= 45


def test_a_trend_is_not_steady() -> None:
    """Latency that keeps growing (an overloaded open loop) has its best cut in the second half."""
    assert steady_state_start(np.linspace(10, 500, 300)) is None


def test_too_few_values_are_not_steady_yet() -> None:
    assert steady_state_start([5.0] * 9) is None
    assert steady_state_start([5.0] * 12) == 0  # batches shrink to one value for short series


# --- early decisions (one-sided Clopper-Pearson bounds) ----------------------------------------


def test_no_exceedance_in_299_requests_decides_a_p99_slo_met() -> None:
    """Clopper and Pearson (1934): with no failures in n trials the one-sided upper bound is
    1 - alpha^(1/n); it drops below 1 % at n = 299 for 95 % confidence."""
    assert 1 - 0.05 ** (1 / 299) < 0.01 < 1 - 0.05 ** (1 / 298)
    assert slo_decision(0, 299, 0.01, 0.95) == "met"
    assert slo_decision(0, 298, 0.01, 0.95) == "undecided"


@pytest.mark.parametrize(("exceeding", "count"), [(1, 50), (3, 40), (8, 200), (30, 1000), (0, 10)])
def test_decisions_agree_with_scipy_exact_binomial_bounds(exceeding: int, count: int) -> None:
    """Cross-check with scipy.stats.binomtest's exact interval: a two-sided 90 % interval has
    the one-sided 95 % bounds as its ends."""
    interval = binomtest(exceeding, count).proportion_ci(confidence_level=0.90, method="exact")
    allowed = 0.05
    expected = "met" if interval.high < allowed else "violated" if interval.low > allowed else "undecided"
    assert slo_decision(exceeding, count, allowed, 0.95) == expected


def test_many_samples_over_the_limit_decide_it_broken() -> None:
    assert slo_decision(10, 60, 0.01, 0.95) == "violated"


def test_percentile_rule_matches_hdrhistogram() -> None:
    """Same rank rule as HdrHistogram (SOURCES.md section 4), within its 0.1 % precision."""
    rng = np.random.default_rng(11)
    values = rng.integers(1_000, 900_000, size=777)
    histogram = LatencyHistogram()
    for value in values:
        histogram.record_us(int(value))
    for percentile in (50.0, 90.0, 99.0, 99.9):
        exact = percentile_of(values.astype(np.float64), percentile)
        assert exact == pytest.approx(histogram.percentile_us(percentile), rel=1e-3)
    assert percentile_of(np.zeros(0), 50.0) is None


# --- figures of one step ------------------------------------------------------------------------


def _record(
    index: int, sent_ms: float, ttft_ms: float, gap_ms: float, tokens: int, ok: bool = True
) -> Record:
    sent = int(sent_ms * MS)
    record = Record(request_id=index, intended_ns=sent, in_window=True)
    record.send_ns = sent
    if ok:
        record.first_token_ns = sent + int(ttft_ms * MS)
        record.chunk_ns = [record.first_token_ns + int(k * gap_ms * MS) for k in range(tokens)]
        record.end_ns = record.chunk_ns[-1]
        record.output_tokens = tokens
        record.prompt_tokens = 10
    else:
        record.outcome = Outcome.HTTP_ERROR
        record.error = "HTTP 503"
        record.end_ns = sent + MS
    return record


def test_step_figures_come_from_the_steady_part() -> None:
    """40 slow requests at the start, then 200 at a steady pace: the slow ones are cut off."""
    samples = StepSamples(prices=None)
    for i in range(240):
        slow = i < 40
        samples.add(_record(i, 10.0 * i, 300.0 if slow else 50.0, 20.0, 5))
    stats = step_stats(samples)
    assert stats.steady
    assert 35 <= stats.truncated <= 45
    assert stats.ok == stats.measured == 240 - stats.truncated
    assert np.all(stats.values["ttft"] == 50.0)
    assert np.all(stats.values["itl"] == 20.0)
    assert stats.values["itl"].size == 4 * stats.ok and np.all(stats.gap_counts == 4)
    # Throughput: completions between the first kept send and the last send, over that time.
    first_kept_ms, last_ms = 10.0 * stats.truncated, 10.0 * 239
    ends = [10.0 * i + (300.0 if i < 40 else 50.0) + 4 * 20.0 for i in range(240)]
    done = sum(first_kept_ms <= end <= last_ms for end in ends)
    assert stats.seconds == pytest.approx((last_ms - first_kept_ms) / 1000)
    assert stats.requests_per_s == pytest.approx(done / stats.seconds)
    assert stats.output_tokens_per_s == pytest.approx(5 * done / stats.seconds)
    # Fewer than 299 requests cannot show a p99 met; twice the worst sample's room can.
    assert slo_state(stats, PercentileSlo("ttft", 99.0, 60.0), 0.95) == (50.0, "undecided")
    assert slo_state(stats, PercentileSlo("ttft", 99.0, 100.0), 0.95) == (50.0, "met")
    assert slo_state(stats, PercentileSlo("ttft", 99.0, 40.0), 0.95) == (50.0, "violated")


def test_failed_requests_count_in_the_error_share_only() -> None:
    samples = StepSamples(prices=None)
    for i in range(100):
        samples.add(_record(i, 10.0 * i, 40.0, 10.0, 3, ok=i % 10 != 0))
    stats = step_stats(samples)
    assert stats.failed == 10 and stats.error_share == pytest.approx(0.1)
    assert stats.values["e2e"].size == stats.ok == 90
    share, verdict = slo_state(stats, ErrorShareSlo(0.01), 0.95)
    assert share == pytest.approx(0.1) and verdict == "violated"
    assert math.isclose(float(stats.values["e2e"][0]), 40.0 + 2 * 10.0)


def test_warm_up_requests_are_not_measured() -> None:
    samples = StepSamples(prices=None)
    warm = _record(0, 0.0, 999.0, 1.0, 3)
    warm.in_window = False
    samples.add(warm)
    stats = step_stats(samples)
    assert stats.measured == 0 and not stats.first_send_ns
    assert samples.count == 1 and samples.tokens_total == 13
