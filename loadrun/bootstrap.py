"""Bootstrap interval of the change in a latency percentile between a run and its baseline.

The statistic is ``p(current) / median_k p(baseline_k)`` (and the same as a difference):
one percentile of the run under test against the median of that percentile over one or
more baseline runs. Each replicate resamples every run independently, with replacement
and at its own size, recomputes the statistic, and the interval is the percentile
interval of the replicates (Efron and Tibshirani, *An Introduction to the Bootstrap*,
1993, ch. 13).

The samples come from the runs' HdrHistograms, not from their records files:

- the history database keeps every run's histograms, so a baseline can be resampled long
  after its run folder is gone, and the run under test is treated the same way;
- at 3 significant figures a histogram value is within 0.1 % of the measured one, far
  below any threshold worth gating on;
- TTFT, TPOT and E2E hold one sample per request, so resampling histogram values *is*
  resampling requests. ITL holds one sample per gap; gaps of one request are correlated,
  so an ITL interval is narrower than the truth (prefer TPOT for gating per-token speed).

A replicate never materialises its n draws: the r-th smallest of n draws from a
distribution F is F^-1 of the r-th smallest of n uniform draws, and that uniform order
statistic is Beta(r, n - r + 1) distributed (the quantile transform of order statistics;
H. A. David and H. N. Nagaraja, *Order Statistics*, 3rd ed., 2003, section 2.1). So one
Beta draw and one binary search over the distinct values give the resampled percentile
exactly, at any run size.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from loadrun.metrics import LatencyHistogram

__all__ = ["Change", "Distribution", "bootstrap_change"]

IntArray = npt.NDArray[np.int64]
FloatArray = npt.NDArray[np.float64]


def rank_for(percentile: float, count: int) -> int:
    """HdrHistogram's rank rule: round(percentile / 100 * count), at least 1."""
    return max(1, int(percentile / 100.0 * count + 0.5))


@dataclass(frozen=True, slots=True)
class Distribution:
    """The samples of one metric of one run: distinct values (sorted, microseconds) and counts."""

    values_us: IntArray
    counts: IntArray

    def __post_init__(self) -> None:
        if self.values_us.shape != self.counts.shape or self.values_us.ndim != 1:
            raise ValueError("values and counts must be one-dimensional and of the same length")
        if self.values_us.size and np.any(np.diff(self.values_us) <= 0):
            raise ValueError("values must be strictly increasing")
        if np.any(self.counts < 1):
            raise ValueError("every count must be at least 1")

    @property
    def count(self) -> int:
        return int(self.counts.sum())

    @classmethod
    def from_samples(cls, samples_us: Sequence[int] | IntArray) -> Distribution:
        values, counts = np.unique(np.asarray(samples_us, dtype=np.int64), return_counts=True)
        return cls(values.astype(np.int64), counts.astype(np.int64))

    @classmethod
    def from_histogram(cls, histogram: LatencyHistogram) -> Distribution:
        """Every sample of the histogram, read back rank by rank through its percentile API."""
        total = histogram.count
        if not total:
            return cls(np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64))
        # Percentile 100 * r / n asks for rank r exactly (see rank_for), so this is the
        # sorted sample, each value at its bucket's top as in the histogram's percentiles.
        by_percentile = histogram.percentiles_us(100.0 * rank / total for rank in range(1, total + 1))
        return cls.from_samples(list(by_percentile.values()))

    def percentile_us(self, percentile: float) -> int:
        if not self.values_us.size:
            raise ValueError("no samples")
        cumulative = np.cumsum(self.counts)
        index = int(np.searchsorted(cumulative, rank_for(percentile, self.count)))
        return int(self.values_us[index])

    def resampled_percentiles_us(
        self, percentile: float, resamples: int, rng: np.random.Generator
    ) -> IntArray:
        """The percentile of ``resamples`` bootstrap resamples, each of this run's own size."""
        total = self.count
        rank = rank_for(percentile, total)
        uniform_order_statistic = rng.beta(rank, total - rank + 1, size=resamples)
        # F^-1(u): the smallest value whose cumulative count reaches u * n.
        index = np.searchsorted(np.cumsum(self.counts), uniform_order_statistic * total, side="left")
        return np.asarray(self.values_us[np.minimum(index, self.values_us.size - 1)], dtype=np.int64)


@dataclass(frozen=True, slots=True)
class Change:
    """How one percentile moved: point estimates and bootstrap intervals."""

    percentile: float
    current_us: float
    baseline_us: float
    """The median over the baseline runs of their percentile."""
    ratio: float
    ratio_low: float
    ratio_high: float
    rise_us: float
    rise_low_us: float
    rise_high_us: float
    confidence: float
    resamples: int


def bootstrap_change(
    current: Distribution,
    baselines: Sequence[Distribution],
    percentile: float,
    *,
    confidence: float = 0.95,
    resamples: int = 2000,
    seed: int = 1,
) -> Change:
    """Point estimate and two-sided percentile-bootstrap interval of the ratio and the rise."""
    if not 0.0 < percentile <= 100.0:
        raise ValueError(f"percentile must be within (0, 100], got {percentile}")
    if not 0.5 <= confidence < 1.0:
        raise ValueError(f"confidence must be within [0.5, 1), got {confidence}")
    if resamples < 100:
        raise ValueError(f"at least 100 resamples are needed, got {resamples}")
    if not current.count or not baselines or any(not base.count for base in baselines):
        raise ValueError("the run and every baseline need samples")
    rng = np.random.default_rng(seed)
    current_reps = current.resampled_percentiles_us(percentile, resamples, rng).astype(np.float64)
    baseline_reps = np.median(
        np.stack([base.resampled_percentiles_us(percentile, resamples, rng) for base in baselines]),
        axis=0,
    )
    current_us = float(current.percentile_us(percentile))
    baseline_us = float(np.median([base.percentile_us(percentile) for base in baselines]))
    tail = (1.0 - confidence) / 2.0
    ratio_low, ratio_high = np.quantile(current_reps / baseline_reps, [tail, 1.0 - tail])
    rise_low, rise_high = np.quantile(current_reps - baseline_reps, [tail, 1.0 - tail])
    return Change(
        percentile=percentile,
        current_us=current_us,
        baseline_us=baseline_us,
        ratio=current_us / baseline_us,
        ratio_low=float(ratio_low),
        ratio_high=float(ratio_high),
        rise_us=current_us - baseline_us,
        rise_low_us=float(rise_low),
        rise_high_us=float(rise_high),
        confidence=confidence,
        resamples=resamples,
    )
