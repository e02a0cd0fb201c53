"""Measuring again when the machine, not the system under test, moved the figures.

On a shared machine (a virtual one that loses CPU to its host now and then) a stall of the
load generator or of the mock can spoil a run whose subject was fine. Where both keeping
their pace is a test's precondition rather than its subject, a run is measured again when
either says it did not, a bounded number of times, and every re-run is printed
(DEVELOPERS.md, "Timing tests on a shared machine"). Both signals are independent of the
figures the tests assert: the generator's own loop lag, and the mock's own step timer.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Sequence
from typing import Any, TypeVar

import httpx

MOCK_LATE_LIMIT_MS = 5.0
"""The mock's step timer late by more than this: its engine did not run as configured (on
an idle machine the latest step of a 64-request night was 1.2-3.2 ms late, 8 nights; 5 ms
is the generator's own limit, common practice, no source)."""

ATTEMPTS = 3
"""Tries of one run at most, the first included (DEVELOPERS.md)."""

RERUN_PAUSE_S = 2.0
"""A run that is measured again waits this long first, so that a burst of contention on
the machine can pass."""


def mock_url_of(target: Any) -> str:
    """The mock's own address (for ``/mock/...``) from the target that loads it."""
    return str(target.base_url).removesuffix("/v1")


def reset_mock_timing(mock_url: str) -> None:
    """Start a new window of the mock's step timings (``mock_url`` without ``/v1``)."""
    httpx.post(f"{mock_url}/mock/stats/reset", timeout=10).raise_for_status()


def mock_late_ms(mock_url: str) -> float:
    """How late the mock's latest engine step of the window was, in ms (0 with no step)."""
    stats = httpx.get(f"{mock_url}/mock/stats", timeout=10).json()
    return (stats["pacing_error_max_us"] or 0) / 1000


def mock_stall(mock_url: str) -> str | None:
    """Why the mock's window says nothing about its engine, or None when it kept its pace."""
    late_ms = mock_late_ms(mock_url)
    return f"mock step timer {late_ms:.1f} ms late at most" if late_ms > MOCK_LATE_LIMIT_MS else None


def pause_before_rerun(why: str, rerun: int) -> None:
    print(f"\nre-run {rerun}: {why}")
    time.sleep(RERUN_PAUSE_S)


def generator_notes(result: Any) -> list[str]:
    """The generator's own complaint about a run (``result.summary``), if it made one."""
    generator = result.summary["generator"]
    return [generator["health"]["note"]] if generator["limited"] else []


Result = TypeVar("Result")


def first_faithful(
    run: Callable[[int], Result],
    mock_urls: Sequence[str] = (),
    attempts: int = ATTEMPTS,
) -> Result:
    """The first of at most `attempts` runs (``run(attempt)``) in which the generator kept up
    and every mock at `mock_urls` kept its engine's pace; else the last."""
    for attempt in range(attempts):
        for url in mock_urls:
            reset_mock_timing(url)
        result = run(attempt)
        reasons = generator_notes(result) + [stall for url in mock_urls if (stall := mock_stall(url))]
        if not reasons or attempt == attempts - 1:
            break
        pause_before_rerun("; ".join(reasons), attempt + 1)
    return result
