"""Time limits for connect, first token, idle gap and total: each its own outcome, on time.

Streams come from the bundled mock (in this event loop) or from httpx's mock transport
with async-generator bodies, so chunks arrive with real gaps. A connect that never
completes is made with a loopback listener whose accept queue is full: Linux drops the
SYNs of further connections (listen(2), "backlog"; from memory, no published check).
"""

from __future__ import annotations

import socket
from collections.abc import AsyncIterator, Callable, Iterator
from time import perf_counter_ns

import anyio
import httpx
import pytest

from loadrun.client import ChatClient
from loadrun.errors import UsageError
from loadrun.protocol import ChatRequest
from loadrun.record import Outcome, Record
from loadrun.target import Target
from loadrun.timeouts import Timeouts
from loadrun.transports import FastTransport, HttpxTransport, Transport
from mock_server import EngineConfig, serve
from mock_server.faults import FaultPlan, FaultSettings

TRANSPORTS = ["fast", "fast-protocol", "httpx"]
LONG = EngineConfig(model="mock-long", step_base_ms=5.0, decode_per_seq_ms=0.0, prefill_per_token_ms=0.0)
SLACK_S = 0.15
"""How late a limit may end a request on a shared 2-core machine (common practice, no source)."""
TIMER_RESOLUTION_S = 0.001
"""The event loop's timers count whole milliseconds (libuv's uv_timer_start takes its timeout
in ms), so a limit may end up to 1 ms before its time by the finer clock."""
pytestmark = pytest.mark.usefixtures("gc_paused")


def make_transport(name: str, connect_s: float = 10.0) -> Transport:
    if name == "fast":
        return FastTransport(connect_timeout_s=connect_s)
    if name == "fast-protocol":
        return FastTransport(connect_timeout_s=connect_s, kernel_stamps=False)
    return HttpxTransport(connect_timeout_s=connect_s)


def request(max_tokens: int = 5, stream: bool = True) -> ChatRequest:
    return ChatRequest(
        messages=({"role": "user", "content": "when does the last boat leave"},),
        max_tokens=max_tokens,
        stream=stream,
    )


async def send_one(base_url: str, transport: Transport, timeouts: Timeouts, chat: ChatRequest) -> Record:
    client = ChatClient(Target(base_url=base_url, model="m"), transport, timeouts=timeouts)
    record = Record(request_id=1, intended_ns=perf_counter_ns())
    try:
        with anyio.fail_after(30):
            await client.execute(chat, record)
    finally:
        await transport.aclose()
    return record


def elapsed_s(record: Record) -> float:
    return (record.end_ns - record.send_ns) / 1e9


@pytest.mark.parametrize(
    "changes",
    [
        {"connect_s": 0},
        {"first_token_s": -1.0},
        {"idle_s": float("nan")},
        {"total_s": float("inf")},
        {"first_token_s": True},
    ],
)
def test_bad_limits_are_refused(changes: dict[str, object]) -> None:
    with pytest.raises(UsageError):
        Timeouts(**changes)  # type: ignore[arg-type]


@pytest.fixture
def full_listener() -> Iterator[int]:
    """A loopback port whose accept queue is full, so a new connect hangs."""
    server = socket.socket()
    server.bind(("127.0.0.1", 0))
    server.listen(0)
    port = server.getsockname()[1]
    fillers = []
    for _ in range(3):
        filler = socket.socket()
        filler.setblocking(False)
        filler.connect_ex(("127.0.0.1", port))
        fillers.append(filler)
    try:
        yield port
    finally:
        for filler in fillers:
            filler.close()
        server.close()


@pytest.mark.anyio
@pytest.mark.parametrize("transport_name", TRANSPORTS)
async def test_connect_limit(full_listener: int, transport_name: str) -> None:
    timeouts = Timeouts(connect_s=0.3, first_token_s=5.0, total_s=10.0)
    transport = make_transport(transport_name, connect_s=0.3)
    record = await send_one(f"http://127.0.0.1:{full_listener}/v1", transport, timeouts, request())
    assert record.outcome is Outcome.TIMEOUT_CONNECT, record.error
    assert 0.3 - TIMER_RESOLUTION_S <= elapsed_s(record) < 0.3 + SLACK_S


@pytest.mark.anyio
@pytest.mark.parametrize("transport_name", TRANSPORTS)
@pytest.mark.parametrize(
    ("fault", "outcome"),
    [("stall_first_token", Outcome.TIMEOUT_FIRST_TOKEN), ("stall_between_tokens", Outcome.TIMEOUT_IDLE)],
)
async def test_first_token_and_idle_limits_end_on_time(
    transport_name: str, fault: str, outcome: Outcome
) -> None:
    plan = FaultPlan(FaultSettings(rates={fault: 1.0}, stall_s=2.0))
    async with serve(LONG, plan=plan) as mock:
        timeouts = Timeouts(first_token_s=0.25, idle_s=0.25, total_s=10.0)
        record = await send_one(mock.base_url, make_transport(transport_name), timeouts, request())
    assert record.outcome is outcome, record.error
    if outcome is Outcome.TIMEOUT_FIRST_TOKEN:
        assert not record.first_token_ns
        assert 0.25 - TIMER_RESOLUTION_S <= elapsed_s(record) < 0.25 + SLACK_S
    else:
        assert record.first_token_ns and len(record.chunk_ns) == 1
        gap_s = (record.end_ns - record.chunk_ns[-1]) / 1e9
        assert 0.25 - TIMER_RESOLUTION_S <= gap_s < 0.25 + SLACK_S


@pytest.mark.anyio
@pytest.mark.parametrize("transport_name", TRANSPORTS)
async def test_total_limit_ends_a_stream_that_flows(transport_name: str) -> None:
    """200 tokens 5 ms apart take 1 s: the total limit (0.3 s) ends it, not first token or idle."""
    async with serve(LONG) as mock:
        timeouts = Timeouts(first_token_s=0.2, idle_s=0.2, total_s=0.3)
        record = await send_one(mock.base_url, make_transport(transport_name), timeouts, request(200))
    assert record.outcome is Outcome.TIMEOUT_TOTAL, record.error
    assert 20 < len(record.chunk_ns) < 200
    assert 0.3 - TIMER_RESOLUTION_S <= elapsed_s(record) < 0.3 + SLACK_S


@pytest.mark.anyio
@pytest.mark.parametrize("transport_name", TRANSPORTS)
async def test_slow_tokens_within_the_limits_are_fine(transport_name: str) -> None:
    """Tokens 40 ms apart for 0.4 s: longer than the first-token limit in all, but each gap is short."""
    engine = EngineConfig(
        model="mock-slow", step_base_ms=40.0, decode_per_seq_ms=0.0, prefill_per_token_ms=0.0
    )
    async with serve(engine) as mock:
        timeouts = Timeouts(first_token_s=0.2, idle_s=0.2, total_s=5.0)
        record = await send_one(mock.base_url, make_transport(transport_name), timeouts, request(10))
    assert record.ok, record.error
    assert record.output_tokens == 10 and elapsed_s(record) > 0.35


@pytest.mark.anyio
async def test_first_token_and_idle_limits_do_not_apply_to_non_streamed_requests() -> None:
    async with serve(LONG) as mock:
        timeouts = Timeouts(first_token_s=0.1, idle_s=0.1, total_s=5.0)
        record = await send_one(mock.base_url, FastTransport(), timeouts, request(60, stream=False))
    assert record.ok, record.error
    assert record.output_tokens == 60 and elapsed_s(record) > 0.25


def streaming_handler(parts: list[tuple[float, bytes]]) -> Callable[[httpx.Request], httpx.Response]:
    async def body() -> AsyncIterator[bytes]:
        for delay, part in parts:
            await anyio.sleep(delay)
            yield part

    def handler(request: httpx.Request) -> httpx.Response:
        return httpx.Response(200, headers={"content-type": "text/event-stream"}, content=body())

    return handler


def content(text: str) -> bytes:
    return (
        b'data: {"id":"c","object":"chat.completion.chunk","created":1,"model":"m",'
        b'"choices":[{"index":0,"delta":{"content":"' + text.encode() + b'"},"finish_reason":null}]}\n\n'
    )


@pytest.mark.anyio
async def test_heartbeats_do_not_keep_a_stalled_stream_alive() -> None:
    """SSE comments and empty chunks are bytes, not tokens: the idle limit still ends the stall."""
    parts = [(0.0, content("ka "))] + [(0.05, b": keep-alive\n\n")] * 20
    parts += [
        (0.0, b'data: {"id":"c","object":"chat.completion.chunk","created":1,"model":"m","choices":[]}\n\n')
    ]
    transport = HttpxTransport(httpx.AsyncClient(transport=httpx.MockTransport(streaming_handler(parts))))
    timeouts = Timeouts(first_token_s=1.0, idle_s=0.3, total_s=5.0)
    record = await send_one("http://127.0.0.1:9/v1", transport, timeouts, request())
    assert record.outcome is Outcome.TIMEOUT_IDLE, record.error
    assert 0.3 <= (record.end_ns - record.chunk_ns[-1]) / 1e9 < 0.3 + SLACK_S


@pytest.mark.anyio
async def test_first_failure_names_the_outcome() -> None:
    """A malformed event, then a stall: the request failed first as a protocol error."""
    parts = [(0.0, content("ka ")), (0.0, b"data: {broken\n\n"), (1.0, content("lo "))]
    transport = HttpxTransport(httpx.AsyncClient(transport=httpx.MockTransport(streaming_handler(parts))))
    record = await send_one("http://127.0.0.1:9/v1", transport, Timeouts(idle_s=0.2, total_s=5.0), request())
    assert record.outcome is Outcome.PROTOCOL_ERROR
    assert record.end_ns - record.send_ns < 0.6e9  # but the limit still ended the wait
