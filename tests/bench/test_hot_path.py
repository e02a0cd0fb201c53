"""Opt-in benchmark: loadrun's hot path against a minimal raw asyncio reader, side by side.

Server (the bundled mock, preset "wide": 20 ms steps whatever the batch, so 50 events/s per
stream) pinned to core 0, each client pinned to core 1, one after the other in the same
run at 10, 100 and 500 streams. Prints events/s, CPU per event, the CPU ratio to the raw
reader, and receive error (client receive time minus the server's own send stamp).
"loadrun" takes receive times from the kernel's socket arrival stamp (SO_TIMESTAMPNS);
"callback" is the same client stamping in the read callback, as the raw reader does.
Goals (from the issue): CPU per event <= 1.5x the raw reader; 500 streams at <= 1 ms p99.
No timed asserts: the figures go into the notes.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from mock_server.launch import start_subprocess

HERE = Path(__file__).parent
SECONDS = float(os.environ.get("LOADRUN_BENCH_SECONDS", "6"))
WARMUP = 1.0


def run_client(script: str, *args: str) -> dict[str, float]:
    done = subprocess.run(
        [sys.executable, str(HERE / script), *args],
        capture_output=True,
        text=True,
        timeout=SECONDS * 4 + 60,
        check=True,
    )
    return json.loads(done.stdout.strip().splitlines()[-1])  # type: ignore[no-any-return]


@pytest.mark.bench
@pytest.mark.timeout(900)
def test_hot_path_against_raw_reader() -> None:
    rows = []
    with start_subprocess("wide") as mock:
        if hasattr(os, "sched_setaffinity") and len(os.sched_getaffinity(0)) > 1:
            os.sched_setaffinity(mock.pid, {0})
        host, port = mock.url.removeprefix("http://").rsplit(":", 1)
        for streams in (10, 100, 500):
            raw = run_client("_raw_reader.py", host, port, str(streams), str(SECONDS), str(WARMUP))
            ours = run_client("_loadrun_reader.py", mock.base_url, str(streams), str(SECONDS), str(WARMUP))
            callback = run_client(
                "_loadrun_reader.py", mock.base_url, str(streams), str(SECONDS), str(WARMUP), "fast-callback"
            )
            for name, result in (("raw", raw), ("loadrun", ours), ("callback", callback)):
                rows.append((streams, name, result))
    print()
    columns = ("streams", "client", "events/s", "cpu us/event", "ratio", "recv p50 ms", "recv p99 ms")
    print(" ".join(f"{name:>12}" for name in columns))
    raw_cost: dict[int, float] = {}
    for streams, name, result in rows:
        per_event = result["cpu_s"] / max(1, result["events"]) * 1e6
        if name == "raw":
            raw_cost[streams] = per_event
        ratio = per_event / raw_cost[streams]
        print(
            f"{streams:>12} {name:>12} {result['events'] / result['wall_s']:>12.0f} {per_event:>12.2f} "
            f"{ratio:>12.2f} {result['receive_p50_ms']:>12.3f} {result['receive_p99_ms']:>12.3f}"
        )
