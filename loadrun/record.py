"""One request's measurement: the Record, and the outcomes a request can end in.

Times are ``time.perf_counter_ns()`` readings (monotonic, nanoseconds). A Record keeps the
raw timestamps; the derived latencies (TTFT, ITL, TPOT, E2E) are computed from them so that
the JSONL line on disk holds everything needed to recompute a summary.
"""

from __future__ import annotations

import enum
from dataclasses import dataclass, field
from itertools import pairwise
from typing import Any


class Outcome(enum.StrEnum):
    """How a request ended. Only OK requests enter the latency histograms."""

    OK = "ok"
    RATE_LIMITED = "rate_limited"
    HTTP_ERROR = "http_error"
    TIMEOUT_CONNECT = "timeout_connect"
    TIMEOUT_FIRST_TOKEN = "timeout_first_token"
    TIMEOUT_IDLE = "timeout_idle"
    TIMEOUT_TOTAL = "timeout_total"
    CONNECTION_ERROR = "connection_error"
    STREAM_CUT = "stream_cut"
    PROTOCOL_ERROR = "protocol_error"
    SERVER_ERROR_EVENT = "server_error_event"
    NOT_SENT = "not_sent"
    """Open loop: due while the in-flight cap was reached, so never sent (counted, not dropped)."""
    OVER_CONTEXT = "over_context"
    """Refused before sending: it would exceed the target's declared context window."""


class TokenSource(enum.StrEnum):
    """Where a record's output-token count came from."""

    USAGE = "usage"
    COUNTED = "counted"


@dataclass(slots=True)
class Record:
    """Everything measured about one request."""

    request_id: int
    intended_ns: int
    """When the request was meant to be sent; the latency clock starts here."""
    send_ns: int = 0
    headers_ns: int = 0
    first_token_ns: int = 0
    end_ns: int = 0
    chunk_ns: list[int] = field(default_factory=list)
    """Receive time of every content-bearing chunk, in order."""
    outcome: Outcome = Outcome.OK
    status: int | None = None
    error: str | None = None
    output_tokens: int = 0
    token_source: TokenSource = TokenSource.COUNTED
    prompt_tokens: int | None = None
    requested_input_tokens: int = 0
    requested_output_tokens: int = 0
    finish_reason: str | None = None
    receive_error_us: list[int] = field(default_factory=list)
    """Receive time minus the server's own send stamp per chunk, when the server stamps."""
    wall_start: float = 0.0
    in_window: bool = True
    """False for warm-up requests: written to disk, kept out of the measurement."""
    request_class: str = ""
    """The profile's request class this request was drawn from."""
    conversation: int = 0
    turn: int = 0
    """Which conversation (arrival) this request belongs to, and its turn in it (0 = first)."""
    compliant: bool | None = None
    """Whether the answer passed the class's answer check; None when there is no check or no answer."""
    check_note: str | None = None
    """Why the answer did not comply (short)."""

    @property
    def ok(self) -> bool:
        return self.outcome is Outcome.OK

    @property
    def ttft_ns(self) -> int | None:
        if not self.first_token_ns:
            return None
        return self.first_token_ns - self.intended_ns

    @property
    def e2e_ns(self) -> int | None:
        if not self.end_ns:
            return None
        return self.end_ns - self.intended_ns

    @property
    def send_lag_ns(self) -> int:
        """How late the actual send was against the intended one."""
        return max(0, self.send_ns - self.intended_ns) if self.send_ns else 0

    def itl_ns(self) -> list[int]:
        times = self.chunk_ns
        return [b - a for a, b in pairwise(times)]

    @property
    def tpot_ns(self) -> int | None:
        """(E2E - TTFT) / (output tokens - 1); undefined for fewer than two tokens."""
        if self.output_tokens < 2 or not self.first_token_ns or not self.end_ns:
            return None
        return (self.end_ns - self.first_token_ns) // (self.output_tokens - 1)

    def to_json(self, origin_ns: int) -> dict[str, Any]:
        """A JSON-ready dict; times become microseconds since the run's origin."""

        def rel(ns: int) -> int | None:
            return (ns - origin_ns) // 1000 if ns else None

        first = self.intended_ns
        return {
            "id": self.request_id,
            "wall_start": round(self.wall_start, 6),
            "in_window": self.in_window,
            "outcome": self.outcome.value,
            "status": self.status,
            "error": self.error,
            "intended_us": rel(self.intended_ns),
            "send_us": rel(self.send_ns),
            "headers_us": rel(self.headers_ns),
            "first_token_us": rel(self.first_token_ns),
            "end_us": rel(self.end_ns),
            "chunk_offsets_us": [(t - first) // 1000 for t in self.chunk_ns],
            "output_tokens": self.output_tokens,
            "token_source": self.token_source.value,
            "prompt_tokens": self.prompt_tokens,
            "requested_input_tokens": self.requested_input_tokens,
            "requested_output_tokens": self.requested_output_tokens,
            "finish_reason": self.finish_reason,
            "class": self.request_class,
            "conversation": self.conversation,
            "turn": self.turn,
            "compliant": self.compliant,
            "check_note": self.check_note,
        }
