"""One request in, one Record out.

The client renders a chat-completions request, sends it through a transport, and turns
the response into a Record as the bytes arrive: every content-bearing chunk is stamped
with its receive time, empty role chunks are not tokens, the usage chunk gives the token
count when the server sends one, and every way a request can fail becomes an Outcome.
"""

from __future__ import annotations

import math
import time
from time import perf_counter_ns

import anyio

from loadrun.errors import RequestFailed
from loadrun.protocol import (
    DONE_MARKER,
    ChatRequest,
    chat_body,
    decode_chunk,
    decode_full_response,
    error_body_message,
)
from loadrun.record import Outcome, Record, TokenSource
from loadrun.sse import EventStreamParser
from loadrun.target import Target
from loadrun.transports.base import HttpRequest, Transport

CHAT_PATH = "/chat/completions"


class _ResponseReader:
    """Consumes one response for one Record (the transport calls it as bytes arrive)."""

    __slots__ = (
        "_body",
        "_collect",
        "_content_type",
        "_parser",
        "completion_tokens",
        "done_marker",
        "pieces",
        "record",
        "streaming",
    )

    def __init__(self, record: Record, streaming: bool) -> None:
        self.record = record
        self.streaming = streaming
        self._parser = EventStreamParser()
        self._collect = not streaming
        self._body: list[bytes] = []
        self._content_type = b""
        self.pieces = 0
        self.completion_tokens: int | None = None
        self.done_marker = False

    def on_headers(self, status: int, headers: list[tuple[bytes, bytes]], ts_ns: int) -> None:
        record = self.record
        record.headers_ns = ts_ns
        record.status = status
        for name, value in headers:
            if name.lower() == b"content-type":
                self._content_type = value.lower()
        if status != 200:
            self._collect = True
        elif self.streaming and not self._content_type.startswith(b"text/event-stream"):
            # A non-stream answer to a streamed request: read it whole and judge it then.
            self._collect = True

    def on_body(self, data: bytes, ts_ns: int) -> None:
        if self._collect:
            self._body.append(data)
            return
        for event in self._parser.feed(data):
            self._on_event(event.data, ts_ns)

    def on_end(self, ts_ns: int) -> None:
        self.record.end_ns = ts_ns

    def _on_event(self, data: str, ts_ns: int) -> None:
        record = self.record
        if data == DONE_MARKER:
            self.done_marker = True
            return
        try:
            info = decode_chunk(data)
        except ValueError as exc:
            self._mark(Outcome.PROTOCOL_ERROR, f"malformed event: {exc}")
            return
        if info.server_sent_ns is not None:
            record.receive_error_us.append((ts_ns - info.server_sent_ns) // 1000)
        if info.error is not None:
            self._mark(Outcome.SERVER_ERROR_EVENT, f"error event mid-stream: {info.error}")
            return
        if info.content_pieces:
            if not record.first_token_ns:
                record.first_token_ns = ts_ns
            record.chunk_ns.append(ts_ns)
            self.pieces += info.content_pieces
        if info.finish_reason is not None:
            record.finish_reason = info.finish_reason
        if info.completion_tokens is not None:
            self.completion_tokens = info.completion_tokens
        if info.prompt_tokens is not None:
            record.prompt_tokens = info.prompt_tokens

    def _mark(self, outcome: Outcome, message: str) -> None:
        # The first failure names the request's outcome; later ones add nothing new.
        if self.record.outcome is Outcome.OK:
            self.record.outcome = outcome
            self.record.error = message

    def finish(self) -> None:
        """Decide the outcome and the token count once the response has ended."""
        record = self.record
        status = record.status or 0
        if status == 429:
            self._mark(Outcome.RATE_LIMITED, f"HTTP 429: {error_body_message(b''.join(self._body))}")
            return
        if status != 200:
            self._mark(Outcome.HTTP_ERROR, f"HTTP {status}: {error_body_message(b''.join(self._body))}")
            return
        if self._collect:
            self._finish_whole_body()
            return
        if record.outcome is not Outcome.OK:
            return
        if not self.done_marker and record.finish_reason is None:
            self._mark(Outcome.STREAM_CUT, "stream ended with neither a finish reason nor [DONE]")
            return
        self._set_tokens()

    def _finish_whole_body(self) -> None:
        record = self.record
        if self.streaming:
            kind = self._content_type.decode("latin-1") or "none"
            self._mark(Outcome.PROTOCOL_ERROR, f"streamed request answered with content type {kind}")
            return
        try:
            pieces, completion, prompt, finish = decode_full_response(b"".join(self._body))
        except ValueError as exc:
            self._mark(Outcome.PROTOCOL_ERROR, f"malformed response body: {exc}")
            return
        record.first_token_ns = record.end_ns if pieces else 0
        record.finish_reason = finish
        record.prompt_tokens = prompt
        self.pieces = pieces
        self.completion_tokens = completion
        self._set_tokens()

    def _set_tokens(self) -> None:
        record = self.record
        if self.completion_tokens is not None:
            record.output_tokens = self.completion_tokens
            record.token_source = TokenSource.USAGE
        else:
            record.output_tokens = self.pieces
            record.token_source = TokenSource.COUNTED


class ChatClient:
    """Sends chat-completions requests to one target through one transport."""

    def __init__(
        self, target: Target, transport: Transport, *, total_timeout_s: float | None = 600.0
    ) -> None:
        self.target = target
        self.transport = transport
        self.total_timeout_s = total_timeout_s
        headers = [
            ("Content-Type", "application/json"),
            ("Accept", "text/event-stream, application/json"),
            ("User-Agent", "loadrun"),
        ]
        key = target.api_key()
        if key:
            headers.append(("Authorization", f"Bearer {key}"))
        headers.extend(target.headers)
        self._headers = tuple(headers)

    async def execute(self, request: ChatRequest, record: Record) -> Record:
        """Send ``request``, filling ``record``; never raises for a failed request."""
        http_request = HttpRequest(
            endpoint=self.target.endpoint,
            method="POST",
            path=CHAT_PATH,
            headers=self._headers,
            body=chat_body(self.target.model, request),
        )
        reader = _ResponseReader(record, request.stream)
        record.requested_output_tokens = request.max_tokens
        record.wall_start = time.time()
        record.send_ns = perf_counter_ns()
        timeout = self.total_timeout_s if self.total_timeout_s is not None else math.inf
        try:
            with anyio.fail_after(timeout):
                await self.transport.send(http_request, reader)
        except RequestFailed as exc:
            record.outcome = Outcome(exc.outcome)
            record.error = str(exc)
            record.end_ns = record.end_ns or perf_counter_ns()
            return record
        except TimeoutError:
            record.outcome = Outcome.TIMEOUT_TOTAL
            record.error = f"no complete answer within {timeout:g} s"
            record.end_ns = perf_counter_ns()
            return record
        reader.finish()
        return record
