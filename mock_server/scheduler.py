"""The batching rules of the simulated engine, with no clock and no I/O.

``StepScheduler`` holds the FIFO wait queue and the running batch, and knows what one engine
step does: which requests it admits, how long it lasts, and who gets a token at its end. The
real engine (``engine.Engine``) drives it on the event loop's clock; the simulator
(``simulate``) drives the very same code in virtual time, so the two cannot drift apart.

A step, in order:

1. ``start_step``: drop cancelled sequences; admit waiting requests in FIFO order while the
   batch has fewer than ``max_running`` sequences and the reserved tokens (prompt +
   output of every running sequence) stay within ``max_batch_tokens``. Admission stops at
   the first request that does not fit (no overtaking). The step lasts
   ``prefill_per_token_ms * admitted prompt tokens + step_base_ms
   + decode_per_seq_ms * running sequences`` (the just-admitted ones included).
2. ``finish_step``: every running sequence emits exactly one token; a sequence that emitted
   its last token leaves the batch.
"""

from __future__ import annotations

from collections import deque
from collections.abc import Callable
from dataclasses import dataclass
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from mock_server.engine import EngineConfig


class AdmissionRejected(Exception):
    """A request the engine refuses at submission; the server answers HTTP 400."""

    def __init__(self, message: str, *, code: str, param: str | None) -> None:
        super().__init__(message)
        self.message = message
        self.code = code
        self.param = param


class Sequence:
    """One request inside the engine: its sizes, progress and the callback that gets tokens.

    ``on_token`` is called at the end of every step the sequence runs in, after ``emitted``
    was incremented; the sequence is finished when ``emitted == output_tokens``.
    """

    __slots__ = ("cancelled", "emitted", "on_token", "output_tokens", "prompt_tokens")

    def __init__(self, prompt_tokens: int, output_tokens: int, on_token: Callable[[Sequence], None]) -> None:
        self.prompt_tokens = prompt_tokens
        self.output_tokens = output_tokens
        self.on_token = on_token
        self.emitted = 0
        self.cancelled = False

    @property
    def reserved_tokens(self) -> int:
        """Tokens this sequence holds in the batch budget while it runs."""
        return self.prompt_tokens + self.output_tokens

    @property
    def finished(self) -> bool:
        return self.emitted >= self.output_tokens


@dataclass(slots=True)
class SchedulerCounters:
    """Running totals since the scheduler was made."""

    submitted: int = 0
    rejected: int = 0
    admitted: int = 0
    completed: int = 0
    cancelled: int = 0
    tokens_emitted: int = 0
    steps: int = 0
    max_running_seen: int = 0


class StepScheduler:
    """FIFO queue + running batch + the step rules above. Not thread-safe; one loop owns it."""

    def __init__(self, config: EngineConfig) -> None:
        self._max_running = config.max_running
        self._max_batch_tokens = config.max_batch_tokens
        self._context_window = config.context_window
        # Per-millisecond costs turned into seconds once, not per step.
        self._base_s = config.step_base_ms / 1000.0
        self._per_seq_s = config.decode_per_seq_ms / 1000.0
        self._per_prompt_token_s = config.prefill_per_token_ms / 1000.0
        self._waiting: deque[Sequence] = deque()
        self._running: list[Sequence] = []
        self._reserved_tokens = 0
        self._cancel_pending = 0
        self.counters = SchedulerCounters()

    @property
    def queue_length(self) -> int:
        return len(self._waiting)

    @property
    def running_count(self) -> int:
        return len(self._running)

    @property
    def reserved_tokens(self) -> int:
        return self._reserved_tokens

    def has_work(self) -> bool:
        """True while a step is needed: something runs or waits."""
        return bool(self._running or self._waiting)

    def submit(
        self, prompt_tokens: int, output_tokens: int, on_token: Callable[[Sequence], None]
    ) -> Sequence:
        """Queue a request, or raise AdmissionRejected if it could never run."""
        self.counters.submitted += 1
        if output_tokens < 1:
            self.counters.rejected += 1
            raise AdmissionRejected("max_tokens must be at least 1", code="invalid_value", param="max_tokens")
        total = prompt_tokens + output_tokens
        if total > self._context_window:
            self.counters.rejected += 1
            raise AdmissionRejected(
                f"This model's maximum context length is {self._context_window} tokens; "
                f"the request asks for {total} tokens ({prompt_tokens} in the prompt, "
                f"{output_tokens} for the output).",
                code="context_length_exceeded",
                param="messages",
            )
        if total > self._max_batch_tokens:
            self.counters.rejected += 1
            raise AdmissionRejected(
                f"The request needs {total} tokens, more than the engine's batch budget of "
                f"{self._max_batch_tokens} tokens, so it could never be scheduled.",
                code="exceeds_batch_budget",
                param="max_tokens",
            )
        sequence = Sequence(prompt_tokens, output_tokens, on_token)
        self._waiting.append(sequence)
        return sequence

    def cancel(self, sequence: Sequence) -> None:
        """Mark a sequence cancelled; it leaves the queue or the batch at the next step start."""
        if sequence.cancelled or sequence.finished:
            return
        sequence.cancelled = True
        self._cancel_pending += 1

    def start_step(self) -> float:
        """Admit what fits and return this step's duration in seconds."""
        if self._cancel_pending:
            self._drop_cancelled()
        running = self._running
        waiting = self._waiting
        admitted_prompt_tokens = 0
        while waiting and len(running) < self._max_running:
            head = waiting[0]
            if self._reserved_tokens + head.reserved_tokens > self._max_batch_tokens:
                break
            waiting.popleft()
            running.append(head)
            self._reserved_tokens += head.reserved_tokens
            admitted_prompt_tokens += head.prompt_tokens
            self.counters.admitted += 1
        counters = self.counters
        counters.steps += 1
        if len(running) > counters.max_running_seen:
            counters.max_running_seen = len(running)
        return (
            self._per_prompt_token_s * admitted_prompt_tokens + self._base_s + self._per_seq_s * len(running)
        )

    def finish_step(self) -> list[Exception]:
        """Give every running sequence its next token; finished ones leave the batch.

        Returns the exceptions raised by ``on_token`` callbacks (normally none): a failing
        callback cancels its own sequence and never stops the rest of the batch.
        """
        still_running: list[Sequence] = []
        failures: list[Exception] = []
        emitted = 0
        for sequence in self._running:
            if sequence.cancelled:
                # Cancelled during this step: no token, it leaves at the next step start.
                still_running.append(sequence)
                continue
            sequence.emitted += 1
            emitted += 1
            try:
                sequence.on_token(sequence)
            except Exception as exc:
                failures.append(exc)
                sequence.cancelled = True
                self._cancel_pending += 1
                still_running.append(sequence)
                continue
            if sequence.emitted < sequence.output_tokens:
                still_running.append(sequence)
            else:
                self._reserved_tokens -= sequence.reserved_tokens
                self.counters.completed += 1
        self._running = still_running
        self.counters.tokens_emitted += emitted
        return failures

    def _drop_cancelled(self) -> None:
        kept_running: list[Sequence] = []
        for sequence in self._running:
            if sequence.cancelled:
                self._reserved_tokens -= sequence.reserved_tokens
                self.counters.cancelled += 1
            else:
                kept_running.append(sequence)
        self._running = kept_running
        kept_waiting: deque[Sequence] = deque()
        for sequence in self._waiting:
            if sequence.cancelled:
                self.counters.cancelled += 1
            else:
                kept_waiting.append(sequence)
        self._waiting = kept_waiting
        self._cancel_pending = 0
