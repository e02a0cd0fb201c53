"""One load level: a closed loop of N clients, a measurement window, warm-up and drain.

Each of N clients sends a request, waits for the whole answer, and sends the next, so N
requests are always in flight. Client starts are spread evenly over the warm-up so that
they do not arrive in one burst. Requests sent before the warm-up ends are recorded but
kept out of the measurement. The window closes at the duration (or when the last of the
requested count is sent); requests then in flight drain and are measured, and no new
ones are sent.
"""

from __future__ import annotations

from collections.abc import Awaitable, Callable, Iterator
from dataclasses import dataclass
from time import perf_counter_ns

import anyio
import anyio.abc

from loadrun.errors import UsageError
from loadrun.protocol import ChatRequest
from loadrun.record import Record

NS_PER_S = 1_000_000_000


@dataclass(frozen=True, slots=True)
class ClosedLoopPlan:
    concurrency: int
    duration_s: float | None = None
    requests: int | None = None
    warmup_s: float = 1.0
    time_limit_s: float = 3600.0
    """Hard bound on the whole run, whatever else is asked."""
    drain_grace_s: float = 30.0
    """After the time limit, how long in-flight requests may still finish."""

    def __post_init__(self) -> None:
        if self.concurrency < 1:
            raise UsageError("concurrency must be at least 1")
        if (self.duration_s is None) == (self.requests is None):
            raise UsageError("give either a duration or a request count")
        if self.duration_s is not None and self.duration_s <= 0:
            raise UsageError("duration must be positive")
        if self.requests is not None and self.requests < 1:
            raise UsageError("request count must be at least 1")
        if self.warmup_s < 0:
            raise UsageError("warm-up must not be negative")


@dataclass(slots=True)
class LevelResult:
    origin_ns: int
    window_start_ns: int
    window_end_ns: int
    sent: int
    measured_sent: int
    interrupted: bool


Execute = Callable[[ChatRequest, Record], Awaitable[Record]]


async def run_closed_loop(
    plan: ClosedLoopPlan,
    execute: Execute,
    requests: Iterator[ChatRequest],
    on_record: Callable[[Record], None],
    *,
    clock: Callable[[], int] = perf_counter_ns,
    stop: anyio.Event | None = None,
) -> LevelResult:
    """Run one closed-loop load level; every finished request goes to ``on_record``."""
    stop = stop or anyio.Event()
    origin = clock()
    warmup_end = origin + int(plan.warmup_s * NS_PER_S)
    deadline = origin + int(plan.time_limit_s * NS_PER_S)
    window_end = warmup_end + int(plan.duration_s * NS_PER_S) if plan.duration_s is not None else deadline
    state = LevelResult(origin, warmup_end, window_end, 0, 0, False)
    ramp_ns = int(plan.warmup_s * NS_PER_S)

    def next_request_slot(now: int) -> tuple[int, bool] | None:
        """Claim a request id if the plan allows one more now; (id, in window)."""
        if stop.is_set() or now >= min(state.window_end_ns, deadline):
            return None
        in_window = now >= warmup_end
        if in_window and plan.requests is not None:
            if state.measured_sent >= plan.requests:
                return None
            state.measured_sent += 1
            if state.measured_sent == plan.requests:
                state.window_end_ns = now  # the last measured request closes the window
        state.sent += 1
        return state.sent, in_window

    async def client(index: int) -> None:
        start_at = origin + ramp_ns * index // plan.concurrency
        delay = (start_at - clock()) / NS_PER_S
        if delay > 0:
            await anyio.sleep(delay)
        while True:
            now = clock()
            slot = next_request_slot(now)
            if slot is None:
                return
            request_id, in_window = slot
            request = next(requests)
            record = Record(request_id=request_id, intended_ns=now, in_window=in_window)
            record.requested_input_tokens = _user_words(request)
            await execute(request, record)
            on_record(record)

    async def enforce_time_limit(clients: anyio.abc.TaskGroup) -> None:
        await anyio.sleep(max(0.0, (deadline - clock()) / NS_PER_S))
        stop.set()
        await anyio.sleep(plan.drain_grace_s)
        clients.cancel_scope.cancel()

    async with anyio.create_task_group() as outer:
        async with anyio.create_task_group() as clients:
            outer.start_soon(enforce_time_limit, clients)
            for index in range(plan.concurrency):
                clients.start_soon(client, index)
        outer.cancel_scope.cancel()
    end = clock()
    state.interrupted = stop.is_set() and end < min(state.window_end_ns, deadline)
    state.window_end_ns = min(state.window_end_ns, end)
    return state


def _user_words(request: ChatRequest) -> int:
    return sum(len(str(m.get("content", "")).split()) for m in request.messages if m.get("role") == "user")
