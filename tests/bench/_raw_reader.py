"""Reference client for benchmarks: the least work that still reads every event.

Opens N keep-alive connections, sends a streamed chat request on each, and per read only
splits events and pulls the server's send stamp out with bytes.find; no HTTP parser, no
JSON. Prints one JSON line: events, CPU seconds, receive error percentiles.
Usage: python _raw_reader.py HOST PORT STREAMS SECONDS WARMUP
"""

from __future__ import annotations

import asyncio
import json
import os
import sys
import time

STAMP = b'"mock_sent_ns":'


def request_bytes(host: str, port: int) -> bytes:
    body = json.dumps(
        {
            "model": "m",
            "messages": [{"role": "user", "content": "ka lo mi"}],
            "max_tokens": 100,
            "stream": True,
        }
    ).encode()
    head = (
        f"POST /v1/chat/completions HTTP/1.1\r\nHost: {host}:{port}\r\nContent-Type: application/json\r\n"
        f"Content-Length: {len(body)}\r\n\r\n"
    ).encode()
    return head + body


async def main() -> None:
    host, port, streams, seconds, warmup = (
        sys.argv[1],
        int(sys.argv[2]),
        int(sys.argv[3]),
        float(sys.argv[4]),
        float(sys.argv[5]),
    )
    request = request_bytes(host, port)
    errors: list[int] = []
    counts = [0]
    start = time.perf_counter()
    stop_at = start + warmup + seconds

    async def stream(index: int) -> None:
        await asyncio.sleep(warmup * index / streams)
        reader, writer = await asyncio.open_connection(host, port)
        while time.perf_counter() < stop_at:
            writer.write(request)
            done = False
            while not done:
                data = await reader.read(65536)
                now = time.perf_counter_ns()
                if not data:
                    return
                position = data.find(STAMP)
                while position >= 0:
                    end = data.find(b"}", position)
                    counts[0] += 1
                    errors.append(now - int(data[position + len(STAMP) : end].split(b",")[0]))
                    position = data.find(STAMP, end)
                done = data.endswith(b"0\r\n\r\n")
        writer.close()

    cpu0 = time.process_time()
    await asyncio.gather(*(stream(i) for i in range(streams)))
    cpu = time.process_time() - cpu0
    errors.sort()
    pick = lambda q: errors[min(len(errors) - 1, int(q * len(errors)))] / 1e6 if errors else None  # noqa: E731
    print(
        json.dumps(
            {
                "events": counts[0],
                "cpu_s": cpu,
                "wall_s": time.perf_counter() - start,
                "receive_p50_ms": pick(0.5),
                "receive_p99_ms": pick(0.99),
            }
        )
    )


if __name__ == "__main__":
    try:
        import uvloop

        uvloop.install()
    except ImportError:
        pass
    if hasattr(os, "sched_setaffinity") and len(os.sched_getaffinity(0)) > 1:
        os.sched_setaffinity(0, {1})
    asyncio.run(main())
