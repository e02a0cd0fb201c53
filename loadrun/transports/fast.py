"""The load hot path: an asyncio Protocol client on httptools (llhttp).

Measured on a 2-core machine, httpx's pool work grows with the square of the connection
count, so at hundreds of streams it cannot time chunks honestly; this transport keeps one
keep-alive connection per in-flight request, parses HTTP with llhttp (never by hand),
takes TLS from the standard library, and stamps each read with ``perf_counter_ns()`` the
moment the bytes arrive.
"""

from __future__ import annotations

import asyncio
import ssl
from time import perf_counter_ns
from typing import cast

import httptools

from loadrun.errors import RequestFailed
from loadrun.transports.base import Endpoint, HttpRequest, ResponseConsumer


def render_request(request: HttpRequest) -> bytes:
    """HTTP/1.1 request bytes with Host, Content-Length and keep-alive."""
    endpoint = request.endpoint
    lines = [
        f"{request.method} {endpoint.path_prefix}{request.path} HTTP/1.1",
        f"Host: {endpoint.host_header}",
        f"Content-Length: {len(request.body)}",
    ]
    lines.extend(f"{name}: {value}" for name, value in request.headers)
    return ("\r\n".join(lines) + "\r\n\r\n").encode("latin-1") + request.body


class _Connection(asyncio.Protocol):
    """One HTTP/1.1 connection; serves one exchange at a time."""

    def __init__(self) -> None:
        self._parser = httptools.HttpResponseParser(self)
        self._transport: asyncio.Transport | None = None
        self._consumer: ResponseConsumer | None = None
        self._waiter: asyncio.Future[None] | None = None
        self._headers: list[tuple[bytes, bytes]] = []
        self._headers_done = False
        self._ts = 0
        self.closed = False
        self.reusable = False

    # asyncio.Protocol
    def connection_made(self, transport: asyncio.BaseTransport) -> None:
        # uvloop's transports are not asyncio.Transport subclasses, so no isinstance check.
        self._transport = cast(asyncio.Transport, transport)

    def data_received(self, data: bytes) -> None:
        self._ts = perf_counter_ns()
        if self._waiter is None:
            # Bytes nobody asked for: the connection cannot be trusted for reuse.
            self.close()
            return
        try:
            self._parser.feed_data(data)
        except httptools.HttpParserError as exc:
            self._fail(RequestFailed("protocol_error", f"malformed HTTP response: {exc}"))
            self.close()

    def connection_lost(self, exc: Exception | None) -> None:
        self.closed = True
        self.reusable = False
        if self._waiter is None or self._waiter.done():
            return
        ts = perf_counter_ns()
        if self._headers_done and self._body_until_close():
            assert self._consumer is not None
            self._consumer.on_end(ts)
            self._waiter.set_result(None)
        elif self._headers_done:
            self._fail(RequestFailed("stream_cut", "connection closed before the response ended"))
        else:
            reason = f": {exc}" if exc else ""
            self._fail(RequestFailed("connection_error", f"connection closed before headers{reason}"))

    # httptools callbacks
    def on_header(self, name: bytes, value: bytes) -> None:
        self._headers.append((name, value))

    def on_headers_complete(self) -> None:
        self._headers_done = True
        assert self._consumer is not None
        self._consumer.on_headers(self._parser.get_status_code(), self._headers, self._ts)

    def on_body(self, body: bytes) -> None:
        assert self._consumer is not None
        self._consumer.on_body(body, self._ts)

    def on_message_complete(self) -> None:
        self.reusable = bool(self._parser.should_keep_alive())
        assert self._consumer is not None and self._waiter is not None
        self._consumer.on_end(self._ts)
        if not self._waiter.done():
            self._waiter.set_result(None)

    # exchange
    async def exchange(self, raw: bytes, consumer: ResponseConsumer) -> None:
        assert self._transport is not None
        self._consumer = consumer
        self._headers = []
        self._headers_done = False
        self.reusable = False
        waiter = asyncio.get_running_loop().create_future()
        self._waiter = waiter
        try:
            self._transport.write(raw)
            await waiter
        finally:
            self._waiter = None
            self._consumer = None

    def close(self) -> None:
        self.reusable = False
        if self._transport is not None and not self.closed:
            self._transport.close()
        self.closed = True

    def _fail(self, exc: RequestFailed) -> None:
        if self._waiter is not None and not self._waiter.done():
            self._waiter.set_exception(exc)

    def _body_until_close(self) -> bool:
        """True when the response had neither a length nor chunked framing (read to EOF)."""
        for name, value in self._headers:
            lower = name.lower()
            if lower == b"content-length" or (lower == b"transfer-encoding" and b"chunked" in value.lower()):
                return False
        return True


class FastTransport:
    """Keep-alive connections, one per in-flight request, reused when the server allows."""

    def __init__(self, *, connect_timeout_s: float = 10.0, verify_tls: bool = True) -> None:
        self._connect_timeout_s = connect_timeout_s
        self._ssl: ssl.SSLContext | None = None
        self._verify_tls = verify_tls
        self._idle: dict[Endpoint, list[_Connection]] = {}
        self._raw_cache: dict[int, bytes] = {}

    async def send(self, request: HttpRequest, consumer: ResponseConsumer) -> None:
        connection = self._take_idle(request.endpoint)
        if connection is None:
            connection = await self._connect(request.endpoint)
        try:
            await connection.exchange(render_request(request), consumer)
        except BaseException:
            connection.close()
            raise
        if connection.reusable and not connection.closed:
            self._idle.setdefault(request.endpoint, []).append(connection)
        else:
            connection.close()

    async def aclose(self) -> None:
        for connections in self._idle.values():
            for connection in connections:
                connection.close()
        self._idle.clear()

    def _take_idle(self, endpoint: Endpoint) -> _Connection | None:
        pool = self._idle.get(endpoint)
        while pool:
            connection = pool.pop()
            if not connection.closed:
                return connection
        return None

    async def _connect(self, endpoint: Endpoint) -> _Connection:
        loop = asyncio.get_running_loop()
        ssl_context = self._ssl_context() if endpoint.tls else None
        try:
            async with asyncio.timeout(self._connect_timeout_s):
                _, protocol = await loop.create_connection(
                    _Connection,
                    endpoint.host,
                    endpoint.port,
                    ssl=ssl_context,
                    server_hostname=endpoint.host if ssl_context else None,
                )
        except TimeoutError as exc:
            raise RequestFailed(
                "timeout_connect", f"connect timed out after {self._connect_timeout_s:g} s"
            ) from exc
        except OSError as exc:
            raise RequestFailed(
                "connection_error",
                f"cannot connect to {endpoint.host}:{endpoint.port}: {exc.strerror or exc}",
            ) from exc
        return protocol

    def _ssl_context(self) -> ssl.SSLContext:
        if self._ssl is None:
            context = ssl.create_default_context()
            if not self._verify_tls:
                context.check_hostname = False
                context.verify_mode = ssl.CERT_NONE
            self._ssl = context
        return self._ssl
