"""Generator self-monitoring: how late the event loop wakes up.

If the loop that reads the responses is itself late, every timestamp it takes is late by
as much; a run whose loop lag is large is marked generator-limited instead of being
reported as the target's latency.
"""

from __future__ import annotations

from collections.abc import Callable
from time import perf_counter_ns

import anyio

from loadrun.metrics import LatencyHistogram

LAG_LIMIT_P99_US = 5_000
"""Loop lag p99 above this marks a run generator-limited (common practice, no source)."""


class LoopLagMonitor:
    def __init__(self, interval_s: float = 0.01, clock: Callable[[], int] = perf_counter_ns) -> None:
        self.interval_s = interval_s
        self.clock = clock
        self.lag = LatencyHistogram()

    async def run(self, stop: anyio.Event) -> None:
        interval_ns = int(self.interval_s * 1e9)
        while not stop.is_set():
            before = self.clock()
            await anyio.sleep(self.interval_s)
            late_us = max(0, self.clock() - before - interval_ns) // 1000
            self.lag.record_us(late_us)

    def report(self) -> dict[str, object]:
        p99 = self.lag.percentile_us(99.0) if self.lag.count else 0
        return {
            "loop_lag_p50_ms": (self.lag.percentile_us(50.0) / 1000) if self.lag.count else None,
            "loop_lag_p99_ms": p99 / 1000,
            "loop_lag_max_ms": (self.lag.max_us / 1000) if self.lag.count else None,
            "limited": p99 > LAG_LIMIT_P99_US,
        }
