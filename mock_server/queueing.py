"""The M/M/c mode: c parallel servers, exponential service times, one FIFO queue.

For checking queueing behaviour against theory (Erlang C, Little's law), the mock can
drop its batching engine for the textbook multi-server queue:

- a request arriving while fewer than ``servers`` requests are in service starts service
  at once; otherwise it waits in one FIFO queue;
- its service time is drawn from the exponential distribution with mean
  ``mean_service_ms`` (seeded, so a run is repeatable);
- the first token is sent when service STARTS (so time to first token is the queue
  wait), the remaining tokens together when it ENDS (so the whole answer takes wait +
  service). Ask for at least two output tokens to see the wait on its own.

The queue runs on exact times: a service ends at start + service time, and the next
waiting request starts at that instant, however late the event loop's timer fires, so
timer jitter delays only the delivery of tokens, never the queue itself.

The engine also keeps the time-average number of requests in the system and in the queue
since its last reset (``GET /mock/queueing``, ``POST /mock/queueing`` resets), the server's
own view for Little's law (L = lambda * W).

Configured by a ``[queueing]`` table in an engine TOML (see ``config.py``):

    model = "mock-mmc"
    [queueing]
    servers = 2
    mean_service_ms = 20.0
"""

from __future__ import annotations

import asyncio
import heapq
import itertools
import random
import time
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from mock_server.engine import Engine, EngineConfig
from mock_server.scheduler import AdmissionRejected, SchedulerCounters, Sequence
from mock_server.stats import SampleWindow

_WAKE_EARLY_S = 0.0015
"""The service-end timer fires this much early; the loop is then polled until the exact end."""


@dataclass(frozen=True, slots=True)
class QueueingConfig(EngineConfig):
    """An EngineConfig (model, tokenizer, context window, seed) plus the M/M/c parameters."""

    servers: int = 1
    mean_service_ms: float = 20.0

    def __post_init__(self) -> None:
        EngineConfig.__post_init__(self)
        if self.servers < 1:
            raise ValueError("queueing.servers must be >= 1")
        if not self.mean_service_ms > 0:
            raise ValueError("queueing.mean_service_ms must be > 0")


class _Job:
    __slots__ = ("arrived", "ends", "sequence", "started")

    def __init__(self, sequence: Sequence, arrived: float) -> None:
        self.sequence = sequence
        self.arrived = arrived
        self.started = 0.0
        self.ends = 0.0


class QueueingEngine:
    """Drop-in for ``engine.Engine`` in the app, with M/M/c behaviour (module docstring)."""

    def __init__(self, config: QueueingConfig, clock: Callable[[], float] = time.perf_counter) -> None:
        self.config = config
        self._clock = clock
        self._rng = random.Random(f"{config.seed}:service")
        self._mean_service_s = config.mean_service_ms / 1000.0
        self._waiting: deque[_Job] = deque()
        self._in_service: list[tuple[float, int, _Job]] = []
        """Jobs in service as a heap of (exact end time, tie-breaker, job)."""
        self._order = itertools.count()
        self._timer: asyncio.TimerHandle | asyncio.Handle | None = None
        self._timer_due = 0.0
        self._loop: asyncio.AbstractEventLoop | None = None
        self._closed = False
        self.counters = SchedulerCounters()
        self.pacing_error_us = SampleWindow()
        """Lateness of each service end's delivery against its exact end time."""
        self.delivery_pass_us = SampleWindow()
        self._stats_since = self._last_change = 0.0
        self._area_system = self._area_queue = self._wait_sum = self._service_sum = 0.0
        self._arrivals = self._started = self._completions = 0
        self._reset_stats(self._clock())

    # the Engine interface the app uses ------------------------------------------------
    @property
    def queue_length(self) -> int:
        return len(self._waiting)

    @property
    def running_count(self) -> int:
        return len(self._in_service)

    def submit(
        self, prompt_tokens: int, output_tokens: int, on_token: Callable[[Sequence], None]
    ) -> Sequence:
        """Queue a request (raises AdmissionRejected); must run on the event loop."""
        if self._closed:
            raise RuntimeError("engine is closed")
        if self._loop is None:
            self._loop = asyncio.get_running_loop()
        self.counters.submitted += 1
        total = prompt_tokens + output_tokens
        if total > self.config.context_window:
            self.counters.rejected += 1
            raise AdmissionRejected(
                f"This model's maximum context length is {self.config.context_window} tokens; "
                f"the request asks for {total} tokens ({prompt_tokens} in the prompt, "
                f"{output_tokens} for the output).",
                code="context_length_exceeded",
                param="messages",
            )
        now = self._clock()
        # Services that should have ended by now end first, so this arrival sees the queue
        # exactly as it is at ``now`` even if their timers have not fired yet.
        self._retire_until(now)
        sequence = Sequence(prompt_tokens, output_tokens, on_token)
        job = _Job(sequence, now)
        self._advance(now)
        self._arrivals += 1
        if len(self._in_service) < self.config.servers:
            self._start(job, now)
        else:
            self._waiting.append(job)
        return sequence

    def cancel(self, sequence: Sequence) -> None:
        """A cancelled request gets no more tokens; its server stays busy to the end of its
        service (a service is never cut short), and a waiting one leaves at its turn."""
        if not sequence.finished:
            sequence.cancelled = True

    def close(self) -> None:
        self._closed = True
        if self._timer is not None:
            self._timer.cancel()
            self._timer = None

    # the queue ---------------------------------------------------------------------------
    def _start(self, job: _Job, at: float) -> None:
        assert self._loop is not None
        self.counters.admitted += 1
        job.started = at
        self._wait_sum += at - job.arrived
        self._started += 1
        service = self._rng.expovariate(1.0 / self._mean_service_s)
        self._service_sum += service
        job.ends = at + service
        heapq.heappush(self._in_service, (job.ends, next(self._order), job))
        self.counters.max_running_seen = max(self.counters.max_running_seen, len(self._in_service))
        # The first token once the app has started the reply (submit returns first).
        self._loop.call_soon(self._first_token, job)
        self._arm()

    def _first_token(self, job: _Job) -> None:
        sequence = job.sequence
        if sequence.cancelled or self._closed:
            return
        if sequence.output_tokens > 1:
            self._emit(sequence)

    def _arm(self) -> None:
        """One timer, for the earliest end; it wakes a little early and then polls the loop,
        because event-loop timers have millisecond granularity (see engine.py)."""
        assert self._loop is not None
        if self._closed or not self._in_service:
            return
        due = self._in_service[0][0]
        if self._timer is not None and self._timer_due <= due:
            return
        if self._timer is not None:
            self._timer.cancel()
        self._timer_due = due
        early = due - self._clock() - _WAKE_EARLY_S
        if early > 0:
            self._timer = self._loop.call_later(early, self._on_timer)
        else:
            self._timer = self._loop.call_soon(self._on_timer)

    def _on_timer(self) -> None:
        self._timer = None
        if self._closed:
            return
        self._retire_until(self._clock())
        self._arm()

    def _retire_until(self, now: float) -> None:
        """End, in time order, every service whose exact end is not later than ``now``."""
        while self._in_service and self._in_service[0][0] <= now:
            end = self._in_service[0][0]
            self._advance(end)  # the area up to the end counts this job as still in the system
            _, _, job = heapq.heappop(self._in_service)
            self._completions += 1
            self.counters.completed += 1
            self.pacing_error_us.add(round((now - end) * 1e6))
            sequence = job.sequence
            if sequence.cancelled:
                self.counters.cancelled += 1
            else:
                before = self._clock()
                while not sequence.finished:
                    self._emit(sequence)
                self.delivery_pass_us.add(round((self._clock() - before) * 1e6))
            # The next in line starts at the exact end of this service, not at the late wake-up.
            while self._waiting and len(self._in_service) < self.config.servers:
                waiting = self._waiting.popleft()
                if waiting.sequence.cancelled:
                    self.counters.cancelled += 1
                    continue
                self._start(waiting, end)

    def _emit(self, sequence: Sequence) -> None:
        sequence.emitted += 1
        self.counters.tokens_emitted += 1
        try:
            sequence.on_token(sequence)
        except Exception as exc:  # a broken connection must not stop the queue
            sequence.cancelled = True
            assert self._loop is not None
            self._loop.call_exception_handler({"message": "token delivery failed", "exception": exc})

    # time averages for Little's law ------------------------------------------------------
    def _advance(self, now: float) -> None:
        """Add the area under the number-in-system and number-in-queue curves up to ``now``."""
        span = now - self._last_change
        if span > 0:
            in_system = len(self._in_service) + len(self._waiting)
            self._area_system += in_system * span
            self._area_queue += len(self._waiting) * span
            self._last_change = now

    def _reset_stats(self, now: float) -> None:
        self._stats_since = now
        self._last_change = now
        self._area_system = 0.0
        self._area_queue = 0.0
        self._arrivals = 0
        self._started = 0
        self._completions = 0
        self._wait_sum = 0.0
        self._service_sum = 0.0

    def queueing_report(self, reset: bool = False) -> dict[str, Any]:
        """The queue's own figures since the last reset; ``reset`` starts a new window after."""
        now = self._clock()
        self._retire_until(now)
        self._advance(now)
        seconds = now - self._stats_since
        report = {
            "servers": self.config.servers,
            "mean_service_ms": self.config.mean_service_ms,
            "seconds": seconds,
            "arrivals": self._arrivals,
            "started": self._started,
            "completions": self._completions,
            "in_service": len(self._in_service),
            "waiting": len(self._waiting),
            "mean_in_system": self._area_system / seconds if seconds > 0 else None,
            "mean_in_queue": self._area_queue / seconds if seconds > 0 else None,
            "arrival_rate_per_s": self._arrivals / seconds if seconds > 0 else None,
            "mean_wait_ms": 1000 * self._wait_sum / self._started if self._started else None,
            "mean_service_drawn_ms": 1000 * self._service_sum / self._started if self._started else None,
        }
        if reset:
            self._reset_stats(now)
        return report


def make_engine(config: EngineConfig) -> Engine | QueueingEngine:
    """The batching engine, or the M/M/c queue when the config asks for it."""
    if isinstance(config, QueueingConfig):
        return QueueingEngine(config)
    return Engine(config)
