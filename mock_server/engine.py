"""The simulated continuous-batching engine: its configuration, its loop, its ground truth.

Performance model (the rules; ``scheduler.StepScheduler`` implements them, no clock inside):

- Requests wait in one FIFO queue. At the start of each step the engine admits queued
  requests in order while both caps allow: at most ``max_running`` sequences, and the sum
  of (prompt + output) tokens reserved by running sequences at most ``max_batch_tokens``.
  A request that alone exceeds ``max_batch_tokens`` or ``context_window`` is rejected at
  submission (HTTP 400) and never queued.
- Step duration = prefill_per_token_ms * (prompt tokens admitted in this step)
  + step_base_ms + decode_per_seq_ms * (sequences running in this step, admitted ones too).
- At the END of each step every running sequence emits exactly one token, so a request's
  first token arrives at the end of the step that admitted it; a sequence that emitted its
  last token leaves the batch. Requests arriving during a step wait for the next step.
- When nothing runs and nothing waits the engine sleeps until an arrival, then starts a
  step at once.
- Steps follow absolute deadlines so timer jitter never accumulates: the next step starts
  at the previous deadline, unless the loop woke more than one whole step late (then it
  starts now). All tokens of a step are delivered in one pass right at the deadline; the
  lateness of each pass start (actual - deadline) is recorded as the pacing error, and
  the pass's own duration (first to last write) separately.
- A cancelled sequence (client gone) gets no more tokens and leaves at the next step start.

``ground_truth`` gives the closed-form steady state of this model for N closed-loop clients
with zero think time; see its docstring for the three regimes.
"""

from __future__ import annotations

import asyncio
import dataclasses
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, Literal

from mock_server.scheduler import SchedulerCounters, Sequence, StepScheduler
from mock_server.stats import SampleWindow

_EARLY_WAKE_TOLERANCE_S = 100e-6
"""Timer wake-ups earlier than this before the deadline are put back to sleep. libuv timers
have millisecond granularity and may fire a fraction of a millisecond early; the re-armed
timer then fires on the next loop pass, so the wait ends as a short poll, never a drift."""


@dataclass(frozen=True, slots=True)
class EngineConfig:
    """How the simulated model performs. Times in milliseconds, sizes in tokens."""

    model: str = "mock-model"
    step_base_ms: float = 10.0
    decode_per_seq_ms: float = 0.2
    prefill_per_token_ms: float = 0.02
    max_running: int = 64
    max_batch_tokens: int = 65_536
    context_window: int = 8_192
    default_max_tokens: int = 128
    tokens_per_word: float = 1.0
    seed: int = 0

    def __post_init__(self) -> None:
        if not self.model:
            raise ValueError("model must be a non-empty string")
        if self.step_base_ms <= 0:
            raise ValueError("step_base_ms must be > 0 (a step must take time)")
        for name in ("decode_per_seq_ms", "prefill_per_token_ms"):
            if getattr(self, name) < 0:
                raise ValueError(f"{name} must be >= 0")
        for name in ("max_running", "max_batch_tokens", "context_window", "default_max_tokens"):
            if getattr(self, name) < 1:
                raise ValueError(f"{name} must be >= 1")
        if self.tokens_per_word <= 0:
            raise ValueError("tokens_per_word must be > 0")

    def as_dict(self) -> dict[str, Any]:
        return dataclasses.asdict(self)


class Engine:
    """Runs the step loop on the current asyncio event loop, driven by timer callbacks.

    The loop is a chain of callbacks (start step -> timer at its deadline -> deliver ->
    start next step), so deliveries run inside the timer callback itself, with nothing
    queued between the deadline and the pass.
    """

    def __init__(self, config: EngineConfig) -> None:
        self.config = config
        self._scheduler = StepScheduler(config)
        self._loop: asyncio.AbstractEventLoop | None = None
        self._timer: asyncio.TimerHandle | None = None
        self._start_pending = False
        self._deadline = 0.0
        self._step_duration = 0.0
        self._closed = False
        self.pacing_error_us = SampleWindow()
        self.delivery_pass_us = SampleWindow()

    @property
    def counters(self) -> SchedulerCounters:
        return self._scheduler.counters

    @property
    def queue_length(self) -> int:
        return self._scheduler.queue_length

    @property
    def running_count(self) -> int:
        return self._scheduler.running_count

    @property
    def idle(self) -> bool:
        """True when no step is in progress or about to start."""
        return self._timer is None and not self._start_pending

    def submit(
        self, prompt_tokens: int, output_tokens: int, on_token: Callable[[Sequence], None]
    ) -> Sequence:
        """Queue a request (raises scheduler.AdmissionRejected); must run on the event loop."""
        if self._closed:
            raise RuntimeError("engine is closed")
        if self._loop is None:
            self._loop = asyncio.get_running_loop()
        sequence = self._scheduler.submit(prompt_tokens, output_tokens, on_token)
        if self.idle:
            # call_soon, not a direct start: arrivals read in the same loop pass join the step.
            self._start_pending = True
            self._loop.call_soon(self._start_from_idle)
        return sequence

    def cancel(self, sequence: Sequence) -> None:
        self._scheduler.cancel(sequence)

    def close(self) -> None:
        """Stop stepping; queued and running sequences get no more tokens."""
        self._closed = True
        if self._timer is not None:
            self._timer.cancel()
            self._timer = None

    def _start_from_idle(self) -> None:
        self._start_pending = False
        if not self._closed:
            self._begin_step(time.perf_counter())

    def _begin_step(self, start: float) -> None:
        assert self._loop is not None
        self._step_duration = self._scheduler.start_step()
        self._deadline = start + self._step_duration
        self._timer = self._loop.call_later(self._deadline - time.perf_counter(), self._on_deadline)

    def _on_deadline(self) -> None:
        assert self._loop is not None
        deadline = self._deadline
        now = time.perf_counter()
        if now < deadline - _EARLY_WAKE_TOLERANCE_S:
            self._timer = self._loop.call_later(deadline - now, self._on_deadline)
            return
        self._timer = None
        self.pacing_error_us.add(round((now - deadline) * 1e6))
        failures = self._scheduler.finish_step()
        finished_at = time.perf_counter()
        for exc in failures:
            self._loop.call_exception_handler({"message": "token delivery failed", "exception": exc})
        self.delivery_pass_us.add(round((finished_at - now) * 1e6))
        if self._closed or not self._scheduler.has_work():
            return
        # The next step starts at this deadline (absolute schedule, no drift) unless the
        # loop woke more than one whole step late; then it starts now. A long delivery pass
        # alone does not reset the schedule: the next timer is then due at once and the
        # engine catches up, so steps per second hold while the passes fit on average.
        late_by = now - deadline
        self._begin_step(deadline if late_by <= self._step_duration else finished_at)


Regime = Literal["idle-between", "unsaturated", "saturated"]


@dataclass(frozen=True, slots=True)
class GroundTruth:
    """Steady-state figures of the model for one closed-loop workload (seconds, per second)."""

    regime: Regime
    step_s: float
    requests_per_s: float
    output_tokens_per_s: float
    mean_ttft_s: float
    mean_itl_s: float
    mean_e2e_s: float
    mean_batch: float


def ground_truth(
    config: EngineConfig, concurrency: int, prompt_tokens: int, output_tokens: int
) -> GroundTruth:
    """Closed-form steady state for N closed-loop clients with zero think time.

    Each client sends requests of P prompt and O output tokens (O >= 1); b = step_base,
    d = decode_per_seq, c = prefill_per_token (seconds); cap = min(max_running,
    max_batch_tokens // (P + O)).

    - N = 1 ("idle-between"): the engine idles between requests. TTFT = b + d + c*P,
      ITL = b + d, E2E = TTFT + (O-1)*ITL, requests/s = 1/E2E; step_s is the mean step
      E2E/O.
    - N >= 2 and N*O/(O+1) < cap ("unsaturated"): the engine never idles (clients start
      spread out); a client's next request arrives during the step after its last token
      and waits for the next step, so each client cycles every O+1 steps. Mean running
      B = N*O/(O+1), mean admitted per step A = N/(O+1), mean step T = b + d*B + c*P*A,
      requests/s X = N/((O+1)*T) (exact by counting), ITL = T, E2E = (O+1)*T = N/X,
      TTFT = E2E - (O-1)*T = 2T.
    - N*O/(O+1) >= cap ("saturated"): B = cap, A = cap/O, T = b + d*cap + c*P*cap/O,
      X = cap/(O*T), E2E = N/X (Little's law), ITL = T, TTFT = E2E - (O-1)*T.

    Throughput and E2E are exact in steady state. TTFT and ITL split E2E using the MEAN
    step; with prefill cost c > 0 the step that admits a request is longer than the mean,
    so the true TTFT is a little higher and the true ITL a little lower (by about c*P per
    request in total).
    """
    if concurrency < 1:
        raise ValueError("concurrency must be >= 1")
    if prompt_tokens < 0:
        raise ValueError("prompt_tokens must be >= 0")
    if output_tokens < 1:
        raise ValueError("output_tokens must be >= 1")
    reserved = prompt_tokens + output_tokens
    if reserved > config.context_window or reserved > config.max_batch_tokens:
        raise ValueError(
            f"a request of {reserved} tokens would be rejected "
            f"(context_window {config.context_window}, max_batch_tokens {config.max_batch_tokens})"
        )
    n = concurrency
    p = prompt_tokens
    o = output_tokens
    b = config.step_base_ms / 1000.0
    d = config.decode_per_seq_ms / 1000.0
    c = config.prefill_per_token_ms / 1000.0
    cap = min(config.max_running, config.max_batch_tokens // reserved)

    if n == 1:
        itl = b + d
        ttft = b + d + c * p
        e2e = ttft + (o - 1) * itl
        x = 1.0 / e2e
        return GroundTruth("idle-between", e2e / o, x, x * o, ttft, itl, e2e, 1.0)

    if n * o / (o + 1) < cap:
        batch = n * o / (o + 1)
        admitted = n / (o + 1)
        step = b + d * batch + c * p * admitted
        x = n / ((o + 1) * step)
        e2e = (o + 1) * step
        return GroundTruth("unsaturated", step, x, x * o, 2 * step, step, e2e, batch)

    step = b + d * cap + c * p * cap / o
    x = cap / (o * step)
    e2e = n / x
    ttft = e2e - (o - 1) * step
    return GroundTruth("saturated", step, x, x * o, ttft, step, e2e, float(cap))
