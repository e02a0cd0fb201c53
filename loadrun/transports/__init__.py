"""Transports: how request bytes reach the endpoint. See base.py for the shared contract."""

from __future__ import annotations

from loadrun.errors import UsageError
from loadrun.transports.base import Endpoint, HttpRequest, ResponseConsumer, Transport
from loadrun.transports.fast import FastTransport
from loadrun.transports.general import HttpxTransport

TRANSPORT_NAMES = ("fast", "httpx")


def make_transport(name: str, *, connect_timeout_s: float = 10.0, verify_tls: bool = True) -> Transport:
    if name == "fast":
        return FastTransport(connect_timeout_s=connect_timeout_s, verify_tls=verify_tls)
    if name == "httpx":
        return HttpxTransport(connect_timeout_s=connect_timeout_s, verify_tls=verify_tls)
    raise UsageError(f"unknown transport {name!r}; choose one of {', '.join(TRANSPORT_NAMES)}")


__all__ = [
    "TRANSPORT_NAMES",
    "Endpoint",
    "FastTransport",
    "HttpRequest",
    "HttpxTransport",
    "ResponseConsumer",
    "Transport",
    "make_transport",
]
