"""Generator health: was the load generator itself the bottleneck of a run?

A generator that cannot keep up makes the target look slower than it is, so every run
is judged on four signs, each against its limit:

- event-loop lag p99: how late the loop wakes up (every timestamp it takes is that late);
- receive backlog p99: how long answers wait in the socket before the loop reads them
  (kernel receive stamp to read; only where the transport has kernel stamps);
- send lateness p99: how long after its intended time a request was sent;
- CPU: the share of one core the event-loop thread used over the run.

The first three are the timing errors a saturated generator causes; a run where any of
them is over its limit is *generator-limited*, and the note says by how much. CPU alone
does not flag a run (the open loop polls the last stretch before each due time, which
uses CPU without making anything late), but a share near one core is reported as a warning:
it is the cause the lag will show next.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Mapping
from typing import Any

from loadrun.driver import LATE_SEND_US
from loadrun.monitor import LAG_LIMIT_P99_US

__all__ = [
    "CPU_BUSY_SHARE",
    "LOOP_LAG_LIMIT_MS",
    "RECEIVE_BACKLOG_LIMIT_MS",
    "SEND_LATENESS_LIMIT_MS",
    "CpuMeter",
    "assess_generator",
    "generator_note",
]

LOOP_LAG_LIMIT_MS = LAG_LIMIT_P99_US / 1000
RECEIVE_BACKLOG_LIMIT_MS = 5.0
"""Receive backlog p99 above this: answers waited for the loop (common practice, no source;
the same bound as the loop lag, since a lagging loop is what makes them wait)."""
SEND_LATENESS_LIMIT_MS = LATE_SEND_US / 1000
CPU_BUSY_SHARE = 0.9
"""The event-loop thread used at least this share of one core: near saturation (common
practice, no source)."""

# (summary key, words for the note, limit in ms)
_TIMING_SIGNS: tuple[tuple[str, str, float], ...] = (
    ("loop_lag_p99_ms", "event-loop lag p99", LOOP_LAG_LIMIT_MS),
    ("receive_error_p99_ms", "receive backlog p99", RECEIVE_BACKLOG_LIMIT_MS),
    ("send_lag_p99_ms", "send lateness p99", SEND_LATENESS_LIMIT_MS),
)


class CpuMeter:
    """CPU time of the calling thread (the event loop's) against wall time, over a span."""

    def __init__(
        self,
        cpu_clock: Callable[[], float] = time.thread_time,
        wall_clock: Callable[[], float] = time.perf_counter,
    ) -> None:
        self._cpu_clock = cpu_clock
        self._wall_clock = wall_clock
        self._cpu_start = 0.0
        self._wall_start = 0.0

    def start(self) -> None:
        self._cpu_start = self._cpu_clock()
        self._wall_start = self._wall_clock()

    def stop(self) -> dict[str, float | None]:
        """``cpu_s``, ``wall_s`` and ``cpu_share`` (of one core) since :meth:`start`."""
        cpu_s = max(0.0, self._cpu_clock() - self._cpu_start)
        wall_s = max(0.0, self._wall_clock() - self._wall_start)
        return {
            "cpu_s": round(cpu_s, 6),
            "wall_s": round(wall_s, 6),
            "cpu_share": round(cpu_s / wall_s, 4) if wall_s > 0 else None,
        }


def assess_generator(
    generator: Mapping[str, Any], cpu: Mapping[str, float | None] | None = None
) -> dict[str, Any]:
    """``generator`` (a summary's section) with CPU, a ``health`` verdict and ``limited`` set.

    ``health.checks`` lists every sign measured with its limit and ratio; ``over_by`` is
    the largest ratio over a limit (1.0 = at the limit), None when none is over.
    """
    judged = dict(generator)
    if cpu is not None:
        judged.update(cpu)
    checks: list[dict[str, Any]] = []
    over: list[str] = []
    worst: float | None = None
    for key, words, limit in _TIMING_SIGNS:
        value = judged.get(key)
        if value is None:
            continue
        ratio = float(value) / limit
        checks.append({"sign": key, "value_ms": value, "limit_ms": limit, "ratio": round(ratio, 3)})
        if ratio > 1.0:
            over.append(f"{words} {float(value):.1f} ms is {ratio:.1f}x its limit of {limit:g} ms")
            worst = ratio if worst is None else max(worst, ratio)
    share = judged.get("cpu_share")
    warnings: list[str] = []
    if share is not None:
        checks.append(
            {
                "sign": "cpu_share",
                "value": share,
                "limit": CPU_BUSY_SHARE,
                "ratio": round(share / CPU_BUSY_SHARE, 3),
            }
        )
        if share >= CPU_BUSY_SHARE:
            warnings.append(f"the event loop used {100 * share:.0f} % of one core: close to saturation")
    note = None
    if over:
        note = "generator-limited: " + "; ".join(over)
        if warnings:
            note += f" ({warnings[0]})"
        note += ". The target's latencies include the generator's own delay."
    elif warnings:
        note = f"generator warning: {warnings[0]}."
    judged["limited"] = bool(over)
    judged["health"] = {
        "checks": checks,
        "over_by": round(worst, 3) if worst is not None else None,
        "note": note,
    }
    return judged


def generator_note(summary: Mapping[str, Any]) -> str | None:
    """The one-line verdict on the generator of a summary, for views and the gate.

    Summaries written before the verdict existed fall back to their loop lag.
    """
    generator = summary.get("generator") or {}
    health = generator.get("health") or {}
    note = health.get("note")
    if note is not None:
        return str(note)
    if generator.get("limited"):
        lag = generator.get("loop_lag_p99_ms")
        detail = (
            f": event-loop lag p99 {lag:.1f} ms (limit {LOOP_LAG_LIMIT_MS:g} ms)" if lag is not None else ""
        )
        return f"generator-limited{detail}"
    return None
