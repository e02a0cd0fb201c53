"""The mock server over real loopback sockets: wire format, routes, errors, keep-alive,
pacing, and the child-process launcher.

The streaming wire format checked here is the public chat-completions description
summarised in SOURCES.md section 5 (chunk fields, role chunk first, finish chunk, usage
chunk with ``choices: []`` before ``data: [DONE]``). Chunked transfer coding and
``Connection: close`` follow RFC 9112 (HTTP/1.1), sections 7.1 and 9.6.
"""

from __future__ import annotations

import contextlib
import dataclasses
import itertools
import json
import os
import socket
import statistics
import time
from collections.abc import AsyncIterator
from typing import Any

import anyio
import httpx
import pytest

import mock_server
from mock_server import EngineConfig, MockStartError, ServingMock, serve, start_subprocess
from mock_server.text import generate_text

QUICK = EngineConfig(
    model="harbour-chat-mini",
    step_base_ms=2.0,
    decode_per_seq_ms=0.0,
    prefill_per_token_ms=0.0,
    max_running=32,
    max_batch_tokens=4096,
    context_window=512,
    default_max_tokens=5,
    seed=11,
)
PROMPT = "which ferry leaves the north pier first"


@contextlib.asynccontextmanager
async def running(
    config: EngineConfig = QUICK,
) -> AsyncIterator[tuple[ServingMock, httpx.AsyncClient]]:
    async with (
        serve(config, "127.0.0.1", 0) as server,
        httpx.AsyncClient(base_url=server.url, timeout=10.0) as client,
    ):
        yield server, client


def chat_body(**extra: Any) -> dict[str, Any]:
    return {
        "model": "harbour-chat-mini",
        "messages": [
            {"role": "system", "content": "You answer questions about the harbour."},
            {"role": "user", "content": PROMPT},
        ],
        **extra,
    }


async def stream_events(
    client: httpx.AsyncClient, path: str, body: dict[str, Any]
) -> tuple[httpx.Response, list[tuple[float, str]]]:
    """POST and return the response and every SSE ``data`` payload with its receive time."""
    events: list[tuple[float, str]] = []
    async with client.stream("POST", path, json=body) as response:
        buffer = b""
        async for data in response.aiter_bytes():
            received = time.perf_counter()
            buffer += data
            while b"\n\n" in buffer:
                block, buffer = buffer.split(b"\n\n", 1)
                line = block.decode()
                assert line.startswith("data: "), line
                events.append((received, line[len("data: ") :]))
        assert buffer == b""
    return response, events


# ----------------------------------------------------------------------------- streaming


@pytest.mark.anyio
async def test_chat_stream_has_the_exact_chunk_sequence() -> None:
    async with running() as (_server, client):
        body = chat_body(max_tokens=4, stream=True, stream_options={"include_usage": True})
        response, events = await stream_events(client, "/v1/chat/completions", body)
    assert response.status_code == 200
    assert response.headers["content-type"] == "text/event-stream"
    assert response.headers["transfer-encoding"] == "chunked"
    payloads = [text for _, text in events]
    assert payloads[-1] == "[DONE]"
    chunks = [json.loads(text) for text in payloads[:-1]]
    assert len(chunks) == 1 + 4 + 1 + 1  # role, 4 tokens, finish, usage

    role, *content, finish, usage = chunks
    assert role["choices"] == [
        {"index": 0, "delta": {"role": "assistant", "content": ""}, "finish_reason": None}
    ]
    for chunk in content:
        (choice,) = chunk["choices"]
        assert choice["index"] == 0 and choice["finish_reason"] is None
        assert set(choice["delta"]) == {"content"} and choice["delta"]["content"].strip()
    assert finish["choices"] == [{"index": 0, "delta": {}, "finish_reason": "length"}]
    assert usage["choices"] == []
    prompt_tokens = len(" ".join(m["content"] for m in body["messages"]).split())
    assert usage["usage"] == {
        "prompt_tokens": prompt_tokens,
        "completion_tokens": 4,
        "total_tokens": prompt_tokens + 4,
    }
    for chunk in chunks:
        assert chunk["object"] == "chat.completion.chunk"
        assert chunk["id"] == role["id"] and chunk["id"].startswith("chatcmpl-")
        assert chunk["created"] == role["created"]
        assert chunk["model"] == "harbour-chat-mini"
        assert isinstance(chunk["mock_sent_ns"], int)
    sent = [chunk["mock_sent_ns"] for chunk in chunks]
    assert sent == sorted(sent)
    # mock_sent_ns is on this host's perf_counter_ns clock (CLOCK_MONOTONIC on Linux).
    assert 0 < time.perf_counter_ns() - sent[-1] < 5_000_000_000
    # Deterministic text: the same words as generate_text for (seed, prompt, max_tokens).
    text = "".join(chunk["choices"][0]["delta"]["content"] for chunk in content)
    assert text == generate_text(QUICK.seed, " ".join(m["content"] for m in body["messages"]), 4, 4)


@pytest.mark.anyio
async def test_stream_without_usage_or_max_tokens_stops_at_the_default_length() -> None:
    async with running() as (_, client):
        _, events = await stream_events(client, "/v1/chat/completions", chat_body(stream=True))
    payloads = [text for _, text in events]
    assert payloads[-1] == "[DONE]"
    chunks = [json.loads(text) for text in payloads[:-1]]
    assert len(chunks) == 1 + QUICK.default_max_tokens + 1
    assert chunks[-1]["choices"][0]["finish_reason"] == "stop"
    assert all("usage" not in chunk for chunk in chunks)


@pytest.mark.anyio
async def test_last_token_finish_usage_and_done_arrive_in_one_write() -> None:
    async with running() as (_, client):
        body = chat_body(max_tokens=3, stream=True, stream_options={"include_usage": True})
        _, events = await stream_events(client, "/v1/chat/completions", body)
    chunks = [json.loads(text) for _, text in events[:-1]]
    last_token, finish, usage = chunks[-3:]
    assert last_token["mock_sent_ns"] == finish["mock_sent_ns"] == usage["mock_sent_ns"]
    # The role chunk goes out at once, before the first step ends.
    assert chunks[0]["mock_sent_ns"] < chunks[1]["mock_sent_ns"]


@pytest.mark.anyio
async def test_text_completion_stream_and_body() -> None:
    async with running() as (_, client):
        body = {"model": "x", "prompt": ["tide tables", "for today"], "max_tokens": 3}
        _, events = await stream_events(
            client, "/v1/completions", {**body, "stream": True, "stream_options": {"include_usage": True}}
        )
        plain = await client.post("/v1/completions", json=body)
    payloads = [text for _, text in events]
    assert payloads[-1] == "[DONE]"
    chunks = [json.loads(text) for text in payloads[:-1]]
    assert len(chunks) == 3 + 1 + 1  # no role chunk for text completions
    for chunk in chunks[:3]:
        assert chunk["object"] == "text_completion"
        assert chunk["choices"][0]["text"].strip()
        assert chunk["choices"][0]["finish_reason"] is None
        assert chunk["choices"][0]["logprobs"] is None
    assert chunks[3]["choices"] == [{"index": 0, "text": "", "finish_reason": "length", "logprobs": None}]
    assert chunks[4]["usage"]["completion_tokens"] == 3

    assert plain.status_code == 200
    document = plain.json()
    assert document["object"] == "text_completion"
    (choice,) = document["choices"]
    assert choice["text"] == "".join(chunk["choices"][0]["text"] for chunk in chunks[:3])
    assert choice["finish_reason"] == "length" and choice["logprobs"] is None
    assert document["usage"] == {"prompt_tokens": 4, "completion_tokens": 3, "total_tokens": 7}


@pytest.mark.anyio
async def test_non_streaming_chat_body() -> None:
    async with running() as (_, client):
        response = await client.post("/v1/chat/completions", json=chat_body(max_completion_tokens=6))
    assert response.status_code == 200
    assert response.headers["content-type"] == "application/json"
    document = response.json()
    assert set(document) == {"id", "object", "created", "model", "choices", "usage"}
    assert document["object"] == "chat.completion"
    assert document["id"].startswith("chatcmpl-")
    assert document["model"] == "harbour-chat-mini"
    (choice,) = document["choices"]
    assert choice["index"] == 0 and choice["finish_reason"] == "length"
    assert choice["message"]["role"] == "assistant"
    assert len(choice["message"]["content"].split()) == 6
    assert document["usage"]["completion_tokens"] == 6
    assert document["usage"]["total_tokens"] == document["usage"]["prompt_tokens"] + 6


# ----------------------------------------------------------------- other routes, errors


@pytest.mark.anyio
async def test_models_health_and_stats() -> None:
    async with running() as (_, client):
        models = await client.get("/v1/models")
        health = await client.get("/health")
        await client.post("/v1/chat/completions", json=chat_body(max_tokens=2))
        await client.post("/v1/chat/completions", json={"messages": []})
        stats = (await client.get("/mock/stats")).json()
    assert models.status_code == 200
    (model,) = models.json()["data"]
    assert models.json()["object"] == "list"
    assert model["id"] == "harbour-chat-mini" and model["object"] == "model"
    assert model["owned_by"] == "mock_server" and isinstance(model["created"], int)
    assert health.status_code == 200 and health.json() == {"status": "ok"}
    assert stats["requests_received"] == 2
    assert stats["requests_admitted"] == 1
    assert stats["requests_completed"] == 1
    assert stats["requests_rejected"] == 1
    assert stats["requests_cancelled"] == 0
    assert stats["tokens_emitted"] == 2
    assert stats["steps"] == 2
    assert stats["queue_length"] == 0 and stats["running"] == 0
    assert stats["max_running_seen"] == 1
    assert stats["pacing_samples"] == 2
    assert isinstance(stats["pacing_error_p99_us"], int)
    assert stats["engine"]["model"] == "harbour-chat-mini"
    assert stats["engine"]["step_base_ms"] == QUICK.step_base_ms


@pytest.mark.anyio
async def test_stats_reset_restarts_the_timing_windows_only() -> None:
    async with running() as (_, client):
        await client.post("/v1/chat/completions", json=chat_body(max_tokens=3))
        before = (await client.post("/mock/stats/reset")).json()
        after = (await client.get("/mock/stats")).json()
        assert_error(await client.get("/mock/stats/reset"), 405)
    assert before["pacing_samples"] == 3
    assert after["pacing_samples"] == 0
    assert after["pacing_error_p99_us"] is None and after["pacing_error_max_us"] is None
    assert after["steps"] == before["steps"] == 3  # counters stay cumulative
    assert after["tokens_emitted"] == 3


@pytest.mark.anyio
async def test_default_answer_stops_at_the_end_of_the_context_window() -> None:
    async with running() as (_, client):
        prompt = " ".join(["oar"] * (QUICK.context_window - 2))
        response = await client.post(
            "/v1/chat/completions", json={"messages": [{"role": "user", "content": prompt}]}
        )
    document = response.json()
    assert document["usage"]["completion_tokens"] == 2
    assert document["usage"]["total_tokens"] == QUICK.context_window
    assert document["choices"][0]["finish_reason"] == "length"


def assert_error(response: httpx.Response, status: int, code: str | None = None) -> dict[str, Any]:
    assert response.status_code == status
    error: dict[str, Any] = response.json()["error"]
    assert set(error) == {"message", "type", "param", "code"}
    assert isinstance(error["message"], str) and error["message"]
    assert error["code"] == code
    return error


@pytest.mark.anyio
async def test_error_bodies() -> None:
    async with running() as (_, client):
        assert_error(await client.get("/v2/unknown"), 404)
        not_allowed = await client.get("/v1/chat/completions")
        assert_error(not_allowed, 405)
        assert not_allowed.headers["allow"] == "POST"
        assert_error(await client.post("/health"), 405)
        bad_json = await client.post(
            "/v1/chat/completions",
            content=b"{not json",
            headers={"content-type": "application/json"},
        )
        assert_error(bad_json, 400)
        missing = assert_error(await client.post("/v1/chat/completions", json={"model": "x"}), 400)
        assert missing["param"] == "messages"
        bad_max = await client.post("/v1/chat/completions", json=chat_body(max_tokens=0))
        assert assert_error(bad_max, 400, "invalid_value")["param"] == "max_tokens"
        too_long = await client.post("/v1/chat/completions", json=chat_body(max_tokens=QUICK.context_window))
        assert_error(too_long, 400, "context_length_exceeded")
        huge = await client.post("/v1/chat/completions", json=chat_body(max_tokens=10**15))
        assert_error(huge, 400, "context_length_exceeded")
        long_stream = await client.post(
            "/v1/chat/completions",
            json={"messages": [{"role": "user", "content": "word " * 600}], "stream": True},
        )
        assert_error(long_stream, 400, "context_length_exceeded")
        assert_error(await client.post("/v1/completions", json={"prompt": 7}), 400)
        # The server still works after all those errors.
        assert (await client.get("/health")).status_code == 200


# --------------------------------------------------------------- connections and timing


async def read_response(stream: anyio.abc.ByteStream) -> tuple[bytes, bytes]:
    """Read one Content-Length response from a raw stream; return (head, body)."""
    data = b""
    while b"\r\n\r\n" not in data:
        data += await stream.receive()
    head, body = data.split(b"\r\n\r\n", 1)
    length = next(
        int(line.split(b":", 1)[1])
        for line in head.split(b"\r\n")
        if line.lower().startswith(b"content-length:")
    )
    while len(body) < length:
        body += await stream.receive()
    assert len(body) == length
    return head, body


@pytest.mark.anyio
async def test_keep_alive_serves_two_requests_on_one_connection() -> None:
    async with serve(QUICK) as server, await anyio.connect_tcp("127.0.0.1", server.port) as stream:
        body = json.dumps(chat_body(max_tokens=2)).encode()
        request = (
            b"POST /v1/chat/completions HTTP/1.1\r\nhost: 127.0.0.1\r\n"
            b"content-type: application/json\r\ncontent-length: %d\r\n\r\n%b" % (len(body), body)
        )
        for _ in range(2):
            await stream.send(request)
            head, answer = await read_response(stream)
            assert head.startswith(b"HTTP/1.1 200 OK")
            assert b"connection: keep-alive" in head.lower()
            assert json.loads(answer)["usage"]["completion_tokens"] == 2
        assert server.app.counters.requests_received == 2


@pytest.mark.anyio
async def test_connection_close_is_honoured() -> None:
    async with serve(QUICK) as server, await anyio.connect_tcp("127.0.0.1", server.port) as stream:
        await stream.send(b"GET /health HTTP/1.1\r\nhost: 127.0.0.1\r\nconnection: close\r\n\r\n")
        head, body = await read_response(stream)
        assert b"connection: close" in head.lower()
        assert body == b'{"status":"ok"}'
        with anyio.fail_after(5), pytest.raises(anyio.EndOfStream):
            await stream.receive()


@pytest.mark.anyio
async def test_malformed_http_gets_400_and_close() -> None:
    async with serve(QUICK) as server, await anyio.connect_tcp("127.0.0.1", server.port) as stream:
        await stream.send(b"NOT HTTP AT ALL\r\n\r\n")
        head, _ = await read_response(stream)
        assert head.startswith(b"HTTP/1.1 400")
        with anyio.fail_after(5), pytest.raises(anyio.EndOfStream):
            await stream.receive()


@pytest.mark.anyio
async def test_client_disconnect_cancels_the_sequence() -> None:
    config = dataclasses.replace(QUICK, step_base_ms=10.0)
    async with running(config) as (server, client):
        body = chat_body(max_tokens=200, stream=True)
        async with client.stream("POST", "/v1/chat/completions", json=body) as response:
            seen = 0
            async for data in response.aiter_bytes():
                seen += data.count(b"data: ")
                if seen >= 4:
                    break
        with anyio.fail_after(5):
            while server.engine.counters.cancelled == 0:
                await anyio.sleep(0.01)
        assert server.engine.running_count == 0
        assert server.engine.counters.completed == 0
        assert server.engine.counters.tokens_emitted < 50
        assert (await client.get("/health")).status_code == 200


@pytest.mark.anyio
async def test_single_stream_token_gaps_match_one_step() -> None:
    """At concurrency 1 the median gap between content chunks is b + d within 2 %."""
    config = dataclasses.replace(QUICK, step_base_ms=20.0, decode_per_seq_ms=1.0)
    async with running(config) as (_, client):
        _, events = await stream_events(client, "/v1/chat/completions", chat_body(max_tokens=30, stream=True))
    content_times = [
        received
        for received, text in events
        if text != "[DONE]" and json.loads(text)["choices"][0]["delta"].get("content")
    ]
    assert len(content_times) == 30
    gaps = [later - earlier for earlier, later in itertools.pairwise(content_times)]
    assert statistics.median(gaps) == pytest.approx(0.021, rel=0.02)


@pytest.mark.anyio
async def test_concurrent_streams_share_steps() -> None:
    async with running() as (server, client), anyio.create_task_group() as group:
        for _ in range(8):
            group.start_soon(
                stream_events, client, "/v1/chat/completions", chat_body(max_tokens=5, stream=True)
            )
    counters = server.engine.counters
    assert counters.completed == 8 and counters.tokens_emitted == 40
    assert counters.max_running_seen > 1
    assert counters.steps < 40  # batched, not one step per token per stream


@pytest.mark.anyio
async def test_serves_on_ipv6_loopback() -> None:
    if not socket.has_ipv6:
        pytest.skip("no IPv6 on this machine")
    try:
        async with serve(QUICK, "::1", 0) as server, httpx.AsyncClient() as client:
            assert server.url == f"http://[::1]:{server.port}"
            assert (await client.get(server.url + "/health")).json() == {"status": "ok"}
    except OSError as exc:  # IPv6 compiled in but not configured on loopback
        pytest.skip(f"cannot bind ::1: {exc}")


# ------------------------------------------------------------------------ child process


def test_subprocess_starts_answers_and_stops_by_pid() -> None:
    with start_subprocess("small-fast", extra_args=("--model", "harbour-chat-large")) as mock:
        assert mock.url.startswith("http://127.0.0.1:")
        assert mock.base_url == mock.url + "/v1"
        assert httpx.get(mock.url + "/health", timeout=10).json() == {"status": "ok"}
        models = httpx.get(mock.base_url + "/models", timeout=10).json()
        assert models["data"][0]["id"] == "harbour-chat-large"
        pid = mock.pid
        os.kill(pid, 0)  # alive
        assert mock.stop() == 0  # SIGTERM -> clean exit 0
    with pytest.raises(ProcessLookupError):
        os.kill(pid, 0)


def test_subprocess_start_failure_is_explained() -> None:
    with pytest.raises(MockStartError, match="no-such-engine"):
        start_subprocess("no-such-engine")


def test_public_api_is_exported_and_sorted() -> None:
    assert mock_server.__all__ == sorted(mock_server.__all__)
    for name in mock_server.__all__:
        assert hasattr(mock_server, name), name
