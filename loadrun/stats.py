"""Bootstrap confidence intervals for percentiles, resampling whole requests.

A request gives one value to TTFT, TPOT and E2E but many to ITL (one per gap between
chunks), and the gaps of one request are not independent of each other. So the resampling
unit is the request (a cluster bootstrap): a replicate draws as many requests as were
measured, with replacement, and takes the percentile of all the values they carry. With
one value per request this is the ordinary nonparametric bootstrap.

Percentiles use the inverted-CDF definition (Hyndman and Fan type 1, numpy's
``method="inverted_cdf"``): the smallest value whose cumulative share reaches q. Ranks are
computed in integers so that 90 % of 40 is exactly 36.

Two samples measured independently are compared by pairing their replicates: replicate b of
the ratio is replicate b of A over replicate b of B; the interval is the percentile
interval of those replicates (Efron and Tibshirani, *An Introduction to the Bootstrap*,
1993, ch. 13), the method ``scipy.stats.bootstrap(..., method="percentile")`` implements.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

__all__ = [
    "Interval",
    "Sample",
    "difference_interval",
    "percentile",
    "percentile_interval",
    "ratio_interval",
    "ratio_of_replicates",
    "replicate_percentiles",
    "resample_counts",
]

_WORK_ELEMENTS = 2_000_000
"""Resamples are processed in chunks of about this many (resample x value) cells."""
_MILLI = 1000
"""Percentiles are handled in thousandths (99.9 -> 99900) so ranks stay exact integers."""


@dataclass(frozen=True, slots=True)
class Sample:
    """Values grouped by the request (cluster) that produced them, sorted by value."""

    values: NDArray[np.float64]
    owners: NDArray[np.intp]
    """Index of the cluster each value belongs to, in the same order as ``values``."""
    clusters: int

    @classmethod
    def of_values(cls, values: Sequence[float] | NDArray[np.float64]) -> Sample:
        """One value per cluster (TTFT, TPOT, E2E: one per request)."""
        array = np.asarray(values, dtype=np.float64)
        if array.ndim != 1:
            raise ValueError("values must be one-dimensional")
        order = np.argsort(array, kind="stable")
        return cls(array[order], order.astype(np.intp), int(array.size))

    @classmethod
    def of_groups(cls, groups: Sequence[Sequence[float]]) -> Sample:
        """Several values per cluster (ITL: the gaps of one request); empty groups are dropped."""
        kept = [np.asarray(group, dtype=np.float64) for group in groups if len(group)]
        if not kept:
            return cls(np.empty(0), np.empty(0, dtype=np.intp), 0)
        values = np.concatenate(kept)
        owners = np.repeat(np.arange(len(kept), dtype=np.intp), [len(group) for group in kept])
        order = np.argsort(values, kind="stable")
        return cls(values[order], owners[order], len(kept))

    def __len__(self) -> int:
        return int(self.values.size)


def _ranks(percentiles: Sequence[float], totals: NDArray[np.int64]) -> NDArray[np.int64]:
    """Inverted-CDF rank (1-based) of each percentile for each total: ceil(q * total), at least 1."""
    milli = np.array([round(q * _MILLI) for q in percentiles], dtype=np.int64)
    if np.any(milli < 0) or np.any(milli > 100 * _MILLI):
        raise ValueError(f"percentiles must be within 0..100, got {list(percentiles)}")
    scaled = totals[:, None] * milli[None, :]
    ranks: NDArray[np.int64] = np.maximum(1, -(-scaled // (100 * _MILLI)))
    return ranks


def percentile(sample: Sample, q: float) -> float:
    """The sample's q-th percentile (inverted CDF); ValueError when the sample is empty."""
    if not len(sample):
        raise ValueError("the sample is empty")
    rank = int(_ranks([q], np.array([len(sample)], dtype=np.int64))[0, 0])
    return float(sample.values[rank - 1])


def replicate_percentiles(
    sample: Sample, percentiles: Sequence[float], n_resamples: int, rng: np.random.Generator
) -> NDArray[np.float64]:
    """Bootstrap replicates of the percentiles: an array of shape (n_resamples, len(percentiles))."""
    if not len(sample):
        raise ValueError("the sample is empty")
    if n_resamples < 1:
        raise ValueError(f"n_resamples must be at least 1, got {n_resamples}")
    n = sample.clusters
    out = np.empty((n_resamples, len(percentiles)), dtype=np.float64)
    chunk = max(1, _WORK_ELEMENTS // max(len(sample), n))
    for start in range(0, n_resamples, chunk):
        rows = min(n_resamples, start + chunk) - start
        draws = resample_counts(n, rows, rng)
        # Each value weighs as often as its request was drawn (int32: the sums stay below n * values).
        cumulative = np.cumsum(draws[:, sample.owners], axis=1, dtype=np.int32)
        ranks = _ranks(percentiles, cumulative[:, -1].astype(np.int64))
        for row in range(rows):
            # First position whose cumulative weight reaches each rank.
            positions = np.searchsorted(cumulative[row], ranks[row], side="left")
            out[start + row] = sample.values[positions]
    return out


def resample_counts(n: int, rows: int, rng: np.random.Generator) -> NDArray[np.int32]:
    """For each of ``rows`` resamples, how often each of n items is drawn (n draws with replacement)."""
    drawn = rng.integers(0, n, size=(rows, n)) + (np.arange(rows) * n)[:, None]
    return np.bincount(drawn.ravel(), minlength=rows * n).reshape(rows, n).astype(np.int32)


def percentile_interval(replicates: NDArray[np.float64], confidence: float) -> tuple[float, float]:
    """Equal-tailed percentile interval of bootstrap replicates (linear interpolation)."""
    if not 0.0 < confidence < 1.0:
        raise ValueError(f"confidence must be between 0 and 1, got {confidence}")
    tail = (1.0 - confidence) / 2.0
    low, high = np.percentile(replicates, [100.0 * tail, 100.0 * (1.0 - tail)])
    return float(low), float(high)


@dataclass(frozen=True, slots=True)
class Interval:
    """A point estimate with its bootstrap interval."""

    estimate: float
    low: float
    high: float
    confidence: float

    def contains(self, value: float) -> bool:
        return self.low <= value <= self.high


def ratio_interval(
    a: Sample,
    b: Sample,
    q: float,
    *,
    confidence: float = 0.95,
    n_resamples: int = 4000,
    rng: np.random.Generator,
    floor: float = 0.0,
) -> Interval:
    """Interval of percentile(a, q) / percentile(b, q); values are raised to ``floor`` first."""
    top = np.maximum(replicate_percentiles(a, [q], n_resamples, rng)[:, 0], floor)
    bottom = np.maximum(replicate_percentiles(b, [q], n_resamples, rng)[:, 0], floor)
    return ratio_of_replicates(
        max(percentile(a, q), floor) / max(percentile(b, q), floor), top, bottom, confidence
    )


def ratio_of_replicates(
    estimate: float, top: NDArray[np.float64], bottom: NDArray[np.float64], confidence: float
) -> Interval:
    """Interval of a ratio from the paired replicates of its numerator and denominator."""
    if np.any(bottom <= 0):
        raise ValueError("a ratio needs positive denominators; raise the floor")
    low, high = percentile_interval(top / bottom, confidence)
    return Interval(estimate, low, high, confidence)


def difference_interval(
    a: Sample,
    b: Sample,
    q: float,
    *,
    confidence: float = 0.95,
    n_resamples: int = 4000,
    rng: np.random.Generator,
) -> Interval:
    """Interval of percentile(a, q) - percentile(b, q)."""
    top = replicate_percentiles(a, [q], n_resamples, rng)[:, 0]
    bottom = replicate_percentiles(b, [q], n_resamples, rng)[:, 0]
    low, high = percentile_interval(top - bottom, confidence)
    return Interval(percentile(a, q) - percentile(b, q), low, high, confidence)
