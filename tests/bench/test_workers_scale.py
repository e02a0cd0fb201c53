"""Opt-in benchmark: events/s with 1 and 2 worker processes, and CPU per event.

Target: the bundled mock, preset "wide" (every step 20 ms whatever the batch: 50 events/s
per stream), one child process on 127.0.0.1. The same total concurrency runs on 1 worker
process, then split across 2; then the raw reference reader (tests/bench/_raw_reader.py)
reads the same number of streams. Printed: events/s (chunks of the measured requests per
second of the window), CPU per event (each worker's event-loop thread CPU over all the
chunks it read), and the ratio to the raw reader's CPU per event. A single worker at half
the streams has as many streams as each of the two: equal CPU per event means splitting
adds no cost of its own, so N workers on N free cores give N times the events/s.

On a 2-core machine the mock needs a core of its own at these rates, so 2 workers share
the other one with it: the events/s ratio says what the machine allows, the CPU per event
says what one process costs. No timed asserts: the figures go into the issue's note.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path
from typing import Any

import pytest

from loadrun.profile import LoadSpec, Profile, RequestSpec
from loadrun.runner import MeasureSettings
from loadrun.scale import measure_scaled
from loadrun.store import read_records
from loadrun.target import Target
from mock_server.launch import start_subprocess

HERE = Path(__file__).parent
SECONDS = float(os.environ.get("LOADRUN_BENCH_SECONDS", "6"))
STREAMS = tuple(int(n) for n in os.environ.get("LOADRUN_BENCH_STREAMS", "200,600").split(","))
WARMUP = 1.0


def _events_and_cpu(summary: dict[str, Any]) -> tuple[float, float, int]:
    """(events/s in the window, CPU seconds of all workers' loops, chunks they read)."""
    latency = summary["latency"]
    per_s = (latency["ttft"]["count"] + latency["itl"]["count"]) / summary["window"]["seconds"]
    cpu_s = 0.0
    chunks = 0
    root = Path(summary["run_folder"])
    for shard in summary["workers"]["shards"]:
        worker = json.loads((root / shard["folder"] / "summary.json").read_text())
        cpu_s += worker["generator"]["cpu_s"]
        chunks += sum(len(row["chunk_offsets_us"]) for row in read_records(root / shard["records"]))
    return per_s, cpu_s, chunks


def _raw(host: str, port: str, streams: int) -> dict[str, float]:
    done = subprocess.run(
        [sys.executable, str(HERE / "_raw_reader.py"), host, port, str(streams), str(SECONDS), str(WARMUP)],
        capture_output=True,
        text=True,
        timeout=SECONDS * 4 + 60,
        check=True,
    )
    return json.loads(done.stdout.strip().splitlines()[-1])  # type: ignore[no-any-return]


@pytest.mark.bench
@pytest.mark.timeout(900)
def test_events_per_second_with_one_and_two_workers(tmp_path: Path) -> None:
    profile = Profile(name="bench", request=RequestSpec(input_tokens=16, output_tokens=100), load=LoadSpec())
    rows: list[tuple[int, str, float, float, float | None]] = []
    with start_subprocess("wide") as mock:
        target = Target(base_url=mock.base_url, model="mock-wide")
        host, port = mock.url.removeprefix("http://").rsplit(":", 1)
        for streams in STREAMS:
            raw = _raw(host, port, streams)
            raw_cost = raw["cpu_s"] / max(1, raw["events"]) * 1e6
            rows.append((streams, "raw reader", raw["events"] / raw["wall_s"], raw_cost, 1.0))
            # (workers, total streams): the half-load single worker has the same streams per
            # process as each of the two, so its CPU per event is what theirs should be.
            for workers, total in ((1, streams), (1, streams // 2), (2, streams)):
                settings = MeasureSettings(
                    profile=profile,
                    target=target,
                    concurrency=total,
                    duration_s=SECONDS,
                    warmup_s=WARMUP,
                    out_dir=tmp_path / f"{total}-{workers}",
                    record_history=False,
                )
                summary = measure_scaled(settings, workers).summary
                per_s, cpu_s, chunks = _events_and_cpu(summary)
                cost = cpu_s / max(1, chunks) * 1e6
                limited = summary["generator"]["health"]["note"] or "healthy"
                name = f"{workers} worker(s)" if total == streams else f"1 at {total}"
                rows.append((streams, name, per_s, cost, cost / raw_cost))
                print(
                    f"  {total} streams, {workers} worker(s): generator {limited}; "
                    f"skew {summary['workers']['start_skew_ms']} ms"
                )
    print()
    print(f"{'streams':>8} {'client':>12} {'events/s':>10} {'cpu us/event':>13} {'vs raw':>7}")
    for streams, name, per_s, cost, ratio in rows:
        print(f"{streams:>8} {name:>12} {per_s:>10.0f} {cost:>13.2f} {ratio or 0:>7.2f}")
    for streams in STREAMS:
        one = next(r for r in rows if r[0] == streams and r[1] == "1 worker(s)")
        half = next(r for r in rows if r[0] == streams and r[1].startswith("1 at"))
        two = next(r for r in rows if r[0] == streams and r[1] == "2 worker(s)")
        print(
            f"{streams} streams: 2 workers / 1 worker = {two[2] / one[2]:.2f}x events/s; "
            f"events per generator CPU-second {1e6 / one[3]:.0f} (1 worker), {1e6 / two[3]:.0f} "
            f"(2 workers together), {1e6 / half[3]:.0f} (1 worker at half the streams); "
            f"2 workers cost {two[3] / half[3]:.2f}x the CPU per event of one with as many streams each"
        )
