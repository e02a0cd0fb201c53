"""Counters the server exposes at ``GET /mock/stats``, and a bounded window of timing samples."""

from __future__ import annotations

import math
from array import array
from dataclasses import dataclass
from typing import Any

from mock_server.scheduler import SchedulerCounters

DEFAULT_WINDOW = 65_536
"""Samples kept per timing window: at 50 steps/s about 22 minutes of steps."""


class SampleWindow:
    """The most recent ``capacity`` integer samples (a ring), plus an all-time count and max.

    Bounded memory whatever the run length; percentiles are exact over the kept window.
    """

    __slots__ = ("_capacity", "_next", "_samples", "count", "max_seen")

    def __init__(self, capacity: int = DEFAULT_WINDOW) -> None:
        if capacity < 1:
            raise ValueError("capacity must be at least 1")
        self._capacity = capacity
        self._samples = array("q")
        self._next = 0
        self.count = 0
        self.max_seen: int | None = None

    def clear(self) -> None:
        """Forget every sample (count and max too), e.g. at the start of a measurement window."""
        self._samples = array("q")
        self._next = 0
        self.count = 0
        self.max_seen = None

    def add(self, value: int) -> None:
        if len(self._samples) < self._capacity:
            self._samples.append(value)
        else:
            self._samples[self._next] = value
            self._next = (self._next + 1) % self._capacity
        self.count += 1
        if self.max_seen is None or value > self.max_seen:
            self.max_seen = value

    def percentile(self, fraction: float) -> int | None:
        """Nearest-rank percentile (0 < fraction <= 1) of the kept samples; None if empty."""
        if not self._samples:
            return None
        ordered = sorted(self._samples)
        # The small epsilon keeps 0.99 * 100 from rounding up to rank 100.
        rank = math.ceil(fraction * len(ordered) - 1e-9)
        return ordered[min(len(ordered), max(1, rank)) - 1]

    def summary(self) -> dict[str, int | None]:
        return {
            "p50": self.percentile(0.50),
            "p99": self.percentile(0.99),
            "max": self.max_seen,
            "samples": self.count,
        }


@dataclass(slots=True)
class HttpCounters:
    """What the HTTP layer counts on top of the engine's own counters."""

    requests_received: int = 0
    requests_invalid: int = 0


def stats_document(
    *,
    http: HttpCounters,
    engine_counters: SchedulerCounters,
    queue_length: int,
    running: int,
    pacing_error_us: SampleWindow,
    delivery_pass_us: SampleWindow,
    engine_config: dict[str, Any],
) -> dict[str, Any]:
    """The flat JSON object served at /mock/stats (times in integer microseconds)."""
    pacing = pacing_error_us.summary()
    delivery = delivery_pass_us.summary()
    return {
        "requests_received": http.requests_received,
        "requests_admitted": engine_counters.admitted,
        "requests_completed": engine_counters.completed,
        "requests_cancelled": engine_counters.cancelled,
        "requests_rejected": engine_counters.rejected + http.requests_invalid,
        "tokens_emitted": engine_counters.tokens_emitted,
        "steps": engine_counters.steps,
        "queue_length": queue_length,
        "running": running,
        "max_running_seen": engine_counters.max_running_seen,
        "pacing_error_p50_us": pacing["p50"],
        "pacing_error_p99_us": pacing["p99"],
        "pacing_error_max_us": pacing["max"],
        "pacing_samples": pacing["samples"],
        "delivery_pass_p50_us": delivery["p50"],
        "delivery_pass_p99_us": delivery["p99"],
        "delivery_pass_max_us": delivery["max"],
        "engine": engine_config,
    }
