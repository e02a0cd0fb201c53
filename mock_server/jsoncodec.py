"""JSON encode/decode: orjson when installed (fast, bytes in and out), else the stdlib."""

from __future__ import annotations

import json
from typing import Any

try:
    import orjson
except ImportError:  # pragma: no cover - orjson is a declared dependency
    orjson = None  # type: ignore[assignment]


def dumps(value: Any) -> bytes:
    """Compact UTF-8 JSON bytes."""
    if orjson is not None:
        return orjson.dumps(value)
    return json.dumps(value, separators=(",", ":"), ensure_ascii=False).encode("utf-8")


def loads(data: bytes) -> Any:
    """Parse JSON bytes; raises ValueError (or a subclass) for anything that is not JSON."""
    if orjson is not None:
        return orjson.loads(data)
    return json.loads(data)
