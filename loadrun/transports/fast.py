"""The load hot path: an HTTP/1.1 client on httptools (llhttp) over asyncio.

Measured on a 2-core machine, httpx's pool work grows with the square of the connection
count, so at hundreds of streams it cannot time chunks honestly. This transport keeps one
keep-alive connection per in-flight request and parses HTTP with llhttp (never by hand).

Receive times: a batching server writes the tokens of one step to every stream at once,
so a client reading hundreds of sockets reaches the last of them milliseconds after its
bytes arrived; a timestamp taken in the read callback would carry that delay. On Linux,
plain-TCP connections therefore ask the kernel to stamp each read (SO_TIMESTAMPNS) and use
that arrival time; TLS connections (stdlib ssl through an asyncio Protocol) and other
platforms stamp with ``perf_counter_ns()`` in the read callback.

Time limits are the client's (``loadrun.timeouts``): it cancels ``send``, which closes the
connection; only the connect limit lives here.
"""

from __future__ import annotations

import asyncio
import os
import socket
import ssl
import struct
import sys
import time
from time import perf_counter_ns
from typing import cast

import httptools

from loadrun.errors import RequestFailed
from loadrun.transports.base import Endpoint, HttpRequest, ResponseConsumer

_SO_TIMESTAMPNS = getattr(socket, "SO_TIMESTAMPNS", 35)
KERNEL_STAMPS_AVAILABLE = sys.platform.startswith("linux")
_READ_SIZE = 256 * 1024
_STAMP = struct.Struct("qq")
_CLOCK_REFRESH_NS = 1_000_000_000
_ERROR_SWEEP_S = 0.1


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


class KernelClock:
    """Maps the kernel's receive stamps (CLOCK_REALTIME) onto perf_counter_ns (monotonic).

    The offset between the two clocks is re-measured every second, so a clock slew during
    a long run does not accumulate into the latencies.
    """

    def __init__(self) -> None:
        self._offset = 0
        self._measured_at = 0
        self.read_buffer = memoryview(bytearray(_READ_SIZE))
        """One receive buffer for all connections of a transport (one event loop, one reader at a time)."""
        self.refresh()

    def refresh(self) -> None:
        best_width = None
        for _ in range(5):
            before = perf_counter_ns()
            wall = time.time_ns()
            after = perf_counter_ns()
            if best_width is None or after - before < best_width:
                best_width = after - before
                self._offset = wall - (before + after) // 2
                self._measured_at = after

    def to_monotonic(self, realtime_ns: int, now_ns: int) -> int:
        if now_ns - self._measured_at > _CLOCK_REFRESH_NS:
            self.refresh()
        return realtime_ns - self._offset


class _Connection:
    """One HTTP/1.1 connection's exchange state and llhttp callbacks; subclasses do the I/O."""

    def __init__(self) -> None:
        self._parser = httptools.HttpResponseParser(self)
        self._consumer: ResponseConsumer | None = None
        self._waiter: asyncio.Future[None] | None = None
        self._headers: list[tuple[bytes, bytes]] = []
        self._headers_done = False
        self._ts = 0
        self.closed = False
        self.reusable = False

    # I/O, supplied by subclasses
    def _write(self, data: bytes) -> None:
        raise NotImplementedError

    def close(self) -> None:
        raise NotImplementedError

    # bytes in
    def _feed(self, data: bytes, ts: int) -> None:
        self._ts = ts
        if self._waiter is None:
            # Bytes nobody asked for: the connection cannot be trusted for reuse.
            self.close()
            return
        try:
            self._parser.feed_data(data)
        except httptools.HttpParserError as exc:
            self._fail(RequestFailed("protocol_error", f"malformed HTTP response: {exc}"))
            self.close()

    def _lost(self, exc: BaseException | None) -> None:
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
        if self.closed:
            raise RequestFailed("connection_error", "connection closed before the request was sent")
        self._consumer = consumer
        self._headers = []
        self._headers_done = False
        self.reusable = False
        waiter = asyncio.get_running_loop().create_future()
        self._waiter = waiter
        try:
            self._write(raw)
            await waiter
        finally:
            self._waiter = None
            self._consumer = None

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


class _ProtocolConnection(_Connection, asyncio.Protocol):
    """Reads through an asyncio transport (used for TLS); stamps reads in the callback."""

    def __init__(self) -> None:
        super().__init__()
        self._transport: asyncio.Transport | None = None

    def connection_made(self, transport: asyncio.BaseTransport) -> None:
        # uvloop's transports are not asyncio.Transport subclasses, so no isinstance check.
        self._transport = cast(asyncio.Transport, transport)

    def data_received(self, data: bytes) -> None:
        self._feed(data, perf_counter_ns())

    def connection_lost(self, exc: Exception | None) -> None:
        self._lost(exc)

    def _write(self, data: bytes) -> None:
        assert self._transport is not None
        self._transport.write(data)

    def close(self) -> None:
        self.reusable = False
        if self._transport is not None and not self.closed:
            self._transport.close()
        self.closed = True


class _ErrorSweep:
    """Finds stamped sockets whose peer reset them while nobody will tell us.

    uvloop (libuv) stops watching a descriptor for good when epoll reports an error such as
    a reset, after one last read callback; if data was queued before the reset, that read
    returns the data and not the error, and the socket falls silent. Checking SO_ERROR on
    every read would cost a system call per event, so the sockets with a request in flight
    are checked every ``_ERROR_SWEEP_S`` instead (a few microseconds per socket and second).
    """

    def __init__(self) -> None:
        self._busy: set[_StampedSocketConnection] = set()
        self._timer: asyncio.TimerHandle | None = None

    def add(self, connection: _StampedSocketConnection) -> None:
        self._busy.add(connection)
        if self._timer is None:
            self._timer = asyncio.get_running_loop().call_later(_ERROR_SWEEP_S, self._sweep)

    def discard(self, connection: _StampedSocketConnection) -> None:
        self._busy.discard(connection)

    def _sweep(self) -> None:
        self._timer = None
        for connection in list(self._busy):
            connection.check_error()
        if self._busy:
            self._timer = asyncio.get_running_loop().call_later(_ERROR_SWEEP_S, self._sweep)

    def close(self) -> None:
        if self._timer is not None:
            self._timer.cancel()
            self._timer = None
        self._busy.clear()


class _StampedSocketConnection(_Connection):
    """Reads a plain TCP socket with recvmsg and uses the kernel's arrival stamp."""

    def __init__(
        self, sock: socket.socket, loop: asyncio.AbstractEventLoop, clock: KernelClock, sweep: _ErrorSweep
    ) -> None:
        super().__init__()
        self._sock = sock
        self._loop = loop
        self._clock = clock
        self._sweep = sweep
        self._fd = sock.fileno()
        loop.add_reader(self._fd, self._on_readable)

    async def exchange(self, raw: bytes, consumer: ResponseConsumer) -> None:
        self._sweep.add(self)
        try:
            await super().exchange(raw, consumer)
        finally:
            self._sweep.discard(self)

    def check_error(self) -> None:
        """Called by the sweep: a pending socket error ends the exchange (after any queued data)."""
        if self.closed:
            return
        try:
            error = self._sock.getsockopt(socket.SOL_SOCKET, socket.SO_ERROR)
        except OSError as exc:
            error = exc.errno or 0
        if not error:
            return
        view = self._clock.read_buffer
        while not self.closed:  # the error is consumed: what is left reads as data, then EOF
            try:
                size = self._sock.recv_into(view)
            except OSError:
                break
            if not size:
                break
            self._feed(bytes(view[:size]), perf_counter_ns())
        if not self.closed:
            self._shut()
            self._lost(OSError(error, os.strerror(error)))

    def _on_readable(self) -> None:
        # recvmsg_into a buffer kept by the clock: plain recvmsg allocates its whole
        # buffer size on every call (measured 20 us at 256 KiB against 3.5 us here).
        view = self._clock.read_buffer
        try:
            size, ancillary, _flags, _address = self._sock.recvmsg_into([view], 64)
        except (BlockingIOError, InterruptedError):
            return
        except OSError as exc:
            self._shut()
            self._lost(exc)
            return
        now = perf_counter_ns()
        if not size:
            self._shut()
            self._lost(None)
            return
        ts = now
        for level, kind, payload in ancillary:
            if level == socket.SOL_SOCKET and kind == _SO_TIMESTAMPNS and len(payload) >= 16:
                seconds, nanoseconds = _STAMP.unpack_from(payload)
                stamped = self._clock.to_monotonic(seconds * 1_000_000_000 + nanoseconds, now)
                if 0 <= now - stamped < 10_000_000_000:  # ignore a stamp across a clock jump
                    ts = stamped
        self._feed(bytes(view[:size]), ts)

    def _write(self, data: bytes) -> None:
        try:
            sent = self._sock.send(data)
        except (BlockingIOError, InterruptedError):
            sent = 0
        except OSError as exc:
            self._shut()
            self._lost(exc)
            return
        if sent < len(data):
            # Rare (a request larger than the socket buffer): finish it in the background.
            task = self._loop.create_task(self._send_rest(data[sent:]))
            task.add_done_callback(lambda done: done.exception() if not done.cancelled() else None)

    async def _send_rest(self, rest: bytes) -> None:
        try:
            await self._loop.sock_sendall(self._sock, rest)
        except OSError as exc:
            self._shut()
            self._lost(exc)

    def _shut(self) -> None:
        if not self.closed:
            self._loop.remove_reader(self._fd)
            self._sock.close()
        self.closed = True
        self.reusable = False

    def close(self) -> None:
        self._shut()


class FastTransport:
    """Keep-alive connections, one per in-flight request, reused when the server allows."""

    def __init__(
        self, *, connect_timeout_s: float = 10.0, verify_tls: bool = True, kernel_stamps: bool = True
    ) -> None:
        self._connect_timeout_s = connect_timeout_s
        self._ssl: ssl.SSLContext | None = None
        self._verify_tls = verify_tls
        self._idle: dict[Endpoint, list[_Connection]] = {}
        self._kernel_stamps = kernel_stamps and KERNEL_STAMPS_AVAILABLE
        self._clock = KernelClock() if self._kernel_stamps else None
        self._sweep = _ErrorSweep()

    def receive_clock(self, endpoint: Endpoint) -> str:
        """Where receive times for this endpoint come from: "kernel" or "application"."""
        return "kernel" if self._kernel_stamps and not endpoint.tls else "application"

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
        self._sweep.close()

    def _take_idle(self, endpoint: Endpoint) -> _Connection | None:
        pool = self._idle.get(endpoint)
        while pool:
            connection = pool.pop()
            if not connection.closed:
                return connection
        return None

    async def _connect(self, endpoint: Endpoint) -> _Connection:
        try:
            async with asyncio.timeout(self._connect_timeout_s):
                if endpoint.tls or self._clock is None:
                    return await self._connect_protocol(endpoint)
                return await self._connect_socket(endpoint, self._clock)
        except TimeoutError as exc:
            raise RequestFailed(
                "timeout_connect", f"connect timed out after {self._connect_timeout_s:g} s"
            ) from exc
        except OSError as exc:
            raise RequestFailed(
                "connection_error",
                f"cannot connect to {endpoint.host}:{endpoint.port}: {exc.strerror or exc}",
            ) from exc

    async def _connect_protocol(self, endpoint: Endpoint) -> _Connection:
        loop = asyncio.get_running_loop()
        ssl_context = self._ssl_context() if endpoint.tls else None
        _, protocol = await loop.create_connection(
            _ProtocolConnection,
            endpoint.host,
            endpoint.port,
            ssl=ssl_context,
            server_hostname=endpoint.host if ssl_context else None,
        )
        return protocol

    async def _connect_socket(self, endpoint: Endpoint, clock: KernelClock) -> _Connection:
        loop = asyncio.get_running_loop()
        addresses = await loop.getaddrinfo(endpoint.host, endpoint.port, type=socket.SOCK_STREAM)
        last_error: OSError | None = None
        for family, kind, proto, _name, address in addresses:
            sock = socket.socket(family, kind, proto)
            try:
                sock.setblocking(False)
                sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
                sock.setsockopt(socket.SOL_SOCKET, _SO_TIMESTAMPNS, 1)
                await loop.sock_connect(sock, address)
            except OSError as exc:
                sock.close()
                last_error = exc
                continue
            except BaseException:
                sock.close()
                raise
            return _StampedSocketConnection(sock, loop, clock, self._sweep)
        raise last_error or OSError(f"no address for {endpoint.host}")

    def _ssl_context(self) -> ssl.SSLContext:
        if self._ssl is None:
            context = ssl.create_default_context()
            if not self._verify_tls:
                context.check_hostname = False
                context.verify_mode = ssl.CERT_NONE
            self._ssl = context
        return self._ssl
