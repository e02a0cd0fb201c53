"""One request in, one Record out.

The client renders a chat-completions request, sends it through a transport, and turns
the response into a Record as the bytes arrive: every content-bearing chunk is stamped
with its receive time, empty role chunks are not tokens, the usage chunk gives the token
count when the server sends one, and every way a request can fail becomes an Outcome.
Time limits (``timeouts.py``) end a request as their own outcomes; a 429 may be retried
(``retry.py``), each retry a Record of its own. The API key never reaches a Record: text a
server sends back is scrubbed of it.
"""

from __future__ import annotations

import time
from collections.abc import Callable
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
from loadrun.retry import RetryPolicy, parse_retry_after
from loadrun.sse import EventStreamParser
from loadrun.target import Target
from loadrun.timeouts import RequestWatch, Timeouts
from loadrun.transports.base import HttpRequest, Transport

CHAT_PATH = "/chat/completions"
REDACTED = "[redacted]"

OnRetry = Callable[[Record, int, float], None]
"""Called with each retry's Record, its attempt number (2, 3, ...) and the seconds waited."""


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
        "retry_after",
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
        self.retry_after: bytes | None = None

    def expects_tokens(self) -> bool:
        """True while the answer is read as a stream of chunks (first-token and idle limits apply)."""
        return not self._collect

    def on_headers(self, status: int, headers: list[tuple[bytes, bytes]], ts_ns: int) -> None:
        record = self.record
        record.headers_ns = ts_ns
        record.status = status
        for name, value in headers:
            lower = name.lower()
            if lower == b"content-type":
                self._content_type = value.lower()
            elif lower == b"retry-after":
                self.retry_after = value
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
    """Sends chat-completions requests to one target through one transport.

    ``timeouts`` (default: only ``total_timeout_s``) end requests as timeout outcomes; the
    connect limit in it is the transport's to enforce. ``retry`` with ``on_retry`` retries
    rate-limited requests; no retry starts once ``stop`` is set.
    """

    def __init__(
        self,
        target: Target,
        transport: Transport,
        *,
        total_timeout_s: float | None = 600.0,
        timeouts: Timeouts | None = None,
        retry: RetryPolicy | None = None,
        on_retry: OnRetry | None = None,
        stop: anyio.Event | None = None,
    ) -> None:
        self.target = target
        self.transport = transport
        self.timeouts = timeouts if timeouts is not None else Timeouts(total_s=total_timeout_s)
        self.retry = retry if retry is not None and retry.enabled and on_retry is not None else None
        self._on_retry = on_retry
        self._stop = stop
        headers = [
            ("Content-Type", "application/json"),
            ("Accept", "text/event-stream, application/json"),
            ("User-Agent", "loadrun"),
        ]
        key = target.api_key()
        self._secret = key or None
        if key:
            headers.append(("Authorization", f"Bearer {key}"))
        headers.extend(target.headers)
        self._headers = tuple(headers)

    async def execute(self, request: ChatRequest, record: Record) -> Record:
        """Send ``request``, filling ``record``; never raises for a failed request.

        ``record`` is the first attempt, whatever happens after; retries (when on) go to
        ``on_retry`` as Records of their own before this returns.
        """
        http_request = HttpRequest(
            endpoint=self.target.endpoint,
            method="POST",
            path=CHAT_PATH,
            headers=self._headers,
            body=chat_body(self.target.model, request),
        )
        retry_after = await self._attempt(http_request, request, record)
        if self.retry is not None and record.outcome is Outcome.RATE_LIMITED:
            await self._retry(http_request, request, record, retry_after)
        return record

    async def _attempt(self, http_request: HttpRequest, request: ChatRequest, record: Record) -> bytes | None:
        """One attempt; returns the answer's Retry-After value, if any."""
        reader = _ResponseReader(record, request.stream)
        record.requested_output_tokens = request.max_tokens
        record.wall_start = time.time()
        record.send_ns = perf_counter_ns()
        scope = anyio.CancelScope()
        watch = RequestWatch(self.timeouts, record, scope, reader.expects_tokens)
        try:
            with scope:
                await self.transport.send(http_request, reader)
        except RequestFailed as exc:
            # The first failure names the outcome (an error event, then a reset: the event).
            if record.outcome is Outcome.OK:
                record.outcome = Outcome(exc.outcome)
                record.error = str(exc)
            record.error = self._scrub(record.error or "")
            record.end_ns = record.end_ns or perf_counter_ns()
            return None
        finally:
            watch.stop()
        if watch.fired is not None:
            if record.outcome is Outcome.OK:
                record.outcome, record.error = watch.fired
            record.error = self._scrub(record.error or "")
            record.end_ns = perf_counter_ns()
            return None
        reader.finish()
        if record.error is not None:
            record.error = self._scrub(record.error)
        return reader.retry_after

    async def _retry(
        self, http_request: HttpRequest, request: ChatRequest, first: Record, retry_after: bytes | None
    ) -> None:
        assert self.retry is not None and self._on_retry is not None
        attempt = 1
        while attempt <= self.retry.max_retries and not self._stopping():
            wait_s = self.retry.wait_s(parse_retry_after(retry_after))
            await self._wait_at_least(wait_s)
            if self._stopping():
                return
            attempt += 1
            record = Record(
                request_id=first.request_id, intended_ns=perf_counter_ns(), in_window=first.in_window
            )
            record.requested_input_tokens = first.requested_input_tokens
            record.request_class = first.request_class
            record.conversation = first.conversation
            record.turn = first.turn
            retry_after = await self._attempt(http_request, request, record)
            self._on_retry(record, attempt, wait_s)
            if record.outcome is not Outcome.RATE_LIMITED:
                return

    async def _wait_at_least(self, wait_s: float) -> None:
        """Wait ``wait_s`` (or until a stop), never less: the event loop's timers count whole
        milliseconds and may fire up to one early, and Retry-After is a minimum."""
        not_before = perf_counter_ns() + int(wait_s * 1e9)
        while (left_ns := not_before - perf_counter_ns()) > 0 and not self._stopping():
            if self._stop is None:
                await anyio.sleep(left_ns / 1e9)
                continue
            with anyio.move_on_after(left_ns / 1e9):
                await self._stop.wait()

    def _stopping(self) -> bool:
        return self._stop is not None and self._stop.is_set()

    def _scrub(self, text: str) -> str:
        """Servers quote request headers in errors now and then: the key must not reach a Record."""
        secret = self._secret
        return text.replace(secret, REDACTED) if secret and secret in text else text
