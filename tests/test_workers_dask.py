"""Shards on a Dask cluster: a 2-worker LocalCluster on 127.0.0.1 against the bundled mock."""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
import threading
from collections.abc import Iterator
from dataclasses import replace
from pathlib import Path
from typing import Any

import distributed
import orjson
import pytest

from loadrun.cluster import check_address, cluster_size
from loadrun.errors import UsageError
from loadrun.profile import LoadSpec, Profile, RequestSpec
from loadrun.runner import MeasureSettings
from loadrun.scale import measure_scaled
from loadrun.store import SUMMARY_FILE, read_records

pytestmark = pytest.mark.slow

ENGINE = str(Path(__file__).with_name("itest-engine.toml"))


@pytest.fixture(scope="module")
def cluster() -> Iterator[Any]:
    with distributed.LocalCluster(
        n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1", dashboard_address=None
    ) as local:
        yield local


def _settings(tmp_path: Path, **changes: Any) -> MeasureSettings:
    profile = Profile(name="itest", request=RequestSpec(input_tokens=32, output_tokens=24), load=LoadSpec())
    base = MeasureSettings(
        profile=profile,
        concurrency=4,
        duration_s=2.0,
        warmup_s=0.5,
        out_dir=tmp_path,
        mock_engine=ENGINE,
        record_history=False,
    )
    return replace(base, **changes)


def test_a_local_cluster_run_adds_up_to_its_workers(cluster: Any, tmp_path: Path) -> None:
    """Counts are the sums of the shards'; merged percentiles equal those of every shard's
    raw records within the histogram's precision (3 significant figures: 0.1 %, hdrh docs)."""
    summary = measure_scaled(_settings(tmp_path), None, cluster.scheduler_address).summary
    workers = summary["workers"]
    assert workers["mode"] == "dask" and workers["count"] == 2 and workers["complete"]
    assert workers["start_skew_ms"] < workers["start_skew_tolerance_ms"]
    root = Path(summary["run_folder"])
    shards = [orjson.loads((root / s["folder"] / SUMMARY_FILE).read_bytes()) for s in workers["shards"]]
    assert len({shard["target"]["base_url"] for shard in shards}) == 1  # one mock for both
    for key in ("measured", "ok", "failed"):
        assert summary["requests"][key] == sum(shard["requests"][key] for shard in shards)
    for metric in ("ttft", "e2e", "itl", "tpot"):
        assert summary["latency"][metric]["count"] == sum(
            shard["latency"][metric]["count"] for shard in shards
        )
    ttft_us = sorted(
        row["first_token_us"] - row["intended_us"]
        for shard in workers["shards"]
        for row in read_records(root / shard["records"])
        if row["in_window"] and row["outcome"] == "ok"
    )
    for percentile in (50.0, 90.0, 99.0):
        rank = max(1, int(percentile / 100 * len(ttft_us) + 0.5))  # HdrHistogram's rank rule
        exact = ttft_us[rank - 1]
        merged_us = summary["latency"]["ttft"][f"p{percentile:g}_ms"] * 1000
        assert exact - 2 <= merged_us <= exact * 1.001 + 2


def test_a_dask_worker_that_leaves_is_reported(cluster: Any, tmp_path: Path) -> None:
    client = distributed.Client(cluster.scheduler_address, set_as_default=False)
    try:
        pids = client.run(os.getpid)
    finally:
        client.close()
    victim = sorted(pids)[1]
    timer = threading.Timer(3.0, os.kill, (pids[victim], signal.SIGKILL))  # mid-run, after records
    timer.daemon = True
    timer.start()
    summary = measure_scaled(_settings(tmp_path, duration_s=4.0), 2, cluster.scheduler_address).summary
    timer.join()
    workers = summary["workers"]
    assert workers["complete"] is False
    lost = workers["shards"][1]
    assert not lost["finished"] and victim in lost["error"]
    assert lost["records_kept"] >= 1  # flushed before it died, kept in its run folder
    assert summary["requests"]["measured"] == workers["shards"][0]["measured"]


def test_more_shards_than_dask_workers_are_refused(cluster: Any, tmp_path: Path) -> None:
    with pytest.raises(UsageError, match="3 shards need as many Dask workers"):
        measure_scaled(_settings(tmp_path, concurrency=6), 3, cluster.scheduler_address)


def _closed_loopback_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return int(probe.getsockname()[1])


@pytest.mark.parametrize(
    "address", ["http://127.0.0.1:9/v1", "tcp://", "inproc://x", "tcp://127.0.0.1:99999"]
)
def test_an_address_dask_cannot_use_is_refused_in_one_line(address: str) -> None:
    with pytest.raises(UsageError, match=r"is not a Dask scheduler address|scheduler inside another process"):
        check_address(address)


def test_bad_and_unreachable_schedulers_are_refused_again_and_again_in_this_process() -> None:
    # A Client refused for a bad address left its loop behind: the next Client in the process
    # then tripped an internal assertion instead of saying the scheduler is unreachable.
    with pytest.raises(UsageError, match="is not a Dask scheduler address"):
        cluster_size("http://127.0.0.1:9/v1", connect_timeout_s=2.0)
    address = f"tcp://127.0.0.1:{_closed_loopback_port()}"
    for _ in range(2):
        with pytest.raises(UsageError, match="cannot reach a Dask scheduler"):
            cluster_size(address, connect_timeout_s=2.0)


@pytest.mark.parametrize("address", ["http://127.0.0.1:9/v1", "closed-port"])
def test_the_command_line_refuses_a_bad_cluster_in_one_line(address: str) -> None:
    if address == "closed-port":
        address = f"tcp://127.0.0.1:{_closed_loopback_port()}"
    done = subprocess.run(
        [sys.executable, "-m", "loadrun", "measure", "--cluster", address, "--requests", "4", "--yes"],
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert done.returncode == 2, done.stderr
    assert "Traceback" not in done.stderr and "Exception ignored" not in done.stderr, done.stderr
    assert done.stderr.strip().splitlines()[-1].startswith("UsageError: "), done.stderr
