"""Keep the garbage collector's full collections short while a load level runs.

A full collection walks every object the interpreter tracks; after importing the command
line's libraries that is some 200,000 objects, and a pause of 60-70 ms in the middle of a
level (measured: an open-loop run at 50 arrivals/s, its latest send 71 ms late). Every
request in flight then reads that pause as the server's latency. ``gc.freeze()`` moves the
objects that exist when the level starts to a generation that is never collected, so a
collection during the level walks only what the level itself made; the cost is that cyclic
garbage made before the level waits until it ends to be freed.
"""

from __future__ import annotations

import contextlib
import functools
import gc
from collections.abc import Callable, Coroutine, Iterator
from typing import Any, ParamSpec, TypeVar

__all__ = ["holding_old_objects", "old_objects_held"]

P = ParamSpec("P")
T = TypeVar("T")


@contextlib.contextmanager
def old_objects_held() -> Iterator[None]:
    """Freeze the objects that exist now for the block; thaw them after, unless someone else
    (an embedding program, a test runner) had frozen objects before us: then theirs and ours
    stay frozen, as they would have been."""
    ours = gc.get_freeze_count() == 0
    gc.freeze()
    try:
        yield
    finally:
        if ours:
            gc.unfreeze()


def holding_old_objects(
    level: Callable[P, Coroutine[Any, Any, T]],
) -> Callable[P, Coroutine[Any, Any, T]]:
    """Decorate a coroutine function that runs a load level: ``old_objects_held`` around it."""

    @functools.wraps(level)
    async def held(*args: P.args, **kwargs: P.kwargs) -> T:
        with old_objects_held():
            return await level(*args, **kwargs)

    return held
