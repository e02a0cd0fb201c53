"""Shared fixtures: async tests run on asyncio (uvloop where installed)."""

from __future__ import annotations

from typing import Any

import pytest


@pytest.fixture
def anyio_backend() -> tuple[str, dict[str, Any]]:
    try:
        import uvloop  # noqa: F401
    except ImportError:
        return ("asyncio", {})
    return ("asyncio", {"use_uvloop": True})
