"""The bootstrap behind the gate: samples read back from histograms, intervals, error rates."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from loadrun.bootstrap import Distribution, bootstrap_change, rank_for
from loadrun.metrics import LatencyHistogram


def lognormal_us(rng: np.random.Generator, n: int, median_ms: float, sigma: float = 0.3) -> list[int]:
    return [int(v) for v in rng.lognormal(np.log(median_ms * 1000), sigma, n)]


def test_histogram_samples_are_the_recorded_ones_within_its_precision() -> None:
    """Every sample comes back, in order, each within 0.1 % (3 significant figures, HdrHistogram)."""
    rng = np.random.default_rng(7)
    samples = sorted(lognormal_us(rng, 2500, 80.0, 0.6))
    histogram = LatencyHistogram()
    for value in samples:
        histogram.record_us(value)
    distribution = Distribution.from_histogram(histogram)
    assert distribution.count == len(samples)
    expanded = np.repeat(distribution.values_us, distribution.counts)
    assert np.all(np.abs(expanded - np.array(samples)) <= np.array(samples) * 0.001 + 1)
    for percentile in (1.0, 50.0, 90.0, 95.0, 99.0, 99.9, 100.0):
        assert distribution.percentile_us(percentile) == histogram.percentile_us(percentile), percentile


def test_empty_histogram_gives_no_samples() -> None:
    assert Distribution.from_histogram(LatencyHistogram()).count == 0


def test_rank_rule_is_hdrhistograms() -> None:
    """HdrHistogram: count at percentile = int(p / 100 * n + 0.5), at least 1 (package hdrh)."""
    assert rank_for(95.0, 100) == 95
    assert rank_for(50.0, 3) == 2
    assert rank_for(0.1, 10) == 1
    assert rank_for(100.0, 7) == 7


def test_interval_agrees_with_scipys_bootstrap() -> None:
    """Same statistic, same percentile-interval method: scipy.stats.bootstrap as the reference.

    scipy resamples each sample independently (paired=False), as the gate does; the two
    Monte Carlo intervals agree within their resampling error (2 % here, 4000 resamples).
    """
    rng = np.random.default_rng(11)
    base = lognormal_us(rng, 300, 100.0)
    current = lognormal_us(rng, 300, 115.0)

    def ratio_of_p95(x: np.ndarray, y: np.ndarray, axis: int = -1) -> np.ndarray:
        xs, ys = np.sort(x, axis=axis), np.sort(y, axis=axis)
        return xs[..., rank_for(95.0, x.shape[axis]) - 1] / ys[..., rank_for(95.0, y.shape[axis]) - 1]

    reference = stats.bootstrap(
        (np.array(current), np.array(base)),
        ratio_of_p95,
        paired=False,
        vectorized=True,
        n_resamples=4000,
        confidence_level=0.95,
        method="percentile",
        rng=np.random.default_rng(3),
    ).confidence_interval
    change = bootstrap_change(
        Distribution.from_samples(current), [Distribution.from_samples(base)], 95.0, resamples=4000
    )
    assert change.ratio == pytest.approx(ratio_of_p95(np.array(current), np.array(base)))
    assert change.ratio_low == pytest.approx(reference.low, rel=0.02)
    assert change.ratio_high == pytest.approx(reference.high, rel=0.02)
    assert change.ratio_low < change.ratio < change.ratio_high


def test_equal_distributions_rarely_look_slower() -> None:
    """With no change, the lower end of a 95 % two-sided interval lies above 1 in about 2.5 %
    of trials (the interval's nominal one-sided error; Efron and Tibshirani 1993, ch. 13).
    Percentile intervals of a p95 are only approximately exact: 0-6 % is accepted."""
    rng = np.random.default_rng(5)
    trials = 300
    above = 0
    for trial in range(trials):
        a = Distribution.from_samples(lognormal_us(rng, 200, 100.0))
        b = Distribution.from_samples(lognormal_us(rng, 200, 100.0))
        change = bootstrap_change(a, [b], 95.0, resamples=400, seed=trial)
        above += change.ratio_low > 1.0
    assert above / trials <= 0.06


def test_a_quarter_slower_is_seen() -> None:
    """Power depends on the spread: at a log-sd of 0.1 and 300 samples per run, a 25 % slower
    p95 clears a 15 % limit nearly always (measured 100 of 100 trials); at 0.2 and 200
    samples only about half the time, which is why smoke runs need enough requests."""
    rng = np.random.default_rng(9)
    seen = 0
    for trial in range(40):
        base = Distribution.from_samples(lognormal_us(rng, 300, 100.0, 0.1))
        slow = Distribution.from_samples(lognormal_us(rng, 300, 125.0, 0.1))
        seen += bootstrap_change(slow, [base], 95.0, resamples=500, seed=trial).ratio_low > 1.15
    assert seen >= 38


def test_median_of_baselines_resists_one_outlier_run() -> None:
    rng = np.random.default_rng(13)
    normal = [Distribution.from_samples(lognormal_us(rng, 300, 100.0, 0.1)) for _ in range(4)]
    outlier = Distribution.from_samples(lognormal_us(rng, 300, 300.0, 0.1))
    current = Distribution.from_samples(lognormal_us(rng, 300, 100.0, 0.1))
    change = bootstrap_change(current, [*normal, outlier], 95.0, resamples=500)
    assert change.ratio == pytest.approx(1.0, abs=0.05)
    assert change.ratio_low < 1.0 < change.ratio_high


def test_same_seed_same_interval() -> None:
    rng = np.random.default_rng(1)
    a = Distribution.from_samples(lognormal_us(rng, 100, 50.0))
    b = Distribution.from_samples(lognormal_us(rng, 100, 50.0))
    assert bootstrap_change(a, [b], 90.0, resamples=300, seed=4) == bootstrap_change(
        a, [b], 90.0, resamples=300, seed=4
    )


@pytest.mark.parametrize(
    ("percentile", "confidence", "resamples"),
    [(0.0, 0.95, 500), (101.0, 0.95, 500), (95.0, 1.0, 500), (95.0, 0.95, 10)],
)
def test_bad_arguments(percentile: float, confidence: float, resamples: int) -> None:
    sample = Distribution.from_samples([1, 2, 3])
    with pytest.raises(ValueError):
        bootstrap_change(sample, [sample], percentile, confidence=confidence, resamples=resamples)


def test_no_samples_is_an_error() -> None:
    empty = Distribution.from_samples([])
    with pytest.raises(ValueError):
        bootstrap_change(empty, [Distribution.from_samples([1])], 95.0)
