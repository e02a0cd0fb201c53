"""One load level: a closed loop of N clients or an open-loop arrival process, with a
measurement window, warm-up and drain.

Closed loop: each of N clients runs a conversation (one request, or the turns of a
session with their think times), pauses for the loop's think time, and starts the next,
so at most N requests are in flight. Client starts are spread evenly over the warm-up so
that they do not arrive in one burst.

Open loop: conversations arrive at the due times of an arrival process (Poisson, constant,
bursty, or a replayed trace), whatever the target does. Each request's latency clock
starts at its INTENDED send time, so a generator or target that falls behind cannot hide
the wait (coordinated omission); how late the actual send was is recorded apart. A
session's later turns are due one think time after the previous answer. At most
``in_flight_cap`` requests are in flight; a request due beyond that is not sent, and is
recorded as NOT_SENT (counted, never silently dropped).

In both, requests due before the warm-up ends are recorded but kept out of the
measurement. The window closes at the duration (or when the last of the requested count
is due); requests then in flight drain and are measured, and no new ones are sent. A
request that would exceed the target's context window is refused before sending
(OVER_CONTEXT).
"""

from __future__ import annotations

from collections.abc import Awaitable, Callable, Iterator
from dataclasses import dataclass, field
from time import perf_counter_ns

import anyio
import anyio.abc

from loadrun.answers import Answer, collecting_answer
from loadrun.arrivals import OpenArrivals
from loadrun.collector_hold import holding_old_objects
from loadrun.errors import UsageError
from loadrun.metrics import LatencyHistogram
from loadrun.protocol import ChatRequest
from loadrun.record import Outcome, Record
from loadrun.workload import Conversation

NS_PER_S = 1_000_000_000
LATE_SEND_US = 5_000
"""An open-loop send this much later than due counts as late; a p99 send lag above it means
the generator fell behind (the same bound as the event-loop lag; common practice, no source)."""
SPIN_BEFORE_DUE_NS = 1_500_000
"""Open loop: sleep until this long before a due time, then yield to the loop until it comes.
Event-loop timers have millisecond granularity (they fire up to a millisecond late), and
lateness here would count in every latency; polling the last stretch keeps sends within
microseconds of their due times for a little CPU."""


@dataclass(frozen=True, slots=True)
class ClosedLoopPlan:
    concurrency: int
    duration_s: float | None = None
    requests: int | None = None
    warmup_s: float = 1.0
    time_limit_s: float = 3600.0
    """Hard bound on the whole run, whatever else is asked."""
    drain_grace_s: float = 30.0
    """After the time limit or a stop (an interrupt), how long in-flight requests may still finish."""
    think_time_s: float = 0.0
    """Each client's pause between the end of one conversation and the start of the next."""

    def __post_init__(self) -> None:
        if self.concurrency < 1:
            raise UsageError("concurrency must be at least 1")
        _check_window(self.duration_s, self.requests, self.warmup_s, allow_open_end=False)
        if self.think_time_s < 0:
            raise UsageError("think time must not be negative")


@dataclass(frozen=True, slots=True)
class OpenLoopPlan:
    arrivals: OpenArrivals
    duration_s: float | None = None
    requests: int | None = None
    """Neither: until the arrival process ends (a replayed trace)."""
    warmup_s: float = 1.0
    in_flight_cap: int = 512
    time_limit_s: float = 3600.0
    drain_grace_s: float = 30.0

    def __post_init__(self) -> None:
        if self.in_flight_cap < 1:
            raise UsageError("the in-flight cap must be at least 1")
        open_end = self.arrivals.kind == "replay"
        _check_window(self.duration_s, self.requests, self.warmup_s, allow_open_end=open_end)

    @property
    def rate_per_s(self) -> float | None:
        rate = self.arrivals.describe().get("rate_per_s")
        return float(rate) if rate is not None else None


LoadPlan = ClosedLoopPlan | OpenLoopPlan


def _check_window(
    duration_s: float | None, requests: int | None, warmup_s: float, allow_open_end: bool
) -> None:
    if duration_s is not None and requests is not None:
        raise UsageError("give either a duration or a request count, not both")
    if duration_s is None and requests is None and not allow_open_end:
        raise UsageError("give either a duration or a request count")
    if duration_s is not None and duration_s <= 0:
        raise UsageError("duration must be positive")
    if requests is not None and requests < 1:
        raise UsageError("request count must be at least 1")
    if warmup_s < 0:
        raise UsageError("warm-up must not be negative")


@dataclass(slots=True)
class LevelResult:
    origin_ns: int
    window_start_ns: int
    window_end_ns: int
    sent: int
    measured_sent: int
    interrupted: bool
    cancelled: int = 0
    """Requests in flight when the grace after a stop ran out: cancelled, never recorded."""
    due: int = 0
    """Open loop: requests that came due (sent, not sent and refused alike)."""
    not_sent: int = 0
    """Open loop: requests due while the in-flight cap was reached."""
    refused: int = 0
    """Requests refused before sending (context window)."""
    late_sends: int = 0
    """Open loop: sends more than LATE_SEND_US after their due time."""
    send_lag: LatencyHistogram = field(default_factory=LatencyHistogram)
    """Open loop: actual send minus due time of every sent request, microseconds."""
    last_due_ns: int = 0


Execute = Callable[[ChatRequest, Record], Awaitable[Record]]


class _Slots:
    """Hands out request ids while the plan allows one more; closes the window on the last."""

    def __init__(
        self, state: LevelResult, warmup_end: int, deadline: int, requests: int | None, stop: anyio.Event
    ):
        self.state = state
        self.warmup_end = warmup_end
        self.deadline = deadline
        self.requests = requests
        self.stop = stop

    def claim(self, due: int) -> tuple[int, bool] | None:
        """A request id for a request due at ``due`` and whether it is measured; None: no more."""
        state = self.state
        if self.stop.is_set() or due >= min(state.window_end_ns, self.deadline):
            return None
        in_window = due >= self.warmup_end
        if in_window and self.requests is not None:
            if state.measured_sent >= self.requests:
                return None
            state.measured_sent += 1
            if state.measured_sent == self.requests:
                state.window_end_ns = due  # the last measured request closes the window
        state.sent += 1
        return state.sent, in_window

    @property
    def exhausted(self) -> bool:
        return self.requests is not None and self.state.measured_sent >= self.requests

    @property
    def closes_at(self) -> int:
        """No request due at or after this instant will be sent (the window's end, moved
        forward to the last request's claim once the request count is used)."""
        return min(self.state.window_end_ns, self.deadline)


async def send_turn(conversation: Conversation, turn: int, record: Record, execute: Execute) -> bool:
    """Send one turn of a conversation into ``record``; True if the conversation goes on."""
    request = conversation.request(turn)
    conversation.stamp(record, request, turn)
    refusal = conversation.refusal(request)
    if refusal is not None:
        record.outcome = Outcome.OVER_CONTEXT
        record.error = refusal
        record.end_ns = record.intended_ns
        return False
    answer: Answer | None = None
    if conversation.needs_answer:
        with collecting_answer() as answer:
            await execute(request, record)
    else:
        await execute(request, record)
    return conversation.finish_turn(turn, record, answer)


async def _pause(seconds: float, stop: anyio.Event) -> None:
    """Sleep, but wake at once on a stop."""
    if seconds > 0:
        with anyio.move_on_after(seconds):
            await stop.wait()


async def _sleep_until(due_ns: int, clock: Callable[[], int], stop: anyio.Event) -> None:
    """Wait for a due time precisely (see SPIN_BEFORE_DUE_NS); wake at once on a stop."""
    await _pause((due_ns - clock() - SPIN_BEFORE_DUE_NS) / NS_PER_S, stop)
    while clock() < due_ns and not stop.is_set():
        await anyio.sleep(0)


def _as_conversations(items: Iterator[ChatRequest | Conversation]) -> Iterator[Conversation]:
    for number, item in enumerate(items, start=1):
        yield item if isinstance(item, Conversation) else Conversation.single(item, number)


@holding_old_objects
async def run_closed_loop(
    plan: ClosedLoopPlan,
    execute: Execute,
    requests: Iterator[ChatRequest | Conversation],
    on_record: Callable[[Record], None],
    *,
    clock: Callable[[], int] = perf_counter_ns,
    stop: anyio.Event | None = None,
) -> LevelResult:
    """Run one closed-loop load level; every finished request goes to ``on_record``.

    ``requests`` yields ready requests (one-request conversations) or Conversations.
    """
    stop = stop or anyio.Event()
    conversations = _as_conversations(requests)
    origin = clock()
    warmup_end = origin + int(plan.warmup_s * NS_PER_S)
    deadline = origin + int(plan.time_limit_s * NS_PER_S)
    window_end = warmup_end + int(plan.duration_s * NS_PER_S) if plan.duration_s is not None else deadline
    state = LevelResult(origin, warmup_end, window_end, 0, 0, False)
    slots = _Slots(state, warmup_end, deadline, plan.requests, stop)
    ramp_ns = int(plan.warmup_s * NS_PER_S)

    async def client(index: int) -> None:
        start_at = origin + ramp_ns * index // plan.concurrency
        delay = (start_at - clock()) / NS_PER_S
        if delay > 0:
            await anyio.sleep(delay)
        while True:
            conversation: Conversation | None = None
            turn = 0
            while True:
                now = clock()
                slot = slots.claim(now)
                if slot is None:
                    return
                request_id, in_window = slot
                if conversation is None:
                    conversation = next(conversations)
                record = Record(request_id=request_id, intended_ns=now, in_window=in_window)
                try:
                    goes_on = await send_turn(conversation, turn, record, execute)
                except anyio.get_cancelled_exc_class():
                    state.cancelled += 1
                    raise
                if record.outcome is Outcome.OVER_CONTEXT:
                    state.refused += 1
                on_record(record)
                if not goes_on:
                    break
                turn += 1
                await _pause(until_close(conversation.turns[turn].think_before_s), stop)
            await _pause(until_close(plan.think_time_s), stop)

    def until_close(think_s: float) -> float:
        # A think time that would outlast the last request is not waited out.
        return min(think_s, (slots.closes_at - clock()) / NS_PER_S)

    async def enforce_time_limit(clients: anyio.abc.TaskGroup) -> None:
        # The grace starts at the time limit or at an outside stop, whichever comes first.
        with anyio.move_on_after(max(0.0, (deadline - clock()) / NS_PER_S)):
            await stop.wait()
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


@holding_old_objects
async def run_open_loop(
    plan: OpenLoopPlan,
    execute: Execute,
    arrivals: Iterator[tuple[float, Conversation]],
    on_record: Callable[[Record], None],
    *,
    clock: Callable[[], int] = perf_counter_ns,
    stop: anyio.Event | None = None,
) -> LevelResult:
    """Run one open-loop load level: ``arrivals`` yields (seconds from the start, conversation)."""
    stop = stop or anyio.Event()
    origin = clock()
    warmup_end = origin + int(plan.warmup_s * NS_PER_S)
    deadline = origin + int(plan.time_limit_s * NS_PER_S)
    window_end = warmup_end + int(plan.duration_s * NS_PER_S) if plan.duration_s is not None else deadline
    state = LevelResult(origin, warmup_end, window_end, 0, 0, False)
    slots = _Slots(state, warmup_end, deadline, plan.requests, stop)
    in_flight = 0
    dispatch_done = False

    def not_sent(record: Record, conversation: Conversation, turn: int) -> None:
        conversation.stamp(record, conversation.request(turn), turn)
        record.outcome = Outcome.NOT_SENT
        record.error = f"not sent: {plan.in_flight_cap} requests were in flight (the in-flight cap)"
        record.end_ns = max(record.intended_ns, clock())
        state.not_sent += 1

    async def converse(conversation: Conversation, due: int) -> None:
        nonlocal in_flight
        turn = 0
        while True:
            slot = slots.claim(due)
            if slot is None:
                return
            request_id, in_window = slot
            state.due += 1
            state.last_due_ns = max(state.last_due_ns, due)
            record = Record(request_id=request_id, intended_ns=due, in_window=in_window)
            if in_flight >= plan.in_flight_cap:
                not_sent(record, conversation, turn)
                on_record(record)
                return
            in_flight += 1
            try:
                goes_on = await send_turn(conversation, turn, record, execute)
            except anyio.get_cancelled_exc_class():
                state.cancelled += 1
                raise
            finally:
                in_flight -= 1
            if record.outcome is Outcome.OVER_CONTEXT:
                state.refused += 1
            elif record.send_ns:
                lag_us = max(0, record.send_ns - due) // 1000
                state.send_lag.record_us(lag_us)
                if lag_us > LATE_SEND_US:
                    state.late_sends += 1
            on_record(record)
            if not goes_on:
                return
            turn += 1
            # The next turn is due one think time after this answer, whenever that came.
            due = record.end_ns + int(conversation.turns[turn].think_before_s * NS_PER_S)
            if due >= slots.closes_at:  # the turn would come too late to be sent
                return
            await _sleep_until(due, clock, stop)

    async def dispatch(conversations: anyio.abc.TaskGroup) -> None:
        nonlocal dispatch_done
        for offset_s, conversation in arrivals:
            due = origin + round(offset_s * NS_PER_S)
            if stop.is_set() or slots.exhausted or due >= min(state.window_end_ns, deadline):
                break
            await _sleep_until(due, clock, stop)
            if stop.is_set():
                break
            conversations.start_soon(converse, conversation, due)
        dispatch_done = True

    async def enforce_time_limit(conversations: anyio.abc.TaskGroup) -> None:
        with anyio.move_on_after(max(0.0, (deadline - clock()) / NS_PER_S)):
            await stop.wait()
        stop.set()
        await anyio.sleep(plan.drain_grace_s)
        conversations.cancel_scope.cancel()

    async with anyio.create_task_group() as outer:
        async with anyio.create_task_group() as conversations:
            outer.start_soon(enforce_time_limit, conversations)
            conversations.start_soon(dispatch, conversations)
        outer.cancel_scope.cancel()
    end = clock()
    if dispatch_done and plan.duration_s is None and plan.requests is None:
        # A replayed trace: the window ends with its last arrival.
        state.window_end_ns = max(warmup_end, state.last_due_ns)
    state.interrupted = stop.is_set() and end < min(state.window_end_ns, deadline)
    state.window_end_ns = min(state.window_end_ns, end)
    return state
