"""Keeping the text of an answer, for requests that need it (answer checks, conversation history).

The measurement path never keeps text: it stamps chunks and counts tokens. A request that
needs its answer is sent inside ``collecting_answer()``; the transport is wrapped in an
``AnswerTap``, which, for such a request only, hands the same bytes to a second reader
after the measuring one has had them (so receive times are untouched) and assembles the
content and any tool calls from the chunks (streamed) or from the whole body (not streamed).
Requests sent outside ``collecting_answer()`` pass straight through.
"""

from __future__ import annotations

import contextlib
import contextvars
from collections.abc import Iterator
from dataclasses import dataclass, field
from typing import Any

from loadrun import jsonfast
from loadrun.protocol import DONE_MARKER
from loadrun.sse import EventStreamParser
from loadrun.transports.base import Endpoint, HttpRequest, ResponseConsumer, Transport


@dataclass(slots=True)
class ToolCall:
    name: str = ""
    arguments: str = ""


@dataclass(slots=True)
class Answer:
    """What the target answered: its text, and its tool calls (arguments as JSON text)."""

    parts: list[str] = field(default_factory=list)
    tool_calls: list[ToolCall] = field(default_factory=list)
    received: bool = False
    """True once a 200 answer was read (an error status leaves it False)."""

    @property
    def text(self) -> str:
        return "".join(self.parts)

    def add_tool_delta(self, delta: dict[str, Any]) -> None:
        index = delta.get("index", len(self.tool_calls))
        if not isinstance(index, int) or index < 0:
            return
        while len(self.tool_calls) <= index:
            self.tool_calls.append(ToolCall())
        call = self.tool_calls[index]
        function = delta.get("function") or {}
        if isinstance(function, dict):
            if isinstance(function.get("name"), str):
                call.name += function["name"]
            if isinstance(function.get("arguments"), str):
                call.arguments += function["arguments"]


_CURRENT: contextvars.ContextVar[Answer | None] = contextvars.ContextVar("loadrun_answer", default=None)


@contextlib.contextmanager
def collecting_answer() -> Iterator[Answer]:
    """Requests sent through an AnswerTap inside this block fill the Answer it yields."""
    answer = Answer()
    token = _CURRENT.set(answer)
    try:
        yield answer
    finally:
        _CURRENT.reset(token)


class AnswerTap:
    """A transport wrapper that keeps the answer of requests sent inside ``collecting_answer()``."""

    def __init__(self, inner: Transport) -> None:
        self.inner = inner

    async def send(self, request: HttpRequest, consumer: ResponseConsumer) -> None:
        answer = _CURRENT.get()
        if answer is None:
            await self.inner.send(request, consumer)
            return
        await self.inner.send(request, _AnswerReader(consumer, answer))

    async def aclose(self) -> None:
        await self.inner.aclose()

    def receive_clock(self, endpoint: Endpoint) -> str:
        return self.inner.receive_clock(endpoint)


class _AnswerReader:
    """Passes every call on to the measuring consumer first, then reads the answer's text."""

    __slots__ = ("_answer", "_body", "_inner", "_ok", "_parser", "_streamed")

    def __init__(self, inner: ResponseConsumer, answer: Answer) -> None:
        self._inner = inner
        self._answer = answer
        self._parser = EventStreamParser()
        self._body: list[bytes] = []
        self._ok = False
        self._streamed = False

    def on_headers(self, status: int, headers: list[tuple[bytes, bytes]], ts_ns: int) -> None:
        self._inner.on_headers(status, headers, ts_ns)
        self._ok = status == 200
        for name, value in headers:
            if name.lower() == b"content-type":
                self._streamed = value.lower().startswith(b"text/event-stream")

    def on_body(self, data: bytes, ts_ns: int) -> None:
        self._inner.on_body(data, ts_ns)
        if not self._ok:
            return
        if not self._streamed:
            self._body.append(data)
            return
        for event in self._parser.feed(data):
            if event.data != DONE_MARKER:
                self._read_chunk(event.data)

    def on_end(self, ts_ns: int) -> None:
        self._inner.on_end(ts_ns)
        if not self._ok:
            return
        self._answer.received = True
        if not self._streamed and self._body:
            self._read_whole(b"".join(self._body))

    def _read_chunk(self, data: str) -> None:
        try:
            chunk = jsonfast.loads(data)
        except ValueError:
            return  # the measuring reader records the protocol error
        if not isinstance(chunk, dict):
            return
        for choice in chunk.get("choices") or ():
            if not isinstance(choice, dict) or choice.get("index", 0) != 0:
                continue
            delta = choice.get("delta")
            if isinstance(delta, dict):
                self._add_message(delta)
            elif isinstance(choice.get("text"), str):
                self._answer.parts.append(choice["text"])

    def _read_whole(self, body: bytes) -> None:
        try:
            document = jsonfast.loads(body)
        except ValueError:
            return
        choices = document.get("choices") if isinstance(document, dict) else None
        if not isinstance(choices, list) or not choices or not isinstance(choices[0], dict):
            return
        message = choices[0].get("message")
        if isinstance(message, dict):
            self._add_message(message)
        elif isinstance(choices[0].get("text"), str):
            self._answer.parts.append(choices[0]["text"])

    def _add_message(self, message: dict[str, Any]) -> None:
        content = message.get("content")
        if isinstance(content, str):
            self._answer.parts.append(content)
        for call in message.get("tool_calls") or ():
            if isinstance(call, dict):
                self._answer.add_tool_delta(call)
