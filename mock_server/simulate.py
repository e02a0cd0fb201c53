"""Discrete-event simulation of the engine in virtual time, for closed-loop clients.

It drives the same ``StepScheduler`` as the real engine, with a virtual clock: no sleeping,
no sockets, exact deadlines. Used to check ``engine.ground_truth`` and to explore
workloads quickly. Clients start spread out over ``start_spread_s`` and send their next
request ``think_s`` after the last token of the previous one.
"""

from __future__ import annotations

import heapq
from dataclasses import dataclass, field

from mock_server.engine import EngineConfig
from mock_server.scheduler import Sequence, StepScheduler


@dataclass(frozen=True, slots=True)
class SimulationResult:
    """Rates come from each client's completions after warm-up; means cover the requests
    sent after warm-up that finished before the end."""

    requests_measured: int
    requests_per_s: float
    output_tokens_per_s: float
    mean_ttft_s: float
    mean_itl_s: float
    mean_e2e_s: float
    mean_batch: float
    max_running_seen: int
    max_reserved_tokens_seen: int
    steps: int


@dataclass(slots=True)
class _Request:
    client: int
    sent_at: float
    token_times: list[float] = field(default_factory=list)


def simulate_closed_loop(
    config: EngineConfig,
    concurrency: int,
    prompt_tokens: int,
    output_tokens: int,
    *,
    think_s: float = 1e-4,
    start_spread_s: float | None = None,
    warmup_s: float = 2.0,
    horizon_s: float = 20.0,
    max_steps: int = 2_000_000,
) -> SimulationResult:
    """Run ``concurrency`` closed-loop clients until ``horizon_s`` of virtual time.

    ``think_s`` must be shorter than a step, so that a client's next request arrives
    during the step after its last token (the zero-think-time case the ground truth
    describes). By default clients start spread over one step_base_ms per client slot.
    """
    if concurrency < 1 or output_tokens < 1:
        raise ValueError("concurrency and output_tokens must be >= 1")
    if think_s <= 0:
        raise ValueError("think_s must be > 0 so an arrival never ties with a step boundary")
    spread = (
        start_spread_s if start_spread_s is not None else config.step_base_ms / 1000.0 * (output_tokens + 1)
    )
    scheduler = StepScheduler(config)
    arrivals: list[tuple[float, int, int]] = []  # (time, tie-breaker, client)
    order = 0
    for client in range(concurrency):
        heapq.heappush(arrivals, (spread * client / concurrency, order, client))
        order += 1

    measured: list[_Request] = []
    completion_times: dict[int, list[float]] = {}
    running_at_step_start: list[int] = []
    max_reserved = 0
    now = 0.0
    steps = 0

    def submit(client: int, at: float) -> None:
        request = _Request(client, at)

        def on_token(sequence: Sequence) -> None:
            request.token_times.append(now)
            if sequence.finished:
                nonlocal order
                if now >= warmup_s:
                    completion_times.setdefault(request.client, []).append(now)
                if request.sent_at >= warmup_s:
                    measured.append(request)
                heapq.heappush(arrivals, (now + think_s, order, request.client))
                order += 1

        scheduler.submit(prompt_tokens, output_tokens, on_token)

    while steps < max_steps:
        if not scheduler.has_work():
            if not arrivals:
                break
            now, _, client = heapq.heappop(arrivals)
            if now >= horizon_s:
                break
            submit(client, now)
        # Everything that arrived up to this step's start may be admitted by it.
        while arrivals and arrivals[0][0] <= now:
            at, _, client = heapq.heappop(arrivals)
            submit(client, at)
        duration = scheduler.start_step()
        steps += 1
        if now >= warmup_s:
            running_at_step_start.append(scheduler.running_count)
        max_reserved = max(max_reserved, scheduler.reserved_tokens)
        end = now + duration
        # Arrivals during the step queue up (FIFO by arrival time) for the next one.
        while arrivals and arrivals[0][0] < end:
            at, _, client = heapq.heappop(arrivals)
            submit(client, at)
        now = end
        failures = scheduler.finish_step()
        if failures:
            raise failures[0]
        if now >= horizon_s:
            break

    if not measured or len(completion_times) < concurrency:
        raise ValueError("too little was measured: lengthen horizon_s or shorten warmup_s")
    # Each client's rate from its first to its last completion after warm-up spans whole
    # cycles, so the sum is exact in steady state even when completions come in bursts.
    rate = 0.0
    for times in completion_times.values():
        if len(times) < 2:
            raise ValueError("a client finished fewer than two requests: lengthen horizon_s")
        rate += (len(times) - 1) / (times[-1] - times[0])
    gaps = [
        later - earlier
        for request in measured
        for earlier, later in zip(request.token_times, request.token_times[1:], strict=False)
    ]
    count = len(measured)
    return SimulationResult(
        requests_measured=count,
        requests_per_s=rate,
        output_tokens_per_s=rate * output_tokens,
        mean_ttft_s=sum(r.token_times[0] - r.sent_at for r in measured) / count,
        mean_itl_s=sum(gaps) / len(gaps) if gaps else 0.0,
        mean_e2e_s=sum(r.token_times[-1] - r.sent_at for r in measured) / count,
        mean_batch=sum(running_at_step_start) / max(1, len(running_at_step_start)),
        max_running_seen=scheduler.counters.max_running_seen,
        max_reserved_tokens_seen=max_reserved,
        steps=steps,
    )
