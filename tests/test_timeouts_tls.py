"""TLS: certificates are checked by default, and the time limits hold on the TLS read path.

A small streaming server in this event loop speaks HTTPS with a self-signed certificate
made by the ``openssl`` command line (skipped where it is missing). With verification on
(the default) the connection must fail; turned off by name, the answer must arrive, and a
stalled answer must end as a first-token timeout as it does over plain TCP. Chunked
transfer coding per RFC 9112 section 7.1.
"""

from __future__ import annotations

import asyncio
import json
import shutil
import ssl
import subprocess
from collections.abc import AsyncIterator, Iterator
from contextlib import asynccontextmanager
from pathlib import Path
from time import perf_counter_ns

import pytest

from loadrun.client import ChatClient
from loadrun.protocol import ChatRequest
from loadrun.record import Outcome, Record
from loadrun.target import Target
from loadrun.timeouts import Timeouts
from loadrun.transports import FastTransport, HttpxTransport, Transport

pytestmark = [pytest.mark.anyio, pytest.mark.usefixtures("gc_paused")]

REQUEST = ChatRequest(messages=({"role": "user", "content": "is the ferry on time"},), max_tokens=3)


def event(delta: str) -> bytes:
    return (
        b'data: {"id":"c","object":"chat.completion.chunk","created":1,"model":"m","choices":[{"index":0,'
        b'"delta":' + delta.encode() + b',"finish_reason":null}]}\n\n'
    )


def chunked(data: bytes) -> bytes:
    return b"%x\r\n%b\r\n" % (len(data), data)


@pytest.fixture(scope="module")
def certificate(tmp_path_factory: pytest.TempPathFactory) -> Iterator[tuple[Path, Path]]:
    if shutil.which("openssl") is None:
        pytest.skip("needs the openssl command line to make a certificate")
    folder = tmp_path_factory.mktemp("tls")
    cert, key = folder / "cert.pem", folder / "key.pem"
    subprocess.run(
        ["openssl", "req", "-x509", "-newkey", "rsa:2048", "-nodes", "-days", "1", "-subj", "/CN=localhost",
         "-addext", "subjectAltName=IP:127.0.0.1", "-keyout", str(key), "-out", str(cert)],
        check=True,
        capture_output=True,
        timeout=60,
    )  # fmt: skip
    yield cert, key


@asynccontextmanager
async def tls_server(certificate: tuple[Path, Path], stall_s: float = 0.0) -> AsyncIterator[str]:
    context = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
    context.load_cert_chain(*certificate)

    async def answer(reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        try:
            head = await reader.readuntil(b"\r\n\r\n")
            length = next(
                int(line.split(b":")[1])
                for line in head.split(b"\r\n")
                if line.lower().startswith(b"content-length")
            )
            await reader.readexactly(length)
            writer.write(
                b"HTTP/1.1 200 OK\r\ncontent-type: text/event-stream\r\ntransfer-encoding: chunked\r\n\r\n"
                + chunked(event('{"role":"assistant","content":""}'))
            )
            await writer.drain()
            await asyncio.sleep(stall_s)
            for word in ("ka ", "lo ", "mi "):
                writer.write(chunked(event(json.dumps({"content": word}))))
            writer.write(chunked(b"data: [DONE]\n\n") + b"0\r\n\r\n")
            await writer.drain()
        except (OSError, asyncio.IncompleteReadError, ssl.SSLError):
            pass  # a client that refused our certificate, or went away
        finally:
            writer.close()

    server = await asyncio.start_server(answer, "127.0.0.1", 0, ssl=context)
    port = server.sockets[0].getsockname()[1]
    try:
        yield f"https://127.0.0.1:{port}/v1"
    finally:
        server.close()
        await server.wait_closed()


async def send(base_url: str, transport: Transport, timeouts: Timeouts) -> Record:
    client = ChatClient(Target(base_url=base_url, model="m"), transport, timeouts=timeouts)
    record = Record(request_id=1, intended_ns=perf_counter_ns())
    try:
        await client.execute(REQUEST, record)
    finally:
        await transport.aclose()
    return record


@pytest.mark.parametrize("transport", [FastTransport, HttpxTransport])
async def test_a_self_signed_certificate_is_refused_by_default(
    certificate: tuple[Path, Path], transport: type[FastTransport] | type[HttpxTransport]
) -> None:
    async with tls_server(certificate) as url:
        record = await send(url, transport(), Timeouts(total_s=5.0))
    assert record.outcome is Outcome.CONNECTION_ERROR
    assert record.error is not None and "certificate" in record.error.lower()
    assert Target(base_url=url, model="m").verify_tls


@pytest.mark.parametrize("transport", [FastTransport, HttpxTransport])
async def test_verification_turned_off_by_name_reads_the_stream(
    certificate: tuple[Path, Path], transport: type[FastTransport] | type[HttpxTransport]
) -> None:
    async with tls_server(certificate) as url:
        record = await send(url, transport(verify_tls=False), Timeouts(total_s=5.0))
    assert record.ok, record.error
    assert record.output_tokens == 3


async def test_the_first_token_limit_holds_on_the_tls_path(certificate: tuple[Path, Path]) -> None:
    transport = FastTransport(verify_tls=False)
    assert (
        transport.receive_clock(Target(base_url="https://127.0.0.1:1/v1", model="m").endpoint)
        == "application"
    )
    async with tls_server(certificate, stall_s=2.0) as url:
        record = await send(url, transport, Timeouts(first_token_s=0.3, idle_s=0.3, total_s=5.0))
    assert record.outcome is Outcome.TIMEOUT_FIRST_TOKEN
    # The event loop's timers count whole milliseconds: the limit may end up to 1 ms early.
    assert 0.3 - 0.001 <= (record.end_ns - record.send_ns) / 1e9 < 0.45
