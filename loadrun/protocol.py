"""The chat-completions protocol: request bodies, and decoding of streamed chunks.

Wire format per the public OpenAPI description of the protocol: a streamed response is a
sequence of server-sent events ``data: {chunk}`` ending in ``data: [DONE]``; a chunk carries
``choices[].delta`` (role, content, tool_calls) and ``finish_reason``; with
``stream_options.include_usage`` a last chunk has ``choices: []`` and ``usage``. An event
whose JSON has an ``error`` key is an error reported mid-stream.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from loadrun import jsonfast

DONE_MARKER = "[DONE]"
SERVER_STAMP_FIELD = "mock_sent_ns"
"""Extra chunk field carrying the server's monotonic send time (bundled mock only)."""


@dataclass(frozen=True, slots=True)
class ChatRequest:
    """What to send for one request, independent of the wire."""

    messages: tuple[dict[str, Any], ...]
    max_tokens: int
    stream: bool = True
    extra: tuple[tuple[str, Any], ...] = ()
    """Sampling fields passed through as they are (temperature and the like)."""


def chat_body(model: str, request: ChatRequest) -> bytes:
    """The JSON body of a chat-completions request."""
    body: dict[str, Any] = {
        "model": model,
        "messages": list(request.messages),
        "max_tokens": request.max_tokens,
        "stream": request.stream,
    }
    if request.stream:
        body["stream_options"] = {"include_usage": True}
    body.update(request.extra)
    return jsonfast.dumps(body)


@dataclass(slots=True)
class ChunkInfo:
    """What one decoded chunk tells the measurement (tokens, end, usage, errors)."""

    content_pieces: int = 0
    """Content-bearing deltas (non-empty content or a tool-call delta) in this chunk."""
    finish_reason: str | None = None
    completion_tokens: int | None = None
    prompt_tokens: int | None = None
    error: str | None = None
    server_sent_ns: int | None = None


def decode_chunk(data: str) -> ChunkInfo:
    """Decode the JSON of one streamed event. Raises ValueError on malformed input."""
    obj = jsonfast.loads(data)
    if not isinstance(obj, dict):
        raise ValueError("chunk is not a JSON object")
    info = ChunkInfo()
    stamp = obj.get(SERVER_STAMP_FIELD)
    if type(stamp) is int:
        info.server_sent_ns = stamp
    if "error" in obj:
        info.error = error_message(obj)
        return info
    choices = obj.get("choices")
    if choices:
        for choice in choices:
            delta = choice.get("delta")
            if delta:
                if delta.get("content") or delta.get("tool_calls"):
                    info.content_pieces += 1
            elif choice.get("text"):  # the plain completions endpoint streams text, not deltas
                info.content_pieces += 1
            reason = choice.get("finish_reason")
            if reason:
                info.finish_reason = reason
    elif choices is None and "usage" not in obj:
        raise ValueError("chunk has neither choices nor usage")
    usage = obj.get("usage")
    if usage:
        info.completion_tokens = _int_or_none(usage.get("completion_tokens"))
        info.prompt_tokens = _int_or_none(usage.get("prompt_tokens"))
    return info


def decode_full_response(body: bytes) -> tuple[int, int | None, int | None, str | None]:
    """Non-streamed answer -> (content pieces, completion tokens, prompt tokens, finish)."""
    obj = jsonfast.loads(body)
    if not isinstance(obj, dict):
        raise ValueError("response is not a JSON object")
    if "error" in obj:
        raise ValueError(error_message(obj))
    choices = obj.get("choices")
    if not isinstance(choices, list) or not choices:
        raise ValueError("response has no choices")
    first = choices[0]
    message = first.get("message") or {}
    pieces = 1 if (message.get("content") or message.get("tool_calls") or first.get("text")) else 0
    usage = obj.get("usage") or {}
    return (
        pieces,
        _int_or_none(usage.get("completion_tokens")),
        _int_or_none(usage.get("prompt_tokens")),
        first.get("finish_reason"),
    )


def error_message(obj: Any) -> str:
    """The message of an ``{"error": {...}}`` body, or a short rendering of what came."""
    if isinstance(obj, dict):
        err = obj.get("error")
        if isinstance(err, dict):
            message = err.get("message") or err.get("type") or "error"
            code = err.get("code")
            return f"{message} ({code})" if code else str(message)
        if isinstance(err, str):
            return err
    return str(obj)[:200]


def error_body_message(body: bytes) -> str:
    """Best effort: the message of an HTTP error body, trimmed to one line."""
    try:
        text = error_message(jsonfast.loads(body))
    except ValueError:
        text = body[:200].decode("utf-8", "replace")
    return " ".join(text.split())[:300]


def _int_or_none(value: Any) -> int | None:
    return value if type(value) is int else None
