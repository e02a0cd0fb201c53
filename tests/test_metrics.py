"""Tests of the latency histograms.

External references:
- the published checks of the ``hdrhistogram`` Python package's own tests (G. Tene's
  HdrHistogram, module ``hdrh.histogram``), listed in /work/shared/SOURCES.md section 4;
- the HdrHistogram README, "Corrected vs. Raw value recording calls", for the samples that
  coordinated-omission correction back-fills;
- ``numpy.percentile`` on the same raw samples as a general-purpose reference.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hdrh.histogram import HdrHistogram
from hypothesis import given, settings
from hypothesis import strategies as st

from loadrun.errors import MeasurementError, StoreError
from loadrun.metrics import LATENCY_METRICS, PERCENTILES, HistogramSet, LatencyHistogram

# 3 significant figures: bucket width at most 1/1024 of the value (HdrHistogram design).
PRECISION = 1e-3


def _close(actual: float, expected: float) -> bool:
    return abs(actual - expected) <= PRECISION * expected


# --- published checks -------------------------------------------------------------------


def test_published_raw_recording_check() -> None:
    # hdrhistogram package tests (SOURCES.md section 4): (1, 3.6e9, 3), 10000 x 1000 us and
    # one 1e8 us sample -> total 10001, p99.99 = 1000, p99.999 = 1e8, within 0.1 %.
    hist = LatencyHistogram(1, 3_600_000_000, 3)
    hist.record_us(1000, count=10_000)
    hist.record_us(100_000_000)
    assert hist.count == 10_001
    assert _close(hist.percentile_us(99.99), 1000)
    assert _close(hist.percentile_us(99.999), 100_000_000)
    assert hist.overflow == 0


def test_published_corrected_recording_check() -> None:
    # hdrhistogram package tests (SOURCES.md section 4): the same load recorded with
    # coordinated-omission correction at an expected interval of 10000 -> total 20000,
    # p50 = 1000, p75 = 5e7, p90 = 8e7, p99 = 9.8e7, within 0.1 %.
    hist = LatencyHistogram(1, 3_600_000_000, 3)
    hist.record_corrected_us(1000, 10_000, count=10_000)
    hist.record_corrected_us(100_000_000, 10_000)
    assert hist.count == 20_000
    assert _close(hist.percentile_us(50), 1000)
    assert _close(hist.percentile_us(75), 50_000_000)
    assert _close(hist.percentile_us(90), 80_000_000)
    assert _close(hist.percentile_us(99), 98_000_000)


def _backfilled_samples(value: int, interval: int) -> list[int]:
    """Samples of a corrected recording, as the HdrHistogram README defines them."""
    samples = [value]
    while value > interval:
        value -= interval
        samples.append(value)
    return samples


@settings(max_examples=150, deadline=None)
@given(
    value=st.integers(min_value=0, max_value=5_000_000),
    interval=st.integers(min_value=1, max_value=2_000_000),
    lowest=st.sampled_from([1, 1000]),
    highest=st.sampled_from([4_000_000, 3_600_000_000]),
    count=st.integers(min_value=1, max_value=3),
)
def test_corrected_recording_equals_recording_each_backfilled_sample(
    value: int, interval: int, lowest: int, highest: int, count: int
) -> None:
    # Bound the plain loop below to a few thousand samples.
    interval = max(interval, value // 3000 + 1)
    corrected = LatencyHistogram(lowest, highest)
    corrected.record_corrected_us(value, interval, count=count)
    one_by_one = LatencyHistogram(lowest, highest)
    for sample in _backfilled_samples(value, interval):
        one_by_one.record_us(sample, count=count)
    assert corrected.encode() == one_by_one.encode()
    assert corrected.summary() == one_by_one.summary()
    assert corrected.overflow == one_by_one.overflow


def test_corrected_recording_matches_hdrh_own_method() -> None:
    # hdrh.histogram.HdrHistogram.record_corrected_value is the reference for in-range values.
    ours = LatencyHistogram(1, 3_600_000_000, 3)
    reference = HdrHistogram(1, 3_600_000_000, 3)
    for value, interval in [(123_456_789, 997), (5_000, 5_000), (7, 3), (2_000_001, 100)]:
        ours.record_corrected_us(value, interval)
        assert reference.record_corrected_value(value, interval) is True
    assert ours.count == reference.get_total_count()
    assert ours.min_us == reference.get_min_value()
    assert ours.max_us == reference.get_max_value()
    for percentile in np.linspace(0.0, 100.0, 201):
        assert ours.percentile_us(float(percentile)) == reference.get_value_at_percentile(
            float(percentile)
        )


# --- against numpy ----------------------------------------------------------------------


@pytest.mark.parametrize("seed", [1, 7, 2024])
@pytest.mark.parametrize(("median_ms", "sigma", "size"), [(40.0, 0.5, 20_011), (900.0, 1.2, 5_003)])
def test_percentiles_agree_with_numpy(seed: int, median_ms: float, sigma: float, size: int) -> None:
    """Percentiles of lognormal latencies agree with numpy.percentile on the same samples.

    numpy's "inverted_cdf" method returns the sample of rank ceil(p/100 * n). HdrHistogram
    takes rank round(p/100 * n) (at least 1), which is that rank or the one just below, and
    reports the top of that sample's bucket: at most 0.1 % above the sample (3 significant
    figures). So the histogram value must lie within 0.1 % above either numpy's sample or
    the next smaller sample.
    """
    rng = np.random.default_rng(seed)
    samples = np.rint(rng.lognormal(math.log(median_ms * 1000), sigma, size)).astype(np.int64)
    hist = LatencyHistogram()
    for value in samples.tolist():
        hist.record_us(value)
    ordered = np.sort(samples)

    for percentile in (*PERCENTILES, 0.5, 10.0, 25.0, 75.0, 99.99, 100.0):
        got = hist.percentile_us(percentile)
        at_rank = float(np.percentile(samples, percentile, method="inverted_cdf"))
        below = ordered[ordered < at_rank]
        candidates = [at_rank] if below.size == 0 else [at_rank, float(below[-1])]
        assert any(c <= got <= c * (1 + PRECISION) for c in candidates), (
            percentile,
            got,
            candidates,
        )

    assert _close(hist.mean_us, float(samples.mean()))
    assert int(ordered[0]) * (1 - PRECISION) <= hist.min_us <= int(ordered[0])
    assert int(ordered[-1]) <= hist.max_us <= int(ordered[-1]) * (1 + PRECISION)
    assert hist.count == size


# --- edges: zero, negative, overflow ----------------------------------------------------


def test_zero_is_recorded_as_lowest_value() -> None:
    hist = LatencyHistogram(lowest_us=1)
    hist.record_us(0)
    assert hist.count == 1
    assert hist.min_us == 1
    assert hist.max_us == 1


def test_values_below_lowest_are_clamped_not_dropped() -> None:
    hist = LatencyHistogram(lowest_us=1000, highest_us=10_000_000)
    hist.record_us(3, count=4)
    assert hist.count == 4
    reference = LatencyHistogram(lowest_us=1000, highest_us=10_000_000)
    reference.record_us(1000, count=4)
    assert hist.encode() == reference.encode()


def test_negative_value_raises_and_records_nothing() -> None:
    hist = LatencyHistogram()
    with pytest.raises(MeasurementError, match="negative"):
        hist.record_us(-1)
    with pytest.raises(MeasurementError, match="negative"):
        hist.record_corrected_us(-5, 10)
    assert hist.count == 0


def test_values_above_highest_are_counted_as_overflow() -> None:
    hist = LatencyHistogram(highest_us=10_000)
    hist.record_us(10_000)  # the ceiling itself is in range
    hist.record_us(10_001)
    hist.record_us(9_999_999_999, count=2)
    assert hist.count == 4
    assert hist.overflow == 3
    assert hist.percentile_us(25.0) == 10_007  # top of the ceiling's 8-us-wide bucket
    assert hist.max_us > hist.highest_us
    assert hist.percentile_us(50.0) > hist.highest_us


def test_overflow_survives_encode_decode_and_merge() -> None:
    first = LatencyHistogram(highest_us=60_000_000)
    first.record_us(59_990_000)  # in range, in the ceiling's own bucket
    first.record_us(70_000_000)
    second = LatencyHistogram(highest_us=60_000_000)
    second.record_corrected_us(65_000_000, 1_000_000)  # 5 samples above the ceiling
    decoded = LatencyHistogram.decode(first.encode())
    assert decoded.overflow == 1
    assert decoded.highest_us == 60_000_000
    decoded.merge(LatencyHistogram.decode(second.encode()))
    assert decoded.overflow == 6
    assert decoded.count == 2 + 65


def test_invalid_arguments_raise_value_error() -> None:
    hist = LatencyHistogram()
    with pytest.raises(ValueError, match="count"):
        hist.record_us(5, count=0)
    with pytest.raises(ValueError, match="interval"):
        hist.record_corrected_us(5, 0)
    with pytest.raises(ValueError, match="percentile"):
        hist.percentile_us(100.5)
    with pytest.raises(ValueError, match="percentile"):
        hist.percentile_us(-0.1)
    with pytest.raises(ValueError, match="highest_us"):
        LatencyHistogram(lowest_us=10, highest_us=15)
    with pytest.raises(ValueError, match="lowest_us"):
        LatencyHistogram(lowest_us=0)
    with pytest.raises(ValueError, match="significant_figures"):
        LatencyHistogram(significant_figures=6)


# --- summary ----------------------------------------------------------------------------

SUMMARY_KEYS = ["count", "mean_ms", "min_ms", "max_ms", "p50_ms", "p90_ms", "p95_ms", "p99_ms"]
SUMMARY_KEYS.append("p99.9_ms")


def test_empty_histogram_summary_has_none_values_and_queries_raise() -> None:
    hist = LatencyHistogram()
    summary = hist.summary()
    assert list(summary) == SUMMARY_KEYS
    assert summary["count"] == 0
    assert all(summary[key] is None for key in SUMMARY_KEYS[1:])
    for query in (
        lambda: hist.mean_us,
        lambda: hist.min_us,
        lambda: hist.max_us,
        lambda: hist.percentile_us(50.0),
        lambda: hist.percentiles_us([50.0]),
    ):
        with pytest.raises(ValueError, match="empty"):
            query()


def test_full_summary_has_every_key_in_order() -> None:
    hist = LatencyHistogram()
    hist.record_us(12_345)
    summary = hist.summary()
    assert list(summary) == SUMMARY_KEYS
    assert all(isinstance(summary[key], float) for key in SUMMARY_KEYS[1:])


def test_summary_is_in_milliseconds() -> None:
    hist = LatencyHistogram()
    # Below 2048 us a 3-significant-figure histogram is exact to the microsecond.
    for value_us in range(1001, 2001):
        hist.record_us(value_us)
    summary = hist.summary()
    assert summary["count"] == 1000
    assert summary["min_ms"] == 1.001
    assert summary["max_ms"] == 2.0
    assert summary["mean_ms"] == pytest.approx(1.5005)
    assert summary["p50_ms"] == 1.5
    assert summary["p90_ms"] == 1.9
    assert summary["p99.9_ms"] == 1.999


# --- encode, decode, merge --------------------------------------------------------------


def _lognormal_us(seed: int, size: int) -> list[int]:
    rng = np.random.default_rng(seed)
    values: list[int] = np.rint(rng.lognormal(math.log(50_000), 0.8, size)).astype(int).tolist()
    return values


def test_encode_decode_round_trip() -> None:
    hist = LatencyHistogram(lowest_us=1, highest_us=120_000_000, significant_figures=3)
    for value in _lognormal_us(3, 5000):
        hist.record_us(value)
    text = hist.encode()
    assert isinstance(text, str)
    decoded = LatencyHistogram.decode(text)
    assert decoded.summary() == hist.summary()
    assert decoded.percentiles_us([0.0, 12.5, 99.99]) == hist.percentiles_us([0.0, 12.5, 99.99])
    assert (decoded.lowest_us, decoded.highest_us, decoded.significant_figures) == (
        1,
        120_000_000,
        3,
    )
    assert decoded.encode() == text
    # The decoded histogram keeps recording.
    decoded.record_us(1)
    assert decoded.count == hist.count + 1
    assert decoded.min_us == 1


def test_decode_rejects_garbage() -> None:
    with pytest.raises(StoreError):
        LatencyHistogram.decode("not a histogram")
    with pytest.raises(StoreError):
        LatencyHistogram.decode("SElTVEZBQUFBQ")
    foreign = HdrHistogram(1, 3_600_000_001, 3)  # odd range: not written by encode()
    with pytest.raises(StoreError):
        LatencyHistogram.decode(foreign.encode().decode("ascii"))


def test_merge_equals_one_histogram_of_all_samples() -> None:
    first_samples = _lognormal_us(11, 3000)
    second_samples = [*_lognormal_us(12, 2000), 0, 7_200_000_000]
    first, second, together = LatencyHistogram(), LatencyHistogram(), LatencyHistogram()
    for value in first_samples:
        first.record_us(value)
        together.record_us(value)
    for value in second_samples:
        second.record_us(value)
        together.record_us(value)
    first.merge(second)
    assert first.encode() == together.encode()
    assert first.summary() == together.summary()
    assert first.overflow == together.overflow == 1


def test_merge_with_empty_histograms_keeps_the_minimum() -> None:
    # hdrh's add() alone would set the minimum to 0 when the other histogram is empty.
    hist = LatencyHistogram()
    hist.record_us(700)
    hist.merge(LatencyHistogram())
    assert hist.min_us == 700
    empty = LatencyHistogram()
    empty.merge(hist)
    assert empty.min_us == 700
    assert empty.summary() == hist.summary()


def test_merge_of_different_layouts_is_refused() -> None:
    with pytest.raises(ValueError, match="different"):
        LatencyHistogram(highest_us=1_000_000).merge(LatencyHistogram(highest_us=2_000_000))


# --- HistogramSet -----------------------------------------------------------------------


def test_histogram_set_holds_the_latency_metrics_in_order() -> None:
    histograms = HistogramSet()
    assert histograms.metrics == LATENCY_METRICS == ("ttft", "itl", "tpot", "e2e")
    histograms.record_us("ttft", 250_000)
    histograms.record_us("itl", 0, count=3)
    summary = histograms.summary()
    assert list(summary) == list(LATENCY_METRICS)
    assert summary["ttft"]["count"] == 1
    assert summary["itl"]["count"] == 3
    assert summary["e2e"]["p50_ms"] is None
    assert histograms.get("ttft").count == 1


def test_histogram_set_rejects_unknown_and_repeated_names() -> None:
    histograms = HistogramSet(["ttft"])
    with pytest.raises(KeyError, match="unknown metric 'e2e'"):
        histograms.record_us("e2e", 5)
    with pytest.raises(ValueError, match="repeat"):
        HistogramSet(["ttft", "ttft"])


def test_histogram_set_encode_decode_and_merge() -> None:
    left = HistogramSet(highest_us=600_000_000)
    right = HistogramSet(highest_us=600_000_000)
    for index, value in enumerate(_lognormal_us(5, 400)):
        left.record_us(LATENCY_METRICS[index % 4], value)
        right.record_us(LATENCY_METRICS[(index + 1) % 4], value // 2)
    decoded = HistogramSet.decode(left.encode())
    assert decoded.metrics == left.metrics
    assert decoded.summary() == left.summary()
    decoded.merge(HistogramSet.decode(right.encode()))
    left.merge(right)
    assert decoded.encode() == left.encode()
    assert sum(summary["count"] for summary in left.summary().values()) == 800  # type: ignore[misc]
    with pytest.raises(ValueError, match="cannot merge"):
        left.merge(HistogramSet(["ttft"], highest_us=600_000_000))
