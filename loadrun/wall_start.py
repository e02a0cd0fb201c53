"""Waiting for an agreed wall-clock instant: how the shards of one level start together.

Event-loop timers fire up to a millisecond late, so the wait sleeps until a little before
the instant and polls the rest; from then on each process times with its own monotonic
clock.
"""

from __future__ import annotations

import time
from collections.abc import Callable

import anyio

__all__ = ["wait_until_wall"]

POLL_BEFORE_S = 0.002


async def wait_until_wall(instant: float, clock: Callable[[], float] = time.time) -> None:
    """Return at ``instant`` (seconds since the epoch), or at once if it has passed."""
    while True:
        left = instant - clock()
        if left <= 0:
            return
        await anyio.sleep(left - POLL_BEFORE_S if left > POLL_BEFORE_S else 0)
