"""Latency histograms: HdrHistograms of integer microseconds, one per latency metric.

Every value is recorded, none is lost without a trace:

- a value below the lowest trackable one is recorded as that lowest value (a gap of 0 us
  between two chunks is a real measurement);
- a value above the highest trackable one is recorded as a marker just past the ceiling
  and counted in ``overflow``; percentiles that fall on it read above ``highest_us``;
- a negative value means a broken clock and raises :class:`MeasurementError`.

To carry the overflow count through ``encode``/``decode`` and ``merge``, the underlying
HdrHistogram tracks values up to twice the ceiling and the marker sits in the first bucket
past the ceiling, where no in-range value can land.
"""

from __future__ import annotations

import binascii
import zlib
from collections.abc import Iterable, Mapping
from typing import Any

from hdrh.codec import HdrCookieException, HdrHistogramSettingsException, HdrLengthException
from hdrh.histogram import HdrHistogram

from loadrun.errors import MeasurementError, StoreError

__all__ = ["LATENCY_METRICS", "PERCENTILES", "HistogramSet", "LatencyHistogram"]

LATENCY_METRICS: tuple[str, ...] = ("ttft", "itl", "tpot", "e2e")
PERCENTILES: tuple[float, ...] = (50.0, 90.0, 95.0, 99.0, 99.9)

_US_PER_MS = 1000.0
# How the underlying histogram's range relates to the ceiling (room for the overflow marker).
_RANGE_FACTOR = 2
_DECODE_ERRORS = (
    binascii.Error,
    ValueError,
    TypeError,
    zlib.error,
    HdrCookieException,
    HdrLengthException,
    HdrHistogramSettingsException,
)


def _percentile_key(percentile: float) -> str:
    return f"p{percentile:g}_ms"


class LatencyHistogram:
    """Distribution of one latency metric, in integer microseconds."""

    __slots__ = ("_highest_us", "_hist", "_lowest_us", "_overflow_marker_us")

    def __init__(
        self,
        lowest_us: int = 1,
        highest_us: int = 3_600_000_000,
        significant_figures: int = 3,
    ) -> None:
        if lowest_us < 1:
            raise ValueError(f"lowest_us must be at least 1, got {lowest_us}")
        if highest_us < 2 * lowest_us:
            raise ValueError(f"highest_us must be at least 2 * lowest_us, got {highest_us}")
        if not 1 <= significant_figures <= 5:
            raise ValueError(f"significant_figures must be 1..5, got {significant_figures}")
        self._init_from(
            HdrHistogram(lowest_us, _RANGE_FACTOR * highest_us, significant_figures),
            lowest_us,
            highest_us,
        )

    def _init_from(self, hist: Any, lowest_us: int, highest_us: int) -> None:
        self._hist = hist
        self._lowest_us = lowest_us
        self._highest_us = highest_us
        self._overflow_marker_us: int = hist.get_highest_equivalent_value(highest_us) + 1

    # --- configuration ------------------------------------------------------------------

    @property
    def lowest_us(self) -> int:
        return self._lowest_us

    @property
    def highest_us(self) -> int:
        """The ceiling: larger values are counted in :attr:`overflow`."""
        return self._highest_us

    @property
    def significant_figures(self) -> int:
        return int(self._hist.significant_figures)

    def _same_layout(self, other: LatencyHistogram) -> bool:
        return (
            self._lowest_us == other._lowest_us
            and self._highest_us == other._highest_us
            and self.significant_figures == other.significant_figures
        )

    # --- recording ----------------------------------------------------------------------

    def record_us(self, value_us: int, count: int = 1) -> None:
        """Record ``count`` samples of ``value_us`` microseconds."""
        if value_us < self._lowest_us:
            if value_us < 0:
                raise MeasurementError(f"negative latency {value_us} us: clock error")
            value_us = self._lowest_us
        elif value_us > self._highest_us:
            value_us = self._overflow_marker_us
        if count < 1:
            raise ValueError(f"count must be at least 1, got {count}")
        if not self._hist.record_value(value_us, count):
            raise MeasurementError(f"histogram refused {value_us} us")

    def record_corrected_us(self, value_us: int, expected_interval_us: int, count: int = 1) -> None:
        """Record ``value_us`` and back-fill the samples that coordinated omission hid.

        Same samples as HdrHistogram's ``record_corrected_value``: ``value_us``, then
        ``value_us - k * expected_interval_us`` for k = 1, 2, ... down to the first one that
        is no larger than the interval. Samples that fall in the same bucket are recorded
        together, so a long stall costs one call per bucket, not one per missed sample.
        """
        if expected_interval_us < 1:
            raise ValueError(f"expected_interval_us must be positive, got {expected_interval_us}")
        if value_us < 0:
            raise MeasurementError(f"negative latency {value_us} us: clock error")
        interval = expected_interval_us
        last_k = 0 if value_us <= interval else -(-value_us // interval) - 1
        k = 0
        while k <= last_k:
            sample = value_us - k * interval
            if sample > self._highest_us:
                # Every sample still above the ceiling goes to the overflow marker.
                batch_end = min(last_k, (value_us - self._highest_us - 1) // interval)
            elif sample < self._lowest_us:
                # All the rest are smaller still, so all are clamped to the lowest value.
                batch_end = last_k
            else:
                bucket_floor = self._hist.get_lowest_equivalent_value(sample)
                batch_end = min(last_k, k + (sample - bucket_floor) // interval)
            self.record_us(sample, (batch_end - k + 1) * count)
            k = batch_end + 1

    # --- reading ------------------------------------------------------------------------

    @property
    def count(self) -> int:
        """All recorded samples, overflow included."""
        return int(self._hist.get_total_count())

    @property
    def overflow(self) -> int:
        """Samples that were above :attr:`highest_us`."""
        return int(self._hist.get_count_at_value(self._overflow_marker_us))

    @property
    def mean_us(self) -> float:
        """Mean of the recorded samples (bucket midpoints); ValueError when empty."""
        self._require_samples()
        return float(self._hist.get_mean_value())

    @property
    def min_us(self) -> int:
        """Smallest recorded value (bottom of its bucket); ValueError when empty."""
        self._require_samples()
        return int(self._hist.get_min_value())

    @property
    def max_us(self) -> int:
        """Largest recorded value (top of its bucket); ValueError when empty."""
        self._require_samples()
        return int(self._hist.get_max_value())

    def percentile_us(self, percentile: float) -> int:
        """Value at ``percentile`` (0..100): the top of the bucket holding that rank.

        The rank is ``round(percentile / 100 * count)`` (at least 1), HdrHistogram's rule.
        ValueError when empty: there is no value to report, and 0 would read as a latency.
        """
        _check_percentile(percentile)
        self._require_samples()
        return int(self._hist.get_value_at_percentile(percentile))

    def percentiles_us(self, percentiles: Iterable[float]) -> dict[float, int]:
        """Several percentiles in one pass over the counts; ValueError when empty."""
        wanted = list(percentiles)
        for percentile in wanted:
            _check_percentile(percentile)
        self._require_samples()
        values = self._hist.get_percentile_to_value_dict(wanted)
        return {percentile: int(values[percentile]) for percentile in wanted}

    def summary(self) -> dict[str, float | int | None]:
        """Count, then mean, min, max and :data:`PERCENTILES` in milliseconds (None if empty)."""
        summary: dict[str, float | int | None] = {"count": self.count}
        keys = ["mean_ms", "min_ms", "max_ms", *map(_percentile_key, PERCENTILES)]
        if not self.count:
            return summary | dict.fromkeys(keys)
        values_us = [
            self.mean_us,
            self.min_us,
            self.max_us,
            *self.percentiles_us(PERCENTILES).values(),
        ]
        for key, value_us in zip(keys, values_us, strict=True):
            summary[key] = value_us / _US_PER_MS
        return summary

    def _require_samples(self) -> None:
        if not self._hist.get_total_count():
            raise ValueError("the histogram is empty")

    # --- combining and storing ----------------------------------------------------------

    def merge(self, other: LatencyHistogram) -> None:
        """Add every sample of ``other`` to this histogram."""
        if not self._same_layout(other):
            raise ValueError("cannot merge histograms with different ranges or precision")
        if not other.count:
            # hdrh's add() would take the empty histogram's minimum (0) as the new minimum.
            return
        self._hist.add(other._hist)

    def encode(self) -> str:
        """The portable HdrHistogram form (compressed, base64)."""
        encoded: bytes = self._hist.encode()
        return encoded.decode("ascii")

    @classmethod
    def decode(cls, encoded: str) -> LatencyHistogram:
        """Rebuild a histogram from :meth:`encode`'s output."""
        try:
            hist = HdrHistogram.decode(encoded)
        except _DECODE_ERRORS as exc:
            raise StoreError(f"not an encoded histogram: {exc}") from exc
        highest_tracked = int(hist.highest_trackable_value)
        if highest_tracked % _RANGE_FACTOR:
            raise StoreError("encoded histogram was not written by LatencyHistogram.encode")
        decoded = cls.__new__(cls)
        decoded._init_from(hist, int(hist.lowest_trackable_value), highest_tracked // _RANGE_FACTOR)
        return decoded

    def __repr__(self) -> str:
        return (
            f"LatencyHistogram(count={self.count}, overflow={self.overflow}, "
            f"lowest_us={self._lowest_us}, highest_us={self._highest_us})"
        )


def _check_percentile(percentile: float) -> None:
    if not 0.0 <= percentile <= 100.0:
        raise ValueError(f"percentile must be within 0..100, got {percentile}")


class HistogramSet:
    """One :class:`LatencyHistogram` per metric name, all with the same range."""

    __slots__ = ("_histograms",)

    def __init__(
        self,
        metrics: Iterable[str] = LATENCY_METRICS,
        lowest_us: int = 1,
        highest_us: int = 3_600_000_000,
        significant_figures: int = 3,
    ) -> None:
        names = list(metrics)
        if len(set(names)) != len(names):
            raise ValueError(f"metric names repeat: {names}")
        self._histograms = {
            name: LatencyHistogram(lowest_us, highest_us, significant_figures) for name in names
        }

    @property
    def metrics(self) -> tuple[str, ...]:
        return tuple(self._histograms)

    def get(self, metric: str) -> LatencyHistogram:
        try:
            return self._histograms[metric]
        except KeyError:
            known = ", ".join(self._histograms)
            raise KeyError(f"unknown metric {metric!r}; known: {known}") from None

    def record_us(self, metric: str, value_us: int, count: int = 1) -> None:
        self.get(metric).record_us(value_us, count)

    def summary(self) -> dict[str, dict[str, float | int | None]]:
        return {name: hist.summary() for name, hist in self._histograms.items()}

    def encode(self) -> dict[str, str]:
        return {name: hist.encode() for name, hist in self._histograms.items()}

    @classmethod
    def decode(cls, encoded: Mapping[str, str]) -> HistogramSet:
        """Rebuild a set from :meth:`encode`'s output, keeping its metric order."""
        decoded = cls.__new__(cls)
        decoded._histograms = {name: LatencyHistogram.decode(text) for name, text in encoded.items()}
        return decoded

    def merge(self, other: HistogramSet) -> None:
        """Add every sample of ``other``; both sets must hold the same metrics."""
        if set(other._histograms) != set(self._histograms):
            raise ValueError(
                f"cannot merge metrics {sorted(other._histograms)} into {sorted(self._histograms)}"
            )
        for name, hist in self._histograms.items():
            hist.merge(other._histograms[name])

    def __repr__(self) -> str:
        counts = ", ".join(f"{name}={hist.count}" for name, hist in self._histograms.items())
        return f"HistogramSet({counts})"
