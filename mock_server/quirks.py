"""Protocol quirks seen on real inference servers, and the stream writer that plays them.

Each quirk is a switch (``[quirks]`` in a fault plan, ``--quirk NAME[=VALUE]``):

    null_first_content   the role chunk carries ``"content": null`` (not ``""``)
    no_done_marker       no ``data: [DONE]``: the stream ends after the finish chunk
    usage_in_last_chunk  usage (and the finish reason) ride in the last content chunk
    no_usage             no usage at all, even when the request asks for it
    tokens_per_chunk     N tokens in one content chunk (chunk count is not token count)
    model_echo           a model name in the chunks other than the one configured
    events_per_write     N events in one network write
    one_at_a_time        one request served at a time (max_running = 1): TTFT grows
                         with the queue position (start-up only)
    echo_key_in_errors   error bodies of injected faults quote the request's
                         Authorization header (a careless server; for secret-leak tests)

``ScriptedStreamReply`` writes a streamed chat answer with these quirks and with the
stream faults of ``faults.py``; requests with neither keep the plain fast writer in
``app.py``.
"""

from __future__ import annotations

import asyncio
from collections.abc import Callable, Mapping
from dataclasses import asdict, dataclass, fields
from time import perf_counter_ns
from typing import Any, Protocol

from mock_server import jsoncodec
from mock_server.http import Responder
from mock_server.scheduler import Sequence
from mock_server.text import VOCABULARY

_DONE = b"data: [DONE]\n\n"
_MALFORMED = b'data: {"choices": [{"index": 0, "delta": {"content": "unterminated\n\n'
"""An event whose data is cut off in the middle of a JSON string."""
MID_STREAM_FAULTS = frozenset({"reset_mid_stream", "stall_between_tokens", "malformed_event", "error_event"})


class QuirksError(ValueError):
    """A quirk that does not exist or has a value of the wrong kind."""


@dataclass(frozen=True, slots=True)
class Quirks:
    null_first_content: bool = False
    no_done_marker: bool = False
    usage_in_last_chunk: bool = False
    no_usage: bool = False
    tokens_per_chunk: int = 1
    model_echo: str = ""
    """Model name written into chunks; empty: the configured one."""
    events_per_write: int = 1
    one_at_a_time: bool = False
    echo_key_in_errors: bool = False

    def __post_init__(self) -> None:
        if self.tokens_per_chunk < 1 or self.events_per_write < 1:
            raise QuirksError("tokens_per_chunk and events_per_write must be >= 1")

    @property
    def shapes_stream(self) -> bool:
        """True when a streamed answer differs from the plain writer's."""
        return (
            self.null_first_content
            or self.no_done_marker
            or self.usage_in_last_chunk
            or self.no_usage
            or self.tokens_per_chunk > 1
            or bool(self.model_echo)
            or self.events_per_write > 1
        )

    def as_dict(self) -> dict[str, Any]:
        return asdict(self)


def quirks_from_mapping(table: Mapping[str, Any], source: str = "<quirks>") -> Quirks:
    kinds = {item.name: type(item.default) for item in fields(Quirks)}
    values: dict[str, Any] = {}
    for key, value in table.items():
        expected = kinds.get(key)
        if expected is None:
            raise QuirksError(f"{source}: unknown quirk {key!r}; quirks: {', '.join(kinds)}")
        if type(value) is not expected:
            raise QuirksError(f"{source}: quirk {key} must be {expected.__name__}, got {value!r}")
        values[key] = value
    try:
        return Quirks(**values)
    except QuirksError as exc:
        raise QuirksError(f"{source}: {exc}") from None


class StreamAnswer(Protocol):
    """What the writer needs to know about the answer (app._Answer has it)."""

    request_id: str
    created: int
    model: str
    output_tokens: int
    finish_reason: str
    words: list[int]

    @property
    def usage(self) -> dict[str, int]: ...


Event = dict[str, Any] | bytes
"""A chunk body (rendered with the send stamp at write time) or raw event bytes."""


class ScriptedStreamReply:
    """A streamed chat answer with quirks and at most one stream fault.

    Writes go through a small outbox, so a stall holds every write (headers included, for
    ``slow_headers``) and lets them out in order when it ends. Not the hot path: chunks are
    dicts rendered with the JSON codec.
    """

    def __init__(
        self,
        responder: Responder,
        answer: StreamAnswer,
        *,
        include_usage: bool,
        quirks: Quirks,
        fault: str | None = None,
        stall_s: float = 0.0,
        slow_headers_s: float = 0.0,
        after_tokens: int = 1,
    ) -> None:
        self._responder = responder
        self._answer = answer
        self._include_usage = include_usage
        self._quirks = quirks
        self._fault = fault
        self._stall_s = stall_s
        self._slow_headers_s = slow_headers_s
        self._trigger = min(after_tokens, answer.output_tokens) if fault in MID_STREAM_FAULTS else 0
        self._model = quirks.model_echo or answer.model
        self._loop = asyncio.get_running_loop()
        self._outbox: list[tuple[str, list[Event]]] = []
        self._held = False
        self._timer: asyncio.TimerHandle | None = None
        self._words: list[str] = []
        self._events: list[Event] = []
        self._stopped = False
        self.cancel_generation: Callable[[], None] | None = None
        """Set by the app once the engine took the request; stops its tokens."""

    # called by the app and the engine ---------------------------------------------------
    def start(self) -> None:
        if self._fault == "slow_headers":
            self._hold(self._slow_headers_s)
        role: dict[str, Any] = {
            "role": "assistant",
            "content": None if self._quirks.null_first_content else "",
        }
        self._do("start", [self._chunk([_choice(role)])])
        if self._fault == "stall_first_token":
            self._hold(self._stall_s)

    def on_token(self, sequence: Sequence) -> None:
        if self._stopped:
            return
        emitted = sequence.emitted
        last = emitted >= sequence.output_tokens
        strike = emitted == self._trigger
        self._words.append(VOCABULARY[self._answer.words[emitted - 1]] + " ")
        if len(self._words) >= self._quirks.tokens_per_chunk or last or strike:
            self._events.append(self._content_event("".join(self._words), last))
            self._words.clear()
        if strike:
            self._strike()
            if self._stopped:
                return
        if last:
            self._do("end", [*self._take_events(), *self._tail()])
        elif len(self._events) >= self._quirks.events_per_write:
            self._do("write", self._take_events())

    def on_abort(self) -> None:
        """The client went away: drop what is held and stop the generation."""
        self._stopped = True
        self._outbox.clear()
        if self._timer is not None:
            self._timer.cancel()
            self._timer = None
        if self.cancel_generation is not None:
            self.cancel_generation()

    # faults ---------------------------------------------------------------------------
    def _strike(self) -> None:
        fault = self._fault
        if fault == "malformed_event":
            self._events.append(_MALFORMED)
        elif fault == "stall_between_tokens":
            self._do("write", self._take_events())
            self._hold(self._stall_s)
        elif fault == "reset_mid_stream":
            self._do("write", self._take_events())
            self._do("reset", [])
            self._stop_generation()
        elif fault == "error_event":
            error = {
                "error": {
                    "message": "the model worker failed while generating",
                    "type": "server_error",
                    "param": None,
                    "code": "worker_failed",
                }
            }
            tail: list[Event] = [] if self._quirks.no_done_marker else [_DONE]
            self._do("end", [*self._take_events(), error, *tail])
            self._stop_generation()

    def _stop_generation(self) -> None:
        self._stopped = True
        if self.cancel_generation is not None:
            self.cancel_generation()

    # events ---------------------------------------------------------------------------
    def _chunk(self, choices: list[dict[str, Any]], usage: dict[str, int] | None = None) -> dict[str, Any]:
        answer = self._answer
        body: dict[str, Any] = {
            "id": answer.request_id,
            "object": "chat.completion.chunk",
            "created": answer.created,
            "model": self._model,
            "choices": choices,
        }
        if usage is not None:
            body["usage"] = usage
        return body

    def _content_event(self, text: str, last: bool) -> dict[str, Any]:
        if last and self._quirks.usage_in_last_chunk:
            usage = self._answer.usage if self._include_usage and not self._quirks.no_usage else None
            return self._chunk([_choice({"content": text}, self._answer.finish_reason)], usage)
        return self._chunk([_choice({"content": text})])

    def _tail(self) -> list[Event]:
        events: list[Event] = []
        if not self._quirks.usage_in_last_chunk:
            events.append(self._chunk([_choice({}, self._answer.finish_reason)]))
            if self._include_usage and not self._quirks.no_usage:
                events.append(self._chunk([], self._answer.usage))
        if not self._quirks.no_done_marker:
            events.append(_DONE)
        return events

    def _take_events(self) -> list[Event]:
        events, self._events = self._events, []
        return events

    # writes ---------------------------------------------------------------------------
    def _hold(self, seconds: float) -> None:
        self._held = True
        self._timer = self._loop.call_later(seconds, self._release)

    def _release(self) -> None:
        self._held = False
        self._timer = None
        outbox, self._outbox = self._outbox, []
        for operation, events in outbox:
            self._perform(operation, events)

    def _do(self, operation: str, events: list[Event]) -> None:
        if self._held:
            self._outbox.append((operation, events))
        else:
            self._perform(operation, events)

    def _perform(self, operation: str, events: list[Event]) -> None:
        responder = self._responder
        if responder.done:
            return
        payload = b"".join(_render(event) for event in events)
        if operation == "start":
            content_type = "text/plain; charset=utf-8" if self._fault == "wrong_content_type" else None
            if content_type:
                responder.start_stream(content_type=content_type, first_chunk=payload)
            else:
                responder.start_stream(first_chunk=payload)
        elif operation == "write":
            if payload:
                responder.write_chunk(payload)
        elif operation == "end":
            responder.end_stream(payload)
        else:
            responder.reset()


def _choice(delta: dict[str, Any], finish_reason: str | None = None) -> dict[str, Any]:
    return {"index": 0, "delta": delta, "finish_reason": finish_reason}


def _render(event: Event) -> bytes:
    if isinstance(event, bytes):
        return event
    event["mock_sent_ns"] = perf_counter_ns()
    return b"data: " + jsoncodec.dumps(event) + b"\n\n"
