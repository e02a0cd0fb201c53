"""loadrun's own hot path (fast transport, client, SSE parser, chunk decoder) as a benchmark
client, with the same shape of load as _raw_reader.py. Prints one JSON line.
Usage: python _loadrun_reader.py BASE_URL STREAMS SECONDS WARMUP [TRANSPORT]
"""

from __future__ import annotations

import json
import os
import sys
import time

import anyio

from loadrun.client import ChatClient
from loadrun.driver import ClosedLoopPlan, run_closed_loop
from loadrun.profile import Profile, RequestSpec
from loadrun.record import Record
from loadrun.runner import event_loop_options
from loadrun.target import Target
from loadrun.transports import FastTransport, make_transport


async def main() -> None:
    base_url, streams, seconds, warmup = sys.argv[1], int(sys.argv[2]), float(sys.argv[3]), float(sys.argv[4])
    transport_name = sys.argv[5] if len(sys.argv) > 5 else "fast"
    # "fast" stamps reads with the kernel's arrival time; "fast-callback" in the read callback.
    transport = (
        FastTransport(kernel_stamps=False)
        if transport_name == "fast-callback"
        else make_transport(transport_name)
    )
    client = ChatClient(Target(base_url=base_url, model="m"), transport)
    profile = Profile(request=RequestSpec(input_tokens=3, output_tokens=100))
    records: list[Record] = []
    plan = ClosedLoopPlan(concurrency=streams, duration_s=seconds, warmup_s=warmup)
    start = time.perf_counter()
    cpu0 = time.process_time()
    await run_closed_loop(plan, client.execute, profile.requests(), records.append)
    cpu = time.process_time() - cpu0
    await transport.aclose()
    errors = sorted(e for r in records for e in r.receive_error_us)
    events = sum(len(r.chunk_ns) for r in records)
    pick = lambda q: errors[min(len(errors) - 1, int(q * len(errors)))] / 1e3 if errors else None  # noqa: E731
    print(
        json.dumps(
            {
                "events": events,
                "cpu_s": cpu,
                "wall_s": time.perf_counter() - start,
                "receive_p50_ms": pick(0.5),
                "receive_p99_ms": pick(0.99),
                "failed": sum(1 for r in records if not r.ok),
            }
        )
    )


if __name__ == "__main__":
    if hasattr(os, "sched_setaffinity") and len(os.sched_getaffinity(0)) > 1:
        os.sched_setaffinity(0, {1})
    anyio.run(main, backend="asyncio", backend_options=event_loop_options())
