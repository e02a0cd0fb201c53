"""Per-request time limits, each its own outcome: connect, first token, idle gap, total.

- **connect**: opening the connection (TCP, and TLS when https); the transport enforces it.
- **first token**: from the send (connection set-up included) to the first content-bearing
  chunk of a streamed answer.
- **idle**: after the first token, the longest wait for the next content-bearing chunk (or
  for the end of the stream after the last one). Heartbeats and empty chunks do not count:
  a server that keeps the line warm but sends no tokens is stalled.
- **total**: from the send to the end of the response, streamed or not.

Only the total limit applies to non-streamed requests and to answers read whole (error
statuses, wrong content types): they never have a first token to wait for.

The receive path pays nothing for this: a request's timer is armed for its earliest
deadline and, when it fires, looks at the Record's own timestamps; if a chunk came in the
meantime it re-arms for the new deadline, so it fires at most once per idle period. Once
tokens flow, deadlines only move later; before the first token, an idle limit can start
at any moment, so the timer then also looks every idle period.
"""

from __future__ import annotations

import asyncio
import math
from collections.abc import Callable
from dataclasses import dataclass
from time import perf_counter_ns

import anyio

from loadrun.errors import UsageError
from loadrun.record import Outcome, Record

NS_PER_S = 1_000_000_000


@dataclass(frozen=True, slots=True)
class Timeouts:
    """Seconds; None turns a limit off (connect is always on)."""

    connect_s: float = 10.0
    first_token_s: float | None = None
    idle_s: float | None = None
    total_s: float | None = 600.0

    def __post_init__(self) -> None:
        for name in ("connect_s", "first_token_s", "idle_s", "total_s"):
            value = getattr(self, name)
            if value is None and name != "connect_s":
                continue
            if isinstance(value, bool) or not isinstance(value, (int, float)):
                raise UsageError(f"timeout {name} must be a number of seconds")
            if not math.isfinite(value) or value <= 0:
                raise UsageError(f"timeout {name} must be a finite number of seconds above 0, got {value}")

    def describe(self) -> dict[str, float | None]:
        return {
            "connect_s": self.connect_s,
            "first_token_s": self.first_token_s,
            "idle_s": self.idle_s,
            "total_s": self.total_s,
        }


class RequestWatch:
    """Cancels one request's scope at its first passed deadline and remembers which one."""

    __slots__ = (
        "_expects_tokens",
        "_first_ns",
        "_handle",
        "_idle_ns",
        "_record",
        "_scope",
        "_total_ns",
        "fired",
    )

    def __init__(
        self,
        timeouts: Timeouts,
        record: Record,
        scope: anyio.CancelScope,
        expects_tokens: Callable[[], bool],
    ) -> None:
        self._record = record
        self._scope = scope
        self._expects_tokens = expects_tokens
        self._first_ns = _ns(timeouts.first_token_s)
        self._idle_ns = _ns(timeouts.idle_s)
        self._total_ns = _ns(timeouts.total_s)
        self._handle: asyncio.TimerHandle | None = None
        self.fired: tuple[Outcome, str] | None = None
        """The timeout that ended the request, with its message; None while none has."""
        self._arm(perf_counter_ns())

    def stop(self) -> None:
        if self._handle is not None:
            self._handle.cancel()
            self._handle = None

    def _arm(self, now: int) -> None:
        due = self._next_deadline(now)
        if due is not None:
            delay = max(0, due[0] - now) / NS_PER_S
            self._handle = asyncio.get_running_loop().call_later(delay, self._check)

    def _next_deadline(self, now: int) -> tuple[int, Outcome | None] | None:
        """The earliest deadline and its outcome; outcome None: only a time to look again."""
        record = self._record
        start = record.send_ns
        candidates: list[tuple[int, Outcome | None]] = []
        if self._total_ns:
            candidates.append((start + self._total_ns, Outcome.TIMEOUT_TOTAL))
        if self._expects_tokens():
            if not record.first_token_ns:
                if self._first_ns:
                    candidates.append((start + self._first_ns, Outcome.TIMEOUT_FIRST_TOKEN))
                if self._idle_ns:
                    candidates.append((now + self._idle_ns, None))
            elif self._idle_ns and record.chunk_ns:
                candidates.append((record.chunk_ns[-1] + self._idle_ns, Outcome.TIMEOUT_IDLE))
        return min(candidates, key=lambda item: item[0]) if candidates else None

    def _check(self) -> None:
        self._handle = None
        now = perf_counter_ns()
        due = self._next_deadline(now)
        if due is None:
            return
        deadline, outcome = due
        if outcome is not None and now >= deadline:
            self.fired = (outcome, _MESSAGES[outcome].format(self._limit_ns(outcome) / NS_PER_S))
            self._scope.cancel()
            return
        self._arm(now)

    def _limit_ns(self, outcome: Outcome) -> int:
        if outcome is Outcome.TIMEOUT_FIRST_TOKEN:
            return self._first_ns
        return self._idle_ns if outcome is Outcome.TIMEOUT_IDLE else self._total_ns


_MESSAGES = {
    Outcome.TIMEOUT_TOTAL: "no complete answer within {:g} s",
    Outcome.TIMEOUT_FIRST_TOKEN: "no first token within {:g} s",
    Outcome.TIMEOUT_IDLE: "no chunk for {:g} s",
}


def _ns(seconds: float | None) -> int:
    return int(seconds * NS_PER_S) if seconds else 0
