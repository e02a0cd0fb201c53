"""A small HTTP/1.1 server on asyncio protocols and the llhttp parser (``httptools``).

Enough HTTP for the mock: keep-alive, Content-Length request bodies (chunked ones are
decoded by the parser too), responses with Content-Length, streamed responses with
``Transfer-Encoding: chunked``, and ``Connection: close`` honoured both ways. Requests
that arrive while a response is still being sent wait their turn (no pipelining of
responses). The handler is any callable taking (Request, Responder); it may answer at
once or later, from engine callbacks.
"""

from __future__ import annotations

import asyncio
import contextlib
import socket
import struct
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass
from http import HTTPStatus
from typing import cast

import httptools

MAX_BODY_BYTES = 16 * 1024 * 1024
"""Larger request bodies are refused with 413: no real prompt needs more."""

_LAST_CHUNK = b"0\r\n\r\n"
_ERROR_400 = (
    b'{"error":{"message":"malformed HTTP request","type":"invalid_request_error","param":null,"code":null}}'
)
_ERROR_413 = (
    b'{"error":{"message":"request body too large","type":"invalid_request_error","param":null,"code":null}}'
)


def _status_line(status: int) -> bytes:
    try:
        phrase = HTTPStatus(status).phrase
    except ValueError:
        phrase = "Unknown"
    return f"HTTP/1.1 {status} {phrase}\r\n".encode("latin-1")


_STATUS_LINES: dict[int, bytes] = {status.value: _status_line(status.value) for status in HTTPStatus}


@dataclass(slots=True)
class Request:
    """One parsed request. Header names are lower-case; the body is complete."""

    method: str
    path: str
    query: str
    headers: dict[str, str]
    body: bytes
    keep_alive: bool


Handler = Callable[[Request, "Responder"], None]


class Responder:
    """Writes the response to one request: either ``send`` once, or ``start_stream``,
    any number of ``write_chunk`` and one ``end_stream``.

    ``on_abort`` (set by the handler) is called if the connection is lost before the
    response is complete.
    """

    __slots__ = ("_connection", "_keep_alive", "_started", "done", "on_abort")

    def __init__(self, connection: HttpConnection, keep_alive: bool) -> None:
        self._connection = connection
        self._keep_alive = keep_alive
        self._started = False
        self.done = False
        self.on_abort: Callable[[], None] | None = None

    def send(
        self,
        status: int,
        body: bytes,
        *,
        content_type: str = "application/json",
        headers: tuple[tuple[str, str], ...] = (),
    ) -> None:
        """Send a whole response with a Content-Length."""
        if self._started:
            raise RuntimeError("response already started")
        self._started = True
        head = self._head(status, content_type, headers, f"content-length: {len(body)}\r\n")
        self._connection.write(head + body)
        self._finish()

    def start_stream(
        self,
        status: int = 200,
        *,
        content_type: str = "text/event-stream",
        headers: tuple[tuple[str, str], ...] = (),
        first_chunk: bytes = b"",
    ) -> None:
        """Send the head of a chunked response, with an optional first chunk in the same write."""
        if self._started:
            raise RuntimeError("response already started")
        self._started = True
        head = self._head(
            status,
            content_type,
            (*headers, ("cache-control", "no-cache")),
            "transfer-encoding: chunked\r\n",
        )
        if first_chunk:
            head += b"%x\r\n%b\r\n" % (len(first_chunk), first_chunk)
        self._connection.write(head)

    def write_chunk(self, payload: bytes) -> None:
        """Send one non-empty chunk of a streamed response."""
        # The hot path (one call per token): straight to the transport, no further calls.
        transport = self._connection.transport
        if not self.done and transport is not None and not transport.is_closing():
            transport.write(b"%x\r\n%b\r\n" % (len(payload), payload))

    def end_stream(self, payload: bytes = b"") -> None:
        """Send a last data chunk (optional) and the terminating chunk in one write."""
        if self.done:
            return
        if payload:
            self._connection.write(b"%x\r\n%b\r\n%b" % (len(payload), payload, _LAST_CHUNK))
        else:
            self._connection.write(_LAST_CHUNK)
        self._finish()

    def reset(self) -> None:
        """Drop the connection with a TCP reset, mid-response or before it (fault injection)."""
        self.done = True
        self._connection.reset()

    def _head(
        self,
        status: int,
        content_type: str,
        headers: tuple[tuple[str, str], ...],
        framing: str,
    ) -> bytes:
        status_line = _STATUS_LINES.get(status) or _status_line(status)
        lines = [f"content-type: {content_type}\r\n", framing]
        lines.extend(f"{name}: {value}\r\n" for name, value in headers)
        lines.append("connection: keep-alive\r\n\r\n" if self._keep_alive else "connection: close\r\n\r\n")
        return status_line + "".join(lines).encode("latin-1")

    def _finish(self) -> None:
        self.done = True
        self._connection.response_done(self._keep_alive)

    def _abort(self) -> None:
        if not self.done:
            self.done = True
            if self.on_abort is not None:
                self.on_abort()


class HttpConnection(asyncio.Protocol):
    """One client connection: parses requests and hands them to the handler one at a time."""

    def __init__(self, handler: Handler, connections: set[HttpConnection]) -> None:
        self._handler = handler
        self._connections = connections
        self.transport: asyncio.Transport | None = None
        self._parser = httptools.HttpRequestParser(self)
        self._url = bytearray()
        self._headers: dict[str, str] = {}
        self._body = bytearray()
        self._body_too_large = False
        self._pending: deque[Request] = deque()
        self._current: Responder | None = None
        self.lost = False

    # asyncio.Protocol

    def connection_made(self, transport: asyncio.BaseTransport) -> None:
        # uvloop's transports implement the interface without subclassing asyncio.Transport.
        self.transport = cast(asyncio.Transport, transport)
        self._connections.add(self)

    def data_received(self, data: bytes) -> None:
        if self.transport is None or self.transport.is_closing():
            return
        try:
            self._parser.feed_data(data)
        except httptools.HttpParserUpgrade:
            self._reject(400, _ERROR_400)
        except httptools.HttpParserError:
            self._reject(400, _ERROR_400)

    def eof_received(self) -> bool | None:
        return None  # close our side too

    def connection_lost(self, exc: Exception | None) -> None:
        self.lost = True
        self._connections.discard(self)
        self._pending.clear()
        current, self._current = self._current, None
        if current is not None:
            current._abort()

    # httptools callbacks

    def on_message_begin(self) -> None:
        self._url.clear()
        self._headers = {}
        self._body.clear()
        self._body_too_large = False

    def on_url(self, url: bytes) -> None:
        self._url += url

    def on_header(self, name: bytes, value: bytes) -> None:
        key = name.decode("latin-1").lower()
        text = value.decode("latin-1")
        previous = self._headers.get(key)
        self._headers[key] = text if previous is None else f"{previous}, {text}"

    def on_body(self, body: bytes) -> None:
        if len(self._body) + len(body) > MAX_BODY_BYTES:
            self._body_too_large = True
        elif not self._body_too_large:
            self._body += body

    def on_message_complete(self) -> None:
        if self._body_too_large:
            self._reject(413, _ERROR_413)
            return
        target = self._url.decode("latin-1")
        path, _, query = target.partition("?")
        request = Request(
            method=self._parser.get_method().decode("latin-1"),
            path=path,
            query=query,
            headers=self._headers,
            body=bytes(self._body),
            keep_alive=bool(self._parser.should_keep_alive()),
        )
        if self._current is None:
            self._dispatch(request)
        else:
            self._pending.append(request)

    # used by Responder

    def write(self, data: bytes) -> None:
        transport = self.transport
        if transport is not None and not transport.is_closing():
            transport.write(data)

    def response_done(self, keep_alive: bool) -> None:
        self._current = None
        if not keep_alive:
            self.close()
        elif self._pending:
            self._dispatch(self._pending.popleft())

    def close(self) -> None:
        if self.transport is not None and not self.transport.is_closing():
            self.transport.close()

    def reset(self) -> None:
        """Abort with SO_LINGER 0, so the peer gets a reset (RST), not an orderly close."""
        transport = self.transport
        if transport is None or transport.is_closing():
            return
        sock = transport.get_extra_info("socket")
        if sock is not None:
            with contextlib.suppress(OSError):
                sock.setsockopt(socket.SOL_SOCKET, socket.SO_LINGER, struct.pack("ii", 1, 0))
        transport.abort()

    def _dispatch(self, request: Request) -> None:
        responder = Responder(self, request.keep_alive)
        self._current = responder
        self._handler(request, responder)

    def _reject(self, status: int, body: bytes) -> None:
        """Answer a request we cannot parse or accept, then close the connection."""
        self._pending.clear()
        if self._current is None and self.transport is not None and not self.lost:
            responder = Responder(self, keep_alive=False)
            self._current = responder
            responder.send(status, body)
        else:
            self.close()


class HttpServer:
    """A listening socket plus the set of open connections, so shutdown can close them all."""

    def __init__(self, handler: Handler) -> None:
        self._handler = handler
        self._connections: set[HttpConnection] = set()
        self._server: asyncio.Server | None = None
        self.host = ""
        self.port = 0

    async def start(self, host: str, port: int) -> None:
        loop = asyncio.get_running_loop()
        self._server = await loop.create_server(
            lambda: HttpConnection(self._handler, self._connections),
            host,
            port,
            backlog=4096,
            reuse_address=True,
        )
        sockname = self._server.sockets[0].getsockname()
        self.host = host
        self.port = int(sockname[1])

    async def close(self) -> None:
        if self._server is None:
            return
        self._server.close()
        # Abort, not close: a client that stopped reading must not hold up the shutdown.
        for connection in list(self._connections):
            if connection.transport is not None:
                connection.transport.abort()
        await self._server.wait_closed()
        self._server = None
