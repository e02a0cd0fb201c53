"""Measuring again when the load generator itself was flagged.

On a shared machine a stall of the generator's own can flag a run whose figures were right.
Where an unflagged generator is a test's precondition rather than its subject, the run is
measured again, a bounded number of times, and every re-run is printed (DEVELOPERS.md,
"Timing tests on a shared machine").
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any


def first_unflagged(run: Callable[[int], dict[str, Any]], attempts: int = 3) -> dict[str, Any]:
    """The summary of the first of at most `attempts` runs whose generator kept up, else the last."""
    for attempt in range(attempts):
        summary = run(attempt)
        if not summary["generator"]["limited"]:
            break
        print(f"re-run {attempt + 1}: {summary['generator']['health']['note']}")
    return summary
