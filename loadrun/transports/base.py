"""What every transport shares: the request it sends and the consumer it feeds.

A transport delivers a response as calls on a ResponseConsumer, each with the
``perf_counter_ns()`` reading taken when the bytes came off the socket, so that both
transports hand the same (receive time, bytes) stream to the event-stream parser.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Protocol
from urllib.parse import urlsplit

from loadrun.errors import UsageError


class ResponseConsumer(Protocol):
    def on_headers(self, status: int, headers: list[tuple[bytes, bytes]], ts_ns: int) -> None: ...

    def on_body(self, data: bytes, ts_ns: int) -> None: ...

    def on_end(self, ts_ns: int) -> None: ...


@dataclass(frozen=True, slots=True)
class Endpoint:
    """Where requests go: scheme, host, port and the path prefix of the API."""

    scheme: str
    host: str
    port: int
    path_prefix: str

    @classmethod
    def parse(cls, base_url: str) -> Endpoint:
        try:
            parts = urlsplit(base_url)
        except ValueError as exc:  # e.g. an unclosed IPv6 bracket
            raise UsageError(f"base URL cannot be read ({exc}): {base_url!r}") from exc
        if parts.scheme not in ("http", "https") or not parts.hostname:
            raise UsageError(f"base URL must be http:// or https:// with a host: {base_url!r}")
        if parts.username or parts.password:
            raise UsageError("base URL must not carry credentials; name an environment variable")
        try:
            port = parts.port or (443 if parts.scheme == "https" else 80)
        except ValueError as exc:
            raise UsageError(f"base URL has a bad port: {base_url!r}") from exc
        return cls(parts.scheme, parts.hostname, port, parts.path.rstrip("/"))

    @property
    def tls(self) -> bool:
        return self.scheme == "https"

    @property
    def host_header(self) -> str:
        default = 443 if self.tls else 80
        host = f"[{self.host}]" if ":" in self.host else self.host
        return host if self.port == default else f"{host}:{self.port}"

    def url(self, path: str) -> str:
        return f"{self.scheme}://{self.host_header}{self.path_prefix}{path}"


@dataclass(frozen=True, slots=True)
class HttpRequest:
    endpoint: Endpoint
    method: str
    path: str
    """Path below the endpoint's prefix, e.g. ``/chat/completions``."""
    headers: tuple[tuple[str, str], ...]
    body: bytes


class Transport(Protocol):
    """Sends one request and feeds its response to a consumer.

    Raises errors.RequestFailed for a failure of this one request (refused connection,
    connect timeout, connection lost, malformed HTTP).
    """

    async def send(self, request: HttpRequest, consumer: ResponseConsumer) -> None: ...

    async def aclose(self) -> None: ...

    def receive_clock(self, endpoint: Endpoint) -> str:
        """Where receive times come from: "kernel" (socket arrival stamp) or "application"."""
        ...
