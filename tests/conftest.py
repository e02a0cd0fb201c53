"""Shared fixtures: async tests run on asyncio (uvloop where installed); timing tests can hold
off the garbage collector."""

from __future__ import annotations

import gc
from collections.abc import Iterator
from typing import Any

import pytest


def pytest_collection_finish(session: pytest.Session) -> None:
    # Everything imported so far lives until the end: keep it out of every later full
    # collection, which in a suite this size (pandas, scipy, Dask, hypothesis) otherwise
    # scans some 200,000 objects and pauses the process for 0.1 s or more.
    gc.collect()
    gc.freeze()


@pytest.fixture
def anyio_backend() -> tuple[str, dict[str, Any]]:
    try:
        import uvloop  # noqa: F401
    except ImportError:
        return ("asyncio", {})
    return ("asyncio", {"use_uvloop": True})


@pytest.fixture
def gc_paused() -> Iterator[None]:
    """No collector pause inside the test: for checks that a limit ends a request within
    0.15 s of its time while the mock runs in the same process and event loop."""
    gc.collect()
    gc.disable()
    try:
        yield
    finally:
        gc.enable()
