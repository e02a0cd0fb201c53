"""Optional retry of rate-limited requests, kept apart so first-attempt latency stays honest.

A request answered 429 is counted as rate limited, always: its Record is the first
attempt and goes into the measurement like any failure. With retries on, the client waits
as long as the answer's Retry-After asks (RFC 9110 section 10.2.3: delay-seconds or an
HTTP-date), never longer than the cap, and sends again; each retry is a Record of its own
that goes to ``retries.jsonl`` and to the summary's ``retries`` section, never into the
latency histograms or the request counts.
"""

from __future__ import annotations

import email.utils
import math
import time
from collections import Counter
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from loadrun.errors import UsageError
from loadrun.record import Outcome, Record
from loadrun.store import RecordLines

RETRIES_FILE = "retries.jsonl"


@dataclass(frozen=True, slots=True)
class RetryPolicy:
    max_retries: int = 0
    """Retries after a 429 per request; 0 turns retrying off."""
    max_wait_s: float = 30.0
    """The longest wait before a retry, whatever Retry-After asks."""
    default_wait_s: float = 1.0
    """The wait when a 429 names no delay (or one that cannot be read)."""

    def __post_init__(self) -> None:
        if self.max_retries < 0:
            raise UsageError("retries must not be negative")
        for name in ("max_wait_s", "default_wait_s"):
            value = getattr(self, name)
            if not math.isfinite(value) or value < 0:
                raise UsageError(f"{name} must be a finite number >= 0, got {value}")

    @property
    def enabled(self) -> bool:
        return self.max_retries > 0

    def wait_s(self, retry_after_s: float | None) -> float:
        wanted = self.default_wait_s if retry_after_s is None else retry_after_s
        return min(self.max_wait_s, max(0.0, wanted))


def parse_retry_after(value: bytes | str | None, now: float | None = None) -> float | None:
    """Seconds to wait from a Retry-After value: delay-seconds or an HTTP-date; else None."""
    if value is None:
        return None
    text = (value.decode("latin-1") if isinstance(value, bytes) else value).strip()
    if text.isascii() and text.isdigit():
        return float(int(text))
    try:
        when = email.utils.parsedate_to_datetime(text)
    except (TypeError, ValueError, IndexError):
        return None
    if when.tzinfo is None:  # an HTTP-date is always GMT
        return None
    return max(0.0, when.timestamp() - (time.time() if now is None else now))


class RetryLog(RecordLines):
    """Retries as they finish: one complete, flushed line each in ``retries.jsonl``, and counts."""

    def __init__(self, folder: Path | None, origin_ns: int) -> None:
        super().__init__(folder, origin_ns, RETRIES_FILE)
        self.by_outcome: Counter[str] = Counter()
        self.sent = 0
        self.waited_s = 0.0

    def add(self, record: Record, attempt: int, waited_s: float) -> None:
        self.sent += 1
        self.waited_s += waited_s
        self.by_outcome[record.outcome.value] += 1
        self.write(record, attempt=attempt, waited_s=round(waited_s, 6))

    def summary(self) -> dict[str, Any]:
        return {
            "sent": self.sent,
            "recovered": self.by_outcome.get(Outcome.OK.value, 0),
            "by_outcome": dict(sorted(self.by_outcome.items())),
            "waited_s": round(self.waited_s, 6),
        }
