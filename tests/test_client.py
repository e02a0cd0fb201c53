"""The client against streamed responses through httpx's mock transport.

Bodies are async generators, so chunks arrive one at a time with real gaps (an ASGI
transport would buffer the body and lose chunk timing). Wire format per the public
OpenAPI description of the chat-completions protocol (SOURCES.md section 5).
"""

from __future__ import annotations

import json
from collections.abc import AsyncIterator, Callable

import anyio
import httpx
import pytest

from loadrun.client import ChatClient
from loadrun.protocol import ChatRequest
from loadrun.record import Outcome, Record, TokenSource
from loadrun.target import Target
from loadrun.transports.general import HttpxTransport

pytestmark = pytest.mark.anyio

REQUEST = ChatRequest(messages=({"role": "user", "content": "kalo miter"},), max_tokens=3)


def chunk(delta: dict[str, object] | None = None, finish: str | None = None, **extra: object) -> bytes:
    body: dict[str, object] = {
        "id": "c1",
        "object": "chat.completion.chunk",
        "created": 1,
        "model": "m",
        "choices": [{"index": 0, "delta": delta or {}, "finish_reason": finish}],
    }
    body.update(extra)
    return b"data: " + json.dumps(body).encode() + b"\n\n"


USAGE = (
    b'data: {"id":"c1","object":"chat.completion.chunk","created":1,"model":"m","choices":[],'
    b'"usage":{"prompt_tokens":2,"completion_tokens":3,"total_tokens":5}}\n\n'
)
DONE = b"data: [DONE]\n\n"


def full_stream(gap_s: float = 0.0, usage: bool = True) -> list[bytes]:
    parts = [
        chunk({"role": "assistant", "content": ""}),
        chunk({"content": "ka "}),
        chunk({"content": "lo "}),
        chunk({"content": "mi "}),
        chunk({}, finish="length"),
    ]
    if usage:
        parts.append(USAGE)
    parts.append(DONE)
    return parts


def responder(
    parts: list[bytes], status: int = 200, content_type: str = "text/event-stream", gap_s: float = 0.0
) -> Callable[[httpx.Request], httpx.Response]:
    seen: list[httpx.Request] = []

    async def body() -> AsyncIterator[bytes]:
        for part in parts:
            if gap_s:
                await anyio.sleep(gap_s)
            yield part

    def handler(request: httpx.Request) -> httpx.Response:
        seen.append(request)
        return httpx.Response(status, headers={"content-type": content_type}, content=body())

    handler.seen = seen  # type: ignore[attr-defined]
    return handler


async def run(
    handler: Callable[[httpx.Request], httpx.Response],
    request: ChatRequest = REQUEST,
    api_key_env: str | None = None,
) -> Record:
    transport = HttpxTransport(httpx.AsyncClient(transport=httpx.MockTransport(handler)))
    target = Target(base_url="http://127.0.0.1:9/v1", model="m", api_key_env=api_key_env)
    client = ChatClient(target, transport)
    record = Record(request_id=1, intended_ns=0)
    record.intended_ns = __import__("time").perf_counter_ns()
    await client.execute(request, record)
    await transport.aclose()
    return record


async def test_stream_tokens_from_usage_and_first_token_skips_role_chunk() -> None:
    record = await run(responder(full_stream(), gap_s=0.02))
    assert record.outcome is Outcome.OK
    assert record.output_tokens == 3 and record.token_source is TokenSource.USAGE
    assert record.prompt_tokens == 2
    assert len(record.chunk_ns) == 3
    # The role chunk came 20 ms after the headers and is not a token: the first token is the
    # second event, so TTFT spans at least two gaps.
    assert record.first_token_ns == record.chunk_ns[0]
    assert record.ttft_ns is not None and record.ttft_ns >= 2 * 0.02e9 * 0.9
    assert record.finish_reason == "length"
    assert all(gap >= 0.02e9 * 0.9 for gap in record.itl_ns())


async def test_without_usage_the_tokens_are_counted() -> None:
    record = await run(responder(full_stream(usage=False)))
    assert record.outcome is Outcome.OK
    assert record.output_tokens == 3 and record.token_source is TokenSource.COUNTED


async def test_null_content_first_chunk_is_not_a_token() -> None:
    parts = [
        chunk({"role": "assistant", "content": None}),
        chunk({"content": "ka"}),
        chunk({}, finish="stop"),
        DONE,
    ]
    record = await run(responder(parts))
    assert record.outcome is Outcome.OK and record.output_tokens == 1


async def test_tool_call_delta_counts_as_first_token() -> None:
    call = {
        "tool_calls": [
            {"index": 0, "id": "t", "type": "function", "function": {"name": "f", "arguments": ""}}
        ]
    }
    parts = [chunk({"role": "assistant", "content": None}), chunk(call), chunk({}, finish="tool_calls"), DONE]
    record = await run(responder(parts))
    assert record.outcome is Outcome.OK and record.first_token_ns and record.output_tokens == 1


async def test_rate_limited() -> None:
    body = json.dumps(
        {"error": {"message": "slow down", "type": "rate_limit", "param": None, "code": "rate_limited"}}
    ).encode()
    record = await run(responder([body], status=429, content_type="application/json"))
    assert record.outcome is Outcome.RATE_LIMITED and record.status == 429
    assert record.error is not None and "slow down" in record.error


async def test_http_error_keeps_the_message() -> None:
    body = json.dumps(
        {"error": {"message": "engine fell over", "type": "server_error", "param": None, "code": None}}
    ).encode()
    record = await run(responder([body], status=503, content_type="application/json"))
    assert record.outcome is Outcome.HTTP_ERROR and record.status == 503
    assert record.error == "HTTP 503: engine fell over"


async def test_stream_cut_without_finish_or_done() -> None:
    record = await run(responder(full_stream()[:3]))
    assert record.outcome is Outcome.STREAM_CUT


async def test_finish_reason_without_done_marker_is_complete() -> None:
    record = await run(responder(full_stream()[:-1]))
    assert record.outcome is Outcome.OK and record.output_tokens == 3


async def test_malformed_event_is_a_protocol_error() -> None:
    parts = [chunk({"content": "ka"}), b"data: {not json\n\n", DONE]
    record = await run(responder(parts))
    assert record.outcome is Outcome.PROTOCOL_ERROR


async def test_error_event_mid_stream() -> None:
    parts = [
        chunk({"content": "ka"}),
        b'data: {"error": {"message": "overloaded", "code": "busy"}}\n\n',
        DONE,
    ]
    record = await run(responder(parts))
    assert record.outcome is Outcome.SERVER_ERROR_EVENT
    assert record.error is not None and "overloaded" in record.error


async def test_streamed_request_answered_with_json_is_a_protocol_error() -> None:
    record = await run(responder([b'{"choices": []}'], content_type="application/json"))
    assert record.outcome is Outcome.PROTOCOL_ERROR


async def test_non_streamed_answer() -> None:
    body = json.dumps(
        {
            "id": "x",
            "object": "chat.completion",
            "created": 1,
            "model": "m",
            "choices": [
                {"index": 0, "message": {"role": "assistant", "content": "ka lo"}, "finish_reason": "stop"}
            ],
            "usage": {"prompt_tokens": 2, "completion_tokens": 2, "total_tokens": 4},
        }
    ).encode()
    request = ChatRequest(messages=REQUEST.messages, max_tokens=3, stream=False)
    record = await run(responder([body], content_type="application/json"), request)
    assert record.outcome is Outcome.OK and record.output_tokens == 2
    assert record.first_token_ns == record.end_ns


async def test_connection_refused_is_an_outcome_not_an_exception() -> None:
    def refuse(request: httpx.Request) -> httpx.Response:
        raise httpx.ConnectError("refused", request=request)

    record = await run(refuse)
    assert record.outcome is Outcome.CONNECTION_ERROR


async def test_request_body_and_key_header(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("LOADRUN_TEST_KEY", "sk-sentinel-123")
    handler = responder(full_stream())
    record = await run(handler, api_key_env="LOADRUN_TEST_KEY")
    sent = handler.seen[0]  # type: ignore[attr-defined]
    body = json.loads(sent.content)
    assert body["stream"] is True and body["stream_options"] == {"include_usage": True}
    assert body["max_tokens"] == 3 and body["model"] == "m"
    assert sent.headers["authorization"] == "Bearer sk-sentinel-123"
    assert "sk-sentinel-123" not in json.dumps(record.to_json(0))
