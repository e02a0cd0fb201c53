"""Opt-in soak: a long run at moderate load against the mock, resident memory watched.

``loadrun measure`` runs as a child process (32 streams on the "small-fast" engine, about
60 requests/s, records written to disk) for LOADRUN_SOAK_SECONDS (default 1800); its
resident set size is read from /proc every LOADRUN_SOAK_SAMPLE_S seconds. Growth is taken
from the first sample after the first tenth of the run (imports, pools and caches settled)
to the last; the goal (from the issue) is under 50 MB. Prints the samples and the figures.

    LOADRUN_SOAK_SECONDS=1800 python -m pytest -m bench -s tests/bench/test_soak.py
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import time
from pathlib import Path

import httpx
import pytest

from mock_server.launch import start_subprocess

SECONDS = float(os.environ.get("LOADRUN_SOAK_SECONDS", "1800"))
SAMPLE_S = float(os.environ.get("LOADRUN_SOAK_SAMPLE_S", "30"))
GROWTH_LIMIT_MB = 50.0


def resident_mb(pid: int) -> float | None:
    try:
        for line in Path(f"/proc/{pid}/status").read_text().splitlines():
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 1024
    except OSError:
        return None
    return None


@pytest.mark.bench
@pytest.mark.timeout(int(SECONDS) + 900)
@pytest.mark.skipif(not Path("/proc/self/status").exists(), reason="reads resident memory from /proc")
def test_soak_memory_stays_flat(tmp_path: Path) -> None:
    samples: list[tuple[float, float]] = []
    with start_subprocess("small-fast") as mock:
        command = [
            sys.executable, "-m", "loadrun", "measure", "--base-url", mock.base_url,
            "--model", "mock-small-fast", "-c", "32", "-d", str(SECONDS), "--warmup", "2",
            "--input-tokens", "64", "--output-tokens", "32", "--out", str(tmp_path / "runs"),
            "--no-history", "--json", "--time-limit", str(SECONDS + 600),
        ]  # fmt: skip
        started = time.monotonic()
        # Output goes to files: a pipe nobody drains until the end would block the run's
        # final write of a summary larger than the pipe's 64 KiB.
        out_file, err_file = tmp_path / "stdout.json", tmp_path / "stderr.txt"
        with (
            out_file.open("w") as out,
            err_file.open("w") as err,
            subprocess.Popen(command, stdout=out, stderr=err, stdin=subprocess.DEVNULL) as run,
        ):
            try:
                while run.poll() is None:
                    size = resident_mb(run.pid)
                    if size is not None:
                        samples.append((time.monotonic() - started, size))
                    time.sleep(SAMPLE_S)
            finally:
                if run.poll() is None:
                    run.kill()
        stdout, stderr = out_file.read_text(), err_file.read_text()
        mock_stats = httpx.get(mock.url + "/mock/stats", timeout=10).json()
    print()
    print(f"{'t (s)':>8} {'RSS (MB)':>9}")
    for at, size in samples:
        print(f"{at:>8.0f} {size:>9.1f}")
    assert run.returncode == 0, stderr
    summary = json.loads(stdout)
    settled = [size for at, size in samples if at >= SECONDS / 10] or [size for _, size in samples]
    growth = settled[-1] - settled[0]
    requests = summary["requests"]
    print(
        f"soak {SECONDS:g} s: {requests['measured']} requests ({requests['failed']} failed), "
        f"{summary['throughput']['requests_per_s']:.1f} requests/s, "
        f"{summary['throughput']['output_tokens_per_s']:.0f} tokens/s; "
        f"RSS first {samples[0][1]:.1f} MB, settled {settled[0]:.1f} MB, last {settled[-1]:.1f} MB, "
        f"peak {max(size for _, size in samples):.1f} MB, growth after settling {growth:.1f} MB "
        f"(goal < {GROWTH_LIMIT_MB:g} MB); loop lag p99 {summary['generator']['loop_lag_p99_ms']} ms; "
        f"mock completed {mock_stats['requests_completed']} requests"
    )
    assert requests["failed"] == 0
    assert growth < GROWTH_LIMIT_MB
