"""Routes and response bodies of the mock server, on top of the engine.

Routes:

- ``POST /v1/chat/completions`` and ``POST /v1/completions``: one engine sequence per
  request. Streaming answers are server-sent events over chunked transfer encoding: for
  chat, a role chunk at once (not a token), then one content chunk per token at the end of
  each engine step, then (in the same write as the last token) a finish chunk, a usage
  chunk if ``stream_options.include_usage``, ``data: [DONE]`` and the last HTTP chunk.
  Text completions have no role chunk. Every chunk carries ``mock_sent_ns``, the server's
  ``time.perf_counter_ns()`` right before the write, so a client on the same host can
  measure its own receive delay. Non-streaming answers come when the sequence finishes.
- ``GET /v1/models``, ``GET /health``, ``GET /mock/stats``; ``POST /mock/stats/reset``
  answers the stats so far and restarts the pacing and delivery-pass windows, so a
  measurement can leave out its warm-up (the counters stay cumulative: take differences).
- ``GET /mock/faults``: the fault plan and the count of every fault injected so far (see
  ``faults.py``); ``POST /mock/faults`` with ``{"faults": {...}, "quirks": {...}}`` puts a
  new plan in force and restarts the counts and the seeded draw.
- Errors: ``{"error": {"message", "type", "param", "code"}}`` with 400, 404 or 405.

Hot path: a content chunk is three byte strings joined (the request's cached head, the
word's cached body, the timestamp), with no dict building per token.
"""

from __future__ import annotations

import itertools
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from time import perf_counter_ns
from typing import Any

from mock_server import jsoncodec
from mock_server.engine import Engine
from mock_server.faults import STATUS_FAULTS, FaultInjector, FaultPlan, FaultsError, plan_from_mapping
from mock_server.http import Request, Responder
from mock_server.queueing import QueueingEngine
from mock_server.quirks import ScriptedStreamReply
from mock_server.scheduler import AdmissionRejected, Sequence
from mock_server.stats import HttpCounters, stats_document
from mock_server.text import VOCABULARY, choose_word_indices, count_tokens

_DONE = b"data: [DONE]\n\n"
_CHAT_CHUNK_OBJECT = "chat.completion.chunk"
_COMPLETION_OBJECT = "text_completion"

# Per-word tails of a content chunk, after the request's head ('..."choices":[').
_CHAT_WORD_BODIES: tuple[bytes, ...] = tuple(
    b'{"index":0,"delta":{"content":"%b "},"finish_reason":null}],"mock_sent_ns":' % word.encode("ascii")
    for word in VOCABULARY
)
_COMPLETION_WORD_BODIES: tuple[bytes, ...] = tuple(
    b'{"index":0,"text":"%b ","finish_reason":null,"logprobs":null}],"mock_sent_ns":' % word.encode("ascii")
    for word in VOCABULARY
)
_CHAT_ROLE_BODY = (
    b'{"index":0,"delta":{"role":"assistant","content":""},"finish_reason":null}],"mock_sent_ns":'
)
_CHAT_FINISH_BODIES = {
    reason: b'{"index":0,"delta":{},"finish_reason":"%b"}],"mock_sent_ns":' % reason.encode()
    for reason in ("stop", "length")
}
_COMPLETION_FINISH_BODIES = {
    reason: b'{"index":0,"text":"","finish_reason":"%b","logprobs":null}],"mock_sent_ns":' % reason.encode()
    for reason in ("stop", "length")
}


class InvalidRequest(Exception):
    """A request body the server refuses with HTTP 400."""

    def __init__(self, message: str, param: str | None = None, code: str | None = None) -> None:
        super().__init__(message)
        self.message = message
        self.param = param
        self.code = code


@dataclass(frozen=True, slots=True)
class GenerationRequest:
    """What the engine needs from a chat or text completion request."""

    prompt: str
    max_tokens: int | None
    stream: bool
    include_usage: bool


def error_body(
    message: str, *, type_: str = "invalid_request_error", param: str | None, code: str | None
) -> bytes:
    return jsoncodec.dumps({"error": {"message": message, "type": type_, "param": param, "code": code}})


def _send_error(
    responder: Responder,
    status: int,
    message: str,
    *,
    param: str | None = None,
    code: str | None = None,
    headers: tuple[tuple[str, str], ...] = (),
) -> None:
    responder.send(status, error_body(message, param=param, code=code), headers=headers)


def parse_chat_request(document: Any) -> GenerationRequest:
    """Validate a chat completions body; the prompt is all message texts, space-joined."""
    if not isinstance(document, dict):
        raise InvalidRequest("request body must be a JSON object")
    messages = document.get("messages")
    if not isinstance(messages, list) or not messages:
        raise InvalidRequest("'messages' must be a non-empty list of messages", "messages")
    texts: list[str] = []
    for position, message in enumerate(messages):
        if not isinstance(message, dict) or not isinstance(message.get("role"), str):
            raise InvalidRequest(f"messages[{position}] must be an object with a string 'role'", "messages")
        texts.extend(_message_texts(message.get("content"), position))
    return _common_fields(document, " ".join(texts))


def parse_completion_request(document: Any) -> GenerationRequest:
    """Validate a text completions body; a list prompt is joined into one prompt."""
    if not isinstance(document, dict):
        raise InvalidRequest("request body must be a JSON object")
    prompt = document.get("prompt")
    if isinstance(prompt, list) and prompt and all(isinstance(p, str) for p in prompt):
        prompt = " ".join(prompt)
    if not isinstance(prompt, str):
        raise InvalidRequest("'prompt' must be a string or a non-empty list of strings", "prompt")
    return _common_fields(document, prompt)


def _message_texts(content: Any, position: int) -> list[str]:
    if content is None:
        return []
    if isinstance(content, str):
        return [content]
    if isinstance(content, list):
        texts = []
        for part in content:
            if not isinstance(part, dict) or not isinstance(part.get("type"), str):
                raise InvalidRequest(
                    f"messages[{position}].content parts must be objects with a 'type'",
                    "messages",
                )
            if part["type"] == "text":
                if not isinstance(part.get("text"), str):
                    raise InvalidRequest(
                        f"messages[{position}] has a text part without a string 'text'",
                        "messages",
                    )
                texts.append(part["text"])
        return texts
    raise InvalidRequest(
        f"messages[{position}].content must be a string, a list of parts or null", "messages"
    )


def _common_fields(document: dict[str, Any], prompt: str) -> GenerationRequest:
    model = document.get("model")
    if model is not None and not isinstance(model, str):
        raise InvalidRequest("'model' must be a string", "model")
    param = "max_completion_tokens"
    max_tokens = document.get(param)
    if max_tokens is None:
        param = "max_tokens"
        max_tokens = document.get(param)
    if max_tokens is not None and (
        isinstance(max_tokens, bool) or not isinstance(max_tokens, int) or max_tokens < 1
    ):
        raise InvalidRequest(f"'{param}' must be an integer >= 1", param, "invalid_value")
    stream = document.get("stream", False)
    if stream is None:
        stream = False
    if not isinstance(stream, bool):
        raise InvalidRequest("'stream' must be a boolean", "stream")
    options = document.get("stream_options")
    include_usage = False
    if options is not None:
        if not isinstance(options, dict):
            raise InvalidRequest("'stream_options' must be an object", "stream_options")
        include_usage = options.get("include_usage", False) is True
    return GenerationRequest(prompt, max_tokens, stream, include_usage)


@dataclass(slots=True)
class _Answer:
    """What one accepted request will answer: identity, sizes, and (once known) its words."""

    chat: bool
    request_id: str
    created: int
    model: str
    prompt_tokens: int
    output_tokens: int
    finish_reason: str
    words: list[int] = field(default_factory=list)

    @property
    def usage(self) -> dict[str, int]:
        return {
            "prompt_tokens": self.prompt_tokens,
            "completion_tokens": self.output_tokens,
            "total_tokens": self.prompt_tokens + self.output_tokens,
        }


class _StreamReply:
    """Feeds one streamed answer: one chunk per token, the tail in one final write."""

    __slots__ = ("_answer", "_finish_body", "_head", "_responder", "_usage_body", "_word_bodies")

    def __init__(self, responder: Responder, answer: _Answer, model_json: bytes, include_usage: bool) -> None:
        self._responder = responder
        self._answer = answer
        # Everything up to the choices list is the same on every chunk of this answer.
        self._head = b'data: {"id":"%b","object":"%b","created":%d,"model":%b,"choices":[' % (
            answer.request_id.encode(),
            (_CHAT_CHUNK_OBJECT if answer.chat else _COMPLETION_OBJECT).encode(),
            answer.created,
            model_json,
        )
        self._word_bodies = _CHAT_WORD_BODIES if answer.chat else _COMPLETION_WORD_BODIES
        finish_bodies = _CHAT_FINISH_BODIES if answer.chat else _COMPLETION_FINISH_BODIES
        self._finish_body = finish_bodies[answer.finish_reason]
        self._usage_body = (
            b'],"usage":%b,"mock_sent_ns":' % jsoncodec.dumps(answer.usage) if include_usage else None
        )

    def start(self) -> None:
        """Send the head now; a chat answer also gets its role chunk (which is not a token)."""
        first_chunk = (
            self._head + _CHAT_ROLE_BODY + b"%d}\n\n" % perf_counter_ns() if self._answer.chat else b""
        )
        self._responder.start_stream(first_chunk=first_chunk)

    def on_token(self, sequence: Sequence) -> None:
        emitted = sequence.emitted
        ns_tail = b"%d}\n\n" % perf_counter_ns()
        head = self._head
        content = head + self._word_bodies[self._answer.words[emitted - 1]] + ns_tail
        if emitted < sequence.output_tokens:
            self._responder.write_chunk(content)
            return
        parts = [content, head, self._finish_body, ns_tail]
        if self._usage_body is not None:
            parts += (head, self._usage_body, ns_tail)
        parts.append(_DONE)
        self._responder.end_stream(b"".join(parts))


class _BufferedReply:
    """Answers a non-streaming request once its sequence has its last token."""

    __slots__ = ("_answer", "_responder")

    def __init__(self, responder: Responder, answer: _Answer) -> None:
        self._responder = responder
        self._answer = answer

    def start(self) -> None:
        """Nothing to send before the whole answer is ready."""

    def on_token(self, sequence: Sequence) -> None:
        if sequence.finished:
            self._responder.send(200, jsoncodec.dumps(self._body()))

    def _body(self) -> dict[str, Any]:
        answer = self._answer
        text = "".join(VOCABULARY[index] + " " for index in answer.words)
        choice: dict[str, Any] = {"index": 0}
        if answer.chat:
            choice["message"] = {"role": "assistant", "content": text}
            choice["finish_reason"] = answer.finish_reason
        else:
            choice.update(text=text, finish_reason=answer.finish_reason, logprobs=None)
        return {
            "id": answer.request_id,
            "object": "chat.completion" if answer.chat else _COMPLETION_OBJECT,
            "created": answer.created,
            "model": answer.model,
            "choices": [choice],
            "usage": answer.usage,
        }


class MockApp:
    """The request handler: routes each request and answers it (see module docstring)."""

    def __init__(self, engine: Engine | QueueingEngine, plan: FaultPlan | None = None) -> None:
        self.engine = engine
        self.config = engine.config
        self.plan = plan or FaultPlan()
        self.faults = FaultInjector(self.plan.faults)
        self.counters = HttpCounters()
        self._created = int(time.time())
        self._ids = itertools.count(1)
        self._model_json = jsoncodec.dumps(self.config.model)
        self._routes: dict[str, dict[str, Callable[[Request, Responder], None]]] = {
            "/v1/chat/completions": {"POST": self._chat_completions},
            "/v1/completions": {"POST": self._completions},
            "/v1/models": {"GET": self._models},
            "/health": {"GET": self._health},
            "/mock/stats": {"GET": self._stats},
            "/mock/stats/reset": {"POST": self._reset_timing_stats},
            "/mock/faults": {"GET": self._faults_document, "POST": self._set_faults},
            "/mock/queueing": {"GET": self._queueing, "POST": self._queueing},
        }

    def __call__(self, request: Request, responder: Responder) -> None:
        methods = self._routes.get(request.path)
        if methods is None:
            _send_error(responder, 404, f"no route for {request.path}")
            return
        handler = methods.get(request.method)
        if handler is None:
            allowed = ", ".join(sorted(methods))
            message = f"method {request.method} is not allowed on {request.path}; use {allowed}"
            _send_error(responder, 405, message, headers=(("allow", allowed),))
            return
        handler(request, responder)

    # generation routes

    def _chat_completions(self, request: Request, responder: Responder) -> None:
        self._generate(request, responder, chat=True)

    def _completions(self, request: Request, responder: Responder) -> None:
        self._generate(request, responder, chat=False)

    def _generate(self, request: Request, responder: Responder, *, chat: bool) -> None:
        self.counters.requests_received += 1
        try:
            try:
                document = jsoncodec.loads(request.body)
            except ValueError as exc:
                raise InvalidRequest("request body is not valid JSON") from exc
            parsed = parse_chat_request(document) if chat else parse_completion_request(document)
        except InvalidRequest as exc:
            self.counters.requests_invalid += 1
            _send_error(responder, 400, exc.message, param=exc.param, code=exc.code)
            return
        answer = self._plan_answer(parsed, chat=chat)
        fault = self.faults.decide(parsed.stream) if chat else None
        if fault in STATUS_FAULTS:
            self._send_fault_status(fault, request, responder)
            return
        if fault == "reset_before_headers":
            responder.reset()
            return
        reply: _StreamReply | _BufferedReply | ScriptedStreamReply
        if parsed.stream and chat and (fault is not None or self.plan.quirks.shapes_stream):
            settings = self.plan.faults
            reply = ScriptedStreamReply(
                responder,
                answer,
                include_usage=parsed.include_usage,
                quirks=self.plan.quirks,
                fault=fault,
                stall_s=settings.stall_s,
                slow_headers_s=settings.slow_headers_s,
                after_tokens=settings.after_tokens,
            )
        elif parsed.stream:
            reply = _StreamReply(responder, answer, self._model_json, parsed.include_usage)
        else:
            reply = _BufferedReply(responder, answer)
        try:
            sequence = self.engine.submit(answer.prompt_tokens, answer.output_tokens, reply.on_token)
        except AdmissionRejected as exc:
            if fault is not None:
                self.faults.withdraw(fault)  # refused before the fault could happen
            _send_error(responder, 400, exc.message, param=exc.param, code=exc.code)
            return
        # Words only for accepted requests (a huge max_tokens is rejected before this), and
        # before the first step ends, which is the earliest a token can be delivered.
        answer.words = choose_word_indices(
            self.config.seed, parsed.prompt, parsed.max_tokens, answer.output_tokens
        )
        if isinstance(reply, ScriptedStreamReply):
            reply.cancel_generation = lambda: self.engine.cancel(sequence)
            responder.on_abort = reply.on_abort
        else:
            responder.on_abort = lambda: self.engine.cancel(sequence)
        reply.start()

    def _send_fault_status(self, fault: str, request: Request, responder: Responder) -> None:
        status = STATUS_FAULTS[fault]
        message = {
            429: "rate limit reached for requests; retry after the given delay",
            500: "the model server failed to handle the request",
            503: "the model server is overloaded; try again later",
        }[status]
        if self.plan.quirks.echo_key_in_errors:
            message += f" (request authorization: {request.headers.get('authorization', 'none')})"
        kind = {429: "rate_limit_exceeded", 500: "server_error", 503: "service_unavailable"}[status]
        headers = (("retry-after", str(self.plan.faults.retry_after_s)),) if status == 429 else ()
        responder.send(status, error_body(message, type_=kind, param=None, code=kind), headers=headers)

    def _plan_answer(self, parsed: GenerationRequest, *, chat: bool) -> _Answer:
        config = self.config
        prompt_tokens = count_tokens(parsed.prompt, config.tokens_per_word)
        if parsed.max_tokens is not None:
            output_tokens, finish_reason = parsed.max_tokens, "length"
        else:
            # Like a real server: the default answer stops at the end of the context window.
            # (No room at all: ask for one token and let the engine reject the request.)
            room = config.context_window - prompt_tokens
            output_tokens = max(1, min(config.default_max_tokens, room))
            finish_reason = "stop" if output_tokens == config.default_max_tokens else "length"
        return _Answer(
            chat=chat,
            request_id=f"{'chatcmpl' if chat else 'cmpl'}-mock{next(self._ids):010d}",
            created=int(time.time()),
            model=config.model,
            prompt_tokens=prompt_tokens,
            output_tokens=output_tokens,
            finish_reason=finish_reason,
        )

    # other routes

    def _models(self, request: Request, responder: Responder) -> None:
        body = {
            "object": "list",
            "data": [
                {
                    "id": self.config.model,
                    "object": "model",
                    "created": self._created,
                    "owned_by": "mock_server",
                }
            ],
        }
        responder.send(200, jsoncodec.dumps(body))

    def _health(self, request: Request, responder: Responder) -> None:
        responder.send(200, b'{"status":"ok"}')

    def _faults_document(self, request: Request, responder: Responder) -> None:
        responder.send(200, jsoncodec.dumps({"plan": self.plan.as_dict(), **self.faults.document()}))

    def _set_faults(self, request: Request, responder: Responder) -> None:
        """Put a new fault plan in force; counts and the seeded draw start again."""
        try:
            document = jsoncodec.loads(request.body)
            if not isinstance(document, dict):
                raise FaultsError("the body must be a JSON object with 'faults' and 'quirks'")
            plan = plan_from_mapping(document, "POST /mock/faults")
            if plan.quirks.one_at_a_time != self.plan.quirks.one_at_a_time:
                raise FaultsError("quirk one_at_a_time is set at start-up only")
        except ValueError as exc:
            _send_error(responder, 400, str(exc), param="faults")
            return
        self.plan = plan
        self.faults = FaultInjector(plan.faults)
        self._faults_document(request, responder)

    def _stats(self, request: Request, responder: Responder) -> None:
        responder.send(200, jsoncodec.dumps(self._stats_document()))

    def _queueing(self, request: Request, responder: Responder) -> None:
        """M/M/c mode: the queue's own figures (POST: and start a new window)."""
        if not isinstance(self.engine, QueueingEngine):
            _send_error(responder, 404, "this mock does not run in M/M/c mode (no [queueing] in its engine)")
            return
        responder.send(200, jsoncodec.dumps(self.engine.queueing_report(reset=request.method == "POST")))

    def _reset_timing_stats(self, request: Request, responder: Responder) -> None:
        """Answer the stats so far, then restart the timing windows (counters stay cumulative)."""
        body = jsoncodec.dumps(self._stats_document())
        self.engine.pacing_error_us.clear()
        self.engine.delivery_pass_us.clear()
        responder.send(200, body)

    def _stats_document(self) -> dict[str, Any]:
        engine = self.engine
        return stats_document(
            http=self.counters,
            engine_counters=engine.counters,
            queue_length=engine.queue_length,
            running=engine.running_count,
            pacing_error_us=engine.pacing_error_us,
            delivery_pass_us=engine.delivery_pass_us,
            engine_config=self.config.as_dict(),
        )
