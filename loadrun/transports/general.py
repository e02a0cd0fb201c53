"""The general transport on httpx: proxies, HTTP/2, unusual auth, control calls, respx tests.

It hands the consumer the same (receive time, bytes) stream as the fast transport; its pool
costs grow with the connection count, so it is meant for modest concurrency.
"""

from __future__ import annotations

from time import perf_counter_ns

import httpx

from loadrun.errors import RequestFailed
from loadrun.transports.base import Endpoint, HttpRequest, ResponseConsumer

# httpx exception -> outcome. Order matters: subclasses before their bases.
_FAILURES: tuple[tuple[type[Exception], str], ...] = (
    (httpx.ConnectTimeout, "timeout_connect"),
    (httpx.ConnectError, "connection_error"),
    (httpx.ReadTimeout, "timeout_idle"),
    (httpx.WriteTimeout, "connection_error"),
    (httpx.PoolTimeout, "timeout_connect"),
    (httpx.RemoteProtocolError, "stream_cut"),
    (httpx.LocalProtocolError, "protocol_error"),
    (httpx.ReadError, "stream_cut"),
    (httpx.WriteError, "connection_error"),
    (httpx.CloseError, "connection_error"),
    (httpx.ProxyError, "connection_error"),
    (httpx.UnsupportedProtocol, "connection_error"),
    (httpx.DecodingError, "protocol_error"),
    (httpx.TooManyRedirects, "protocol_error"),
    (httpx.TransportError, "connection_error"),
)


def failure_outcome(exc: httpx.HTTPError) -> str:
    """The outcome an httpx error stands for."""
    for kind, outcome in _FAILURES:
        if isinstance(exc, kind):
            return outcome
    return "connection_error"


class HttpxTransport:
    def __init__(
        self,
        client: httpx.AsyncClient | None = None,
        *,
        connect_timeout_s: float = 10.0,
        verify_tls: bool = True,
        max_connections: int = 1000,
    ) -> None:
        self._owns_client = client is None
        self._client = client or httpx.AsyncClient(
            timeout=httpx.Timeout(None, connect=connect_timeout_s),
            verify=verify_tls,
            limits=httpx.Limits(max_connections=max_connections, max_keepalive_connections=max_connections),
        )

    async def send(self, request: HttpRequest, consumer: ResponseConsumer) -> None:
        url = request.endpoint.url(request.path)
        headers_seen = False
        try:
            async with self._client.stream(
                request.method, url, content=request.body, headers=list(request.headers)
            ) as response:
                headers_seen = True
                consumer.on_headers(response.status_code, list(response.headers.raw), perf_counter_ns())
                async for chunk in response.aiter_raw():
                    consumer.on_body(chunk, perf_counter_ns())
                consumer.on_end(perf_counter_ns())
        except httpx.HTTPError as exc:
            outcome = failure_outcome(exc)
            if outcome == "stream_cut" and not headers_seen:
                # Closed or reset before any response: nothing was cut, no answer came.
                outcome = "connection_error"
            detail = str(exc) or str(exc.__context__ or "") or "no detail"
            raise RequestFailed(outcome, f"{type(exc).__name__}: {detail}") from exc

    def receive_clock(self, endpoint: Endpoint) -> str:
        return "application"

    async def aclose(self) -> None:
        if self._owns_client:
            await self._client.aclose()
