"""JSON encode/decode: orjson when installed (the hot path decodes every chunk), else stdlib."""

from __future__ import annotations

import json
from collections.abc import Callable
from typing import Any

loads: Callable[[bytes | str], Any]
dumps: Callable[[Any], bytes]

try:
    import orjson

    loads = orjson.loads
    JSONDecodeError: type[ValueError] = orjson.JSONDecodeError

    def dumps(obj: Any) -> bytes:
        return orjson.dumps(obj)

except ImportError:  # pragma: no cover - exercised only where orjson is absent
    loads = json.loads
    JSONDecodeError = json.JSONDecodeError

    def dumps(obj: Any) -> bytes:
        return json.dumps(obj, separators=(",", ":"), ensure_ascii=False).encode()
