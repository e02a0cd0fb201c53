"""Bootstrap intervals of percentiles (loadrun.stats), checked against outside references.

References: numpy's ``percentile(..., method="inverted_cdf")`` (Hyndman and Fan type 1) for
the point statistic, and ``scipy.stats.bootstrap(..., method="percentile")`` (Efron and
Tibshirani 1993, ch. 13) for the intervals, run on the same data.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.stats
from hypothesis import given, settings
from hypothesis import strategies as st

from loadrun.compare import CompareSettings, MetricSamples, Verdict, compare_samples
from loadrun.stats import (
    Sample,
    difference_interval,
    percentile,
    percentile_interval,
    ratio_interval,
    replicate_percentiles,
    resample_counts,
)
from loadrun.targets import TargetSpec


@given(
    values=st.lists(st.floats(0.001, 1e6, allow_nan=False), min_size=1, max_size=60),
    q=st.sampled_from([0.0, 1.0, 10.0, 25.0, 50.0, 70.0, 90.0, 95.0, 99.0, 99.9, 100.0]),
)
@settings(max_examples=200, deadline=None)
def test_percentile_is_numpys_inverted_cdf(values: list[float], q: float) -> None:
    """Reference: numpy.percentile(method="inverted_cdf")."""
    expected = float(np.percentile(np.array(values), q, method="inverted_cdf"))
    assert percentile(Sample.of_values(values), q) == expected


def test_percentile_rank_is_exact_where_floats_are_not() -> None:
    # 70 % of 10 values is rank 7; 0.7 * 10 in floating point is 7.000000000000001.
    assert percentile(Sample.of_values(range(1, 11)), 70.0) == 7.0
    assert percentile(Sample.of_values(range(1, 41)), 90.0) == 36.0


def test_each_replicate_is_the_percentile_of_its_resample() -> None:
    """Clustered values: a replicate must equal numpy's percentile of the resampled values."""
    rng = np.random.default_rng(5)
    groups = [list(rng.lognormal(2.0, 0.7, size)) for size in rng.integers(1, 12, 40)]
    sample = Sample.of_groups(groups)
    quantiles = [50.0, 90.0, 99.0]
    replicates = replicate_percentiles(sample, quantiles, 25, np.random.default_rng(9))
    same_draws = np.random.default_rng(9)
    counts = resample_counts(sample.clusters, 25, same_draws)
    for row, drawn in zip(replicates, counts, strict=True):
        values = np.concatenate([np.repeat(group, times) for group, times in zip(groups, drawn, strict=True)])
        expected = np.percentile(values, quantiles, method="inverted_cdf")
        assert row.tolist() == expected.tolist()


def test_resample_counts_draw_n_with_replacement() -> None:
    counts = resample_counts(50, 2000, np.random.default_rng(1))
    assert counts.shape == (2000, 50)
    assert (counts.sum(axis=1) == 50).all()
    # Each item is drawn Binomial(50, 1/50) times: mean 1, variance 49/50.
    assert counts.mean() == pytest.approx(1.0, abs=1e-12)
    assert counts.var() == pytest.approx(49 / 50, rel=0.03)


def _scipy_interval(a: np.ndarray, b: np.ndarray, q: float, ratio: bool, seed: int) -> tuple[float, float]:
    def statistic(x: np.ndarray, y: np.ndarray, axis: int = -1) -> np.ndarray:
        px = np.percentile(x, q, axis=axis, method="inverted_cdf")
        py = np.percentile(y, q, axis=axis, method="inverted_cdf")
        return px / py if ratio else px - py

    result = scipy.stats.bootstrap(
        (a, b),
        statistic,
        n_resamples=20_000,
        confidence_level=0.95,
        method="percentile",
        vectorized=True,
        rng=np.random.default_rng(seed),
    )
    return float(result.confidence_interval.low), float(result.confidence_interval.high)


@pytest.mark.parametrize("q", [50.0, 90.0])
@pytest.mark.parametrize("ratio", [False, True])
def test_two_sample_interval_matches_scipy_bootstrap(q: float, ratio: bool) -> None:
    """Reference: scipy.stats.bootstrap, method="percentile", two independent samples.

    Both are Monte Carlo estimates with 20,000 resamples; their endpoints must agree to a
    small share of the interval's width (the resampling noise of a percentile endpoint).
    """
    rng = np.random.default_rng(int(q) + ratio)
    a = rng.lognormal(3.0, 0.5, 150)
    b = rng.lognormal(3.1, 0.6, 180)
    sample_a, sample_b = Sample.of_values(a), Sample.of_values(b)
    ours_rng = np.random.default_rng(7)
    if ratio:
        ours = ratio_interval(sample_a, sample_b, q, n_resamples=20_000, rng=ours_rng)
    else:
        ours = difference_interval(sample_a, sample_b, q, n_resamples=20_000, rng=ours_rng)
    low, high = _scipy_interval(a, b, q, ratio, seed=11)
    width = high - low
    assert ours.low == pytest.approx(low, abs=0.05 * width)
    assert ours.high == pytest.approx(high, abs=0.05 * width)
    point = np.percentile(a, q, method="inverted_cdf")
    other = np.percentile(b, q, method="inverted_cdf")
    assert ours.estimate == pytest.approx(point / other if ratio else point - other, rel=1e-12)


def test_percentile_interval_uses_equal_tails() -> None:
    replicates = np.arange(1001, dtype=np.float64)
    assert percentile_interval(replicates, 0.95) == pytest.approx((25.0, 975.0), abs=1e-9)
    with pytest.raises(ValueError):
        percentile_interval(replicates, 1.0)


def test_empty_samples_are_refused() -> None:
    empty = Sample.of_groups([[], []])
    assert empty.clusters == 0 and len(empty) == 0
    with pytest.raises(ValueError):
        percentile(empty, 50.0)
    with pytest.raises(ValueError):
        replicate_percentiles(empty, [50.0], 10, np.random.default_rng(0))


def _synthetic(rng: np.random.Generator, n: int, scale: float = 1.0) -> MetricSamples:
    """Per-request latencies from fixed lognormal laws (a stand-in for one target)."""
    ttft = rng.lognormal(np.log(200.0 * scale), 0.4, n)
    tpot = rng.lognormal(np.log(20.0 * scale), 0.15, n)
    itl = [list(rng.lognormal(np.log(20.0 * scale), 0.3, 15)) for _ in range(n)]
    return MetricSamples(
        {
            "ttft": Sample.of_values(ttft),
            "itl": Sample.of_groups(itl),
            "tpot": Sample.of_values(tpot),
            "e2e": Sample.of_values(ttft + 15 * tpot),
        },
        n,
    )


def test_same_law_is_called_no_difference_in_at_least_95_percent_of_comparisons() -> None:
    """The whole procedure (8 intervals per pair, one shared error budget), with no margin:
    two samples of one law must be called different in at most 5 % of comparisons."""
    rng = np.random.default_rng(2024)
    specs = (TargetSpec(name="a", model="m", base_url="http://127.0.0.1:1/v1"),)
    specs += (TargetSpec(name="b", model="m", base_url="http://127.0.0.1:2/v1"),)
    strict = CompareSettings(targets=specs, smallest_difference=0.0, resamples=1000)
    trials = 120
    differences = 0
    for _ in range(trials):
        samples = {"a": _synthetic(rng, 60), "b": _synthetic(rng, 60)}
        (pair,) = compare_samples(samples, strict, rng)
        differences += pair.verdict is not Verdict.NO_DIFFERENCE
    rate = 1 - differences / trials
    print(f"same law, no margin: 'no difference' in {trials - differences}/{trials} = {rate:.1%}")
    assert rate >= 0.95


def test_a_twenty_percent_slower_law_is_found() -> None:
    rng = np.random.default_rng(7)
    specs = (TargetSpec(name="fast", model="m", base_url="http://127.0.0.1:1/v1"),)
    specs += (TargetSpec(name="slow", model="m", base_url="http://127.0.0.1:2/v1"),)
    samples = {"fast": _synthetic(rng, 80), "slow": _synthetic(rng, 80, scale=1.2)}
    (pair,) = compare_samples(samples, CompareSettings(targets=specs, resamples=1000), rng)
    assert pair.verdict is Verdict.FASTER
    by_key = {(m.metric, m.percentile): m for m in pair.metrics}
    assert by_key["tpot", 50.0].verdict is Verdict.FASTER
    assert by_key["tpot", 50.0].ratio.contains(1 / 1.2)
